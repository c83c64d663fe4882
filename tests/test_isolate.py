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


def test_a_worker_starts_with_the_store_readers_and_without_pandas():
    # Its first batch of stored inputs (flows/inputs.py) reads through pyarrow's dataset
    # layer: imported in the preload, not on the way to a document. pandas, which that
    # layer imported with it, is not imported at all (flows/arrow_setup.py).
    from example_steps import imported

    with IsolatedCaller() as caller:
        assert caller.call(imported, (["pyarrow.dataset", "pandas"],), 60.0) == [True, False]


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


def test_a_streamed_call_times_each_piece_from_its_own_start_and_a_stopped_worker_is_replaced():
    from example_steps import timed_pieces

    with IsolatedCaller() as caller:
        # Three pieces of 0.4 s each, each within its own 0.8 s limit, 1.2 s in all:
        # the limit is per piece, never the stream's total.
        got = list(caller.stream(timed_pieces, ([(0.8, 0.4), (0.8, 0.4), (0.8, 0.4)],)))
        assert [n for n, _ in got] == [0, 1, 2]
        worker = got[0][1]
        # The same warm worker takes the next call.
        assert [pid for _, pid in caller.stream(timed_pieces, ([(None, 0.0)],))] == [worker]
        # The second piece runs over its 0.5 s: the worker is stopped and the error names it.
        seen = []
        with pytest.raises(TimeLimitExceeded) as info:
            for item in caller.stream(timed_pieces, ([(5.0, 0.0), (0.5, 3600), (5.0, 0.0)],)):
                seen.append(item[0])
        assert seen == [0] and caller.current == 1 and 0.5 <= info.value.taken < 1.0
        # A fresh worker takes the next call, and its start is not charged to it: a
        # 0.3 s limit holds for 0.1 s of work however long the new worker takes to start.
        again = list(caller.stream(timed_pieces, ([(0.3, 0.1)],)))
        assert again[0][1] != worker


def test_a_result_arrives_as_it_was_when_yielded():
    # The worker changes a step's units after yielding them (segment.as_next_inputs).
    # Holding a result back to send it with the next Clock, one message instead of two
    # (tried in stop 35), sent the changed units, and every stored row lost its payload
    # and time.
    from example_steps import changed_after_yield

    with IsolatedCaller() as caller:
        assert list(caller.stream(changed_after_yield, ())) == [{"payload": "the step's own"}, "next step done"]


def test_every_result_a_streamed_call_made_arrives_before_its_error():
    from example_steps import pieces_then_failure
    from thresher.flows.isolate import RemoteError

    with IsolatedCaller() as caller:
        seen = []
        with pytest.raises(RemoteError) as info:
            for n, _ in caller.stream(pieces_then_failure, (3,)):
                seen.append(n)
        assert seen == [0, 1, 2] and "set-up after the last piece failed" in str(info.value)


def test_a_call_queued_behind_another_runs_in_the_same_worker_timed_from_its_own_start():
    from example_steps import timed_pieces

    with IsolatedCaller() as caller:
        # Queued while the first call's 1 s piece runs: it waits about 1 s in the child's
        # pipe, which its 0.5 s limit must not count; the same warm worker takes it.
        second = (timed_pieces, ([(0.5, 0.2)],), "second")
        first = list(caller.stream(timed_pieces, ([(5.0, 1.0)],), following=lambda: second))
        got = list(caller.stream(timed_pieces, ([(0.5, 0.2)],), token="second"))
        assert [n for n, _ in got] == [0] and got[0][1] == first[0][1]
        # A queued call that runs over its own limit is stopped like any other.
        third = (timed_pieces, ([(0.5, 3600)],), "third")
        list(caller.stream(timed_pieces, ([(5.0, 0.1)],), following=lambda: third))
        with pytest.raises(TimeLimitExceeded) as info:
            list(caller.stream(timed_pieces, ([(0.5, 3600)],), token="third"))
        assert 0.5 <= info.value.taken < 1.0
        # A call other than the queued one never gets the queued one's results.
        fourth = (timed_pieces, ([(None, 0.0), (None, 0.0)],), "fourth")
        list(caller.stream(timed_pieces, ([(5.0, 0.1)],), following=lambda: fourth))
        assert [n for n, _ in caller.stream(timed_pieces, ([(None, 0.0)],), token="other")] == [0]


