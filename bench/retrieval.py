"""Retrieval: do thresher's chunks beat fixed token windows cut from the same text?

Manuals that Debian ships both as PDF and as HTML (installed by `make bench-deps`):
  faq         debian-faq           /usr/share/doc/debian/FAQ (questions as section titles)
  devref      developers-reference /usr/share/developers-reference
  policy      debian-policy        /usr/share/doc/debian-policy (policy.pdf.gz, policy.html/)

Truth comes from the HTML edition: every section heading (its number and permalink
sign removed) is a query, and the section's own text (up to the next heading of any
level; contents and navigation parts of the HTML left out) is its answer. Sections with
fewer than MIN_ANSWER_WORDS answer words are not asked. Answer words are the distinct
terms (steps/bm25.terms) of at least three characters, not digits only, not in the
short English STOP_WORDS list (common practice).

Three chunkers over the same PDF, all in one run:
  thresher     the default flow definition's document steps (extract, clean, language,
               split, ...: the chain `thresher run` uses; corpus-wide steps such as dedup
               are left out, one document has no copies) -- the chunks that are ok are
               what reaches the hand-off;
  windows      the extracted text (every page extract read, navigation pages too,
               cleaned by the same clean step, joined) cut every max_tokens tokens of
               the same encoding;
  windows+ovl  the same, each window starting OVERLAP_SHARE of a window after the last
               one's start;
  body-windows (for scale, not the goal) windows over the pages thresher passes on
               (navigation pages left out), to show what the rules besides dropping
               navigation pages add.
Each chunker's chunks are ranked by BM25 (steps/bm25.py, Robertson & Zaragoza 2009)
for each query. Reported per manual and chunker:
  top1    mean share of the answer's words held by the top-ranked chunk
  top3    share of queries with a top-3 chunk holding at least half the answer's words
  tokens  mean chunk tokens
  nav     share of top-ranked chunks that start and end on navigation pages, as the
          PDF's outline places them (front matter before the first chapter that holds
          outline titles, and the index; judged the same way for every chunker)
and the ratio of thresher's top1 to the better window baseline's (goal: >= 1.15).

`python -m bench retrieval` runs all manuals; `python -m bench.retrieval --quick` runs
only the FAQ; `--set step.param=value` (repeatable) changes a parameter of the
default definition, to measure what a rule contributes; `--variant
LABEL=step.param=value,...` (repeatable) adds a row of thresher's chunks with those
changes on top, so settings are compared side by side in one run (the steps before the
first changed one run once per manual). The summary line at the end gives each row's
top1 and top3 averaged over the manuals run, each manual weighing the same.
"""

from __future__ import annotations

import argparse
import bisect
import gzip
import re
import sys
import time
from dataclasses import dataclass
from pathlib import Path

MIN_ANSWER_WORDS = 20
OVERLAP_SHARE = 0.25
STOP_WORDS = frozenset("""
the and for are but not you all any can had her was one our out has his how its may new
now old see two who did get let put say she too use that with have this will your from
they know want been good much some time very when come here just like long make many
more only over such take than them well were what which while into also each other
their there these those then would could should about after before being both does done
doing down during further itself most must same shall through under until upon where
whom why yours between because against above below off once own again
""".split())


@dataclass(frozen=True)
class Manual:
    name: str
    package: str
    pdf: Path
    html: tuple[Path, ...]


def manuals() -> list[Manual]:
    faq = Path("/usr/share/doc/debian/FAQ")
    devref = Path("/usr/share/developers-reference")
    policy = Path("/usr/share/doc/debian-policy")
    return [
        Manual("faq", "debian-faq", faq / "debian-faq.en.pdf.gz",
               tuple(sorted(p for p in faq.glob("*.en.html") if p.name != "index.en.html"))),
        Manual("devref", "developers-reference", devref / "developers-reference.pdf",
               (devref / "developers-reference.html",)),
        Manual("policy", "debian-policy", policy / "policy.pdf.gz",
               tuple(sorted(p for p in (policy / "policy.html").glob("ch-*.html")))
               + tuple(sorted(p for p in (policy / "policy.html").glob("ap-*.html")))),
    ]


