"""thresher benchmarks: `make bench` runs every module listed in bench.__main__."""
