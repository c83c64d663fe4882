"""Near-duplicate detection checked against the published theory and a reference library.

- Banding: Leskovec, Rajaraman and Ullman, "Mining of Massive Datasets" (3rd ed.),
  chapter 3, section 3.4.2: with b bands of r rows, two sets of Jaccard similarity s
  become candidates with probability 1 - (1 - s^r)^b.
- MinHash: A. Broder, "On the resemblance and containment of documents" (1997), and
  MMDS section 3.3.3: P[minhash(A) = minhash(B)] = J(A, B), so the share of equal
  minima over k functions is an unbiased estimate with standard error sqrt(J(1-J)/k)
  (a binomial proportion).
- datasketch (PyPI), an independent MinHash/LSH implementation, as a reference for the
  band/row rule and for the size of estimation errors.

Pairs of known similarity are built directly as sets of shingle values: a pair with
union size 100 and intersection 100*s has Jaccard similarity exactly s.
"""

from __future__ import annotations

import random

import numpy as np
import pytest

from thresher.steps import minhash as mh
from thresher.steps.dedup import DedupParams, normalise

N_PAIRS = 3000


def _pairs_with_jaccard(rng: np.random.Generator, s: float, n_pairs: int, union: int = 100):
    """n_pairs pairs of sets whose Jaccard similarity is exactly s; (values, starts, n)."""
    inter = int(round(s * union))
    only = (union - inter) // 2
    assert inter / (inter + 2 * only) == pytest.approx(s)
    width = inter + 2 * only
    vals = rng.integers(0, 2 ** 32, size=(n_pairs, width), dtype=np.uint64)
    a = vals[:, :inter + only]
    b = np.concatenate([vals[:, :inter], vals[:, inter + only:]], axis=1)
    sets = np.concatenate([a, b])
    m = sets.shape[1]
    return sets.reshape(-1), np.arange(0, 2 * n_pairs * m + 1, m)


SIMILARITIES = (0.3, 0.5, 0.6, 0.7, 0.8, 0.9)


@pytest.mark.parametrize("k, bands, rows", [(128, 14, 9), (128, 9, 13), (64, 8, 8)])
def test_the_share_of_pairs_that_share_a_band_follows_the_s_curve(k, bands, rows):
    # MMDS 3.4.2: P(candidate) = 1 - (1 - s^r)^b. Each share is a binomial proportion
    # over N_PAIRS independent pairs, so it must lie within 4 standard errors (plus one
    # pair for the tails where p is near 0 or 1).
    rng = np.random.default_rng(2026 + k + bands)
    for s in SIMILARITIES:
        values, starts = _pairs_with_jaccard(rng, s, N_PAIRS)
        sig = mh.signatures(values, starts, k)
        keys = mh.band_keys(sig, bands, rows)
        share = float((keys[:N_PAIRS] == keys[N_PAIRS:]).any(axis=1).mean())
        p = float(mh.collision_probability(s, bands, rows))
        tol = 4 * np.sqrt(p * (1 - p) / N_PAIRS) + 1 / N_PAIRS
        assert abs(share - p) <= tol, (s, share, p)


@pytest.mark.parametrize("k", [64, 128, 256])
def test_the_minhash_estimate_is_unbiased_with_standard_error_sqrt_j_1_minus_j_over_k(k):
    # Broder 1997 / MMDS 3.3.3. Mean within 4 standard errors of the mean; the spread of
    # the estimates within 6% of sqrt(J(1-J)/k) (the sample standard deviation over
    # 3000 pairs has a relative error of about 1/sqrt(2*3000) = 1.3%).
    rng = np.random.default_rng(k)
    for s in SIMILARITIES:
        values, starts = _pairs_with_jaccard(rng, s, N_PAIRS)
        sig = mh.signatures(values, starts, k)
        est = mh.agreement(sig[:N_PAIRS], sig[N_PAIRS:])
        se = np.sqrt(s * (1 - s) / k)
        assert abs(est.mean() - s) <= 4 * se / np.sqrt(N_PAIRS), (s, est.mean())
        assert est.std(ddof=1) / se == pytest.approx(1.0, abs=0.06), (s, est.std(ddof=1), se)


