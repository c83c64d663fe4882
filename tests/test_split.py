"""The split step: heading sections, token budget, exact spans."""

from __future__ import annotations

import pydantic
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import tiktoken

from thresher.flows.encodings import get_encoding
from thresher.steps.spec import StepContext
from thresher.steps.split import SPLIT, SplitParams, _sentence_spans, split
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
# Small sections do not merge by default (the retrieval benchmark decided it); tests
# of merging turn it on, tests of the section structure say it is off.
NOMERGE = {"merge_below_tokens": 0}
MERGE = {"merge_below_tokens": 100}


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


def global_span(pages, chunk):
    starts = [sum(len(p.text) + len(BLOCK_SEP) for p in pages[:i]) for i in range(len(pages))]
    numbers = [p.page for p in pages]
    return (starts[numbers.index(chunk.page_start)] + chunk.char_start,
            starts[numbers.index(chunk.page_end)] + chunk.char_end)


def check_invariants(pages, chunks, params, enc=ENC):
    doc = BLOCK_SEP.join(p.text for p in pages)
    for i, chunk in enumerate(chunks):
        assert chunk.index == i and chunk.locator == f"chunk/{i:05d}"
        # The budget holds in the configured encoding.
        assert chunk.token_count == len(enc.encode_ordinary(chunk.text)) <= params.max_tokens
        assert chunk.encoding == params.encoding
        prefix = chunk.prefix_chars
        assert chunk.text[prefix:] == span_text(pages, chunk)
        if chunk.page_start == chunk.page_end and prefix == 0:
            start_page = next(p for p in pages if p.page == chunk.page_start)
            assert chunk.text == start_page.text[chunk.char_start:chunk.char_end]
        touched = [p.locator for p in pages
                   if chunk.page_start <= p.page <= chunk.page_end]
        assert chunk.parents == touched
    # Joining the chunks, minus overlaps and repeated headers, with the whitespace
    # between them, gives back the document text exactly.
    rebuilt, first, last_end = "", None, None
    for chunk in chunks:
        start, end = global_span(pages, chunk)
        body = chunk.text[chunk.prefix_chars:]
        shared = chunk.payload["overlap_chars"]
        if last_end is None:
            assert shared == 0
            first, rebuilt = start, body
        elif shared:
            assert start + shared == last_end and rebuilt.endswith(body[:shared])
            assert len(enc.encode_ordinary(body[:shared])) <= params.overlap_tokens
            rebuilt += body[shared:]
        else:
            gap = doc[last_end:start]
            assert start >= last_end and gap.strip() == "", repr(gap)
            rebuilt += gap + body
        last_end = end
    if chunks:
        assert rebuilt == doc[first:last_end]
        assert doc[:first].strip() == "" and doc[last_end:].strip() == ""
    else:
        assert doc.strip() == ""
    check_heading_paths(pages, chunks)


def check_heading_paths(pages, chunks):
    """A chunk's heading_path is a prefix of the headings open at each text block it
    covers (merged sections share their parent's path)."""
    placed, stack, pos = [], [], 0
    for p in pages:
        for b in p.blocks:
            if b.kind == HEADING:
                level = min(max(b.level, 1), 6)
                while stack and stack[-1][0] >= level:
                    stack.pop()
                stack.append((level, " ".join(b.text.split())))
            placed.append((pos, pos + len(b.text), b.kind, [t for _, t in stack]))
            pos += len(b.text) + len(BLOCK_SEP)
    for chunk in chunks:
        start, end = global_span(pages, chunk)
        path = chunk.heading_path
        for s, e, kind, open_headings in placed:
            if s < end and e > start and kind != HEADING:
                assert open_headings[:len(path)] == path, (path, open_headings)


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
    chunks = split(pages, SplitParams(**NOMERGE), CTX)
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
    check_invariants(pages, chunks, SplitParams(**NOMERGE))


def test_title_heading_joins_its_first_subsection():
    pages = [page(1, H("Members' handbook", 1), H("Joining", 2), P("Fill in the form."),
                  H("Leaving", 2), P("Tell the desk."))]
    chunks = split(pages, SplitParams(**NOMERGE), CTX)
    assert [c.text for c in chunks] == ["Members' handbook\n\nJoining\n\nFill in the form.",
                                        "Leaving\n\nTell the desk."]
    assert chunks[0].heading_path == ["Members' handbook", "Joining"]
    assert chunks[1].heading_path == ["Members' handbook", "Leaving"]


