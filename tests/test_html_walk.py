"""The HTML readers' tree (steps/extract/html_walk.py parse_html, libxml2's HTML parser
through lxml) against beautifulsoup4's on the same files: the same elements with the
same attributes and the same strings in the same order, comments and processing
instructions left out. Reference: beautifulsoup4 with its "lxml" builder (PyPI), whose
tree the readers walked before; documents: the HTML manuals Debian ships in
debian-policy (Sphinx output) and libxslt1-dev (gtk-doc output), which `make test`
installs."""

from __future__ import annotations

import glob
import os
import warnings

import pytest
from bs4 import BeautifulSoup, NavigableString, Tag, XMLParsedAsHTMLWarning
from bs4.element import PreformattedString

from thresher.steps.extract.html_walk import parse_html, top_elements

MANUALS = sorted(p for p in glob.glob("/usr/share/doc/debian-policy/**/*.html", recursive=True)
                 + glob.glob("/usr/share/doc/libxslt1-dev/**/*.html", recursive=True) if os.path.isfile(p))


def _attrs(attrs) -> dict:
    """An attribute written without a value (<p hidden>) is "" in one tree and its own
    name in the other; the walk only asks whether such an attribute is there."""
    return {k: "" if v in ("", k) else v for k, v in attrs.items()}


def _bs4_events(children, out: list) -> list:
    for child in children:
        if isinstance(child, Tag):
            out.append(("start", child.name, _attrs(child.attrs)))
            _bs4_events(child.children, out)
            out.append(("end", child.name))
        elif isinstance(child, NavigableString) and not isinstance(child, PreformattedString):
            out.append(("text", str(child)))
    return out


_ASCII_SPACES = frozenset("\x20\x0a\x09\x0c\x0d")


def _as_bs4_keeps(text: str, preserved: bool) -> str:
    """beautifulsoup4's own rule (BeautifulSoup.endData): outside <pre> and <textarea> a
    string of ASCII spaces only becomes one newline or one space. The walk collapses
    whitespace itself, so this changes no block."""
    if preserved or not set(text) <= _ASCII_SPACES:
        return text
    return "\n" if "\n" in text else " "


def _lxml_events(el, out: list, preserved: bool = False) -> list:
    out.append(("start", el.tag, _attrs(el.attrib)))
    inside = preserved or el.tag in ("pre", "textarea")
    if el.text:
        out.append(("text", _as_bs4_keeps(el.text, inside)))
    for child in el:
        if isinstance(child.tag, str):
            _lxml_events(child, out, inside)
        if child.tail:
            out.append(("text", _as_bs4_keeps(child.tail, inside)))
    out.append(("end", el.tag))
    return out


def _merged(events: list) -> list:
    """Adjacent strings as one (a comment between two strings leaves two in one tree)."""
    out: list = []
    for e in events:
        if e[0] == "text" and out and out[-1][0] == "text":
            out[-1] = ("text", out[-1][1] + e[1])
        else:
            out.append(e)
    return out


def _reference(markup: str | bytes) -> list:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", XMLParsedAsHTMLWarning)
        soup = BeautifulSoup(markup, "lxml", multi_valued_attributes=None)
    # Outside the root element there are only the line breaks around it (libxml2 moves
    # any text into the body); lxml's tree does not hold them.
    top = [c for c in soup.children if not (isinstance(c, NavigableString) and not c.strip())]
    return _merged(_bs4_events(top, []))


def _ours(markup: str | bytes) -> list:
    out: list = []
    for top in top_elements(parse_html(markup)):
        _lxml_events(top, out)
    return _merged(out)


@pytest.mark.skipif(not MANUALS, reason="the debian-policy and libxslt1-dev HTML manuals are not installed")
def test_the_tree_is_beautifulsoup4s_on_the_html_manuals_debian_ships():
    assert len(MANUALS) >= 100
    for path in MANUALS:
        data = open(path, "rb").read()
        text = data.decode("utf-8", errors="replace")  # as a reader gets text (one file here is Latin-1)
        assert _ours(text) == _reference(text), path
        # Bytes (as an EPUB's files come) are decoded the way beautifulsoup4 decodes them.
        assert _ours(data) == _reference(data), path


