"""The dedup step: exact, whole-document and near-duplicates across the corpus, canonical
by document rank, and its incremental form (sketch + decide over stored rows)."""

from __future__ import annotations

import hashlib
import random

import pyarrow as pa
import pydantic
import pytest

from thresher.steps.dedup import (DECISION_COLUMNS, DEDUP, SKETCH_COLUMNS, DedupParams, content_hash, decide,
                                  deduplicate, fresh_table, normalise, sketch)
from thresher.steps.incremental import IncrementalCorpusSpec
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
        DedupParams(threshold=0.8)  # unknown key: the name is min_similarity
    for bad in ({"min_similarity": 1.0}, {"min_similarity": 0}, {"shingle_words": 0}, {"signature_size": 8}):
        with pytest.raises(pydantic.ValidationError):
            DedupParams(**bad)
    assert (DEDUP.name, DEDUP.consumes, DEDUP.produces, DEDUP.scope) == (
        "dedup", "chunks", "chunks", "corpus")
    assert isinstance(DEDUP, IncrementalCorpusSpec) and DEDUP.version != "1"


# ----------------------------------------------------------------------------- near-duplicates

RNG = random.Random(42)
VOCAB = [f"{a}{b}" for a in ("lend", "book", "desk", "card", "fine", "loan", "hold", "shelf")
         for b in ("ing", "er", "s", "ed", "ly", "ward", "ness", "al", "ish", "ous")] + \
    [f"word{i}" for i in range(3000)]


def words(n: int, rng: random.Random = RNG) -> list[str]:
    return [rng.choice(VOCAB) for _ in range(n)]


def shingles(text: str, k: int = 5) -> set[tuple[str, ...]]:
    w = normalise(text, DedupParams()).split()
    return {tuple(w[i:i + k]) for i in range(len(w) - k + 1)}


def jaccard(a: str, b: str, k: int = 5) -> float:
    x, y = shingles(a, k), shingles(b, k)
    return len(x & y) / len(x | y)


def variant(base: list[str], changes: int, rng: random.Random = RNG) -> list[str]:
    out = list(base)
    for i in rng.sample(range(len(out)), changes):
        out[i] = rng.choice(VOCAB)
    return out


BASE = words(300)
CLOSE = " ".join(variant(BASE, 3))  # about 0.9 similar over 5-word shingles
FAR = " ".join(variant(BASE, 40))  # about 0.3
TEXT = " ".join(BASE)


def test_a_near_duplicate_is_dropped_with_its_similarity_and_reason():
    assert jaccard(TEXT, CLOSE) > 0.88 and jaccard(TEXT, FAR) < 0.5
    old = doc("policy-2025", 0, TEXT, "Unrelated opening line of the older policy.")
    new = doc("policy-2026", 1, "A new opening line for this year.", CLOSE, FAR)
    out = {c.chunk_id: c for c in deduplicate([new, old], DedupParams())}
    near, far = out["policy-2026-c1"], out["policy-2026-c2"]
    assert near.status == DROPPED and near.payload["duplicate_of"] == "policy-2025-c0"
    assert near.payload["duplicate_kind"] == "near"
    # The estimate, within 4 standard errors sqrt(J(1-J)/k) of the exact similarity.
    j = jaccard(TEXT, CLOSE)
    assert abs(near.payload["similarity"] - j) <= 4 * (j * (1 - j) / 128) ** 0.5
    assert near.reason == (f"near-duplicate (estimated Jaccard {near.payload['similarity']:.2f} over 5-word "
                           "shingles) of chunk policy-2025-c0 in policy-2025.md")
    assert far.status == OK and far.payload["duplicate_of"] is None and far.payload["similarity"] is None
    assert out["policy-2025-c0"].status == OK
    assert len(near.payload["signature"]) == 128 and len(near.payload["band_keys"]) == 14


