"""The `thresher` command as a user runs it: a real process, embedded Prefect."""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from conftest import REPO, SAMPLE

THRESHER = str(Path(sys.executable).with_name("thresher"))


def _cli(*args: str, cwd: Path = REPO, env: dict | None = None, timeout: int = 300,
         offline: bool = False) -> subprocess.CompletedProcess:
    cmd = [THRESHER, *args]
    if offline:
        # A new network namespace with only loopback up: no route to anywhere else, so a
        # download or telemetry call would fail the run instead of passing unnoticed.
        cmd = ["unshare", "--net", "sh", "-c", 'ip link set lo up && exec "$@"', "sh", *cmd]
    return subprocess.run(cmd, capture_output=True, text=True, cwd=cwd, env=env, timeout=timeout)


@pytest.mark.parametrize("verb", ["run", "status", "trail"])
def test_every_verb_has_help(verb):
    r = _cli(verb, "--help")
    assert r.returncode == 0
    assert "--store" in r.stdout and "--config" in r.stdout


@pytest.mark.parametrize("args, message", [
    (["run", "--workers", "none"], "argument --workers: expected a whole number, got 'none'"),
    (["run", "--workers", "0"], "argument --workers: must be at least 1"),
    (["run", "--source", "/no/such/folder"], "source folder not found: /no/such/folder"),
    (["run", "--config", "/no/such/flow.yaml"], "flow definition not found"),
    (["sing"], "invalid choice: 'sing'"),
    (["run", "--colour"], "unrecognized arguments: --colour"),
    # A mistyped flag is named even where a required option is missing too.
    (["rerun", "--bogus"], "thresher rerun: unrecognized arguments: --bogus"),
    (["export", "--out", "-", "--formt", "jsonl"], "unrecognized arguments: --formt"),
    (["rerun"], "thresher rerun: one of the arguments --doc --path --failed"),
])
def test_bad_input_gets_one_line_and_exit_code_2(args, message, tmp_path):
    extra = ["--store", str(tmp_path / "s")] if args[0] == "run" else []
    r = _cli(*args, *extra, cwd=tmp_path)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert message in lines[0]
    assert not (tmp_path / "s").exists()  # nothing was created


@pytest.mark.parametrize("verb", ["run", "schedule"])
def test_without_loopback_the_flow_verbs_fail_at_once_in_one_line(verb, tmp_path):
    # A network namespace whose loopback interface is down (unshare's default): the
    # embedded Prefect server would have no address to listen on.
    probe = subprocess.run(["unshare", "--net", "true"], capture_output=True, text=True)
    assert probe.returncode == 0, f"this test needs `unshare --net` (root or user namespaces): {probe.stderr}"
    env = dict(os.environ)
    env.pop("PREFECT_API_URL", None)
    env["PREFECT_HOME"] = str(tmp_path / "prefect")
    r = subprocess.run(["unshare", "--net", THRESHER, verb, "--source", str(SAMPLE), "--store", str(tmp_path / "s")],
                       capture_output=True, text=True, cwd=tmp_path, env=env, timeout=60)
    assert r.returncode == 2, r.stderr
    assert r.stderr.strip().splitlines() == [
        f"thresher {verb}: needs a local port on 127.0.0.1 for thresher's embedded Prefect server (is the "
        "loopback interface up?), or PREFECT_API_URL set to a Prefect server"]


@pytest.mark.parametrize("verb", ["run", "schedule"])
def test_a_prefect_server_that_does_not_answer_stops_the_flow_verbs_in_one_line(verb, tmp_path):
    # A port nothing listens on: Prefect itself would end in a traceback after its retries.
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = dict(os.environ, PREFECT_HOME=str(tmp_path / "prefect"), PREFECT_API_URL=f"http://127.0.0.1:{port}/api")
    r = subprocess.run([THRESHER, verb, "--source", str(SAMPLE), "--store", str(tmp_path / "s")],
                       capture_output=True, text=True, cwd=tmp_path, env=env, timeout=60)
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith(f"thresher {verb}: PREFECT_API_URL=http://127.0.0.1:{port}/api does not answer (")
    assert "make prefect-server" in lines[0]
    assert not (tmp_path / "s").exists()  # nothing was created


def test_plain_thresher_prints_the_help():
    r = _cli()
    assert r.returncode == 0 and r.stderr == ""
    assert r.stdout.startswith("usage: thresher") and "rerun" in r.stdout and "export" in r.stdout


