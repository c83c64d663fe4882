"""`pip install .` and `pip install -e .` both give the `thresher` namespace, and
neither installs bare top-level `flows` or `steps` modules.

Each install goes into a fresh virtual environment whose runtime dependencies come
from the test environment (a .pth file); only the build backend is fetched.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

CHECK = """
import importlib.util, json, sys
import thresher.flows.cli, thresher.steps.units, thresher.flows.config as c
d = c.load_definition()  # the embedded default travels with the package
from thresher.flows import report_html  # the review pages' templates travel with it too
env = report_html.environment()
templates = sorted(env.list_templates())
for name in templates:
    env.get_template(name)
print(json.dumps({
    "templates": templates,
    "templates_dir": str(report_html.TEMPLATES),
    "cli": thresher.flows.cli.__file__,
    "steps": [s.name for s in d.steps],
    "bare_flows": importlib.util.find_spec("flows") is not None,
    "bare_steps": importlib.util.find_spec("steps") is not None,
}))
"""


def _venv_with_deps(where: Path) -> Path:
    subprocess.run([sys.executable, "-m", "venv", str(where)], check=True)
    py = where / "bin" / "python"
    target = subprocess.run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                            check=True, capture_output=True, text=True).stdout.strip()
    deps = sysconfig.get_paths()["purelib"]
    Path(target, "_thresher_test_deps.pth").write_text(deps + "\n")
    return py


@pytest.mark.timeout(900)  # builds a wheel and installs into a fresh venv, twice
@pytest.mark.parametrize("editable", [False, True], ids=["pip-install", "pip-install-editable"])
def test_install_maps_flows_and_steps_under_thresher(tmp_path, editable):
    import json

    src = tmp_path / "src"
    shutil.copytree(REPO, src, ignore=shutil.ignore_patterns(".venv", ".git", ".thresher-store", "*.egg-info",
                                                          "build", "__pycache__", ".pytest_cache"))
    py = _venv_with_deps(tmp_path / "venv")
    # Build isolation fetches setuptools for the build like any user install would;
    # --no-deps keeps the runtime dependencies from the test environment.
    cmd = [str(py), "-m", "pip", "install", "--quiet", "--no-deps"]
    cmd += ["-e", str(src)] if editable else [str(src)]
    subprocess.run(cmd, check=True, cwd=tmp_path)
    out = subprocess.run([str(py), "-c", CHECK], check=True, capture_output=True, text=True, cwd=tmp_path)
    info = json.loads(out.stdout)
    order = ["extract", "clean", "language", "split", "dedup", "tokens"]
    assert [s for s in info["steps"] if s in order] == order
    assert not info["bare_flows"] and not info["bare_steps"]
    shipped = sorted(str(p.relative_to(REPO / "flows" / "report_templates")).replace("\\", "/")
                     for p in (REPO / "flows" / "report_templates").rglob("*") if p.is_file())
    assert info["templates"] == shipped and "sections/summary.html" in shipped and "report.css" in shipped
    cli_path = Path(info["cli"]).resolve()
    if editable:
        assert cli_path == (src / "flows" / "cli.py").resolve()
    else:
        assert "site-packages" in cli_path.parts and cli_path.parent.name == "flows"
        assert cli_path.parent.parent.name == "thresher"
        assert "site-packages" in Path(info["templates_dir"]).parts
    script = tmp_path / "venv" / "bin" / "thresher"
    help_out = subprocess.run([str(script), "run", "--help"], capture_output=True, text=True, cwd=tmp_path)
    assert help_out.returncode == 0 and "--workers" in help_out.stdout
