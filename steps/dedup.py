"""Deduplicate chunks across the whole corpus: exact copies, whole-document copies and
near-duplicates, incrementally.

Exact: two chunks are exact duplicates when their texts are equal after
normalisation: Unicode NFKC, case folding (str.casefold, which also folds German
sharp s), removal of punctuation (Unicode categories P*), and collapsing whitespace
runs to one space. Each fold can be switched off. The SHA-256 of the normalised text
is the chunk's content hash. A chunk whose text is nothing but punctuation would
normalise to the empty string and match every other such chunk, so for those the
punctuation is kept.

Whole documents: a document whose whole normalised text (its chunks' span texts in
order, joined by a space) equals an earlier document's is reported as a copy of that
document, and every chunk of it is dropped. (Files with identical bytes never get
here: they are one document already, listed at several paths in the catalog.)

Near-duplicates: MinHash signatures over word shingles of the normalised text, and
locality-sensitive hashing by bands (steps/minhash.py names the published methods).
Chunks that share a band key are candidates; a candidate pair is marked only when the
signature estimate of its Jaccard similarity reaches `min_similarity`. Verification
uses the estimate, not the exact Jaccard of the shingle sets, because the estimate
needs only stored signatures: a weekly run never reads the text of unchanged chunks,
and an incremental run decides every pair exactly as a run from scratch would. The
estimate's standard error is sqrt(J(1-J)/k), 0.035 at J=0.8 with k=128, so pairs
whose true similarity is within a few hundredths of the threshold can fall either
way; tests/test_dedup_quality.py measures what that costs against exact Jaccard.

Clusters: exact groups, document copies and verified pairs are joined with
union-find. Chunks are numbered in canonical order first, so each cluster's root is
its canonical chunk, the one kept. With `keep: newest` (the default) the order is the
document's modification time, newest first, then its rank (the flows rank documents
by the run they were first seen in, then by path), then path, doc id and chunk index:
when this year's policy repeats last year's with a sentence changed, this year's
wording is kept. With `keep: first_seen` the modification time is left out. Every other
chunk of the cluster is dropped with duplicate_of = the canonical chunk id, the
similarity (1.0 for exact copies, else the estimate against the canonical chunk) and
a reason in words.

Incremental: this is an IncrementalCorpusSpec (steps/incremental.py). `sketch`
computes hashes, signatures and band keys of changed documents only; `decide` takes
those together with the stored sketches of unchanged documents and re-clusters the
whole corpus from stored numbers alone, returning decisions for the new chunks and
for stored chunks whose decision changed, e.g. a duplicate whose canonical chunk's
document was deleted becomes ok again.
"""

from __future__ import annotations

import hashlib
import math
import unicodedata
from dataclasses import replace
from typing import Literal

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import Field

from . import minhash
from .incremental import IncrementalCorpusSpec
from .spec import StepParams
from .unionfind import UnionFind
from .units import DROPPED, OK, Chunk, DocChunks

EXACT = "exact"
NEAR = "near"
DOCUMENT = "document"

# Columns of the sketch and of a decision (besides doc_id, chunk_id, status, reason).
SKETCH_COLUMNS = ("content_hash", "document_hash", "signature", "band_keys")
DECISION_COLUMNS = ("duplicate_of", "duplicate_kind", "similarity")

# Text hashed into signatures together (characters): bounds the byte, word and
# shingle arrays, each a few MB.
_SKETCH_CHARS = 1 << 20
# Candidate pairs verified together: (pairs x k) comparisons, about 50 MB at k=128.
_VERIFY_BATCH = 100_000
# Within one LSH bucket every member is paired with the next _BUCKET_SPAN members
# and with the bucket's first member; a bucket of many near-identical chunks (a
# footer that differs by a page number) then costs O(size) pairs, not O(size^2).
_BUCKET_SPAN = 32


