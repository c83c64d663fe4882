"""The clean step: normalisation, invisible characters, whitespace, empty pages."""

from __future__ import annotations

import unicodedata

import pydantic
import pytest

from thresher.steps.clean import CLEAN, CleanParams, clean
from thresher.steps.units import CODE, DROPPED, HEADING, OK, PARAGRAPH, TABLE, Block, Page


def page(*blocks, locator="page/1", number=1):
    return Page(locator=locator, page=number, blocks=list(blocks), title="Loan rules",
                format="pdf")


def run(*blocks, **params):
    [out] = clean([page(*blocks)], CleanParams(**params))
    return out


def test_nfkc_folds_the_fi_ligature():
    # U+FB01 LATIN SMALL LIGATURE FI has the compatibility decomposition <compat> 0066
    # 0069 in the Unicode Character Database (UnicodeData.txt), so NFKC gives "fi".
    out = run(Block(PARAGRAPH, "Pro\ufb01le of the \ufb01rst branch"))
    assert out.text == "Profile of the first branch"
    assert out.payload["fixes"] == {"unicode_normalization": 2}
    # NFKC lengthened the text, so nothing counts as removed.
    assert out.payload["chars_removed"] == 0


def test_nfc_keeps_the_ligature_but_composes_accents():
    out = run(Block(PARAGRAPH, "\ufb01 cafe\u0301"), normalization="NFC")
    assert out.text == "\ufb01 caf\u00e9"
    assert out.payload["fixes"] == {"unicode_normalization": 1}


def test_none_leaves_normalisation_alone():
    out = run(Block(PARAGRAPH, "\ufb01le"), normalization="none")
    assert out.text == "\ufb01le"
    assert "unicode_normalization" not in out.payload["fixes"]


def test_zero_width_and_soft_hyphens_are_removed_and_counted():
    text = "\ufeffQuill\u200bfern co\u00adop\u00aderative\u200d lends\u2060 books\u200c."
    out = run(Block(PARAGRAPH, text))
    assert out.text == "Quillfern cooperative lends books."
    assert out.payload["fixes"] == {"zero_width": 5, "soft_hyphens": 2}
    assert out.payload["chars_removed"] == 7
    # Share of the non-space characters (the page has 4 spaces).
    assert out.payload["removed_share"] == pytest.approx(7 / (len(text) - 3))
    assert out.payload["heavy_removal"] is False
    assert out.warnings == []


def test_zero_width_removal_lets_a_mark_compose():
    # e + ZWSP + combining acute: once the ZWSP is gone NFKC composes U+00E9.
    out = run(Block(PARAGRAPH, "Caf" + "e\u200b\u0301"))
    assert out.text == "Caf\u00e9"


def test_control_characters_go_but_tabs_and_newlines_stay_meaningful():
    out = run(Block(PARAGRAPH, "Opening\x07 hours\x00:\r\nMonday\tto\x1b Friday\x7f"))
    assert out.text == "Opening hours:\nMonday to Friday"
    assert out.payload["fixes"]["control_chars"] == 4
    assert out.payload["fixes"]["line_breaks"] == 1


def test_whitespace_runs_collapse_and_lines_are_trimmed():
    out = run(Block(PARAGRAPH, "  The   reading\u00a0room \t is\n\n   open   late.  "))
    assert out.text == "The reading room is\nopen late."
    assert "\n\n" not in out.blocks[0].text


def test_code_keeps_indentation_and_lines():
    code = "def due_date(loan):  \n\n    days = 21\t \n    return loan.start + days   "
    out = run(Block(CODE, code))
    assert out.blocks[0].text == "def due_date(loan):\n    days = 21\n    return loan.start + days"
    assert out.blocks[0].kind == CODE


def test_heading_becomes_one_line_and_keeps_its_level():
    out = run(Block(HEADING, "Members'\n  handbook ", level=2), Block(PARAGRAPH, "Text."))
    assert out.blocks[0] == Block(HEADING, "Members' handbook", 2)


def test_table_rows_and_cells_survive():
    table = "Branch  | Opens\nNorth   | 09:00\n\nSouth | 10:00"
    out = run(Block(TABLE, table))
    assert out.blocks[0].text == "Branch | Opens\nNorth | 09:00\nSouth | 10:00"


def test_empty_blocks_are_dropped_and_page_text_stays_block_joined():
    out = run(Block(HEADING, "Fees", 1), Block(PARAGRAPH, " \u200b "), Block(PARAGRAPH, "None."))
    assert [b.text for b in out.blocks] == ["Fees", "None."]
    assert out.text == "Fees\n\nNone."
    assert out.payload["fixes"]["empty_blocks"] == 1


