"""Documents inside documents through the real flow: archive members (and an archive
inside an archive) become documents of their own, with doc_ids from their bytes, paths
under the container's path, catalog rows linked to the container, chunks in the
hand-off, and the same behaviour on later runs, changes and re-runs."""

from __future__ import annotations

import hashlib
import io
import zipfile
from pathlib import Path

import pyarrow.parquet as pq

from thresher.flows import pipeline
from thresher.flows.config import load_definition
from thresher.flows.store import Store

MARCH = b"# March minutes\n\nThe committee agreed to open the Fernhollow branch on Sundays from May.\n"
APRIL = b"April minutes.\n\nThe reading room chairs will be recovered in green before the summer fair.\n"
OLDER = b"Notes from 2019.\n\nThe first Quillfern bookmobile route ran along the river villages every Tuesday.\n"
BUDGET = b"# Budget 2026\n\nThe Quillfern book repair fund grows to four hundred crowns for binding thread and glue.\n"
NOTICE = (b"From: Branch Desk <desk@quillfern.example>\nTo: All staff <staff@quillfern.example>\n"
          b"Subject: March notice and the repair budget\nDate: Mon, 2 Mar 2026 09:00:00 +0000\nMIME-Version: 1.0\n"
          b"Content-Type: multipart/mixed; boundary=QF\n\n--QF\nContent-Type: text/plain; charset=utf-8\n\n"
          b"Dear all, the repair budget for this year is attached; please read it before Thursday.\n"
          b"--QF\nContent-Type: text/markdown\nContent-Disposition: attachment; filename=\"budget.md\"\n\n"
          + BUDGET + b"\n--QF--\n")  # the line break before a boundary belongs to it (RFC 2046)
HOURS = b"Opening hours.\n\nEvery Quillfern branch opens at nine and closes at six, Saturdays at one.\n"


def zip_of(files: dict[str, bytes]) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
        for name, data in files.items():
            z.writestr(zipfile.ZipInfo(name, (2024, 3, 12, 10, 0, 0)), data, compress_type=zipfile.ZIP_DEFLATED)
    return buf.getvalue()


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _drive(root: Path, april: bytes = APRIL) -> Path:
    (root / "archive").mkdir(parents=True, exist_ok=True)
    (root / "notes").mkdir(exist_ok=True)
    (root / "notes" / "hours.txt").write_bytes(HOURS)
    older = zip_of({"notes-2019.txt": OLDER})
    (root / "archive" / "2024-minutes.zip").write_bytes(zip_of({
        "march/minutes.md": MARCH, "april/minutes.txt": april, "old/2019.zip": older, "copy-of-hours.txt": HOURS}))
    (root / "mail").mkdir(exist_ok=True)
    (root / "mail" / "2026-03-notice.eml").write_bytes(NOTICE)
    (root / "archive" / "bomb.zip").write_bytes(zip_of({"zeros.txt": bytes(5_000_000)}))
    return root


def _run(drive: Path, store: Path, **kw) -> dict:
    return pipeline.run(load_definition(), str(drive), str(store), workers=1, quiet=True, **kw)


