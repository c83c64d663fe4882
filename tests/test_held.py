"""A document the scan cannot read this run is held: kept as stored, not removed.

A share's folder off line for a week, a file locked or its permissions changed: the
scan reports the path as a problem, and the chunks of what the store last read there
stay in the hand-off until a run can read it again (or the file is really gone). Both
errors are made for real, even as root: a symbolic link whose target has gone, and a
folder whose path grows past Linux's PATH_MAX (4,096 bytes) when the drive is moved.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from conftest import definition_with

from thresher.flows import cli, pipeline
from thresher.flows.cli import run_summary_lines
from thresher.flows.discover import CANNOT_LIST
from thresher.flows.plan import REMOVAL_FLOOR, TooManyRemovals, held_paths
from thresher.flows.preview import preview
from thresher.flows.report import write_report
from thresher.flows.store import Store
from thresher.flows.verify import verify

POLICY = ("# Lending policy\n\nMembers of Quillfern libraries may borrow twelve items at once. "
          "Items are lent for three weeks and may be renewed twice unless another member holds them.\n")


def _definition(max_tokens: int = 400):
    return definition_with(split={"max_tokens": max_tokens})


def _run(drive: Path, store: Path, max_tokens: int = 400) -> dict:
    return pipeline.run(_definition(max_tokens), str(drive), str(store), workers=1, quiet=True)


def _chunks(store: Path) -> dict[str, set[str]]:
    """source_path -> chunk_ids of the published hand-off."""
    s = Store(store)
    t = s.read_table(s.published("handoff/chunks.parquet"), columns=["source_path", "chunk_id"])
    out: dict[str, set[str]] = {}
    for p, c in zip(t.column("source_path").to_pylist(), t.column("chunk_id").to_pylist()):
        out.setdefault(p, set()).add(c)
    return out


def _catalog(store: Path) -> dict[str, dict]:
    return {r["source_path"]: r for r in Store(store).catalog().to_pylist()}


def test_a_file_that_cannot_be_read_keeps_its_chunks_until_it_is_read_or_gone(prefect_harness, tmp_path, capsys):
    drive = tmp_path / "drive"
    drive.mkdir()
    (drive / "rota.md").write_text("# Rota\n\nThe Saturday rota changes from March at every branch of Quillfern.\n")
    elsewhere = tmp_path / "other-share"  # another mount the drive links into
    elsewhere.mkdir()
    (elsewhere / "policy.md").write_text(POLICY)
    (drive / "policy.md").symlink_to(elsewhere / "policy.md")
    store = tmp_path / "store"

    first = _run(drive, store)
    before = _chunks(store)
    assert set(before) == {"rota.md", "policy.md"}
    old_chain = _catalog(store)["policy.md"]["chain_digest"]

    # The other share is off line, and the definition changed this week.
    (elsewhere / "policy.md").unlink()
    # What the run will do, asked first (`thresher run --dry-run`): nothing is written.
    ahead = preview(_definition(300), str(drive), str(store))
    assert ahead.process == [("rota.md", "processed before with another definition: from step split")]
    assert (ahead.held, ahead.removed, ahead.refusal) == (["policy.md"], [], None)
    assert Store(store).latest_run().run_id == first["run_id"]
    second = _run(drive, store, max_tokens=300)
    d = second["documents"]
    assert (d["processed"], d["held"], d["removed"], d["unchanged"], d["inside"]) == (1, 1, 0, 0, 0)
    assert [p["source_path"] for p in second["scan_problems"]] == ["policy.md"]
    assert _chunks(store)["policy.md"] == before["policy.md"]
    assert second["changes"]["delete"] == 0
    row = _catalog(store)["policy.md"]
    # Still present, and still marked with the chain that made its rows, so that the
    # first run that can read it brings it up to date.
    assert row["present"] and row["chain_digest"] == old_chain != second["chain_digest"]
    assert verify(Store(store)) == []  # a held document is a consistent state of the store
    summary = "\n".join(run_summary_lines(second))
    assert "1 held (unreadable this run, kept as stored)" in summary and "policy.md" in summary
    assert cli.main(["status", "--store", str(store)]) == 0
    assert "1 processed, 0 unchanged, 1 held, " in capsys.readouterr().out
    page = write_report(Store(store), tmp_path / "report.html").summary.read_text()
    assert "held (unreadable this run, kept as stored)" in page
    # Re-running the held document is refused with the reason, before any change.
    r = subprocess.run([str(Path(sys.executable).parent / "thresher"), "rerun", "--path", "policy.md", "--source",
                        str(drive), "--store", str(store)], capture_output=True, text=True,
                       env=dict(os.environ, PREFECT_API_URL=_api_url()))
    assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr
    assert f"cannot read {drive / 'policy.md'}: No such file or directory" in r.stderr
    assert Store(store).latest_run().run_id == second["run_id"]

    # Back on line with the same bytes: read, and processed with this week's definition.
    (elsewhere / "policy.md").write_text(POLICY)
    third = _run(drive, store, max_tokens=300)
    assert (third["documents"]["processed"], third["documents"]["held"]) == (1, 0)
    assert third["scan_problems"] == []
    assert _catalog(store)["policy.md"]["chain_digest"] == third["chain_digest"]

    # Really gone from the drive: removed, as before.
    (drive / "policy.md").unlink()
    fourth = _run(drive, store, max_tokens=300)
    assert (fourth["documents"]["removed"], fourth["documents"]["held"]) == (1, 0)
    assert set(_chunks(store)) == {"rota.md"}
    assert first["documents"]["held"] == 0


def _deep(root: Path, levels: int) -> Path:
    folder = root.joinpath(*[f"{i:02d}" + "d" * 198 for i in range(levels)])
    folder.mkdir(parents=True)
    return folder


def test_a_folder_that_cannot_be_listed_holds_its_documents_and_their_members(prefect_harness, tmp_path):
    short = tmp_path / "d"
    short.mkdir()
    (short / "rota.md").write_text("# Rota\n\nThe Saturday rota changes from March at every branch of Quillfern.\n")
    deep = _deep(short, 16)  # 16 levels of 201 bytes: within PATH_MAX here
    (deep / "minutes.md").write_text("# Minutes\n\nThe branch committee met on Tuesday and agreed the van route.\n")
    with zipfile.ZipFile(deep / "forms.zip", "w") as z:
        z.writestr("renewal.txt", "Renewal form. Members renew items at the desk or by telephone.\n")
        z.writestr("transfer.txt", "Transfer slip. Count the items in each crate against this slip.\n")
    store = tmp_path / "store"
    first = _run(short, store)
    before = _chunks(store)
    rel = str(deep.relative_to(short))
    assert first["documents"]["distinct"] == 5  # the archive, and its members' chunks
    assert set(before) == {"rota.md", f"{rel}/minutes.md", f"{rel}/forms.zip/renewal.txt",
                           f"{rel}/forms.zip/transfer.txt"}

    # The same drive under a longer path: the deepest folders are now past PATH_MAX.
    moved = tmp_path.joinpath(*["m" * 250] * 4)
    moved.parent.mkdir(parents=True)
    os.rename(short, moved)
    assert len(str(moved)) + len(str(deep)) - len(str(short)) > 4096
    second = _run(moved, store)
    d = second["documents"]
    assert (d["held"], d["removed"], d["processed"], d["unchanged"]) == (4, 0, 0, 1)
    assert d["inside"] == first["documents"]["inside"] == 2
    [problem] = second["scan_problems"]
    assert problem["reason"] == f"{CANNOT_LIST}: File name too long"
    assert rel.startswith(problem["source_path"].rstrip("/"))
    assert _chunks(store) == before and second["changes"]["delete"] == 0
    assert verify(Store(store)) == []
    catalog = _catalog(store)
    assert sum(r["present"] for r in catalog.values()) == 5

    # Moved back: every stat record matches, nothing is read or processed again.
    os.rename(moved, short)
    third = _run(short, store)
    d = third["documents"]
    assert (d["held"], d["hashed"], d["processed"], d["unchanged"]) == (0, 0, 0, 5)
    assert _chunks(store) == before


def test_held_paths_are_the_unreadable_files_and_everything_under_unlistable_folders():
    held = held_paths(["a/b.pdf", "c/d/", "e"])
    assert [p for p in ("a/b.pdf", "a/b.pdf.bak", "c/d/x.md", "c/d/e/f.md", "c/dd/x.md", "e", "e/f")
            if held(p)] == ["a/b.pdf", "c/d/x.md", "c/d/e/f.md", "e"]
    everything = held_paths(["./"])  # the source folder itself could not be listed
    assert everything("x.md") and everything("a/b/c.md")
    assert not held_paths([])("x.md")


def test_a_run_that_would_remove_most_of_the_drive_stops_before_it_changes_anything(prefect_harness, tmp_path,
                                                                                      capsys):
    # An unmounted share is an empty folder where the drive was.
    drive = tmp_path / "share"
    drive.mkdir()
    for i in range(12):
        (drive / f"branch-{i:02d}.md").write_text(f"# Branch {i}\n\nBranch {i} of Quillfern opens at nine.\n")
    store = tmp_path / "store"
    first = _run(drive, store)
    before = (_chunks(store), Store(store).catalog(), Store(store).latest_run().run_id)
    for f in sorted(drive.iterdir())[:11]:
        f.rename(tmp_path / f.name)
    with pytest.raises(TooManyRemovals, match=r"would remove 11 of the 12 documents .* \(92%\), more than "
                                              r"source.removal_limit \(50%\)"):
        _run(drive, store)
    assert (_chunks(store), Store(store).catalog(), Store(store).latest_run().run_id) == before
    assert verify(Store(store)) == []
    r = subprocess.run([str(Path(sys.executable).parent / "thresher"), "run", "--source", str(drive),
                        "--store", str(store), "--quiet"], capture_output=True, text=True,
                       env=dict(os.environ, PREFECT_API_URL=_api_url()))
    assert r.returncode == 2 and "--accept-removals" in r.stderr and "Traceback" not in r.stderr, r.stderr
    assert Store(store).latest_run().run_id == first["run_id"]
    # The dry run names them, says the run would stop, and writes nothing either.
    assert cli.main(["run", "--dry-run", "--source", str(drive), "--store", str(store)]) == 0
    out = capsys.readouterr().out
    assert "0 to process, 1 unchanged, 11 removed" in out and "the run would stop: this run would remove 11" in out
    assert "  removed:\n" + "".join(f"    branch-{i:02d}.md\n" for i in range(11)) in out
    assert Store(store).latest_run().run_id == first["run_id"]

    # Fewer than REMOVAL_FLOOR removals go ahead whatever their share; so do these, asked for.
    accepted = pipeline.run(_definition(), str(drive), str(store), workers=1, quiet=True, accept_removals=True)
    assert accepted["documents"]["removed"] == 11 and set(_chunks(store)) == {"branch-11.md"}
    assert REMOVAL_FLOOR > 1


def _api_url() -> str:
    from prefect.settings import PREFECT_API_URL

    return PREFECT_API_URL.value()


# Root reads every file; without these two capabilities it is refused as anyone else is
# (capabilities(7)). setpriv (util-linux) drops them for the one command it starts.
_NO_DAC = ["setpriv", "--bounding-set=-dac_override,-dac_read_search"]


def _refusals_are_real(tmp_path: Path) -> bool:
    probe = tmp_path / "probe.txt"
    probe.write_text("x")
    probe.chmod(0)
    try:
        r = subprocess.run(_NO_DAC + [sys.executable, "-c", f"open({str(probe)!r}).read()"],
                           capture_output=True, text=True)
    except FileNotFoundError:
        return False
    return r.returncode != 0 and "PermissionError" in r.stderr


def test_a_file_or_folder_whose_read_permission_is_taken_away_is_removed_not_held(prefect_harness, tmp_path):
    if not _refusals_are_real(tmp_path):
        pytest.skip("cannot drop the read-everything capabilities here (setpriv missing or not allowed)")
    drive = tmp_path / "drive"
    (drive / "private").mkdir(parents=True)
    (drive / "rota.md").write_text("# Rota\n\nThe Saturday rota changes from March at every branch of Quillfern.\n")
    (drive / "vans.md").write_text("# Vans\n\nThe mobile library van is serviced on the first Monday.\n")
    (drive / "private" / "pay.md").write_text("# Pay\n\nPay scales for the branch staff of Quillfern, 2026.\n")
    store = tmp_path / "store"
    _run(drive, store)
    assert set(_chunks(store)) == {"rota.md", "vans.md", "private/pay.md"}

    # Someone took the scanning account's access away: meant, so the chunks go.
    (drive / "vans.md").chmod(0)
    (drive / "private").chmod(0)
    r = subprocess.run(_NO_DAC + [str(Path(sys.executable).parent / "thresher"), "run", "--source", str(drive),
                                  "--store", str(store), "--json"], capture_output=True, text=True,
                       env=dict(os.environ, PREFECT_API_URL=_api_url()))
    assert r.returncode == 0, r.stderr
    m = json.loads(r.stdout)
    assert (m["documents"]["removed"], m["documents"]["held"]) == (2, 0)
    assert sorted((p["source_path"], p["reason"], p["denied"]) for p in m["scan_problems"]) == [
        ("private/", f"{CANNOT_LIST}: Permission denied", True),
        ("vans.md", "cannot read file: Permission denied", True)]
    assert set(_chunks(store)) == {"rota.md"}
