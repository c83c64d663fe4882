"""The scan's stat record: an unchanged file is not read, a touched one is hashed again but
not re-extracted, an edit that keeps size and modification time is still caught."""

from __future__ import annotations

import os
import sys
import threading
from collections import Counter
from pathlib import Path

from thresher.flows import pipeline
from thresher.flows.config import load_definition
from thresher.flows.discover import SCAN_WINDOW, _each, file_doc_id, new_or_changed, scan, stat_record
from thresher.flows.store import Store


def _drive(root: Path) -> Path:
    root.mkdir()
    (root / "rota.md").write_text("# Rota\n\nThe Saturday rota changes from March at every branch of Quillfern.\n")
    (root / "vans.md").write_text("# Vans\n\nThe mobile library van is serviced on the first Monday.\n")
    return root


def _same_size_edit(path: Path, old: str, new: str) -> None:
    """Rewrite a file with text of the same length and put its modification time back."""
    st = path.stat()
    text = path.read_text()
    assert len(old) == len(new) and old in text
    path.write_text(text.replace(old, new))
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert path.stat().st_size == st.st_size and path.stat().st_mtime_ns == st.st_mtime_ns


def test_scan_reuses_doc_ids_only_while_every_stat_field_matches(tmp_path):
    drive = _drive(tmp_path / "drive")
    first, _ = scan(drive, ["**/*"], [])
    assert all(f.hashed for f in first)
    known = {f.source_path: {"doc_id": f.doc_id, "size": f.size, "mtime_ns": f.mtime_ns, "inode": f.inode,
                             "device": f.device, "ctime_ns": f.ctime_ns} for f in first}
    again, _ = scan(drive, ["**/*"], [], known=known)
    assert [f.hashed for f in again] == [False, False]
    assert [f.doc_id for f in again] == [f.doc_id for f in first]

    # The same bytes at another inode (a restore, a copy put in place) is hashed again.
    rota = drive / "rota.md"
    data, st = rota.read_bytes(), rota.stat()
    rota.unlink()
    (drive / "tmp").write_bytes(data)
    os.utime(drive / "tmp", ns=(st.st_atime_ns, st.st_mtime_ns))
    (drive / "tmp").rename(rota)
    moved, _ = scan(drive, ["**/*"], [], known=known)
    assert {f.source_path: f.hashed for f in moved} == {"rota.md": True, "vans.md": False}
    assert moved[0].doc_id == first[0].doc_id

    # A catalog row whose stat fields all match yet which names other bytes: what a file
    # system that does not move the change time (some network shares) leaves behind.
    # Only --verify reads the file and finds the new content.
    vans = drive / "vans.md"
    _same_size_edit(vans, "Monday", "Friday")
    f = next(x for x in scan(drive, ["**/*"], [])[0] if x.source_path == "vans.md")
    stale = dict(known, **{"vans.md": {"doc_id": first[1].doc_id, "size": f.size, "mtime_ns": f.mtime_ns,
                                       "inode": f.inode, "device": f.device, "ctime_ns": f.ctime_ns}})
    trusted = {x.source_path: x for x in scan(drive, ["**/*"], [], known=stale)[0]}
    assert trusted["vans.md"].doc_id == first[1].doc_id and not trusted["vans.md"].hashed
    verified = {x.source_path: x for x in scan(drive, ["**/*"], [], known=stale, verify=True)[0]}
    assert verified["vans.md"].doc_id == file_doc_id(vans) != first[1].doc_id
    assert all(x.hashed for x in verified.values())


def test_workers_start_early_only_when_the_stat_records_say_a_file_is_new_or_changed(tmp_path):
    """The question a run asks before Prefect starts (execute.prewarm_run), with no byte
    read: the scan's own stat match, so it agrees with what the scan will hash."""
    drive = _drive(tmp_path / "drive")
    first, _ = scan(drive, ["**/*"], [])
    known = {f.source_path: {"doc_id": f.doc_id, "size": f.size, "mtime_ns": f.mtime_ns, "inode": f.inode,
                             "device": f.device, "ctime_ns": f.ctime_ns} for f in first}
    assert not new_or_changed(drive, ["**/*"], [], known)
    (drive / "~$rota.md").write_text("a lock file the definition leaves out")
    assert not new_or_changed(drive, ["**/*"], ["**/~$*"], known)
    assert new_or_changed(drive, ["**/*"], [], known)  # a file the catalog has not seen
    (drive / "~$rota.md").unlink()
    (drive / "rota.md").unlink()  # a removal alone: no document to extract
    assert not new_or_changed(drive, ["**/*"], [], known)
    with (drive / "vans.md").open("a") as f:
        f.write("Fuel cards are kept in the office safe.\n")
    assert new_or_changed(drive, ["**/*"], [], known)


