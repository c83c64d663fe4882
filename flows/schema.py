"""Every table thresher writes, defined once as pyarrow schemas.

Stage tables share COMMON columns, then the unit's columns (PAGE_COLUMNS or
CHUNK_COLUMNS), then the producing step's own payload columns (STAGE_PAYLOAD).
A custom step's payload goes into the `notes` column (a string-to-string map).
The README documents the hand-off table column by column from HANDOFF.
"""

from __future__ import annotations

from functools import lru_cache

import pyarrow as pa

from thresher.flows import arrow_setup  # noqa: F401 - before any table is built: no pandas import

TS = pa.timestamp("us", tz="UTC")
STR_LIST = pa.list_(pa.string())

COMMON = [
    pa.field("run_id", pa.string(), nullable=False),
    pa.field("doc_id", pa.string(), nullable=False),
    pa.field("source_path", pa.string(), nullable=False),
    pa.field("unit_id", pa.string(), nullable=False),
    pa.field("parent_ids", STR_LIST),
    pa.field("locator", pa.string(), nullable=False),
    pa.field("page", pa.int32()),
    pa.field("step", pa.string(), nullable=False),
    pa.field("step_version", pa.string(), nullable=False),
    pa.field("config_digest", pa.string(), nullable=False),
    pa.field("status", pa.string(), nullable=False),
    pa.field("reason", pa.string()),
    pa.field("error_type", pa.string()),
    pa.field("traceback", pa.string()),
    pa.field("attempt", pa.int32(), nullable=False),
    pa.field("started_at", TS),
    # This unit's own time in the step, when the step measured units separately (PDF
    # pages at extract), else null; document_ms is the step's time for the whole document,
    # on the document's first row at that stage only, so both sum to real time.
    pa.field("duration_ms", pa.float64()),
    pa.field("document_ms", pa.float64()),
    pa.field("warnings", STR_LIST),
]

BLOCK = pa.struct(
    [
        pa.field("kind", pa.string()),
        pa.field("level", pa.int8()),
        pa.field("text", pa.string()),
        # Set by the language step (null before it, and for blocks it did not judge).
        pa.field("language", pa.string()),
        pa.field("language_prob", pa.float64()),
    ]
)

PAGE_COLUMNS = [
    pa.field("text", pa.string()),
    pa.field("blocks", pa.list_(BLOCK)),
    pa.field("title", pa.string()),
    pa.field("format", pa.string()),
    pa.field("language", pa.string()),
    pa.field("language_prob", pa.float64()),
]

CHUNK_COLUMNS = [
    pa.field("chunk_id", pa.string()),
    pa.field("chunk_index", pa.int32()),
    pa.field("text", pa.string()),
    pa.field("heading_path", STR_LIST),
    pa.field("page_start", pa.int32()),
    pa.field("page_end", pa.int32()),
    pa.field("char_start", pa.int32()),
    pa.field("char_end", pa.int32()),
    pa.field("prefix_chars", pa.int32()),
    pa.field("title", pa.string()),
    pa.field("format", pa.string()),
    pa.field("language", pa.string()),
    pa.field("language_prob", pa.float64()),
    pa.field("token_count", pa.int32()),
    pa.field("encoding", pa.string()),
]

NOTES = pa.field("notes", pa.map_(pa.string(), pa.string()))

# What a step took out of a unit's text and why (extract: running headers, footers,
# page numbers; boilerplate: blocks that repeat across a site's pages).
REMOVAL = pa.struct(
    [
        pa.field("kind", pa.string()),
        pa.field("text", pa.string()),
        pa.field("reason", pa.string()),
    ]
)

# Payload columns kept for later runs to decide from (fingerprints, signatures), not
# for a reader: `trail --json` and the review page leave them out.
MACHINE_COLUMNS = frozenset({"signature", "band_keys", "block_keys", "removed_keys"})

