"""The dedup step: exact duplicates across the corpus, canonical by document rank."""

from __future__ import annotations

import hashlib

import pydantic
import pytest

from thresher.steps.dedup import DEDUP, DedupParams, content_hash, deduplicate, normalise
from thresher.steps.units import DROPPED, FAILED, OK, Chunk, DocChunks, chunk_locator


def chunk(doc, i, text):
    return Chunk(locator=chunk_locator(i), index=i, text=text, chunk_id=f"{doc}-c{i}",
                 heading_path=["Rules"], page_start=1, page_end=1, char_start=0,
                 char_end=len(text), token_count=5, encoding="cl100k_base")


def doc(name, rank, *texts):
    return DocChunks(doc_id=f"id-{name}", source_path=f"{name}.md", rank=rank,
                     chunks=[chunk(name, i, t) for i, t in enumerate(texts)])


NOTICE = "Opening hours: Monday to Friday, 9 to 17."


def test_copy_in_two_documents_lower_rank_is_canonical():
    # The later-seen document comes first in the list; rank, not order, decides.
    newer = doc("newer", 7, "Welcome to the east branch.", NOTICE)
    older = doc("older", 2, NOTICE, "Parking is behind the building.")
    out = deduplicate([newer, older], DedupParams())
    by_id = {c.chunk_id: c for c in out}
    dup, canon = by_id["newer-c1"], by_id["older-c0"]
    assert canon.status == OK and canon.payload["duplicate_of"] is None
    assert canon.payload["similarity"] is None
    assert dup.status == DROPPED
    assert dup.payload["duplicate_of"] == "older-c0" and dup.payload["similarity"] == 1.0
    assert dup.payload["content_hash"] == canon.payload["content_hash"]
    assert dup.reason == ("exact duplicate of chunk older-c0 in older.md (same text after "
                          "NFKC normalisation and folding case, whitespace and punctuation)")
    assert [c.status for c in out].count(DROPPED) == 1


def test_case_punctuation_and_whitespace_variants_match():
    a = doc("a", 1, "Opening hours: Monday to Friday, 9 to 17.")
    b = doc("b", 2, "opening hours  monday to friday 9 to 17")
    c = doc("c", 3, "OPENING HOURS — Monday to Friday (9 to 17)!\n")
    out = deduplicate([a, b, c], DedupParams())
    assert [x.payload["duplicate_of"] for x in out] == [None, "a-c0", "a-c0"]


def test_folds_can_be_switched_off():
    a = doc("a", 1, "Opening hours: Monday to Friday.")
    b = doc("b", 2, "opening hours: monday to friday.")
    c = doc("c", 3, "Opening hours Monday to Friday")
    out = deduplicate([a, b, c], DedupParams(fold_case=False))
    assert [x.status for x in out] == [OK, OK, DROPPED]
    assert "folding whitespace and punctuation" in out[2].reason
    out = deduplicate([a, b, c], DedupParams(fold_punctuation=False))
    assert [x.status for x in out] == [OK, DROPPED, OK]
    out = deduplicate([a, b, c], DedupParams(fold_case=False, fold_punctuation=False,
                                             fold_whitespace=False, fold_unicode=False))
    assert [x.status for x in out] == [OK, OK, OK]


def test_nfkc_makes_ligatures_and_full_width_forms_match():
    a = doc("a", 1, "The \ufb01rst floor")  # U+FB01 ligature
    b = doc("b", 2, "\uff34\uff48\uff45 first floor")  # full-width "The"
    out = deduplicate([a, b], DedupParams())
    assert out[1].payload["duplicate_of"] == "a-c0"


def test_within_one_document_the_first_chunk_is_canonical():
    d = doc("manual", 1, "Return books to the desk.", "Other text.", "Return books to the desk!")
    out = deduplicate([d], DedupParams())
    assert [x.status for x in out] == [OK, OK, DROPPED]
    assert out[2].reason.startswith("exact duplicate of chunk manual-c0 in manual.md")


def test_content_hash_is_sha256_of_the_normalised_text():
    text = "  Hello,   World! "
    assert normalise(text, DedupParams()) == "hello world"
    assert content_hash(text, DedupParams()) == hashlib.sha256(b"hello world").hexdigest()
    [out] = deduplicate([doc("a", 1, text)], DedupParams())
    assert out.payload["content_hash"] == hashlib.sha256(b"hello world").hexdigest()


def test_punctuation_only_chunks_do_not_all_collide():
    out = deduplicate([doc("a", 1, "* * *", "- - -", "* * *")], DedupParams())
    assert [x.status for x in out] == [OK, OK, DROPPED]


def test_every_chunk_comes_back_with_identity_and_lineage():
    a = doc("a", 1, "One.", "Two.")
    b = doc("b", 2, "Two.", "Three.")
    out = deduplicate([a, b], DedupParams())
    assert [x.chunk_id for x in out] == ["a-c0", "a-c1", "b-c0", "b-c1"]
    assert [x.parents for x in out] == [["chunk/00000"], ["chunk/00001"]] * 2
    assert all(x.heading_path == ["Rules"] and x.char_end == len(x.text) for x in out)
    assert a.chunks[0].payload == {} and b.chunks[0].status == OK  # inputs untouched


def test_a_failed_chunk_is_never_canonical():
    a = doc("a", 1, NOTICE)
    a.chunks[0].fail("broken upstream")
    b = doc("b", 2, NOTICE)
    out = deduplicate([a, b], DedupParams())
    assert out[0].status == FAILED
    assert out[1].status == OK and out[1].payload["duplicate_of"] is None


def test_equal_ranks_are_broken_by_path_deterministically():
    x = doc("x", 1, NOTICE)
    y = doc("y", 1, NOTICE)
    assert deduplicate([y, x], DedupParams())[0].payload["duplicate_of"] == "x-c0"
    assert deduplicate([x, y], DedupParams())[1].payload["duplicate_of"] == "x-c0"


def test_params_are_checked():
    with pytest.raises(pydantic.ValidationError):
        DedupParams(near_duplicates=True)  # unknown key
    assert (DEDUP.name, DEDUP.consumes, DEDUP.produces, DEDUP.scope) == (
        "dedup", "chunks", "chunks", "corpus")