def test_a_file_name_that_is_not_utf8_is_reported_and_the_run_goes_on(prefect_harness, tmp_path):
    # A share written by an older system can hold names in another encoding (here
    # Latin-1's "é" as the byte 0xE9, in a folder name and a file name). Python gives such
    # bytes as lone surrogates, which no Parquet string takes: the run stopped with a
    # UnicodeEncodeError in its plan. Now each such file is a problem of its own.
    from thresher.flows.cli import run_summary_lines
    from thresher.flows.discover import NOT_UTF8

    drive = _drive(tmp_path / "drive")
    os.mkdir(os.path.join(os.fsencode(drive), b"caf\xe9"))
    for name in (b"caf\xe9/menu.txt", b"r\xe9sum\xe9.txt"):
        with open(os.path.join(os.fsencode(drive), name), "wb") as f:
            f.write(b"Opening hours of the reading room: nine to five on weekdays.\n")
    found, problems = scan(drive, ["**/*"], [])
    assert [f.source_path for f in found] == ["rota.md", "vans.md"]
    assert [(p.source_path, p.reason) for p in problems] == [("r\\xe9sum\\xe9.txt", NOT_UTF8),
                                                             ("caf\\xe9/menu.txt", NOT_UTF8)]
    known = {f.source_path: {"doc_id": f.doc_id, "size": f.size, "mtime_ns": f.mtime_ns, "inode": f.inode,
                             "device": f.device, "ctime_ns": f.ctime_ns} for f in found}
    assert not new_or_changed(drive, ["**/*"], [], known)  # nothing the scan would read

    m = pipeline.run(load_definition(), str(drive), str(tmp_path / "store"), workers=1, quiet=True)
    assert {r["source_path"] for r in Store(tmp_path / "store").handoff().to_pylist()} == {"rota.md", "vans.md"}
    assert [p["source_path"] for p in m["scan_problems"]] == ["r\\xe9sum\\xe9.txt", "caf\\xe9/menu.txt"]
    lines = run_summary_lines(m)
    assert "  2 file(s) the scan could not read:" in lines
    assert f"    r\\xe9sum\\xe9.txt  {NOT_UTF8}" in lines


def test_a_folder_that_cannot_be_listed_is_reported_not_skipped_in_silence(tmp_path):
    # os.walk skips a folder it cannot list unless asked (its onerror); its files then
    # look removed. Here the real error, even as root: a folder whose path is longer
    # than Linux's PATH_MAX (4,096 bytes) cannot be listed (ENAMETOOLONG), made level by
    # level through folder descriptors.
    from thresher.flows.discover import CANNOT_LIST

    drive = _drive(tmp_path / "drive")
    fd = os.open(drive, os.O_RDONLY)
    try:
        for _ in range(24):  # 24 levels of 201 bytes: past 4,096 at the 20th or so
            os.mkdir("d" * 200, dir_fd=fd)
            inner = os.open("d" * 200, os.O_RDONLY, dir_fd=fd)
            os.close(fd)
            fd = inner
    finally:
        os.close(fd)
    found, problems = scan(drive, ["**/*"], [])
    assert [f.source_path for f in found] == ["rota.md", "vans.md"]
    assert len(problems) == 1 and problems[0].source_path.startswith("d" * 200 + "/")
    assert problems[0].source_path.endswith("/") and len(os.path.join(drive, problems[0].source_path)) > 4096
    assert problems[0].reason == f"{CANNOT_LIST}: File name too long"


def test_scan_in_threads_keeps_path_order_and_reports_unreadable_files(tmp_path):
    drive = tmp_path / "drive"
    n = 3 * SCAN_WINDOW  # past the first window, where a slow file system moves to the pool
    for i in range(n):
        (drive / f"d{i % 3}").mkdir(parents=True, exist_ok=True)
        (drive / f"d{i % 3}" / f"f{i:03d}.txt").write_text(f"Quillfern note {i}\n")
    (drive / "d0" / "dangling.txt").symlink_to(drive / "missing.txt")
    (drive / "d2" / "zz-dangling.txt").symlink_to(drive / "missing.txt")
    inline = scan(drive, ["**/*"], [], threads=4)
    pooled = scan(drive, ["**/*"], [], threads=4, slow_call=0.0)  # every call counts as slow
    for found, problems in (inline, pooled):
        paths = [f.source_path for f in found]
        assert paths == sorted(paths, key=lambda p: (p.split("/")[0], p)) and len(paths) == n
        assert [p.source_path for p in problems] == ["d0/dangling.txt", "d2/zz-dangling.txt"]
        assert all(f.doc_id == file_doc_id(drive / f.source_path) for f in found)
    assert inline == pooled


