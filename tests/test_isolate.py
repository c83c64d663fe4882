"""The killable child process behind a step's time limit (flows/isolate.py)."""

from __future__ import annotations

import pytest

from example_steps import SlowToUnpack, echo, hang
from thresher.flows.isolate import IsolatedCaller, TimeLimitExceeded


def test_the_clock_starts_when_the_child_starts_the_document():
    # The document takes 1.5 s to reach the child and nothing to process: a 0.5 s limit
    # must not fire, because getting ready is not the document's work.
    with IsolatedCaller() as caller:
        assert caller.call(echo, (SlowToUnpack(1.5, "done"),), 0.5) == "done"
        assert caller.last_seconds < 0.5


def test_a_hung_call_is_stopped_within_a_small_margin_of_the_limit_and_says_how_long_it_ran():
    with IsolatedCaller() as caller:
        with pytest.raises(TimeLimitExceeded) as info:
            caller.call(hang, ("x",), 1.0)
        # The time recorded is the time the work ran: at least the limit, and not much more
        # (the parent polls and kills at the deadline; 0.5 s covers a loaded machine).
        assert 1.0 <= info.value.taken < 1.5
        assert caller.last_seconds == info.value.taken
        assert "stopped after 1.0" in str(info.value) and "time limit of 1 s" in str(info.value)
        # The next call gets a fresh child, and the kill is not charged to it.
        assert caller.call(echo, ("next",), 1.0) == "next"
