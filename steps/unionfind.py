"""Disjoint sets (union-find) whose root is always the set's smallest member.

Deduplication numbers chunks in canonical order first, so "smallest member" is the
canonical chunk of a cluster and no separate pass is needed to choose it. Union by
smallest index does not balance trees, but path halving keeps finds short
(Tarjan and van Leeuwen, "Worst-case analysis of set union algorithms", 1984).
"""

from __future__ import annotations

import numpy as np


class UnionFind:
    def __init__(self, parent: int | np.ndarray):
        """`parent` is a size (each element alone) or a forest given as parent indices.

        A given forest must point every element at a smaller or equal index.
        """
        if isinstance(parent, (int, np.integer)):
            self.parent = list(range(int(parent)))
        else:
            arr = np.asarray(parent, dtype=np.int64)
            if arr.size and (arr > np.arange(arr.size)).any():
                raise ValueError("a parent must not come after its child")
            self.parent = arr.tolist()

    def find(self, x: int) -> int:
        parent = self.parent
        while parent[x] != x:
            parent[x] = parent[parent[x]]  # path halving
            x = parent[x]
        return x

    def union(self, a: int, b: int) -> int:
        """Join the sets of a and b; the smaller root becomes the root of both."""
        ra, rb = self.find(a), self.find(b)
        if ra == rb:
            return ra
        if rb < ra:
            ra, rb = rb, ra
        self.parent[rb] = ra
        return ra

    def union_pairs(self, a: np.ndarray, b: np.ndarray) -> None:
        for x, y in zip(np.asarray(a).tolist(), np.asarray(b).tolist()):
            self.union(x, y)

    def roots(self) -> np.ndarray:
        """Root of every element, by pointer jumping over the whole forest at once."""
        r = np.asarray(self.parent, dtype=np.int64)
        while True:
            nxt = r[r]
            if np.array_equal(nxt, r):
                return r
            r = nxt
