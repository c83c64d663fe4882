"""What extraction costs, per format, and how thresher's PDF reader compares.

Measured side by side in one run:
  1. PDF: thresher's extract step, plain pdfplumber `extract_text()` and plain
     pypdfium2 `get_text_range()` on the same PDFs, first in this process (one
     worker: wall and CPU time), then with a process pool of every core; each
     with its word agreement against poppler's pdftotext (precision, recall);
  2. ruled tables: on every page with ruling lines of Debian PDFs that hold tables
     (debian-policy's FHS, zlib1g-dev's CRC paper, the Debian FAQ, the installation
     guide) and the demo handbook, our PDFium grid (pdf_grid) against pdfplumber's
     table finder it replaced: time per ruled page, three rounds, and whether both
     find the same tables;
  3. every other format on the demo drive (and libxslt's HTML site when installed):
     pages (files) per second through the extract step.

PDFs: the ones Debian documentation packages install and the tests read
(shared-mime-info, libtasn1-doc, bzip2-doc, fontconfig), plus the demo drive's.
THRESHER_BENCH_MORE=1 adds every other PDF found under /usr/share/doc and R's
manuals (r-doc-pdf), gzipped ones unpacked, each once and none over 2 MB;
pdfplumber then takes minutes.

`python -m bench.extract --against TREE` measures only the PDF extraction's CPU time
per page, this checkout beside another (a `git worktree add` of an older commit), and
whether both give the same pages (see `against`).
"""

from __future__ import annotations

import gzip
import os
import shutil
import subprocess
import tempfile
import time
from collections import Counter
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

from bench import REPO

SAMPLE = REPO / "sample_inputs"

BASE_PDFS = [
    "/usr/share/doc/shared-mime-info/shared-mime-info-spec.pdf",
    "/usr/share/doc/libtasn1-doc/libtasn1.pdf",
    "/usr/share/doc/bzip2/manual.pdf.gz",
    "/usr/share/doc/fontconfig/fontconfig-user.pdf.gz",
]
BULLETS = {"-", "\u2022"}
RULED_PDFS = [
    "/usr/share/doc/debian-policy/fhs/fhs-3.0.pdf.gz",
    "/usr/share/doc/zlib1g-dev/crc-doc.1.0.pdf.gz",
    "/usr/share/doc/debian/FAQ/debian-faq.en.pdf.gz",
    "/usr/share/doc/installation-guide-amd64/en/install.en.pdf.gz",
]


def _plain(path: str, into: Path) -> Path:
    if not path.endswith(".gz"):
        return Path(path)
    out = into / (Path(path).parent.name + "-" + Path(path).name[:-3])
    out.write_bytes(gzip.decompress(Path(path).read_bytes()))
    return out


def pdf_corpus(into: Path) -> list[Path]:
    paths = [p for p in BASE_PDFS if Path(p).exists()]
    if os.environ.get("THRESHER_BENCH_MORE"):
        # Each file once (Debian links some manuals from two places); none over 2 MB
        # (R's 3000-page reference manual alone would keep pdfplumber busy for minutes).
        seen = {str(Path(p).resolve()) for p in paths}
        found = sorted(Path("/usr/share/doc").rglob("*.pdf*")) + sorted(Path("/usr/share/R/doc/manual").glob("R-*.pdf"))
        for p in found:
            real = p.resolve()
            if p.suffix in (".pdf", ".gz") and 10_000 < real.stat().st_size < 2_000_000 and str(real) not in seen:
                seen.add(str(real))
                paths.append(str(p))
    out = [_plain(p, into) for p in paths]
    out += sorted(p for p in SAMPLE.rglob("*.pdf"))
    return out


# --- the three readers: each returns the text of every page ---------------------


REMOVED: dict[str, str] = {}  # per PDF, the lines thresher removed (and recorded)


def read_thresher(path: str) -> list[str]:
    from thresher.steps.extract import ExtractParams, extract
    from thresher.steps.spec import StepContext
    from thresher.steps.units import Source

    data = Path(path).read_bytes()
    source = Source(doc_id="bench", source_path=Path(path).name, data=data, size=len(data), mtime=0.0)
    pages = extract(source, ExtractParams(), StepContext())
    REMOVED[path] = " ".join(r["text"] for p in pages for r in p.payload["removed"])
    return [p.text if p.page is not None else "" for p in pages]


