"""MinHash signatures over word shingles, and locality-sensitive hashing by bands.

The methods, by their published names:

- MinHash (Broder, "On the resemblance and containment of documents", 1997): for a
  random permutation h of the shingle universe, P[min h(A) = min h(B)] = J(A, B), the
  Jaccard similarity |A & B| / |A | B|. With k independent functions the share of
  equal minima estimates J without bias, with standard error sqrt(J(1-J)/k).
- Banding (Leskovec, Rajaraman and Ullman, "Mining of Massive Datasets", ch. 3,
  section 3.4): cut the signature into b bands of r rows; two sets whose similarity
  is s share at least one whole band with probability 1 - (1 - s^r)^b, the S-curve.
- The k hash functions: Dietzfelbinger's multiply-add-shift scheme
  h(x) = ((a*x + b) mod 2^64) div 2^32 for 32-bit x and 64-bit a, b, which is
  strongly universal (pairwise independent) onto 32-bit values (M. Dietzfelbinger,
  "Universal hashing and k-wise independent random variables via integer arithmetic
  without primes", STACS 1996). It needs only wrapping 64-bit multiplication, so numpy
  computes it for a block of shingles and all k functions at once.

Everything here is deterministic across processes, machines and runs: words are
hashed with fixed 64-bit arithmetic over their UTF-8 bytes, the k functions' (a, b)
are drawn from BLAKE2b (RFC 7693) of a fixed label, and no Python hash() or unseeded
random source is used. Stored
signatures therefore stay comparable with new ones; changing any constant here
makes old and new signatures incomparable, so it must come with a new step version.
"""

from __future__ import annotations

import hashlib
from functools import lru_cache

import numpy as np

U64 = np.uint64
_MASK64 = (1 << 64) - 1

# MurmurHash3's 64-bit finaliser constants (Austin Appleby, public domain): a full
# avalanche, so a shingle's 32 high bits are well mixed before the k functions see them.
_FMIX1 = U64(0xFF51AFD7ED558CCD)
_FMIX2 = U64(0xC4CEB9FE1A85EC53)
# Odd multiplier for combining word hashes into a shingle hash; it is 3 mod 4, so
# M - 1 has a single factor of two and swapped words do not cancel out.
_SHINGLE_MULT = 0x9E3779B97F4A7C15 | 3
_SHORT_SALT = U64(0x2545F4914F6CDD1D)
_BAND_MULT = U64(0xD6E8FEB86659FD93)

# Shingles per block when computing signatures: (block x k) uint64 temporaries of
# about 8 MB with k=128, small enough to stay in cache-sized pieces.
_BLOCK = 8192


def fmix64(h: np.ndarray) -> np.ndarray:
    """MurmurHash3's finaliser over a uint64 array (wrapping arithmetic)."""
    h = h ^ (h >> U64(33))
    h = h * _FMIX1
    h = h ^ (h >> U64(33))
    h = h * _FMIX2
    return h ^ (h >> U64(33))