# -- truth from the HTML -------------------------------------------------------------

_NUMBER = re.compile(r"^\s*(?:(?:chapter|appendix|section)\s+)?[\dA-Z]*(?:\.\d+)*\.?\s+",
                     re.IGNORECASE)
_SKIP = ("div.toc", "div.toctree-wrapper > ul", "div.sphinxsidebar", "div.related",
         "div.navheader", "div.navfooter", "div.footer", "nav", "script", "style",
         "a.headerlink", "div.list-of-tables", "div.list-of-figures", "div.legalnotice")


def answer_words(text: str) -> set[str]:
    from thresher.steps.bm25 import terms

    return {t for t in terms(text) if len(t) >= 3 and not t.isdigit() and t not in STOP_WORDS}


def html_sections(path: Path) -> list[tuple[str, str]]:
    """(query, answer text) per heading of one HTML file."""
    from bs4 import BeautifulSoup, NavigableString

    soup = BeautifulSoup(path.read_bytes(), "html.parser")
    for sel in _SKIP:
        for tag in soup.select(sel):
            tag.decompose()
    out: list[list] = []
    heads = {"h1", "h2", "h3", "h4", "h5", "h6"}
    root = soup.body or soup
    for node in root.descendants:
        if isinstance(node, NavigableString):
            if type(node) is not NavigableString:  # comments, CDATA
                continue
            if node.find_parent(heads) is None and out:
                out[-1][1].append(str(node))
        elif node.name in heads:
            title = " ".join(node.get_text(" ").replace("\u00b6", " ").split())
            out.append([_NUMBER.sub("", title, count=1), []])
    return [(q, " ".join(" ".join(parts).split())) for q, parts in out if q]


def truth(manual: Manual) -> list[tuple[str, set[str]]]:
    out = []
    for path in manual.html:
        for query, answer in html_sections(path):
            words = answer_words(answer)
            if len(words) >= MIN_ANSWER_WORDS:
                out.append((query, words))
    return out


# -- chunkers --------------------------------------------------------------------------

def pdf_bytes(path: Path) -> bytes:
    data = path.read_bytes()
    return gzip.decompress(data) if path.suffix == ".gz" else data


def document_chain(overrides: dict[str, dict]):
    """The default definition's document-scope steps, with `overrides` applied."""
    from thresher.flows.config import build_definition, default_config_text
    import yaml

    data = yaml.safe_load(default_config_text())
    for entry in data["steps"]:
        entry.setdefault("params", {})
        entry["params"].update(overrides.get(entry["step"], {}))
    definition = build_definition(data)
    return [s for s in definition.steps if s.spec.scope == "document"
            and (not s.spec.formats or "pdf" in s.spec.formats)]


def run_chain(chain, data: bytes, path: str, cache: dict):
    """The extracted text's pages (extract + clean, every page read, navigation pages
    too: the windows' text) and the chain's chunks that are ok (the hand-off's)."""
    from thresher.flows.encodings import get_encoding
    from thresher.steps.spec import StepContext
    from thresher.steps.units import DROPPED, Source

    ctx = StepContext(doc_id=path, source_path=path, encoding=get_encoding)
    units = Source(doc_id=path, source_path=path, data=data, size=len(data), mtime=0.0)
    extracted = None
    key: tuple = ()
    for step in chain:
        # A step's output depends on every step up to it: the key is that prefix.
        key += ((step.name, step.digest),)
        if key in cache:
            out = cache[key]
        else:
            out = step.spec.run(units, step.params, ctx)
            cache[key] = out
        if step.name == "extract":
            extracted = [u for u in out if u.ok or u.status == DROPPED]
        units = [u for u in out if u.ok]
    clean = next(s for s in chain if s.name == "clean")
    dropped = {p.page for p in extracted if not p.ok}
    pages = [p for p in clean.spec.run(extracted, clean.params, ctx) if p.ok]
    return pages, dropped, units


