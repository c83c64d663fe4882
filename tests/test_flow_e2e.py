"""The real Prefect flow, embedded, on the demo drive: every stage table, lineage,
failures as data, determinism and incremental reuse."""

from __future__ import annotations

import socket
from collections import Counter
from pathlib import Path

import pyarrow.parquet as pq
import pytest
import yaml

from thresher.flows import pipeline
from thresher.flows.config import build_definition, default_config_text, load_definition
from thresher.flows.store import Store

STAGES = ["extract", "clean", "language", "split", "dedup", "tokens"]
UNITS = {"extract": "pages", "clean": "pages", "language": "pages", "split": "chunks", "dedup": "chunks",
         "tokens": "chunks"}


def _run(source: Path, store: Path, workers: int = 2, definition=None) -> dict:
    return pipeline.run(definition or load_definition(), str(source), str(store), workers=workers, quiet=True)


@pytest.fixture(scope="module")
def first_run(tmp_path_factory, prefect_harness):
    """One run on the demo drive, shared by the read-only checks below."""
    import shutil

    from conftest import SAMPLE

    base = tmp_path_factory.mktemp("e2e")
    drive = base / "drive"
    shutil.copytree(SAMPLE, drive)
    attempts: list[tuple] = []
    real_connect = socket.socket.connect

    def recording_connect(self, address):
        attempts.append(address)
        return real_connect(self, address)

    socket.socket.connect = recording_connect
    try:
        manifest = _run(drive, base / "store", workers=1)
    finally:
        socket.socket.connect = real_connect
    return {"drive": drive, "store": Store(base / "store"), "manifest": manifest, "connects": attempts}


def test_every_stage_table_and_the_handoff_are_written(first_run):
    root = Path(first_run["store"].base)
    for stage in STAGES:
        assert list((root / "stages" / stage).rglob("*.parquet")), stage
    assert (root / "handoff" / "chunks.parquet").is_file()
    assert (root / "catalog.parquet").is_file()
    run_id = first_run["manifest"]["run_id"]
    assert (root / "runs" / run_id / "manifest.json").is_file()
    chunks = pq.read_table(root / "handoff" / "chunks.parquet")
    assert chunks.num_rows == first_run["manifest"]["chunks"] > 20
    assert all(n > 0 for n in chunks.column("token_count").to_pylist())
    langs = set(chunks.column("language").to_pylist())
    assert {"en", "de", "fr"} <= langs


def test_the_handoff_is_in_path_then_chunk_order_with_the_normalised_text_hash(first_run):
    # The output contract (README, "The hand-off table"): rows sorted by source_path, then
    # chunk_index; content_hash the SHA-256 of the chunk's normalised text (the dedup
    # step's exact-duplicate key), not of the text as it stands.
    import hashlib

    from thresher.steps.dedup import DedupParams, normalise

    rows = first_run["store"].handoff().to_pylist()
    keys = [(r["source_path"], r["chunk_index"]) for r in rows]
    assert keys == sorted(keys) and len(set(keys)) == len(keys)
    # Chunk ids are hashes: they alone would put a document's chunks in another order.
    assert any(a["chunk_id"] > b["chunk_id"] for a, b in zip(rows, rows[1:]) if a["doc_id"] == b["doc_id"])
    params = DedupParams(**next(s.get("params") or {} for s in yaml.safe_load(default_config_text())["steps"]
                                if s["step"] == "dedup"))
    for r in rows:
        assert r["content_hash"] == hashlib.sha256(normalise(r["text"], params).encode("utf-8")).hexdigest()
    assert any(normalise(r["text"], params) != r["text"] for r in rows)


def test_nothing_but_loopback_was_contacted(first_run):
    # The embedded Prefect server listens on 127.0.0.1; anything else would be telemetry
    # or a download (tiktoken encodings, analytics) that must not happen offline.
    outside = [a for a in first_run["connects"]
               if isinstance(a, tuple) and a and a[0] not in ("127.0.0.1", "::1", "localhost")]
    assert outside == []


