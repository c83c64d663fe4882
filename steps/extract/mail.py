"""E-mail: one message (.eml) is one document of one page; a mailbox (.mbox) is a
container whose messages are documents of their own, like an archive's members.

The Subject is the title; From, To, Cc and Date go into the page's own columns (not
into the text). The body is the text/plain part, else the text/html part read by
html_walk. Quoted lines ("> ...") are kept, as paragraphs of their own that keep their
quote marks, so a reader can tell them from the new text. Every attachment is handed
back as a document of its own, named `attachments/<n>-<file name>`. Parsing is the
standard library's `email` package (RFC 5322 and MIME).
"""

from __future__ import annotations

import email
import email.policy
import re
from email.message import EmailMessage


from ..units import Member
from .blocks import DocumentFailure, PagePart, ReaderInput, ReadResult, inline, paragraph_block
from .html_walk import document_blocks, parse_html
from .unpack import budget_for, check_count, check_nesting, unique_names

_QUOTED = re.compile(r"^\s*>")
_UNSAFE = re.compile(r"[^\w.\- ]+")
# The separator line of the mbox format: "From " at the start of a line (RFC 4155).
_MBOX_FROM = re.compile(rb"^From ", re.MULTILINE)


def _header(msg: EmailMessage, name: str) -> str | None:
    values = msg.get_all(name)
    if not values:
        return None
    return inline(", ".join(str(v) for v in values)) or None


def _body_blocks(text: str) -> list:
    """Paragraphs at blank lines; a run of quoted lines is a paragraph of its own."""
    blocks = []
    for para in re.split(r"\n\s*\n", text.replace("\r\n", "\n").replace("\r", "\n")):
        run: list[str] = []
        quoted = None
        for line in para.split("\n"):
            q = bool(_QUOTED.match(line))
            if run and q != quoted:
                blocks.append(paragraph_block("\n".join(run)))
                run = []
            run.append(line)
            quoted = q
        if run:
            blocks.append(paragraph_block("\n".join(run)))
    return [b for b in blocks if b is not None]


def _html_blocks(html: str) -> list:
    return document_blocks(parse_html(html))


def _text_of(part: EmailMessage) -> str:
    try:
        content = part.get_content()
    except (LookupError, UnicodeError, AssertionError):  # an unknown charset: read as Latin-1
        content = (part.get_payload(decode=True) or b"").decode("latin-1")
    return content if isinstance(content, str) else content.decode("utf-8", "replace")


def _safe(name: str) -> str:
    name = name.replace("\\", "/").rsplit("/", 1)[-1]
    name = _UNSAFE.sub("-", name).strip(" .-")
    return name[:120]


def _attachments(msg: EmailMessage, body: EmailMessage | None) -> list[Member]:
    out = []
    n = 0
    for part in msg.walk():
        if part is msg or part is body or part.is_multipart() or part.get_content_maintype() == "multipart":
            continue  # (a multipart that did not parse as one is a malformed message, warned of)
        disposition = part.get_content_disposition()
        maintype = part.get_content_maintype()
        if maintype == "text" and disposition != "attachment" and not part.get_filename():
            continue  # an alternative of the body (the HTML beside the plain text)
        n += 1
        if part.get_content_type() == "message/rfc822":
            inner = part.get_payload()
            inner = inner[0] if isinstance(inner, list) else inner
            data = inner.as_bytes()
            subject = _safe(str(inner.get("subject", ""))) or "message"
            name = f"{n}-{subject}.eml"
        else:
            data = part.get_payload(decode=True) or b""
            filename = _safe(part.get_filename() or "")
            name = f"{n}-{filename}" if filename else f"{n}-attachment"
        out.append(Member(f"attachments/{name}", data))
    return out


def _parts_inside(msg: EmailMessage) -> list[EmailMessage]:
    return [p for p in msg.walk() if p.get_content_type() == "message/rfc822"]


def read_eml(inp: ReaderInput) -> ReadResult:
    try:
        msg = email.message_from_bytes(inp.data, policy=email.policy.default)
    except Exception as exc:  # noqa: BLE001 - the parser is lenient; anything it raises is this file's
        raise DocumentFailure(f"unreadable e-mail message: {type(exc).__name__}: {exc}", exc) from None
    if not msg.keys():
        raise DocumentFailure("unreadable e-mail message: no header fields")
    body = msg.get_body(preferencelist=("plain", "html"))
    blocks, warnings_ = [], []
    if body is not None:
        text = _text_of(body)
        blocks = _html_blocks(text) if body.get_content_subtype() == "html" else _body_blocks(text)
    if not blocks:
        warnings_.append("no text (the message has no readable body)")
    defects = sorted({type(d).__name__ for part in msg.walk() for d in part.defects})
    for name in defects[:3]:
        warnings_.append(f"malformed message: {name}")
    members = _attachments(msg, body)
    if members and inp.depth >= inp.params.max_nesting:
        warnings_.append(f"{len(members)} attachment(s) not opened: the message sits inside {inp.depth} "
                         f"containers (max_nesting {inp.params.max_nesting})")
        members = []
    check_count(len(members), inp.params.max_members, "e-mail message")
    budget = budget_for(inp, "e-mail message")
    for m in members:
        budget.take(m.data, len(m.data))
    part = PagePart(page=None, blocks=blocks, warnings=warnings_, fields={
        "mail_from": _header(msg, "from"), "mail_to": _header(msg, "to"), "mail_cc": _header(msg, "cc"),
        "mail_date": _header(msg, "date"),
    })
    return ReadResult(format="email", method="email", pages=[part], title=_header(msg, "subject") or "",
                      encoding=body.get_content_charset() or "" if body is not None else "",
                      members=unique_names(members))


def split_mbox(data: bytes) -> list[bytes]:
    """The messages of an mbox file; ">From " lines lose one quote mark (mboxrd)."""
    starts = [m.start() for m in _MBOX_FROM.finditer(data)]
    out = []
    for i, start in enumerate(starts):
        chunk = data[start:starts[i + 1] if i + 1 < len(starts) else len(data)]
        chunk = chunk.split(b"\n", 1)[1] if b"\n" in chunk else b""
        chunk = re.sub(rb"(?m)^>(>*From )", rb"\1", chunk)
        out.append(chunk)
    return out


def read_mbox(inp: ReaderInput) -> ReadResult:
    check_nesting(inp, "mailbox")
    messages = split_mbox(inp.data)
    if not messages:
        raise DocumentFailure("unreadable mailbox: no \"From \" line starts a message")
    check_count(len(messages), inp.params.max_members, "mailbox")
    members = []
    for n, raw in enumerate(messages, 1):
        subject = email.message_from_bytes(raw, policy=email.policy.default).get("subject", "")
        name = _safe(str(subject or "")) or "message"
        members.append(Member(f"{n:04d}-{name}.eml", raw))
    note = f"mailbox: {len(members)} message(s), each read as a document of its own"
    return ReadResult(format="mbox", method="mbox", pages=[], members=unique_names(members), skipped=note)
