"""Legacy binary Word and PowerPoint files (.doc, .ppt) converted by LibreOffice.

LibreOffice is a program, not a library: like Tesseract for OCR (pdf_ocr.py) this is
the one place the extract step runs another program and touches the disk, because
there is no other open reader of these formats. Everything stays in a temporary
folder that is removed afterwards; LibreOffice runs headless with its own profile
folder (so it never touches a user's settings, and parallel workers do not share one)
and a time limit (the document's remaining `time_limit_seconds`); at the limit its
whole process group is killed. The converted file (.docx or .pptx) is then read by the
matching reader, and the pages keep the legacy format's name and the method
"libreoffice+docx" / "libreoffice+pptx".

Whether LibreOffice is installed is asked once per process; without it the file fails
with a reason naming `make office`.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import tempfile
import threading
from pathlib import Path

from .blocks import DocumentFailure

# legacy format -> (LibreOffice filter of the target, the target's sniffed format)
TARGETS = {"doc": ("docx:MS Word 2007 XML", "docx"), "ppt": ("pptx:Impress MS PowerPoint 2007 XML", "pptx")}
MISSING = ("LibreOffice is not installed (it converts .doc and .ppt files): "
           "run `make office` (Debian: libreoffice-writer-nogui, libreoffice-impress-nogui)")

_lock = threading.Lock()  # one conversion at a time per process: one profile folder each
_program: str | None = None
_asked = False


def program() -> str | None:
    global _program, _asked
    with _lock:
        if not _asked:
            _program = shutil.which("soffice") or shutil.which("libreoffice")
            _asked = True
    return _program


def convert(data: bytes, fmt: str, timeout: float) -> bytes:
    """The .docx/.pptx bytes LibreOffice writes for a .doc/.ppt; DocumentFailure if it cannot."""
    exe = program()
    if exe is None:
        raise DocumentFailure(MISSING)
    target, _ = TARGETS[fmt]
    with _lock, tempfile.TemporaryDirectory(prefix="thresher-office-") as tmp:
        work = Path(tmp)
        src = work / f"in.{fmt}"
        src.write_bytes(data)
        profile = work / "profile"
        cmd = [exe, f"-env:UserInstallation={profile.as_uri()}", "--headless", "--norestore",
               "--nolockcheck", "--convert-to", target, "--outdir", str(work / "out"), str(src)]
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                start_new_session=True, env={**os.environ, "HOME": str(work)})
        try:
            _, err = proc.communicate(timeout=max(1.0, timeout))
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.communicate()
            raise DocumentFailure(f"LibreOffice took longer than {timeout:.0f} s to convert the "
                                  f"{fmt.upper()} file (time_limit_seconds)") from None
        out = work / "out" / f"in.{target.split(':')[0]}"
        if proc.returncode != 0 or not out.exists():
            detail = (err or b"").decode("utf-8", "replace").strip().splitlines()
            raise DocumentFailure(
                f"LibreOffice could not convert the {fmt.upper()} file"
                + (f": {detail[-1]}" if detail else " (damaged or not a real "
                   f"{fmt.upper()} file)"))
        return out.read_bytes()