def test_every_chunk_walks_back_to_a_page_and_a_file(first_run):
    from thresher.flows.summary import stages_of

    store = first_run["store"]
    by_id = {}
    for stage, unit in stages_of(first_run["manifest"]):  # every stage the run had
        for row in store.current(stage, unit).to_pylist():
            by_id[row["unit_id"]] = row
    catalog = {r["doc_id"]: r for r in store.catalog().to_pylist()}
    handoff = store.handoff().to_pylist()
    assert handoff
    for chunk in handoff:
        chain = []
        row = next(r for r in by_id.values() if r["step"] == "tokens" and r["chunk_id"] == chunk["chunk_id"])
        frontier = [row]
        while frontier:
            r = frontier.pop()
            chain.append(r["step"])
            for pid in r["parent_ids"]:
                assert pid in by_id, f"parent {pid} of {r['step']} unit {r['unit_id']} is missing"
                assert by_id[pid]["doc_id"] == chunk["doc_id"]
                frontier.append(by_id[pid])
        assert set(STAGES) <= set(chain), chain  # format-limited stages may add to it
        # a document inside documents walks on to the drive file that holds it
        row = catalog[chunk["doc_id"]]
        while row.get("container_doc_id"):
            row = catalog[row["container_doc_id"]]
        assert (first_run["drive"] / row["source_path"]).is_file()


def test_forward_from_a_page_to_its_chunks(first_run):
    store = first_run["store"]
    pages = [r for r in store.current("language", "pages").to_pylist()
             if r["source_path"] == "operations/branch-operations-handbook.pdf" and r["page"] == 2]
    assert len(pages) == 1
    splits = [r for r in store.current("split", "chunks").to_pylist() if pages[0]["unit_id"] in r["parent_ids"]]
    assert splits and all(r["page_start"] <= 2 <= r["page_end"] for r in splits)


def _extract_rows(store: Store, path: str) -> list[dict]:
    return [r for r in store.current("extract", "pages").to_pylist() if r["source_path"] == path]


@pytest.mark.parametrize("path, reason", [
    ("events/spring-reading-programme-2026.pdf", "unreadable PDF"),
    ("hr/salary-review-2026-protected.pdf", "password protected"),
    ("it/scanner-log.txt", "empty file (0 bytes)"),
    ("finance/2026-01-14-receipt-stationery-scan.pdf", "no text layer"),
])
def test_broken_files_fail_with_specific_reasons_and_the_run_completes(first_run, path, reason):
    rows = _extract_rows(first_run["store"], path)
    assert rows, f"no extract row for {path}"
    assert all(r["status"] == "failed" for r in rows)
    assert any(reason in (r["reason"] or "") for r in rows), [r["reason"] for r in rows]
    assert first_run["manifest"]["chunks"] > 0  # the rest of the drive got through


def test_an_image_without_ocr_is_skipped_not_failed(first_run):
    (row,) = _extract_rows(first_run["store"], "it/label-printer-logo.txt")
    assert row["status"] == "skipped" and row["reason"].startswith("image: OCR is not enabled")


def test_the_archived_copy_is_one_document_at_two_paths(first_run):
    cat = first_run["store"].catalog().to_pylist()
    a = next(r for r in cat if r["source_path"] == "operations/branch-operations-handbook.pdf")
    b = next(r for r in cat if r["source_path"] == "archive/2025/branch-operations-handbook.pdf")
    assert a["doc_id"] == b["doc_id"]
    # The hand-off names the copy outside the archive folder, and lists both.
    assert a["canonical_path"] == b["canonical_path"] == "operations/branch-operations-handbook.pdf"
    handoff = first_run["store"].handoff().to_pylist()
    assert "archive/2025/branch-operations-handbook.pdf" not in {r["source_path"] for r in handoff}  # one copy, not two
    assert {tuple(r["source_paths"]) for r in handoff if r["doc_id"] == a["doc_id"]} == {
        ("operations/branch-operations-handbook.pdf", "archive/2025/branch-operations-handbook.pdf")}


def _unit_ids(store: Store) -> dict[str, list[str]]:
    return {s: sorted(store.current(s, UNITS[s]).column("unit_id").to_pylist()) for s in STAGES}


def _handoff_content(store: Store) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "run_id"} for r in store.handoff().to_pylist()]


def test_same_input_gives_the_same_ids_and_handoff_whatever_the_worker_count(first_run, tmp_path):
    _run(first_run["drive"], tmp_path / "other", workers=2)
    other = Store(tmp_path / "other")
    assert _unit_ids(other) == _unit_ids(first_run["store"])
    assert _handoff_content(other) == _handoff_content(first_run["store"])