def navigation_truth(data: bytes) -> set[int]:
    """Pages the outline places outside the body: front matter before the first
    top-level entry that holds at least 5 outline titles (contents), and every page from
    a top-level entry titled "Index" on. Independent of thresher's own navigation rule."""
    import pypdfium2 as pdfium

    def norm(s: str) -> str:
        return re.sub(r"\W+", "", s.casefold())

    doc = pdfium.PdfDocument(data)
    try:
        marks = [(m.level, m.get_title() or "", m.get_dest().get_index() + 1)
                 for m in doc.get_toc() if m.get_dest() is not None]
        top = [(title, page) for level, title, page in marks if level == 0]
        if not top:
            return set()
        body = min(page for _, page in top)
        titles = {norm(t) for _, t, _ in marks if len(norm(t)) >= 10}
        out = set()
        for n in range(1, body):
            text = norm(doc[n - 1].get_textpage().get_text_range())
            if sum(1 for t in titles if t in text) >= 5:
                out.add(n)
        for title, page in top:
            if "index" in title.casefold():
                out.update(range(page, len(doc) + 1))
        return out
    finally:
        doc.close()


def windows(text: str, enc, size: int, stride: int) -> list[tuple[str, int, int]]:
    """(text, first char, last char) of windows of `size` tokens every `stride` tokens."""
    ids = enc.encode_ordinary(text)
    _, offsets = enc.decode_with_offsets(ids)
    out = []
    for start in range(0, max(1, len(ids)), stride):
        piece = ids[start:start + size]
        first = offsets[start] if start < len(offsets) else len(text)
        last = offsets[min(len(ids), start + size) - 1] if piece else first
        out.append((enc.decode(piece), first, last))
        if start + size >= len(ids):
            break
    return out


@dataclass
class Scores:
    top1: float
    top3: float
    tokens: float
    nav: float
    chunks: int


def score(texts: list[str], token_counts: list[int], nav: list[bool], questions) -> Scores:
    from thresher.steps.bm25 import BM25

    index = BM25(texts)
    words = [answer_words(t) for t in texts]
    top1 = top3 = navs = 0.0
    for query, answer in questions:
        ranked = index.rank(query, 3)
        shares = [len(answer & words[i]) / len(answer) for i in ranked]
        top1 += shares[0]
        top3 += max(shares) >= 0.5
        navs += nav[ranked[0]]
    n = len(questions)
    return Scores(top1 / n, top3 / n, sum(token_counts) / max(1, len(token_counts)), navs / n,
                  len(texts))


def measure(manual: Manual, overrides: dict[str, dict], cache: dict,
            variants: dict[str, dict[str, dict]] | None = None) -> dict[str, Scores]:
    """Scores per chunker: "thresher" (the definition with `overrides`), one row per
    variant (its changes on top of `overrides`), then the window baselines."""
    from thresher.flows.encodings import get_encoding

    questions = truth(manual)
    data = pdf_bytes(manual.pdf)
    nav_pages = navigation_truth(data)
    out = {}
    settings = {"thresher": overrides}
    for label, changes in (variants or {}).items():
        merged = {step: dict(params) for step, params in overrides.items()}
        for step, params in changes.items():
            merged.setdefault(step, {}).update(params)
        settings[label] = merged
    for label, these in settings.items():
        chain = document_chain(these)
        split = next(s for s in chain if s.name == "split")
        enc = get_encoding(split.params.encoding)
        run_pages, run_dropped, chunks = run_chain(chain, data, str(manual.pdf), cache)
        if label == "thresher":
            # The windows follow the definition's own budget and encoding.
            size, win_enc = split.params.max_tokens, enc
            pages, dropped = run_pages, run_dropped
        out[label] = score(
            [c.text for c in chunks], [len(enc.encode_ordinary(c.text)) for c in chunks],
            [c.page_start in nav_pages and c.page_end in nav_pages for c in chunks],
            questions)
    body = [p for p in pages if p.page not in dropped]
    for name, stride, these in (("windows", size, pages),
                                ("windows+ovl", int(size * (1 - OVERLAP_SHARE)), pages),
                                ("body-windows", size, body)):
        text = "\n\n".join(p.text for p in these)
        starts, pos = [], 0
        for p in these:
            starts.append(pos)
            pos += len(p.text) + 2

        def page_at(char: int) -> int | None:
            return these[bisect.bisect_right(starts, char) - 1].page

        wins = windows(text, win_enc, size, stride)
        out[name] = score([w for w, _, _ in wins], [len(win_enc.encode_ordinary(w)) for w, _, _ in wins],
                          [page_at(a) in nav_pages and page_at(b) in nav_pages for _, a, b in wins],
                          questions)
    out["_questions"] = len(questions)
    return out


