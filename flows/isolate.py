"""Running a step call in a child process that can be killed.

A parser that hangs (or crashes in C code) must cost one document, not the run. A
batch keeps one child process and sends it one document at a time; when a call
passes its time limit the child is killed and a new one is started for the next
document. Children come from a fork server (not a plain fork of this process, whose
Prefect threads may hold locks) with the step modules preloaded, so a new child
costs milliseconds, not an interpreter start.

The time limit measures the document's own work: the child says when it has the
document in hand and starts on it, and only then does the clock start. A replacement
child getting ready (or a large document's bytes crossing the pipe) under load is not
charged to the document.

A streamed call (`stream`) runs a generator in the child: a document's steps one after
the other (flows/segment.py). The child sends each step's result as soon as it is
ready, and before each step a Clock with that step's own limit, so each step is timed
from its own start. The preload also loads the default token encoding and the
language profiles (flows/warm.py), so a new child starts warm.
"""

from __future__ import annotations

import inspect
import multiprocessing as mp
import pickle
import threading
import time
import traceback
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from multiprocessing.reduction import ForkingPickler
from typing import Any, Callable

from thresher.steps.extract.registry import reader_modules
from thresher.steps.extract.sniff import codec_modules

# Modules the fork server imports once, so children start warm.
PRELOAD = ["thresher.steps.extract", *reader_modules(), *codec_modules(), "thresher.flows.warm"]

# A child is replaced after this many calls, so a leak in a parser stays bounded. A
# document costs one call per segment (three with the default chain), and a replacement
# about 0.2 s of the parent's time under load (cProfile, wall clock: 9 replacements,
# 1.7 s of a 600-file run's 27 s of batches at 200).
CALLS_PER_CHILD = 1000

# A queued call at most this large is written straight into the pipe (it fits the
# socket's buffer, which the child has emptied by reading the call before); a larger
# one is written by a thread, so the parent goes on reading the child's results.
QUEUE_INLINE_BYTES = 64 << 10

# How long a child may take to receive a document and start on it before it counts as
# broken. Generous: it is not the document's time, only a guard against a stuck start.
START_SECONDS = 120.0

_context_lock = threading.Lock()
_context: Any = None


@dataclass
class Clock:
    """Yielded by a streamed call: the next piece of work starts now and may take
    `seconds` (None: no limit). `tag` says which piece (a step index)."""

    seconds: float | None
    tag: object = None


class TimeLimitExceeded(Exception):
    def __init__(self, seconds: float, taken: float):
        super().__init__(f"stopped after {taken:.2f} s, over the time limit of {seconds:g} s")
        self.seconds = seconds  # the limit
        self.taken = taken  # the time the document's work actually ran before it was stopped


class NotSendable(Exception):
    """The call cannot be sent to a child (a function defined inside another one, an
    open handle); nothing was sent, so the child is still ready."""


class ChildCrashed(Exception):
    def __init__(self, exitcode: int | None, message: str | None = None):
        super().__init__(message or f"the parser process died (exit code {exitcode})")
        self.exitcode = exitcode


class RemoteError(Exception):
    """An exception raised in the child, with its original type name and traceback."""

    def __init__(self, type_name: str, message: str, tb: str):
        super().__init__(message)
        self.type_name = type_name
        self.remote_traceback = tb


def isolation_available() -> bool:
    """Daemonic processes (some pool and cluster workers) may not start children."""
    return not mp.current_process().daemon


def _get_context():
    global _context
    with _context_lock:
        if _context is None:
            ctx = mp.get_context("forkserver")
            ctx.set_forkserver_preload(PRELOAD)
            _context = ctx
        return _context


