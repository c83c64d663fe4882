"""BM25 ranking of texts for a query, as published by Robertson & Zaragoza (2009).

Source: S. Robertson, H. Zaragoza, "The Probabilistic Relevance Framework: BM25 and
Beyond", Foundations and Trends in Information Retrieval 3(4), 2009, section 3.4
(formulas written here from memory of that text). A document's score for a query is
the sum over the query's distinct terms t of

    w_t = tf / (k1 * ((1 - b) + b * dl / avdl) + tf) * log((N - n_t + 0.5) / (n_t + 0.5))

with tf the term's frequency in the document, dl the document's length in terms, avdl
the mean length, N the number of documents and n_t the number holding t. The second
factor is the Robertson/Sparck Jones weight without relevance information; it is
negative for a term in more than half of the documents, as published (no floor). The
(k1 + 1) factor some write in the numerator does not change the ranking and is left
out. k1 = 1.2 and b = 0.75 are the usual values the paper discusses.

Terms are lowercased runs of word characters (no stemming, no stop words), so the
ranking is the plain method, with nothing tuned to a corpus. Pure: no I/O.
"""

from __future__ import annotations

import math
import re
from collections import Counter
from dataclasses import dataclass, field

_TERM = re.compile(r"\w+")


def terms(text: str) -> list[str]:
    """The text's terms in order: lowercased runs of word characters."""
    return _TERM.findall(text.lower())


@dataclass
class BM25:
    """An index over a fixed list of texts; `rank(query)` gives their indexes, best first."""

    texts: list[str]
    k1: float = 1.2
    b: float = 0.75
    _tf: list[Counter] = field(init=False, repr=False)
    _len: list[int] = field(init=False, repr=False)
    _df: Counter = field(init=False, repr=False)
    _avdl: float = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self._tf = [Counter(terms(t)) for t in self.texts]
        self._len = [sum(c.values()) for c in self._tf]
        self._df = Counter()
        for counts in self._tf:
            self._df.update(counts.keys())
        self._avdl = (sum(self._len) / len(self._len)) if self._len else 0.0

    def idf(self, term: str) -> float:
        n, df = len(self.texts), self._df.get(term, 0)
        return math.log((n - df + 0.5) / (df + 0.5))

    def scores(self, query: str) -> list[float]:
        q = set(terms(query))
        weights = {t: self.idf(t) for t in q if t in self._df}
        out = []
        for counts, dl in zip(self._tf, self._len):
            norm = self.k1 * ((1 - self.b) + self.b * dl / self._avdl) if self._avdl else self.k1
            score = 0.0
            for t, w in weights.items():
                tf = counts.get(t, 0)
                if tf:
                    score += tf / (norm + tf) * w
            out.append(score)
        return out

    def rank(self, query: str, k: int | None = None) -> list[int]:
        """Indexes of the texts, highest score first (ties: earlier text first)."""
        s = self.scores(query)
        order = sorted(range(len(s)), key=lambda i: (-s[i], i))
        return order if k is None else order[:k]
