"""E-mail messages (.eml) and mailboxes (.mbox).

Outside references: real messages from Python's own e-mail test suite, shipped by
Debian's libpython3.11-testsuite (/usr/lib/python3.11/test/test_email/data/msg_*.txt);
attachment bytes checked against coreutils' base64(1) decoding of the message's own
base64 lines (not the `email` package the reader uses).
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

import pytest

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.extract.sniff import sniff
from thresher.steps.spec import StepContext
from thresher.steps.units import FAILED, OK, SKIPPED, Source

DATA = Path("/usr/lib/python3.11/test/test_email/data")  # libpython3.11-testsuite
needs_data = pytest.mark.skipif(not DATA.is_dir(), reason="needs libpython3.11-testsuite")


def run(data: bytes, name: str = "note.eml", depth: int = 0, **params):
    source = Source(doc_id="d", source_path=f"mail/{name}", data=data, size=len(data), mtime=0.0, depth=depth)
    return extract(source, ExtractParams(**params), StepContext())


@needs_data
def test_a_real_message_subject_is_the_title_and_headers_are_metadata_not_text():
    page, = run((DATA / "msg_07.txt").read_bytes(), "msg_07.eml")
    assert page.status == OK and page.format == "email"
    assert page.title == "Here is your dingus fish"
    assert page.text == "Hi there,\n\nThis is the dingus fish."
    assert page.payload["mail_from"] == "Barry <barry@digicool.com>"
    assert page.payload["mail_to"] == "Dingus Lovers <cravindogs@cravindogs.com>"
    assert page.payload["mail_date"] == "Fri, 20 Apr 2001 19:35:02 -0400"
    assert page.payload["mail_cc"] is None
    assert "barry@" not in page.text and "Content-Type" not in page.text


@needs_data
def test_a_real_attachment_is_handed_back_with_its_bytes():
    raw = (DATA / "msg_07.txt").read_text()
    # Reference: coreutils base64 -d over the base64 lines after the attachment's headers.
    b64 = raw.split('filename="dingusfish.gif"\n\n', 1)[1].split("\n--BOUNDARY", 1)[0]
    expected = subprocess.run(["base64", "-d"], input=b64.encode(), capture_output=True, check=True).stdout
    page, = run(raw.encode(), "msg_07.eml")
    assert [m.name for m in page.members] == ["attachments/1-dingusfish.gif"]
    assert page.members[0].data == expected and expected.startswith(b"GIF87a")


@needs_data
def test_multipart_alternative_is_read_once_to_its_real_words():
    # msg_15: a multipart/alternative plain + HTML body inside multipart/mixed, a MIME
    # preamble and a GIF attachment. The plain part says "Some removed test."
    data = (DATA / "msg_15.txt").read_bytes()
    page, = run(data, "msg_15.eml")
    assert page.status == OK and page.text == "Some removed test."
    assert page.payload["word_count"] == 3
    # what reading it as plain text gave: headers, boundaries and both bodies
    assert len(data.split()) > 50
    # It reuses the outer boundary inside, so the GIF cannot be told apart: a warning, no member.
    assert page.members == [] and any(w.startswith("malformed message: ") for w in page.warnings)


def test_a_fourteen_word_alternative_message_gives_fourteen_words():
    words = "The Fernhollow branch closes early on Friday because the heating engineer needs the hall."
    assert len(words.split()) == 14
    data = (b"From: Desk <desk@quillfern.example>\nTo: staff@quillfern.example\nSubject: Early closing\n"
            b"Date: Mon, 2 Mar 2026 09:00:00 +0000\nMIME-Version: 1.0\n"
            b"Content-Type: multipart/alternative; boundary=ALT\n\n--ALT\nContent-Type: text/plain; charset=utf-8\n\n"
            + words.encode() + b"\n--ALT\nContent-Type: text/html; charset=utf-8\n\n<html><body><p>"
            + words.encode() + b"</p></body></html>\n--ALT--\n")
    page, = run(data)
    assert page.text == words and page.payload["word_count"] == 14 and page.members == []


def test_html_only_body_goes_through_the_html_walker_and_quotes_are_kept_apart():
    html = (b"From: Desk <desk@quillfern.example>\nTo: staff@quillfern.example\nSubject: Van rota\n"
            b"Date: Mon, 2 Mar 2026 09:00:00 +0000\nContent-Type: text/html; charset=utf-8\n\n"
            b"<html><body><h1>Van rota</h1><p>The van leaves at <b>eight</b>.</p></body></html>\n")
    page, = run(html)
    assert [(b.kind, b.text) for b in page.blocks] == [("heading", "Van rota"), ("paragraph", "The van leaves at eight.")]
    reply = (b"From: Ines <ines@quillfern.example>\nTo: desk@quillfern.example\nSubject: Re: Van rota\n"
             b"Date: Mon, 2 Mar 2026 10:00:00 +0000\n\nEight is fine for me.\nOn Monday the desk wrote:\n"
             b"> The van leaves at eight.\n> Please confirm.\n")
    page, = run(reply)
    assert [b.text for b in page.blocks] == [
        "Eight is fine for me.\nOn Monday the desk wrote:", "> The van leaves at eight.\n> Please confirm."]


def test_a_mailbox_gives_one_document_per_message():
    one = b"From: a@quillfern.example\nTo: b@quillfern.example\nSubject: First\nDate: Mon, 2 Mar 2026 09:00:00 +0000\n\nOne.\n>From the archive.\n"
    two = b"From: b@quillfern.example\nTo: a@quillfern.example\nSubject: Second\nDate: Tue, 3 Mar 2026 09:00:00 +0000\n\nTwo.\n"
    mbox = b"From a@quillfern.example Mon Mar  2 09:00:00 2026\n" + one + b"\nFrom b@quillfern.example Tue Mar  3 09:00:00 2026\n" + two
    assert sniff(mbox, "mail/desk.mbox").format == "mbox"
    page, = run(mbox, "desk.mbox")
    assert page.status == SKIPPED and page.reason == "mailbox: 2 message(s), each read as a document of its own"
    assert [m.name for m in page.members] == ["0001-First.eml", "0002-Second.eml"]
    first, = run(page.members[0].data, "desk.mbox/0001-First.eml")
    assert first.title == "First" and first.text == "One.\nFrom the archive."


@needs_data
def test_every_real_message_is_sniffed_as_mail_and_read_or_refused_with_a_reason():
    files = sorted(DATA.glob("msg_*.txt"))
    assert len(files) > 40
    results = {f.name: run(f.read_bytes(), f.stem + ".eml")[0] for f in files}
    not_mail = {n for n, r in results.items() if r.format not in ("email", "mbox")}
    # msg_19 is a mailing-list digest's text without a header (it is read as text)
    assert not_mail == {"msg_19.txt"}
    assert {n for n, r in results.items() if r.format == "mbox"} == {"msg_25.txt", "msg_43.txt"}
    assert all(r.status in (OK, SKIPPED) for r in results.values())


def test_broken_messages_and_deep_nesting():
    assert run(b"\x00\x01garbage" * 10, "x.eml")[0].status == FAILED
    nested = (b"From: a@quillfern.example\nTo: b@quillfern.example\nSubject: S\nMIME-Version: 1.0\n"
              b"Content-Type: multipart/mixed; boundary=X\n\n--X\nContent-Type: text/plain\n\nBody.\n"
              b"--X\nContent-Type: text/plain\nContent-Disposition: attachment; filename=\"notes.txt\"\n\nNotes.\n--X--\n")
    page, = run(nested, depth=3)
    assert page.status == OK and page.members == []
    assert "1 attachment(s) not opened: the message sits inside 3 containers (max_nesting 3)" in page.warnings
    page, = run(nested)
    assert [(m.name, m.data) for m in page.members] == [("attachments/1-notes.txt", b"Notes.")]


def test_an_outlook_message_is_refused_with_its_own_reason():
    # A compound file whose directory names MAPI property streams ([MS-OXMSG] 2.1).
    data = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(500) + "__substg1.0_0037001F".encode("utf-16-le") + bytes(100)
    page, = run(data, "notice.msg")
    assert page.status == FAILED
    assert page.reason == "unsupported format: Outlook message (.msg); save it as .eml to have it read"
