"""The language step: langdetect per page with a fixed seed, document language."""

from __future__ import annotations

import subprocess
import sys

import pydantic
import pytest

from thresher.steps.language import LANGUAGE, LanguageParams, detect_language, detect_text
from thresher.steps.units import CODE, DROPPED, HEADING, OK, PARAGRAPH, Block, Page

# Invented paragraphs about the (fictional) Quillfern Library Cooperative.
ENGLISH = (
    "The reading room on the second floor stays open until nine in the evening. "
    "Members may borrow up to eight books at a time and renew them twice online."
)
GERMAN = (
    "Der Lesesaal im zweiten Stock bleibt bis neun Uhr abends geöffnet. Mitglieder "
    "dürfen bis zu acht Bücher gleichzeitig ausleihen und zweimal online verlängern."
)
FRENCH = (
    "La salle d'étude du deuxième étage reste ouverte jusqu'à neuf heures du soir. "
    "Les membres peuvent emprunter huit livres à la fois et les renouveler en ligne."
)


def page(n, *texts, kind=PARAGRAPH):
    return Page(locator=f"page/{n}", page=n, blocks=[Block(kind, t) for t in texts],
                title="Handbook", format="pdf")


@pytest.mark.parametrize("text,code", [(ENGLISH, "en"), (GERMAN, "de"), (FRENCH, "fr")])
def test_detects_english_german_french(text, code):
    [out] = detect_language([page(1, text)], LanguageParams())
    assert out.language == code
    assert out.language_prob >= 0.80
    assert out.status == OK
    assert out.payload == {"doc_language": code, "doc_mixed": False, "doc_languages": {code: 1.0},
                           "unvoted_blocks": 0}
    # One judged block: the page takes its answer.
    assert out.blocks[0].language == out.language
    assert out.blocks[0].language_prob == pytest.approx(out.language_prob)


def test_short_text_is_unknown():
    [out] = detect_language([page(1, "Opening hours")], LanguageParams())
    assert out.language == "unknown" and out.language_prob is None
    assert out.payload["doc_language"] == "unknown"


def test_min_chars_is_respected():
    params = LanguageParams(min_chars=len(ENGLISH) + 1)
    assert detect_text(ENGLISH, params) == ("unknown", None)


def test_low_probability_is_unknown_but_keeps_the_probability():
    params = LanguageParams(min_probability=1.0)
    # langdetect's averaged probability for a mixed sentence stays below 1.
    lang, prob = detect_text(ENGLISH[:80] + " " + GERMAN[:80], params)
    assert lang == "unknown" and prob is not None and prob < 1.0


def test_repeated_calls_and_call_order_give_identical_results():
    # A mixed text is where langdetect's random sampling shows; with the seed fixed
    # the probabilities are identical to the last bit, whatever ran before.
    mixed = ENGLISH[:70] + " " + FRENCH[:70]
    params = LanguageParams(min_probability=0.0)
    first = detect_text(mixed, params)
    for text in (GERMAN, FRENCH, ENGLISH):
        detect_text(text, params)
    assert [detect_text(mixed, params) for _ in range(3)] == [first] * 3

    pages = [page(1, ENGLISH), page(2, mixed), page(3, FRENCH)]
    forward = [(p.language, p.language_prob) for p in detect_language(pages, params)]
    backward = [(p.language, p.language_prob) for p in detect_language(pages[::-1], params)]
    assert forward == backward[::-1]


def test_seed_is_a_parameter():
    mixed = ENGLISH[:60] + " " + GERMAN[:60] + " " + FRENCH[:60]
    results = {detect_text(mixed, LanguageParams(seed=s, min_probability=0.0))
               for s in range(6)}
    # Different seeds sample differently, so the probabilities differ.
    assert len(results) > 1


def test_document_language_is_character_weighted():
    long_german = " ".join([GERMAN] * 3)
    pages = [page(1, ENGLISH), page(2, long_german), page(3, "Kurz")]
    out = detect_language(pages, LanguageParams())
    assert [p.language for p in out] == ["en", "de", "unknown"]
    # German holds ~3/4 of the detected characters, English ~1/4 (>= 20%): mixed.
    shares = {"de": len(long_german) / (len(long_german) + len(ENGLISH)),
              "en": len(ENGLISH) / (len(long_german) + len(ENGLISH))}
    for p in out:
        assert (p.payload["doc_language"], p.payload["doc_mixed"]) == ("de", True)
        assert p.payload["doc_languages"] == pytest.approx(shares)


def test_small_second_language_does_not_make_a_document_mixed():
    pages = [page(1, " ".join([ENGLISH] * 5)), page(2, FRENCH)]
    out = detect_language(pages, LanguageParams())
    assert (out[0].payload["doc_language"], out[0].payload["doc_mixed"]) == ("en", False)
    assert out[0].payload["doc_languages"]["fr"] < 0.20


def test_keep_drops_other_languages_and_keeps_unknown():
    pages = [page(1, ENGLISH), page(2, FRENCH), page(3, GERMAN), page(4, "Index")]
    out = detect_language(pages, LanguageParams(keep=["en", "de"]))
    assert [p.status for p in out] == [OK, DROPPED, OK, OK]
    assert out[1].reason == "language fr not in kept languages [en, de]"
    assert out[3].language == "unknown"