def read_pdfplumber(path: str) -> list[str]:
    import pdfplumber

    try:
        with pdfplumber.open(path) as pdf:
            return [page.extract_text() or "" for page in pdf.pages]
    except Exception:  # a file it cannot open (the demo's password-protected one)
        return []


def read_pdfium(path: str) -> list[str]:
    import pypdfium2 as pdfium

    try:
        doc = pdfium.PdfDocument(path)
    except Exception:
        return []
    out = []
    for i in range(len(doc)):
        page = doc[i]
        textpage = page.get_textpage()
        out.append(textpage.get_text_range())
        textpage.close()
        page.close()
    doc.close()
    return out


READERS = {"thresher extract": read_thresher, "pdfplumber extract_text": read_pdfplumber,
           "pypdfium2 get_text_range": read_pdfium}


def _call(args: tuple[str, str]) -> list[str]:
    name, path = args
    return READERS[name](path)


def _warm() -> None:
    read_thresher(str(SAMPLE / "policies" / "lending-policy-2025.pdf"))
    read_pdfplumber(str(SAMPLE / "policies" / "lending-policy-2025.pdf"))


def agreement(texts: dict[str, list[str]], reference: dict[str, str]) -> tuple[float, float]:
    common = ours_n = ref_n = 0
    for path, pages in texts.items():
        ours = Counter(w for t in pages for w in t.split() if w not in BULLETS)
        ref = Counter(w for w in reference[path].split() if w not in BULLETS)
        common += sum((ours & ref).values())
        ours_n += sum(ours.values())
        ref_n += sum(ref.values())
    return common / max(1, ours_n), common / max(1, ref_n)


def ruled_tables(tmp: Path, rounds: int = 3) -> None:
    """PDFium grid against pdfplumber's table finder on every ruled page, side by side.

    CPU time, not wall time: both run in this one thread, and on a machine shared with
    other work the CPU time of the same code moves far less than its wall time.
    """
    import io
    import statistics

    import pdfplumber
    import pypdfium2 as pdfium

    from thresher.steps.extract import pdf_text
    from thresher.steps.extract.pdf_grid import find_tables
    from thresher.steps.extract.pdf_tables import tables_on

    paths = [_plain(p, tmp) for p in RULED_PDFS if Path(p).exists()]
    paths.append(SAMPLE / "operations" / "branch-operations-handbook.pdf")
    grid_s: list[float] = []
    plumber_s: list[float] = []
    read_s: list[float] = []
    pages = tables = same = 0
    for path in paths:
        data = Path(path).read_bytes()
        doc = pdfium.PdfDocument(data)
        pdf = pdfplumber.open(io.BytesIO(data))
        for i in range(len(doc)):
            t0 = time.process_time()
            with pdf_text.LOCK:
                facts = pdf_text.read_page(doc, i)
            read = time.process_time() - t0
            if not facts.ruled:
                continue
            pages += 1
            g, p = [], []
            for _ in range(rounds):
                t0 = time.process_time()
                ours = find_tables(facts.edges, facts.words)
                g.append(time.process_time() - t0)
                page = pdf.pages[i]
                t0 = time.process_time()
                theirs = tables_on(page)
                p.append(time.process_time() - t0)
                page.close()
            grid_s.append(min(g))
            plumber_s.append(min(p))
            read_s.append(read)
            tables += len(theirs)
            norm = [[["".join((c or "").split()) for c in r] for r in t.rows] for t in theirs]
            same += len(ours) == len(theirs) and norm == [
                [["".join((c or "").split()) for c in r] for r in t.rows] for t in ours]
        pdf.close()
        doc.close()
    if not pages:
        print("no ruled pages found (install debian-policy, zlib1g-dev, debian-faq)")
        return
    print(f"ruled pages: {pages} in {len(paths)} PDFs, {tables} tables (pdfplumber); "
          f"same tables and cell text on {same}/{pages} pages")
    print(f"{'table finder':32s} {'ms/ruled page (median)':>22s} {'total s':>8s}  (CPU time of this process, best of {rounds} rounds: steadier than wall time on a shared machine)")
    for name, xs in (("pdfplumber find_tables+extract", plumber_s), ("PDFium grid (pdf_grid)", grid_s),
                     ("PDFium page read (words, edges)", read_s)):
        print(f"{name:32s} {statistics.median(xs) * 1000:22.2f} {sum(xs):8.2f}")
    print(f"grid vs pdfplumber: {sum(plumber_s) / max(sum(grid_s), 1e-9):.0f}x less time on the ruled pages")