def test_bands_and_rows_match_datasketch_for_the_same_weights():
    # datasketch's MinHashLSH picks (b, r) by minimising weighted false positive and
    # false negative areas under the same S-curve (scipy quadrature); our trapezoid
    # rule must land on the same (b, r). _optimal_param is its internal helper.
    from datasketch.lsh import _optimal_param

    cases = [(t, 128, w) for t in (0.5, 0.7, 0.8, 0.9) for w in (0.5, 0.9)] + [(0.8, 64, 0.9), (0.85, 256, 0.5)]
    for threshold, k, w in cases:
        assert mh.choose_bands(threshold, k, w) == _optimal_param(threshold, k, 1 - w, w), (threshold, k, w)


def _shingles(text: str, size: int) -> set[str]:
    words = normalise(text, DedupParams()).split()
    return {" ".join(words[i:i + size]) for i in range(len(words) - size + 1)}


def test_estimates_are_as_close_to_exact_jaccard_as_datasketch_s():
    # Same shingle sets through both implementations: the root-mean-square error against
    # exact Jaccard must be about sqrt(mean J(1-J)/k) for both (within 25%), and ours no
    # worse than datasketch's by more than 25%.
    from datasketch import MinHash

    rng = random.Random(5)
    vocab = [f"w{i}" for i in range(3000)]
    k = 128
    ours, theirs, exact = [], [], []
    for _ in range(300):
        base = [rng.choice(vocab) for _ in range(rng.randint(40, 200))]
        rate = rng.uniform(0.0, 0.2)
        other = [rng.choice(vocab) if rng.random() < rate else w for w in base]
        a, b = _shingles(" ".join(base), 5), _shingles(" ".join(other), 5)
        exact.append(len(a & b) / len(a | b))
        word_hash, lengths = mh.text_word_hashes([normalise(" ".join(base), DedupParams()),
                                                   normalise(" ".join(other), DedupParams())])
        values, starts = mh.shingle_values(word_hash, lengths, 5)
        sig = mh.signatures(values, starts, k)
        ours.append(float(mh.agreement(sig[0], sig[1])))
        ma, mb = MinHash(num_perm=k, seed=1), MinHash(num_perm=k, seed=1)
        ma.update_batch([s.encode() for s in a])
        mb.update_batch([s.encode() for s in b])
        theirs.append(ma.jaccard(mb))
    exact_a = np.array(exact)
    theory = np.sqrt(np.mean(exact_a * (1 - exact_a)) / k)
    rmse_ours = np.sqrt(np.mean((np.array(ours) - exact_a) ** 2))
    rmse_theirs = np.sqrt(np.mean((np.array(theirs) - exact_a) ** 2))
    assert rmse_ours == pytest.approx(theory, rel=0.25)
    assert rmse_theirs == pytest.approx(theory, rel=0.25)
    assert rmse_ours <= 1.25 * rmse_theirs


def test_punctuation_fold_drops_exactly_the_ucd_punctuation_categories():
    # Source: UnicodeData.txt of the Unicode Character Database (Debian package
    # unicode-data, /usr/share/unicode/), field 2 = General_Category; the fold removes
    # categories P* (Pc, Pd, Ps, Pe, Pi, Pf, Po) and keeps everything else. Characters
    # Python's unicodedata does not know (assigned after its Unicode version) are left
    # out: Python cannot classify them.
    from pathlib import Path

    import unicodedata

    path = Path("/usr/share/unicode/UnicodeData.txt")
    if not path.is_file():
        pytest.fail(f"{path} is missing: install the Debian package unicode-data (make system-deps)")
    params = DedupParams(fold_case=False, fold_unicode=False, fold_whitespace=False)
    punct, other = [], []
    for line in path.read_text().splitlines():
        code, name, category = line.split(";")[:3]
        ch = chr(int(code, 16))
        if name.startswith("<") or category.startswith(("C", "Z")) or unicodedata.category(ch) == "Cn":
            continue  # ranges, controls, surrogates, spaces: not words of a chunk
        (punct if category.startswith("P") else other).append(ch)
    assert len(punct) > 700 and len(other) > 30_000
    assert normalise("a" + "".join(punct) + "b", params) == "ab"
    kept = "".join(other)
    assert normalise("a" + kept + "b", params) == "a" + kept + "b"
