"""HTML and Markdown readers on the HTML and Markdown files this machine's Debian
packages ship (/usr/share/doc, gzipped ones left out), beside their parsers alone,
measured in the same run (CPU seconds, best of 2):

  - HTML: the extract step (lxml's parse, then the walk over lxml's element tree,
    steps/extract/html_walk.py) against libxml2's parse alone (lxml's HTMLParser: the
    floor) and against beautifulsoup4's tree build alone (its "lxml" builder: what the
    readers walked before stop 27, the parse alone);
  - Markdown: the extract step against markdown-it-py's parse alone.

About a minute with the documentation packages `make test` installs; the Markdown
figure is dominated by whatever large changelogs are installed.
"""

from __future__ import annotations

import time
import warnings
from pathlib import Path

DOCS = Path("/usr/share/doc")


def _files(suffixes: tuple[str, ...]) -> list[Path]:
    return [p for p in sorted(DOCS.rglob("*")) if p.suffix.lower() in suffixes and p.is_file()
            and not p.is_symlink()]


def _corpus(suffixes: tuple[str, ...], what: str):
    """(paths, bytes, text, MB) of the files with these suffixes, or None (said why)."""
    paths = _files(suffixes)
    if not paths:
        print(f"no {what} under {DOCS}")
        return None
    data = [p.read_bytes() for p in paths]
    return paths, data, [d.decode("utf-8", errors="replace") for d in data], sum(len(d) for d in data) / 1e6


def _best(run, rounds: int = 2) -> float:
    best = 1e9
    for _ in range(rounds):
        t = time.process_time()
        run()
        best = min(best, time.process_time() - t)
    return best


def _extract_all(paths: list[Path], data: list[bytes]) -> None:
    from thresher.steps.extract.step import ExtractParams, extract
    from thresher.steps.spec import StepContext
    from thresher.steps.units import Source

    params = ExtractParams()
    for p, raw in zip(paths, data):
        rel = str(p.relative_to(DOCS))
        extract(Source("bench", rel, raw, len(raw), 0.0), params, StepContext(doc_id="bench", source_path=rel))


def html() -> None:
    from bs4 import BeautifulSoup, XMLParsedAsHTMLWarning
    from lxml import etree

    corpus = _corpus((".html", ".htm", ".xhtml"), "HTML")
    if corpus is None:
        return
    paths, data, texts, mb = corpus

    def parse_only() -> None:
        for t in texts:
            parser = etree.HTMLParser(recover=True)
            parser.feed(t)
            parser.close()

    def bs4_only() -> None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", XMLParsedAsHTMLWarning)
            for t in texts:
                BeautifulSoup(t, "lxml", multi_valued_attributes=None)

    ours = _best(lambda: _extract_all(paths, data))
    floor = _best(parse_only)
    old = _best(bs4_only)
    print(f"HTML: {len(paths)} files, {mb:.1f} MB: extract step {ours:.2f} s CPU ({mb / ours:.2f} MB/s); "
          f"libxml2's parse alone {floor:.2f} s (the step is {ours / floor:.1f}x it); "
          f"beautifulsoup4's tree build alone {old:.2f} s ({old / ours:.1f}x the whole step)")


def markdown() -> None:
    from markdown_it import MarkdownIt

    corpus = _corpus((".md", ".markdown"), "Markdown")
    if corpus is None:
        return
    paths, data, texts, mb = corpus
    md = MarkdownIt("commonmark").enable("table")
    ours = _best(lambda: _extract_all(paths, data))
    parse = _best(lambda: [md.parse(t) for t in texts])
    print(f"Markdown: {len(paths)} files, {mb:.1f} MB: extract step {ours:.2f} s CPU ({mb / ours:.2f} MB/s); "
          f"markdown-it-py's parse alone {parse:.2f} s (the step is {ours / parse:.2f}x it)")


def main() -> None:
    html()
    markdown()


if __name__ == "__main__":
    main()
