"""Process settings that must be in place before Prefect is imported.

Embedded Prefect is made quiet, offline and light on a small machine. Each value is
a default: anything the user set in the environment wins. Measured reasons are in
DEVELOPERS.md ("Prefect in embedded mode").
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from typing import Any

PREFECT_DEFAULTS = {
    # No telemetry or analytics calls (the machine may have no network at all);
    # turning server analytics off also avoids a "database is locked" race at start-up.
    "DO_NOT_TRACK": "1",
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    # The temporary server needs 9-23 s to start on a 2-core machine; 20 s is too tight.
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "90",
    # Run logs (per-document events, at INFO) go to the Prefect API, where a team's
    # server shows them; the console shows only warnings, keeping it for thresher's
    # own progress lines.
    "PREFECT_LOGGING_LEVEL": "INFO",
    "PREFECT_LOGGING_HANDLERS_CONSOLE_LEVEL": "WARNING",
    "PREFECT_SERVER_LOGGING_LEVEL": "CRITICAL",
    "PREFECT_LOGGING_TO_API_WHEN_MISSING_FLOW": "ignore",
    # Batch the embedded server's writes so it does not eat a core on small machines.
    "PREFECT_SERVER_SERVICES_TASK_RUN_RECORDER_BATCH_SIZE": "100",
    "PREFECT_SERVER_SERVICES_TASK_RUN_RECORDER_READ_BATCH_SIZE": "100",
    "PREFECT_SERVER_SERVICES_EVENT_PERSISTER_BATCH_SIZE": "100",
    "PREFECT_SERVER_SERVICES_EVENT_PERSISTER_READ_BATCH_SIZE": "100",
    # No "new version available" or UI checks.
    "PREFECT_SERVER_UI_ENABLED": "false",
    "PREFECT_CLI_PROMPT": "false",
}

NO_LOCAL_PORT = ("needs a local port on 127.0.0.1 for thresher's embedded Prefect server (is the loopback "
                 "interface up?), or PREFECT_API_URL set to a Prefect server")


def collect_after_imports() -> None:
    """The cyclic garbage collector back on, with everything loaded so far kept out of
    its scans (`gc.freeze`): modules, Prefect's settings and the definition live as long
    as the process. The `thresher` command turns the collector off while it imports
    (its full scans over a growing heap took 0.15-0.25 s of 1.5-1.7 s of imports);
    a run turns it back on before its first document, a command that runs no flow as
    it starts. A caller that never turned it off (a program calling pipeline.run) is
    left as it is: its heap is not ours to freeze."""
    import gc

    if not gc.isenabled():
        gc.freeze()
        gc.enable()


def embedded_server_possible() -> bool:
    """Whether this process can serve and reach a port on 127.0.0.1, as embedded Prefect must.

    Without loopback, Prefect waits for its temporary server until the start-up timeout
    and then fails with a traceback; this answers at once.
    """
    import socket

    try:
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as server:
            server.bind(("127.0.0.1", 0))
            server.listen(1)
            with socket.create_connection(server.getsockname(), timeout=5):
                return True
    except OSError:
        return False


def api_unreachable(url: str, timeout: float = 5.0) -> str | None:
    """Why the Prefect server at `url` (PREFECT_API_URL) cannot be reached, or None.

    Asked through Prefect's own client (its health check), the same way the run would
    reach that server; thresher itself opens no connection. An HTTP error status counts
    as reachable (a server behind authentication may refuse the health path); only a
    refused connection, a name that does not resolve or a timeout is reported, so the
    run stops in one line instead of Prefect's traceback. The client is made for `url`
    directly (a temporary change of Prefect's settings re-validates all of them), with
    the run's TLS context.
    """
    import httpx
    from prefect.client.orchestration import SyncPrefectClient
    from prefect.settings import PREFECT_API_AUTH_STRING, PREFECT_API_KEY

    try:
        with SyncPrefectClient(url, api_key=PREFECT_API_KEY.value(), auth_string=PREFECT_API_AUTH_STRING.value(),
                               httpx_settings={"timeout": timeout, "verify": tls_context()}) as client:
            problem = client.api_healthcheck()
    except Exception as exc:
        problem = exc
    if problem is None or isinstance(problem, httpx.HTTPStatusError):
        return None
    text = str(problem).strip()
    reason = text.splitlines()[0] if text else type(problem).__name__
    return (f"PREFECT_API_URL={url} does not answer ({reason}): start that Prefect server "
            "(`make prefect-server` starts one on 127.0.0.1), or unset PREFECT_API_URL to run embedded")


def apply_defaults() -> None:
    for key, value in PREFECT_DEFAULTS.items():
        os.environ.setdefault(key, value)


apply_defaults()


# Prefect's flow-run heartbeat feeds automations that mark a stopped run as crashed;
# Prefect's guide to them ("How to detect and respond to zombie flows", docs.prefect.io)
# has the user turn them on by setting PREFECT_FLOWS_HEARTBEAT_FREQUENCY, for runs of a
# deployment. On exit Prefect waits for the heartbeat thread's one-second sleep, which
# made every short run up to a second longer (bench/incremental.py: wall times of short
# runs fell on whole seconds past their work). A scheduled run (flows/schedule.py) is a
# deployment's flow run: its parent flow keeps Prefect's heartbeat, only the run inside
# it goes without.
HEARTBEAT_VARS = ("PREFECT_FLOWS_HEARTBEAT_FREQUENCY", "PREFECT_RUNNER_HEARTBEAT_FREQUENCY")


def run_overrides(environ=os.environ) -> dict:
    """Prefect settings for one run of the flow: no heartbeat, unless the user set its
    frequency (with or without a Prefect server of their own)."""
    if any(environ.get(v) for v in HEARTBEAT_VARS):
        return {}
    return {"flows.heartbeat_frequency": None}


# (id of the settings in force, PREFECT_ environment, overrides) -> (those settings, the new ones)
_RUN_SETTINGS: dict[tuple, tuple] = {}


@contextmanager
def run_settings(overrides: dict):
    """Prefect's temporary_settings(updates=overrides), the new settings built once per process.

    Building them re-reads every settings source through pydantic-settings: 0.3 s wall
    per run on a 2-core machine, most of a no-change run (tools/profile_weekly.py). The
    result depends only on the settings in force, the PREFECT_ environment (which
    pydantic-settings reads again) and the overrides, so those are the key; the entry
    holds the base object, so its id cannot pass to another object meanwhile.
    """
    import prefect.context

    context = prefect.context.get_settings_context()
    if not overrides:
        yield context.settings
        return
    env = tuple(sorted((k, v) for k, v in os.environ.items() if k.startswith("PREFECT_")))
    key = (id(context.settings), env, tuple(sorted(overrides.items())))
    hit = _RUN_SETTINGS.get(key)
    if hit is None or hit[0] is not context.settings:
        if len(_RUN_SETTINGS) >= 8:  # a long-lived process (schedule, tests) keeps only recent ones
            _RUN_SETTINGS.clear()
        hit = _RUN_SETTINGS[key] = (context.settings, context.settings.copy_with_update(updates=overrides))
    with prefect.context.SettingsContext(profile=context.profile, settings=hit[1]):
        yield hit[1]


_TLS: dict[tuple, Any] = {}


def tls_context():
    """The TLS context Prefect's client would make (its constructor's choice: no
    verification when PREFECT_API_TLS_INSECURE_SKIP_VERIFY, else the
    PREFECT_API_SSL_CERT_FILE bundle or certifi's), made once per process."""
    import ssl

    import certifi
    from prefect.settings import get_current_settings

    api = get_current_settings().api
    key = (bool(api.tls_insecure_skip_verify), api.ssl_cert_file or certifi.where())
    tls = _TLS.get(key)
    if tls is None:
        if key[0]:
            tls = ssl.create_default_context()
            tls.check_hostname = False
            tls.verify_mode = ssl.CERT_NONE
        else:
            tls = ssl.create_default_context(cafile=key[1])
        _TLS[key] = tls
    return tls


@contextmanager
def client_context():
    """Prefect's sync client context for one run, its TLS context made once per process.

    Each flow run's client built a new SSL context and loaded certifi's CA bundle into
    it: 25-60 ms CPU per run (tools/profile_weekly.py), whatever the server's scheme.
    The flow engine and its task threads take the client of a context that is already
    entered, so this one serves them. Prefect's get_client hands a context's client
    only to callers asking with the httpx settings the context was made with; artifacts
    and the result-storage lookup ask with none, and made a client (and a CA bundle
    load) each, three per run. The TLS context is the one Prefect would make itself,
    so the context is marked as made with none: they take this client too.
    """
    from prefect.context import SyncClientContext

    ctx = SyncClientContext(httpx_settings={"verify": tls_context()})
    ctx._httpx_settings = None
    with ctx:
        yield ctx


def collections_without_dask() -> None:
    """Load Prefect's installed collections (packages that register block types) now,
    all but prefect-dask, in a process that will not use Dask.

    A task run in a process pool hydrates its flow run's context, whose result store
    names a block type; looking that up first imports every installed collection
    (Prefect's load_prefect_collections, run once per process), and prefect-dask
    brings dask and distributed: 0.33 s of CPU in each pool process (the import alone,
    timed on this machine), for a runner that never touches Dask. The other
    collections (a user's storage blocks, say) load as Prefect would load them. Uses
    Prefect's private cache of loaded collections: where that is not there (another
    Prefect), nothing is done and Prefect loads them all itself."""
    from importlib.metadata import EntryPoints, entry_points

    try:
        from prefect._internal.plugins import collections as loader
    except ImportError:
        return
    if getattr(loader, "_collections", ...) is not None or not hasattr(loader, "safe_load_entrypoints"):
        return  # loaded already, or not the loader this was written for
    wanted = EntryPoints(ep for ep in entry_points(group="prefect.collections")
                         if ep.value.split(".")[0].split(":")[0] != "prefect_dask")
    loader._collections = loader.safe_load_entrypoints(wanted)
