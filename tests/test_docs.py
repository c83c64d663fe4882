"""The README's hand-off table matches the schema the code writes."""

from __future__ import annotations

import re

from conftest import REPO
from thresher.flows import schema


def _type(t) -> str:
    return str(t).replace("list<item: string>", "list<string>")


def test_readme_handoff_table_is_the_schema():
    text = (REPO / "README.md").read_text()
    block = re.search(r"<!-- handoff-columns.*?-->\n(.*?)<!-- /handoff-columns -->", text, re.S).group(1)
    rows = [line for line in block.strip().splitlines()[2:]]
    documented = [tuple(c.strip().strip("`") for c in row.strip("|").split("|")) for row in rows]
    expected = [(f.name, _type(f.type), schema.HANDOFF_DOC[f.name]) for f in schema.HANDOFF]
    assert documented == expected


def test_readme_lists_every_cli_verb():
    from thresher.flows.cli import COMMANDS

    text = (REPO / "README.md").read_text()
    for verb in COMMANDS:
        assert f"thresher {verb}" in text


def _make_dry_run(target: str, tmp_path) -> str:
    """The commands `make TARGET` would run in a fresh clone (no .venv yet), not run."""
    import shutil
    import subprocess

    for name in ("Makefile", "pyproject.toml"):
        shutil.copy(REPO / name, tmp_path / name)
    r = subprocess.run(["make", "-n", target], cwd=tmp_path, capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    return r.stdout


def test_make_demo_installs_only_what_running_needs_and_make_test_adds_the_test_extras(tmp_path):
    demo = _make_dry_run("demo", tmp_path)
    assert "pip install --quiet -e ." in demo and "[test]" not in demo
    assert "thresher run" in demo
    assert "pip install --quiet -e '.[test]'" in _make_dry_run("test", tmp_path)


def test_the_default_flow_comment_names_every_runner_kind():
    from typing import get_args

    from thresher.flows.config import RunnerSection

    kinds = get_args(RunnerSection.model_fields["kind"].annotation)
    line = next(l for l in (REPO / "config" / "default.yaml").read_text().splitlines() if l.strip().startswith("kind:"))
    assert [k.strip() for k in line.split("#", 1)[1].split("|")] == list(kinds)