def parse_overrides(items: list[str]) -> dict[str, dict]:
    import yaml

    out: dict[str, dict] = {}
    for item in items:
        key, _, value = item.partition("=")
        step, _, param = key.partition(".")
        out.setdefault(step, {})[param] = yaml.safe_load(value)
    return out


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="bench.retrieval")
    parser.add_argument("--quick", action="store_true", help="the FAQ only")
    parser.add_argument("--set", action="append", default=[], metavar="STEP.PARAM=VALUE")
    parser.add_argument("--manual", action="append", default=[])
    parser.add_argument("--variant", action="append", default=[],
                        metavar="LABEL=STEP.PARAM=VALUE[,STEP.PARAM=VALUE...]")
    args = parser.parse_args([] if argv is None else argv)
    overrides = parse_overrides(args.set)
    variants = {}
    for item in args.variant:
        label, _, changes = item.partition("=")
        if not changes or label in ("thresher", "windows", "windows+ovl", "body-windows"):
            parser.error(f"--variant {item!r}: give LABEL=STEP.PARAM=VALUE,... with a new label")
        variants[label] = parse_overrides(changes.split(","))
    chosen = [m for m in manuals()
              if (not args.quick or m.name == "faq") and (not args.manual or m.name in args.manual)]
    missing = [m.package for m in chosen if not m.pdf.exists()]
    if missing:
        print(f"missing Debian packages: {' '.join(missing)} (make bench-deps)")
        chosen = [m for m in chosen if m.pdf.exists()]
    if overrides:
        print(f"overrides: {overrides}")
    for label, changes in variants.items():
        print(f"variant {label}: {changes}")
    width = max([12] + [len(label) for label in variants])
    print(f"{'manual':8} {'chunker':{width}} {'top1':>6} {'top3':>6} {'tokens':>7} {'nav':>6} "
          f"{'chunks':>7}")
    rows: dict[str, list[Scores]] = {}
    for manual in chosen:
        t0 = time.perf_counter()
        result = measure(manual, overrides, {}, variants)
        n = result.pop("_questions")
        for name, s in result.items():
            rows.setdefault(name, []).append(s)
            print(f"{manual.name:8} {name:{width}} {s.top1:6.3f} {s.top3:6.3f} {s.tokens:7.1f} "
                  f"{s.nav:6.3f} {s.chunks:7d}")
        best = max(result["windows"].top1, result["windows+ovl"].top1)
        best3 = max(result["windows"].top3, result["windows+ovl"].top3)
        print(f"{manual.name:8} {n} queries; top1 ratio to the better window: "
              f"{result['thresher'].top1 / best:.3f} (goal 1.15); top3 "
              f"{result['thresher'].top3:.3f} vs {best3:.3f}; top1 ratio to body-windows "
              f"{result['thresher'].top1 / result['body-windows'].top1:.3f}  "
              f"[{time.perf_counter() - t0:.0f} s]")
    if len(chosen) > 1:
        print(f"mean of {len(chosen)} manuals, each weighing the same (top1 / top3):")
        for name, scores in rows.items():
            print(f"  {name:{width}} {sum(s.top1 for s in scores) / len(scores):.3f} / "
                  f"{sum(s.top3 for s in scores) / len(scores):.3f}")


if __name__ == "__main__":
    main(sys.argv[1:])
