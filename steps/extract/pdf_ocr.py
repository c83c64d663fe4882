"""Optional OCR of pages without a text layer, with Tesseract through pytesseract.

Off by default (ExtractParams.ocr). The page is rendered by PDFium in grey at
`ocr_dpi` (300 by default: Tesseract's documentation asks for at least 300 dpi; from
memory), and Tesseract's word boxes are grouped as it groups them: words into lines,
lines into paragraphs (its block and paragraph numbers). Headings are not guessed on
OCR text: glyph heights from a scan are too rough to rank headings by.

Tesseract is a program, not a library: pytesseract runs the `tesseract` executable
(Debian: tesseract-ocr, with a language package such as tesseract-ocr-eng). Whether it
and the language data are there is asked once per process; the answer goes into the
page's reason when OCR is enabled but cannot run.
"""

from __future__ import annotations

import shutil
import threading
from dataclasses import dataclass

from .pdf_layout import Vocabulary, join_lines

_lock = threading.Lock()
_languages: set[str] | None = None
_missing: str | None = None


def unavailable(language: str) -> str:
    """"" when OCR can run for `language` ("eng", "eng+deu"); else what is missing."""
    global _languages, _missing
    with _lock:
        if _languages is None and _missing is None:
            try:
                import pytesseract
            except ImportError:
                _missing = "the Python package pytesseract is not installed"
            else:
                if shutil.which(pytesseract.pytesseract.tesseract_cmd) is None:
                    _missing = "the tesseract program is not installed (Debian: tesseract-ocr)"
                else:
                    try:
                        _languages = set(pytesseract.get_languages(config=""))
                    except Exception as exc:  # a broken installation
                        _missing = f"tesseract does not run: {type(exc).__name__}: {exc}"
        if _missing:
            return _missing
    lacking = [lang for lang in language.split("+") if lang not in (_languages or set())]
    if lacking:
        have = ", ".join(sorted(_languages or [])) or "none"
        return (f"tesseract has no language data for {'+'.join(lacking)} "
                f"(installed: {have}; Debian: tesseract-ocr-{lacking[0]})")
    return ""


@dataclass
class OcrText:
    paragraphs: list[str]
    words: int
    confidence: float  # mean word confidence, 0-100
    version: str


def read_image(image, language: str, timeout: float) -> OcrText:
    """Paragraphs of text Tesseract reads in a PIL image."""
    import pytesseract

    data = pytesseract.image_to_data(image, lang=language, output_type=pytesseract.Output.DICT,
                                     timeout=max(1, int(timeout)))
    lines: dict[tuple[int, int, int], list[str]] = {}
    confidences: list[float] = []
    for i, text in enumerate(data["text"]):
        text = (text or "").strip()
        if not text or int(data["level"][i]) != 5:
            continue
        key = (int(data["block_num"][i]), int(data["par_num"][i]), int(data["line_num"][i]))
        lines.setdefault(key, []).append(text)
        try:
            confidences.append(float(data["conf"][i]))
        except (TypeError, ValueError):
            pass
    vocab = Vocabulary()
    for words in lines.values():
        vocab.add(" ".join(words))
    paragraphs: dict[tuple[int, int], str] = {}
    for (block, par, _line), words in sorted(lines.items()):
        paragraphs[(block, par)] = join_lines(paragraphs.get((block, par), ""), " ".join(words), vocab)
    found = [p for p in paragraphs.values() if p.strip()]
    conf = [c for c in confidences if c >= 0]
    return OcrText(
        paragraphs=found,
        words=sum(len(p.split()) for p in found),
        confidence=sum(conf) / len(conf) if conf else 0.0,
        version=str(pytesseract.get_tesseract_version()).split()[0],
    )