@lru_cache(maxsize=16)
def hash_family(num_perm: int, seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """The (a, b) pairs of the k multiply-add-shift functions, from BLAKE2b of a label."""
    a = np.empty(num_perm, dtype=U64)
    b = np.empty(num_perm, dtype=U64)
    for i in range(num_perm):
        d = hashlib.blake2b(f"thresher minhash {seed} {i}".encode(), digest_size=16).digest()
        a[i] = int.from_bytes(d[:8], "little") | 1
        b[i] = int.from_bytes(d[8:], "little")
    a.setflags(write=False)
    b.setflags(write=False)
    return a, b


# Word hashes: a polynomial over the word's UTF-8 bytes modulo 2^64, base _WORD_BASE
# (FNV-1's 64-bit prime, odd, so it has an inverse modulo 2^64), then fmix64. The
# inverse lets numpy compute every word's polynomial from one running sum over the
# bytes of a whole batch: sum_{j<i} b_j * B^-j, differenced and scaled per word.
_WORD_BASE = 0x100000001B3
_WORD_BASE_INV = pow(_WORD_BASE, -1, 1 << 64)
_LENGTH_SALT = U64(0x9FB21C651E98DF25)


_POWERS: dict[int, np.ndarray] = {}


def _powers(base: int, n: int) -> np.ndarray:
    """base^0 .. base^(n-1) modulo 2^64, kept between calls (grown by doubling)."""
    have = _POWERS.get(base)
    if have is None or len(have) < n:
        size = max(n, 2 * len(have) if have is not None else 1 << 16)
        out = np.full(size, U64(base), dtype=U64)
        out[0] = U64(1)
        have = np.cumprod(out, dtype=U64)  # wraps modulo 2^64
        have.setflags(write=False)
        _POWERS[base] = have
    return have[:n]


def text_word_hashes(texts: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """64-bit hash of every word of every text, and each text's word count.

    A word is a maximal run of characters other than the space U+0020; texts are
    expected to hold words separated by single spaces (the normalised form).
    """
    lengths = np.fromiter((t.count(" ") + 1 if t else 0 for t in texts), dtype=np.int64, count=len(texts))
    joined = " ".join(t for t in texts if t)
    data = np.frombuffer(joined.encode("utf-8", "surrogatepass"), dtype=np.uint8)
    if data.size == 0:
        return np.empty(0, dtype=U64), lengths
    space = data == 32
    starts = np.flatnonzero(~space & np.concatenate(([True], space[:-1])))
    ends = np.flatnonzero(~space & np.concatenate((space[1:], [True]))) + 1
    if len(starts) != int(lengths.sum()):
        raise ValueError("texts must hold words separated by single spaces")
    running = np.cumsum((data.astype(U64) + U64(1)) * _powers(_WORD_BASE_INV, data.size), dtype=U64)
    before = np.where(starts > 0, running[np.maximum(starts - 1, 0)], U64(0))
    poly = (running[ends - 1] - before) * _powers(_WORD_BASE, data.size)[ends - 1]
    return fmix64(poly ^ ((ends - starts).astype(U64) * _LENGTH_SALT)), lengths


def shingle_values(word_hash: np.ndarray, lengths: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """32-bit values of every `size`-word shingle of each text, and where each text's start.

    `word_hash` holds the word hashes of all texts one after the other; `lengths`
    says how many words each text has. A text with fewer than `size` words counts
    as one shingle made of all its words (so short texts match only when equal, and
    an empty text has one shingle too). Returns (values, starts): text t's shingles
    are values[starts[t]:starts[t+1]] (starts has one more entry than texts).
    """
    lengths = np.asarray(lengths, dtype=np.int64)
    n_texts = len(lengths)
    word_start = np.zeros(n_texts + 1, dtype=np.int64)
    np.cumsum(lengths, out=word_start[1:])
    counts = np.where(lengths >= size, lengths - size + 1, 1)
    starts = np.zeros(n_texts + 1, dtype=np.int64)
    np.cumsum(counts, out=starts[1:])
    out = np.empty(int(starts[-1]), dtype=U64)
    total = len(word_hash)
    powers = [U64(pow(_SHINGLE_MULT, j, 1 << 64)) for j in range(size)]

    long_texts = lengths >= size
    if long_texts.any() and total >= size:
        # Windows over the concatenated words; keep those that lie inside one text.
        n_win = total - size + 1
        acc = word_hash[:n_win].copy()
        for j in range(1, size):
            acc += word_hash[j:j + n_win] * powers[j]
        # Output position p of text t takes window word_start[t] + (p - starts[t]).
        pos = np.flatnonzero(np.repeat(long_texts, counts))
        shift = np.repeat(word_start[:-1][long_texts] - starts[:-1][long_texts], counts[long_texts])
        out[pos] = acc[pos + shift]
    short = ~long_texts
    if short.any():
        s_len = lengths[short]
        s_start = word_start[:-1][short]
        acc = s_len.astype(U64) * _SHORT_SALT
        for j in range(size - 1):
            take = s_len > j
            if not take.any():
                break
            acc[take] += word_hash[s_start[take] + j] * powers[j]
        out[starts[:-1][short]] = acc
    return (fmix64(out) >> U64(32)), starts


def signatures(values: np.ndarray, starts: np.ndarray, num_perm: int, seed: int = 1) -> np.ndarray:
    """MinHash signature (num_perm uint32 minima) of each text's shingle values.

    The minimum is taken over the full 64-bit a*x + b and shifted afterwards: shifting
    is monotone, so min(h >> 32) == min(h) >> 32, and one pass over the block is saved.
    The block is laid out function-major (k rows of shingles), which numpy reduces
    several times faster than the shingle-major layout.
    """
    a, b = hash_family(num_perm, seed)
    a_col, b_col = a[:, None], b[:, None]
    n_texts = len(starts) - 1
    sig = np.empty((n_texts, num_perm), dtype=np.uint32)
    buf = np.empty((num_perm, _BLOCK), dtype=U64)
    t = 0
    while t < n_texts:
        # Take whole texts until the block is full (at least one text per block).
        end = int(np.searchsorted(starts, starts[t] + _BLOCK, side="right")) - 1
        end = min(max(end, t + 1), n_texts)
        lo, hi = int(starts[t]), int(starts[end])
        x = values[lo:hi]
        h = buf[:, :hi - lo] if hi - lo <= _BLOCK else np.empty((num_perm, hi - lo), dtype=U64)
        np.multiply(a_col, x[None, :], out=h)
        np.add(h, b_col, out=h)
        mins = np.minimum.reduceat(h, starts[t:end] - lo, axis=1)
        sig[t:end] = (mins >> U64(32)).T
        t = end
    return sig


def band_keys(sig: np.ndarray, bands: int, rows: int) -> np.ndarray:
    """One 64-bit key per band: a hash of the band's r values and the band's number."""
    n = sig.shape[0]
    keys = np.empty((n, bands), dtype=U64)
    for j in range(bands):
        acc = np.full(n, U64((j + 1) * int(_BAND_MULT) & _MASK64), dtype=U64)
        for c in range(j * rows, (j + 1) * rows):
            acc = (acc ^ sig[:, c].astype(U64)) * _BAND_MULT
        keys[:, j] = fmix64(acc)
    return keys


def agreement(sig_a: np.ndarray, sig_b: np.ndarray) -> np.ndarray:
    """Share of equal minima row by row: the MinHash estimate of Jaccard similarity."""
    return (sig_a == sig_b).mean(axis=-1)


def collision_probability(s, bands: int, rows: int):
    """P(two sets of similarity s share a band) = 1 - (1 - s^r)^b (MMDS, section 3.4.2)."""
    s = np.asarray(s, dtype=float)
    return 1.0 - (1.0 - s ** rows) ** bands


@lru_cache(maxsize=16)  # a pure function of the parameters, asked twice a run (sketch, decide): 0.05 s each
def choose_bands(threshold: float, num_perm: int, false_negative_weight: float = 0.5) -> tuple[int, int]:
    """Bands b and rows r (b*r <= num_perm) that minimise the weighted error area.

    False positive area: integral of P(s) over s in [0, threshold] (pairs below the
    threshold that become candidates); false negative area: integral of 1 - P(s) over
    [threshold, 1] (pairs above it that never meet). The rule minimises
    (1 - w) * FP + w * FN with w = false_negative_weight. Candidates are verified
    afterwards, so a false positive costs one signature comparison while a false
    negative is a duplicate never found: weighting misses more heavily is the point
    of w. Ties go to more rows (fewer candidates). Integrals by the trapezoid rule on
    2001 points, which is far finer than the curve's features.
    """
    if not 0.0 < threshold < 1.0:
        raise ValueError(f"threshold must be between 0 and 1 (exclusive), got {threshold}")
    s = np.linspace(0.0, 1.0, 2001)
    below = s <= threshold
    above = s >= threshold
    # The curves of every b for one r at once (one array operation per r instead of
    # one per (b, r) pair: 0.07 s of CPU in the parent at every run before, for k=128).
    errors: dict[tuple[int, int], float] = {}
    for r in range(1, num_perm + 1):
        bs = np.arange(1, num_perm // r + 1)
        p = 1.0 - (1.0 - s ** r)[None, :] ** bs[:, None].astype(float)
        fp = np.trapezoid(p[:, below], s[below], axis=1)
        fn = np.trapezoid(1.0 - p[:, above], s[above], axis=1)
        err = (1.0 - false_negative_weight) * fp + false_negative_weight * fn
        errors.update({(int(b), r): float(e) for b, e in zip(bs, err)})
    best: tuple[float, int, int] | None = None
    for b in range(1, num_perm + 1):  # the order ties are decided in: b, then r, rising
        for r in range(1, num_perm // b + 1):
            err = errors[(b, r)]
            if best is None or err < best[0] - 1e-15 or (abs(err - best[0]) <= 1e-15 and r > best[2]):
                best = (err, b, r)
    assert best is not None
    return best[1], best[2]