def test_a_second_run_reuses_everything_and_hands_off_no_changes(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    first = _run(sample_drive, store_dir)
    files_before = sorted(p.relative_to(store_dir) for p in (store_dir / "stages").rglob("*.parquet"))
    second = _run(sample_drive, store_dir)
    assert second["documents"]["processed"] == 0
    assert second["documents"]["unchanged"] == first["documents"]["distinct"]
    assert second["changes"] == {"upsert": 0, "delete": 0}
    assert second["chunks"] == first["chunks"]
    files_after = sorted(p.relative_to(store_dir) for p in (store_dir / "stages").rglob("*.parquet"))
    assert files_after == files_before  # nothing recomputed, nothing rewritten

    # An edited file is a new document: its old chunks are deleted, new ones upserted.
    # A removed file's chunks are deleted too, in the same change set.
    minutes = sample_drive / "board" / "2026-01-20-board-minutes.md"
    gone = "board/2025-11-18-board-minutes.md"
    before = {}
    for r in Store(store_dir).handoff().to_pylist():
        before.setdefault(r["source_path"], set()).add(r["chunk_id"])
    minutes.write_text(minutes.read_text() + "\n\n## Any other business\n\nThe chair thanked the volunteers of "
                       "the Brackenmoor branch for running the winter reading hour.\n")
    (sample_drive / gone).unlink()
    third = _run(sample_drive, store_dir)
    assert third["documents"]["processed"] == 1 and third["documents"]["removed"] == 2
    changes = pq.read_table(store_dir / "handoff" / "changes" / f"{third['run_id']}.parquet").to_pylist()
    deleted = {c["chunk_id"] for c in changes if c["action"] == "delete"}
    assert deleted == before["board/2026-01-20-board-minutes.md"] | before[gone]
    upserted = {c["chunk_id"] for c in changes if c["action"] == "upsert"}
    now = {r["chunk_id"] for r in Store(store_dir).handoff().to_pylist()
           if r["source_path"] == "board/2026-01-20-board-minutes.md"}
    assert upserted == now and not now & deleted
    assert third["changes"] == {"upsert": len(upserted), "delete": len(deleted)}
    texts = Store(store_dir).handoff().column("text").to_pylist()
    assert any("winter reading hour" in t for t in texts)


def test_a_parameter_change_reruns_from_that_step_only(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    _run(sample_drive, store_dir)
    data = yaml.safe_load(default_config_text())
    next(s for s in data["steps"] if s["step"] == "split")["params"]["max_tokens"] = 120
    changed = build_definition(data, "test")
    m = _run(sample_drive, store_dir, definition=changed)
    assert m["written"].get("extract") is None and m["written"].get("clean") is None
    assert sum(m["written"]["split"].values()) > 0
    store = Store(store_dir)
    assert max(store.handoff().column("token_count").to_pylist()) <= 120


def test_a_dropped_step_and_an_own_step_run_without_touching_flows(prefect_harness, sample_drive, tmp_path):
    data = yaml.safe_load(default_config_text())
    data["steps"] = [s for s in data["steps"] if s["step"] != "language"]
    data["steps"].insert(1, {"step": "example_steps:MASK_EMAILS"})  # right after extract
    (sample_drive / "contacts.txt").write_text(
        "Questions about the rota go to rota.desk@quillfern.example or to the duty manager at the branch.\n")
    m = _run(sample_drive, tmp_path / "store", definition=build_definition(data, "test"))
    store = Store(tmp_path / "store")
    assert "language" not in m["current"] and "mask_emails" in m["current"]
    texts = " ".join(store.handoff().column("text").to_pylist())
    assert "rota.desk@quillfern.example" not in texts and "[email]" in texts
    notes = [r["notes"] for r in store.current("mask_emails", "pages").to_pylist()
             if r["source_path"] == "contacts.txt"]
    assert dict(notes[0])["masked"] == "1"


def _small_drive(root: Path) -> Path:
    root.mkdir()
    shared = "<p>Quillfern staff intranet: internal use only, please do not forward outside the cooperative.</p>"
    for name, body in (("rota.html", "<h1>Rota</h1><p>The Saturday rota changes from March at every branch.</p>"),
                       ("vans.html", "<h1>Vans</h1><p>The mobile library van is serviced on the first Monday.</p>")):
        (root / name).write_text(f"<html><head><title>{name}</title></head><body>{body}{shared}</body></html>")
    (root / "notes.md").write_text("# Notes\n\nThe book club meets in the reading room on Thursdays at six.\n")
    return root


def test_a_format_limited_step_passes_other_documents_by(prefect_harness, tmp_path):
    data = yaml.safe_load(default_config_text())
    data["steps"].insert(1, {"step": "example_steps:HTML_ONLY"})
    drive = _small_drive(tmp_path / "drive")
    _run(drive, tmp_path / "store", definition=build_definition(data, "test"))
    store = Store(tmp_path / "store")
    tagged = store.current("html_only", "pages").to_pylist()
    assert sorted(r["source_path"] for r in tagged) == ["rota.html", "vans.html"]
    # The Markdown file went from extract straight to clean, and its lineage says so.
    extract_ids = {r["unit_id"]: r for r in store.current("extract", "pages").to_pylist()}
    md_clean = [r for r in store.current("clean", "pages").to_pylist() if r["source_path"] == "notes.md"]
    assert len(md_clean) == 1 and extract_ids[md_clean[0]["parent_ids"][0]]["source_path"] == "notes.md"
    assert {r["source_path"] for r in store.handoff().to_pylist()} == {"notes.md", "rota.html", "vans.html"}
    # Unchanged on the next run: nothing to redo for the passed-by document either.
    again = _run(drive, tmp_path / "store", definition=build_definition(data, "test"))
    assert again["documents"]["processed"] == 0 and again["changes"] == {"upsert": 0, "delete": 0}


def test_a_document_the_html_step_passes_by_goes_on_to_its_text_steps_at_once(prefect_harness, tmp_path):
    # The Markdown file need not wait for the HTML boilerplate step (a corpus step):
    # its text steps run in the same task runs as its extraction (parts "s00-...");
    # the HTML pages wait for that step and read its output (parts "s02-...").
    drive = _small_drive(tmp_path / "drive")
    m = _run(drive, tmp_path / "store")
    store = Store(tmp_path / "store")
    path_of = {r["doc_id"]: r["source_path"] for r in store.current("extract", "pages").to_pylist()}
    for stage in ("clean", "language", "split", "personal"):
        segment_of = {}
        for part in (tmp_path / "store" / "runs" / m["run_id"] / "writes" / stage).glob("part-*.parquet"):
            segment_of.update({path_of[d]: part.name.split("-")[1] for d in pq.read_table(part)["doc_id"].to_pylist()})
        assert segment_of == {"notes.md": "s00", "rota.html": "s02", "vans.html": "s02"}, stage
    boilerplate = {r["unit_id"] for r in store.current("boilerplate", "pages").to_pylist()}
    extract = {r["unit_id"] for r in store.current("extract", "pages").to_pylist()}
    for r in store.current("clean", "pages").to_pylist():
        assert set(r["parent_ids"]) <= (extract if r["source_path"] == "notes.md" else boilerplate)
    assert {r["source_path"] for r in store.handoff().to_pylist()} == {"notes.md", "rota.html", "vans.html"}


def test_token_counts_follow_text_that_steps_after_split_change(prefect_harness, tmp_path):
    # tokens reuses split's count; a mask (personal), a step of the user's own that
    # changes chunk text in a document step (rota) or a corpus step (vans) and keeps
    # the count must not leave it stale. Reference: tiktoken's encode_ordinary.
    from thresher.flows.encodings import get_encoding

    data = yaml.safe_load(default_config_text())
    names = [s["step"] for s in data["steps"]]
    data["steps"][names.index("personal")]["params"]["policy"] = {"email": "mask"}
    data["steps"].insert(names.index("personal"), {"step": "example_steps:SHOUT_ROTA"})
    data["steps"].insert(names.index("personal") + 2, {"step": "example_steps:SHOUT_VANS"})
    drive = _small_drive(tmp_path / "drive")
    (drive / "notes.md").write_text("# Notes\n\nThe book club meets on Thursdays; write to "
                                    "club.secretary@quillfern.example for the reading list.\n")
    _run(drive, tmp_path / "store", definition=build_definition(data, "test"))
    store = Store(tmp_path / "store")
    enc = get_encoding("cl100k_base")
    split_counts = {r["source_path"]: r["token_count"] for r in store.current("split", "chunks").to_pylist()}
    handoff = {r["source_path"]: r for r in store.handoff().to_pylist()}
    assert sorted(handoff) == ["notes.md", "rota.html", "vans.html"]
    assert "⟦email" in handoff["notes.md"]["text"] and handoff["vans.html"]["text"].isupper()
    assert handoff["rota.html"]["text"].isupper()
    for path, row in handoff.items():
        assert row["token_count"] == len(enc.encode_ordinary(row["text"])), path
        assert row["token_count"] != split_counts[path], path  # the text's count did change


def test_a_chain_without_dedup_and_tokens_still_hands_off_counts_and_hashes(prefect_harness, tmp_path):
    # Without the tokens step a chunk's token_counts is split's own count; without
    # dedup its content_hash is the SHA-256 of its text as it stands (README, output
    # contract). Reference: tiktoken's encode_ordinary, hashlib.
    import hashlib

    from thresher.flows.encodings import get_encoding

    data = yaml.safe_load(default_config_text())
    data["steps"] = [s for s in data["steps"] if s["step"] not in ("dedup", "tokens")]
    drive = _small_drive(tmp_path / "drive")
    _run(drive, tmp_path / "store", definition=build_definition(data, "test"))
    rows = Store(tmp_path / "store").handoff().to_pylist()
    enc = get_encoding("cl100k_base")
    assert {r["source_path"] for r in rows} == {"notes.md", "rota.html", "vans.html"}
    for r in rows:
        assert dict(r["token_counts"]) == {"cl100k_base": len(enc.encode_ordinary(r["text"]))}
        assert r["content_hash"] == hashlib.sha256(r["text"].encode("utf-8")).hexdigest()


def test_a_corpus_page_step_rewrites_documents_when_the_corpus_changes(prefect_harness, tmp_path):
    data = yaml.safe_load(default_config_text())
    data["steps"].insert(1, {"step": "example_steps:SHARED_BLOCKS"})
    definition = build_definition(data, "test")
    drive = _small_drive(tmp_path / "drive")
    (drive / "vans.html").rename(tmp_path / "vans.html")  # only one page carries the footer line
    _run(drive, tmp_path / "store", definition=definition)
    store = Store(tmp_path / "store")
    footer = "internal use only"
    assert any(footer in t for t in store.handoff().column("text").to_pylist())
    # A second page with the same line arrives: the line now repeats, so it leaves both.
    (tmp_path / "vans.html").rename(drive / "vans.html")
    m = _run(drive, tmp_path / "store", definition=definition)
    assert m["documents"]["processed"] == 1
    texts = Store(tmp_path / "store").handoff().column("text").to_pylist()
    assert texts and not any(footer in t for t in texts)
    rota = [r for r in Store(tmp_path / "store").current("shared_blocks", "pages").to_pylist()
            if r["source_path"] == "rota.html"]
    assert dict(rota[0]["notes"])["removed"] == "1" and rota[0]["attempt"] == 2


def test_the_html_boilerplate_step_runs_only_when_an_html_document_changed(prefect_harness, tmp_path, capsys):
    drive, store_dir = _small_drive(tmp_path / "drive"), tmp_path / "store"
    site = drive / "site"
    site.mkdir()
    footer = "Quillfern branch pages are kept by the volunteers' web group; send corrections to the desk."
    for name, body in (("hours", "The north branch opens at nine on weekdays and at ten on Saturdays."),
                       ("events", "The spring book sale runs for two weeks in the main hall from April."),
                       ("join", "Membership is free for everyone who lives or works in the district.")):
        (site / f"{name}.html").write_text(f"<html><body><h1>{name.title()}</h1><p>{body}</p>"
                                           f"<p>{footer}</p></body></html>")
    other = drive / "archive-site"  # a second site, whose pages keep their decisions
    other.mkdir()
    for n in range(3):
        (other / f"page-{n}.html").write_text(f"<html><body><h1>Page {n}</h1><p>Old newsletter number {n} of "
                                              f"the cooperative, kept for the record.</p><p>{footer}</p>"
                                              "</body></html>")

    def run() -> tuple[dict, str]:
        capsys.readouterr()
        m = pipeline.run(load_definition(), str(drive), str(store_dir), workers=1)
        return m, capsys.readouterr().err

    def site_texts(folder: str = "site/") -> list[str]:
        return [r["text"] for r in Store(store_dir).handoff().to_pylist() if r["source_path"].startswith(folder)]

    run()
    assert site_texts() and not any(footer in t for t in site_texts())
    assert site_texts("archive-site/") and not any(footer in t for t in site_texts("archive-site/"))
    # Only Markdown changed (an edit and a new file): the HTML step keeps its decisions.
    (drive / "notes.md").write_text("# Notes\n\nThe book club now meets on Wednesdays at six.\n")
    (drive / "rota.md").write_text("# Rota\n\nThe rota for May is on the staff room board.\n")
    m, out = run()
    assert m["documents"]["processed"] == 2 and "boilerplate: inputs unchanged since run" in out
    assert not any(footer in t for t in site_texts())
    # An HTML page goes: the site is too small to tell template from content, and the
    # step decides again (the footer comes back on the two pages left), reading only
    # that site's pages: the other site's decisions stand.
    (site / "join.html").unlink()
    m, out = run()
    assert m["documents"]["processed"] == 0 and "boilerplate: inputs unchanged" not in out
    assert "2 documents read, of the 1 group(s) that changed" in out
    assert sum(footer in t for t in site_texts()) == 2
    # What a run from scratch over the same drive hands off, page for page, and the
    # same counts for the step.
    scratch = pipeline.run(load_definition(), str(drive), str(tmp_path / "scratch"), workers=1, quiet=True)

    def texts(store: Path) -> dict[str, list[str]]:
        return {r["source_path"]: r["text"] for r in Store(store).handoff().to_pylist()}

    assert texts(store_dir) == texts(tmp_path / "scratch")
    assert m["written"]["boilerplate"] == scratch["written"]["boilerplate"]


def test_prefect_receives_the_run_logs_and_a_per_document_artifact(first_run):
    import asyncio
    import time as _time

    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey, FlowRunFilter, FlowRunFilterId, LogFilter, LogFilterFlowRunId

    flow_run_id = first_run["manifest"]["prefect_flow_run_id"]
    assert flow_run_id

    async def fetch():
        async with get_client() as client:
            logs = await client.read_logs(log_filter=LogFilter(flow_run_id=LogFilterFlowRunId(any_=[flow_run_id])))
            arts = await client.read_artifacts(
                artifact_filter=ArtifactFilter(key=ArtifactFilterKey(any_=["thresher-documents"])),
                flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[flow_run_id])))
            return logs, arts, (await client.read_flow_run(flow_run_id)).parameters

    deadline = _time.monotonic() + 30
    while True:  # the API log handler flushes in the background
        logs, arts, parameters = asyncio.run(fetch())
        messages = [entry.message for entry in logs]
        if any("password protected" in msg for msg in messages) or _time.monotonic() > deadline:
            break
        _time.sleep(1)
    assert any("hr/salary-review-2026-protected.pdf: extract failed: password protected" in msg for msg in messages)
    # The run's parameters, as the UI shows them: the drive, the store, the definition.
    assert parameters["source_root"] == str(first_run["drive"])
    assert parameters["store_root"] == first_run["store"].base
    assert parameters["definition_data"]["steps"][0]["step"] == "extract" and parameters["workers"] == 1
    assert arts, "no per-document artifact"
    table = arts[0].data if isinstance(arts[0].data, list) else __import__("json").loads(arts[0].data)
    by_doc = {row["document"]: row for row in table}
    assert by_doc["hr/salary-review-2026-protected.pdf"]["status"] == "failed"
    assert by_doc["policies/lending-policy-2025.pdf"]["chunks"] > 0
    assert table[0]["status"] == "failed"  # failed first


