"""thresher's flows: the run, the store, the runners and what they publish."""

import os
import sys

# pyarrow's memory pool, chosen before anything loads pyarrow: pyarrow reads
# ARROW_DEFAULT_MEMORY_POOL once, as it loads (its `set_memory_pool` reaches only the
# calls that take a pool from Python; Parquet reading through datasets does not). Its
# default, mimalloc, held on to far more memory in a run and was slower: on the
# documentation drive (`python -m bench docdrive`'s), a fresh process per run, two
# rounds, mimalloc then jemalloc (scratch timing, Linux, pyarrow 26): first run 68.5
# and 69.1 s against 65.0 and 66.0 s, its process's peak 1,307 and 1,261 MB against
# 948 and 949 MB; a week with 1 % of the files edited 4.98 and 5.27 s against 3.07 and
# 3.61 s, peak 761 and 741 MB against 589 and 554 MB. Linux only: pyarrow's Linux
# wheels carry jemalloc; elsewhere its default stays. A value already set is kept.
# Worker processes inherit it from the run's process.
if sys.platform == "linux":
    os.environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", "jemalloc")
