"""Who may read each chunk: file-system facts, rules, and a change of access alone.

The drive is built here on a file system with POSIX ACLs (a tmpfs mounted by the test
when it runs as root; tmpfs supports ACLs), with owners, groups, modes and ACL
entries set by chown/chmod and Debian's `setfacl` (package `acl`, installed by
`make test`'s system-deps). Outside references: getfacl's own listing of the same
files (Debian `acl`), and acl(5) for how the mask limits named entries.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from thresher.flows import pipeline
from thresher.flows.access import ACL_XATTR, acl_text, decide, file_readers, parse_acl, read_facts
from thresher.flows.config import ConfigError, build_definition, default_config_text
from thresher.flows.store import Store

OUTSIDER_UID, OUTSIDER_GID, AUDIT_GID = 4101, 4200, 4300  # ids with no name on this system


def _mount_acl_fs(where: Path) -> Path:
    """A folder whose file system keeps POSIX ACLs, or a skip saying why there is none."""
    if shutil.which("setfacl") is None or shutil.which("getfacl") is None:
        pytest.skip("setfacl/getfacl missing: `make system-deps` installs Debian's acl package")
    if os.geteuid() != 0:
        pytest.skip("the test drive needs files of other owners (chown), which only root may set")
    where.mkdir()
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=16m", "tmpfs", str(where)],
                             capture_output=True, text=True).returncode == 0
    probe = where / ".probe"
    probe.write_text("x")
    ok = subprocess.run(["setfacl", "-m", "u:1:r", str(probe)], capture_output=True).returncode == 0
    probe.unlink()
    if not ok:
        if mounted:
            subprocess.run(["umount", str(where)])
        pytest.skip(f"no file system with POSIX ACLs here (tmpfs mount {'worked' if mounted else 'refused'}, "
                    f"setfacl refused on {where})")
    return where if mounted else where


@pytest.fixture()
def acl_drive(tmp_path: Path):
    root = _mount_acl_fs(tmp_path / "acl-fs")
    drive = root / "drive"
    for rel, text in {
        "public/opening-times.txt": "The Quillfern reading room opens at nine on weekdays and at ten on Saturdays.",
        "hr/appraisal-notes.txt": "Appraisal notes for the Quillfern cataloguing team, spring round. "
                                  "Questions to the team lead on 0113 496 0214 or lead@quillfern.example.",
        "board/budget-draft.txt": "Draft budget of the Quillfern board for the coming year, not yet agreed.",
        "drafts/loose-notes.txt": "Loose notes that no rule covers, left on the drive by someone.",
    }.items():
        p = drive / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text + "\n")
    os.chmod(drive / "public/opening-times.txt", 0o644)
    os.chmod(drive / "drafts/loose-notes.txt", 0o644)
    hr = drive / "hr/appraisal-notes.txt"
    os.chown(hr, OUTSIDER_UID, OUTSIDER_GID)
    os.chmod(hr, 0o640)
    subprocess.run(["setfacl", "-m", f"u:daemon:r,g:{AUDIT_GID}:r,g:adm:rw", str(hr)], check=True)
    board = drive / "board/budget-draft.txt"
    os.chown(board, 0, 4)  # root, adm
    os.chmod(board, 0o600)
    yield drive
    subprocess.run(["umount", str(root)], capture_output=True)


def _definition(access: dict, policy: dict | None = None):
    data = yaml.safe_load(default_config_text())
    data["access"] = access
    if policy is not None:
        next(s for s in data["steps"] if s["step"] == "personal")["params"]["policy"] = policy
    data["runner"] = {"kind": "threads", "workers": 1}
    return build_definition(data, "test")


RULES = {
    "file_system": "combine",
    "rules": [
        {"paths": ["hr/**"], "readers": ["hr-team"], "label": "confidential"},
        {"paths": "board/**", "readers": ["board"], "label": "restricted"},
        {"paths": "public/**", "readers": ["everyone"]},
    ],
    "default": "nobody",
}


def test_acl_entries_read_from_the_attribute_match_getfacl(acl_drive):
    hr = acl_drive / "hr/appraisal-notes.txt"
    facts = read_facts(str(hr), hr.stat())
    # Reference: getfacl (Debian acl) lists the same entries; -c leaves out its header,
    # -E the "#effective:" remarks.
    listing = subprocess.run(["getfacl", "-c", "-E", str(hr)], capture_output=True, text=True, check=True).stdout
    expected = [line for line in listing.splitlines() if line.strip()]
    assert acl_text(facts.acl) == expected
    assert f"group:{AUDIT_GID}:r--" in expected and "user:daemon:r--" in expected
    assert (facts.uid, facts.gid) == (OUTSIDER_UID, OUTSIDER_GID)
    # A file without an ACL has no attribute: the mode bits say it all.
    plain = acl_drive / "public/opening-times.txt"
    assert read_facts(str(plain), plain.stat()).acl == ()


def test_the_acl_mask_limits_named_readers(acl_drive):
    """acl(5): the mask entry bounds named users, named groups and the owning group."""
    hr = acl_drive / "hr/appraisal-notes.txt"
    before = file_readers(read_facts(str(hr), hr.stat()))
    assert before == sorted([f"user:{OUTSIDER_UID}", f"group:{OUTSIDER_GID}", "user:daemon",
                             f"group:{AUDIT_GID}", "group:adm"])
    subprocess.run(["setfacl", "-m", "m::---", str(hr)], check=True)
    assert file_readers(read_facts(str(hr), hr.stat())) == [f"user:{OUTSIDER_UID}"]


def test_a_broken_acl_attribute_is_a_clear_error():
    with pytest.raises(ValueError, match="version 1"):
        parse_acl(b"\x01\x00\x00\x00")
    with pytest.raises(ValueError, match="8-byte entries"):
        parse_acl(b"\x02\x00\x00\x00\x01\x00")
    assert ACL_XATTR == "system.posix_acl_access"


def test_access_rules_are_validated_with_the_key_named():
    with pytest.raises(ConfigError, match=r"access\.rules\[0\]\.readers"):
        _definition({"rules": [{"paths": "hr/**"}]})
    with pytest.raises(ConfigError, match=r"access\.file_system"):
        _definition({"file_system": "sometimes"})
    with pytest.raises(ConfigError, match=r"access\.default"):
        _definition({"default": "somebody"})
    with pytest.raises(ConfigError, match=r"access\.rules\[0\]\.readers"):
        _definition({"rules": [{"paths": "hr/**", "readers": [" "]}]})


def _handoff(store_dir: Path) -> dict[str, dict]:
    rows = Store(store_dir).handoff().to_pylist()
    return {r["source_path"]: r for r in rows}


def test_readers_reach_every_chunk_and_a_change_of_access_reruns_nothing(prefect_harness, acl_drive, tmp_path,
                                                                           capsys):
    store_dir = tmp_path / "store"
    first = pipeline.run(_definition(RULES), str(acl_drive), str(store_dir), quiet=True)
    out = _handoff(store_dir)
    assert set(out) == {"public/opening-times.txt", "hr/appraisal-notes.txt", "board/budget-draft.txt"}
    # Fail closed: what no rule covers is left out, with the rule that decided.
    assert first["withheld"] == {"drafts/loose-notes.txt": "access allows nobody (access.default)"}
    hr = out["hr/appraisal-notes.txt"]
    assert hr["readers"] == sorted(["hr-team", f"user:{OUTSIDER_UID}", f"group:{OUTSIDER_GID}", "user:daemon",
                                    f"group:{AUDIT_GID}", "group:adm"])
    assert hr["label"] == "confidential"
    assert out["board/budget-draft.txt"]["readers"] == ["board", "user:root"]
    assert out["public/opening-times.txt"]["readers"] == ["everyone", "group:root", "user:root"]
    assert out["public/opening-times.txt"]["label"] is None
    catalog = {r["source_path"]: r for r in Store(store_dir).catalog().to_pylist()}
    assert catalog["hr/appraisal-notes.txt"]["access_rule"] == "access.rules[0]"
    # acl(5): with an ACL the mode's group bits show the mask (rw- here, from g:adm:rw).
    assert catalog["hr/appraisal-notes.txt"]["mode"] == 0o660 and catalog["board/budget-draft.txt"]["group"] == "adm"

    # Only access changes: the board file's group and mode, the hr rule's label, and a
    # default that now lets staff read what no rule covers.
    os.chown(acl_drive / "board/budget-draft.txt", 0, 0)
    os.chmod(acl_drive / "board/budget-draft.txt", 0o640)
    edited = {**RULES, "rules": [{**RULES["rules"][0], "label": "personnel"}] + RULES["rules"][1:],
              "default": {"readers": ["staff"]}}
    stage_files = sorted(p.relative_to(store_dir) for p in (store_dir / "stages").rglob("*.parquet"))
    second = pipeline.run(_definition(edited), str(acl_drive), str(store_dir), quiet=True)
    assert second["documents"]["processed"] == 0 and second["withheld"] == {}
    assert sorted(p.relative_to(store_dir) for p in (store_dir / "stages").rglob("*.parquet")) == stage_files
    store = Store(store_dir)
    assert store.stage_rows("extract", "pages").column("run_id").unique().to_pylist() == [first["run_id"]]
    changes = pq.read_table(store_dir / "handoff" / "changes" / f"{second['run_id']}.parquet").to_pylist()
    # Exactly the affected chunks (one per file here): the public file's is not among them.
    assert sorted((c["source_path"], c["action"]) for c in changes) == [
        ("board/budget-draft.txt", "upsert"), ("drafts/loose-notes.txt", "upsert"),
        ("hr/appraisal-notes.txt", "upsert")]
    out = _handoff(store_dir)
    assert out["board/budget-draft.txt"]["readers"] == ["board", "group:root", "user:root"]
    assert out["hr/appraisal-notes.txt"]["label"] == "personnel"
    assert out["drafts/loose-notes.txt"]["readers"] == ["everyone", "group:root", "staff", "user:root"]
    # The hand-off was not rebuilt: its access columns were rewritten in a streamed copy
    # (the drafts file, withheld before, read from the stages and merged in between
    # the board's and hr's rows), and the result is what a rebuild from every stage
    # gives, row for row.
    assert second["handoff"] == "access columns rewritten" and first["handoff"] == "rebuilt"
    assert Store(store_dir).handoff().equals(_rebuilt(store_dir, _definition(edited)))


    # trail shows the access, the rule that gave it and the facts; where each finding
    # is (page text offsets) with its value on the terminal; status counts by label.
    config = tmp_path / "flow.yaml"
    data = yaml.safe_load(default_config_text())
    data.update(access=edited, store=str(store_dir))
    data["source"]["root"] = str(acl_drive)
    config.write_text(yaml.safe_dump(data))
    doc_id = out["hr/appraisal-notes.txt"]["doc_id"]
    trail = _cli(capsys, "trail", doc_id[:12], "--config", str(config))
    assert "access: " + ", ".join(out["hr/appraisal-notes.txt"]["readers"]) + "; label personnel (from access.rules[0])" \
        in trail
    assert f"owner {OUTSIDER_UID} ({OUTSIDER_UID}), group {OUTSIDER_GID} ({OUTSIDER_GID}), mode 0660" in trail
    page = Store(store_dir).current("language", "pages", [doc_id]).column("text").to_pylist()[0]
    for kind, value in (("phone", "0113 496 0214"), ("email", "lead@quillfern.example")):
        start = page.index(value)
        assert f"{kind}: file chars {start}-{start + len(value)}: {value}" in trail
    status = _cli(capsys, "status", "--config", str(config))
    assert "by label:    (no label) 2, restricted 1, personnel 1" in status

    # A rule that now allows nobody withholds the board's file: its chunk is deleted,
    # nothing else changes, and still no step runs.
    closed = {**edited, "rules": edited["rules"][:1] + [{"paths": "board/**", "readers": []}] + edited["rules"][2:]}
    third = pipeline.run(_definition(closed), str(acl_drive), str(store_dir), quiet=True)
    assert third["documents"]["processed"] == 0 and third["handoff"] == "access columns rewritten"
    assert third["withheld"] == {"board/budget-draft.txt": "access allows nobody (access.rules[1])"}
    changes = pq.read_table(store_dir / "handoff" / "changes" / f"{third['run_id']}.parquet").to_pylist()
    assert [(c["source_path"], c["action"]) for c in changes] == [("board/budget-draft.txt", "delete")]
    assert Store(store_dir).handoff().equals(_rebuilt(store_dir, _definition(closed)))
    assert sorted(p.relative_to(store_dir) for p in (store_dir / "stages").rglob("*.parquet")) == stage_files
    # The index delivered after each run (the default SQLite target) holds the new
    # access; its keyword index still holds each chunk's text once.
    index = _index(store_dir)
    assert index == _held(store_dir) and index["hr/appraisal-notes.txt"][0][1] == "personnel"

    # Masking phones changes the hr chunk's text under the same chunk id: the personal
    # step runs again, the hand-off is rebuilt, and the keyword index gets the new text.
    masked = pipeline.run(_definition(closed, {"phone": "mask"}), str(acl_drive), str(store_dir), quiet=True)
    assert masked["handoff"] == "rebuilt"
    index = _index(store_dir)
    assert index == _held(store_dir) and "0113 496 0214" not in index["hr/appraisal-notes.txt"][0][3]


def _held(store_dir: Path) -> dict[str, list[tuple]]:
    """Per path: (chunk_id, label, readers, text) of the hand-off's chunks."""
    out: dict[str, list[tuple]] = {}
    for r in Store(store_dir).handoff().to_pylist():
        out.setdefault(r["source_path"], []).append((r["chunk_id"], r["label"], r["readers"], r["text"]))
    return out


