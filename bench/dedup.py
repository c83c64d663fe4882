"""Deduplication at 10k, 100k and 1M chunks: time, peak memory, scaling, precision, recall.

For each size, in a fresh child process (so peak memory is that size's alone):

  full run     the whole corpus is new: sketch every document (in batches of
               DOCS_PER_BATCH documents, as flows/corpus.py loads them) and decide;
  incremental  a second child reads the first run's stored columns (signatures, band
               keys, hashes, decisions: what the dedup stage table keeps, no text) from
               Parquet, adds 1% new chunks (half of them planted variants of stored
               chunks) and decides again: the weekly case.

Corpus: documents of 10 chunks, 40-200 words per chunk (mean 120, about 160 tokens)
drawn uniformly from 20,000 invented words. One chunk in 20 is the base of a planted
family of 1-4 variants, each edited at a random rate of 0-6% of words (a fifth of them
unedited: exact copies), so planted similarities spread over about 0.7-1.0, across
the 0.8 threshold. Unrelated chunks share no 5-word shingle in practice (checked by
exact all-pairs Jaccard at 10k), so ground truth is exact Jaccard within families.

Peak memory is the child's VmHWM (bench.peak_mb: the resident set's high-water mark,
which includes the generated corpus; stop 34 mended it: ru_maxrss, used before, showed
the parent's size in every child); "corpus alone" is the resident set after
the corpus was generated. Times are wall-clock (time.perf_counter) and CPU time of the
process (time.process_time); on a shared machine the CPU figures are the steadier
ones, and the scaling exponents use them.

Sizes: THRESHER_BENCH_DEDUP_SIZES=10000,100000 overrides the default 10k,100k,1M.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import tempfile
import time

from bench import REPO, peak_mb
from thresher.flows.corpus import DOCS_PER_BATCH  # as the flow loads them

SIZES = (10_000, 100_000, 1_000_000)
CHUNKS_PER_DOC = 10
VOCAB = 20_000
SEED = 2026


def _rss_mb() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2 ** 20


def _vocab():
    import numpy as np

    syllables = ["ba", "ce", "di", "fo", "gu", "ha", "ke", "li", "mo", "nu", "pa", "re", "si", "to", "vu", "wa",
                 "xe", "yo", "za", "qu"]
    words, i = [], 0
    while len(words) < VOCAB:  # every number written in base 20 syllables: distinct words
        n, w = i, ""
        while True:
            w += syllables[n % 20]
            n //= 20
            if n == 0:
                break
        words.append(w)
        i += 1
    return np.array(words, dtype=object)


def _edit(rng, ids, rate: float):
    """Delete, substitute or insert after each word with probability rate (a third each)."""
    import numpy as np

    x = rng.random(len(ids))
    out = ids.copy()
    sub = (x >= rate / 3) & (x < 2 * rate / 3)
    out[sub] = rng.integers(0, VOCAB, int(sub.sum()))
    ins = (x >= 2 * rate / 3) & (x < rate)
    counts = np.where(x < rate / 3, 0, np.where(ins, 2, 1))
    res = np.repeat(out, counts)
    res[(np.cumsum(counts) - 1)[ins]] = rng.integers(0, VOCAB, int(ins.sum()))
    return res


def _corpus(n: int, rng):
    """Word ids of n chunks and the planted families (lists of chunk numbers)."""
    import numpy as np

    lengths = rng.integers(40, 201, n)
    chunks = [rng.integers(0, VOCAB, int(k)).astype(np.int32) for k in lengths]
    order = rng.permutation(n)
    n_fam = n // 20
    families = []
    cursor = n_fam
    for f in range(n_fam):
        base = int(order[f])
        size = int(rng.integers(1, 5))
        members = [base]
        for v in order[cursor:cursor + size]:
            rate = 0.0 if rng.random() < 0.2 else float(rng.uniform(0.0, 0.06))
            chunks[int(v)] = _edit(rng, chunks[base], rate).astype(np.int32)
            members.append(int(v))
        cursor += size
        families.append(members)
    return chunks, families


def _shingle_set(ids, k: int = 5):
    import numpy as np

    ids = ids.astype(np.uint64)
    if len(ids) < k:
        return np.unique(ids)
    acc = np.zeros(len(ids) - k + 1, dtype=np.uint64)
    for j in range(k):
        acc = acc * np.uint64(1_000_003) + ids[j:len(ids) - k + 1 + j] + np.uint64(1)
    return np.unique(acc)


def _jaccard(a, b) -> float:
    import numpy as np

    inter = len(np.intersect1d(a, b, assume_unique=True))
    return inter / (len(a) + len(b) - inter)


def _truth(chunks, families, threshold: float):
    """Chunks that should be dropped: all but the first of each cluster of J >= threshold."""
    should = set()
    for members in families:
        sets = {m: _shingle_set(chunks[m]) for m in members}
        parent = {m: m for m in members}

        def find(x):
            while parent[x] != x:
                x = parent[x]
            return x

        for i, a in enumerate(members):
            for b in members[i + 1:]:
                if _jaccard(sets[a], sets[b]) >= threshold:
                    ra, rb = find(a), find(b)
                    parent[max(ra, rb)] = min(ra, rb)
        should |= {m for m in members if find(m) != m}
    return should


def _docs(chunks, vocab, doc_numbers, prefix: str = "d", base_rank: int = 0):
    from thresher.steps.units import Chunk, DocChunks, chunk_locator

    out = []
    for d in doc_numbers:
        cs = []
        for i in range(CHUNKS_PER_DOC):
            g = d * CHUNKS_PER_DOC + i
            if g >= len(chunks):
                break
            cs.append(Chunk(locator=chunk_locator(i), index=i, text=" ".join(vocab[chunks[g]].tolist()),
                            chunk_id=f"{prefix}{g:08d}"))
        if cs:
            out.append(DocChunks(f"{prefix}doc{d:07d}", f"{prefix}/{d:07d}.txt", base_rank + d, cs))
    return out


def _all_pairs_cross_family(chunks, families, threshold: float = 0.3) -> int:
    """Pairs from different families (or none) with exact J >= threshold (sparse all-pairs)."""
    import numpy as np
    import scipy.sparse as sp

    sets = [_shingle_set(c) for c in chunks]
    cols = np.concatenate(sets)
    _, col_ids = np.unique(cols, return_inverse=True)
    rows = np.repeat(np.arange(len(sets)), [len(s) for s in sets])
    x = sp.csr_matrix((np.ones(len(rows), dtype=np.int32), (rows, col_ids)))
    inter = (x @ x.T).tocoo()
    keep = inter.row < inter.col
    i, j, n = inter.row[keep], inter.col[keep], inter.data[keep]
    size = np.array([len(s) for s in sets])
    jac = n / (size[i] + size[j] - n)
    fam = np.full(len(chunks), -1)
    for f, members in enumerate(families):
        fam[members] = f
    cross = (fam[i] != fam[j]) | (fam[i] == -1)
    return int(((jac >= threshold) & cross).sum())


def _warm_up(params) -> None:
    """One-time set-up of a process (the punctuation table, compute kernels), kept out of the timings."""
    from thresher.steps.dedup import decide, fresh_table, sketch
    from thresher.steps.units import Chunk, DocChunks, chunk_locator

    docs = [DocChunks("w", "w.txt", 0, [Chunk(locator=chunk_locator(0), index=0, chunk_id="w0",
                                               text="a few words to warm up the step with")])]
    decide(fresh_table(sketch(docs, params), docs), params)


def child_full(n: int, out_dir: str) -> dict:
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    from thresher.steps.dedup import DECISION_COLUMNS, SKETCH_COLUMNS, DedupParams, decide, sketch

    params = DedupParams()
    _warm_up(params)
    rng = np.random.default_rng(SEED + n)
    t = time.perf_counter()
    vocab = _vocab()
    chunks, families = _corpus(n, rng)
    gen_s = time.perf_counter() - t
    before = _rss_mb()

    n_docs = math.ceil(n / CHUNKS_PER_DOC)
    t, c = time.perf_counter(), time.process_time()
    sketches = []
    for lo in range(0, n_docs, DOCS_PER_BATCH):
        docs = _docs(chunks, vocab, range(lo, min(n_docs, lo + DOCS_PER_BATCH)))
        sketches.append(sketch(docs, params))
        del docs  # like the flows: a batch's text goes once it is sketched
    sk = pa.concat_tables(sketches)
    del sketches
    sketch_s, sketch_cpu = time.perf_counter() - t, time.process_time() - c
    ids = sk.column("doc_id").to_pylist()
    ranks = [int(d[4:]) for d in ids]
    table = sk.append_column("rank", pa.array(ranks, pa.int64())) \
        .append_column("source_path", pa.array([f"d/{r:07d}.txt" for r in ranks])) \
        .append_column("fresh", pa.array(np.ones(len(ids), dtype=bool)))
    t, c = time.perf_counter(), time.process_time()
    dec = decide(table, params)
    decide_s, decide_cpu = time.perf_counter() - t, time.process_time() - c
    peak = peak_mb()

    dropped = {int(c[1:]) for c, s in zip(dec.column("chunk_id").to_pylist(), dec.column("status").to_pylist())
               if s == "dropped"}
    should = _truth(chunks, families, params.min_similarity)
    correct = len(dropped & should)
    result = {
        "n": n, "generate_s": gen_s, "sketch_s": sketch_s, "decide_s": decide_s, "sketch_cpu": sketch_cpu,
        "decide_cpu": decide_cpu, "rss_before_mb": before,
        "peak_mb": peak, "dropped": len(dropped), "should": len(should),
        "precision": correct / max(1, len(dropped)), "recall": correct / max(1, len(should)),
        "words": int(sum(len(c) for c in chunks)),
    }
    if n <= 10_000:
        result["cross_family_pairs_j_ge_0.3"] = _all_pairs_cross_family(chunks, families)

    # What the dedup stage stores, as the flows would hand it back next week.
    order = {c: i for i, c in enumerate(dec.column("chunk_id").to_pylist())}
    take = pa.array([order[c] for c in sk.column("chunk_id").to_pylist()])
    stored = sk.select(["doc_id", "chunk_id", "chunk_index", *SKETCH_COLUMNS])
    for name in ("status", "reason", *DECISION_COLUMNS):
        stored = stored.append_column(name, dec.column(name).take(take))
    stored = stored.append_column("rank", pa.array(ranks, pa.int64())) \
        .append_column("source_path", pa.array([f"d/{r:07d}.txt" for r in ranks]))
    pq.write_table(stored, f"{out_dir}/stored.parquet")

    # Next week's 1% new chunks: half planted variants of stored chunks, half new text.
    n_new = max(CHUNKS_PER_DOC, n // 100)
    new_chunks, planted = [], 0
    for i in range(n_new):
        if i % 2 == 0:
            src = int(rng.integers(0, n))
            new_chunks.append(_edit(rng, chunks[src], float(rng.uniform(0.0, 0.04))).astype(np.int32))
            planted += 1
        else:
            new_chunks.append(rng.integers(0, VOCAB, int(rng.integers(40, 201))).astype(np.int32))
    texts = [" ".join(vocab[c].tolist()) for c in new_chunks]
    pq.write_table(pa.table({"text": texts}), f"{out_dir}/new.parquet")
    result["new_chunks"], result["new_planted"] = n_new, planted
    return result


def child_incremental(n: int, out_dir: str) -> dict:
    import pyarrow as pa
    import pyarrow.parquet as pq

    from thresher.steps.dedup import DedupParams, decide, sketch
    from thresher.steps.units import Chunk, DocChunks, chunk_locator

    params = DedupParams()
    _warm_up(params)
    before = _rss_mb()
    t = time.perf_counter()
    stored = pq.read_table(f"{out_dir}/stored.parquet")  # stored columns only, no text
    read_s = time.perf_counter() - t
    texts = pq.read_table(f"{out_dir}/new.parquet").column("text").to_pylist()
    n_docs = math.ceil(n / CHUNKS_PER_DOC)
    docs = []
    for k in range(0, len(texts), CHUNKS_PER_DOC):
        d = n_docs + k // CHUNKS_PER_DOC
        docs.append(DocChunks(f"new{d:07d}", f"new/{d:07d}.txt", d,
                              [Chunk(locator=chunk_locator(i), index=i, text=x, chunk_id=f"n{k + i:08d}")
                               for i, x in enumerate(texts[k:k + CHUNKS_PER_DOC])]))
    t, c = time.perf_counter(), time.process_time()
    sk = sketch(docs, params)
    ranks = {d.doc_id: (d.rank, d.source_path) for d in docs}
    ids = sk.column("doc_id").to_pylist()
    fresh = sk.append_column("rank", pa.array([ranks[d][0] for d in ids], pa.int64())) \
        .append_column("source_path", pa.array([ranks[d][1] for d in ids])) \
        .append_column("fresh", pa.array([True] * len(ids)))
    stored = stored.append_column("fresh", pa.array([False] * stored.num_rows))
    dec = decide(pa.concat_tables([fresh, stored], promote_options="default"), params)
    seconds, cpu = time.perf_counter() - t, time.process_time() - c
    statuses = dec.column("status").to_pylist()
    return {"n": n, "read_s": read_s, "incremental_s": seconds, "incremental_cpu": cpu, "rss_before_mb": before, "peak_mb": peak_mb(),
            "decisions": dec.num_rows, "new_dropped": statuses.count("dropped")}


def _child(kind: str, n: int, out_dir: str) -> dict:
    code = (f"import json, sys; from bench.dedup import child_{kind}; "
            f"print('RESULT ' + json.dumps(child_{kind}({n}, {out_dir!r})))")
    proc = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"{kind} child for {n} chunks failed:\n{proc.stderr[-3000:]}")
    line = next(x for x in proc.stdout.splitlines() if x.startswith("RESULT "))
    return json.loads(line[len("RESULT "):])


def _exponent(t1: float, t2: float, n1: int, n2: int) -> float:
    return math.log(t2 / t1) / math.log(n2 / n1)


def main() -> None:
    from thresher.steps.dedup import DedupParams

    sizes = tuple(int(x) for x in os.environ.get("THRESHER_BENCH_DEDUP_SIZES", "").split(",") if x) or SIZES
    p = DedupParams()
    bands, rows = p.bands_and_rows()
    print(f"dedup: min_similarity {p.min_similarity}, {p.shingle_words}-word shingles, {p.signature_size} hashes, "
          f"{bands} bands x {rows} rows; one child process per size and phase")
    full, inc = [], []
    for n in sizes:
        with tempfile.TemporaryDirectory(prefix="thresher-bench-dedup-") as tmp:
            f = _child("full", n, tmp)
            i = _child("incremental", n, tmp)
        full.append(f)
        inc.append(i)
        total, cpu = f["sketch_s"] + f["decide_s"], f["sketch_cpu"] + f["decide_cpu"]
        print(f"  {n:>9,} chunks ({f['words'] / n:.0f} words each): full run {total:7.1f} s wall, {cpu:.1f} s CPU "
              f"(sketch {f['sketch_cpu']:.1f} s CPU = {f['words'] / f['sketch_cpu'] / 1e6:.2f} M words/s; decide "
              f"{f['decide_cpu']:.1f} s CPU), peak {f['peak_mb']:,.0f} MB (corpus alone {f['rss_before_mb']:,.0f} MB); "
              f"precision {f['precision']:.4f}, recall {f['recall']:.4f} "
              f"({f['dropped']:,} dropped, {f['should']:,} should be)")
        print(f"  {'':>9}        incremental (+{f['new_chunks']:,} new chunks, {f['new_planted']:,} planted "
              f"variants): {i['incremental_s']:.1f} s wall, {i['incremental_cpu']:.1f} s CPU after reading the "
              f"stored columns in {i['read_s']:.1f} s; peak {i['peak_mb']:,.0f} MB; {i['decisions']:,} decisions, "
              f"{i['new_dropped']:,} new chunks dropped")
        if "cross_family_pairs_j_ge_0.3" in f:
            print(f"  {'':>9}        exact all-pairs check: {f['cross_family_pairs_j_ge_0.3']} pairs outside the "
                  "planted families with J >= 0.3 (0 means planted families are the whole truth)")
    for a, b, x, y in zip(sizes, sizes[1:], zip(full, inc), zip(full[1:], inc[1:])):
        c1, c2 = x[0]["sketch_cpu"] + x[0]["decide_cpu"], y[0]["sketch_cpu"] + y[0]["decide_cpu"]
        print(f"  scaling {a:,} -> {b:,} (CPU time): full run exponent {_exponent(c1, c2, a, b):.2f} "
              f"(decide alone {_exponent(x[0]['decide_cpu'], y[0]['decide_cpu'], a, b):.2f}), incremental "
              f"{_exponent(x[1]['incremental_cpu'], y[1]['incremental_cpu'], a, b):.2f}; peak memory "
              f"{y[0]['peak_mb'] / x[0]['peak_mb']:.1f}x (full) and {y[1]['peak_mb'] / x[1]['peak_mb']:.1f}x "
              f"(incremental) for {b / a:.0f}x chunks")


if __name__ == "__main__":
    main()