STAGE_PAYLOAD: dict[str, list[pa.Field]] = {
    "extract": [
        pa.field("method", pa.string()),
        pa.field("page_count", pa.int32()),
        pa.field("char_count", pa.int32()),
        pa.field("word_count", pa.int32()),
        pa.field("unprintable_share", pa.float64()),
        pa.field("table_share", pa.float64()),
        pa.field("table_count", pa.int32()),
        pa.field("columns", pa.int32()),
        pa.field("removed", pa.list_(REMOVAL)),
        # A navigation page's kind (contents, index, figures, tables), else empty.
        pa.field("navigation", pa.string()),
        # Why a PDF page's text layer was judged unreadable (read by OCR or failed), else empty.
        pa.field("layer_problem", pa.string()),
        # Stray control bytes removed from a text file before decoding (its first page).
        pa.field("control_bytes", pa.int32()),
        pa.field("encoding", pa.string()),
        pa.field("byte_size", pa.int64()),
        pa.field("modified_at", TS),
        # An e-mail's header fields (null for other formats): metadata, not chunk text.
        pa.field("mail_from", pa.string()),
        pa.field("mail_to", pa.string()),
        pa.field("mail_cc", pa.string()),
        pa.field("mail_date", pa.string()),
    ],
    "boilerplate": [
        pa.field("site", pa.string()),
        pa.field("removed", pa.list_(REMOVAL)),
        # Fingerprints (64-bit) of the page's distinct paragraph blocks, and of those it
        # lost: a later run decides the site from these, without the pages' text.
        pa.field("block_keys", pa.list_(pa.uint64())),
        pa.field("removed_keys", pa.list_(pa.uint64())),
    ],
    "clean": [
        pa.field("fixes", pa.map_(pa.string(), pa.int32())),
        pa.field("chars_removed", pa.int32()),
        pa.field("removed_share", pa.float64()),
        pa.field("heavy_removal", pa.bool_()),
        pa.field("removed", pa.list_(REMOVAL)),
    ],
    "language": [
        pa.field("doc_language", pa.string()),
        pa.field("doc_mixed", pa.bool_()),
        pa.field("doc_languages", pa.map_(pa.string(), pa.float64())),
        # Blocks left out of the language vote: mostly identifiers, commands, paths, numbers.
        pa.field("unvoted_blocks", pa.int32()),
    ],
    "split": [
        pa.field("merged_sections", pa.int32()),
        pa.field("overlap_chars", pa.int32()),
    ],
    "personal": [
        pa.field("personal_counts", pa.map_(pa.string(), pa.int32())),  # kind -> findings; never values
        pa.field("personal_findings", pa.list_(pa.struct([
            pa.field("kind", pa.string()), pa.field("start", pa.int32()), pa.field("end", pa.int32())]))),
        pa.field("masked", pa.int32()),  # findings replaced by a marker in this stage's text
    ],
    "dedup": [
        pa.field("content_hash", pa.string()),  # SHA-256 of the normalised text
        pa.field("document_hash", pa.string()),  # SHA-256 of the document's normalised text
        pa.field("duplicate_of", pa.string()),  # chunk_id of the canonical chunk
        pa.field("duplicate_kind", pa.string()),  # exact | near | document
        pa.field("similarity", pa.float64()),  # 1.0 for copies, else the MinHash estimate
        pa.field("signature", pa.list_(pa.uint32())),  # MinHash minima, kept for later runs
        pa.field("band_keys", pa.list_(pa.uint64())),  # one LSH key per band
    ],
    "tokens": [
        pa.field("token_counts", pa.map_(pa.string(), pa.int32())),
    ],
}


def stage_schema(stage: str, unit: str) -> pa.Schema:
    """Schema of a stage table: common, unit and payload columns, in that order."""
    unit_cols = PAGE_COLUMNS if unit == "pages" else CHUNK_COLUMNS
    payload = STAGE_PAYLOAD.get(stage, [NOTES])
    names = {f.name for f in unit_cols}
    # A payload column may share a unit column's name (e.g. extract's "encoding" is a
    # text encoding, the chunk's is a token encoding): units never collide with it.
    payload = [f for f in payload if f.name not in names]
    return pa.schema(COMMON + unit_cols + payload)


# Columns a stored row has that its input unit does not take: ids, lineage and times
# are made anew for the next stage's rows, and a page's text is its blocks' (Page.text).
# Converting them to Python was two thirds of turning a stage's rows into Python (a
# chunk row's started_at alone cost as much as all the columns a unit takes; pyarrow
# 26, scratch timing), a quarter of a worker's read of its batch's inputs.
_RECORD_ONLY = {"run_id", "source_path", "unit_id", "parent_ids", "step", "step_version", "config_digest",
                "attempt", "started_at", "duration_ms", "document_ms"}