def _index(store_dir: Path) -> dict[str, list[tuple]]:
    """The same from the delivered SQLite index: table columns, and the text its
    keyword index holds for the chunk (every indexed row, so a copy would show)."""
    import json
    import sqlite3

    con = sqlite3.connect(store_dir / "index.sqlite")
    out: dict[str, list[tuple]] = {}
    for cid, path, label, readers in con.execute("SELECT chunk_id, source_path, label, readers FROM chunks"):
        texts = [t for (t,) in con.execute("SELECT text FROM chunks_fts WHERE chunk_id = ?", (cid,))]
        out.setdefault(path, []).append((cid, label, json.loads(readers), texts[0] if len(texts) == 1 else texts))
    assert con.execute("SELECT count(*) FROM chunks_fts").fetchone()[0] == sum(map(len, out.values()))
    con.close()
    return out


def _rebuilt(store_dir: Path, definition):
    """The hand-off rebuilt from every stage for the store's current catalog."""
    from thresher.flows.access import document_access
    from thresher.flows.handoff import build_handoff
    from thresher.flows.plan import live_documents

    store = Store(store_dir)
    catalog = store.catalog().to_pylist()
    _, live, copies = live_documents(catalog, {r.run_id: r.sequence for r in store.runs()}, store.next_sequence(),
                                     definition.model.source)
    scratch = "runs/rebuild-check"
    build_handoff(definition, store, "rebuild-check", live, document_access(catalog, definition.model.access),
                  f"{scratch}/chunks.parquet", f"{scratch}/digests.parquet", f"{scratch}/changes.parquet",
                  copies=copies)
    table = store.read_table(f"{scratch}/chunks.parquet")
    store.delete_dir(scratch)
    return table


