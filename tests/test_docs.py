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