def test_the_stat_check_stops_at_the_first_changed_file_and_the_pool_takes_over_when_calls_are_slow():
    calls = []

    def look(i):
        calls.append(i)
        return i == 10

    # Inline, a week with an edited file answers without looking at the rest of the drive.
    assert any(_each(look, list(range(1000)), threads=8))
    assert calls == list(range(11))
    # Calls slower than slow_call: the first window inline, the rest in the pool's threads.
    threads = []

    def where(i):
        threads.append(threading.current_thread().name)
        return i

    assert list(_each(where, list(range(200)), threads=4, slow_call=0.0)) == list(range(200))
    assert set(threads[:SCAN_WINDOW]) == {threading.current_thread().name}
    assert all(t.startswith("thresher-scan") for t in threads[SCAN_WINDOW:])
    threads.clear()
    assert list(_each(where, list(range(200)), threads=4, slow_call=10.0)) == list(range(200))  # quick: inline
    assert set(threads) == {threading.current_thread().name}


_OPENED: dict[str, Counter] = {}
_HOOKED: list = []  # an audit hook stays for the process: added once


def _count_opens(event: str, args: tuple) -> None:
    if event == "open" and isinstance(args[0], str):
        for root, seen in _OPENED.items():
            if args[0].startswith(root):
                seen[os.path.relpath(args[0], root)] += 1


def test_a_touched_file_is_not_extracted_again_and_verify_rereads_every_file(prefect_harness, tmp_path):
    drive = _drive(tmp_path / "drive")
    (drive / "hours.md").write_text("# Hours\n\nThe reading room opens at nine on weekdays.\n")
    store = tmp_path / "store"
    # Every open() of a drive file in this process, where the scan and the batches read
    # them (Python's audit events; workers get the bytes, they do not open files).
    opened = _OPENED.setdefault(str(drive) + os.sep, Counter())
    if _count_opens not in _HOOKED:
        sys.addaudithook(_count_opens)
        _HOOKED.append(_count_opens)

    def run(**kw):
        opened.clear()
        return pipeline.run(load_definition(), str(drive), str(store), workers=1, quiet=True, **kw)

    run()
    # Each new file is read once: hashed by the scan, extracted from those same bytes.
    assert opened == {"rota.md": 1, "vans.md": 1, "hours.md": 1}
    os.utime(drive / "rota.md")  # touched, bytes unchanged
    # Same size, same modification time, other bytes: the change time gives it away.
    _same_size_edit(drive / "vans.md", "Monday", "Friday")
    second = run()
    assert opened == {"rota.md": 1, "vans.md": 1}
    assert second["documents"]["hashed"] == 2  # hours.md was not read
    assert second["documents"]["processed"] == 1  # only vans.md; the touched rota.md is reused
    rows = Store(store).current("extract", "pages", columns=["source_path", "run_id"]).to_pylist()
    assert [r["source_path"] for r in rows if r["run_id"] == second["run_id"]] == ["vans.md"]

    verified = run(verify=True)
    assert verified["documents"]["hashed"] == 3 and verified["documents"]["processed"] == 0


def test_the_scan_keeps_the_bytes_it_hashed_within_its_budget(tmp_path):
    drive = _drive(tmp_path / "drive")
    sizes = {p.name: p.stat().st_size for p in drive.iterdir()}
    files, _ = scan(drive, ["**/*"], [], keep_bytes=max(sizes.values()))  # room for one file
    kept = [f for f in files if f.data is not None]
    assert len(kept) == 1 and kept[0].data == (drive / kept[0].source_path).read_bytes()
    assert all(f.doc_id == file_doc_id(drive / f.source_path) for f in files)
    known = {f.source_path: {"doc_id": f.doc_id, **stat_record((drive / f.source_path).stat())} for f in files}
    again, _ = scan(drive, ["**/*"], [], known=known)
    assert [f.data for f in again] == [None, None]  # not read, so nothing kept