def unit_columns(unit: str) -> list[str]:
    """The columns a stored row of `unit` becomes a step's input unit from
    (rows.row_to_page, rows.row_to_chunk): doc_id, the unit's own columns and its outcome;
    not the stage's payload, nor the record-keeping columns (_RECORD_ONLY)."""
    skip = _RECORD_ONLY | ({"text"} if unit == "pages" else {"page"})
    return [f.name for f in COMMON + (PAGE_COLUMNS if unit == "pages" else CHUNK_COLUMNS) if f.name not in skip]


@lru_cache(maxsize=None)
def payload_fields(stage: str, unit: str) -> tuple[pa.Field, ...]:
    # Kept once per stage: asked for every row written or read (167,238 times, 1.3 s, in
    # dedup's pass over a 3,169-document drive).
    unit_names = {f.name for f in (PAGE_COLUMNS if unit == "pages" else CHUNK_COLUMNS)}
    return tuple(f for f in STAGE_PAYLOAD.get(stage, [NOTES]) if f.name not in unit_names)


CATALOG = pa.schema(
    [
        pa.field("source_path", pa.string(), nullable=False),
        pa.field("doc_id", pa.string(), nullable=False),
        pa.field("size", pa.int64()),
        pa.field("mtime", TS),
        # The stat record: when all of size and these match, the stored doc_id is reused.
        pa.field("mtime_ns", pa.int64()),
        pa.field("inode", pa.int64()),
        pa.field("device", pa.int64()),
        pa.field("ctime_ns", pa.int64()),
        pa.field("first_run", pa.string()),
        pa.field("last_run", pa.string()),
        pa.field("present", pa.bool_()),
        pa.field("canonical_path", pa.string()),
        pa.field("chain_digest", pa.string()),
        # A document inside a document (archive member, attachment): its container's
        # doc_id and its name there; null for a file of the drive.
        pa.field("container_doc_id", pa.string()),
        pa.field("member_name", pa.string()),
        # Access (flows/access.py): file-system facts at scan time, then the rules' result.
        pa.field("owner_uid", pa.int64()),
        pa.field("owner", pa.string()),
        pa.field("group_gid", pa.int64()),
        pa.field("group", pa.string()),
        pa.field("mode", pa.int32()),
        pa.field("acl", STR_LIST),
        pa.field("readers", STR_LIST),
        pa.field("label", pa.string()),
        pa.field("access_rule", pa.string()),
    ]
)

HANDOFF = pa.schema(
    [
        pa.field("chunk_id", pa.string(), nullable=False),
        pa.field("doc_id", pa.string(), nullable=False),
        pa.field("source_path", pa.string(), nullable=False),
        pa.field("source_paths", STR_LIST, nullable=False),
        pa.field("title", pa.string()),
        pa.field("heading_path", STR_LIST),
        pa.field("chunk_index", pa.int32()),
        pa.field("page_start", pa.int32()),
        pa.field("page_end", pa.int32()),
        pa.field("char_start", pa.int32()),
        pa.field("char_end", pa.int32()),
        pa.field("prefix_chars", pa.int32()),
        pa.field("language", pa.string()),
        pa.field("text", pa.string()),
        pa.field("token_count", pa.int32()),
        pa.field("encoding", pa.string()),
        pa.field("token_counts", pa.map_(pa.string(), pa.int32())),
        pa.field("content_hash", pa.string()),
        pa.field("readers", STR_LIST, nullable=False),
        pa.field("label", pa.string()),
        pa.field("run_id", pa.string()),
    ]
)

# What each hand-off column means; the README's table is generated from this.
HANDOFF_DOC = {
    "chunk_id": "Stable id of the chunk: hash of (doc_id, split, chunk locator). Same input and config give the same id.",
    "doc_id": "SHA-256 of the source file's bytes. A renamed file keeps it; an edited file gets a new one.",
    "source_path": "Path of the file relative to the source root, as of the latest run. Where the same bytes sit at several paths, the one readers should be sent to: a file of the drive before a copy inside an archive or e-mail, a path outside the archive folders (source.archive_folders) before one in them, then the most recently modified (source.copies_by), then path order.",
    "source_paths": "Every path where the document's bytes sit: source_path first, then the other copies in path order.",
    "title": "Document title: PDF metadata, HTML <title>, Word core property, else the first heading, else the file name.",
    "heading_path": "Headings from the top of the document down to the chunk's section.",
    "chunk_index": "Position of the chunk within its document, from 0.",
    "page_start": "1-based page the chunk starts on (null for formats without pages).",
    "page_end": "1-based page the chunk ends on (null for formats without pages).",
    "char_start": "Offset of the chunk's first character in the cleaned text of page_start (of the whole file when there are no pages).",
    "char_end": "Exclusive offset of the chunk's end in the cleaned text of page_end.",
    "prefix_chars": "Leading characters of text that are not in the span (a split table repeats its header row); text[prefix_chars:] is the exact span.",
    "language": "Language holding most of the chunk's characters among its blocks (langdetect per block), else its pages'; 'unknown' when undetermined.",
    "text": "The chunk's cleaned text.",
    "token_count": "Tokens in the chunk in the primary encoding.",
    "encoding": "Name of the primary tiktoken encoding.",
    "token_counts": "Tokens per configured encoding.",
    "content_hash": "SHA-256 of the chunk's normalised text (the exact-duplicate key).",
    "readers": "Who may read the chunk: the access rule's readers for its document (plus the file system's \"user:NAME\", \"group:NAME\", \"everyone\" when access.file_system is combine), sorted. Never null; an empty list would mean nobody, and such documents are left out.",
    "label": "The access rule's label for the document (e.g. confidential), null when the rule gives none.",
    "run_id": "The run that produced this version of the chunk.",
}