def test_a_heading_alone_joins_the_next_section_at_any_level():
    # A site banner heading above the page's own (shallower) heading, and the first of
    # two signatures of one function (same level): neither has text of its own, so
    # neither is a chunk of one line. A heading alone at the very end stays a chunk.
    pages = [page(1, H("Cooperative library", 2), H("Opening hours", 1), P("Weekdays nine to six."),
                  H("lend(book)", 2), H("lend(book, days)", 2), P("Lends a book for some days."),
                  H("See also", 2))]
    chunks = split(pages, SplitParams(**NOMERGE), CTX)
    assert [c.text for c in chunks] == [
        "Cooperative library\n\nOpening hours\n\nWeekdays nine to six.",
        "lend(book)\n\nlend(book, days)\n\nLends a book for some days.",
        "See also",
    ]
    assert [c.heading_path for c in chunks] == [
        ["Opening hours"], ["Opening hours", "lend(book, days)"], ["Opening hours", "See also"]]
    check_invariants(pages, chunks, SplitParams(**NOMERGE))


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
    chunks = split(pages, SplitParams(**NOMERGE), CTX)
    first = chunks[0]
    assert (first.page_start, first.page_end) == (1, 2)
    assert first.text == (pages[0].text[first.char_start:] + "\n\n"
                          + pages[1].text[:first.char_end])
    assert first.text == "Events\n\nThe autumn fair starts at noon.\n\nStalls close at five."
    assert first.parents == ["page/1", "page/2"]
    assert chunks[1].heading_path == ["Workshops"]
    assert chunks[1].text == pages[1].text[chunks[1].char_start:chunks[1].char_end]
    check_invariants(pages, chunks, SplitParams(**NOMERGE))


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
    text = pages[0].text
    chunks = split(pages, params, CTX)
    assert len(chunks) > 3
    assert chunks[0].payload["overlap_chars"] == 0
    for before, after in zip(chunks, chunks[1:]):
        shared = text[after.char_start:before.char_end]
        assert after.payload["overlap_chars"] == len(shared) > 0
        assert before.text.endswith(shared) and after.text.startswith(shared)
        # Exact: within the limit, at a word start, and one more word would exceed it.
        assert count(shared) <= 12
        assert text[after.char_start - 1] == " " and not shared[0].isspace()
        previous_word = text.rfind(" ", 0, after.char_start - 1) + 1
        assert previous_word <= before.char_start or count(text[previous_word:before.char_end]) > 12
    check_invariants(pages, chunks, params)


def test_overlap_never_reaches_into_the_previous_section():
    params = SplitParams(max_tokens=60, overlap_tokens=20, merge_below_tokens=0)
    pages = [page(1, H("Loans", 2), P(sentences(12)), H("Fees", 2), P(sentences(12, "fees")))]
    chunks = split(pages, params, CTX)
    fees = [c for c in chunks if c.heading_path == ["Fees"]]
    assert fees[0].text.startswith("Fees") and fees[0].payload["overlap_chars"] == 0
    assert all(c.payload["overlap_chars"] > 0 for c in fees[1:])
    check_invariants(pages, chunks, params)