def _cli(capsys, *argv: str) -> str:
    from thresher.flows.cli import main

    capsys.readouterr()
    assert main(list(argv)) == 0
    return capsys.readouterr().out


def test_ignoring_the_file_system_leaves_the_rules_readers(acl_drive):
    hr = acl_drive / "hr/appraisal-notes.txt"
    facts = read_facts(str(hr), hr.stat())
    section = _definition({**RULES, "file_system": "ignore"}).model.access
    a = decide(section, "hr/appraisal-notes.txt", facts)
    assert (a.readers, a.label, a.rule) == (["hr-team"], "confidential", "access.rules[0]")
    # A rule allowing nobody wins over the file system's readers (fail closed).
    closed = _definition({**RULES, "rules": [{"paths": "hr/**", "readers": []}]}).model.access
    assert decide(closed, "hr/appraisal-notes.txt", facts).readers == []


def test_documents_inside_documents_take_their_containers_access(prefect_harness, tmp_path):
    """An archive member (and a member of an archive inside it) and an e-mail attachment
    carry their container's readers and label, even where their own path would match
    no rule; a chmod/chgrp of the container changes theirs on the next run, no step runs."""
    from test_flow_containers import BUDGET, HOURS, MARCH, NOTICE, OLDER, sha, zip_of

    drive, store_dir = tmp_path / "drive", tmp_path / "store"
    (drive / "hr").mkdir(parents=True)
    (drive / "public").mkdir()
    archive = drive / "hr" / "2024-minutes.zip"
    archive.write_bytes(zip_of({"march/minutes.md": MARCH, "old/2019.zip": zip_of({"notes-2019.txt": OLDER})}))
    mail = drive / "hr" / "2026-03-notice.eml"
    mail.write_bytes(NOTICE)
    (drive / "public" / "hours.txt").write_bytes(HOURS)
    os.chown(archive, OUTSIDER_UID, OUTSIDER_GID)
    os.chmod(archive, 0o640)
    os.chown(mail, 0, 0)
    os.chmod(mail, 0o600)
    os.chmod(drive / "public" / "hours.txt", 0o600)
    # "hr/*.zip" does not reach "hr/2024-minutes.zip/march/minutes.md" ('*' stays within
    # one folder): on its own path a member would fall to the default, nobody.
    rules = {"file_system": "combine", "default": "nobody", "rules": [
        {"paths": ["hr/*.zip", "hr/*.eml"], "readers": ["hr-team"], "label": "confidential"},
        {"paths": "public/**", "readers": ["everyone"]}]}
    first = pipeline.run(_definition(rules), str(drive), str(store_dir), quiet=True)
    assert first["withheld"] == {}

    def access_by_doc() -> dict[str, tuple]:
        out = {}
        for r in Store(store_dir).handoff().to_pylist():
            assert out.setdefault(r["doc_id"], (r["readers"], r["label"])) == (r["readers"], r["label"])
        return out

    zipped = sorted([f"group:{OUTSIDER_GID}", "hr-team", f"user:{OUTSIDER_UID}"])
    got = access_by_doc()
    assert got[sha(MARCH)] == got[sha(OLDER)] == (zipped, "confidential")
    assert got[sha(BUDGET)] == got[sha(NOTICE)] == (["hr-team", "user:root"], "confidential")
    assert got[sha(HOURS)] == (["everyone", "user:root"], None)
    catalog = {r["source_path"]: r for r in Store(store_dir).catalog().to_pylist()}
    assert catalog["hr/2024-minutes.zip/old/2019.zip/notes-2019.txt"]["access_rule"] == "access.rules[0]"
    assert catalog["hr/2026-03-notice.eml/attachments/1-budget.md"]["owner"] == "root"

    # The archive loses its group's read bit; the message gains group adm.
    os.chmod(archive, 0o600)
    os.chown(mail, 0, 4)
    os.chmod(mail, 0o640)
    extract_before = Store(store_dir).stage_rows("extract", "pages").num_rows
    second = pipeline.run(_definition(rules), str(drive), str(store_dir), quiet=True)
    assert second["documents"]["processed"] == 0 and second["handoff"] == "access columns rewritten"
    assert Store(store_dir).stage_rows("extract", "pages").num_rows == extract_before
    got = access_by_doc()
    assert got[sha(MARCH)] == got[sha(OLDER)] == (["hr-team", f"user:{OUTSIDER_UID}"], "confidential")
    assert got[sha(BUDGET)] == got[sha(NOTICE)] == (["group:adm", "hr-team", "user:root"], "confidential")
    # Exactly the chunks of the members and of the message: the public file's are not there.
    handoff = Store(store_dir).handoff().to_pylist()
    changes = pq.read_table(store_dir / "handoff" / "changes" / f"{second['run_id']}.parquet").to_pylist()
    assert {c["action"] for c in changes} == {"upsert"}
    assert sorted(c["chunk_id"] for c in changes) == sorted(
        r["chunk_id"] for r in handoff if r["doc_id"] in {sha(MARCH), sha(OLDER), sha(BUDGET), sha(NOTICE)})
    assert Store(store_dir).handoff().equals(_rebuilt(store_dir, _definition(rules)))

    # A hand-off altered since its run recorded it is rebuilt from the stages, not
    # copied forward, even by a run with nothing to change.
    chunks = store_dir / "handoff" / "chunks.parquet"
    altered = pq.read_table(chunks)
    texts = altered.column("text").to_pylist()
    texts[0] = "altered by hand"
    pq.write_table(altered.set_column(altered.schema.get_field_index("text"), "text",
                                      pa.array(texts, pa.string())), chunks)
    third = pipeline.run(_definition(rules), str(drive), str(store_dir), quiet=True)
    assert third["handoff"] == "rebuilt" and third["documents"]["processed"] == 0
    assert "altered by hand" not in Store(store_dir).handoff().column("text").to_pylist()
    assert Store(store_dir).handoff().equals(_rebuilt(store_dir, _definition(rules)))