def test_a_batch_waiting_for_the_worker_finds_its_first_document_queued_there():
    # One worker, two batches: the second waits (the run's limit holds), and the first
    # queues the second's first call behind its own last one, so the worker goes
    # straight on to it and then passes to the second batch with that call under way.
    import threading
    import time

    from example_steps import timed_pieces
    from thresher.flows import isolate

    with isolate._idle_lock:
        kept, isolate._idle[:] = list(isolate._idle), []
        in_use, isolate._in_use = isolate._in_use, 0
    isolate.limit_workers(1)
    try:
        caller = isolate.take_worker()
        call = (timed_pieces, ([(5.0, 0.1)],), "second batch")
        got = {}

        def second_batch():
            worker = isolate.take_worker(call)
            got["sent before"] = worker._calls
            got["pieces"] = list(worker.stream(*call[:2], token="second batch"))
            got["worker"] = worker

        waiting = threading.Thread(target=second_batch)
        waiting.start()
        deadline = time.monotonic() + 30
        while not isolate._waiting and time.monotonic() < deadline:
            time.sleep(0.01)
        assert isolate._waiting and "worker" not in got  # no second worker beyond the limit
        promised = []

        def claim():
            promised.append(isolate.claim_waiting())
            return promised[0].call

        last = list(caller.stream(timed_pieces, ([(5.0, 0.3)],), following=claim))
        isolate.give_back(caller, promised[0])
        waiting.join(30)
        assert got["worker"] is caller and got["pieces"][0][1] == last[0][1]  # the same process
        assert got["sent before"] == caller._calls == 2  # the queued call was not sent again
        isolate.give_back(caller)
        assert isolate._in_use == 0 and isolate._idle == [caller]
    finally:
        isolate.limit_workers(None)
        with isolate._idle_lock:
            for c in isolate._idle:
                c.close()
            isolate._idle[:], isolate._in_use = kept, in_use


def test_a_worker_started_ahead_is_running_before_any_call_and_takes_the_first_one():
    import multiprocessing as mp
    import time

    from example_steps import timed_pieces

    before = {p.pid for p in mp.active_children()}
    caller = IsolatedCaller()
    caller.start_soon()
    try:
        # The child comes up with no call sent: its start (the fork server's preload on
        # a first start) is not left for the first document to wait for.
        deadline = time.monotonic() + 60
        started = []
        while not started and time.monotonic() < deadline:
            started = [p for p in mp.active_children() if p.pid not in before and p.name == "thresher-parser"]
            time.sleep(0.05)
        assert len(started) == 1
        # That same process takes the first call.
        assert [pid for _, pid in caller.stream(timed_pieces, ([(None, 0.0)],))] == [started[0].pid]
    finally:
        caller.close()


def test_workers_are_started_ahead_only_for_a_run_that_surely_has_work(tmp_path):
    import yaml

    from thresher.flows import isolate
    from thresher.flows.config import build_definition, default_config_text
    from thresher.flows.execute import prewarm_run

    data = yaml.safe_load(default_config_text())
    data["runner"] = {"kind": "threads", "workers": 2}
    threads = build_definition(data, "test")
    data["runner"] = {"kind": "processes", "workers": 2}
    processes = build_definition(data, "test")
    weekly = tmp_path / "weekly"
    weekly.mkdir()
    (weekly / "catalog.parquet").write_bytes(b"")  # a catalog it cannot read: the run itself says so
    with isolate._idle_lock:
        kept, isolate._idle[:] = list(isolate._idle), []
    try:
        prewarm_run(threads, str(tmp_path), str(weekly), None, force=False)
        prewarm_run(processes, str(tmp_path), str(tmp_path / "new"), None, force=False)  # its batches run in the pool
        assert isolate._idle == []
        prewarm_run(threads, str(tmp_path), str(weekly), None, force=True)  # --force processes every document
        assert len(isolate._idle) == 2
        prewarm_run(threads, str(tmp_path), str(tmp_path / "new"), 3, force=False)  # a first run; idle ones count
        assert len(isolate._idle) == 3
    finally:
        with isolate._idle_lock:
            started, isolate._idle[:] = list(isolate._idle), kept
        for caller in started:
            caller.close()


@pytest.mark.parametrize("served", [True, False])
def test_the_run_command_starts_the_workers_before_it_asks_for_prefect(served, tmp_path, monkeypatch):
    """A first run's workers start before the health check of a Prefect server it is
    given (PREFECT_API_URL) and before Prefect's import, so their fork server's preload
    overlaps them (started after, it held up the first document by about half a
    second). Without a server, the check for a local port to serve on costs microseconds
    and comes first: a run refused there starts no worker."""
    from thresher.flows import cli, isolate

    drive = tmp_path / "drive"
    drive.mkdir()
    (drive / "note.md").write_text("# Rota\n\nThe Saturday rota changes in March.\n")
    seen = []

    class Stop(Exception):
        pass

    def health_check():
        seen.append(isolate.idle_count())
        raise Stop  # the test ends here: no flow runs

    monkeypatch.setattr(cli, "_need_prefect_api", health_check)
    if served:  # never asked: the check above stands in for it
        monkeypatch.setenv("PREFECT_API_URL", "http://127.0.0.1:9/api")
    else:
        monkeypatch.delenv("PREFECT_API_URL", raising=False)
    with isolate._idle_lock:
        kept, isolate._idle[:] = list(isolate._idle), []
    try:
        with pytest.raises(Stop):
            cli.main(["run", "--source", str(drive), "--store", str(tmp_path / "store"), "--workers", "1",
                      "--quiet"])
        assert seen == ([1] if served else [0])
        assert isolate.idle_count() == (1 if served else 0)
    finally:
        with isolate._idle_lock:
            started, isolate._idle[:] = list(isolate._idle), kept
        for caller in started:
            caller.close()
