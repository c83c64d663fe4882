"""The split step: heading sections, token budget, exact spans."""

from __future__ import annotations

import pydantic
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from thresher.flows.encodings import get_encoding
from thresher.steps.spec import StepContext
from thresher.steps.split import SPLIT, SplitParams, split
from thresher.steps.units import (
    BLOCK_SEP,
    CODE,
    FAILED,
    HEADING,
    PARAGRAPH,
    TABLE,
    Block,
    Page,
)

CTX = StepContext(doc_id="d1", source_path="handbook.pdf", encoding=get_encoding)
ENC = get_encoding("cl100k_base")


def count(text):
    return len(ENC.encode_ordinary(text))


def page(n, *blocks, language="en"):
    return Page(locator=f"page/{n}", page=n, blocks=list(blocks), title="Handbook",
                format="pdf", language=language, language_prob=0.99)


def H(text, level):
    return Block(HEADING, text, level)


def P(text):
    return Block(PARAGRAPH, text)


def sentences(n, topic="the lending rules"):
    return " ".join(f"Sentence {i} explains {topic} of the Quillfern cooperative."
                    for i in range(n))


def span_text(pages, chunk):
    """The document text a chunk's span covers, per the documented definition."""
    by_number = {p.page: p for p in pages}
    numbers = [p.page for p in pages]
    first, last = numbers.index(chunk.page_start), numbers.index(chunk.page_end)
    if first == last:
        return by_number[chunk.page_start].text[chunk.char_start:chunk.char_end]
    parts = [pages[first].text[chunk.char_start:]]
    parts += [p.text for p in pages[first + 1:last]]
    parts.append(pages[last].text[:chunk.char_end])
    return BLOCK_SEP.join(parts)


def check_invariants(pages, chunks, params):
    for i, chunk in enumerate(chunks):
        assert chunk.index == i and chunk.locator == f"chunk/{i:05d}"
        assert chunk.token_count == count(chunk.text) <= params.max_tokens
        assert chunk.encoding == params.encoding
        prefix = chunk.prefix_chars
        assert chunk.text[prefix:] == span_text(pages, chunk)
        if chunk.page_start == chunk.page_end and prefix == 0:
            start_page = next(p for p in pages if p.page == chunk.page_start)
            assert chunk.text == start_page.text[chunk.char_start:chunk.char_end]
        touched = [p.locator for p in pages
                   if chunk.page_start <= p.page <= chunk.page_end]
        assert chunk.parents == touched


def test_small_section_is_one_chunk_that_starts_with_its_heading():
    pages = [page(1, H("Opening hours", 1), P("Weekdays nine to six."), P("Closed on Sundays."))]
    [chunk] = split(pages, SplitParams(), CTX)
    assert chunk.text == "Opening hours\n\nWeekdays nine to six.\n\nClosed on Sundays."
    assert chunk.text == pages[0].text[chunk.char_start:chunk.char_end]
    assert chunk.heading_path == ["Opening hours"]
    assert (chunk.page_start, chunk.page_end) == (1, 1)
    assert (chunk.title, chunk.format, chunk.language, chunk.language_prob) == (
        "Handbook", "pdf", "en", 0.99)
    assert chunk.parents == ["page/1"]


def test_heading_path_follows_nested_headings():
    pages = [page(1,
                  P("Preface text before any heading."),
                  H("Guide", 1), P("About the guide."),
                  H("Loans", 2), P("How loans work."),
                  H("Renewals", 3), P("Renew twice."),
                  H("Fees", 2), P("No fees for members."),
                  H("Returns", 4), P("Drop box at the door."),
                  H("Appendix", 1), P("Contact list."))]
    chunks = split(pages, SplitParams(), CTX)
    assert [c.heading_path for c in chunks] == [
        [],
        ["Guide"],
        ["Guide", "Loans"],
        ["Guide", "Loans", "Renewals"],
        ["Guide", "Fees"],
        ["Guide", "Fees", "Returns"],
        ["Appendix"],
    ]
    assert chunks[3].text == "Renewals\n\nRenew twice."
    check_invariants(pages, chunks, SplitParams())


def test_title_heading_joins_its_first_subsection():
    pages = [page(1, H("Members' handbook", 1), H("Joining", 2), P("Fill in the form."),
                  H("Leaving", 2), P("Tell the desk."))]
    chunks = split(pages, SplitParams(), CTX)
    assert [c.text for c in chunks] == ["Members' handbook\n\nJoining\n\nFill in the form.",
                                        "Leaving\n\nTell the desk."]
    assert chunks[0].heading_path == ["Members' handbook", "Joining"]
    assert chunks[1].heading_path == ["Members' handbook", "Leaving"]