def _artifacts(flow_run_id: str) -> dict[str, list]:
    import asyncio

    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey, FlowRunFilter, FlowRunFilterId

    async def fetch():
        async with get_client() as client:
            return await client.read_artifacts(
                artifact_filter=ArtifactFilter(key=ArtifactFilterKey(any_=["thresher-documents", "thresher-run-summary"])),
                flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[flow_run_id])))

    out: dict[str, list] = {}
    for a in asyncio.run(fetch()):
        out[a.key] = a.data if isinstance(a.data, list) else __import__("json").loads(a.data) \
            if a.key == "thresher-documents" else a.data
    return out


def test_the_per_document_artifact_lists_what_the_run_changed_and_a_quiet_week_has_none(prefect_harness, tmp_path):
    # Prefect keeps every run's artifacts: one row per live document every week would
    # grow its database by the whole drive each run.
    drive = tmp_path / "drive"
    drive.mkdir()
    for name in ("rota", "vans", "hours"):
        (drive / f"{name}.md").write_text(f"# {name.title()}\n\nThe {name} of Quillfern change in spring.\n")
    first = _run(drive, tmp_path / "store", workers=1)
    assert {r["document"] for r in _artifacts(first["prefect_flow_run_id"])["thresher-documents"]} \
        == {"rota.md", "vans.md", "hours.md"}
    quiet = _artifacts(_run(drive, tmp_path / "store", workers=1)["prefect_flow_run_id"])
    assert "thresher-documents" not in quiet and "thresher-run-summary" in quiet
    (drive / "vans.md").write_text("# Vans\n\nThe van of Quillfern now visits on Thursdays.\n")
    (drive / "hours.md").unlink()
    week = _artifacts(_run(drive, tmp_path / "store", workers=1)["prefect_flow_run_id"])
    assert [(r["document"], r["status"]) for r in week["thresher-documents"]] == [("hours.md", "removed"),
                                                                                   ("vans.md", "ok")]


