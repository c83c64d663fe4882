"""Which path names a document whose bytes sit at several paths, and which revision of
a near-duplicate the index keeps: the ones a reader should be sent to."""

from __future__ import annotations

import os
from datetime import datetime, timezone
from pathlib import Path

import yaml

from thresher.flows import pipeline
from thresher.flows.config import SourceSection, build_definition, default_config_text
from thresher.flows.plan import live_documents
from thresher.flows.store import Store
from thresher.steps.dedup import DedupParams, decide, fresh_table, sketch
from thresher.steps.units import Chunk, DocChunks, chunk_locator

DAY = 86_400


def _row(path: str, doc: str = "d1", mtime_ns: int = 0, container: str | None = None) -> dict:
    return {"source_path": path, "doc_id": doc, "present": True, "first_run": "r1", "mtime_ns": mtime_ns,
            "mtime": None, "container_doc_id": container}


def _live_path(rows: list[dict], source: SourceSection | None = None) -> str:
    canonical, _, _ = live_documents(rows, {"r1": 1}, 2, source)
    return canonical["d1"]


def test_the_live_path_is_outside_archive_folders_then_newest_then_first_in_path_order():
    old, new = 1 * DAY * 10**9, 2 * DAY * 10**9
    # The archived copy is newer (copied there after the last edit), yet not the one named.
    assert _live_path([_row("archive/2025/handbook.pdf", mtime_ns=new),
                       _row("operations/handbook.pdf", mtime_ns=old)]) == "operations/handbook.pdf"
    # Folder names match at any depth and in any case.
    assert _live_path([_row("a/handbook.pdf", mtime_ns=old), _row("Team/Archive/handbook.pdf", mtime_ns=new),
                       _row("team/OLD/x/handbook.pdf", mtime_ns=new)]) == "a/handbook.pdf"
    # Outside archive folders: the most recently modified, then path order.
    assert _live_path([_row("a/x.md", mtime_ns=old), _row("b/x.md", mtime_ns=new)]) == "b/x.md"
    assert _live_path([_row("b/x.md", mtime_ns=old), _row("a/x.md", mtime_ns=old)]) == "a/x.md"
    assert _live_path([_row("a/x.md", mtime_ns=old), _row("b/x.md", mtime_ns=new)],
                      SourceSection(copies_by="path")) == "a/x.md"
    # Only archive copies: the newest of them.
    assert _live_path([_row("archive/a.md", mtime_ns=old), _row("archive/b.md", mtime_ns=new)]) == "archive/b.md"
    # A file of the drive before its copy inside an archive file, however new.
    assert _live_path([_row("minutes.zip/x.md", mtime_ns=new, container="z"),
                       _row("archive/x.md", mtime_ns=old)]) == "archive/x.md"
    # The definition's own archive folders replace the defaults.
    assert _live_path([_row("archive/a.md", mtime_ns=new), _row("superseded/a.md", mtime_ns=old)],
                      SourceSection(archive_folders=["superseded/**"])) == "archive/a.md"


def _chunks(doc: str, path: str, rank: int, modified: int, text: str) -> DocChunks:
    chunk = Chunk(locator=chunk_locator(0), index=0, chunk_id=f"{doc}-0", text=text, char_start=0,
                  char_end=len(text))
    return DocChunks(doc, path, rank, [chunk], modified)


REVISION = ("Members may borrow up to twelve items at a time from any branch of the cooperative, "
            "and loans run for three weeks. Items may be renewed twice online or at the desk unless "
            "another member has reserved them. Overdue items are not fined, but a member with items "
            "more than six weeks overdue cannot borrow again until they are returned or reported lost. ")


def test_dedup_keeps_the_newest_revision_by_default_and_the_first_seen_when_asked():
    # Last year's policy was seen first (rank 0); this year's (rank 1) changed one sentence.
    older = _chunks("old", "policies/loans-2025.md", 0, 1 * DAY * 10**9, REVISION + "Fines were removed in 2025.")
    newer = _chunks("new", "policies/loans-2026.md", 1, 2 * DAY * 10**9, REVISION + "Fines were removed in 2026.")
    docs = [older, newer]

    def dropped(params: DedupParams) -> dict[str, str]:
        table = fresh_table(sketch(docs, params), docs)
        return {r["doc_id"]: r["duplicate_of"] for r in decide(table, params).to_pylist() if r["status"] == "dropped"}

    assert dropped(DedupParams()) == {"old": "new-0"}
    assert dropped(DedupParams(keep="first_seen")) == {"new": "old-0"}
    # Equal times fall back to the first seen.
    same = [_chunks("old", "b.md", 0, 5, REVISION), _chunks("new", "a.md", 1, 5, REVISION)]
    table = fresh_table(sketch(same, DedupParams()), same)
    assert {r["doc_id"] for r in decide(table, DedupParams()).to_pylist() if r["status"] == "dropped"} == {"new"}