def test_long_section_splits_at_sentences_within_budget():
    params = SplitParams(max_tokens=60)
    pages = [page(1, H("Lending rules", 2), P(sentences(30)), P(sentences(5, "fines")))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 3
    assert all(c.heading_path == ["Lending rules"] for c in chunks)
    assert chunks[0].text.startswith("Lending rules\n\nSentence 0 explains")
    # Cuts fall at sentence ends, never inside a sentence.
    assert all(c.text.endswith("cooperative.") for c in chunks)
    check_invariants(pages, chunks, params)
    # Nothing is lost: with no overlap the chunks are the section minus separators.
    assert " ".join(c.text for c in chunks).split() == pages[0].text.split()


def test_paragraph_boundaries_come_before_sentence_boundaries():
    params = SplitParams(max_tokens=80)
    first, second = sentences(4), sentences(4, "fines")
    assert count(first) < 80 and count(second) < 80 and count(first + "\n\n" + second) > 80
    chunks = split([page(1, P(first), P(second))], params, CTX)
    assert [c.text for c in chunks] == [first, second]


def test_heading_is_not_left_alone_when_the_first_paragraph_barely_fits():
    body = sentences(5)
    params = SplitParams(max_tokens=count(body) + 1)
    assert count(body) <= params.max_tokens < count("Fines\n\n" + body)
    chunks = split([page(1, H("Fines", 2), P(body))], params, CTX)
    assert chunks[0].text.startswith("Fines\n\nSentence 0")
    assert all(c.text != "Fines" for c in chunks)


def test_table_that_fits_stays_whole():
    table = "Branch | Opens | Closes\nNorth | 09:00 | 18:00\nSouth | 10:00 | 17:00"
    [chunk] = split([page(1, Block(TABLE, table))], SplitParams(), CTX)
    assert chunk.text == table


def test_long_table_splits_by_rows_and_repeats_the_header():
    header = "Item | Shelf | Copies"
    rows = [f"Atlas of the northern coast volume {i} | R{i % 9} | {i % 4 + 1}"
            for i in range(120)]
    table = "\n".join([header] + rows)
    params = SplitParams(max_tokens=120)
    pages = [page(1, H("Stock", 2), Block(TABLE, table))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 5
    assert chunks[0].text.startswith("Stock\n\n" + header + "\n" + rows[0])
    assert chunks[0].prefix_chars == 0
    for chunk in chunks[1:]:
        assert chunk.text.startswith(header + "\n")
        assert chunk.prefix_chars == len(header) + 1
        body = chunk.text.split("\n")[1:]
        assert body and all(line in rows for line in body)  # whole rows only
    # Every row appears exactly once outside the repeated headers.
    seen = [line for c in chunks for line in c.text[c.prefix_chars:].split("\n")
            if line in rows]
    assert seen == rows
    check_invariants(pages, chunks, params)


def test_chunk_across_a_page_break_has_exact_spans():
    pages = [page(1, H("Events", 2), P("The autumn fair starts at noon.")),
             page(2, P("Stalls close at five."), H("Workshops", 2), P("Bookbinding on Fridays."))]
    chunks = split(pages, SplitParams(), CTX)
    first = chunks[0]
    assert (first.page_start, first.page_end) == (1, 2)
    assert first.text == (pages[0].text[first.char_start:] + "\n\n"
                          + pages[1].text[:first.char_end])
    assert first.text == "Events\n\nThe autumn fair starts at noon.\n\nStalls close at five."
    assert first.parents == ["page/1", "page/2"]
    assert chunks[1].heading_path == ["Workshops"]
    assert chunks[1].text == pages[1].text[chunks[1].char_start:chunks[1].char_end]
    check_invariants(pages, chunks, SplitParams())


def test_chunk_spanning_three_pages_includes_the_middle_page():
    pages = [page(1, P("Part one.")), page(2, P("Part two.")), page(3, P("Part three."))]
    [chunk] = split(pages, SplitParams(), CTX)
    assert chunk.text == "Part one.\n\nPart two.\n\nPart three."
    assert chunk.parents == ["page/1", "page/2", "page/3"]
    assert (chunk.char_start, chunk.char_end) == (0, len("Part three."))


def test_token_boundary_split_never_cuts_a_character():
    # Japanese without spaces or sentence marks leaves only token boundaries, and
    # cl100k_base splits some of these characters across tokens (the cookbook's
    # "お誕生日おめでとう" example: 誕 is two tokens, 45918 and 243).
    text = "お誕生日おめでとう" * 60
    params = SplitParams(max_tokens=7)
    pages = [page(1, P(text))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 10
    assert "".join(c.text for c in chunks) == text
    assert all("\ufffd" not in c.text for c in chunks)
    check_invariants(pages, chunks, params)


def test_long_word_without_boundaries_is_cut_by_tokens():
    text = "x" * 3000
    params = SplitParams(max_tokens=50)
    chunks = split([page(1, P(text))], params, CTX)
    assert "".join(c.text for c in chunks) == text
    check_invariants([page(1, P(text))], chunks, params)


def test_code_splits_at_lines_and_keeps_indentation():
    code = "\n".join(f"    total_{i} = fine_for(day={i})" for i in range(80))
    params = SplitParams(max_tokens=60)
    pages = [page(1, Block(CODE, code))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 3
    for c in chunks:
        assert all(line.startswith("    total_") for line in c.text.split("\n"))
    check_invariants(pages, chunks, params)


def test_overlap_repeats_the_end_of_the_previous_chunk():
    params = SplitParams(max_tokens=60, overlap_tokens=12)
    pages = [page(1, P(sentences(25)))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 3
    for before, after in zip(chunks, chunks[1:]):
        assert after.char_start < before.char_end  # spans overlap
        shared = pages[0].text[after.char_start:before.char_end]
        assert before.text.endswith(shared) and after.text.startswith(shared)
        assert 0 < count(shared) <= 12 + 1
        assert not shared[0].isspace() and (after.char_start == 0
                                            or pages[0].text[after.char_start - 1] == " ")
    check_invariants(pages, chunks, params)


def test_same_input_gives_the_same_chunks():
    pages = [page(1, H("Rules", 1), P(sentences(40))), page(2, Block(TABLE, "A | B\n1 | 2"))]
    params = SplitParams(max_tokens=50, overlap_tokens=5)
    assert split(pages, params, CTX) == split(pages, params, CTX)


def test_pages_without_numbers_and_empty_documents():
    whole = Page(locator="file", page=None, blocks=[H("Notes", 1), P("Bring a card.")])
    [chunk] = split([whole], SplitParams(), CTX)
    assert (chunk.page_start, chunk.page_end) == (None, None)
    assert chunk.parents == ["file"] and chunk.text == "Notes\n\nBring a card."
    assert split([], SplitParams(), CTX) == []
    assert split([page(1)], SplitParams(), CTX) == []


def test_budget_too_small_for_one_character_fails_the_chunk_not_the_run():
    # "𝔘" (U+1D518) is four UTF-8 bytes; cl100k_base needs more than one token for it.
    assert count("\U0001d518") > 1
    chunks = split([page(1, P("ab \U0001d518 cd"))], SplitParams(max_tokens=1), CTX)
    failed = [c for c in chunks if c.status == FAILED]
    assert failed and "cannot be cut further" in failed[0].reason
    assert all(c.token_count <= 1 for c in chunks if c.ok)


def test_params_are_checked():
    with pytest.raises(pydantic.ValidationError):
        SplitParams(max_tokens=0)
    with pytest.raises(pydantic.ValidationError, match="smaller than max_tokens"):
        SplitParams(max_tokens=100, overlap_tokens=100)
    with pytest.raises(pydantic.ValidationError):
        SplitParams(max_size=100)  # unknown key
    assert SPLIT.encoding_params == ("encoding",)
    assert (SPLIT.consumes, SPLIT.produces, SPLIT.scope) == ("pages", "chunks", "document")


def test_missing_encoding_loader_is_a_clear_error():
    with pytest.raises(RuntimeError, match="ctx.encoding"):
        split([page(1, P("x"))], SplitParams(), StepContext())


# Property test: random documents of headings, paragraphs, tables and code, with
# multi-byte text, keep every invariant for any budget.
_words = st.sampled_from(["loan", "Bücher", "fée", "書籍", "🙂", "shelf", "x" * 30, "a.", "b!",
                          "12", "—", "é", "Quill", "fern"])
_sentence = st.lists(_words, min_size=1, max_size=30).map(" ".join)
_para = st.lists(_sentence, min_size=1, max_size=6).map(" ".join)
_block = st.one_of(
    _para.map(P),
    st.tuples(_sentence, st.integers(1, 6)).map(lambda t: H(*t)),
    st.lists(st.lists(_words, min_size=1, max_size=4).map(" | ".join), min_size=1,
             max_size=25).map(lambda rows: Block(TABLE, "\n".join(rows))),
    st.lists(_sentence.map(lambda s: "  " + s), min_size=1, max_size=10).map(
        lambda lines: Block(CODE, "\n".join(lines))),
)
_pages = st.lists(st.lists(_block, min_size=0, max_size=6), min_size=1, max_size=4)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_pages, st.integers(4, 200), st.integers(0, 20))
def test_invariants_hold_for_random_documents(page_blocks, max_tokens, overlap):
    overlap = min(overlap, max_tokens - 1)
    params = SplitParams(max_tokens=max_tokens, overlap_tokens=overlap)
    pages = [page(n + 1, *blocks) for n, blocks in enumerate(page_blocks)]
    chunks = split(pages, params, CTX)
    assert all(c.ok for c in chunks)  # every character fits in 4 tokens
    check_invariants(pages, chunks, params)
    if overlap == 0:
        # Spans are in order, do not overlap, and cover every non-space character.
        doc = BLOCK_SEP.join(p.text for p in pages)
        starts = [sum(len(p.text) + 2 for p in pages[:i]) for i in range(len(pages))]
        numbers = [p.page for p in pages]
        covered = [False] * len(doc)
        last_end = 0
        for c in chunks:
            gs = starts[numbers.index(c.page_start)] + c.char_start
            ge = starts[numbers.index(c.page_end)] + c.char_end
            assert gs >= last_end
            last_end = ge
            for k in range(gs, ge):
                covered[k] = True
        assert all(covered[k] or doc[k].isspace() for k in range(len(doc)))
    assert split(pages, params, CTX) == chunks
