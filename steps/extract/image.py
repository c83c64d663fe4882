"""Images (.png, .jpg, .gif, .tiff, .bmp, .webp): text read by OCR when `ocr` is on.

Without OCR an image is skipped (status `skipped`, not `failed`): a picture on a drive
is not a broken document. With OCR, Tesseract reads it through pdf_ocr's helper (the
same engine, language and grouping as scanned PDF pages); a multi-page TIFF gives one
page per frame. When OCR is on but Tesseract cannot run, the file fails with what is
missing.
"""

from __future__ import annotations

import io

from .blocks import DocumentFailure, DocumentSkipped, PagePart, ReaderInput, ReadResult, paragraph_block

SKIP_REASON = "image: OCR is not enabled (set extract's ocr: true and install Tesseract with `make ocr`)"


def read_image(inp: ReaderInput) -> ReadResult:
    if not inp.params.ocr:
        raise DocumentSkipped(SKIP_REASON)
    from PIL import Image, ImageSequence, UnidentifiedImageError

    from . import pdf_ocr

    missing = pdf_ocr.unavailable(inp.params.ocr_language)
    if missing:
        raise DocumentFailure(f"image: OCR is enabled but {missing}")
    try:
        image = Image.open(io.BytesIO(inp.data))
        frames = [frame.convert("L") for frame in ImageSequence.Iterator(image)]
    except (UnidentifiedImageError, OSError, ValueError, SyntaxError) as exc:
        raise DocumentFailure(f"unreadable image: {type(exc).__name__}: {exc}", exc) from exc
    if len(frames) > inp.params.max_pages:
        raise DocumentFailure(f"too many frames: {len(frames)} over the limit of "
                              f"{inp.params.max_pages} (max_pages)")
    pages = []
    for number, frame in enumerate(frames, start=1):
        result = pdf_ocr.read_image(frame, inp.params.ocr_language, inp.params.time_limit_seconds)
        part = PagePart(page=number if len(frames) > 1 else None,
                        blocks=[b for b in (paragraph_block(p) for p in result.paragraphs) if b])
        part.warnings.append(
            f"text from OCR (Tesseract {result.version}, language {inp.params.ocr_language}): "
            f"{result.words} words, mean word confidence {result.confidence:.0f}")
        pages.append(part)
    return ReadResult(format="image", method="ocr", pages=pages, page_count=len(frames))
