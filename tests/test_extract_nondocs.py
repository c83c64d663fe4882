"""What is not a document: images (OCR when it is on, skipped otherwise), web assets
and machine data (skipped unless their kind is taken back in with `read_kinds`).

Real files: the Sphinx build of the Debian Policy Manual (debian-policy ships its
stylesheets, scripts, search index and icons) and DejaVu fonts (fonts-dejavu-core,
which fontconfig brings).
"""

from __future__ import annotations

import io
from pathlib import Path

import pydantic
import pytest
from PIL import Image, ImageDraw, ImageFont

from office_files import need
from thresher.steps.extract import ExtractParams, extract
from thresher.steps.extract.image import SKIP_REASON
from thresher.steps.spec import StepContext
from thresher.steps.units import FAILED, OK, SKIPPED, Source

POLICY = Path("/usr/share/doc/debian-policy/policy.html")
FONT = Path("/usr/share/fonts/truetype/dejavu/DejaVuSans-Bold.ttf")


def read(data: bytes, path: str, **params):
    source = Source(doc_id="d", source_path=path, data=data, size=len(data), mtime=0.0)
    return extract(source, ExtractParams(**params), StepContext())


@pytest.mark.parametrize("rel,kind", [
    ("_static/basic.css", "stylesheet"),
    ("_static/doctools.js", "script"),
    ("searchindex.js", "search index"),
    ("objects.inv", "search index"),
])
def test_web_assets_of_a_real_manual_are_skipped_with_the_reason(rel, kind):
    path = need(POLICY / rel, "debian-policy")
    (page,) = read(path.read_bytes(), f"policy.html/{rel}")
    assert page.status == SKIPPED
    assert page.reason.startswith(f"not a document: {kind} (.")
    assert f"add '{kind}' to extract's read_kinds" in page.reason


def test_a_kind_taken_back_in_is_read_as_text():
    path = need(POLICY / "_static/doctools.js", "debian-policy")
    (page,) = read(path.read_bytes(), "policy.html/_static/doctools.js", read_kinds=["script"])
    assert page.status == OK and page.format == "text" and "Sphinx" in page.text


def test_fonts_executables_and_data_are_skipped():
    font = need(FONT, "fonts-dejavu-core").read_bytes()
    assert read(font, "fonts/DejaVuSans-Bold.ttf")[0].reason.startswith("not a document: font")
    elf = Path("/bin/true").read_bytes()
    assert read(elf, "tools/true")[0].reason == (
        "not a document: executable; add 'executable' to extract's read_kinds to read such files")
    (data,) = read(b'{"branches": ["Lindle Cross"]}', "api/branches.json")
    assert data.status == SKIPPED and data.reason.startswith("not a document: data (.json)")


def test_unknown_kinds_are_refused_by_name():
    with pytest.raises(pydantic.ValidationError, match="unknown kind"):
        ExtractParams(read_kinds=["spreadsheet"])


def notice_png() -> bytes:
    image = Image.new("L", (1400, 260), 255)
    draw = ImageDraw.Draw(image)
    font = ImageFont.truetype(str(need(FONT, "fonts-dejavu-core")), 56)
    draw.text((40, 40), "Lindle Cross branch", font=font, fill=0)
    draw.text((40, 140), "closed on Monday", font=font, fill=0)
    buf = io.BytesIO()
    image.save(buf, "PNG")
    return buf.getvalue()


def test_images_are_skipped_without_ocr_and_read_with_it():
    png = notice_png()
    (page,) = read(png, "notices/closure.png")
    assert page.status == SKIPPED and page.reason == SKIP_REASON
    (page,) = read(png, "notices/closure.png", ocr=True)
    assert page.status == OK and page.payload["method"] == "ocr"
    assert page.text.split() == ["Lindle", "Cross", "branch", "closed", "on", "Monday"]


def test_a_broken_image_with_ocr_gets_its_own_reason():
    png = notice_png()
    (page,) = read(png[:200], "notices/closure.png", ocr=True)
    assert page.status == FAILED and page.reason.startswith("unreadable image")