def test_a_short_doc_id_prefix_is_told_the_minimum(tmp_path):
    from thresher.flows.lookup import NotFound, resolve_document
    from thresher.flows.store import Store

    with pytest.raises(NotFound, match="a doc_id prefix needs at least 6 characters \\('59ea' has 4\\)"):
        resolve_document(Store(tmp_path / "store"), "59ea", [])
    with pytest.raises(NotFound, match="a doc_id prefix of at least 6 characters"):
        resolve_document(Store(tmp_path / "store"), "nowhere/x.pdf", [])


def test_bad_flow_definition_names_the_key(tmp_path):
    flow = tmp_path / "flow.yaml"
    flow.write_text("steps:\n  - step: extract\n  - step: split\n    params: {max_tokens: -5}\n")
    r = _cli("run", "--config", str(flow), "--source", str(SAMPLE), "--store", str(tmp_path / "s"), cwd=tmp_path)
    assert r.returncode == 2
    assert "steps[1].params.max_tokens" in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_status_and_trail_on_an_empty_store_say_so(tmp_path):
    for verb in (["status"], ["trail", "x.pdf"]):
        r = _cli(*verb, "--store", str(tmp_path / "empty"), cwd=tmp_path)
        assert r.returncode == 2
        assert "no committed run in store" in r.stderr


