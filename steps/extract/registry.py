"""Which reader reads which sniffed format: one line per format.

A reader is a function `read(ReaderInput) -> ReadResult` in a module of this package.
Adding a format means adding its module and one line below (and, if sniffing does not
know it yet, teaching sniff.py its signature). Readers are imported on first use, so a
run that meets only text files never loads the PDF or Office libraries.
"""

from __future__ import annotations

import importlib
from typing import Callable

from .blocks import DocumentFailure, ReaderInput, ReadResult

# sniffed format -> (reader module in this package, function name, the page's default method)
READERS: dict[str, tuple[str, str, str]] = {
    "pdf": ("pdf", "read_pdf", "text-layer"),
    "html": ("html", "read_html", "html"),
    "markdown": ("markdown", "read_markdown", "markdown"),
    "text": ("text", "read_text", "plain"),
    "docx": ("docx", "read_docx", "docx"),
    "xlsx": ("spreadsheet", "read_xlsx", "xlsx"),
    "xls": ("spreadsheet", "read_xls", "xls"),
    "ods": ("spreadsheet", "read_ods", "ods"),
    "pptx": ("pptx", "read_pptx", "pptx"),
    "odp": ("odp", "read_odp", "odp"),
    "odt": ("odt", "read_odt", "odt"),
    "epub": ("epub", "read_epub", "epub"),
    "rtf": ("rtf", "read_rtf", "rtf"),
    "image": ("image", "read_image", "ocr"),
    "zip": ("archive", "read_zip", "archive"),
    "tar": ("archive", "read_tar", "archive"),
    "email": ("mail", "read_eml", "email"),
    "mbox": ("mail", "read_mbox", "mbox"),
}

# Formats that LibreOffice converts first (office_convert.py), and the format whose
# reader then reads the converted file.
CONVERTED: dict[str, str] = {"doc": "docx", "ppt": "pptx"}

# The method a failed document of a format is labelled with.
METHODS = {fmt: method for fmt, (_, _, method) in READERS.items()}
METHODS.update({fmt: f"libreoffice+{target}" for fmt, target in CONVERTED.items()})

Reader = Callable[[ReaderInput], ReadResult]


def reader_for(fmt: str) -> Reader:
    """The reader for a sniffed format; DocumentFailure when none reads it."""
    entry = READERS.get(fmt)
    if entry is None:
        raise DocumentFailure(f"unsupported format: {fmt}")
    module, name, _ = entry
    return getattr(importlib.import_module(f"{__package__}.{module}"), name)


def reader_modules() -> list[str]:
    """Every reader module's import name (for warming a worker process)."""
    return [f"{__package__}.{module}" for module, _, _ in READERS.values()]
