"""Files that are not documents: web assets and machine data, recognised by name and
bytes, and skipped (status `skipped`, with the reason) unless the flow takes their
kind back in (`ExtractParams.read_kinds`).

Why: on a drive of documentation trees, scripts (a site's search index among them),
stylesheets, fonts and JSON gave 15 % of all tokens and no answers. Images are not
here: they are read by OCR when it is on (image.py).
"""

from __future__ import annotations

import re

# kind -> file name extensions (lower case, no dot)
KINDS: dict[str, tuple[str, ...]] = {
    "stylesheet": ("css", "scss", "sass", "less"),
    "script": ("js", "mjs", "cjs", "ts", "jsx", "tsx", "coffee"),
    "source map": ("map",),
    "font": ("woff", "woff2", "ttf", "otf", "eot", "pfb", "pfa", "afm"),
    "data": ("json", "jsonl", "ndjson", "geojson", "xml", "yaml", "yml", "toml", "xsd",
             "dtd", "rdf", "svg"),
    "search index": ("idx", "inv"),
    "executable": ("exe", "dll", "so", "dylib", "bin", "class", "jar", "pyc", "pyo", "o",
                   "a", "wasm", "com", "msi"),
}
# Search indexes written as scripts or data by site generators (Sphinx's
# searchindex.js, many generators' search_index.json / search-index.js).
_SEARCH_INDEX = re.compile(r"^(searchindex|search[_-]?index|lunr[_-]?index)\.(js|json)$", re.I)
_EXECUTABLE_MAGIC = ((b"\x7fELF", "ELF"), (b"MZ", "Windows"), (b"\xca\xfe\xba\xbe", "Java/Mach-O"),
                     (b"\xcf\xfa\xed\xfe", "Mach-O"), (b"\x00asm", "WebAssembly"))
_FONT_MAGIC = (b"wOFF", b"wOF2", b"\x00\x01\x00\x00\x00", b"OTTO")
_BY_EXTENSION = {ext: kind for kind, exts in KINDS.items() for ext in exts}


def kind_of(name: str, ext: str, data: bytes) -> str:
    """The non-document kind of a file ("" when it may be a document)."""
    if _SEARCH_INDEX.match(name):
        return "search index"
    for magic, _ in _EXECUTABLE_MAGIC:
        if data.startswith(magic) and (magic != b"MZ" or b"PE\x00\x00" in data[:1024]):
            return "executable"
    if data.startswith(_FONT_MAGIC) and ext in KINDS["font"]:
        return "font"
    return _BY_EXTENSION.get(ext, "")


def reason(kind: str, ext: str) -> str:
    return (f"not a document: {kind} (.{ext}); add {kind!r} to extract's read_kinds to read "
            "such files" if ext else f"not a document: {kind}; add {kind!r} to extract's "
            "read_kinds to read such files")
