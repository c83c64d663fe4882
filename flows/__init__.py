"""thresher's flows: the run, the store, the runners and what they publish."""

import os
import sys

# pyarrow's memory pool, chosen before anything loads pyarrow: pyarrow reads
# ARROW_DEFAULT_MEMORY_POOL once, as it loads (`set_memory_pool` does not reach Parquet
# reads through datasets). Its default, mimalloc, held about a third more memory in a
# run and made a 1 % week slower (DEVELOPERS.md, stop 34, has the figures). Linux only:
# pyarrow's Linux wheels carry jemalloc. A value already set is kept; worker processes
# inherit it from the run's process.
if sys.platform == "linux":
    os.environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", "jemalloc")
