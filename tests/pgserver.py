"""A throwaway PostgreSQL server on 127.0.0.1 for tests and benchmarks (Debian's
postgresql package: initdb and pg_ctl into a temporary folder). As root the server runs
as the `postgres` user, since it refuses to run as root."""

from __future__ import annotations

import contextlib
import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from pathlib import Path
from typing import Iterator


def pg_bin() -> Path | None:
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"))
    return Path(found[-1]).parent if found else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def scratch_server() -> Iterator[str]:
    """Start a server, yield its DSN, stop it and remove its files."""
    pg = pg_bin()
    if pg is None:
        raise RuntimeError("PostgreSQL is not installed: `make test` installs Debian's postgresql package")
    # Not under pytest's temporary folder: that is private to root, and the server runs
    # as the postgres user.
    base = Path(tempfile.mkdtemp(prefix="thresher-pg-"))
    data, sock = base / "data", base / "sock"
    sock.mkdir()
    prefix: list[str] = []
    if os.geteuid() == 0:
        user = pwd.getpwnam("postgres")
        for p in (base, sock):
            os.chown(p, user.pw_uid, user.pw_gid)
        prefix = ["runuser", "-u", "postgres", "--"]
    try:
        subprocess.run(prefix + [str(pg / "initdb"), "-D", str(data), "-U", "postgres", "--auth=trust",
                                 "-E", "UTF8", "--locale=C.UTF-8"], check=True, capture_output=True)
        port = _free_port()
        subprocess.run(prefix + [str(pg / "pg_ctl"), "-D", str(data), "-l", str(base / "log"), "-w", "-t", "60",
                                 "-o", f"-c listen_addresses=127.0.0.1 -c port={port} "
                                       f"-c unix_socket_directories={sock} -c fsync=off", "start"],
                       check=True, capture_output=True)
        try:
            yield f"host=127.0.0.1 port={port} user=postgres dbname=postgres"
        finally:
            subprocess.run(prefix + [str(pg / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"],
                           capture_output=True)
    finally:
        shutil.rmtree(base, ignore_errors=True)
