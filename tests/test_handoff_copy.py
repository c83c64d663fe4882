"""The hand-off copied forward: a run that changed a few documents streams the previous
hand-off and reads only those documents from the stages, and writes the very bytes a
rebuild from every stage writes (hand-off and digests), whatever changed."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from conftest import definition_with

from thresher.flows import pipeline
from thresher.flows.access import document_access
from thresher.flows.handoff import build_handoff, handoff_basis
from thresher.flows.plan import live_documents
from thresher.flows.store import Store

TOPICS = ["seed library", "repair cafe", "reading room heating", "van route", "story hour", "loan periods",
          "volunteer rota", "room bookings", "lost property", "printing charges"]


def _note(topic: str, n: int) -> str:
    words = " ".join(f"{topic.split()[0]}{i}" for i in range(40))
    return f"# {topic.title()}\n\nNotes on the {topic} at branch {n}: {words}.\n"


# A paragraph long enough that one changed word leaves its 5-word shingles well above
# dedup's 0.8 threshold: the older copy's chunk is dropped as a near duplicate.
SHARED = " ".join(f"Members may renew a loan twice online or at any desk, unless another member has reserved "
                  f"the item; notice {i}." for i in range(6))


def _definition(max_tokens: int = 400):
    return definition_with(split={"max_tokens": max_tokens})


def _run(drive: Path, store: Path, definition, **kw) -> dict:
    return pipeline.run(definition, str(drive), str(store), workers=1, quiet=True, **kw)


def _rebuilt_bytes(store_dir: Path, definition, run_id: str) -> tuple[bytes, bytes]:
    """The latest run's hand-off and digests rebuilt from every stage, under its run id."""
    store = Store(store_dir)
    catalog = store.catalog().to_pylist()
    _, live, copies = live_documents(catalog, {r.run_id: r.sequence for r in store.runs()}, store.next_sequence(),
                                     definition.model.source)
    scratch = "runs/rebuild-check"
    result = build_handoff(definition, store, run_id, live, document_access(catalog, definition.model.access),
                           f"{scratch}/chunks.parquet", f"{scratch}/digests.parquet", f"{scratch}/changes.parquet",
                           basis=handoff_basis(definition), copies=copies)  # no previous_live: a rebuild
    assert result.mode == "rebuilt"
    out = ((store_dir / scratch / "chunks.parquet").read_bytes(), (store_dir / scratch / "digests.parquet").read_bytes())
    store.delete_dir(scratch)
    return out


def _same_as_rebuild(store_dir: Path, definition, m: dict) -> None:
    chunks, digests = _rebuilt_bytes(store_dir, definition, m["run_id"])
    assert (store_dir / "handoff" / "chunks.parquet").read_bytes() == chunks
    assert (store_dir / "handoff" / "digests.parquet").read_bytes() == digests


def _texts(store_dir: Path) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for r in Store(store_dir).handoff().to_pylist():
        out.setdefault(r["source_path"], []).append(r["text"])
    return out