def _at(path: Path, day: int) -> None:
    t = datetime(2026, 1, day, 9, 0, tzinfo=timezone.utc).timestamp()
    os.utime(path, (t, t))


def _write(drive: Path, rel: str, text: str, day: int) -> None:
    path = drive / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    _at(path, day)


def _handoff(store_dir: Path) -> dict[str, tuple[str, list[str]]]:
    """doc_id -> (source_path, source_paths) of the published hand-off."""
    t = Store(store_dir).handoff().select(["doc_id", "source_path", "source_paths"]).to_pylist()
    return {r["doc_id"]: (r["source_path"], r["source_paths"]) for r in t}


def test_copies_and_revisions_through_the_flow_and_the_cli(prefect_harness, tmp_path, capsys):
    from thresher.flows.cli import main

    drive, store_dir = tmp_path / "drive", tmp_path / "store"
    rota = "# Volunteer rota\n\nSaturday mornings: two volunteers at the Lindle Cross desk.\n" * 3
    for rel, day in (("notes/rota.md", 3), ("team/rota.md", 5), ("archive/rota.md", 9)):
        _write(drive, rel, rota, day)
    _write(drive, "policies/loans-2025.md", "# Loans\n\n" + REVISION + "Fines were removed in 2025.\n", 2)
    definition = build_definition(yaml.safe_load(default_config_text()), "test")
    pipeline.run(definition, str(drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    doc_of = {r["source_path"]: r["doc_id"] for r in store.catalog().to_pylist()}
    first = _handoff(store_dir)
    assert first[doc_of["notes/rota.md"]] == ("team/rota.md", ["team/rota.md", "archive/rota.md", "notes/rota.md"])

    # A week later: this year's loans policy arrives, and the notes copy of the rota is
    # saved again (same bytes, newer time).
    _write(drive, "policies/loans-2026.md", "# Loans\n\n" + REVISION + "Fines were removed in 2026.\n", 12)
    _at(drive / "notes/rota.md", 14)
    m = pipeline.run(definition, str(drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    doc_of = {r["source_path"]: r["doc_id"] for r in store.catalog().to_pylist()}
    second = _handoff(store_dir)
    rota_id = doc_of["notes/rota.md"]
    assert second[rota_id] == ("notes/rota.md", ["notes/rota.md", "archive/rota.md", "team/rota.md"])
    # Only the path changed: no step ran for the rota, its chunks are upserted with the new path.
    assert not [r for r in store.stage_rows("extract", "pages", [rota_id]).to_pylist() if r["run_id"] == m["run_id"]]
    changes = store.read_table(f"handoff/changes/{m['run_id']}.parquet").to_pylist()
    assert {(c["action"], c["source_path"]) for c in changes if c["doc_id"] == rota_id} == {("upsert", "notes/rota.md")}
    # This year's policy reaches the index; last year's near-copy leaves it.
    assert doc_of["policies/loans-2026.md"] in second and doc_of["policies/loans-2025.md"] not in second
    assert {c["action"] for c in changes if c["doc_id"] == doc_of["policies/loans-2025.md"]} == {"delete"}

    # A user who names a copy is answered about that path, told which one the hand-off names.
    capsys.readouterr()
    assert main(["trail", "team/rota.md", "--store", str(store_dir)]) == 0
    out = capsys.readouterr().out
    assert out.startswith("team/rota.md\n") and "the hand-off names notes/rota.md for all of them" in out
    assert main(["rerun", "--path", "archive/rota.md", "--step", "split", "--store", str(store_dir),
                 "--source", str(drive)]) == 0
    said = capsys.readouterr()
    assert "  archive/rota.md: split for the whole document" in said.err, said.err
    assert _handoff(store_dir)[rota_id][0] == "notes/rota.md"
