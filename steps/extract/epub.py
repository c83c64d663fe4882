"""E-books (.epub, EPUB 2 and 3): one page per content file, in spine order.

META-INF/container.xml names the package document (OPF); its spine lists the content
files in reading order. Each (X)HTML content file becomes a page (page = its place
among the pages read) through html_walk, headings kept. A file the spine names more
than once is read once. The EPUB 3 navigation document (manifest property "nav") is
a table of contents: left out and listed in the first page's `removed`. Non-HTML spine
items (images, SVG) give no text. The title is the OPF's dc:title.
"""

from __future__ import annotations

import io
import posixpath
import zipfile
from urllib.parse import unquote

from lxml import etree

from .blocks import DocumentFailure, PagePart, ReaderInput, ReadResult, inline
from .html_walk import document_blocks, parse_html

_CONTAINER_NS = {"c": "urn:oasis:names:tc:opendocument:xmlns:container"}
_OPF_NS = {"opf": "http://www.idpf.org/2007/opf", "dc": "http://purl.org/dc/elements/1.1/"}
_HTML_TYPES = {"application/xhtml+xml", "text/html", "application/x-dtbook+xml"}


def _xml(data: bytes, what: str):
    parser = etree.XMLParser(resolve_entities=False, no_network=True, recover=False)
    try:
        return etree.fromstring(data, parser)
    except etree.XMLSyntaxError as exc:
        raise DocumentFailure(f"unreadable EPUB: {what} is not well-formed XML: {exc}", exc) from exc


def _html_blocks(data: bytes) -> list:
    return document_blocks(parse_html(data), within="body")


def read_epub(inp: ReaderInput) -> ReadResult:
    try:
        archive = zipfile.ZipFile(io.BytesIO(inp.data))
        container = archive.read("META-INF/container.xml")
    except KeyError as exc:
        raise DocumentFailure("unreadable EPUB: no META-INF/container.xml", exc) from exc
    except (zipfile.BadZipFile, OSError, EOFError, ValueError, NotImplementedError) as exc:
        raise DocumentFailure(f"unreadable EPUB: {type(exc).__name__}: {exc}", exc) from exc
    names = set(archive.namelist())
    if "META-INF/encryption.xml" in names and b"EncryptedData" in archive.read("META-INF/encryption.xml"):
        # Font obfuscation also uses encryption.xml; only encrypted content files lock the book.
        encrypted = archive.read("META-INF/encryption.xml")
        if b"xhtml" in encrypted or b".html" in encrypted:
            raise DocumentFailure("password protected (the book's content files are encrypted)")
    rootfile = _xml(container, "container.xml").find(".//c:rootfile", _CONTAINER_NS)
    opf_path = rootfile.get("full-path") if rootfile is not None else None
    if not opf_path or opf_path not in names:
        raise DocumentFailure("unreadable EPUB: the package document named in container.xml is missing")
    opf = _xml(archive.read(opf_path), opf_path)
    base = posixpath.dirname(opf_path)
    manifest = {}
    for item in opf.iterfind(".//opf:manifest/opf:item", _OPF_NS):
        href = posixpath.normpath(posixpath.join(base, unquote(item.get("href", "").split("#")[0])))
        manifest[item.get("id")] = (href, item.get("media-type", ""), item.get("properties", ""))
    title_node = opf.find(".//dc:title", _OPF_NS)
    title = inline(title_node.text or "") if title_node is not None else ""

    pages: list[PagePart] = []
    removed: list[dict] = []
    seen: set[str] = set()
    spine = opf.findall(".//opf:spine/opf:itemref", _OPF_NS)
    if len(spine) > inp.params.max_pages:
        raise DocumentFailure(f"too many content files: {len(spine)} over the limit of "
                              f"{inp.params.max_pages} (max_pages)")
    for ref in spine:
        entry = manifest.get(ref.get("idref"))
        if entry is None:
            continue
        href, media, props = entry
        if href in seen or media not in _HTML_TYPES:
            continue
        seen.add(href)
        if "nav" in props.split():
            removed.append({"kind": "navigation", "text": href,
                            "reason": "the book's table of contents"})
            continue
        number = len(pages) + 1
        if href not in names:
            pages.append(PagePart(page=number, failure=f"content file missing from the book: {href}"))
            continue
        try:
            blocks = _html_blocks(archive.read(href))
        except Exception as exc:  # one damaged chapter fails its page only
            pages.append(PagePart(page=number, failure=f"unreadable content file {href}: "
                                  f"{type(exc).__name__}: {exc}", error=exc))
            continue
        part = PagePart(page=number, blocks=blocks)
        if not blocks:
            part.warnings.append(f"no text in {href}")
        pages.append(part)
    if not pages:
        raise DocumentFailure("unreadable EPUB: the spine names no readable content file")
    pages[0].removed.extend(removed)
    return ReadResult(format="epub", method="epub", pages=pages, title=title,
                      page_count=len(pages))