class DedupParams(StepParams):
    fold_case: bool = True
    fold_punctuation: bool = True
    fold_whitespace: bool = True
    fold_unicode: bool = True  # NFKC
    near_duplicates: bool = True
    # Estimated Jaccard similarity of shingle sets from which two chunks are
    # near-duplicates. 0.8 over 5-word shingles is common practice for near-duplicate
    # text; lower values start to merge revisions that changed in substance.
    min_similarity: float = Field(0.8, gt=0.0, lt=1.0)
    shingle_words: int = Field(5, ge=1, le=32)
    signature_size: int = Field(128, ge=16, le=1024)
    # Weight of missed pairs against needless candidates when bands and rows are
    # chosen (minhash.choose_bands); candidates are verified, so misses cost more.
    false_negative_weight: float = Field(0.9, gt=0.0, lt=1.0)
    # Which chunk of a duplicate group is kept: newest = the one of the most recently
    # modified document (then first seen, then path); first_seen = the one of the
    # document the store saw first (then path).
    keep: Literal["newest", "first_seen"] = "newest"

    def bands_and_rows(self) -> tuple[int, int]:
        return minhash.choose_bands(self.min_similarity, self.signature_size, self.false_negative_weight)


# ----------------------------------------------------------------------------- text


# ASCII punctuation (Unicode categories P*) as bytes, for bytes.translate. Other
# characters are looked up one by one as they occur: a table of all P* characters
# took 0.2 s of CPU to build (every code point's category), in the parent at every run.
_ASCII_PUNCTUATION = bytes(c for c in range(128) if unicodedata.category(chr(c)).startswith("P"))


def _drop_punctuation(text: str) -> str:
    # UTF-8 never uses ASCII bytes inside a multi-byte character, so deleting ASCII
    # punctuation bytes is safe; the few non-ASCII punctuation marks go one by one.
    out = text.encode("utf-8", "surrogatepass").translate(None, _ASCII_PUNCTUATION).decode("utf-8", "surrogatepass")
    if not out.isascii():
        for ch in {c for c in set(out) if c >= "\x80" and unicodedata.category(c).startswith("P")}:
            out = out.replace(ch, "")
    return out


def _normal_words(text: str, params: DedupParams) -> tuple[str, list[str]]:
    """The normalised text and its words (the words shingles are made of)."""
    if params.fold_unicode:
        text = unicodedata.normalize("NFKC", text)
    if params.fold_case:
        text = text.casefold()
    if params.fold_punctuation:
        without = _drop_punctuation(text)
        if without.strip():
            text = without
    words = text.split()
    if params.fold_whitespace:
        text = " ".join(words)
    return text, words


def normalise(text: str, params: DedupParams) -> str:
    """The text two chunks must share to count as exact duplicates."""
    return _normal_words(text, params)[0]


