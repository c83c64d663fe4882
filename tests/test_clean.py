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
    assert out.payload["removed_share"] == pytest.approx(7 / len(text))
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
    assert out.payload["removed_share"] == 1.0
    assert out.warnings and "100%" in out.warnings[0]


def test_heavy_removal_warns_but_keeps_the_page():
    text = "Due dates" + "\u200b" * 20
    out = run(Block(PARAGRAPH, text))
    assert out.status == OK and out.text == "Due dates"
    assert out.payload["removed_share"] == pytest.approx(20 / 29)
    assert len(out.warnings) == 1 and "max_removed_share 50%" in out.warnings[0]
    # With a higher threshold there is no warning.
    assert run(Block(PARAGRAPH, text), max_removed_share=0.9).warnings == []


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
