"""The live progress line: documents done of all, units per second, time left; plain
lines when the output is not a terminal."""

from __future__ import annotations

import io

from rich.console import Console

from thresher.flows.progress import LiveProgress, for_run, plain


def test_live_line_counts_documents_and_units_per_segment():
    out = io.StringIO()
    live = LiveProgress(Console(file=out, force_terminal=True, width=120, color_system=None))
    live.segment("extract+clean+language+split", 5, "pages")
    live.advance("extract+clean+language+split", 3, 40)
    live("found 5 files (5 distinct documents)")
    live.advance("extract+clean+language+split", 2, 20)
    live.finish("extract+clean+language+split")
    live.close()
    text = out.getvalue()
    assert "found 5 files (5 distinct documents)" in text
    last = [ln for ln in text.replace("\r", "\n").splitlines() if "extract+clean" in ln][-1]
    assert "5/5" in last and "documents" in last and "pages/s" in last


def test_plain_lines_unless_a_terminal_and_none_when_quiet(capsys):
    assert for_run(quiet=True, live=True) is None
    assert for_run(quiet=False, live=False) is plain
    assert for_run(quiet=False, live=True) is plain  # pytest's stderr is not a terminal
    plain("split: nothing to do")
    assert capsys.readouterr().err == "split: nothing to do\n"