def test_run_offline_then_status_then_trail_answer_from_the_store(tmp_path):
    probe = subprocess.run(["unshare", "--net", "true"], capture_output=True, text=True)
    assert probe.returncode == 0, f"this test needs `unshare --net` (root or user namespaces): {probe.stderr}"
    drive = tmp_path / "drive"
    shutil.copytree(SAMPLE, drive)
    store = tmp_path / "store"
    env = dict(os.environ)
    env.pop("PREFECT_API_URL", None)
    env["PREFECT_HOME"] = str(tmp_path / "prefect")  # a new embedded database, as for a new user
    r = _cli("run", "--source", str(drive), "--store", str(store), cwd=tmp_path, env=env, offline=True)
    assert r.returncode == 0, r.stderr
    # Progress while it works (stderr), a summary at the end (stdout).
    assert "batch 1/" in r.stderr and "found 27 files (26 distinct documents)" in r.stderr
    # the zip of old minutes holds 2, the e-mail 1 attachment
    assert "3 documents found inside documents, 3 of them read" in r.stderr
    out = r.stdout
    assert "documents  27 files, 29 distinct (3 inside other documents); 29 processed" in out
    for stage in ("extract", "clean", "language", "split", "dedup", "tokens"):
        assert f"\n  {stage} " in out
    assert f"store      {store}" in out

    s = _cli("status", "--store", str(store), cwd=tmp_path)
    assert s.returncode == 0
    assert "1 committed run(s), 29 live documents" in s.stdout
    # Chunks by label, as the hand-off holds them (hr/ is confidential: the contact list).
    handoff = pq.read_table(store / "handoff" / "chunks.parquet")
    by_label = Counter(handoff.column("label").to_pylist())
    confidential = {p for p, lab in zip(handoff.column("source_path").to_pylist(),
                                        handoff.column("label").to_pylist()) if lab == "confidential"}
    assert confidential == {"hr/staff-contact-list.md"}
    assert f"by label:    internal {by_label['internal']}" in s.stdout
    assert f"confidential {by_label['confidential']}" in s.stdout
    assert "current view by stage:" in s.stdout
    lang_line = next(line for line in s.stdout.splitlines() if line.strip().startswith("by language:"))
    assert "en " in lang_line and "de " in lang_line and "fr " in lang_line
    assert "by folder:" in s.stdout and "policies" in s.stdout
    js = json.loads(_cli("status", "--store", str(store), "--json", cwd=tmp_path).stdout)
    assert js["stages"]["extract"]["failed"] >= 4
    # The image named .txt and the zip of minutes (a container: its members are the
    # documents) are skipped, counted apart from failures.
    assert js["stages"]["extract"]["skipped"] == 2
    assert "2 skipped" in s.stdout
    assert js["tokens"]["total"] == sum(handoff.column("token_count").to_pylist())
    assert sum(js["tokens"]["by_folder"].values()) == js["tokens"]["total"]

    t = _cli("trail", str(drive / "board" / "2025-11-18-board-minutes.md"), "--store", str(store), cwd=tmp_path)
    assert t.returncode == 0, t.stderr
    assert t.stdout.startswith("board/2025-11-18-board-minutes.md")
    assert "extract: 1 page unit(s): 1 ok" in t.stdout and "tokens" in t.stdout and "Board" in t.stdout
    assert "access: board, management; label restricted (from access.rules[1])" in t.stdout
    # Each chunk once, with what every chunk stage decided, not one list per stage.
    header = re.search(r"^chunks: (\d+) through split, personal, dedup, tokens "
                       r"\(split \1 ok; personal \1 ok; dedup \1 ok; tokens \1 ok\)$", t.stdout, re.M)
    assert header, t.stdout
    listed = re.findall(r"^  (chunk/\d{5}) ", t.stdout, re.M)
    assert len(listed) == int(header.group(1)) == len(set(listed))
    copy = _cli("trail", "volunteers/windows-export/volunteer-rota-spring-2026.txt", "--store", str(store),
                cwd=tmp_path)
    assert re.search(r"^  chunk/00000  split ok, personal ok, dedup dropped  ", copy.stdout, re.M), copy.stdout
    assert "    dedup reason: copy of document" in copy.stdout
    contacts = _cli("trail", "hr/staff-contact-list.md", "--store", str(store), cwd=tmp_path).stdout
    found = re.findall(r"^    (email|phone): file (chars \d+-\d+): (.+)$", contacts, re.M)
    assert found and len(found) == len(set(found))  # each finding once, not once per chunk stage

    bad = _cli("trail", "hr/salary-review-2026-protected.pdf", "--store", str(store), cwd=tmp_path)
    assert bad.returncode == 0 and "reason: password protected" in bad.stdout

    rep = _cli("report", "--store", str(store), "--out", str(tmp_path / "review.html"), cwd=tmp_path)
    assert rep.returncode == 0, rep.stderr
    page = (tmp_path / "review.html").read_text(encoding="utf-8")
    assert "Run summary" in page and "hr/<wbr>salary-review-2026-protected.pdf" in page and "<script" not in page
    pages = tmp_path / "review-pages"  # the documents' pages, beside the summary
    assert f"document pages in {pages}" in rep.stderr and (pages / "list-1.html").is_file()

    # `export --out - | head`: a reader that closes the pipe early ends the export quietly.
    read_end, write_end = os.pipe()
    os.close(read_end)  # closed before anything is written: the first write meets a broken pipe
    with os.fdopen(write_end, "wb") as closed:
        e = subprocess.run([THRESHER, "export", "--format", "jsonl", "--out", "-", "--store", str(store)],
                           stdout=closed, stderr=subprocess.PIPE, text=True, cwd=tmp_path, timeout=120)
    assert (e.returncode, e.stderr) == (0, "")
    head = subprocess.run(f"'{THRESHER}' export --format jsonl --out - --store '{store}' | head -2", shell=True,
                          capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert len(head.stdout.splitlines()) == 2 and json.loads(head.stdout.splitlines()[0])["chunk_id"]
    assert head.stderr == ""

    missing = _cli("trail", "nowhere/nothing.pdf", "--store", str(store), cwd=tmp_path)
    assert missing.returncode == 2 and "no document 'nowhere/nothing.pdf'" in missing.stderr


def test_report_verb_writes_the_page_or_says_why_not(tmp_path):
    r = _cli("report", "--store", str(tmp_path / "empty"), "--out", str(tmp_path / "r.html"), cwd=tmp_path)
    assert r.returncode == 2 and "no committed run in store" in r.stderr
    assert not (tmp_path / "r.html").exists()


def test_prefects_exit_notice_about_queued_events_is_not_shown(caplog, capsys):
    """Prefect's event worker warns "Still processing items: 2 items remaining..." when a
    process exits with a run's last state events queued (3 of 4 served no-change runs
    here); they are sent all the same, so the command hides that notice and only it."""
    import logging

    from thresher.flows import cli

    cli.main([])  # help: the command's set-up has run
    worker = logging.getLogger("EventsWorker")
    with caplog.at_level(logging.WARNING):
        worker.warning("Still processing items: 2 items remaining...")
        worker.warning("Service 'EventsWorker' failed with 2 pending items.")
    assert [r.getMessage() for r in caplog.records] == ["Service 'EventsWorker' failed with 2 pending items."]
