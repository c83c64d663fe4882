"""Writing the hand-off's live chunks to a file another tool can load."""

from __future__ import annotations

import json
import os
import sys
import tempfile
from pathlib import Path
from typing import IO

import pyarrow as pa
import pyarrow.parquet as pq


def _jsonl(table: pa.Table, out: IO[str]) -> int:
    n = 0
    for batch in table.to_batches(max_chunksize=2048):
        for row in batch.to_pylist():
            if row.get("token_counts") is not None and not isinstance(row["token_counts"], dict):
                row["token_counts"] = dict(row["token_counts"])
            out.write(json.dumps(row, ensure_ascii=False, sort_keys=False))
            out.write("\n")
            n += 1
    return n


def export_chunks(table: pa.Table, fmt: str, out_path: str) -> int:
    """Write the chunks; a file appears complete or not at all (temporary name, then rename)."""
    if out_path == "-":
        if fmt != "jsonl":
            raise ValueError("only jsonl can be written to standard output")
        n = _jsonl(table, sys.stdout)
        sys.stdout.flush()  # a closed pipe shows here, where the caller can end quietly
        return n
    target = Path(out_path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", dir=target.parent)
    try:
        if fmt == "parquet":
            os.close(fd)
            pq.write_table(table, tmp, compression="zstd")
            n = table.num_rows
        else:
            with os.fdopen(fd, "w", encoding="utf-8") as f:
                n = _jsonl(table, f)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return n
