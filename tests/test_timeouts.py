"""The suite's own per-test time limit (pytest-timeout, configured in pyproject.toml)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def test_the_suite_has_a_default_time_limit_per_test(request):
    assert request.config.pluginmanager.hasplugin("timeout")
    assert float(request.config.getini("timeout")) >= 120  # room for the Prefect harness's start


def test_a_hanging_test_is_stopped_and_fails_instead_of_holding_the_run(tmp_path):
    hang = tmp_path / "test_hang.py"
    hang.write_text("import time\n\ndef test_hangs():\n    time.sleep(3600)\n")
    # The project's own configuration, with the default lowered so the check is quick.
    r = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-c",
                        str(REPO / "pyproject.toml"), "--rootdir", str(tmp_path), "-o", "timeout=2", str(hang)],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 1, r.stdout + r.stderr
    assert "Timeout" in r.stdout and "1 failed" in r.stdout
