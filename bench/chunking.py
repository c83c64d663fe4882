"""What clean + split + tokens cost next to tokenising the same text with tiktoken alone.

Corpus: plain text that Debian ships -- /usr/share/common-licenses and the packages'
/usr/share/doc/*/copyright files, in path order, until CORPUS_BYTES of UTF-8 -- one
document per file, read into blocks the way thresher reads a plain-text file
(steps.extract.text.text_blocks; not timed).

Measured in one run, on the same texts, ROUNDS times in turn (the fastest round of each
counts, so a busy machine disturbs the ratio less):
  1. clean, split (default parameters: 400 tokens, cl100k_base, small sections merged)
     and tokens (cl100k_base), each timed per document and summed;
  2. tiktoken's `encode_ordinary_batch` over the documents' raw texts (its default
     thread pool), and plain `encode_ordinary` one document after the other;
  3. once, the language step on the first LANGUAGE_BYTES, with and without per-block
     detection, for scale (not in the ratio).

Prints chunks per second and tokens per second of clean+split+tokens, and the ratio
of its time to encode_ordinary_batch's; and the same ratios in CPU time of this process
against encode_ordinary one by one (all single-threaded), which a machine busy with
other work disturbs far less than wall time.

`python -m bench.chunking --against TREE` compares this checkout's steps with those of
another checkout of thresher (a `git worktree add` of an older commit) side by side:
child processes measure the CPU time of each step and of encode_ordinary (item 2 and
the CPU figures above; no language step), the two trees in turn, AGAINST_ROUNDS times
each; the fastest of each figure is printed for both trees with its ratio to
encode_ordinary measured in the same process, and the load average.
`python -m bench.chunking --profile` prints where each step's CPU time goes (cProfile).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CORPUS_BYTES = 5_000_000
LANGUAGE_BYTES = 300_000
ROUNDS = 3
SOURCES = [Path("/usr/share/common-licenses"), Path("/usr/share/doc")]


def corpus_files() -> list[Path]:
    files = sorted(p for p in SOURCES[0].iterdir() if p.is_file() and not p.is_symlink())
    files += sorted(SOURCES[1].glob("*/copyright"))
    return files


def load_corpus(limit: int = CORPUS_BYTES) -> list[tuple[str, str]]:
    """(name, text) per document, until `limit` bytes of UTF-8."""
    docs, size, seen = [], 0, set()
    for path in corpus_files():
        try:
            data = path.read_bytes()
        except OSError:
            continue
        if data in seen:  # many packages ship the same copyright text
            continue
        seen.add(data)
        text = data.decode("utf-8", errors="replace")
        docs.append((str(path), text))
        size += len(text.encode("utf-8"))
        if size >= limit:
            break
    return docs


AGAINST_ROUNDS = 2


def text_pages(limit: int = CORPUS_BYTES):
    """The corpus as thresher reads plain text files: (docs, one page list per document,
    a step context, cl100k_base warmed up)."""
    from thresher.flows.encodings import get_encoding
    from thresher.steps.extract.text import text_blocks
    from thresher.steps.spec import StepContext
    from thresher.steps.units import Page

    docs = load_corpus(limit)
    enc = get_encoding("cl100k_base")
    enc.encode_ordinary("warm up")
    pages = [[Page(locator="file", page=None, blocks=text_blocks(text), format="text")] for _, text in docs]
    return docs, pages, StepContext(encoding=get_encoding), enc


def cpu_figures(limit: int = CORPUS_BYTES, rounds: int = ROUNDS) -> dict[str, float]:
    """CPU seconds of clean, split and tokens over the corpus, and of encode_ordinary one
    document after the other, the fastest of `rounds` rounds each (no language step)."""
    from thresher.steps.clean import CleanParams, clean
    from thresher.steps.split import SplitParams, split
    from thresher.steps.tokens import TokensParams, count_tokens

    docs, pages, ctx, enc = text_pages(limit)
    clean_p, split_p, tokens_p = CleanParams(), SplitParams(), TokensParams()
    best = {"clean": 1e9, "split": 1e9, "tokens": 1e9, "single": 1e9}
    chunks_seen = 0
    for _ in range(rounds):
        used = {"clean": 0.0, "split": 0.0, "tokens": 0.0}
        chunks_seen = 0
        for doc_pages in pages:
            p0 = time.process_time()
            cleaned = [p for p in clean(doc_pages, clean_p) if p.ok]
            p1 = time.process_time()
            chunks = split(cleaned, split_p, ctx) if cleaned else []
            p2 = time.process_time()
            chunks_seen += len(count_tokens(chunks, tokens_p, ctx))
            p3 = time.process_time()
            used["clean"] += p1 - p0
            used["split"] += p2 - p1
            used["tokens"] += p3 - p2
        p0 = time.process_time()
        for _, text in docs:
            enc.encode_ordinary(text)
        used["single"] = time.process_time() - p0
        for key, value in used.items():
            best[key] = min(best[key], value)
    best["chunks"] = chunks_seen
    return best


def against(tree: str) -> None:
    """This checkout and `tree` side by side (see the module docstring)."""
    here = Path(__file__).resolve().parent.parent
    with tempfile.TemporaryDirectory() as tmp:
        # thresher is the checkout's root directory: a link named thresher puts the other
        # tree's package first on the import path of its child processes.
        os.symlink(Path(tree).resolve(), Path(tmp) / "thresher")
        envs = {"before": dict(os.environ, PYTHONPATH=tmp), "after": dict(os.environ)}
        best: dict[str, dict[str, float]] = {}
        for _ in range(AGAINST_ROUNDS):
            for label, env in envs.items():
                out = subprocess.run([sys.executable, "-m", "bench.chunking", "--figures"], cwd=here,
                                     env=env, check=True, capture_output=True, text=True).stdout
                figures = json.loads(out.strip().splitlines()[-1])
                for key, value in figures.items():
                    best.setdefault(label, {})[key] = min(best.get(label, {}).get(key, 1e9), value)
    b, a = best["before"], best["after"]
    print(f"CPU seconds, fastest of {AGAINST_ROUNDS} x {ROUNDS} rounds; before = {tree}, "
          f"after = {here}; ratio = step / encode_ordinary in the same process")
    print(f"{'':8} {'before':>8} {'ratio':>6}   {'after':>8} {'ratio':>6}")
    for key in ("clean", "split", "tokens"):
        print(f"{key:8} {b[key]:8.3f} {b[key] / b['single']:5.2f}x   {a[key]:8.3f} {a[key] / a['single']:5.2f}x")
    bt = b["clean"] + b["split"] + b["tokens"]
    at = a["clean"] + a["split"] + a["tokens"]
    print(f"{'all':8} {bt:8.3f} {bt / b['single']:5.2f}x   {at:8.3f} {at / a['single']:5.2f}x")
    print(f"encode_ordinary one by one: {b['single']:.3f} s / {a['single']:.3f} s; chunks "
          f"{int(b['chunks'])} / {int(a['chunks'])}; load average {os.getloadavg()[0]:.2f}")


def profile(top: int = 14) -> None:
    """cProfile with the CPU clock over each step on the corpus: the functions with the
    most time of their own, as shares of the step's total (the profiler's own cost per
    call inflates many small calls, so read shares, not seconds)."""
    import cProfile
    import pstats

    from thresher.steps.clean import CleanParams, clean
    from thresher.steps.split import SplitParams, split
    from thresher.steps.tokens import TokensParams, count_tokens

    docs, pages, ctx, _ = text_pages()
    cleaned = [[p for p in clean(d, CleanParams()) if p.ok] for d in pages]
    chunks = [split(c, SplitParams(), ctx) if c else [] for c in cleaned]
    runs = {
        "clean": lambda: [clean(d, CleanParams()) for d in pages],
        "split": lambda: [split(c, SplitParams(), ctx) for c in cleaned if c],
        "tokens": lambda: [count_tokens(c, TokensParams(), ctx) for c in chunks],
    }
    # The same split in parts, without the profiler (CPU seconds, fastest of ROUNDS).
    from thresher.steps import split as split_module

    enc = ctx.encoding("cl100k_base")
    params = SplitParams()
    parts: dict[str, float] = {}
    for _ in range(ROUNDS):
        spent = dict.fromkeys(["split", "sections", "encode", "counter", "pieces"], 0.0)
        for c in (c for c in cleaned if c):
            p0 = time.process_time()
            split(c, params, ctx)
            p1 = time.process_time()
            doc, _, sections, _ = split_module._sections(c)
            p2 = time.process_time()
            enc.encode_ordinary(doc)
            p3 = time.process_time()
            splitter = split_module._Splitter(enc, params, doc)  # encodes the document again
            p4 = time.process_time()
            split_module._pieces(splitter, sections, params)
            p5 = time.process_time()
            for key, value in zip(spent, (p1 - p0, p2 - p1, p3 - p2, p4 - p3 - (p3 - p2), p5 - p4)):
                spent[key] += value
        parts = {k: min(parts.get(k, 1e9), v) for k, v in spent.items()}
    rest = parts["split"] - parts["sections"] - parts["encode"] - parts["counter"] - parts["pieces"]
    print(f"split in parts, CPU s without the profiler (fastest of {ROUNDS}): all {parts['split']:.3f}; "
          f"whole-document encode {parts['encode']:.3f}; slice counter beyond it {parts['counter']:.3f}; "
          f"sections {parts['sections']:.3f}; atoms and packing {parts['pieces']:.3f}; "
          f"the rest (chunk records, languages, garbage collection) {rest:.3f}")
    for name, run in runs.items():
        prof = cProfile.Profile(time.process_time)
        prof.runcall(run)
        stats = pstats.Stats(prof).stats
        total = sum(tt for _, _, tt, _, _ in stats.values())
        print(f"{name}: {total:.2f} CPU s under the profiler; own time by function:")
        rows = sorted(stats.items(), key=lambda kv: -kv[1][2])[:top]
        for (path, line, func), (_, calls, tt, ct, _) in rows:
            where = f"{Path(path).name}:{line}({func})" if line else func
            print(f"  {tt / total:6.1%}  own, {ct / total:6.1%} with callees  {calls:>8} calls  {where}")


def main(argv: list[str] | None = None) -> None:
    argv = argv or []
    if argv[:1] == ["--profile"]:
        profile()
        return
    if argv[:1] == ["--figures"]:
        print(json.dumps(cpu_figures()))
        return
    if argv[:1] == ["--against"] and len(argv) == 2:
        against(argv[1])
        return
    if argv:
        print("usage: python -m bench.chunking [--against TREE | --profile]", file=sys.stderr)
        sys.exit(2)
    from thresher.steps.clean import CleanParams, clean
    from thresher.steps.language import LanguageParams, detect_language
    from thresher.steps.split import SplitParams, split
    from thresher.steps.tokens import TokensParams, count_tokens

    docs, pages, ctx, enc = text_pages()
    if not docs:
        print("no corpus: /usr/share/common-licenses and /usr/share/doc/*/copyright are empty")
        return
    mb = sum(len(t.encode("utf-8")) for _, t in docs) / 1e6

    clean_p, split_p, tokens_p = CleanParams(), SplitParams(), TokensParams()
    texts = [text for _, text in docs]
    best = {"clean": 1e9, "split": 1e9, "tokens": 1e9, "pipeline": 1e9, "batch": 1e9,
            "single": 1e9}
    cpu = {"clean": 1e9, "split": 1e9, "tokens": 1e9, "single": 1e9}
    for _ in range(ROUNDS):
        t_clean = t_split = t_tokens = 0.0
        c_clean = c_split = c_tokens = 0.0
        n_chunks = n_tokens = 0
        for doc_pages in pages:
            t0, p0 = time.perf_counter(), time.process_time()
            cleaned = [p for p in clean(doc_pages, clean_p) if p.ok]
            t1, p1 = time.perf_counter(), time.process_time()
            chunks = split(cleaned, split_p, ctx) if cleaned else []
            t2, p2 = time.perf_counter(), time.process_time()
            counted = count_tokens(chunks, tokens_p, ctx)
            t3, p3 = time.perf_counter(), time.process_time()
            t_clean += t1 - t0
            t_split += t2 - t1
            t_tokens += t3 - t2
            c_clean, c_split, c_tokens = c_clean + p1 - p0, c_split + p2 - p1, c_tokens + p3 - p2
            n_chunks += len(counted)
            n_tokens += sum(c.token_count for c in counted)
        for key, value in (("clean", c_clean), ("split", c_split), ("tokens", c_tokens)):
            cpu[key] = min(cpu[key], value)
        t0 = time.perf_counter()
        batch = enc.encode_ordinary_batch(texts)
        t_batch = time.perf_counter() - t0
        t0, p0 = time.perf_counter(), time.process_time()
        for text in texts:
            enc.encode_ordinary(text)
        t_single = time.perf_counter() - t0
        cpu["single"] = min(cpu["single"], time.process_time() - p0)
        for key, value in (("clean", t_clean), ("split", t_split), ("tokens", t_tokens),
                           ("pipeline", t_clean + t_split + t_tokens), ("batch", t_batch),
                           ("single", t_single)):
            best[key] = min(best[key], value)
    raw_tokens = sum(len(ids) for ids in batch)
    pipeline, t_clean, t_split, t_tokens = best["pipeline"], best["clean"], best["split"], best["tokens"]
    t_batch, t_single = best["batch"], best["single"]

    sample, size = [], 0
    for doc_pages in pages:
        cleaned = [p for p in clean(doc_pages, clean_p) if p.ok]
        sample.append(cleaned)
        size += sum(len(p.text.encode("utf-8")) for p in cleaned)
        if size >= LANGUAGE_BYTES:
            break
    detect_language(sample[0], LanguageParams())  # loads the profiles
    t0 = time.perf_counter()
    for cleaned in sample:
        detect_language(cleaned, LanguageParams())
    t_lang = time.perf_counter() - t0
    t0 = time.perf_counter()
    for cleaned in sample:
        detect_language(cleaned, LanguageParams(page_certainty=1.0))
    t_every = time.perf_counter() - t0
    t0 = time.perf_counter()
    for cleaned in sample:
        detect_language(cleaned, LanguageParams(detect_blocks=False))
    t_pages = time.perf_counter() - t0

    print(f"corpus: {len(docs)} documents, {mb:.1f} MB of UTF-8 "
          f"(common-licenses and /usr/share/doc/*/copyright), {raw_tokens:,} cl100k_base tokens raw")
    print(f"fastest of {ROUNDS} rounds each")
    print(f"clean+split+tokens: {pipeline:.2f} s  (clean {t_clean:.2f} s, split {t_split:.2f} s, "
          f"tokens {t_tokens:.2f} s)")
    print(f"  {n_chunks:,} chunks, {n_tokens:,} tokens in chunks")
    print(f"  {n_chunks / pipeline:,.0f} chunks/s, {n_tokens / pipeline:,.0f} tokens/s, "
          f"{mb / pipeline:.2f} MB/s")
    print(f"tiktoken encode_ordinary_batch: {t_batch:.2f} s, {raw_tokens / t_batch:,.0f} tokens/s; "
          f"encode_ordinary one by one: {t_single:.2f} s, {raw_tokens / t_single:,.0f} tokens/s")
    print(f"ratio clean+split+tokens / encode_ordinary_batch: {pipeline / t_batch:.1f}x "
          f"(split alone {t_split / t_batch:.1f}x, clean alone {t_clean / t_batch:.1f}x); "
          f"/ encode_ordinary: {pipeline / t_single:.1f}x")
    print(f"language step (for scale, {size / 1e6:.2f} MB): default {t_lang:.2f} s, "
          f"{size / 1e6 / t_lang:.2f} MB/s; every paragraph judged (page_certainty: 1.0) {t_every:.2f} s, "
          f"{size / 1e6 / t_every:.2f} MB/s; pages only (detect_blocks: false) {t_pages:.2f} s, "
          f"{size / 1e6 / t_pages:.2f} MB/s")
    c_all = cpu["clean"] + cpu["split"] + cpu["tokens"]
    print(f"CPU time (fastest round each): clean+split+tokens {c_all:.2f} s (clean {cpu['clean']:.2f} s, "
          f"split {cpu['split']:.2f} s, tokens {cpu['tokens']:.2f} s), encode_ordinary one by one "
          f"{cpu['single']:.2f} s; ratio {c_all / cpu['single']:.1f}x (split alone "
          f"{cpu['split'] / cpu['single']:.1f}x, clean alone {cpu['clean'] / cpu['single']:.1f}x, "
          f"tokens alone {cpu['tokens'] / cpu['single']:.1f}x)")


if __name__ == "__main__":
    main(sys.argv[1:])