@pytest.mark.timeout(300)
def test_a_copied_forward_handoff_is_byte_for_byte_a_rebuild(prefect_harness, tmp_path, monkeypatch):
    # Small groups, batches and row groups, so this small drive spans many of each and
    # the copy merges documents into batches as a large drive's would.
    from thresher.flows import handoff

    monkeypatch.setattr(handoff, "GROUP_DOCS", 1)
    monkeypatch.setattr(handoff, "REWRITE_BATCH", 2)
    monkeypatch.setattr(handoff, "ROW_GROUP", 5)
    drive, store_dir = tmp_path / "drive", tmp_path / "store"
    (drive / "notes").mkdir(parents=True)
    (drive / "policy").mkdir()
    for i, topic in enumerate(TOPICS):
        (drive / "notes" / f"{i:02d}.md").write_text(_note(topic, i))
    older, newer = drive / "policy" / "renewals-2025.md", drive / "policy" / "renewals-2026.md"
    older.write_text(f"# Renewals\n\n{SHARED}\n")
    newer.write_text(f"# Renewals\n\n{SHARED.replace('twice', 'three times')}\n")
    os.utime(older, ns=(1_700_000_000_000_000_000,) * 2)
    os.utime(newer, ns=(1_760_000_000_000_000_000,) * 2)
    definition = _definition()

    first = _run(drive, store_dir, definition)
    assert first["handoff"] == "rebuilt"
    # dedup keeps the newer revision: the older one's chunk is not handed off.
    assert "policy/renewals-2025.md" not in _texts(store_dir) and "policy/renewals-2026.md" in _texts(store_dir)
    _same_as_rebuild(store_dir, definition, first)

    # Nothing changed: the published hand-off and digests stand, not rewritten (the
    # first run's files, as a rebuild under its id writes them); the next run copies
    # forward from them, checked against the first run's record.
    published = {n: (store_dir / "handoff" / n).stat().st_mtime_ns for n in ("chunks.parquet", "digests.parquet")}
    same = _run(drive, store_dir, definition)
    assert same["handoff"] == "kept as published" and same["changes"] == {"upsert": 0, "delete": 0}
    assert (same["chunks"], same["tokens"]) == (first["chunks"], first["tokens"])
    assert {n: (store_dir / "handoff" / n).stat().st_mtime_ns for n in published} == published
    _same_as_rebuild(store_dir, definition, first)

    # An edit, two additions (one with no text: no chunk) and a removal: three documents
    # read from the stages.
    (drive / "notes" / "00-blank.md").write_text("")
    (drive / "notes" / "03.md").write_text(_note("van route", 3).replace("branch 3", "the north branch"))
    (drive / "notes" / "10.md").write_text(_note("book sale", 10))
    (drive / "notes" / "07.md").unlink()
    edited = _run(drive, store_dir, definition)
    assert edited["handoff"].startswith("copied forward, 3 of 13 documents"), edited["handoff"]
    texts = _texts(store_dir)
    assert "notes/07.md" not in texts and "the north branch" in texts["notes/03.md"][0] and "notes/10.md" in texts
    _same_as_rebuild(store_dir, definition, edited)

    # The newer revision changes beyond recognition: dedup revives the older one's chunk,
    # a document whose file did not change; the copy reads it from the stages.
    newer.write_text("# Renewals\n\nRenewals are now handled by the new desk system from April onwards.\n")
    os.utime(newer, ns=(1_760_000_000_000_000_000,) * 2)
    flipped = _run(drive, store_dir, definition)
    assert flipped["documents"]["processed"] == 1
    assert flipped["handoff"].startswith("copied forward, 2 of 13 documents"), flipped["handoff"]
    assert "policy/renewals-2025.md" in _texts(store_dir)
    _same_as_rebuild(store_dir, definition, flipped)

    # A rename (no step runs: the live path changes) and a copy at a second path.
    (drive / "notes" / "01.md").rename(drive / "notes" / "01-repairs.md")
    (drive / "copy-of-05.md").write_bytes((drive / "notes" / "05.md").read_bytes())
    os.utime(drive / "copy-of-05.md", ns=(1_600_000_000_000_000_000,) * 2)  # older: notes/05.md stays live
    moved = _run(drive, store_dir, definition)
    assert moved["documents"]["processed"] == 0
    sources = {r["source_path"]: r["source_paths"] for r in Store(store_dir).handoff().to_pylist()}
    assert sources["notes/05.md"] == ["notes/05.md", "copy-of-05.md"] and "notes/01-repairs.md" in sources
    assert moved["handoff"].startswith("copied forward, 2 of 13 documents"), moved["handoff"]
    _same_as_rebuild(store_dir, definition, moved)

    # A re-run of one document from the clean step.
    doc = next(r["doc_id"] for r in Store(store_dir).handoff().to_pylist() if r["source_path"] == "notes/02.md")
    rerun = _run(drive, store_dir, definition, rerun={"doc_id": doc, "page": None, "step": "clean"})
    assert rerun["handoff"].startswith("copied forward, 1 of 13 documents"), rerun["handoff"]
    _same_as_rebuild(store_dir, definition, rerun)

    # Another chain (a split parameter): every chunk changes, the hand-off is rebuilt.
    other = _definition(max_tokens=300)
    rechained = _run(drive, store_dir, other)
    assert rechained["handoff"] == "rebuilt"
    _same_as_rebuild(store_dir, other, rechained)


