"""Run the benchmarks one after the other; each prints its own figures.

`python -m bench` runs all; `python -m bench NAME ...` runs the named ones.
"""

from __future__ import annotations

import importlib
import sys

BENCHES = ["goals", "docdrive", "runners", "orchestration", "incremental", "sitefolder", "scale", "chunking", "extract", "dedup", "retrieval", "deliver",
           "formats", "markup", "store_growth", "report", "access", "memory"]


def main(argv: list[str]) -> int:
    names = argv or BENCHES
    for name in names:
        if name not in BENCHES:
            print(f"unknown benchmark {name!r}; known: {', '.join(BENCHES)}", file=sys.stderr)
            return 2
    for name in names:
        print(f"== {name}")
        importlib.import_module(f"bench.{name}").main()
        print()
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