def test_near_duplicates_can_be_switched_off_and_shingle_size_is_named():
    old, new = doc("a", 0, TEXT), doc("b", 1, CLOSE)
    out = deduplicate([old, new], DedupParams(near_duplicates=False))
    assert [c.status for c in out] == [OK, OK]
    assert out[1].payload["signature"] is None and out[1].payload["content_hash"]
    out = deduplicate([old, new], DedupParams(shingle_words=3))
    assert out[1].status == DROPPED and "over 3-word shingles" in out[1].reason


def test_the_threshold_decides_between_kept_and_dropped():
    mid = " ".join(variant(BASE, 12))
    j = jaccard(TEXT, mid)
    assert 0.55 < j < 0.75
    loose = deduplicate([doc("a", 0, TEXT), doc("b", 1, mid)], DedupParams(min_similarity=j - 0.2))
    strict = deduplicate([doc("a", 0, TEXT), doc("b", 1, mid)], DedupParams(min_similarity=min(0.95, j + 0.2)))
    assert loose[1].status == DROPPED and strict[1].status == OK


def test_a_chain_of_near_duplicates_names_the_canonical_and_says_it_is_a_chain():
    rng = random.Random(3)
    base = words(300, rng)
    steps = [base]
    for _ in range(4):  # each step about 0.9 similar to the one before, drifting away
        steps.append(variant(steps[-1], 3, rng))
    docs = [doc(f"v{i}", i, " ".join(w)) for i, w in enumerate(steps)]
    out = deduplicate(docs, DedupParams())
    assert [c.payload["duplicate_of"] for c in out] == [None] + ["v0-c0"] * 4
    # The last one is too far from the first to be its near-duplicate directly.
    assert jaccard(" ".join(steps[0]), " ".join(steps[-1])) < 0.72
    last = out[-1]
    assert last.payload["similarity"] < 0.8
    assert last.reason.startswith("near-duplicate of chunk v0-c0 in v0.md through a chain of near-duplicates")
    assert "each link at least 0.80 over 5-word shingles" in last.reason


def test_decisions_do_not_depend_on_input_order():
    rng = random.Random(9)
    docs = []
    for i in range(12):
        base = words(120, rng)
        docs.append(doc(f"d{i:02d}", i, " ".join(base), " ".join(variant(base, 2, rng)), NOTICE))
    want = [(c.chunk_id, c.status, c.reason, c.payload["similarity"]) for c in deduplicate(docs, DedupParams())]
    shuffled = list(docs)
    random.Random(1).shuffle(shuffled)
    got = {c.chunk_id: (c.chunk_id, c.status, c.reason, c.payload["similarity"])
           for c in deduplicate(shuffled, DedupParams())}
    assert [got[w[0]] for w in want] == want


# ----------------------------------------------------------------------------- whole documents


def test_a_document_with_the_same_normalised_text_is_a_copy_of_the_earlier_one():
    original = doc("rules", 0, "Return books to the desk.", "Fines are charged daily.", TEXT)
    retyped = doc("rules-copy", 1, "RETURN BOOKS TO THE DESK", "fines are charged   daily", TEXT)
    other = doc("other", 2, "Return books to the desk.", "Something else entirely here.")
    out = {c.chunk_id: c for c in deduplicate([original, retyped, other], DedupParams())}
    copies = [out[f"rules-copy-c{i}"] for i in range(3)]
    assert all(c.status == DROPPED and c.payload["duplicate_kind"] == "document" for c in copies)
    assert [c.payload["duplicate_of"] for c in copies] == ["rules-c0", "rules-c1", "rules-c2"]
    assert copies[0].reason.startswith("copy of document rules.md: the whole text is the same (same text after "
                                       "NFKC normalisation")
    assert copies[0].reason.endswith("this chunk is kept there as chunk rules-c0")
    assert all(c.payload["document_hash"] == out["rules-c0"].payload["document_hash"] for c in copies)
    # Sharing one chunk is not a document copy: that chunk is an exact duplicate only.
    assert out["other-c0"].payload["duplicate_kind"] == "exact" and out["other-c1"].status == OK