CHANGES = pa.schema(
    [
        pa.field("chunk_id", pa.string(), nullable=False),
        pa.field("action", pa.string(), nullable=False),  # upsert | delete
        pa.field("doc_id", pa.string()),
        pa.field("source_path", pa.string()),
        pa.field("content_hash", pa.string()),
        pa.field("run_id", pa.string(), nullable=False),
    ]
)

# One row per retrieval probe of a run (flows/probes.py), under probes/<run_id>.parquet.
PROBES = pa.schema(
    [
        pa.field("run_id", pa.string(), nullable=False),
        pa.field("probe", pa.int32(), nullable=False),  # 1-based position in the probe file
        pa.field("ask", pa.string()),
        pa.field("expect", pa.string()),
        pa.field("page", pa.int32()),
        pa.field("heading", pa.string()),
        pa.field("rank", pa.int32()),  # of the first matching chunk; null when not within the first 100
        pa.field("chunk_id", pa.string()),
        pa.field("source_path", pa.string()),
        pa.field("top_chunk_ids", STR_LIST),
        pa.field("top_paths", STR_LIST),
        pa.field("passed", pa.bool_()),
        pa.field("regression", pa.bool_()),
    ]
)

# Per live document and stage, its current units by status, as a run left them
# (runs/<run_id>/counts.parquet): the next run counts afresh only the documents it
# wrote or that joined the live set, and carries the rest (flows/summary.py).
STAGE_COUNTS = pa.schema(
    [
        pa.field("doc_id", pa.string(), nullable=False),
        pa.field("stage", pa.string(), nullable=False),
        pa.field("status", pa.string(), nullable=False),
        pa.field("units", pa.int64(), nullable=False),
    ]
)

WRITES = pa.schema(
    [
        pa.field("stage", pa.string(), nullable=False),
        pa.field("doc_id", pa.string(), nullable=False),
        # "document": every unit of the document at this stage was written (older
        # rows of that document stop being current); "units": only some units were;
        # SET_ASIDE: only some units, each set aside before and after the write (a
        # duplicate's new duplicate_of), so nothing the hand-off holds of it changed.
        pa.field("scope", pa.string(), nullable=False),
    ]
)
SET_ASIDE = "units-set-aside"

# A committed run's ledgers, every stage in one file (runs/<run_id>/ledger.parquet),
# written at its commit from its per-part ledgers (WRITES): a new process reads one file
# per run instead of one per part (942 small files after a documentation drive's first
# runs). `part` is the part file's name under stages/<stage>/<run_id>/.
RUN_LEDGER = pa.schema(
    [
        pa.field("stage", pa.string(), nullable=False),
        pa.field("part", pa.string(), nullable=False),
        pa.field("doc_id", pa.string(), nullable=False),
        pa.field("scope", pa.string(), nullable=False),
    ]
)

# Ledger of a compacted stage: which part holds each (run, document), and the whole-
# document rewrites of the runs it covers (scope as in WRITES; part "" when the run
# wrote the document whole but produced no unit for it).
COMPACTED_LEDGER = pa.schema(
    [
        pa.field("run_id", pa.string(), nullable=False),
        pa.field("doc_id", pa.string(), nullable=False),
        pa.field("scope", pa.string(), nullable=False),
        pa.field("part", pa.string(), nullable=False),
    ]
)
