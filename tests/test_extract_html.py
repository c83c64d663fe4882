"""HTML extraction: what is dropped, what is kept, and how the charset is found."""

from __future__ import annotations

import codecs

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import BLOCK_SEP, CODE, HEADING, OK, PARAGRAPH, TABLE, Source


def one(data: bytes | str, name: str = "page.html"):
    if isinstance(data, str):
        data = data.encode("utf-8")
    source = Source(doc_id="d", source_path=f"intranet/{name}", data=data, size=len(data), mtime=0.0)
    pages = extract(source, ExtractParams(), StepContext())
    assert len(pages) == 1
    return pages[0]


INTRANET = """<!DOCTYPE html>
<html lang="en">
<head>
  <meta charset="utf-8">
  <title>Volunteer Rota | Quillfern Intranet</title>
  <style>body { font-family: serif; } .secret { color: red }</style>
  <script>var trackingCode = "do-not-index";</script>
</head>
<body>
  <header><a href="/">Quillfern Intranet home</a> <span>Signed in as volunteer</span></header>
  <nav><ul><li><a href="/rota">Rota</a></li><li><a href="/news">News menu link</a></li></ul></nav>
  <main>
    <article>
      <header><h1>Volunteer   Rota</h1><p>Updated weekly by the branch coordinators.</p></header>
      <p>Shifts run from <b>nine</b> to <em>noon</em> and from noon to three.<br>
         Swap shifts on the board.</p>
      <h2>Who to call</h2>
      <ul>
        <li>Front desk: extension 12</li>
        <li>Duty coordinator
          <ul><li>weekdays: Ana</li><li>weekends: Bo</li></ul>
        </li>
      </ul>
      <ol start="3"><li>Sign in.</li><li>Collect the keys.</li></ol>
      <h3>Shift table</h3>
      <table>
        <tbody><tr><td>Monday</td><td>Ana</td><td>Bo</td></tr>
               <tr><td>Tuesday</td><td colspan="2">Cy</td></tr></tbody>
        <thead><tr><th>Day</th><th>Morning</th><th>Afternoon</th></tr></thead>
      </table>
      <pre><code>rota --week 12
  --branch east

  --print</code></pre>
      <div hidden>Hidden draft text.</div>
      <p style="display: none">Invisible note.</p>
      <form><label>Search the intranet</label><input name="q"></form>
      <footer>Article footer: reviewed in March.</footer>
    </article>
    <aside>Related links sidebar</aside>
  </main>
  <div role="contentinfo">Landmark footer text</div>
  <footer>Site footer: Quillfern Library Cooperative</footer>
  <noscript>Enable scripts please</noscript>
</body>
</html>
"""


def test_drops_chrome_and_keeps_content_in_order():
    page = one(INTRANET)
    assert page.status == OK and page.format == "html"
    assert page.title == "Volunteer Rota | Quillfern Intranet"
    blocks = [(b.kind, b.level, b.text) for b in page.blocks]
    assert blocks == [
        (HEADING, 1, "Volunteer Rota"),
        (PARAGRAPH, 0, "Updated weekly by the branch coordinators."),
        (PARAGRAPH, 0, "Shifts run from nine to noon and from noon to three.\nSwap shifts on the board."),
        (HEADING, 2, "Who to call"),
        (PARAGRAPH, 0, "- Front desk: extension 12\n- Duty coordinator\n  - weekdays: Ana\n  - weekends: Bo"),
        (PARAGRAPH, 0, "3. Sign in.\n4. Collect the keys."),
        (HEADING, 3, "Shift table"),
        # thead first although the source has it after tbody; colspan leaves an empty cell
        (TABLE, 0, "Day | Morning | Afternoon\nMonday | Ana | Bo\nTuesday | Cy | "),
        (CODE, 0, "rota --week 12\n  --branch east\n \n  --print"),
        (PARAGRAPH, 0, "Article footer: reviewed in March."),
    ]
    text = page.text
    for absent in ("trackingCode", "do-not-index", "font-family", "News menu link",
                   "Quillfern Intranet home", "Signed in as", "Hidden draft", "Invisible note",
                   "Search the intranet", "Related links", "Landmark footer", "Site footer",
                   "Enable scripts"):
        assert absent not in text, absent
    assert page.payload["method"] == "html" and page.payload["encoding"] == "utf-8"
    table = next(b for b in page.blocks if b.kind == TABLE)
    assert page.payload["table_share"] == len(table.text) / len(text)
    assert all(BLOCK_SEP not in b.text for b in page.blocks)


def test_layout_table_is_read_as_blocks():
    page = one("<html><body><table><tr><td><h2>Notice</h2><p>Roof repairs this week.</p>"
               "</td></tr></table></body></html>")
    assert [(b.kind, b.text) for b in page.blocks] == [
        (HEADING, "Notice"), (PARAGRAPH, "Roof repairs this week.")]


def test_title_falls_back_to_first_heading_then_file_stem():
    assert one("<html><body><h2>Branch news</h2><p>x</p></body></html>").title == "Branch news"
    assert one("<html><body><p>Only words.</p></body></html>", "branch-news.html").title == "branch-news"


def test_meta_charset_windows_1252():
    html = '<html><head><meta charset="windows-1252"><title>Caf\xe9</title></head>' \
           "<body><p>\u201eLeihfristen\u201c kosten 2\u20ac.</p></body></html>"
    page = one(html.encode("cp1252"))
    assert page.payload["encoding"] == "cp1252"
    assert page.title == "Café"
    assert page.text == "\u201eLeihfristen\u201c kosten 2\u20ac."