def test_a_copy_whose_counterpart_is_itself_a_duplicate_names_both_and_the_kept_chunk():
    # The policy's first paragraph also opens the older notice; the policy's copy then
    # has a counterpart (policy-c0) that is itself dropped, and the kept chunk is elsewhere.
    notice = doc("notice", 0, "Return books to the desk.", "The notice board is by the door.")
    policy = doc("policy", 1, "Return books to the desk.", "Fines are charged daily.")
    copy = doc("policy-copy", 2, "Return books to the desk.", "Fines are charged daily.")
    out = {c.chunk_id: c for c in deduplicate([notice, policy, copy], DedupParams())}
    first = out["policy-copy-c0"]
    assert first.status == DROPPED and first.payload["duplicate_kind"] == "document"
    assert first.payload["duplicate_of"] == "notice-c0"
    assert first.reason.startswith("copy of document policy.md: the whole text is the same")
    assert first.reason.endswith("its counterpart there (chunk policy-c0) is itself a duplicate; "
                                 "kept: chunk notice-c0 in notice.md")
    assert out["policy-copy-c1"].reason.endswith("this chunk is kept there as chunk policy-c1")
    assert out["policy-c0"].payload["duplicate_of"] == "notice-c0" and out["policy-c1"].status == OK


def test_a_copy_split_differently_still_counts_as_a_copy():
    first = " ".join(BASE[:150])
    second = " ".join(BASE[150:])
    original = doc("manual", 0, first, second)
    resplit = doc("manual-export", 1, " ".join(BASE[:100]), " ".join(BASE[100:]))
    out = {c.chunk_id: c for c in deduplicate([resplit, original], DedupParams())}
    for i in range(2):
        c = out[f"manual-export-c{i}"]
        assert c.status == DROPPED and c.payload["duplicate_kind"] == "document"
        assert c.payload["duplicate_of"] in ("manual-c0", "manual-c1")
        assert "split differently there" in c.reason
    assert out["manual-c0"].status == OK and out["manual-c1"].status == OK


# ----------------------------------------------------------------------------- incremental form


def _stored(sketches: pa.Table, decisions: pa.Table, ranks: dict[str, tuple[int, str]]) -> pa.Table:
    """What the flows hand back for unchanged documents: the stored sketch and decision."""
    dec = {r["chunk_id"]: r for r in decisions.to_pylist()}
    rows = []
    for r in sketches.to_pylist():
        d = dec[r["chunk_id"]]
        rows.append({**r, **{c: d[c] for c in ("status", "reason", *DECISION_COLUMNS)}})
    t = pa.Table.from_pylist(rows, schema=sketches.schema.append(pa.field("status", pa.string()))
                             .append(pa.field("reason", pa.string())).append(pa.field("duplicate_of", pa.string()))
                             .append(pa.field("duplicate_kind", pa.string()))
                             .append(pa.field("similarity", pa.float64())))
    ids = t.column("doc_id").to_pylist()
    return t.append_column("rank", pa.array([ranks[d][0] for d in ids], pa.int64())) \
        .append_column("source_path", pa.array([ranks[d][1] for d in ids])) \
        .append_column("fresh", pa.array([False] * len(ids)))


def _scratch(docs: list[DocChunks], params: DedupParams) -> dict[str, tuple]:
    sk = sketch(docs, params)
    return {r["chunk_id"]: (r["status"], r["reason"], r["duplicate_of"], r["similarity"])
            for r in decide(fresh_table(sk, docs), params).to_pylist()}


def _week(docs: list[DocChunks]):
    params = DedupParams()
    sk = {d.doc_id: sketch([d], params) for d in docs}
    decisions = decide(fresh_table(pa.concat_tables(sk.values()), docs), params)
    return params, sk, decisions


def test_sketches_depend_on_each_document_alone():
    a, b = doc("a", 0, TEXT, NOTICE), doc("b", 1, CLOSE)
    both = sketch([a, b], DedupParams())
    apart = pa.concat_tables([sketch([a], DedupParams()), sketch([b], DedupParams())])
    assert both.equals(apart)
    assert set(SKETCH_COLUMNS) <= set(both.column_names)