def test_all_control_page_is_dropped_with_a_reason():
    out = run(Block(PARAGRAPH, "\x00\x01\x02\x03\x1b\x7f" * 5))
    assert out.status == DROPPED
    assert out.reason.startswith("no text left after cleaning")
    assert "30 characters" in out.reason
    assert out.blocks == []
    assert out.payload["removed_share"] == 1.0 and out.payload["heavy_removal"] is True
    assert out.warnings and "100%" in out.warnings[0]


def test_heavy_removal_warns_but_keeps_the_page():
    text = "Due dates" + "\u200b" * 20
    out = run(Block(PARAGRAPH, text))
    assert out.status == OK and out.text == "Due dates"
    assert out.payload["removed_share"] == pytest.approx(20 / 28)  # 28 non-space characters
    assert out.payload["heavy_removal"] is True
    assert len(out.warnings) == 1 and "max_removed_share 50%" in out.warnings[0]
    # With a higher threshold there is no warning and no flag.
    relaxed = run(Block(PARAGRAPH, text), max_removed_share=0.9)
    assert relaxed.warnings == [] and relaxed.payload["heavy_removal"] is False


def test_collapsing_spaces_is_not_text_loss():
    # Aligned columns in a plain-text file: most characters are spaces.
    text = "Branch" + " " * 40 + "Opens\nNorth" + " " * 41 + "09:00"
    out = run(Block(PARAGRAPH, text))
    assert out.text == "Branch Opens\nNorth 09:00"
    assert out.payload["chars_removed"] == 79 and out.payload["fixes"] == {"whitespace": 79}
    assert out.payload["removed_share"] == 0.0 and out.warnings == []


def test_page_identity_and_lineage():
    src = page(Block(PARAGRAPH, "Text."), locator="page/4", number=4)
    [out] = clean([src], CleanParams())
    assert (out.locator, out.page, out.title, out.format) == ("page/4", 4, "Loan rules", "pdf")
    assert out.parents == ["page/4"]
    assert src.blocks[0].text == "Text."  # input untouched


def test_output_is_normalised_and_has_no_invisible_characters():
    # Every kind of character the step promises to handle, in one block.
    text = "A\u00a0\ufb01\u00ad\u200b\u2028B\x0cC\x85D\u3000E\ufeff"
    out = run(Block(PARAGRAPH, text))
    assert unicodedata.is_normalized("NFKC", out.text)
    assert not any(ch in out.text for ch in "\u00ad\u200b\u200c\u200d\u2060\ufeff")
    assert not any(unicodedata.category(ch) == "Cc" and ch not in "\n\t" for ch in out.text)
    assert out.text == "A fi\nB\nC\nD E"


def test_params_are_checked():
    with pytest.raises(pydantic.ValidationError):
        CleanParams(normalization="NFX")
    with pytest.raises(pydantic.ValidationError):
        CleanParams(max_removed_share=1.5)
    with pytest.raises(pydantic.ValidationError):
        CleanParams(strip_html=True)  # unknown key
    assert (CLEAN.name, CLEAN.consumes, CLEAN.produces, CLEAN.scope) == (
        "clean", "pages", "pages", "document")


# -- mojibake (ftfy) -----------------------------------------------------------


def test_mojibake_is_repaired_and_counted():
    # UTF-8 read as Latin-1 / windows-1252, once and twice.
    out = run(Block(PARAGRAPH, "Caf\u00c3\u00a9 opens at nine"),
              Block(PARAGRAPH, "The branch doesn\u00c3\u00a2\u00e2\u201a\u00ac\u00e2\u201e\u00a2t close"))
    assert [b.text for b in out.blocks] == ["Café opens at nine", "The branch doesn\u2019t close"]
    assert out.payload["fixes"] == {"mojibake": 2}
    # A repair is not a removal: nothing of the text was lost.
    assert out.payload["chars_removed"] == 0 and out.payload["removed_share"] == 0.0


def test_windows_1252_punctuation_read_as_c1_controls_is_restored():
    # 0x93/0x94 are curly quotes in windows-1252 but C1 controls in Latin-1; without
    # the repair they would be removed as control characters.
    text = "Ask for the \x93quiet room\x94 key"
    assert run(Block(PARAGRAPH, text)).text == "Ask for the \u201cquiet room\u201d key"
    off = run(Block(PARAGRAPH, text), repair_mojibake=False)
    assert off.text == "Ask for the quiet room key"
    assert off.payload["fixes"] == {"control_chars": 2}


def test_mojibake_holding_a_soft_hyphen_byte_is_repaired_before_removals():
    # "í" is C3 AD in UTF-8; read as Latin-1 the second byte is a soft hyphen.
    assert run(Block(PARAGRAPH, "Mart\u00c3\u00adn runs the desk")).text == "Martín runs the desk"