def _sha256(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def content_hash(text: str, params: DedupParams) -> str:
    return _sha256(normalise(text, params))


def _folds_in_words(params: DedupParams) -> str:
    folds = [name for name, on in (("case", params.fold_case),
                                   ("whitespace", params.fold_whitespace),
                                   ("punctuation", params.fold_punctuation)) if on]
    if params.fold_unicode:
        base = "same text after NFKC normalisation"
        if folds:
            base += " and folding " + _and_list(folds)
    elif folds:
        base = "same text after folding " + _and_list(folds)
    else:
        base = "identical text"
    return base


def _and_list(words: list[str]) -> str:
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


# ----------------------------------------------------------------------------- sketch


def _list_column(matrix: np.ndarray, value_type: pa.DataType) -> pa.Array:
    flat = pa.array(matrix.reshape(-1), type=value_type)
    return pa.FixedSizeListArray.from_arrays(flat, matrix.shape[1]).cast(pa.list_(value_type))


def sketch(docs: list[DocChunks], params: DedupParams, ctx=None) -> pa.Table:
    """Per chunk of these documents: content hash, document hash, signature, band keys.

    Depends on each document alone. Chunks that are not ok are left out.
    """
    doc_ids: list[str] = []
    chunk_ids: list[str] = []
    indexes: list[int] = []
    hashes: list[str] = []
    doc_hashes: list[str] = []
    sig_parts: list[np.ndarray] = []
    pending: list[str] = []  # each chunk's words, joined by single spaces
    pending_chars = 0

    def flush() -> None:
        nonlocal pending_chars
        pending_chars = 0
        if not pending:
            return
        word_hash, lengths = minhash.text_word_hashes(pending)
        values, starts = minhash.shingle_values(word_hash, lengths, params.shingle_words)
        sig_parts.append(minhash.signatures(values, starts, params.signature_size))
        pending.clear()

    for doc in docs:
        spans: list[str] = []
        for chunk in doc.chunks:
            if not chunk.ok:
                continue
            norm, words = _normal_words(chunk.text, params)
            doc_ids.append(doc.doc_id)
            chunk_ids.append(chunk.chunk_id)
            indexes.append(chunk.index)
            hashes.append(_sha256(norm))
            spans.append(norm if not chunk.prefix_chars else normalise(chunk.text[chunk.prefix_chars:], params))
            if params.near_duplicates:
                pending.append(norm if params.fold_whitespace else " ".join(words))
                pending_chars += len(pending[-1]) + 1
                if pending_chars >= _SKETCH_CHARS:
                    flush()
        doc_hashes.extend([_sha256(" ".join(spans))] * len(spans))
    flush()

    n = len(chunk_ids)
    if params.near_duplicates:
        sig = np.concatenate(sig_parts) if sig_parts else np.empty((0, params.signature_size), dtype=np.uint32)
        bands, rows = params.bands_and_rows()
        signature = _list_column(sig, pa.uint32())
        keys = _list_column(minhash.band_keys(sig, bands, rows), pa.uint64())
    else:
        signature = pa.nulls(n, pa.list_(pa.uint32()))
        keys = pa.nulls(n, pa.list_(pa.uint64()))
    return pa.table({
        "doc_id": pa.array(doc_ids, pa.string()),
        "chunk_id": pa.array(chunk_ids, pa.string()),
        "chunk_index": pa.array(indexes, pa.int32()),
        "content_hash": pa.array(hashes, pa.string()),
        "document_hash": pa.array(doc_hashes, pa.string()),
        "signature": signature,
        "band_keys": keys,
    })


# ----------------------------------------------------------------------------- decide

DECISIONS = pa.schema([
    pa.field("doc_id", pa.string()),
    pa.field("chunk_id", pa.string()),
    pa.field("status", pa.string()),
    pa.field("reason", pa.string()),
    pa.field("duplicate_of", pa.string()),
    pa.field("duplicate_kind", pa.string()),
    pa.field("similarity", pa.float64()),
])


def _codes(column) -> np.ndarray:
    """Integer codes of a string column, numbered in order of first appearance."""
    arr = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if arr.null_count:
        raise ValueError("dedup: a stored row lacks its content or document hash")
    return pc.dictionary_encode(arr).indices.to_numpy(zero_copy_only=False).astype(np.int64)


def _matrix(column, width: int, dtype, what: str) -> np.ndarray:
    arr = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    n = len(arr)
    if n == 0:
        return np.empty((0, width), dtype=dtype)
    if arr.null_count:
        raise ValueError(f"dedup: {arr.null_count} chunk(s) have no stored {what}; "
                         "they were deduplicated with near-duplicates off")
    lengths = pc.list_value_length(arr).to_numpy(zero_copy_only=False)
    if (lengths != width).any():
        raise ValueError(f"dedup: stored {what} has {int(lengths[lengths != width][0])} values, "
                         f"expected {width} (rows from other dedup parameters?)")
    return pc.list_flatten(arr).to_numpy(zero_copy_only=False).astype(dtype, copy=False).reshape(n, width)


def candidate_pairs(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pairs (i < j) of rows that share a band key in some band, each pair once.

    Rows are assumed to be in canonical order; within a bucket each member is paired
    with the next _BUCKET_SPAN members and with the bucket's first member.
    """
    n = keys.shape[0]
    found: list[np.ndarray] = []
    for band in range(keys.shape[1]):
        col = keys[:, band]
        order = np.argsort(col, kind="stable")  # stable: members stay in canonical order
        sorted_keys = col[order]
        same = sorted_keys[1:] == sorted_keys[:-1]
        if not same.any():
            continue
        group = np.concatenate(([0], np.cumsum(~same)))
        for d in range(1, _BUCKET_SPAN + 1):
            hit = np.flatnonzero(group[d:] == group[:-d])
            if hit.size == 0:
                break
            found.append(order[hit] * n + order[hit + d])
        else:
            # Buckets longer than the span: also pair every member with the first.
            starts = np.flatnonzero(np.concatenate(([True], ~same)))
            sizes = np.diff(np.append(starts, len(col)))
            big = sizes > _BUCKET_SPAN + 1
            if big.any():
                member = np.flatnonzero(np.repeat(big, sizes))
                leader = np.repeat(starts[big], sizes[big])
                far = member - leader > _BUCKET_SPAN
                found.append(order[leader[far]] * n + order[member[far]])
    if not found:
        empty = np.empty(0, dtype=np.int64)
        return empty, empty
    codes = np.unique(np.concatenate(found))
    return codes // n, codes % n


def _matches(sig: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Number of equal minima for each pair of rows (a[i], b[i])."""
    out = np.empty(len(a), dtype=np.int64)
    for lo in range(0, len(a), _VERIFY_BATCH):
        hi = lo + _VERIFY_BATCH
        out[lo:hi] = (sig[a[lo:hi]] == sig[b[lo:hi]]).sum(axis=1)
    return out


def _canonical_order(table: pa.Table, params: DedupParams, keep: np.ndarray | None) -> np.ndarray:
    """Positions (within `keep`, or the whole table) in canonical order: see the module's docstring."""
    names = ["rank", "source_path", "doc_id", "chunk_index"]
    sort_keys = [(n, "ascending") for n in names]
    if params.keep == "newest":
        names = ["modified", *names]
        sort_keys = [("modified", "descending"), *sort_keys]
        if "modified" not in table.column_names:  # callers that know no times: all equal
            table = table.append_column("modified", pa.array([0] * table.num_rows, pa.int64()))
    keys = table.select(names)
    if "modified" in names:  # an unknown time is the oldest, not (as nulls sort) after every other
        keys = keys.set_column(0, "modified", pc.fill_null(keys.column("modified"), 0))
    if keep is not None:
        keys = keys.take(pa.array(keep))
    return pc.sort_indices(keys, sort_keys=sort_keys).to_numpy()


def decide(table: pa.Table, params: DedupParams, ctx=None) -> pa.Table:
    """Cluster every live chunk and say which are dropped; see steps/incremental.py.

    `table` has doc_id, chunk_id, chunk_index, rank, source_path, fresh, the sketch
    columns and (for stored rows) status, reason and the decision columns. Stored rows
    with another status than ok or dropped take no part and are never returned.
    """
    if table.num_rows == 0:
        return DECISIONS.empty_table()
    names = table.column_names
    keep = None
    if "status" in names:
        fresh_in = table.column("fresh").to_numpy(zero_copy_only=False).astype(bool)
        status_in = pc.fill_null(pc.is_in(table.column("status"), pa.array([OK, DROPPED])), False)
        eligible = fresh_in | status_in.to_numpy(zero_copy_only=False).astype(bool)
        if not eligible.all():
            keep = np.flatnonzero(eligible)
    order = _canonical_order(table, params, keep)
    # Row numbers of the input in canonical order; only the columns needed are reordered.
    rows_in = order if keep is None else keep[order]
    take = pa.array(rows_in)

    def column(name: str) -> pa.Array:
        return table.column(name).take(take)

    n = len(rows_in)
    pos = np.arange(n)

    # Exact copies: every chunk joins the first chunk (in canonical order) with its hash.
    content = _codes(column("content_hash"))
    _, first, inverse = np.unique(content, return_index=True, return_inverse=True)
    exact_rep = first[inverse]
    uf = UnionFind(exact_rep)

    # Whole-document copies: a document joins the first document with its hash.
    doc = _codes(column("doc_id"))
    doc_start = np.flatnonzero(np.concatenate(([True], doc[1:] != doc[:-1])))
    doc_end = np.append(doc_start[1:], n)
    doc_hash = _codes(column("document_hash"))[doc_start]
    _, first_doc, inv_doc = np.unique(doc_hash, return_index=True, return_inverse=True)
    canon_doc = first_doc[inv_doc]
    is_copy_doc = canon_doc != np.arange(len(doc_start))

    sig = None
    if params.near_duplicates:
        sig = _matrix(table.column("signature"), params.signature_size, np.uint32, "signature")[rows_in]
        bands, _rows = params.bands_and_rows()
        # Only one chunk per exact group needs to meet the others.
        reps = np.flatnonzero(exact_rep == pos)
        band = _matrix(table.column("band_keys"), bands, np.uint64, "band keys")[rows_in[reps]]
        ci, cj = candidate_pairs(band)
        del band
        a, b = reps[ci], reps[cj]
        need = math.ceil(params.min_similarity * params.signature_size - 1e-9)
        ok = _matches(sig, a, b) >= need
        uf.union_pairs(a[ok], b[ok])

    # A copy's chunks join their counterparts in the original document.
    counterpart = np.full(n, -1, dtype=np.int64)
    for d in np.flatnonzero(is_copy_doc).tolist():
        c = int(canon_doc[d])
        lo, hi = int(doc_start[c]), int(doc_end[c])
        by_hash = {int(content[p]): p for p in range(hi - 1, lo - 1, -1)}
        for p in range(int(doc_start[d]), int(doc_end[d])):
            match = by_hash.get(int(content[p]))
            if match is None:  # split differently: join the most similar chunk there
                if sig is not None:
                    match = lo + int(np.argmax((sig[lo:hi] == sig[p]).sum(axis=1)))
                else:
                    match = min(lo + (p - int(doc_start[d])), hi - 1)
            counterpart[p] = match
            uf.union(p, match)

    canon = uf.roots()
    dropped = canon != pos
    row_doc = np.repeat(np.arange(len(doc_start)), doc_end - doc_start)
    same_text = content[canon] == content
    similarity = np.full(n, np.nan)
    similarity[dropped & same_text] = 1.0
    near_rows = np.flatnonzero(dropped & ~same_text)
    if sig is not None and near_rows.size:
        similarity[near_rows] = _matches(sig, near_rows, canon[near_rows]) / params.signature_size

    chunk_id = column("chunk_id").to_pylist()
    path = column("source_path").to_pylist()
    how = _folds_in_words(params)
    k = params.shingle_words
    status = np.full(n, OK, dtype=object)
    reason = np.full(n, None, dtype=object)
    dup_of = np.full(n, None, dtype=object)
    kind = np.full(n, None, dtype=object)
    for p in np.flatnonzero(dropped).tolist():
        c = int(canon[p])
        s = similarity[p]
        status[p], dup_of[p] = DROPPED, chunk_id[c]
        where = f"chunk {chunk_id[c]} in {path[c]}"
        estimate = "" if same_text[p] or math.isnan(s) else f" (estimated Jaccard {s:.2f} over {k}-word shingles)"
        if is_copy_doc[row_doc[p]]:
            kind[p] = DOCUMENT
            m = int(counterpart[p])
            original = path[m]
            reason[p] = f"copy of document {original}: the whole text is the same ({how}); "
            if m == c and same_text[p]:
                reason[p] += f"this chunk is kept there as chunk {chunk_id[c]}"
            elif m == c:
                reason[p] += f"split differently there; the nearest chunk, kept, is {chunk_id[c]}{estimate}"
            else:
                reason[p] += (f"its counterpart there (chunk {chunk_id[m]}) is itself a duplicate; "
                              f"kept: {where}{estimate}")
        elif same_text[p]:
            kind[p] = EXACT
            reason[p] = f"exact duplicate of {where} ({how})"
        else:
            kind[p] = NEAR
            if s >= params.min_similarity:
                reason[p] = f"near-duplicate (estimated Jaccard {s:.2f} over {k}-word shingles) of {where}"
            else:
                reason[p] = (f"near-duplicate of {where} through a chain of near-duplicates (estimated "
                             f"Jaccard {s:.2f} with it; each link at least {params.min_similarity:.2f} "
                             f"over {k}-word shingles)")
    sim_out = np.where(np.isnan(similarity), None, similarity).astype(object)

    fresh = column("fresh").to_numpy(zero_copy_only=False).astype(bool)
    changed = fresh.copy()
    stored = ~fresh
    if stored.any():
        def prev(name: str) -> np.ndarray:
            if name not in names:
                return np.full(n, None, dtype=object)
            return np.asarray(column(name).to_pylist(), dtype=object)

        prev_sim = column("similarity").to_numpy(zero_copy_only=False).astype(float) \
            if "similarity" in names else np.full(n, np.nan)
        same_sim = (prev_sim == similarity) | (np.isnan(prev_sim) & np.isnan(similarity))
        differs = (prev("status") != status) | (prev("reason") != reason) | (prev("duplicate_of") != dup_of) \
            | (prev("duplicate_kind") != kind) | ~same_sim
        changed |= stored & differs
    out = np.flatnonzero(changed)
    return pa.table({
        "doc_id": column("doc_id").take(pa.array(out)),
        "chunk_id": pa.array([chunk_id[i] for i in out.tolist()], pa.string()),
        "status": pa.array(status[out].tolist(), pa.string()),
        "reason": pa.array(reason[out].tolist(), pa.string()),
        "duplicate_of": pa.array(dup_of[out].tolist(), pa.string()),
        "duplicate_kind": pa.array(kind[out].tolist(), pa.string()),
        "similarity": pa.array(sim_out[out].tolist(), pa.float64()),
    }, schema=DECISIONS)


# ----------------------------------------------------------------------------- plain call


def fresh_table(sketches: pa.Table, docs: list[DocChunks]) -> pa.Table:
    """The `decide` input for documents that are all new: sketches plus rank, path and
    modification time."""
    where = {d.doc_id: (d.rank, d.source_path, d.modified) for d in docs}
    ids = sketches.column("doc_id").to_pylist()
    return sketches.append_column("rank", pa.array([where[d][0] for d in ids], pa.int64())) \
        .append_column("source_path", pa.array([where[d][1] for d in ids], pa.string())) \
        .append_column("modified", pa.array([where[d][2] for d in ids], pa.int64())) \
        .append_column("fresh", pa.array([True] * len(ids), pa.bool_()))


def deduplicate(docs: list[DocChunks], params: DedupParams, ctx=None) -> list[Chunk]:
    """Corpus step, plain form: every input chunk back, duplicates dropped with their canonical named."""
    sketches = sketch(docs, params, ctx)
    decisions = decide(fresh_table(sketches, docs), params, ctx)
    sk = {r["chunk_id"]: r for r in sketches.select(["chunk_id", *SKETCH_COLUMNS]).to_pylist()}
    dec = {r["chunk_id"]: r for r in decisions.to_pylist()}
    out: list[Chunk] = []
    for doc in docs:
        for chunk in doc.chunks:
            new = replace(chunk, parents=[chunk.locator], warnings=[], heading_path=list(chunk.heading_path),
                          payload={})
            if chunk.ok:
                d = dec[chunk.chunk_id]
                new.payload = {name: sk[chunk.chunk_id][name] for name in SKETCH_COLUMNS}
                new.payload.update({name: d[name] for name in DECISION_COLUMNS})
                if d["status"] == DROPPED:
                    new.drop(d["reason"])
            out.append(new)
    return out


DEDUP = IncrementalCorpusSpec(
    name="dedup",
    version="3",
    consumes="chunks",
    produces="chunks",
    scope="corpus",
    params=DedupParams,
    run=deduplicate,
    summary="drop exact, whole-document and near-duplicate chunks across the corpus (MinHash and LSH)",
    sketch=sketch,
    decide=decide,
    sketch_columns=SKETCH_COLUMNS,
    decision_columns=DECISION_COLUMNS,
)
