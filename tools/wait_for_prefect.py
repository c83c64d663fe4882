"""Wait until the Prefect server at URL answers (used by `make prefect-server`).

`prefect server start --background` returns before the server listens, and a run
started at once would fail; exits non-zero with the reason after SECONDS.
"""

from __future__ import annotations

import sys
import time

from thresher.flows.runtime import api_unreachable


def main(url: str, seconds: float = 120.0) -> int:
    end = time.monotonic() + seconds
    while (problem := api_unreachable(url, timeout=2)) and time.monotonic() < end:
        time.sleep(0.5)
    print(problem or f"the Prefect server at {url} answers", file=sys.stderr if problem else sys.stdout)
    return 1 if problem else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1], *(float(a) for a in sys.argv[2:3])))
