"""Process settings that must be in place before Prefect is imported.

Embedded Prefect is made quiet, offline and light on a small machine. Each value is
a default: anything the user set in the environment wins. Measured reasons are in
DEVELOPERS.md ("Prefect in embedded mode").
"""

from __future__ import annotations

import os

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

def apply_defaults() -> None:
    for key, value in PREFECT_DEFAULTS.items():
        os.environ.setdefault(key, value)


apply_defaults()
