"""A delivery target of your own, as DEVELOPERS.md shows it: one JSON file holding the
chunks by id and the runs applied. Named in a definition as
`kind: example_target:JsonFileTarget` with `options: {path: ...}`.

Atomicity comes from writing a new file and renaming it over the old one, so a delivery
that dies half-way leaves the previous file whole.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from thresher.flows.deliver import Delivery, row_values


class JsonFileTarget:
    def __init__(self, entry, store):
        self.path = Path(entry.options["path"])

    def _load(self) -> dict:
        if self.path.exists():
            return json.loads(self.path.read_text("utf-8"))
        return {"runs": [], "chunks": {}}

    def applied_runs(self) -> list[str]:
        return self._load()["runs"]

    def apply(self, delivery: Delivery) -> None:
        state = self._load()
        if delivery.full is not None:
            state = {"runs": [], "chunks": {}}
            for row in row_values(delivery.full):
                state["chunks"][row["chunk_id"]] = row
        for run in delivery.runs:
            for chunk_id in run.deletes:
                state["chunks"].pop(chunk_id, None)
            for row in row_values(run.upserts):
                state["chunks"][row["chunk_id"]] = row
        state["runs"] += [run_id for run_id, _ in delivery.record]
        tmp = self.path.with_suffix(".tmp")
        tmp.write_text(json.dumps(state, default=str, sort_keys=True), "utf-8")
        os.replace(tmp, self.path)

    def close(self) -> None:
        pass