def test_ftfy_does_not_normalise_or_change_correct_text():
    # Ligatures, full-width letters, curly quotes, HTML entities and accents are left to
    # the step's own rules (or left alone): with normalisation off they all survive.
    text = "\ufb01le \uff26\uff35\uff2c\uff2c \u201cquoted\u201d &amp; M\u00fcller l\u2019\u00e9t\u00e9"
    out = run(Block(PARAGRAPH, text), normalization="none")
    assert out.text == text
    assert out.payload["fixes"] == {}


def test_terminal_escapes_are_removed_whole():
    out = run(Block(CODE, "\x1b[1;31mERROR\x1b[0m overdue list failed"))
    assert out.text == "ERROR overdue list failed"
    assert out.payload["fixes"] == {"terminal_escapes": 11}
    assert out.payload["chars_removed"] == 11


# -- de-hyphenation ------------------------------------------------------------


def test_line_end_hyphen_joins_the_word():
    out = run(Block(PARAGRAPH, "The Quillfern coop-\nerative lends books to every-\none."))
    assert out.text == "The Quillfern cooperative lends books to everyone."
    assert out.payload["fixes"] == {"dehyphenated": 2}
    assert out.payload["chars_removed"] == 4  # two hyphens, two line breaks


def test_hyphen_is_kept_when_the_document_spells_the_word_with_it():
    # "non-members" appears on another page on one line, "nonmembers" nowhere.
    pages = [page(Block(PARAGRAPH, "Fees for non-\nmembers are listed below."), locator="page/1"),
             page(Block(PARAGRAPH, "Non-members pay two euros."), locator="page/2", number=2)]
    out = clean(pages, CleanParams())
    assert out[0].text == "Fees for non-members are listed below."
    assert out[0].payload["fixes"] == {"dehyphenated": 1}


def test_closed_spelling_elsewhere_wins_over_a_hyphenated_one():
    text = "Ask at the front-\ndesk.\nThe frontdesk and the frontdesk hours; front-desk once."
    assert run(Block(PARAGRAPH, text)).blocks[0].text.startswith("Ask at the frontdesk.")


def test_dehyphenation_makes_the_matches_of_its_rule_as_one_regular_expression():
    # dehyphenate_text finds line-end hyphens first; the rule it implements is the
    # single expression _LINE_END_HYPHEN applied by re.sub, used here as the reference
    # on random text made of the pieces that decide a match (letters of several
    # scripts, digits, "_", superscripts that are \w but not letters, both hyphens).
    import random
    from collections import Counter

    from thresher.steps.clean import _LINE_END_HYPHEN, dehyphenate_text

    def reference(text, vocabulary):
        def join(m):
            left, hyphen, right = m.groups()
            if not right[0].islower():
                return m.group(0)
            keep = vocabulary.get((left + "-" + right).casefold(), 0) > vocabulary.get((left + right).casefold(), 0)
            return left + (hyphen if keep else "") + right
        return _LINE_END_HYPHEN.sub(join, text), len([m for m in _LINE_END_HYPHEN.finditer(text)
                                                      if m.group(3)[0].islower()])

    pieces = ["co", "op", "Er", "ß", "é", "日本", "3", "_", "\u00b2", "-", "\u2010", "\n", " ", "-\n", "a-\nb"]
    vocabulary = Counter({"co-op": 2, "coop": 1, "er-op": 1})
    rng = random.Random(11)
    joined = 0
    for _ in range(3000):
        text = "".join(rng.choice(pieces) for _ in range(rng.randint(1, 30)))
        assert dehyphenate_text(text, vocabulary) == reference(text, vocabulary), repr(text)
        joined += reference(text, vocabulary)[1]
    assert joined > 1000


def test_not_a_broken_word_is_left_alone():
    text = "Send an E-\nMail to the desk\nOpening hours -\nsee below\nRoom 12-\n14"
    out = run(Block(PARAGRAPH, text))
    assert out.text == text  # capital after the hyphen, a dash, digits
    assert "dehyphenated" not in out.payload["fixes"]


def test_headings_tables_code_are_not_dehyphenated_and_it_can_be_off():
    code = "x = a-\nb"
    table = "Item-\nname | Shelf"
    out = run(Block(CODE, code), Block(TABLE, table))
    assert [b.text for b in out.blocks] == [code, table]
    assert run(Block(PARAGRAPH, "coop-\nerative"), dehyphenate=False).text == "coop-\nerative"


def test_soft_hyphen_at_a_line_end_joins_the_lines():
    out = run(Block(PARAGRAPH, "The co\u00ad\noperative and the\u00adlibrary"))
    assert out.text == "The cooperative and thelibrary"
    assert out.payload["fixes"] == {"soft_hyphens": 2}