def test_when_the_canonical_document_goes_its_duplicates_come_back():
    old = doc("policy-2025", 0, TEXT, NOTICE)
    new = doc("policy-2026", 1, CLOSE, NOTICE, "Only in 2026.")
    other = doc("notes", 2, NOTICE)
    params, sk, week1 = _week([old, new, other])
    assert {r["chunk_id"]: r["duplicate_of"] for r in week1.to_pylist()}["policy-2026-c0"] == "policy-2025-c0"
    # Next week policy-2025 is deleted; the other two are unchanged and come from the store.
    ranks = {"id-policy-2026": (0, "policy-2026.md"), "id-notes": (1, "notes.md")}
    stored = _stored(pa.concat_tables([sk["id-policy-2026"], sk["id-notes"]]), week1, ranks)
    changed = {r["chunk_id"]: r for r in decide(stored, params).to_pylist()}
    # Only decisions that changed come back: the 2026 chunks that were duplicates of
    # 2025's are ok now, and the notes' copy of the notice now points into 2026.
    assert set(changed) == {"policy-2026-c0", "policy-2026-c1", "notes-c0"}
    assert changed["policy-2026-c0"]["status"] == OK and changed["policy-2026-c0"]["duplicate_of"] is None
    assert changed["policy-2026-c1"]["status"] == OK
    assert changed["notes-c0"]["duplicate_of"] == "policy-2026-c1"
    # And every decision equals what a run from scratch over the remaining drive gives.
    want = _scratch([doc("policy-2026", 0, CLOSE, NOTICE, "Only in 2026."), doc("notes", 1, NOTICE)], params)
    for cid, r in changed.items():
        assert (r["status"], r["reason"], r["duplicate_of"], r["similarity"]) == want[cid]


def test_an_unchanged_corpus_needs_no_decision_and_new_documents_are_compared_with_stored_ones():
    old = doc("a", 0, TEXT)
    second = doc("b", 1, "Completely separate words about vans and rotas for the weekend.")
    params, sk, week1 = _week([old, second])
    ranks = {"id-a": (0, "a.md"), "id-b": (1, "b.md")}
    stored = _stored(pa.concat_tables(sk.values()), week1, ranks)
    assert decide(stored, params).num_rows == 0
    # A new document arrives: only its own chunk is decided, against stored signatures.
    arrival = doc("c", 2, CLOSE)
    fresh = fresh_table(sketch([arrival], params), [arrival])
    got = decide(pa.concat_tables([fresh, stored], promote_options="default"), params).to_pylist()
    assert [(r["chunk_id"], r["status"], r["duplicate_of"]) for r in got] == [("c-c0", DROPPED, "a-c0")]
    assert got[0]["reason"] == _scratch([old, second, arrival], params)["c-c0"][1]


def test_a_renamed_canonical_updates_the_reasons_that_name_it():
    params, sk, week1 = _week([doc("a", 0, TEXT), doc("b", 1, CLOSE)])
    stored = _stored(pa.concat_tables(sk.values()), week1, {"id-a": (0, "archive/a.md"), "id-b": (1, "b.md")})
    [r] = decide(stored, params).to_pylist()
    assert r["chunk_id"] == "b-c0" and "in archive/a.md" in r["reason"] and r["duplicate_of"] == "a-c0"


def test_stored_rows_that_failed_take_no_part():
    params, sk, week1 = _week([doc("a", 0, TEXT), doc("b", 1, CLOSE)])
    stored = _stored(pa.concat_tables(sk.values()), week1, {"id-a": (0, "a.md"), "id-b": (1, "b.md")})
    status = stored.column("status").to_pylist()
    status[0] = FAILED  # a-c0
    stored = stored.set_column(stored.column_names.index("status"), "status", pa.array(status))
    [r] = decide(stored, params).to_pylist()
    assert r["chunk_id"] == "b-c0" and r["status"] == OK