def test_a_copy_saved_by_another_program_is_dropped_as_a_copy_of_the_original(first_run):
    # Same text, other bytes (CRLF, Windows-1252): a second document, which dedup drops whole.
    store = first_run["store"]
    rows = [r for r in store.current("dedup", "chunks").to_pylist()
            if r["source_path"] == "volunteers/windows-export/volunteer-rota-spring-2026.txt"]
    assert rows and {r["status"] for r in rows} == {"dropped"}
    assert all("copy of document volunteers/volunteer-rota-spring-2026.txt" in r["reason"] for r in rows)
    kept = {r["chunk_id"] for r in store.handoff().to_pylist()
            if r["source_path"] == "volunteers/volunteer-rota-spring-2026.txt"}
    assert {r["duplicate_of"] for r in rows} <= kept and kept


def test_unit_timings_add_up_to_each_documents_time_once(first_run):
    store = first_run["store"]
    extract = store.current("extract", "pages").to_pylist()
    for stage, unit in (("extract", "pages"), ("clean", "pages"), ("split", "chunks")):
        by_doc: dict[str, list[dict]] = {}
        for r in store.current(stage, unit).to_pylist():
            by_doc.setdefault(r["doc_id"], []).append(r)
        for doc_id, rows in by_doc.items():
            timed = [r["document_ms"] for r in rows if r["document_ms"] is not None]
            assert len(timed) == 1 and timed[0] >= 0, (stage, rows[0]["source_path"])
    # A PDF's pages carry their own read time, which fits inside the document's time.
    pdfs: dict[str, list[dict]] = {}
    for r in extract:
        if r["format"] == "pdf" and r["status"] == "ok":
            pdfs.setdefault(r["doc_id"], []).append(r)
    pdf = max(pdfs.values(), key=len)
    assert len(pdf) > 2 and all(r["duration_ms"] is not None and r["duration_ms"] > 0 for r in pdf)
    assert sum(r["duration_ms"] for r in pdf) <= sum(r["document_ms"] or 0 for r in pdf)
    # Steps that time the document only leave the unit's own time empty.
    assert all(r["duration_ms"] is None for r in store.current("clean", "pages").to_pylist())