# -- boilerplate ---------------------------------------------------------------


def removed_lines(p):
    return [r["text"] for r in p.payload["removed"]]


def handbook(n_pages, extra=None):
    """Pages that each carry a running line and a page-number line in their text."""
    pages = []
    for n in range(1, n_pages + 1):
        blocks = [Block(HEADING, f"Section {n}", 2),
                  Block(PARAGRAPH, f"Quillfern Library Cooperative - internal\nBody text of page {n}."),
                  Block(PARAGRAPH, f"- {n} -")]
        if extra and n in extra:
            blocks.append(Block(PARAGRAPH, extra[n]))
        pages.append(page(*blocks, locator=f"page/{n}", number=n))
    return pages


def test_lines_on_most_pages_are_removed_and_recorded():
    out = clean(handbook(4, extra={2: "Only on page two."}), CleanParams())
    assert out[0].text == "Section 1\n\nBody text of page 1."
    assert out[1].text == "Section 2\n\nBody text of page 2.\n\nOnly on page two."
    for n, p in enumerate(out, start=1):
        assert removed_lines(p) == ["Quillfern Library Cooperative - internal", f"- {n} -"]
        assert p.payload["removed"][0] == {
            "kind": "repeated line", "text": "Quillfern Library Cooperative - internal",
            "reason": "the same line stands on 4 of the document's 4 pages (at least 3 pages "
                      "and 50% of them)"}
        assert p.payload["fixes"]["boilerplate_lines"] == 2
        assert any("removed 2 line(s) that stand on most pages" in w for w in p.warnings)
        assert p.payload["fixes"]["empty_blocks"] == 1
        assert p.status == OK


def test_lines_with_words_must_repeat_exactly():
    # "Week N total" differs by its numbers: content, not boilerplate.
    pages = [page(Block(PARAGRAPH, f"Week {n} total: {10 + n} loans"), locator=f"page/{n}", number=n)
             for n in range(1, 6)]
    out = clean(pages, CleanParams())
    assert [p.text for p in out] == [f"Week {n} total: {10 + n} loans" for n in range(1, 6)]


def test_boilerplate_needs_enough_pages():
    # Two pages: a line on both could be a real repetition; nothing is removed.
    out = clean(handbook(2), CleanParams())
    assert "Quillfern Library Cooperative - internal" in out[0].text
    assert out[0].payload["removed"] == []
    # Lower the bar and it goes; switch the rule off and it stays.
    out = clean(handbook(2), CleanParams(boilerplate_min_pages=2))
    assert "internal" not in out[0].text
    out = clean(handbook(4), CleanParams(remove_boilerplate=False))
    assert "internal" in out[0].text and out[0].payload["removed"] == []


def test_a_line_on_a_minority_of_pages_stays():
    # On 3 of 8 pages: below half of them.
    extra = {n: "See the lending policy." for n in (1, 4, 6)}
    out = clean(handbook(8, extra=extra), CleanParams())
    assert all("See the lending policy." in out[n - 1].text for n in (1, 4, 6))
    assert "See the lending policy." not in removed_lines(out[0])
    # Lower the share to a third and it goes.
    out = clean(handbook(8, extra=extra), CleanParams(boilerplate_min_share=0.3))
    assert "See the lending policy." in removed_lines(out[0])


def test_repeated_headings_are_structure_not_boilerplate():
    pages = [page(Block(HEADING, "Daily log", 1), Block(PARAGRAPH, f"Entry {n}: returns sorted."),
                  locator=f"page/{n}", number=n) for n in range(1, 5)]
    out = clean(pages, CleanParams())
    assert all(p.blocks[0] == Block(HEADING, "Daily log", 1) for p in out)
    assert all(p.payload["removed"] == [] for p in out)


def test_a_page_of_nothing_but_boilerplate_is_dropped_with_the_reason():
    pages = handbook(4)
    pages.append(page(Block(PARAGRAPH, "Quillfern Library Cooperative - internal\n- 5 -"),
                      locator="page/5", number=5))
    out = clean(pages, CleanParams())
    last = out[-1]
    assert last.status == DROPPED
    assert "boilerplate_lines 2" in last.reason and last.reason.startswith("no text left")
    assert last.payload["heavy_removal"] is True and last.warnings
    assert removed_lines(last) == ["Quillfern Library Cooperative - internal", "- 5 -"]


def test_same_pages_give_the_same_result():
    pages = handbook(5, extra={3: "Coop-\nerative caf\u00c3\u00a9 \u200b."})
    assert clean(pages, CleanParams()) == clean(pages, CleanParams())
    assert clean(pages, CleanParams())[2].blocks[-1].text == "Cooperative café ."
