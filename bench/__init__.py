"""thresher benchmarks: `make bench` runs every module listed in bench.__main__."""

from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def peak_mb() -> float:
    """This process's peak resident set in MB: VmHWM in /proc/self/status. Not
    getrusage's ru_maxrss: Linux carries the parent's resident size into a child it
    starts (fork, or vfork and exec), so a large parent, such as `make bench`'s process
    after a few benchmarks, shows as every child's peak."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    raise RuntimeError("no VmHWM in /proc/self/status (Linux only)")


def reset_peak() -> None:
    """Start this process's peak (VmHWM) again from its present size (Linux 4.0 and
    later: `5` written to /proc/self/clear_refs)."""
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")
