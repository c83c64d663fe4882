"""The review page's charts as plain data: shapes with coordinates, a title and a
description for screen readers, and the numbers as a table (the text alternative).

Templates draw them (report_templates/macros.html, `chart`); nothing here is markup,
so every label, path and tip is escaped by the template engine like any other text.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

STATUS_ORDER = ("ok", "failed", "dropped", "skipped")
# Colours of our own: status (ok teal, failed brick, dropped ochre, skipped slate).
STATUS_COLOUR = {"ok": "#2f8f83", "failed": "#b8442f", "dropped": "#d39b2a", "skipped": "#8a94a6"}
OTHER_COLOUR = "#6d5aa8"
BAR_COLOUR = "#3f6fb5"
LANGUAGE_PALETTE = ["#3f6fb5", "#2f8f83", "#c0672b", "#7b5ea7", "#9a8a2e", "#4d8fb8", "#a0506e", "#5b7a3a"]
# Bars in the tokens-per-document chart; the documents list has every document.
MAX_DOC_BARS = 30


@dataclass
class Link:
    """A table cell that links somewhere in the report (href built from ids only)."""

    href: str
    text: str
    path: bool = True


@dataclass
class Shape:
    kind: str  # rect | text | line
    attrs: dict[str, Any]
    text: str = ""
    tip: str = ""


@dataclass
class Chart:
    key: str
    caption: str
    width: int
    height: int
    title: str
    desc: str
    shapes: list[Shape] = field(default_factory=list)
    head: list[str] = field(default_factory=list)
    rows: list[list[Any]] = field(default_factory=list)
    numeric: set[int] = field(default_factory=set)
    note: str = ""

    def rect(self, x: float, y: float, w: float, h: float, fill: str, tip: str = "") -> None:
        self.shapes.append(Shape("rect", {"x": f"{x:.1f}", "y": f"{y:.1f}", "width": f"{max(w, 0):.1f}",
                                          "height": f"{h:.1f}", "fill": fill}, tip=tip))

    def text(self, x: float, y: float, s: str, anchor: str = "start", size: int = 13,
             weight: str = "normal", tip: str = "", fill: str = "#2b3140") -> None:
        self.shapes.append(Shape("text", {"x": f"{x:.1f}", "y": f"{y:.1f}", "text-anchor": anchor,
                                          "font-size": size, "font-weight": weight, "fill": fill}, s, tip))

    def line(self, x1: float, y1: float, x2: float, y2: float, stroke: str = "#9aa1ad", dash: str = "") -> None:
        attrs = {"x1": f"{x1:.1f}", "y1": f"{y1:.1f}", "x2": f"{x2:.1f}", "y2": f"{y2:.1f}", "stroke": stroke}
        if dash:
            attrs["stroke-dasharray"] = dash
        self.shapes.append(Shape("line", attrs))


def short(text: str, n: int) -> str:
    """Shorten from the middle, keeping the file name at the end of a path visible."""
    if len(text) <= n:
        return text
    keep = n - 1
    head = keep // 3
    return text[:head] + "…" + text[-(keep - head):]


def _nice_step(span: float, parts: int) -> float:
    raw = max(span / max(parts, 1), 1e-9)
    mag = 10 ** math.floor(math.log10(raw))
    for m in (1, 2, 2.5, 5, 10):
        if m * mag >= raw:
            return m * mag
    return 10 * mag


def _legend(c: Chart, x: float, y: float, keys: list[str]) -> None:
    for k in keys:
        c.rect(x, y - 9, 11, 11, STATUS_COLOUR.get(k, OTHER_COLOUR))
        c.text(x + 15, y, k)
        x += 22 + 8 * len(k) + 10


def chart_status(stages) -> Chart:
    """Stacked bars of units by status, one per stage in chain order (stages: StageInfo)."""
    keys = [s for s in STATUS_ORDER if any(st.counts.get(s) for st in stages)]
    keys += sorted({k for st in stages for k in st.counts} - set(STATUS_ORDER))
    label_w, bar_w, row_h = 96, 420, 28
    top = 30
    height = top + row_h * max(len(stages), 1) + 10
    peak = max((st.total for st in stages), default=0) or 1
    desc = "; ".join(f"{st.name} ({st.unit}): {st.total} in all, "
                     + ", ".join(f"{st.counts.get(k, 0)} {k}" for k in keys) for st in stages) or "no stages"
    c = Chart("chart-status", "Status by stage", label_w + bar_w + 150, height, "Units by status at each stage",
              "Stacked bars, one per stage in chain order. " + desc)
    _legend(c, label_w, 16, keys or ["ok"])
    for i, st in enumerate(stages):
        y = top + i * row_h
        c.text(label_w - 8, y + 17, st.name, anchor="end", weight="bold")
        x = float(label_w)
        for k in keys:
            n = st.counts.get(k, 0)
            if not n:
                continue
            w = bar_w * n / peak
            c.rect(x, y + 4, w, row_h - 9, STATUS_COLOUR.get(k, OTHER_COLOUR), f"{st.name}: {n} {k}")
            if w > 26:
                c.text(x + w / 2, y + 18, f"{n}", anchor="middle", size=12, fill="#ffffff")
            x += w
        c.text(x + 6, y + 18, f"{st.total:,} {st.unit}", size=12)
    c.head = ["stage", "unit"] + keys + ["total"]
    c.rows = [[st.name, st.unit] + [f"{st.counts.get(k, 0):,}" for k in keys] + [f"{st.total:,}"] for st in stages]
    c.numeric = set(range(2, 3 + len(keys)))
    c.note = "Current view of the live documents: for each unit, its latest attempt."
    return c


def chart_tokens(largest, total_docs: int, rest_docs: int, rest_tokens: int, empty: int) -> Chart:
    """Tokens per document, largest first. `largest`: (path, tokens, live chunks, href)."""
    shown = largest[:MAX_DOC_BARS]
    label_w, bar_w, row_h = 280, 280, 19
    height = 12 + row_h * max(len(shown), 1) + 8
    peak = max((t for _, t, _, _ in shown), default=1)
    desc = "; ".join(f"{p}: {t} tokens" for p, t, _, _ in shown) or "no document has live chunks"
    c = Chart("chart-tokens", "Tokens per document", label_w + bar_w + 90, height,
              "Tokens per document (live chunks)", "Horizontal bars, largest first. " + desc)
    for i, (path, tokens, _, _) in enumerate(shown):
        y = 8 + i * row_h
        c.text(label_w - 6, y + 13, short(path, 38), anchor="end", size=12, tip=path)
        w = bar_w * tokens / peak
        c.rect(label_w, y + 3, w, row_h - 6, BAR_COLOUR, f"{path}: {tokens:,} tokens")
        c.text(label_w + w + 5, y + 13, f"{tokens:,}", size=12)
    if not shown:
        c.text(10, 22, "No document has live chunks.")
    notes = []
    if rest_docs:
        notes.append(f"{rest_docs:,} smaller documents ({rest_tokens:,} tokens) are not drawn.")
    if empty:
        notes.append(f"{empty:,} {'document has' if empty == 1 else 'documents have'} no live chunks.")
    notes.append("The documents list has every document.")
    c.note = " ".join(notes)
    c.head = ["document", "tokens", "live chunks"]
    c.rows = [[Link(href, path), f"{tokens:,}", f"{n:,}"] for path, tokens, n, href in shown]
    c.numeric = {1, 2}
    return c


def chart_languages(chunks: Counter, tokens: Counter, docs: Counter) -> Chart:
    order = sorted(chunks, key=lambda k: (-chunks[k], k))
    label_w, bar_w, row_h = 90, 300, 26
    height = 10 + row_h * max(len(order), 1) + 8
    total = sum(chunks.values()) or 1
    peak = max(chunks.values(), default=1)
    desc = "; ".join(f"{k}: {chunks[k]} chunks, {tokens[k]} tokens, in {docs[k]} documents" for k in order) \
        or "no live chunks"
    c = Chart("chart-languages", "Language mix", label_w + bar_w + 250, height, "Language of the live chunks",
              "Horizontal bars of chunks per detected language (ISO 639-1 codes). " + desc)
    for i, k in enumerate(order):
        y = 6 + i * row_h
        c.text(label_w - 8, y + 17, k, anchor="end", weight="bold")
        w = bar_w * chunks[k] / peak
        colour = "#9aa1ad" if k == "unknown" else LANGUAGE_PALETTE[i % len(LANGUAGE_PALETTE)]
        c.rect(label_w, y + 4, w, row_h - 9, colour, f"{k}: {chunks[k]} chunks")
        c.text(label_w + w + 6, y + 18, f"{chunks[k]:,} chunks ({100 * chunks[k] / total:.0f}%), "
                                        f"{tokens[k]:,} tokens", size=12)
    if not order:
        c.text(10, 22, "No live chunks.")
    c.head = ["language", "chunks", "tokens", "documents"]
    c.rows = [[k, f"{chunks[k]:,}", f"{tokens[k]:,}", f"{docs[k]:,}"] for k in order]
    c.numeric = {1, 2, 3}
    c.note = "A chunk takes the language most of its text is in; short or unsure text is 'unknown'."
    return c


def chart_labels(chunks: Counter, docs: Counter) -> Chart:
    """Live chunks per access label (the hand-off's `label`)."""
    order = sorted(chunks, key=lambda k: (-chunks[k], k))
    label_w, bar_w, row_h = 130, 300, 26
    height = 10 + row_h * max(len(order), 1) + 8
    peak = max(chunks.values(), default=1) or 1
    desc = "; ".join(f"{k}: {chunks[k]} chunks in {docs[k]} documents" for k in order) or "no documents"
    c = Chart("chart-labels", "Chunks by access label", label_w + bar_w + 200, height, "Live chunks per access label",
              "Horizontal bars of live chunks per access label. " + desc)
    for i, k in enumerate(order):
        y = 6 + i * row_h
        c.text(label_w - 8, y + 17, k, anchor="end", weight="bold")
        w = bar_w * chunks[k] / peak
        c.rect(label_w, y + 4, w, row_h - 9, LANGUAGE_PALETTE[i % len(LANGUAGE_PALETTE)], f"{k}: {chunks[k]} chunks")
        c.text(label_w + w + 6, y + 18, f"{chunks[k]:,} chunks, {docs[k]:,} documents", size=12)
    if not order:
        c.text(10, 22, "No documents.")
    c.head = ["label", "chunks", "documents"]
    c.rows = [[k, f"{chunks[k]:,}", f"{docs[k]:,}"] for k in order]
    c.numeric = {1, 2}
    c.note = "The label comes from the access rule that matched the document (access.rules, access.default)."
    return c


def chart_chunk_sizes(sizes: Counter, budget: int | None) -> Chart:
    """Histogram of tokens per live chunk; `sizes` counts chunks by token count."""
    largest = max(sizes, default=0)
    upper = max(largest, budget or 0, 1)
    step = max(1, int(math.ceil(_nice_step(upper, 12))))
    nbins = max(1, int(math.ceil((largest + 1) / step)))
    if budget:
        nbins = max(nbins, int(math.ceil(budget / step)))
    bins = [0] * nbins
    for s, n in sizes.items():
        bins[min(s // step, nbins - 1)] += n
    left, plot_w, plot_h, top = 46, 520, 170, 14
    bar = plot_w / nbins
    peak = max(bins, default=0) or 1
    ystep = max(1, int(_nice_step(peak, 4)))
    ymax = int(math.ceil(peak / ystep) * ystep)
    desc = "; ".join(f"{i * step}-{(i + 1) * step - 1} tokens: {n} chunks" for i, n in enumerate(bins))
    c = Chart("chart-chunk-sizes", "Chunk-size histogram", left + plot_w + 30, top + plot_h + 46,
              "Chunk sizes in tokens", f"Histogram of tokens per live chunk, bins of {step} tokens. {desc}")
    for t in range(0, ymax + 1, ystep):
        y = top + plot_h - plot_h * t / ymax
        c.line(left, y, left + plot_w, y, "#e3e6ec")
        c.text(left - 6, y + 4, f"{t}", anchor="end", size=11)
    for i, n in enumerate(bins):
        h = plot_h * n / ymax
        x = left + i * bar
        c.rect(x + 1, top + plot_h - h, bar - 2, h, BAR_COLOUR, f"{i * step}-{(i + 1) * step - 1} tokens: {n} chunks")
        if n and bar > 18:
            c.text(x + bar / 2, top + plot_h - h - 3, f"{n}", anchor="middle", size=11)
    c.line(left, top + plot_h, left + plot_w, top + plot_h, "#5b6373")
    every = max(1, int(math.ceil(nbins / 12)))
    for i in range(0, nbins + 1, every):
        x = left + i * bar
        c.line(x, top + plot_h, x, top + plot_h + 4, "#5b6373")
        c.text(x, top + plot_h + 16, f"{i * step}", anchor="middle", size=11)
    c.text(left + plot_w / 2, top + plot_h + 36, "tokens per chunk", anchor="middle", size=12)
    if budget:
        x = left + plot_w * budget / (nbins * step)
        c.line(x, top - 4, x, top + plot_h, "#b8442f", "5 3")
        c.text(x - 4, top + 8, f"split budget {budget}", anchor="end", size=11, fill="#b8442f")
    c.head = ["tokens", "chunks"]
    c.rows = [[f"{i * step}–{(i + 1) * step - 1}", f"{n:,}"] for i, n in enumerate(bins)]
    c.numeric = {1}
    count = sum(sizes.values())
    if count:
        mean = sum(s * n for s, n in sizes.items()) / count
        seen, median = 0, 0
        for s in sorted(sizes):  # the upper median, as sorted(list)[len // 2] gives
            seen += sizes[s]
            if seen > count // 2:
                median = s
                break
        c.note = f"{count:,} live chunks; median {median}, mean {mean:.0f}, largest {largest} tokens."
    else:
        c.note = "No live chunks."
    return c