def test_a_path_matches_a_list_of_globs_when_any_one_of_them_matches_it_whole():
    from thresher.flows.discover import matches

    # The default definition's exclude list (config/default.yaml).
    exclude = load_definition().model.source.exclude
    assert matches(".git", exclude) and matches("notes/.hidden", exclude) and matches("a/b/~$draft.docx", exclude)
    assert matches("Thumbs.db", exclude) and matches("photos/Thumbs.db", exclude)
    assert matches("minutes/desktop.ini", exclude) and matches("minutes/Icon\r", exclude)
    assert not matches("minutes/Icon.png", exclude) and not matches("minutes/Icons.md", exclude)
    assert not matches("notes/a.md", exclude) and not matches("photos/Thumbs.db.bak", exclude)
    assert not matches("notes/a.md", [])
    # '*' stays within a folder, '**/' spans any number of them (or none).
    assert matches("a/x.txt", ["b/*", "a/*.txt"]) and not matches("a/b/x.txt", ["a/*.txt"])
    assert matches("a/b/c/x.pdf", ["q", "a/**/x.pdf"]) and matches("a/x.pdf", ["a/**/x.pdf"])


def test_folder_litter_is_left_out_and_control_characters_in_names_are_shown_escaped(prefect_harness, tmp_path, capsys):
    from thresher.flows import cli
    from thresher.flows.cli import run_summary_lines

    drive = _drive(tmp_path / "drive")
    (drive / "minutes").mkdir()
    (drive / "minutes" / "Icon\r").write_bytes(b"")  # a macOS folder's custom icon
    (drive / "minutes" / "desktop.ini").write_text("[.ShellClassInfo]\nIconResource=minutes.ico,0\n")
    (drive / "minutes" / "draft\nold.md").write_bytes(b"")  # empty: fails, with its name in the summary
    m = pipeline.run(load_definition(), str(drive), str(tmp_path / "store"), workers=1, quiet=True)
    assert m["documents"]["files"] == 3  # rota.md, vans.md and the draft; not the litter
    lines = run_summary_lines(m)
    assert not any("\n" in line or "\r" in line for line in lines)
    assert any(line.strip().startswith("minutes/draft\\nold.md  extract: empty file") for line in lines)
    assert cli.main(["failures", "--store", str(tmp_path / "store")]) == 0
    out = capsys.readouterr().out
    assert "    minutes/draft\\nold.md  document\n" in out
    assert cli.main(["trail", "minutes/draft\nold.md", "--store", str(tmp_path / "store")]) == 0
    assert capsys.readouterr().out.startswith("minutes/draft\\nold.md\n")


def test_a_file_over_the_size_limit_is_never_read_and_is_read_once_the_limit_allows(prefect_harness, tmp_path):
    from conftest import definition_with

    def definition(max_file_mb: float):
        return definition_with(extract={"max_file_mb": max_file_mb})

    drive = _drive(tmp_path / "drive")
    # A disk image on a share: 7,209 bytes here, over a limit of 0.002 MB (2,000 bytes).
    (drive / "backup.img").write_bytes(b"# Image\n\n" + b"Quillfern backup block. " * 300)
    store = tmp_path / "store"
    opened = _OPENED.setdefault(str(drive) + os.sep, Counter())
    if _count_opens not in _HOOKED:
        sys.addaudithook(_count_opens)
        _HOOKED.append(_count_opens)

    opened.clear()
    first = pipeline.run(definition(0.002), str(drive), str(store), workers=1, quiet=True)
    assert "backup.img" not in opened and opened == {"rota.md": 1, "vans.md": 1}
    assert first["documents"]["hashed"] == 2
    assert [(f["source_path"], f["reason"]) for f in first["failed_units"]] == [
        ("backup.img", "file too large: 0.0072 MB over the limit of 0.002 MB")]
    os.utime(drive / "backup.img")  # touched: a new stat record, still not read
    opened.clear()
    second = pipeline.run(definition(0.002), str(drive), str(store), workers=1, quiet=True)
    assert opened == {} and second["documents"]["hashed"] == 0 and second["documents"]["processed"] == 1

    # The limit raised: the file is read once (hashed, and extracted from those bytes) and
    # is a document like any other. (The new limit is a new definition: the other files
    # are extracted again, from their unchanged stat records, not hashed.)
    opened.clear()
    third = pipeline.run(definition(1), str(drive), str(store), workers=1, quiet=True)
    assert opened["backup.img"] == 1 and third["documents"]["hashed"] == 1 and third["failed_units"] == []
    row = next(r for r in Store(store).catalog().to_pylist() if r["source_path"] == "backup.img")
    assert row["doc_id"] == file_doc_id(drive / "backup.img")