def test_overlap_falls_back_to_token_boundaries_without_spaces():
    text = "お誕生日おめでとう" * 40
    params = SplitParams(max_tokens=30, overlap_tokens=6)
    pages = [page(1, P(text))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 3
    for before, after in zip(chunks, chunks[1:]):
        shared = text[after.char_start:before.char_end]
        assert shared and count(shared) <= 6
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
@given(_pages, st.integers(4, 200), st.integers(0, 20), st.sampled_from([0, 10, 100, 10_000]),
       st.sampled_from([0, 30, 10_000]), st.sampled_from([0.0, 0.5, 1.0]))
def test_invariants_hold_for_random_documents(page_blocks, max_tokens, overlap, merge, intro,
                                              tail):
    overlap = min(overlap, max_tokens - 1)
    params = SplitParams(max_tokens=max_tokens, overlap_tokens=overlap, merge_below_tokens=merge,
                         intro_below_tokens=intro, balance_tail_share=tail)
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


# -- merging small sections ----------------------------------------------------------


def test_small_sibling_sections_merge_under_their_parent():
    pages = [page(1, H("Guide", 1), P("About the guide."),
                  H("Loans", 2), P("How loans work."),
                  H("Fees", 2), P("No fees for members."))]
    [chunk] = split(pages, SplitParams(**MERGE), CTX)
    assert chunk.text == pages[0].text
    assert chunk.heading_path == ["Guide"]
    assert chunk.payload["merged_sections"] == 3
    check_invariants(pages, [chunk], SplitParams(**MERGE))


def test_merging_stays_under_the_first_sections_parent():
    params = SplitParams(max_tokens=120, **MERGE)
    pages = [page(1, H("Loans", 1), P(sentences(20)),            # too long: never merges
                  H("Renewals", 2), P("Renew twice online."),
                  H("Reservations", 2), P("Reserve up to five books."),
                  H("Fees", 1), P("No fees for members."),
                  H("Late returns", 2), P("Ten cents a day."))]
    chunks = split(pages, params, CTX)
    paths = [(c.heading_path, c.payload["merged_sections"]) for c in chunks]
    assert paths[-2:] == [(["Loans"], 2), (["Fees"], 2)]
    assert chunks[-2].text == "Renewals\n\nRenew twice online.\n\nReservations\n\nReserve up to five books."
    assert chunks[-1].text == "Fees\n\nNo fees for members.\n\nLate returns\n\nTen cents a day."
    assert all(n == 1 for _, n in paths[:-2])
    check_invariants(pages, chunks, params)


def test_a_subsection_does_not_merge_with_its_aunt():
    # Renewals sits under Loans; Fees is Loans' sibling, not Renewals'.
    params = SplitParams(max_tokens=120, **MERGE)
    pages = [page(1, H("Loans", 1), P(sentences(20)), H("Renewals", 2), P("Renew twice."),
                  H("Fees", 1), P("None."))]
    chunks = split(pages, params, CTX)
    assert [c.heading_path for c in chunks][-2:] == [["Loans", "Renewals"], ["Fees"]]


def test_merging_needs_a_small_section_and_respects_the_budget():
    body = sentences(3)  # about 35 tokens
    pages = [page(1, *[b for n in range(6) for b in (H(f"Rule {n}", 2), P(body))])]
    # No section is under 10 tokens: nothing merges.
    chunks = split(pages, SplitParams(merge_below_tokens=10), CTX)
    assert len(chunks) == 6
    # Every section is small: they merge while the budget allows, and never beyond it.
    params = SplitParams(max_tokens=100, merge_below_tokens=50)
    chunks = split(pages, params, CTX)
    assert [c.payload["merged_sections"] for c in chunks] == [2, 2, 2]
    assert all(c.heading_path == [] for c in chunks)  # rules are siblings at the top
    check_invariants(pages, chunks, params)


def test_a_section_that_needs_several_chunks_does_not_merge():
    params = SplitParams(max_tokens=60)
    pages = [page(1, H("Intro", 1), P("Short."), H("Rules", 1), P(sentences(10)))]
    chunks = split(pages, params, CTX)
    assert chunks[0].text == "Intro\n\nShort." and chunks[0].payload["merged_sections"] == 1
    assert all(c.heading_path == ["Rules"] for c in chunks[1:])


def test_by_default_sections_are_not_merged_joined_or_rebalanced():
    # The defaults the retrieval benchmark chose (bench/retrieval.py; figures in the
    # split docstring): every section its own chunks, packed greedily.
    params = SplitParams()
    assert (params.merge_below_tokens, params.intro_below_tokens,
            params.balance_tail_share) == (0, 0, 0.0)
    pages = [page(1, H("Guide", 1), P("About the guide."),
                  H("Loans", 2), P("How loans work."), H("Fees", 2), P("No fees."))]
    assert [c.heading_path for c in split(pages, params, CTX)] == [
        ["Guide"], ["Guide", "Loans"], ["Guide", "Fees"]]


# -- an intro with its first subsection ----------------------------------------------


def test_a_small_intro_stays_with_its_first_subsection_only():
    params = SplitParams(intro_below_tokens=30)
    pages = [page(1, H("Loans", 1), P("Members borrow in three ways."),
                  H("Books", 2), P("Three weeks, renewable twice."),
                  H("Films", 2), P("One week."))]
    chunks = split(pages, params, CTX)
    assert [c.text for c in chunks] == [
        "Loans\n\nMembers borrow in three ways.\n\nBooks\n\nThree weeks, renewable twice.",
        "Films\n\nOne week."]
    # The joined chunk sits under the intro's heading, the next under its subsection.
    assert [c.heading_path for c in chunks] == [["Loans"], ["Loans", "Films"]]
    assert [c.payload["merged_sections"] for c in chunks] == [2, 1]
    check_invariants(pages, chunks, params)


def test_an_intro_joins_only_when_small_and_within_the_budget():
    intro = sentences(3)  # about 35 tokens
    pages = [page(1, H("Loans", 1), P(intro), H("Books", 2), P(sentences(4, "books")))]
    whole = count(pages[0].text)
    # The intro is not under the threshold: no join.
    assert len(split(pages, SplitParams(intro_below_tokens=20), CTX)) == 2
    # Under it, and the two fit: one chunk.
    assert len(split(pages, SplitParams(intro_below_tokens=100, max_tokens=whole), CTX)) == 1
    # Under it, but the two need more than the budget: no join.
    params = SplitParams(intro_below_tokens=100, max_tokens=whole - 1)
    chunks = split(pages, params, CTX)
    assert [c.heading_path for c in chunks] == [["Loans"], ["Loans", "Books"]]
    check_invariants(pages, chunks, params)


def test_text_before_the_first_heading_is_no_intro():
    # It has no heading, so no section is under it.
    params = SplitParams(intro_below_tokens=100)
    pages = [page(1, P("Quillfern Library Cooperative."), H("Loans", 1), P("Three weeks."))]
    assert len(split(pages, params, CTX)) == 2


# -- a short last chunk --------------------------------------------------------------


def test_a_short_tail_rebalances_the_sections_chunks():
    pages = [page(1, H("Loans", 1), P(sentences(8)))]
    budget = 100
    greedy = split(pages, SplitParams(max_tokens=budget), CTX)
    sizes = [c.token_count for c in greedy]
    # Greedy packing leaves a short last chunk here (under 0.3 of the budget).
    assert len(sizes) == 2 and sizes[-1] < budget * 0.3, sizes
    params = SplitParams(max_tokens=budget, balance_tail_share=0.3)
    balanced = split(pages, params, CTX)
    # Same number of chunks, the same text, sizes about equal: no chunk is short.
    assert len(balanced) == 2
    assert min(c.token_count for c in balanced) > max(c.token_count for c in balanced) * 0.6
    check_invariants(pages, balanced, params)
    # A tail over the share is left as greedy packing made it.
    loose = SplitParams(max_tokens=budget, balance_tail_share=(sizes[-1] - 1) / budget)
    assert [c.token_count for c in split(pages, loose, CTX)] == sizes


# -- sentences -----------------------------------------------------------------------


def test_abbreviations_do_not_end_sentences():
    text = ("Bring proof of address, e.g. a utility bill. Dr. Weller signs the form. "
            "Bücher z. B. Romane bleiben drei Wochen. Die Gebühr beträgt ca. 2 Euro. "
            "Maps, atlases etc. are reference only. Ask at the desk! Is it open? Yes.")
    spans = [text[s:e] for s, e in _sentence_spans(text)]
    assert spans == [
        "Bring proof of address, e.g. a utility bill.",
        "Dr. Weller signs the form.",
        "Bücher z. B. Romane bleiben drei Wochen.",
        "Die Gebühr beträgt ca. 2 Euro.",
        "Maps, atlases etc. are reference only.",
        "Ask at the desk!",
        "Is it open?",
        "Yes.",
    ]


def test_cjk_full_stops_end_sentences_with_or_without_a_space():
    # The module docstring's rule: CJK full stops (and their closers) end a sentence
    # whatever follows; Latin punctuation only before whitespace and a non-lowercase word.
    text = "会员可以在线续借。请带上借书证！」今天开馆吗？ 开。Open at 9.30 today... and late? Yes!"
    spans = [text[s:e] for s, e in _sentence_spans(text)]
    assert spans == ["会员可以在线续借。", "请带上借书证！", "」今天开馆吗？", "开。",
                     "Open at 9.30 today... and late?", "Yes!"]


def test_long_paragraph_is_cut_between_sentences_not_after_abbreviations():
    sentence = "Members, e.g. Dr. Weller and Prof. Amsel, renew z. B. online or at the desk. "
    params = SplitParams(max_tokens=40)
    pages = [page(1, P((sentence * 12).strip()))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 3
    assert all(c.text.endswith("at the desk.") for c in chunks)
    check_invariants(pages, chunks, params)


# -- chunk language ------------------------------------------------------------------


def lang_block(text, language, prob):
    return Block(PARAGRAPH, text, 0, language, prob)


def test_chunk_language_is_the_character_weighted_block_language():
    english, german = "Members renew online. " * 6, "Mitglieder verlängern online. " * 2
    pages = [page(1, lang_block(english.strip(), "en", 0.9), lang_block(german.strip(), "de", 1.0),
                  language="de")]
    [chunk] = split(pages, SplitParams(), CTX)
    n_en, n_de = len(english.strip()), len(german.strip())
    assert chunk.language == "en"  # more characters, though the page says German
    assert chunk.language_prob == pytest.approx(0.9 * n_en / (n_en + n_de))


def test_chunk_language_per_chunk_when_a_page_switches_language():
    params = SplitParams(max_tokens=60, **NOMERGE)
    pages = [page(1, H("Hours", 2), lang_block(sentences(6), "en", 0.99),
                  H("Öffnungszeiten", 2), lang_block(sentences(6, "die Regeln"), "de", 0.97))]
    chunks = split(pages, params, CTX)
    assert len(chunks) > 2
    assert {c.language for c in chunks if c.heading_path == ["Hours"]} == {"en"}
    assert {c.language for c in chunks if c.heading_path == ["Öffnungszeiten"]} == {"de"}


def test_chunk_without_judged_blocks_takes_its_pages_language():
    pages = [page(1, H("Fees", 2), P("None."))]  # short blocks: not judged
    [chunk] = split(pages, SplitParams(), CTX)
    assert (chunk.language, chunk.language_prob) == ("en", 0.99)
    unknown = [Page(locator="page/1", page=1, blocks=[P("None.")], language="unknown")]
    assert split(unknown, SplitParams(), CTX)[0].language == "unknown"
    # No language step in the chain: no language at all.
    bare = [Page(locator="file", page=None, blocks=[P("None.")])]
    assert split(bare, SplitParams(), CTX)[0].language is None


def test_unknown_blocks_do_not_vote():
    unsure = ("x " * 30).strip()
    pages = [page(1, lang_block(unsure, "unknown", 0.5), lang_block("Renew online today.", "fr", 0.95),
                  language="en")]
    [chunk] = split(pages, SplitParams(), CTX)
    # French is the only language named; the unsure block weighs against its probability.
    n_fr = len("Renew online today.")
    assert chunk.language == "fr"
    assert chunk.language_prob == pytest.approx(0.95 * n_fr / (n_fr + len(unsure)))


# -- another encoding ----------------------------------------------------------------

# One token per UTF-8 byte: a real tiktoken Encoding that needs no file, so the budget
# can be checked in an encoding other than cl100k_base.
BYTES = tiktoken.Encoding(name="bytes_only", pat_str=r"(?s:.+)",
                          mergeable_ranks={bytes([b]): b for b in range(256)}, special_tokens={})
BYTES_CTX = StepContext(encoding=lambda name: BYTES if name == "bytes_only" else get_encoding(name))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_pages, st.integers(8, 300), st.integers(0, 30), st.sampled_from([0, 40, 1000]),
       st.sampled_from([0.0, 1.0]))
def test_invariants_hold_in_a_byte_encoding(page_blocks, max_tokens, overlap, merge, tail):
    overlap = min(overlap, max_tokens - 1)
    params = SplitParams(max_tokens=max_tokens, overlap_tokens=overlap, encoding="bytes_only",
                         merge_below_tokens=merge, balance_tail_share=tail)
    pages = [page(n + 1, *blocks) for n, blocks in enumerate(page_blocks)]
    chunks = split(pages, params, BYTES_CTX)
    assert all(c.ok and len(c.text.encode("utf-8")) <= max_tokens for c in chunks)
    check_invariants(pages, chunks, params, enc=BYTES)


def test_a_sentence_ending_in_a_colon_stays_with_what_it_introduces():
    # Common practice: "To renew a loan, do this:" introduces the steps; a chunk that
    # would end on it gives it to the next chunk. The budget is chosen so that greedy
    # packing would cut right after the colon.
    lead = sentences(6)
    intro = "To renew a loan at the Quillfern desk, do this:"
    steps = "- Bring the book.\n- Show your card.\n- Sign the slip."
    pages = [page(1, H("Loans", 1), P(lead), P(intro), P(steps))]
    budget = count("Loans\n\n" + lead + "\n\n" + intro) + 1
    assert count("Loans\n\n" + lead + "\n\n" + intro + "\n\n" + steps) > budget
    chunks = split(pages, SplitParams(max_tokens=budget, **NOMERGE), CTX)
    assert [c.text for c in chunks] == ["Loans\n\n" + lead, intro + "\n\n" + steps]