def test_meta_iso_8859_1_decodes_as_windows_1252():
    # WHATWG Encoding Standard: the label "iso-8859-1" means windows-1252, so byte 0x80
    # is the euro sign, as every browser shows it.
    html = b'<html><head><meta http-equiv="Content-Type" content="text/html; charset=iso-8859-1">' \
           b"</head><body><p>Fee: 5\x80, caf\xe9</p></body></html>"
    page = one(html)
    assert page.text == "Fee: 5\u20ac, café"
    assert page.payload["encoding"] == "cp1252"


def test_bom_wins_over_meta():
    html = codecs.BOM_UTF8 + '<html><head><meta charset="iso-8859-1"></head><body><p>Grüße</p></body></html>'.encode()
    page = one(html)
    assert page.text == "Grüße" and page.payload["encoding"] == "utf-8"


def test_no_declaration_falls_back_to_detection():
    html = "<html><body><p>Читатели могут брать до шести книг одновременно, "\
           "а просроченные книги нужно вернуть в течение недели.</p></body></html>"
    page = one(html.encode("cp1251"))
    assert page.payload["encoding"] == "cp1251"
    assert "просроченные" in page.text


def test_fragment_with_html_extension():
    page = one(b"<h3>Lost property</h3><p>Ask at the <i>front</i> desk.</p>", "lost.htm")
    assert page.format == "html"
    assert [(b.kind, b.level, b.text) for b in page.blocks] == [
        (HEADING, 3, "Lost property"), (PARAGRAPH, 0, "Ask at the front desk.")]


def test_page_without_visible_content():
    page = one("<html><head><title>Empty</title></head><body><script>x()</script></body></html>")
    assert page.status == OK and page.blocks == []
    assert page.warnings == ["no text (the page has no visible content)"]


def test_text_after_the_closing_html_tag_is_kept():
    # A page a script or a person appended to after </html>: browsers show that text, and
    # libxml2 puts it in an <html> element of its own after the first.
    page = one("<html><head><title>Rota</title></head><body><h1>Rota</h1><p>Tuesday: Ann.</p></body></html>"
               "\n\nA note added this week: the review moves to Thursday.\n<p>Second note.</p>")
    assert page.title == "Rota"
    assert [(b.kind, b.text) for b in page.blocks] == [
        (HEADING, "Rota"), (PARAGRAPH, "Tuesday: Ann."),
        (PARAGRAPH, "A note added this week: the review moves to Thursday."), (PARAGRAPH, "Second note."),
    ]


def test_deep_nesting_is_read_or_fails_the_page_never_dropped_in_silence():
    # libxml2 keeps 256 levels unless told otherwise and drops what is deeper, and what
    # follows it, without a word; generated pages nest that deep. 300 levels are read.
    page = one("<div>" * 300 + "Deep notice." + "</div>" * 300 + "<p>After the nest.</p>")
    assert page.status == OK
    assert [b.text for b in page.blocks] == ["Deep notice.", "After the nest."]
    # Far deeper than any page needs: the page fails with a reason, it is not "ok, empty".
    page = one("<div>" * 50000 + "lost")
    assert page.status == "failed"
    assert page.reason == ("could not extract HTML: NestedTooDeep: elements nested too deep to read "
                           "(hundreds of levels, one inside another; pages people write nest a few dozen)")


def test_heading_permalinks_are_not_text():
    # Sphinx ends each heading with a permalink "¶" (Debian's policy manual, package
    # debian-policy, as Sphinx wrote it); rustdoc puts "§" before its item headings.
    # Links to a place in the page with words in them stay.
    from pathlib import Path

    sphinx = Path("/usr/share/doc/debian-policy/policy.html/ch-scope.html")
    page = one(sphinx.read_bytes(), "ch-scope.html")
    headings = [b.text for b in page.blocks if b.kind == HEADING]
    assert headings[:2] == ["1. About this manual", "1.1. Scope"]
    assert "\u00b6" not in page.text
    page = one('<section id="impl-Clone"><a class="src" href="../src/lib.rs.html#4">Source</a>'
               '<a href="#impl-Clone" class="anchor">\u00a7</a><h3>impl Clone for Shelf</h3></section>'
               '<p>Copies a shelf; see <a href="#impl-Clone">the impl</a> and <a href="#top">#</a>.</p>')
    assert page.text == "Source\n\nimpl Clone for Shelf\n\nCopies a shelf; see the impl and ."


def test_prev_next_bars_of_docbook_and_texinfo_pages_are_not_text():
    # DocBook's bar (the Debian FAQ, package debian-faq: Prev / Next links with
    # keyboard shortcuts in a table) and Texinfo's ("Next: ..., Previous: ..., Up: ...
    # [Index]", libffi's manual, package libffi-dev: rel links in a paragraph) stood
    # first (and last) on every page of such manuals.
    from pathlib import Path

    faq = one(Path("/usr/share/doc/debian/FAQ/basic-defs.en.html").read_bytes(), "basic-defs.en.html")
    assert faq.blocks[0].kind == HEADING and faq.blocks[0].text == "Chapter 1. Definitions and overview"
    assert not any(b.kind == TABLE and "Next" in b.text for b in faq.blocks)
    ffi = one(Path("/usr/share/doc/libffi8/html/Introduction.html").read_bytes(), "Introduction.html")
    assert ffi.blocks[0].text == "1 What is libffi?"
    assert "Previous:" not in ffi.text
    # A sentence that links to the next page, and a data table of links, stay.
    page = one('<p>Read <a href="b.html" rel="next">the next part</a> after this one, it explains loans.</p>'
               '<table><tr><th>Branch</th><th>Page</th></tr><tr><td>North</td><td><a href="n.html">n</a></td></tr>'
               '<tr><td>South</td><td><a href="s.html">s</a></td></tr></table>')
    assert page.text.startswith("Read the next part after this one") and "North | n" in page.text