def test_members_are_documents_of_their_own_through_the_whole_chain(prefect_harness, tmp_path, capsys):
    drive, store_dir = _drive(tmp_path / "drive"), tmp_path / "store"
    first = _run(drive, store_dir)
    store = Store(store_dir)
    zip_id = sha((drive / "archive" / "2024-minutes.zip").read_bytes())
    older_id = sha(zip_of({"notes-2019.txt": OLDER}))
    catalog = {r["source_path"]: r for r in store.catalog().to_pylist()}
    march = catalog["archive/2024-minutes.zip/march/minutes.md"]
    assert march["doc_id"] == sha(MARCH) and march["container_doc_id"] == zip_id
    assert march["member_name"] == "march/minutes.md" and march["present"]
    nested = catalog["archive/2024-minutes.zip/old/2019.zip/notes-2019.txt"]
    assert nested["doc_id"] == sha(OLDER) and nested["container_doc_id"] == older_id
    # a member that is a copy of a drive file is the same document; the drive's path stands for it
    copy = catalog["archive/2024-minutes.zip/copy-of-hours.txt"]
    assert copy["doc_id"] == catalog["notes/hours.txt"]["doc_id"] == sha(HOURS)
    assert copy["canonical_path"] == "notes/hours.txt"

    chunks = pq.read_table(store_dir / "handoff" / "chunks.parquet").to_pylist()
    by_doc = {}
    for c in chunks:
        by_doc.setdefault(c["doc_id"], set()).add(c["source_path"])
    assert by_doc[sha(MARCH)] == {"archive/2024-minutes.zip/march/minutes.md"}
    assert by_doc[sha(OLDER)] == {"archive/2024-minutes.zip/old/2019.zip/notes-2019.txt"}
    assert by_doc[sha(HOURS)] == {"notes/hours.txt"}
    assert zip_id not in by_doc  # the archive itself has no text of its own
    assert any("Fernhollow" in c["text"] for c in chunks if c["doc_id"] == sha(MARCH))

    extract = {r["doc_id"]: r for r in store.current("extract", "pages").to_pylist()}
    assert extract[zip_id]["status"] == "skipped"
    assert extract[zip_id]["reason"] == "zip archive: 4 member(s), each read as a document of its own"
    bomb = extract[sha((drive / "archive" / "bomb.zip").read_bytes())]
    assert bomb["status"] == "failed" and bomb["reason"].startswith("compression ratio ")
    # 4 drive files; 4 more documents in the zips (the copy of hours.txt is hours.txt); 1 attachment
    assert first["documents"]["distinct"] == 4 + 4 + 1

    # An e-mail's attachment is a document of its own; its chunks carry its path.
    budget = catalog["mail/2026-03-notice.eml/attachments/1-budget.md"]
    assert budget["doc_id"] == sha(BUDGET) and budget["container_doc_id"] == sha(NOTICE)
    assert by_doc[sha(BUDGET)] == {"mail/2026-03-notice.eml/attachments/1-budget.md"}
    assert any("repair fund" in c["text"] for c in chunks if c["doc_id"] == sha(BUDGET))
    assert by_doc[sha(NOTICE)] == {"mail/2026-03-notice.eml"}
    message = extract[sha(NOTICE)]
    assert message["title"] == "March notice and the repair budget" and message["format"] == "email"
    assert message["mail_from"] == "Branch Desk <desk@quillfern.example>"
    assert "desk@quillfern.example" not in " ".join(c["text"] for c in chunks if c["doc_id"] == sha(NOTICE))

    # trail names the container of a member, and what a container holds
    from thresher.flows.cli import main

    capsys.readouterr()
    assert main(["trail", "mail/2026-03-notice.eml/attachments/1-budget.md", "--store", str(store_dir)]) == 0
    out = capsys.readouterr().out
    assert f"inside mail/2026-03-notice.eml (doc_id {sha(NOTICE)[:12]}) as attachments/1-budget.md" in out
    assert main(["trail", "archive/2024-minutes.zip", "--store", str(store_dir)]) == 0
    out = capsys.readouterr().out
    assert "holds 4 document(s): archive/2024-minutes.zip/april/minutes.txt" in out
    assert "extract: " in out and "zip archive: 4 member(s)" in out

    # Unchanged: nothing is read again, members stay in the catalog, no changes handed off.
    second = _run(drive, store_dir)
    assert second["documents"]["processed"] == 0 and second["changes"] == {"upsert": 0, "delete": 0}
    assert {r["source_path"] for r in store.catalog().to_pylist() if r["present"]} == \
        {p for p, r in catalog.items() if r["present"]}

    # The archive changes: its members are read again; the old April minutes leave, the
    # unchanged March minutes are not processed again (same bytes, same chain).
    new_april = APRIL.replace(b"green", b"blue")
    _drive(drive, april=new_april)
    third = _run(drive, store_dir)
    changes = pq.read_table(store_dir / "handoff" / "changes" / f"{third['run_id']}.parquet").to_pylist()
    assert {(c["source_path"], c["action"]) for c in changes} >= {
        ("archive/2024-minutes.zip/april/minutes.txt", "upsert"), ("archive/2024-minutes.zip/april/minutes.txt", "delete")}
    assert sha(MARCH) not in {c["doc_id"] for c in changes}
    store = Store(store_dir)  # a fresh view: a Store caches the runs it has seen
    rows = store.current("extract", "pages", [sha(MARCH)]).to_pylist()
    assert {r["run_id"] for r in rows} == {first["run_id"]}
    catalog = {r["source_path"]: r for r in store.catalog().to_pylist()}
    assert catalog["archive/2024-minutes.zip/april/minutes.txt"]["doc_id"] == sha(new_april)

    # A member can be re-run on its own: its bytes are unpacked again from the drive file.
    rerun = _run(drive, store_dir, rerun={"doc_id": sha(OLDER), "page": None, "step": "extract"})
    assert rerun["documents"]["processed"] == 1 and rerun["failures"] == 0
    rows = Store(store_dir).current("extract", "pages", [sha(OLDER)]).to_pylist()
    assert {r["run_id"] for r in rows} == {rerun["run_id"]} and rows[0]["status"] == "ok"
