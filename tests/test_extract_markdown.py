"""Markdown extraction with markdown-it-py."""

from __future__ import annotations

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import BLOCK_SEP, CODE, HEADING, OK, PARAGRAPH, TABLE, Source


def one(text: str, name: str = "minutes.md"):
    data = text.encode("utf-8")
    source = Source(doc_id="d", source_path=f"board/{name}", data=data, size=len(data), mtime=0.0)
    pages = extract(source, ExtractParams(), StepContext())
    assert len(pages) == 1
    return pages[0]


MINUTES = """\
Board Minutes
=============

Present: *five* members and the [treasurer](https://example.invalid/t).
The chair opened the meeting.

Budget
------

### Decisions ###

- Approve the **stationery** order
- Defer the van repair
  - quote expected in May
1. Publish the minutes
2. Book the hall

```python
def quorum(present):

    return present >= 4
```

    indented code line

| Item | Cost |
|------|-----:|
| Paper | 40 |
| Toner | 85 |

> Quoted from the previous minutes.

<div class="note">Raw <b>HTML</b> note</div>
<!-- a comment nobody should index -->
"""


def test_headings_paragraphs_lists_code_and_tables():
    page = one(MINUTES)
    assert page.status == OK and page.format == "markdown"
    assert page.locator == "file" and page.page is None
    assert [(b.kind, b.level, b.text) for b in page.blocks] == [
        (HEADING, 1, "Board Minutes"),  # Setext "="
        (PARAGRAPH, 0, "Present: five members and the treasurer. The chair opened the meeting."),
        (HEADING, 2, "Budget"),  # Setext "-"
        (HEADING, 3, "Decisions"),  # ATX with closing hashes
        (PARAGRAPH, 0, "- Approve the stationery order\n- Defer the van repair\n  - quote expected in May"),
        (PARAGRAPH, 0, "1. Publish the minutes\n2. Book the hall"),
        # the fence is intact; its empty line holds one space so no block separator appears
        (CODE, 0, "def quorum(present):\n \n    return present >= 4"),
        (CODE, 0, "indented code line"),
        (TABLE, 0, "Item | Cost\nPaper | 40\nToner | 85"),
        (PARAGRAPH, 0, "Quoted from the previous minutes."),
        (PARAGRAPH, 0, "Raw HTML note"),
    ]
    assert "comment nobody" not in page.text
    assert page.title == "Board Minutes"
    assert page.payload["method"] == "markdown" and page.payload["encoding"] == "utf-8"
    assert all(BLOCK_SEP not in b.text for b in page.blocks)


def test_front_matter_title_and_not_content():
    page = one("---\ntitle: \"Spring Reading Programme\"\nauthor: events team\n---\n\n# Programme\n\nTalks every Friday.\n")
    assert page.title == "Spring Reading Programme"
    assert [b.text for b in page.blocks] == ["Programme", "Talks every Friday."]
    assert "author" not in page.text


def test_thematic_break_then_text_is_not_front_matter():
    page = one("---\nJust a rule above.\n")
    assert page.text == "Just a rule above."


def test_title_falls_back_to_file_stem():
    assert one("no headings here\n", "2026-01-20-board-minutes.md").title == "2026-01-20-board-minutes"


def test_raw_html_blocks_follow_the_html_drop_rules():
    page = one("Intro line.\n\n<script>\nvar secret = 1;\n</script>\n\n<nav>Menu</nav>\n\nEnd line.\n")
    assert page.text == "Intro line.\n\nEnd line."


def test_markdown_that_shows_html_is_still_markdown():
    page = one("```html\n<html><body>example</body></html>\n```\n\nThat is a page.\n", "howto.md")
    assert page.format == "markdown"
    assert page.blocks[0].kind == CODE and page.blocks[0].text == "<html><body>example</body></html>"


def test_a_link_keeps_its_text_and_drops_its_target_whatever_the_target_holds():
    # Targets as written in changelogs and wikis: non-ASCII, spaces in angle brackets,
    # percent signs, a reference link; and one with a scheme markdown-it refuses
    # (CommonMark's own rule, markdown-it-py's validateLink), left as the text it was.
    page = one("See [Straße](https://example.invalid/Straße?q=a+b), [the rota](<rota 2026.md>), "
               "[50 %](https://example.invalid/%zz) and [minutes][m].\n\n"
               "[m]: https://example.invalid/minutes\n\n"
               "Not a link: [click](javascript:alert(1)).\n")
    assert [b.text for b in page.blocks] == [
        "See Straße, the rota, 50 % and minutes.",
        "Not a link: [click](javascript:alert(1)).",
    ]


def test_plain_and_marked_up_paragraphs_give_the_same_kind_of_text():
    # Paragraphs with no inline markup skip markdown-it's inline parse (markdown.py
    # _mark_plain); each kind of markup still goes through it.
    page = one("# Rota for May\n\n"
               "Line one  \n   line two\twith a tab\nand a third line.\n\n"
               "The *mobile* library visits on `Tuesdays`.\n\n"
               "Tea &amp; biscuits at the **hall**_s_ door.\n\n"
               "Escaped \\*stars\\* and an <https://example.invalid/rota> link.\n")
    assert [(b.kind, b.text) for b in page.blocks] == [
        (HEADING, "Rota for May"),
        (PARAGRAPH, "Line one line two with a tab and a third line."),
        (PARAGRAPH, "The mobile library visits on Tuesdays."),
        (PARAGRAPH, "Tea & biscuits at the halls door."),
        (PARAGRAPH, "Escaped *stars* and an https://example.invalid/rota link."),
    ]


def test_link_targets_end_where_markdown_its_own_parser_ends_them():
    # Reference: markdown-it-py's parseLinkDestination (PyPI markdown-it-py), which the
    # reader replaces for targets without angle brackets (markdown.link_destination).
    # Seeded random strings of the characters it acts on (spaces, controls, backslash
    # escapes, brackets, angle brackets, line breaks) among ordinary and non-ASCII ones,
    # at random start and end positions, and brackets nested 32 and 33 deep (its limit).
    import random

    from markdown_it import helpers

    from thresher.steps.extract.markdown import link_destination

    def same(string: str, pos: int, maximum: int) -> None:
        want = helpers.parseLinkDestination(string, pos, maximum)
        got = link_destination(string, pos, maximum)
        assert (got.ok, got.pos, got.str) == (want.ok, want.pos, want.str), (string, pos, maximum)

    rng = random.Random(11)
    pieces = list("ab( )\\<>\n\x00\x1f\x7f\t\u00a0é.:/#%&") + ["\\ ", "\\(", "\\)", "((", "))", "&amp;"]
    ended = 0
    for _ in range(20_000):
        string = "".join(rng.choice(pieces) for _ in range(rng.randint(0, 30)))
        pos = rng.randint(0, len(string))
        maximum = rng.randint(pos, len(string))
        same(string, pos, maximum)
        ended += helpers.parseLinkDestination(string, pos, maximum).ok
    assert ended > 2_000
    for depth in (32, 33):
        target = "(" * depth + "x" + ")" * depth + " tail"
        same(target, 0, len(target))
        same("\\" + target, 0, len(target) + 1)