def _child_main(conn: Connection) -> None:
    while True:
        try:
            msg = conn.recv()
        except EOFError:
            return
        if msg is None:
            return
        fn, args = msg
        conn.send(("started",))  # the document is unpacked here: its clock starts now
        try:
            result = fn(*args)
            if inspect.isgenerator(result):
                for item in result:
                    conn.send(("item", item))
                conn.send(("end",))
            else:
                conn.send(("ok", result))
        except BaseException as exc:  # noqa: BLE001 - reported to the parent as data
            conn.send(("error", type(exc).__name__, str(exc),
                       "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))))


class IsolatedCaller:
    """One reusable child process; `call` runs fn(*args) there within a time limit."""

    def __init__(self) -> None:
        self._proc: Any = None
        self._conn: Connection | None = None
        self._calls = 0
        self.last_seconds: float | None = None
        self.current: object = None  # the tag of the streamed piece of work under way
        # A call sent ahead (`stream(..., following=...)`): its token, and the thread
        # writing it when it was too large to write at once.
        self._queued: object = None
        self._writer: threading.Thread | None = None
        self._starter: threading.Thread | None = None  # start_soon's thread, until the first call

    def start_soon(self) -> None:
        """Start the child now, in a background thread: the fork server's preload (about
        2 s of CPU: the step modules, the token encoding, the language profiles) then runs
        while this process does other work, not when the first document is sent. The
        first call waits for the start; if it failed, that call starts a child again."""
        if self._proc is not None or self._starter is not None:
            return

        def start() -> None:
            try:
                self._start()
            except Exception:  # noqa: BLE001 - the first call starts one and reports its error
                pass

        self._starter = threading.Thread(target=start, name="thresher-warm-start", daemon=True)
        self._starter.start()

    def _started(self) -> None:
        """Wait for a start begun by start_soon."""
        if self._starter is not None:
            self._starter.join()
            self._starter = None

    def _start(self) -> None:
        ctx = _get_context()
        parent, child = ctx.Pipe(duplex=True)
        proc = ctx.Process(target=_child_main, args=(child,), daemon=True, name="thresher-parser")
        proc.start()
        child.close()
        self._proc, self._conn, self._calls = proc, parent, 0

    def _stop(self, kill: bool) -> None:
        self._started()
        if self._proc is None:
            return
        kill = kill or self._queued is not None  # it would run the queued call first
        try:
            if kill:
                self._proc.kill()
            else:
                self._conn.send(None)
            self._proc.join(timeout=5)
            if self._proc.is_alive():
                self._proc.kill()
                self._proc.join(timeout=5)
        except (OSError, ValueError, BrokenPipeError):
            pass
        finally:
            self._join_writer()
            if self._conn is not None:
                self._conn.close()
            self._proc, self._conn, self._queued = None, None, None

    def _join_writer(self) -> None:
        if self._writer is not None:
            self._writer.join(timeout=5)  # a killed child's pipe fails the write at once
            self._writer = None

    def _queue(self, fn: Callable[..., Any], args: tuple, token: object) -> None:
        """Send the next call while the child works on this one, so it goes straight on
        to it. Nothing is queued if the call cannot be pickled (the ordinary send says
        so later) or the child is due for replacement."""
        if self._calls + 1 >= CALLS_PER_CHILD or self._conn is None:
            return
        try:
            data = ForkingPickler.dumps((fn, args))
        except (pickle.PicklingError, AttributeError, TypeError):
            return
        conn = self._conn

        def write() -> None:
            try:
                conn.send_bytes(data)
            except (OSError, ValueError):
                pass  # the child was stopped: the call is sent again to its replacement

        self._join_writer()
        if len(data) <= QUEUE_INLINE_BYTES:
            write()
        else:
            self._writer = threading.Thread(target=write, name="thresher-queue", daemon=True)
            self._writer.start()
        self._calls += 1
        self._queued = token

    def _send(self, fn: Callable[..., Any], args: tuple, token: object = None) -> None:
        """Hand fn(*args) to a ready child and wait until it has started on it. With the
        token of the call queued last, that call is already in the child's hands."""
        self.last_seconds = None
        self.current = None
        self._started()
        if self._queued is not None:
            if token is not None and token is self._queued and self._proc.is_alive():
                self._queued = None
                self._join_writer()
                reply = self._receive(START_SECONDS, None)
                if reply is None:
                    self._stop(kill=True)
                    raise ChildCrashed(None, f"the parser process did not start the document within "
                                             f"{START_SECONDS:g} s")
                return
            self._stop(kill=True)  # another call: the queued one must not run first
        if self._proc is None or not self._proc.is_alive() or self._calls >= CALLS_PER_CHILD:
            self._stop(kill=self._proc is not None and not self._proc.is_alive())
            self._start()
        self._calls += 1
        assert self._conn is not None
        try:
            data = ForkingPickler.dumps((fn, args))  # what Connection.send would send
        except (pickle.PicklingError, AttributeError, TypeError) as exc:
            raise NotSendable(str(exc)) from exc
        try:
            self._conn.send_bytes(data)
        except (OSError, ValueError):
            raise self._crashed() from None
        reply = self._receive(START_SECONDS, None)
        if reply is None:
            self._stop(kill=True)
            raise ChildCrashed(None, f"the parser process did not start the document within {START_SECONDS:g} s")

    def stream(self, fn: Callable[..., Any], args: tuple, token: object = None,
               following: Callable[[], tuple | None] | None = None):
        """Run the generator fn(*args) in the child and yield what it yields, except
        Clocks: each starts the clock for the work after it, within its limit. Leaving
        the loop early kills the child (the next call gets a fresh one).

        `following`, once the child has started: None or (fn, args, token) of the next
        call, sent at once so the child goes on to it without waiting for this process
        (the next stream() with that token takes it up). The child sends its clock mark
        when it starts that call; its clock starts when this process reads the mark, so
        the queued call is never charged for the time it waited."""
        self._send(fn, args, token)
        if following is not None:
            nxt = following()
            if nxt is not None:
                self._queue(*nxt)
        limit: float | None = None
        started = time.monotonic()
        finished = False
        try:
            while True:
                reply = self._receive(limit, started)
                if reply is None:
                    self.last_seconds = time.monotonic() - started
                    self._stop(kill=True)
                    finished = True
                    raise TimeLimitExceeded(limit, self.last_seconds)
                if reply[0] == "item":
                    if isinstance(reply[1], Clock):
                        limit, started, self.current = reply[1].seconds, time.monotonic(), reply[1].tag
                        continue
                    yield reply[1]
                elif reply[0] == "end":
                    finished = True
                    return
                else:
                    finished = True
                    _, type_name, message, tb = reply
                    raise RemoteError(type_name, message, tb)
        finally:
            if not finished:
                self._stop(kill=True)

    def call(self, fn: Callable[..., Any], args: tuple, seconds: float) -> Any:
        """fn(*args) in the child; `last_seconds` is then the time the call ran there."""
        self._send(fn, args)
        started = time.monotonic()
        reply = self._receive(seconds, started)
        self.last_seconds = time.monotonic() - started
        if reply is None:
            self._stop(kill=True)
            raise TimeLimitExceeded(seconds, self.last_seconds)
        if reply[0] == "ok":
            return reply[1]
        _, type_name, message, tb = reply
        raise RemoteError(type_name, message, tb)

    def _receive(self, seconds: float | None, started: float | None) -> tuple | None:
        """The child's next message, or None when `seconds` (None: no limit) passed
        without one."""
        begun = time.monotonic() if started is None else started
        while True:
            remaining = 0.5 if seconds is None else begun + seconds - time.monotonic()
            if remaining <= 0:
                return None
            try:
                ready = self._conn.poll(min(remaining, 0.5))
            except (EOFError, OSError):
                ready = True
            if ready:
                try:
                    return self._conn.recv()
                except (EOFError, OSError):
                    raise self._crashed() from None
            if not self._proc.is_alive():
                raise self._crashed()

    def _crashed(self) -> ChildCrashed:
        self._proc.join(timeout=5)  # the pipe closes a moment before the exit code is known
        code = self._proc.exitcode
        self._stop(kill=True)
        return ChildCrashed(code)

    def close(self) -> None:
        self._stop(kill=False)

    def __enter__(self) -> "IsolatedCaller":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


# Warm workers kept between batches (one per worker of the run), so a worker's
# imports, encodings and language profiles are loaded once per run, not per batch.
_idle: list[IsolatedCaller] = []
_idle_lock = threading.Lock()
# At most this many in use at once (pipeline: the run's workers; None: as many as
# batches ask for). The thread pool runs one batch more than that, so the next batch
# is started and waiting, its first document ready, when a worker comes free.
_limit: int | None = None
_in_use = 0


@dataclass(eq=False)
class _Waiting:
    """A batch waiting for a worker, with the call its first document starts with."""

    call: tuple | None  # (fn, args, token), or None when it cannot be queued
    caller: IsolatedCaller | None = None
    claimed: bool = False
    ready: threading.Event = field(default_factory=threading.Event)


_waiting: list[_Waiting] = []


def limit_workers(n: int | None) -> None:
    global _limit
    with _idle_lock:
        _limit = n


def take_worker(first: tuple | None = None) -> IsolatedCaller:
    """A warm worker for a batch: an idle one, a new one under the limit, or else the
    next one a batch gives back. `first` (fn, args, token) is the batch's first call: a
    batch whose worker is on its last document queues it there (claim_waiting), so
    the worker goes straight on to it and comes here with it under way."""
    global _in_use
    with _idle_lock:
        if _limit is None or _in_use < _limit:
            _in_use += 1
            return _idle.pop() if _idle else IsolatedCaller()
        waiting = _Waiting(first)
        _waiting.append(waiting)
    waiting.ready.wait()
    assert waiting.caller is not None
    return waiting.caller


def claim_waiting() -> _Waiting | None:
    """For a batch whose worker has started its last document: a waiting batch's first
    call to queue in that worker now. give_back(caller, promised) then hands the worker
    to that batch."""
    with _idle_lock:
        for waiting in _waiting:
            if not waiting.claimed and waiting.call is not None:
                waiting.claimed = True
                return waiting
    return None


def give_back(caller: IsolatedCaller, promised: _Waiting | None = None) -> None:
    """The batch is done with its worker: to the batch it queued a call for, else to
    the first batch waiting, else to the idle pool."""
    global _in_use
    with _idle_lock:
        if promised is None:
            promised = next((w for w in _waiting if not w.claimed), None)
        if promised is not None:
            _waiting.remove(promised)
            promised.caller = caller
            promised.ready.set()
            return
        _in_use = max(0, _in_use - 1)
        _idle.append(caller)


def idle_count() -> int:
    """Warm workers waiting in this process's pool."""
    with _idle_lock:
        return len(_idle)


def close_idle() -> None:
    """Stop the warm workers no batch has taken (a run refused before its flow starts).
    Each first waits for its start to finish: a process that exits while the fork server
    is half-way through a spawn leaves it printing a traceback of its own on stderr."""
    with _idle_lock:
        callers = list(_idle)
        _idle.clear()
    for caller in callers:
        caller.close()


def prewarm(workers: int) -> None:
    """Have `workers` warm workers starting in the background (idle workers left by an
    earlier run in this process count); the first batches take them from the pool."""
    if not isolation_available():
        return
    with _idle_lock:
        for _ in range(workers - len(_idle)):
            caller = IsolatedCaller()
            caller.start_soon()
            _idle.append(caller)
