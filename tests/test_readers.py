"""Readers while a run writes: every read sees one committed state, never a mix.

A run works in a child process while this test reads in a loop. Each hand-off and
catalog read must be, byte for byte, the file some committed run's manifest recorded
(size and SHA-256), with that run's chunk count; a document's trail must hold only
rows of committed runs; `status` and `export` must answer throughout.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

from conftest import SAMPLE
from thresher.flows import pipeline
from thresher.flows.config import load_definition
from thresher.flows.export import export_chunks
from thresher.flows.store import Store

THRESHER = str(Path(sys.executable).with_name("thresher"))
EDITED = "board/2026-01-20-board-minutes.md"


def test_reads_during_a_run_each_match_a_committed_manifest(prefect_harness, harness_env, tmp_path):
    drive = tmp_path / "drive"
    shutil.copytree(SAMPLE, drive)
    store_dir = tmp_path / "store"
    pipeline.run(load_definition(), str(drive), str(store_dir), workers=1, quiet=True)
    f = drive / EDITED
    f.write_text(f.read_text() + "\n\n## Late item\n\nThe Quillfern board moved the spring fair.\n")
    doc = {r["source_path"]: r["doc_id"] for r in Store(store_dir).catalog().to_pylist()}[EDITED]

    child = subprocess.Popen([THRESHER, "run", "--source", str(drive), "--store", str(store_dir), "--quiet",
                              "--force"], env=harness_env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                             text=True)
    reads = cli_reads = 0
    seen_runs = set()
    while child.poll() is None or reads == 0:
        store = Store(store_dir)
        table, handoff_rec = store.read_published("handoff/chunks.parquet")
        catalog, catalog_rec = store.read_published("catalog.parquet")
        trail = store.current("extract", "pages", [doc], columns=["run_id"]).column("run_id").to_pylist()
        runs = {r.run_id: r.manifest for r in Store(store_dir).runs(refresh=True)}
        owner = [rid for rid, m in runs.items() if m["files"].get("handoff/chunks.parquet") == handoff_rec]
        assert owner, "the hand-off read matches no committed run's recorded file"
        assert table.num_rows == runs[owner[0]]["chunks"]
        assert any(m["files"].get("catalog.parquet") == catalog_rec for m in runs.values())
        assert set(trail) <= set(runs)
        seen_runs.add(owner[0])
        reads += 1
        if reads % 10 == 1 and child.poll() is None:
            status = subprocess.run([THRESHER, "status", "--store", str(store_dir), "--json"],
                                    capture_output=True, text=True, timeout=120)
            assert status.returncode == 0, status.stderr
            committed = {r.run_id for r in Store(store_dir).runs(refresh=True)}
            assert json.loads(status.stdout)["runs"][0]["run_id"] in committed
            out = tmp_path / f"export-{reads}.jsonl"
            assert export_chunks(store.handoff(), "jsonl", str(out)) == len(out.read_text().splitlines())
            cli_reads += 1
    assert child.wait() == 0, child.stderr.read()
    assert reads >= 5 and cli_reads >= 1
    final = Store(store_dir)
    assert final.latest_run().run_id in {r.run_id for r in final.runs()}
