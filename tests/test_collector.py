"""The `thresher` command keeps Python's cyclic garbage collector off while it imports,
and every command has it on again for its work (flows/runtime.collect_after_imports);
a program that calls the flow itself keeps its collector as it set it."""

from __future__ import annotations

import json
import subprocess
import sys

SCRIPT = """
import gc, json, sys
from thresher.flows import cli
gc.disable()  # as console_main does
code = cli.main(sys.argv[1:])
print(json.dumps({"code": code, "enabled": gc.isenabled(), "frozen": gc.get_freeze_count() > 0}))
"""


def _command(*args: str) -> dict:
    out = subprocess.run([sys.executable, "-c", SCRIPT, *args], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_a_run_and_a_command_that_runs_no_flow_work_with_the_collector_on(tmp_path):
    drive = tmp_path / "drive"
    drive.mkdir()
    (drive / "rota.md").write_text("# Reading room rota\n\nThe desk is staffed from nine until six on weekdays.\n")
    store = str(tmp_path / "store")
    ran = _command("run", "--source", str(drive), "--store", store, "--quiet")
    assert ran == {"code": 0, "enabled": True, "frozen": True}
    status = _command("status", "--store", store)
    assert status == {"code": 0, "enabled": True, "frozen": True}


def test_a_program_calling_the_flow_keeps_its_collector_as_it_was(tmp_path):
    drive = tmp_path / "drive"
    drive.mkdir()
    (drive / "rota.md").write_text("# Reading room rota\n\nThe desk is staffed from nine until six on weekdays.\n")
    script = f"""
import gc, json
from thresher.flows import pipeline
from thresher.flows.config import load_definition
pipeline.run(load_definition(), {str(drive)!r}, {str(tmp_path / 'store')!r}, quiet=True)
print(json.dumps({{"enabled": gc.isenabled(), "frozen": gc.get_freeze_count() > 0}}))
"""
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    assert json.loads(out.stdout.strip().splitlines()[-1]) == {"enabled": True, "frozen": False}