def _recount(store: Store, manifest: dict) -> tuple[dict, Counter]:
    """Per stage by status, and per (document, stage, status), counted from every stage
    table in full."""
    from thresher.flows.summary import counts_by_stage_and_document, live_doc_ids, stages_of

    stages = stages_of(manifest)
    live = live_doc_ids(store)
    totals = {c.stage: c.by_status for c in counts_by_stage_and_document(store, stages, live)[0]}
    per = Counter()
    for name, unit in stages:
        t = store.current(name, unit, live, columns=["doc_id", "status"])
        per.update((d, name, s) for d, s in zip(t.column("doc_id").to_pylist(), t.column("status").to_pylist()))
    return totals, per


def test_the_manifests_counts_carried_from_the_last_run_equal_a_full_recount(first_run, tmp_path):
    import shutil

    drive, store_dir = tmp_path / "drive", tmp_path / "store"
    shutil.copytree(first_run["drive"], drive)
    shutil.copytree(first_run["store"].root, store_dir)
    notes = sorted(drive.rglob("*.md"))
    # The document whose chunks others' are dropped as copies of: its removal changes
    # the counts of a document this run does not process (its chunks come back).
    first = first_run["store"]
    dedup = first.current("dedup", "chunks").to_pylist()
    owner = {r["chunk_id"]: r["doc_id"] for r in dedup}
    kept = {owner[r["duplicate_of"]] for r in dedup if r["status"] == "dropped"}
    doomed = [drive / r["source_path"] for r in first.catalog().to_pylist()
              if r["present"] and r["doc_id"] in kept and not r.get("container_doc_id")]
    assert doomed

    def check(m: dict) -> None:
        store = Store(store_dir)
        totals, per = _recount(store, m)
        assert m["current"] == totals
        assert m["pages"] == sum(totals[m["definition"]["steps"][0]["name"]].values())
        table = store.read_table(f"runs/{m['run_id']}/counts.parquet")
        stored = table.to_pylist()
        assert Counter({(r["doc_id"], r["stage"], r["status"]): r["units"] for r in stored}) == per
        # The per-document figures of the run's summary table (units by status, pages).
        from thresher.flows.summary import _fold, stages_of

        _, by_doc, pages = _fold(stages_of(m), table)
        want: dict[str, Counter] = {}
        want_pages: Counter = Counter()
        for (d, stage, status), n in per.items():
            want.setdefault(d, Counter())[status] += n
            if stage == m["definition"]["steps"][0]["name"]:
                want_pages[d] += n
        assert by_doc == want and pages == want_pages

    check(_run(drive, store_dir, workers=1))  # nothing changed
    notes[0].write_text(notes[0].read_text(encoding="utf-8") + "\n\nOne more paragraph for the week.\n",
                        encoding="utf-8")
    m = _run(drive, store_dir, workers=1)  # one file changed
    assert m["documents"]["processed"] >= 1
    check(m)
    for p in doomed:
        p.unlink()
    m = _run(drive, store_dir, workers=1)  # a document removed, its copies revived
    assert m["documents"]["removed"] >= 1 and m["documents"]["processed"] == 0
    check(m)
    doc = next(r["doc_id"] for r in Store(store_dir).catalog().to_pylist()
               if r["present"] and r["source_path"].endswith(".md"))
    m = pipeline.run(load_definition(), str(drive), str(store_dir), workers=1, quiet=True,
                     rerun={"doc_id": doc, "page": None, "step": "clean"})  # a re-run
    check(m)
    # A counts file that no longer matches its record (here: valid Parquet, wrong
    # numbers) is not trusted: the next run counts every document afresh.
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    counts = store_dir / "runs" / m["run_id"] / "counts.parquet"
    wrong = pq.read_table(counts)
    pq.write_table(wrong.set_column(wrong.schema.get_field_index("units"), "units",
                                    pc.add(wrong.column("units"), 1000)), counts)
    notes[1].write_text(notes[1].read_text(encoding="utf-8") + "\n\nAnd one for the next week.\n", encoding="utf-8")
    check(_run(drive, store_dir, workers=1))