def test_code_blocks_do_not_vote():
    code = "for item in loans:\n    if item.overdue:\n        notify(item.member_id)"
    out = detect_language([page(1, code, kind=CODE)], LanguageParams())
    assert out[0].language == "unknown"


def test_blocks_copied_and_lineage():
    src = Page(locator="page/2", page=2, blocks=[Block(HEADING, "Hours", 1),
                                                 Block(PARAGRAPH, ENGLISH)])
    [out] = detect_language([src], LanguageParams())
    assert [(b.kind, b.text, b.level) for b in out.blocks] == [
        (b.kind, b.text, b.level) for b in src.blocks]
    assert out.blocks[0] is not src.blocks[0] and src.blocks[1].language is None
    assert out.parents == ["page/2"] and out.locator == "page/2"


def test_each_long_block_gets_its_own_language():
    src = Page(locator="page/1", page=1, blocks=[
        Block(HEADING, "Opening hours", 1), Block(PARAGRAPH, ENGLISH), Block(PARAGRAPH, GERMAN),
        Block(CODE, "renew(loan_id)  # twice at most, then return"), Block(PARAGRAPH, FRENCH)])
    [out] = detect_language([src], LanguageParams())
    assert [b.language for b in out.blocks] == [None, "en", "de", None, "fr"]
    assert all(b.language_prob >= 0.8 for b in out.blocks if b.language)
    assert out.blocks[0].language_prob is None  # a short heading is not judged
    # Each block's answer is what the text on its own gives.
    assert out.blocks[2].language_prob == detect_text(GERMAN, LanguageParams())[1]


def test_an_unsure_block_is_unknown_with_its_probability():
    mixed = ENGLISH[:80] + " " + GERMAN[:80]
    src = Page(locator="page/1", page=1, blocks=[Block(PARAGRAPH, mixed), Block(PARAGRAPH, ENGLISH)])
    [out] = detect_language([src], LanguageParams(min_probability=1.0))
    assert out.blocks[0].language == "unknown" and 0 < out.blocks[0].language_prob < 1.0


def test_params_are_checked():
    with pytest.raises(pydantic.ValidationError):
        LanguageParams(min_probability=2)
    with pytest.raises(pydantic.ValidationError):
        LanguageParams(languages=["en"])  # unknown key
    assert (LANGUAGE.name, LANGUAGE.consumes, LANGUAGE.produces) == (
        "language", "pages", "pages")


def test_same_result_in_a_fresh_process():
    # Without a seed langdetect seeds from the OS, so a new process would differ.
    mixed = ENGLISH[:70] + " " + FRENCH[:70]
    params = LanguageParams(min_probability=0.0)
    code = (
        "import sys; from thresher.steps.language import detect_text, LanguageParams; "
        "print(repr(detect_text(sys.argv[1], LanguageParams(min_probability=0.0))))"
    )
    done = subprocess.run([sys.executable, "-c", code, mixed], capture_output=True,
                          text=True, check=True)
    assert done.stdout.strip() == repr(detect_text(mixed, params))


def test_page_of_judged_blocks_takes_their_weighted_language():
    long_english = " ".join([ENGLISH] * 3)
    src = Page(locator="page/1", page=1, blocks=[Block(PARAGRAPH, long_english), Block(PARAGRAPH, GERMAN)])
    [out] = detect_language([src], LanguageParams(min_probability=0.5))
    en, de = out.blocks
    assert (en.language, de.language) == ("en", "de")
    share = len(long_english) / (len(long_english) + len(GERMAN))
    assert out.language == "en" and out.language_prob == pytest.approx(en.language_prob * share)
    # Below min_probability the page is unknown, with the weighted probability kept.
    [strict] = detect_language([src], LanguageParams())
    assert strict.language == "unknown" and strict.language_prob == pytest.approx(out.language_prob)


def test_page_of_short_blocks_is_judged_on_its_whole_text():
    lines = [s.strip() + "." for s in ENGLISH.split(".") if s.strip()]
    words = [w for line in lines for w in line.split()]
    short = [" ".join(words[i:i + 4]) for i in range(0, len(words), 4)]  # each under 40 characters
    src = Page(locator="page/1", page=1, blocks=[Block(PARAGRAPH, t) for t in short])
    [out] = detect_language([src], LanguageParams())
    assert all(b.language is None for b in out.blocks)
    assert out.language == "en" and out.language_prob >= 0.8


def test_blocks_can_be_left_unjudged():
    src = Page(locator="page/1", page=1, blocks=[Block(PARAGRAPH, ENGLISH), Block(PARAGRAPH, GERMAN)])
    [out] = detect_language([src], LanguageParams(detect_blocks=False))
    assert all(b.language is None and b.language_prob is None for b in out.blocks)
    # The page is judged on its whole text instead.
    assert (out.language, out.language_prob) == detect_text(ENGLISH + "\n" + GERMAN, LanguageParams())