def main() -> None:
    cores = os.cpu_count() or 1
    tmp = Path(tempfile.mkdtemp(prefix="thresher-bench-"))
    try:
        pdfs = [str(p) for p in pdf_corpus(tmp)]
        have_poppler = shutil.which("pdftotext") is not None
        reference = {}
        if have_poppler:
            for p in pdfs:
                run = subprocess.run(["pdftotext", "-enc", "UTF-8", p, "-"], capture_output=True, text=True)
                reference[p] = run.stdout if run.returncode == 0 else ""
        _warm()
        print(f"PDF corpus: {len(pdfs)} files ({', '.join(Path(p).name for p in pdfs)})")
        results = {}
        for name, reader in READERS.items():
            t0, c0 = time.perf_counter(), time.process_time()
            texts = {p: reader(p) for p in pdfs}
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            pages = sum(len(v) for v in texts.values())
            t0 = time.perf_counter()
            with ProcessPoolExecutor(max_workers=cores) as pool:
                list(pool.map(_call, [(name, p) for p in pdfs]))
            pool_wall = time.perf_counter() - t0
            results[name] = (pages, wall, cpu, pool_wall, texts)
        base = results["thresher extract"]
        print(f"{'reader':26s} {'pages':>5s} {'1 worker':>10s} {'per CPU s':>10s} "
              f"{'%d workers' % cores:>10s} {'time vs thresher':>17s}  {'P / R vs pdftotext':>18s}")
        for name, (pages, wall, cpu, pool_wall, texts) in results.items():
            p, r = agreement(texts, reference) if have_poppler else (float("nan"), float("nan"))
            print(f"{name:26s} {pages:5d} {pages / wall:8.1f}/s {pages / cpu:8.1f}/s "
                  f"{pages / pool_wall:8.1f}/s {wall / base[1]:16.2f}x  {p:.4f} / {r:.4f}")
        if have_poppler:
            texts = results["thresher extract"][4]
            p, r = agreement({k: v + [REMOVED.get(k, "")] for k, v in texts.items()}, reference)
            print(f"{'  + its recorded removals':26s} {'':5s} {'':10s} {'':10s} {'':10s} {'':17s}  {p:.4f} / {r:.4f}")
        else:
            print("(no pdftotext: install poppler-utils for the agreement columns)")
        print("(pages/s: '1 worker' is wall time in this process, 'per CPU s' its CPU time, "
              f"'{cores} workers' a process pool over documents)")

        print()
        ruled_tables(tmp)

        # Other formats through the extract step.
        from thresher.steps.extract import ExtractParams, extract
        from thresher.steps.extract.sniff import sniff
        from thresher.steps.spec import StepContext
        from thresher.steps.units import Source

        files = [p for p in SAMPLE.rglob("*") if p.is_file() and p.suffix != ".pdf"]
        files += sorted(Path("/usr/share/doc/libxslt1-dev").rglob("*.html"))
        by_format: dict[str, list[tuple[Path, bytes]]] = {}
        for f in files:
            data = f.read_bytes()
            fmt = sniff(data, f.name).format or "unreadable"
            by_format.setdefault(fmt, []).append((f, data))
        print()
        print(f"{'format':10s} {'files':>5s} {'pages':>5s} {'MB':>6s} {'pages/s (1 worker)':>19s}")
        for fmt, items in sorted(by_format.items()):
            if fmt == "unreadable":
                continue
            f, data = items[0]  # once untimed: the format's libraries get imported
            extract(Source(doc_id="w", source_path=f.name, data=data, size=len(data), mtime=0.0),
                    ExtractParams(), StepContext())
            t0 = time.perf_counter()
            pages = 0
            for f, data in items:
                src = Source(doc_id="bench", source_path=f.name, data=data, size=len(data), mtime=0.0)
                pages += len(extract(src, ExtractParams(), StepContext()))
            wall = time.perf_counter() - t0
            mb = sum(len(d) for _, d in items) / 1e6
            print(f"{fmt:10s} {len(items):5d} {pages:5d} {mb:6.2f} {pages / wall:17.1f}/s")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


