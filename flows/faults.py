"""Fault points: named places where a test can make the process die at once.

`THRESHER_FAULT=<point>` in the environment makes `fault(point)` end the process with
status 75 and no clean-up, as a power cut or SIGKILL would. Used by the kill tests only.
"""

from __future__ import annotations

import os

FAULT_EXIT = 75


def fault(point: str) -> None:
    if os.environ.get("THRESHER_FAULT") == point:
        os._exit(FAULT_EXIT)
