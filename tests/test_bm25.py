"""BM25 (steps/bm25.py) against a published implementation and the paper's formula.

Reference: rank-bm25 0.2.2 (PyPI), class BM25Okapi, which implements Robertson &
Zaragoza's BM25 with the (k1 + 1) factor in the numerator (a constant for the ranking)
and, unlike the paper, replaces a negative idf by a floor; on a corpus where no query
term is in more than half of the texts the two must agree up to that constant.
"""

from __future__ import annotations

import math

import pytest
from rank_bm25 import BM25Okapi

from thresher.steps.bm25 import BM25, terms

TEXTS = [
    "The Quillfern library lends books to members of the reading circle.",
    "Members renew a loan at the desk or online before the due date.",
    "The reading circle meets on Thursdays in the east room of the library.",
    "Overdue books cost a small fee per day; the fee is capped per loan.",
    "Volunteers shelve returned books every morning.",
    "The east room can be booked for meetings by any member.",
]


@pytest.mark.parametrize("query", ["reading circle", "overdue fee per day",
                                   "renew loan online", "east room meetings"])
def test_scores_match_rank_bm25(query):
    ours = BM25(TEXTS)
    ref = BM25Okapi([terms(t) for t in TEXTS], k1=1.2, b=0.75)
    expected = ref.get_scores(terms(query))
    got = ours.scores(query)
    for a, b in zip(got, expected):
        assert a * (1.2 + 1) == pytest.approx(b, rel=1e-9)
    assert ours.rank(query)[0] == max(range(len(TEXTS)), key=lambda i: expected[i])


def test_common_term_weight_is_negative_as_published():
    # Robertson & Zaragoza (2009): w = log((N - n + 0.5) / (n + 0.5)); "the" is in
    # 5 of 6 texts, so its weight is log(1.5 / 5.5) < 0 (no floor).
    index = BM25(TEXTS)
    assert index.idf("the") == pytest.approx(math.log(1.5 / 5.5))
    assert index.scores("the")[4] == 0.0  # text 4 has no "the"
    assert index.scores("the")[0] < 0