def test_digests_of_the_older_form_are_computed_again_from_the_handoff(tmp_path):
    """A store whose digests predate the body/access split (no body_digest) gets them
    computed from its hand-off, equal to what a rebuild computes, so the first run
    after an upgrade upserts nothing that did not change."""
    import hashlib
    import json

    import pyarrow as pa

    from thresher.flows import schema
    from thresher.flows.handoff import DIGESTS, _digest_table, previous_digests

    row = {"chunk_id": "c1", "doc_id": "d1", "source_path": "hr/a.txt", "source_paths": ["hr/a.txt"], "title": "A", "heading_path": ["A"],
           "chunk_index": 0, "page_start": None, "page_end": None, "char_start": 0, "char_end": 5,
           "prefix_chars": 0, "language": "en", "text": "Hello", "token_count": 1, "encoding": "cl100k_base",
           "token_counts": [("cl100k_base", 1)], "content_hash": "h1", "readers": ["hr"], "label": None,
           "run_id": "r1"}
    store = Store(tmp_path / "store")
    store.write_table("handoff/chunks.parquet", pa.Table.from_pylist([row], schema=schema.HANDOFF))
    store.write_table("handoff/digests.parquet", pa.table({"chunk_id": ["c1"], "digest": ["old-form"],
                                                           "doc_id": ["d1"], "source_path": ["hr/a.txt"],
                                                           "content_hash": ["h1"]}))
    got = previous_digests(store)
    assert got.schema.names == DIGESTS.names
    # The digests' form, spelled out: a store's digests stay valid across versions only
    # while this holds (every chunk would be upserted again otherwise).
    body = {k: v for k, v in row.items() if k not in ("run_id", "readers", "label")}
    body_digest = hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()
    digest = hashlib.sha256(body_digest.encode() + json.dumps([["hr"], None]).encode()).hexdigest()
    assert got.to_pylist() == [{"chunk_id": "c1", "digest": digest, "doc_id": "d1", "source_path": "hr/a.txt",
                                "content_hash": "h1", "body_digest": body_digest}]
    # The access is part of the digest: another reader gives another digest, same body.
    handoff = Store(tmp_path / "store").handoff()
    other = _digest_table(handoff.set_column(handoff.schema.get_field_index("readers"), "readers",
                                             pa.array([["hr", "board"]], pa.list_(pa.string())))).to_pylist()[0]
    assert other["body_digest"] == body_digest and other["digest"] != digest