def test_a_runs_prefect_calls_share_the_runs_client(prefect_harness):
    # Artifacts and Prefect's result-storage lookup ask get_client with no httpx settings;
    # each made a client of its own (and loaded a CA bundle) until they took the run's.
    from prefect.client.orchestration import get_client

    from thresher.flows.runtime import client_context, tls_context

    with client_context() as ctx:
        assert get_client(sync_client=True) is ctx.client
    assert tls_context() is tls_context()


def test_a_run_sends_no_heartbeat_unless_the_user_set_its_frequency():
    from prefect.settings import get_current_settings, temporary_settings

    from thresher.flows.runtime import run_overrides, run_settings

    assert run_overrides({}) == {"flows.heartbeat_frequency": None}
    assert run_overrides({"PREFECT_API_URL": "http://127.0.0.1:4200/api"}) == {"flows.heartbeat_frequency": None}
    assert run_overrides({"PREFECT_FLOWS_HEARTBEAT_FREQUENCY": "60"}) == {}
    assert run_overrides({"PREFECT_RUNNER_HEARTBEAT_FREQUENCY": "60",
                               "PREFECT_API_URL": "http://127.0.0.1:4200/api"}) == {}
    # The override is one Prefect accepts: the flow engine then starts no heartbeat thread.
    with temporary_settings(updates=run_overrides({})):
        assert get_current_settings().flows.heartbeat_frequency is None
    # run() builds those settings once per process; a later run under other settings
    # (another server's address) gets settings built on those, not the first ones.
    with run_settings(run_overrides({})) as first:
        assert get_current_settings().flows.heartbeat_frequency is None
    with run_settings(run_overrides({})) as again:
        assert again is first
    with temporary_settings(updates={"api.url": "http://127.0.0.1:9/api"}):
        with run_settings(run_overrides({})) as other:
            assert str(get_current_settings().api.url) == "http://127.0.0.1:9/api"
            assert other.flows.heartbeat_frequency is None