def test_the_tree_is_beautifulsoup4s_on_broken_and_odd_markup():
    # Invented pages of a fictional library service, broken the ways exported pages are.
    pages = [
        "",
        "   ",
        "plain text, no markup at all",
        "<p>Opening <b>hours<p>Mon&nbsp;&ndash;&nbsp;Fri</b> 9&ndash;17",
        "<table><tr><td>Van<td>Tuesday<tr><td>Hall</table><li>stray item",
        "<ul><li>Renewals<ul><li>online</ul>after</li>loose text</ul>",
        "<!DOCTYPE html><!-- export --><html><head><title>Rota</title></head>"
        "<body><pre>a<!-- note -->b<?pi x?>c</pre><script>var x = '<p>';</script></body></html>",
        '<?xml version="1.0" encoding="utf-8"?><html xmlns="http://www.w3.org/1999/xhtml">'
        '<body><p class="a b" hidden>Hidden</p><p>Straße</p></body></html>',
        "<div>unclosed <span>spans <i>and <u>more",
        # Text and elements after </html>, as a week's edit appends them.
        "<html><body><p>Rota</p></body></html>\n\nA note added this week.\n",
        "<html><body><p>Rota</p></body></html><!-- c --><p>Added</p> and more",
    ]
    for page in pages:
        assert _ours(page) == _reference(page), page
    # Windows-1252 bytes with no declared encoding: both fall back to it.
    data = "<p>Caf\u00e9 \u2013 \u201cquiet room\u201d</p>".encode("cp1252")
    assert _ours(data) == _reference(data)


@pytest.mark.skipif(not MANUALS, reason="the debian-policy and libxslt1-dev HTML manuals are not installed")
def test_the_tree_is_beautifulsoup4s_on_cut_and_spliced_manuals():
    """Pages broken the ways exports and edits break them: cut anywhere, with a stray
    tag, an unclosed element or text after </html> spliced in (seeded, so a failure
    repeats)."""
    import random

    rng = random.Random(20261204)
    splices = ["</html>", "</html>\nadded text", "<p>", "</td>", "<table><tr><td>", "</li>",
               "<!-- cut", "]]>", "<?php echo 1 ?>", "&nbsp", "<pre>", "</body><p>late"]
    pages = [open(p, "rb").read().decode("utf-8", errors="replace") for p in rng.sample(MANUALS, 12)]
    for k in range(400):
        page = rng.choice(pages)
        start = rng.randrange(len(page))
        end = min(len(page), start + rng.randrange(200, 6000))
        at = rng.randrange(start, end)
        markup = page[start:at] + rng.choice(splices) + page[at:end]
        assert _ours(markup) == _reference(markup), (k, markup[:300])


def test_permalink_and_bar_checks_read_a_bounded_prefix():
    # An unclosed link can hold the rest of the page; both checks stop early instead of
    # reading it all for each of many nested links (hundreds of nested "§" links over
    # 1.2 MB of text took 3.6 s before, 0.1 s now: a scratch timing of extract).
    from thresher.steps.extract.html_walk import PERMALINK_CHARS, _permalink, _text_within, parse_html

    root = parse_html("<html><body><a href='#x'>" + "\u00a7" * (PERMALINK_CHARS + 1) + "</a>"
                      "<a href='#y'>\u00b6</a><p>" + "word " * 1000 + "</p></body></html>")
    long_signs, pilcrow = root.iter("a")
    assert not _permalink(long_signs) and _permalink(pilcrow)
    paragraph = next(root.iter("p"))
    assert _text_within(paragraph, 10_000) and not _text_within(paragraph, 100)
