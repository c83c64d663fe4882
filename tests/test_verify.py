"""`thresher verify` on real runs of the demo drive: intact stores pass, every planted
damage is found with the documents it holds, and a rerun of those documents repairs
the current view."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from thresher.flows import pipeline
from thresher.flows.config import load_definition
from thresher.flows.store import Store
from thresher.flows.verify import PROBLEM, verify

THRESHER = str(Path(sys.executable).with_name("thresher"))


def _run(source: Path, store: Path, **kw) -> dict:
    return pipeline.run(load_definition(), str(source), str(store), workers=1, quiet=True, **kw)


def _content(table) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "run_id"} for r in table.to_pylist()]


def _problems(store_dir: Path) -> list:
    return [f for f in verify(Store(store_dir)) if f.severity == PROBLEM]


@pytest.fixture(scope="module")
def committed(prefect_harness, tmp_path_factory) -> Path:
    """One run of the demo drive, copied by each test before it damages anything."""
    from conftest import SAMPLE

    root = tmp_path_factory.mktemp("verify")
    _run(SAMPLE, root / "store")
    return root / "store"


@pytest.fixture()
def store_dir(committed, tmp_path) -> Path:
    import shutil

    dst = tmp_path / "store"
    shutil.copytree(committed, dst)
    return dst


def _extract_part(store_dir: Path) -> tuple[Path, list[str]]:
    """An extract part file holding several documents, and those documents' doc_ids."""
    best = None
    for p in sorted((store_dir / "stages" / "extract").glob("*/part-*.parquet")):
        docs = sorted(set(pq.read_table(p, columns=["doc_id"]).column("doc_id").to_pylist()))
        if best is None or len(docs) > len(best[1]):
            best = (p, docs)
    return best


def test_an_intact_store_verifies_clean_and_the_manifest_records_every_file(store_dir):
    assert verify(Store(store_dir)) == []
    manifest = Store(store_dir).latest_run().manifest
    parts = {str(p.relative_to(store_dir)) for p in (store_dir / "stages").rglob("part-*.parquet")}
    assert parts and parts <= set(manifest["files"])
    assert {"catalog.parquet", "handoff/chunks.parquet"} <= set(manifest["files"])
    size, sha = manifest["files"]["catalog.parquet"]
    assert size == (store_dir / "catalog.parquet").stat().st_size and len(sha) == 64
    r = subprocess.run([THRESHER, "verify", "--store", str(store_dir), "--json"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["intact"] is True


def test_a_flipped_byte_in_a_part_is_found_with_the_documents_it_holds(store_dir):
    part, docs = _extract_part(store_dir)
    data = bytearray(part.read_bytes())
    data[len(data) // 2] ^= 0xFF
    part.write_bytes(bytes(data))
    found = _problems(store_dir)
    assert [f.kind for f in found] == ["damaged"]
    assert found[0].path == str(part.relative_to(store_dir))
    paths = {r["doc_id"]: r["source_path"] for r in Store(store_dir).catalog().to_pylist()}
    assert set(found[0].documents) == {paths[d] for d in docs}
    r = subprocess.run([THRESHER, "verify", "--store", str(store_dir)], capture_output=True, text=True)
    assert r.returncode == 1
    lines = r.stdout.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("problem: damaged stages/extract/")


def test_missing_ledger_truncated_catalog_and_a_changed_handoff_are_each_found(store_dir):
    ledger = next((store_dir / "runs").glob("*/writes/clean/part-*.parquet"))
    ledger.unlink()
    cat = store_dir / "catalog.parquet"
    cat.write_bytes(cat.read_bytes()[:-100])
    chunks = store_dir / "handoff" / "chunks.parquet"
    chunks.write_bytes(chunks.read_bytes() + b"\0")
    found = {(f.kind, f.path) for f in _problems(store_dir)}
    assert ("missing", str(ledger.relative_to(store_dir))) in found
    assert ("damaged", "catalog.parquet") in found
    assert ("damaged", "handoff/chunks.parquet") in found


def test_a_ledger_that_disagrees_with_its_part_is_found(store_dir):
    # A ledger rewritten (checksum recorded anew, as a careless tool might) that drops a document.
    part, docs = _extract_part(store_dir)
    ledger = store_dir / "runs" / part.parent.name / "writes" / "extract" / part.name
    t = pq.read_table(ledger)
    pq.write_table(t.slice(1), ledger)
    store = Store(store_dir)
    manifest_path = store_dir / "runs" / part.parent.name / "manifest.json"
    m = json.loads(manifest_path.read_text())
    m["files"][str(ledger.relative_to(store_dir))] = store.file_record(str(ledger.relative_to(store_dir)))
    manifest_path.write_text(json.dumps(m))
    found = _problems(store_dir)
    assert [f.kind for f in found] == ["ledger"]
    assert "leaves out 1 document" in found[0].message


def test_a_handoff_chunk_without_a_stage_row_is_found(store_dir):
    # The hand-off and its recorded checksum both replaced: only the walk back can tell.
    chunks = store_dir / "handoff" / "chunks.parquet"
    t = pq.read_table(chunks)
    ids = t.column("chunk_id").to_pylist()
    ids[0] = "0" * 32
    import pyarrow as pa

    t = t.set_column(t.schema.get_field_index("chunk_id"), t.schema.field("chunk_id"), pa.array(ids))
    pq.write_table(t, chunks)
    store = Store(store_dir)
    run = store.latest_run()
    m = dict(run.manifest)
    m["files"]["handoff/chunks.parquet"] = store.file_record("handoff/chunks.parquet")
    (store_dir / "runs" / run.run_id / "manifest.json").write_text(json.dumps(m))
    found = _problems(store_dir)
    assert [f.kind for f in found] == ["handoff"] and "0" * 32 in found[0].message


def test_rerunning_the_documents_of_a_damaged_part_repairs_the_current_view(store_dir, harness_env):
    from conftest import SAMPLE

    before = _content(Store(store_dir).handoff())
    part, docs = _extract_part(store_dir)
    data = bytearray(part.read_bytes())
    part.write_bytes(bytes(data[: len(data) // 2]))  # truncated: unreadable
    found = _problems(store_dir)
    assert found and found[0].kind == "damaged"
    r = subprocess.run([THRESHER, "rerun", "--store", str(store_dir), "--damaged", "--source", str(SAMPLE)],
                       capture_output=True, text=True, timeout=300, env=harness_env)
    assert r.returncode == 0, r.stderr
    assert f"re-running {len(docs)} document(s)" in r.stderr
    after = verify(Store(store_dir))
    assert [f for f in after if f.severity == PROBLEM] == []
    assert [f.kind for f in after] == ["damaged"] and "superseded" in after[0].message
    assert _content(Store(store_dir).handoff()) == before