@pytest.mark.timeout(300)
def test_a_rebuild_sorted_into_groups_through_scratch_files_writes_what_one_group_writes(
        prefect_harness, tmp_path, monkeypatch):
    # More than one group: the stages are read once in stored order and sorted into the
    # groups through local files (regroup.Regrouped). A second run leaves two attempts
    # of the edited documents in the stages, of which only the latest may be read.
    from thresher.flows import handoff, regroup
    from thresher.flows.regroup import Regrouped

    drive, store_dir = tmp_path / "drive", tmp_path / "store"
    (drive / "notes").mkdir(parents=True)
    for i, topic in enumerate(TOPICS):
        (drive / "notes" / f"{i:02d}.md").write_text(_note(topic, i))
    (drive / "renewals.md").write_text(f"# Renewals\n\n{SHARED}\n")
    definition = _definition()
    _run(drive, store_dir, definition)
    (drive / "notes" / "03.md").write_text(_note("van route", 3).replace("branch 3", "the north branch"))
    (drive / "notes" / "08.md").write_text(_note("lost property", 8) + "\nFound items wait a month.\n")
    edited = _run(drive, store_dir, definition)
    assert edited["documents"]["processed"] == 2

    monkeypatch.setattr(handoff, "GROUP_DOCS", 10_000)
    whole = _rebuilt_bytes(store_dir, definition, edited["run_id"])
    monkeypatch.setattr(handoff, "GROUP_DOCS", 3)
    monkeypatch.setattr(regroup, "READ_DOCS", 2)
    monkeypatch.setattr(regroup, "BUCKET_GROUPS", 1)
    monkeypatch.setattr(regroup, "MAX_BUCKETS", 2)  # so two groups to a bucket file
    assert _rebuilt_bytes(store_dir, definition, edited["run_id"]) == whole
    # No temporary folder to sort through: the groups are read from the store instead.
    import tempfile

    with monkeypatch.context() as m:
        m.setattr(tempfile, "tempdir", str(tmp_path / "no-such-folder"))
        assert _rebuilt_bytes(store_dir, definition, edited["run_id"]) == whole

    # Each group's rows of each stage are the store's current rows of its documents.
    store = Store(store_dir)
    docs = sorted(r["doc_id"] for r in store.catalog().to_pylist())
    groups = [docs[i:i + 4] for i in range(0, len(docs), 4)]
    stages = [(stage, columns) for stage, _, columns in handoff._stage_columns(definition)]
    monkeypatch.setattr(regroup, "MAX_BUCKETS", 256)  # a bucket file per group
    regrouped = Regrouped(store, None, stages, groups, str(tmp_path))
    for stage, columns in stages:
        for k, group in reversed(list(enumerate(groups))):
            held = regrouped.read(stage, k).sort_by("chunk_id")
            assert held.num_rows > 0
            assert held == store.current(stage, "chunks", group, columns=columns).sort_by("chunk_id")


@pytest.mark.timeout(300)
@pytest.mark.parametrize("harm", ["altered", "pages zeroed"])
def test_a_week_with_an_edit_rebuilds_a_published_handoff_that_is_not_the_recorded_file(
        prefect_harness, tmp_path, harm):
    """The published file is checked against its run's record (size and SHA-256) before
    it is copied: a file altered by hand, or one whose pages are gone so that a copy
    could not even read it, is never the base of the new hand-off; the run rebuilds it
    from the stages and goes on."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    drive, store_dir = tmp_path / "drive", tmp_path / "store"
    (drive / "notes").mkdir(parents=True)
    for i, topic in enumerate(TOPICS):
        (drive / "notes" / f"{i:02d}.md").write_text(_note(topic, i))
    definition = _definition()
    _run(drive, store_dir, definition)
    chunks = store_dir / "handoff" / "chunks.parquet"
    if harm == "altered":
        table = pq.read_table(chunks)
        texts = table.column("text").to_pylist()
        texts[-1] = "altered by hand"
        pq.write_table(table.set_column(table.schema.get_field_index("text"), "text", pa.array(texts, pa.string()),),
                       chunks)
    else:
        # The footer kept (it still names the basis), the column chunks before it gone.
        data = chunks.read_bytes()
        footer = int.from_bytes(data[-8:-4], "little") + 8
        chunks.write_bytes(data[:4] + b"\0" * (len(data) - footer - 4) + data[-footer:])
    (drive / "notes" / "03.md").write_text(_note("van route", 3).replace("branch 3", "the north branch"))
    edited = _run(drive, store_dir, definition)
    assert edited["documents"]["processed"] == 1 and edited["handoff"] == "rebuilt", edited["handoff"]
    texts = _texts(store_dir)
    assert "altered by hand" not in [t for ts in texts.values() for t in ts]
    assert "the north branch" in texts["notes/03.md"][0]
    _same_as_rebuild(store_dir, definition, edited)