# --- this checkout against another, side by side ------------------------------

AGAINST_ROUNDS = 7


def _serve_pdfs() -> None:
    """Child of `against`: extract the goals' Debian PDFs on request, answering each
    with its CPU seconds, pages and a digest of the pages (text, blocks, payload)."""
    import hashlib
    import pickle
    import sys

    from thresher.steps.extract import ExtractParams, extract
    from thresher.steps.spec import StepContext
    from thresher.steps.units import Source

    tmp = Path(tempfile.mkdtemp(prefix="thresher-bench-"))
    paths = [_plain(p, tmp) for p in BASE_PDFS + RULED_PDFS if Path(p).exists()]
    sources = [Source(doc_id="bench", source_path=p.name, data=p.read_bytes(), size=p.stat().st_size, mtime=0.0)
               for p in paths]
    shutil.rmtree(tmp, ignore_errors=True)
    for src in sources:  # imports and PDFium's library load, not timed
        extract(src, ExtractParams(), StepContext())
    print(len(sources), flush=True)
    for line in sys.stdin:
        src = sources[int(line)]
        t = time.process_time()
        pages = extract(src, ExtractParams(), StepContext())
        cpu = time.process_time() - t
        seen = [(p.page, p.text, p.blocks, p.warnings, p.status, p.reason,
                 {k: v for k, v in p.payload.items() if k != "duration_ms"}) for p in pages]
        print(cpu, len(pages), hashlib.sha256(pickle.dumps(seen)).hexdigest(), flush=True)


def against(tree: str) -> None:
    """The PDF extraction's CPU time per page, this checkout beside `tree` (a `git
    worktree add` of another commit), on the Debian PDFs `bench goals` reads: two
    child processes, one per checkout, take turns file by file (the order swapped every
    round); each file's best of AGAINST_ROUNDS counts, so a busy shared machine
    disturbs both alike. Also says whether both give the same pages."""
    import sys

    here = Path(__file__).resolve().parent.parent
    with tempfile.TemporaryDirectory() as link:
        # thresher is the checkout's root directory: a link named thresher puts the other
        # tree's package first on the import path of its child.
        os.symlink(Path(tree).resolve(), Path(link) / "thresher")
        envs = {"before": dict(os.environ, PYTHONPATH=link), "after": dict(os.environ)}
        children = {label: subprocess.Popen([sys.executable, "-m", "bench.extract", "--serve"], cwd=here, env=env,
                                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
                    for label, env in envs.items()}
        try:
            files = {int(c.stdout.readline()) for c in children.values()}
            if len(files) != 1 or not files:
                raise SystemExit("the two checkouts see different PDFs")
            n = files.pop()
            best = {label: [float("inf")] * n for label in children}
            pages = [0] * n
            digests: dict[str, list[str]] = {label: [""] * n for label in children}
            for r in range(AGAINST_ROUNDS):
                for k in range(n):
                    order = list(children.items()) if r % 2 == 0 else list(children.items())[::-1]
                    for label, child in order:
                        child.stdin.write(f"{k}\n")
                        child.stdin.flush()
                        cpu, count, digest = child.stdout.readline().split()
                        best[label][k] = min(best[label][k], float(cpu))
                        pages[k], digests[label][k] = int(count), digest
        finally:
            for child in children.values():
                child.stdin.close()
                child.wait()
    total = sum(pages)
    print(f"load average {os.getloadavg()[0]:.1f}; {n} PDFs, {total} pages; best of {AGAINST_ROUNDS} per file")
    for label in children:
        print(f"  {label} ({tree if label == 'before' else 'this checkout'}): "
              f"{sum(best[label]) / total * 1000:.2f} ms CPU/page")
    print(f"  after/before: {sum(best['after']) / sum(best['before']):.3f}")
    same = sum(a == b for a, b in zip(digests["before"], digests["after"]))
    print(f"  the same pages (text, blocks, warnings, statuses, payload) in {same} of {n} PDFs")


if __name__ == "__main__":
    import sys

    if sys.argv[1:2] == ["--against"] and len(sys.argv) == 3:
        against(sys.argv[2])
    elif sys.argv[1:] == ["--serve"]:
        _serve_pdfs()
    else:
        main()
