"""The review page as one self-contained HTML file: styles inline, charts as inline SVG
drawn here, no script at all (a Content-Security-Policy forbids any), no request to
anything outside the file.

Every piece of document text, path, reason or heading goes through `esc` (html.escape
with quotes), and every attribute value is double-quoted, so nothing a document holds
can become markup. Ids and hrefs are built only from doc ids and chunk ids, which are
hex digests.
"""

from __future__ import annotations

import base64
import difflib
import hashlib
import html
import math
import re
import unicodedata
from collections import Counter
from datetime import datetime
from typing import Iterable

from thresher.flows.report_data import SEVERITY, ChunkView, DocumentView, PageView, ReportData, UnitAtStage

STATUS_ORDER = ("ok", "failed", "dropped", "skipped")
# Colours of our own: status (ok teal, failed brick, dropped ochre, skipped slate);
# the diff marks removed text plum with a strike and inserted text blue with an underline.
STATUS_COLOUR = {"ok": "#2f8f83", "failed": "#b8442f", "dropped": "#d39b2a", "skipped": "#8a94a6"}
OTHER_COLOUR = "#6d5aa8"
BAR_COLOUR = "#3f6fb5"

# A pane shows at most this much text; the rest is counted, not shown (thresher trail --text has it all).
MAX_PANE_CHARS = 60_000
# Word-level comparison inside a changed block of lines only up to this many tokens a side.
MAX_WORD_DIFF_TOKENS = 4_000
# Bars in the tokens-per-document chart; the documents table lists every document.
MAX_DOC_BARS = 30

CSS = """
:root{--ink:#1f2430;--muted:#5b6373;--line:#d9dde5;--paper:#fbfbf8;--panel:#ffffff;--accent:#3f6fb5;
--del-bg:#f1d3e6;--del-ink:#6b1f4f;--ins-bg:#cfe3f7;--ins-ink:#123e6b}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,
"Noto Sans","DejaVu Sans",sans-serif}
a{color:var(--accent)}
header.top{background:#24324a;color:#f4f1e8;padding:14px 24px 10px}
header.top h1{margin:0;font-size:21px;font-weight:600}
header.top p{margin:4px 0 0;color:#c9cfdb;font-size:13px}
nav.jump{display:flex;gap:18px;flex-wrap:wrap;margin-top:8px;font-size:14px}
nav.jump a{color:#f4d98b;text-decoration:none}
main{max-width:1240px;margin:0 auto;padding:8px 24px 48px}
h2{font-size:19px;margin:28px 0 10px;padding-bottom:4px;border-bottom:2px solid #24324a}
h3{font-size:16px;margin:18px 0 6px}
h4{font-size:14.5px;margin:12px 0 4px}
.cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(170px,1fr));gap:10px;margin:10px 0}
.card{background:var(--panel);border:1px solid var(--line);border-left:4px solid var(--accent);padding:8px 10px}
.card b{display:block;font-size:22px;font-weight:600}
.card span{color:var(--muted);font-size:13px}
table{border-collapse:collapse;background:var(--panel);font-size:13.5px}
th,td{border:1px solid var(--line);padding:4px 7px;text-align:left;vertical-align:top}
th{background:#eef0f4;font-weight:600}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums}
table.wide{width:100%}
.kv{margin:4px 0}
.kv th{width:210px}
.charts{display:grid;grid-template-columns:repeat(auto-fit,minmax(560px,1fr));gap:16px;align-items:start}
figure{margin:0;background:var(--panel);border:1px solid var(--line);padding:10px 12px}
figcaption{font-weight:600;margin-bottom:4px}
figure svg{display:block;max-width:100%;height:auto}
svg text{font-family:inherit}
.badge{display:inline-block;padding:0 7px;border-radius:9px;font-size:12px;font-weight:600;color:#fff;
white-space:nowrap}
.s-ok{background:#2f8f83}.s-failed{background:#b8442f}.s-dropped{background:#b07d12}.s-skipped{background:#6f7a8d}
.s-none{background:#9aa1ad}
.muted{color:var(--muted)}
.small{font-size:12.5px}
.path{font-family:ui-monospace,"DejaVu Sans Mono",Menlo,monospace;font-size:13px;word-break:break-all}
section.doc{background:var(--panel);border:1px solid var(--line);border-top:4px solid #24324a;margin:22px 0;
padding:4px 16px 14px}
section.doc.st-failed{border-top-color:#b8442f}
section.doc.st-dropped{border-top-color:#d39b2a}
section.doc h3.doctitle{font-size:17px;margin:10px 0 2px}
section.doc h3.doctitle .path{font-size:16px}
section.doc p{margin:3px 0}
h4.pagehead{font-size:13.5px;margin:2px 0 3px}
.page{border-top:1px dashed var(--line);padding:6px 0 4px}
.unitline{margin:3px 0}
.reason{color:#8a2b18}
.warn{color:#7a5600}
.facts{color:var(--muted);font-size:12.5px}
.facts code{color:#333}
details{margin:4px 0}
details>summary{cursor:pointer;color:var(--accent)}
.sbs{display:grid;grid-template-columns:1fr 1fr;gap:10px;margin-top:6px}
.sbs.one{grid-template-columns:1fr}
.pane h4{margin:0 0 3px;font-size:13px;color:var(--muted);font-weight:600}
pre.text{margin:0;white-space:pre-wrap;word-wrap:break-word;overflow-wrap:anywhere;background:#f6f6f2;
border:1px solid var(--line);padding:8px;font:12.5px/1.45 ui-monospace,"DejaVu Sans Mono",Menlo,monospace;
max-height:560px;overflow:auto}
del.rm{background:var(--del-bg);color:var(--del-ink);text-decoration:line-through;text-decoration-thickness:1px}
ins.add{background:var(--ins-bg);color:var(--ins-ink);text-decoration:underline dotted}
.cp{font-size:10px;border:1px solid currentColor;border-radius:3px;padding:0 2px;margin:0 1px}
.legend span{margin-right:12px}
ol.chunks{list-style:none;padding:0;margin:6px 0}
ol.chunks li{border:1px solid var(--line);border-left:4px solid #2f8f83;padding:5px 9px;margin:6px 0;background:#fff}
ol.chunks li.st-dropped{border-left-color:#d39b2a;background:#fdf8ec}
ol.chunks li.st-failed{border-left-color:#b8442f;background:#fcf1ee}
ol.chunks li:target{outline:3px solid #f0b73a}
section.doc:target{outline:3px solid #f0b73a}
.heading{font-weight:600}
.toplink{float:right;font-size:12.5px}
footer{max-width:1240px;margin:0 auto;padding:0 24px 30px;color:var(--muted);font-size:12.5px}
@media (max-width:800px){.sbs{grid-template-columns:1fr}.charts{grid-template-columns:1fr}}
@media print{details{display:block}pre.text{max-height:none}}
"""


def esc(value: object) -> str:
    """Text (or an attribute value) made inert: &, <, >, " and ' are escaped."""
    return html.escape("" if value is None else str(value), quote=True)


def _int(n: object) -> str:
    return f"{n:,}" if isinstance(n, int) else esc(n if n is not None else "-")


def _when(iso: str | None) -> str:
    if not iso:
        return "-"
    try:
        t = datetime.fromisoformat(iso)
    except ValueError:
        return esc(iso)
    return esc(t.strftime("%Y-%m-%d %H:%M:%S %Z").strip())


def _seconds(s: object) -> str:
    if not isinstance(s, (int, float)):
        return "-"
    if s < 60:
        return f"{s:.1f} s"
    m, sec = divmod(int(round(s)), 60)
    return f"{m} min {sec:02d} s" if m < 60 else f"{m // 60} h {m % 60:02d} min"


def _badge(status: str | None) -> str:
    s = status or "none"
    cls = s if s in STATUS_COLOUR else "none"
    return f'<span class="badge s-{cls}">{esc(s)}</span>'


def _status_counts(counts: dict[str, int]) -> str:
    keys = [s for s in STATUS_ORDER if counts.get(s)] + sorted(k for k in counts if k not in STATUS_ORDER)
    return ", ".join(f"{counts[k]:,} {esc(k)}" for k in keys) or "none"


def _short(text: str, n: int) -> str:
    """Shorten from the middle, keeping the file name at the end of a path visible."""
    if len(text) <= n:
        return text
    keep = n - 1
    head = keep // 3
    return text[:head] + "…" + text[-(keep - head):]


# --------------------------------------------------------------------------- text differences

_TOKEN = re.compile(r"\w+|\s+|[^\w\s]", re.UNICODE)
_INVISIBLE = {"Cc", "Cf", "Co", "Cn", "Zl", "Zp", "Zs"}


def _show_changed(text: str) -> str:
    """Escaped text of a removed or inserted span, with invisible characters made visible."""
    out = []
    for ch in text:
        if ch == "\n":
            out.append('<span class="cp" title="line break">↵</span>\n')
        elif ch == " ":
            out.append(" ")
        elif ch == "\t":
            out.append('<span class="cp" title="tab">⇥</span>\t')
        elif unicodedata.category(ch) in _INVISIBLE:
            out.append(f'<span class="cp">U+{ord(ch):04X}</span>')
        else:
            out.append(esc(ch))
    return "".join(out)


def _word_ops(a: str, b: str) -> list[tuple[str, str, str]]:
    ta, tb = _TOKEN.findall(a), _TOKEN.findall(b)
    if len(ta) > MAX_WORD_DIFF_TOKENS or len(tb) > MAX_WORD_DIFF_TOKENS:
        return [("replace", a, b)]
    sm = difflib.SequenceMatcher(None, ta, tb, autojunk=False)
    return [(op, "".join(ta[i1:i2]), "".join(tb[j1:j2])) for op, i1, i2, j1, j2 in sm.get_opcodes()]


def diff_segments(a: str, b: str) -> list[tuple[str, str, str]]:
    """(op, text in a, text in b) with op equal | delete | insert | replace.

    Lines first (fast, and most lines of a page are unchanged), then words inside each
    changed block of lines, so a changed character does not mark a whole line.
    """
    if a == b:
        return [("equal", a, b)]
    la, lb = a.splitlines(keepends=True), b.splitlines(keepends=True)
    sm = difflib.SequenceMatcher(None, la, lb, autojunk=len(la) + len(lb) > 20_000)
    out: list[tuple[str, str, str]] = []
    for op, i1, i2, j1, j2 in sm.get_opcodes():
        sa, sb = "".join(la[i1:i2]), "".join(lb[j1:j2])
        if op == "replace":
            out.extend(_word_ops(sa, sb))
        else:
            out.append((op, sa, sb))
    merged: list[tuple[str, str, str]] = []
    for seg in (piece for seg in out for piece in _trim(seg)):
        if seg[1] == "" and seg[2] == "":
            continue
        if merged and merged[-1][0] == seg[0] == "equal":
            merged[-1] = ("equal", merged[-1][1] + seg[1], merged[-1][2] + seg[2])
        else:
            merged.append(seg)
    return merged


def _trim(seg: tuple[str, str, str]) -> list[tuple[str, str, str]]:
    """Split what both sides of a replaced span share at its ends off as unchanged text."""
    op, a, b = seg
    if op != "replace":
        return [seg]
    p = 0
    while p < min(len(a), len(b)) and a[p] == b[p]:
        p += 1
    q = 0
    while q < min(len(a), len(b)) - p and a[len(a) - 1 - q] == b[len(b) - 1 - q]:
        q += 1
    mid_a, mid_b = a[p:len(a) - q], b[p:len(b) - q]
    kind = "replace" if mid_a and mid_b else ("delete" if mid_a else "insert")
    out = [("equal", a[:p], b[:p])] if p else []
    out.append((kind, mid_a, mid_b))
    if q:
        out.append(("equal", a[len(a) - q:], b[len(b) - q:]))
    return out


class _Pane:
    """Builds one side of a comparison, stopping after MAX_PANE_CHARS characters."""

    def __init__(self, limit: int = MAX_PANE_CHARS):
        self.parts: list[str] = []
        self.shown = 0
        self.hidden = 0
        self.limit = limit

    def add(self, text: str, mark: str | None = None) -> None:
        if not text:
            return
        room = self.limit - self.shown
        if room <= 0:
            self.hidden += len(text)
            return
        piece, rest = text[:room], text[room:]
        self.shown += len(piece)
        self.hidden += len(rest)
        if mark == "del":
            self.parts.append(f'<del class="rm">{_show_changed(piece)}</del>')
        elif mark == "ins":
            self.parts.append(f'<ins class="add">{_show_changed(piece)}</ins>')
        else:
            self.parts.append(esc(piece))

    def html(self) -> str:
        more = (f'\n<span class="muted">[… {self.hidden:,} more characters not shown here; '
                f'thresher trail --text prints them all]</span>') if self.hidden else ""
        return f'<pre class="text">{"".join(self.parts)}{more}</pre>'


def render_comparison(before: str, after: str, before_label: str, after_label: str) -> tuple[str, int, int]:
    """Side-by-side panes: removed text marked on the left, inserted text on the right.

    Returns the HTML and the number of characters removed and inserted.
    """
    left, right = _Pane(), _Pane()
    removed = inserted = 0
    for op, sa, sb in diff_segments(before, after):
        if op == "equal":
            left.add(sa)
            right.add(sb)
        else:
            left.add(sa, "del")
            right.add(sb, "ins")
            removed += len(sa)
            inserted += len(sb)
    body = (f'<div class="sbs"><div class="pane"><h4>{esc(before_label)}</h4>{left.html()}</div>'
            f'<div class="pane"><h4>{esc(after_label)}</h4>{right.html()}</div></div>')
    return body, removed, inserted


def render_text(text: str) -> str:
    pane = _Pane()
    pane.add(text)
    return pane.html()


# --------------------------------------------------------------------------- charts (inline SVG)

class _Svg:
    """A small SVG builder; every text node and attribute value is escaped."""

    def __init__(self, width: int, height: int, title: str, desc: str, key: str):
        self.w, self.h = width, height
        self.key = key
        self.items: list[str] = []
        self.title, self.desc = title, desc

    def rect(self, x: float, y: float, w: float, h: float, fill: str, tip: str | None = None) -> None:
        inner = f"<title>{esc(tip)}</title>" if tip else ""
        self.items.append(f'<rect x="{x:.1f}" y="{y:.1f}" width="{max(w, 0):.1f}" height="{h:.1f}" '
                          f'fill="{esc(fill)}">{inner}</rect>')

    def text(self, x: float, y: float, s: str, anchor: str = "start", size: int = 13,
             weight: str = "normal", tip: str | None = None, fill: str | None = None) -> None:
        inner = f"<title>{esc(tip)}</title>" if tip else ""
        fill_attr = f' fill="{esc(fill or "#2b3140")}"'
        self.items.append(f'<text x="{x:.1f}" y="{y:.1f}" text-anchor="{anchor}" font-size="{size}" '
                          f'font-weight="{weight}"{fill_attr}>{inner}{esc(s)}</text>')

    def line(self, x1: float, y1: float, x2: float, y2: float, stroke: str = "#9aa1ad", dash: str = "") -> None:
        d = f' stroke-dasharray="{dash}"' if dash else ""
        self.items.append(f'<line x1="{x1:.1f}" y1="{y1:.1f}" x2="{x2:.1f}" y2="{y2:.1f}" stroke="{stroke}"{d}/>')

    def html(self) -> str:
        tid, did = f"{self.key}-title", f"{self.key}-desc"
        return (f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {self.w} {self.h}" width="{self.w}" '
                f'height="{self.h}" role="img" aria-labelledby="{tid} {did}">'
                f'<title id="{tid}">{esc(self.title)}</title><desc id="{did}">{esc(self.desc)}</desc>'
                + "".join(self.items) + "</svg>")


def _nice_step(span: float, parts: int) -> float:
    raw = max(span / max(parts, 1), 1e-9)
    mag = 10 ** math.floor(math.log10(raw))
    for m in (1, 2, 2.5, 5, 10):
        if m * mag >= raw:
            return m * mag
    return 10 * mag


def _figure(key: str, caption: str, svg: str, table: str, note: str = "") -> str:
    note_html = f'<p class="small muted">{esc(note)}</p>' if note else ""
    return (f'<figure id="{key}" class="chart"><figcaption>{esc(caption)}</figcaption>{svg}{note_html}'
            f'<details><summary>the numbers</summary>{table}</details></figure>')


def _table(head: list[str], rows: Iterable[list[str]], numeric: frozenset[int] | set[int] = frozenset()) -> str:
    num = ' class="n"'
    th = "".join(f"<th{num if i in numeric else ''}>{h}</th>" for i, h in enumerate(head))
    body = "".join("<tr>" + "".join(f"<td{num if i in numeric else ''}>{c}</td>" for i, c in enumerate(r))
                   + "</tr>" for r in rows)
    return f"<table><thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>"


def _legend(svg: _Svg, x: float, y: float, keys: list[str]) -> None:
    for k in keys:
        svg.rect(x, y - 9, 11, 11, STATUS_COLOUR.get(k, OTHER_COLOUR))
        svg.text(x + 15, y, k)
        x += 22 + 8 * len(k) + 10


def chart_status(data: ReportData) -> str:
    stages = data.stages
    keys = [s for s in STATUS_ORDER if any(st.counts.get(s) for st in stages)]
    keys += sorted({k for st in stages for k in st.counts} - set(STATUS_ORDER))
    label_w, bar_w, row_h = 96, 420, 28
    top = 30
    height = top + row_h * max(len(stages), 1) + 10
    peak = max((st.total for st in stages), default=0) or 1
    desc = "; ".join(f"{st.name} ({st.unit}): {st.total} in all, "
                     + ", ".join(f"{st.counts.get(k, 0)} {k}" for k in keys) for st in stages) or "no stages"
    svg = _Svg(label_w + bar_w + 150, height, "Units by status at each stage",
               "Stacked bars, one per stage in chain order. " + desc, "chart-status")
    _legend(svg, label_w, 16, keys or ["ok"])
    for i, st in enumerate(stages):
        y = top + i * row_h
        svg.text(label_w - 8, y + 17, st.name, anchor="end", weight="bold")
        x = float(label_w)
        for k in keys:
            n = st.counts.get(k, 0)
            if not n:
                continue
            w = bar_w * n / peak
            svg.rect(x, y + 4, w, row_h - 9, STATUS_COLOUR.get(k, OTHER_COLOUR), f"{st.name}: {n} {k}")
            if w > 26:
                svg.text(x + w / 2, y + 18, f"{n}", anchor="middle", size=12, fill="#ffffff")
            x += w
        svg.text(x + 6, y + 18, f"{st.total:,} {st.unit}", size=12)
    rows = [[esc(st.name), esc(st.unit)] + [f"{st.counts.get(k, 0):,}" for k in keys] + [f"{st.total:,}"]
            for st in stages]
    table = _table(["stage", "unit"] + [esc(k) for k in keys] + ["total"], rows,
                   numeric=set(range(2, 3 + len(keys))))
    return _figure("chart-status", "Status by stage", svg.html(), table,
                   "Current view of the live documents: for each unit, its latest attempt.")


def chart_tokens(data: ReportData) -> str:
    docs = sorted((d for d in data.documents if d.tokens), key=lambda d: (-d.tokens, d.path))
    shown = docs[:MAX_DOC_BARS]
    label_w, bar_w, row_h = 280, 280, 19
    height = 12 + row_h * max(len(shown), 1) + 8
    peak = max((d.tokens for d in shown), default=1)
    desc = "; ".join(f"{d.path}: {d.tokens} tokens" for d in shown) or "no document has live chunks"
    svg = _Svg(label_w + bar_w + 90, height, "Tokens per document (live chunks)",
               "Horizontal bars, largest first. " + desc, "chart-tokens")
    for i, d in enumerate(shown):
        y = 8 + i * row_h
        svg.text(label_w - 6, y + 13, _short(d.path, 38), anchor="end", size=12, tip=d.path)
        w = bar_w * d.tokens / peak
        svg.rect(label_w, y + 3, w, row_h - 6, BAR_COLOUR, f"{d.path}: {d.tokens:,} tokens")
        svg.text(label_w + w + 5, y + 13, f"{d.tokens:,}", size=12)
    if not shown:
        svg.text(10, 22, "No document has live chunks.")
    rest = docs[MAX_DOC_BARS:]
    empty = [d for d in data.documents if not d.tokens]
    notes = []
    if rest:
        notes.append(f"{len(rest):,} smaller documents ({sum(d.tokens for d in rest):,} tokens) are not drawn.")
    if empty:
        notes.append(f"{_plural(len(empty), 'document has', 'documents have')} no live chunks.")
    notes.append("The documents table lists every document.")
    rows = [[f'<a href="#{esc(d.anchor)}" class="path">{esc(d.path)}</a>', f"{d.tokens:,}", f"{len(d.live_chunks):,}"]
            for d in shown]
    return _figure("chart-tokens", "Tokens per document", svg.html(),
                   _table(["document", "tokens", "live chunks"], rows, {1, 2}), " ".join(notes))


def chart_languages(data: ReportData) -> str:
    chunks = Counter()
    tokens = Counter()
    docs = Counter()
    for d in data.documents:
        langs = set()
        for c in d.live_chunks:
            lang = c.language or "unknown"
            chunks[lang] += 1
            tokens[lang] += c.tokens or 0
            langs.add(lang)
        for lang in langs:
            docs[lang] += 1
    order = sorted(chunks, key=lambda k: (-chunks[k], k))
    label_w, bar_w, row_h = 90, 300, 26
    height = 10 + row_h * max(len(order), 1) + 8
    total = sum(chunks.values()) or 1
    peak = max(chunks.values(), default=1)
    desc = "; ".join(f"{k}: {chunks[k]} chunks, {tokens[k]} tokens, in {docs[k]} documents" for k in order) \
        or "no live chunks"
    svg = _Svg(label_w + bar_w + 250, height, "Language of the live chunks",
               "Horizontal bars of chunks per detected language (ISO 639-1 codes). " + desc, "chart-languages")
    palette = ["#3f6fb5", "#2f8f83", "#c0672b", "#7b5ea7", "#9a8a2e", "#4d8fb8", "#a0506e", "#5b7a3a"]
    for i, k in enumerate(order):
        y = 6 + i * row_h
        svg.text(label_w - 8, y + 17, k, anchor="end", weight="bold")
        w = bar_w * chunks[k] / peak
        colour = "#9aa1ad" if k == "unknown" else palette[i % len(palette)]
        svg.rect(label_w, y + 4, w, row_h - 9, colour, f"{k}: {chunks[k]} chunks")
        svg.text(label_w + w + 6, y + 18, f"{chunks[k]:,} chunks ({100 * chunks[k] / total:.0f}%), "
                                          f"{tokens[k]:,} tokens", size=12)
    if not order:
        svg.text(10, 22, "No live chunks.")
    rows = [[esc(k), f"{chunks[k]:,}", f"{tokens[k]:,}", f"{docs[k]:,}"] for k in order]
    return _figure("chart-languages", "Language mix", svg.html(),
                   _table(["language", "chunks", "tokens", "documents"], rows, {1, 2, 3}),
                   "A chunk takes the language most of its text is in; short or unsure text is 'unknown'.")


def chart_chunk_sizes(data: ReportData) -> str:
    sizes = [c.tokens for c in data.live_chunks if c.tokens is not None]
    budget = data.budget_tokens
    upper = max(sizes + ([budget] if budget else []) + [1])
    step = _nice_step(upper, 12)
    step = max(1, int(math.ceil(step)))
    nbins = max(1, int(math.ceil((max(sizes, default=0) + 1) / step)))
    if budget:
        nbins = max(nbins, int(math.ceil(budget / step)))
    bins = [0] * nbins
    for s in sizes:
        bins[min(s // step, nbins - 1)] += 1
    left, plot_w, plot_h, top = 46, 520, 170, 14
    bar = plot_w / nbins
    peak = max(bins, default=0) or 1
    ystep = max(1, int(_nice_step(peak, 4)))
    ymax = int(math.ceil(peak / ystep) * ystep)
    desc = "; ".join(f"{i * step}-{(i + 1) * step - 1} tokens: {n} chunks" for i, n in enumerate(bins))
    svg = _Svg(left + plot_w + 30, top + plot_h + 46, "Chunk sizes in tokens",
               f"Histogram of tokens per live chunk, bins of {step} tokens. {desc}", "chart-chunk-sizes")
    for t in range(0, ymax + 1, ystep):
        y = top + plot_h - plot_h * t / ymax
        svg.line(left, y, left + plot_w, y, "#e3e6ec")
        svg.text(left - 6, y + 4, f"{t}", anchor="end", size=11)
    for i, n in enumerate(bins):
        h = plot_h * n / ymax
        x = left + i * bar
        svg.rect(x + 1, top + plot_h - h, bar - 2, h, BAR_COLOUR,
                 f"{i * step}-{(i + 1) * step - 1} tokens: {n} chunks")
        if n and bar > 18:
            svg.text(x + bar / 2, top + plot_h - h - 3, f"{n}", anchor="middle", size=11)
    svg.line(left, top + plot_h, left + plot_w, top + plot_h, "#5b6373")
    every = max(1, int(math.ceil(nbins / 12)))
    for i in range(0, nbins + 1, every):
        x = left + i * bar
        svg.line(x, top + plot_h, x, top + plot_h + 4, "#5b6373")
        svg.text(x, top + plot_h + 16, f"{i * step}", anchor="middle", size=11)
    svg.text(left + plot_w / 2, top + plot_h + 36, "tokens per chunk", anchor="middle", size=12)
    if budget:
        x = left + plot_w * budget / (nbins * step)
        svg.line(x, top - 4, x, top + plot_h, "#b8442f", "5 3")
        svg.text(x - 4, top + 8, f"split budget {budget}", anchor="end", size=11, fill="#b8442f")
    rows = [[f"{i * step}–{(i + 1) * step - 1}", f"{n:,}"] for i, n in enumerate(bins)]
    mean = sum(sizes) / len(sizes) if sizes else 0
    ordered = sorted(sizes)
    median = ordered[len(ordered) // 2] if ordered else 0
    note = (f"{len(sizes):,} live chunks; median {median}, mean {mean:.0f}, largest {max(sizes, default=0)} tokens."
            if sizes else "No live chunks.")
    return _figure("chart-chunk-sizes", "Chunk-size histogram", svg.html(),
                   _table(["tokens", "chunks"], rows, {1}), note)


# --------------------------------------------------------------------------- sections

def _summary(data: ReportData) -> str:
    m = data.manifest
    d = m.get("documents") or {}
    ch = m.get("changes") or {}
    live = len(data.documents)
    failed_docs = sum(1 for doc in data.documents if doc.status == "failed")
    cards = [
        (_int(d.get("files")), "files seen"),
        (_int(d.get("distinct", live)), "distinct documents"),
        (_int(d.get("processed")), "processed this run"),
        (_int(d.get("unchanged")), "unchanged (reused)"),
        (_int(d.get("removed")), "removed"),
        (_int(m.get("pages")), "page units"),
        (_int(m.get("chunks")), "chunks handed off"),
        (_int(m.get("tokens")), "tokens"),
        (_int(ch.get("upsert")), "chunks to upsert"),
        (_int(ch.get("delete")), "chunks to delete"),
        (_int(failed_docs), "documents with a failure"),
    ]
    card_html = "".join(f'<div class="card"><b>{v}</b><span>{esc(label)}</span></div>' for v, label in cards)
    rows = [
        ("run", f'<span class="path">{esc(data.run.run_id)}</span> ({esc(m.get("kind", "run"))}, '
                f'run {data.run.sequence} of this store)'),
        ("started", _when(m.get("started_at"))),
        ("finished", _when(m.get("finished_at"))),
        ("took", _seconds(m.get("seconds"))),
        ("source folder", f'<span class="path">{esc(m.get("source_root", "-"))}</span>'),
        ("store", f'<span class="path">{esc(m.get("store_root", data.store_root))}</span>'),
        ("flow definition", f'{esc(m.get("definition", {}).get("name", ""))} from '
                            f'{esc(m.get("definition_origin", "-"))}, chain digest '
                            f'<span class="path">{esc(m.get("chain_digest", "-"))}</span>'),
        ("chain", " → ".join(esc(s.name) for s in data.stages) or "-"),
    ]
    copies = d.get("copies") or {}
    if copies:
        rows.append(("same bytes at several paths", f"{_plural(len(copies), 'document')} (noted in the table)"))
    if m.get("failures"):
        rows.append(("units failed this run", _int(m.get("failures"))))
    if not data.is_latest:
        rows.append(("note", "This is an older run: the documents below are as that run left the store."))
    versions = m.get("versions") or {}
    rows.append(("versions", " · ".join(f'{esc(k)} <span class="path">{esc(v)}</span>'
                                        for k, v in sorted(versions.items())) or "-"))
    kv = "".join(f"<tr><th>{esc(k)}</th><td>{v}</td></tr>" for k, v in rows)
    steps = m.get("definition", {}).get("steps") or []
    srows = [[esc(s.get("name")), esc(s.get("version")), esc(s.get("unit")), esc(s.get("scope")),
              esc(", ".join(s.get("formats") or []) or "all"),
              f'<span class="path small">{esc(_params(s.get("params") or {}))}</span>'] for s in steps]
    timings = m.get("timings") or {}
    trows = [[esc(k), _seconds(v)] for k, v in timings.items()]
    problems = m.get("scan_problems") or []
    prob_html = ""
    if problems:
        prob_html = ("<h3>Files that could not be read while scanning</h3>"
                     + _table(["path", "reason"], [[f'<span class="path">{esc(p.get("source_path"))}</span>',
                                                    esc(p.get("reason"))] for p in problems]))
    return (f'<section id="summary"><h2>Run summary</h2><div class="cards">{card_html}</div>'
            f'<table class="kv wide">{kv}</table>{prob_html}'
            f'<details><summary>steps and their parameters</summary>'
            f'{_table(["stage", "version", "unit", "scope", "formats", "parameters"], srows)}</details>'
            f'<details><summary>time per segment</summary>{_table(["segment", "time"], trows, {1})}</details>'
            '</section>')


def _plural(n: int, one: str, many: str | None = None) -> str:
    return f"{n:,} {one if n == 1 else (many or one + 's')}"


def _params(params: dict) -> str:
    return ", ".join(f"{k}={v}" for k, v in params.items()) or "defaults"


def _problems(data: ReportData) -> str:
    groups: dict[tuple[str, str, str], list[DocumentView]] = {}
    for doc in data.documents:
        found = [(u, _reason_kind(u, None)) for p in doc.pages for u in p.stages if u.status != "ok"]
        found += [(u, _reason_kind(u, c)) for c in doc.chunks for u in c.stages if u.status != "ok"]
        for u, kind in found:
            members = groups.setdefault((u.status, u.stage, kind), [])
            if doc not in members:
                members.append(doc)
    if not groups:
        return ('<section id="problems"><h2>Problems by reason</h2><p>No unit of a live document failed, '
                'was dropped or was skipped.</p></section>')
    rank = {s: i for i, s in enumerate(SEVERITY)}
    stage_pos = {s.name: i for i, s in enumerate(data.stages)}
    items = []
    for (status, stage, reason), docs in sorted(
            groups.items(), key=lambda kv: (rank.get(kv[0][0], 9), stage_pos.get(kv[0][1], 99), -len(kv[1]), kv[0][2])):
        links = ", ".join(f'<a href="#{esc(d.anchor)}" class="path">{esc(d.path)}</a>' for d in docs[:12])
        more = f" and {len(docs) - 12:,} more" if len(docs) > 12 else ""
        items.append(f"<tr><td>{_badge(status)}</td><td>{esc(stage)}</td><td>{esc(reason)}</td>"
                     f'<td class="n">{len(docs):,}</td><td>{links}{more}</td></tr>')
    return ('<section id="problems"><h2>Problems by reason</h2>'
            '<p class="small muted">Every failed, dropped or skipped unit of the live documents, grouped by '
            'stage and reason; each document section has the details.</p>'
            '<table class="wide"><thead><tr><th>status</th><th>stage</th><th>reason</th><th class="n">documents</th>'
            f'<th>where</th></tr></thead><tbody>{"".join(items)}</tbody></table></section>')


_ID_LIKE = re.compile(r"\b[0-9a-f]{12,}\b")
_DUPLICATE_KIND = {"exact": "exact duplicate of a chunk kept elsewhere",
                   "near": "near-duplicate of a chunk kept elsewhere",
                   "document": "copy of another document: every chunk is kept there"}


_DUPLICATE_WORDS = {"exact": "exact duplicate of", "near": "near-duplicate of",
                    "document": "the whole document is a copy; this chunk is kept as"}


def _reason_kind(unit: UnitAtStage, chunk: ChunkView | None) -> str:
    """What a unit's reason says, without the ids and paths that make each one unique."""
    if chunk is not None and unit.status == "dropped" and chunk.duplicate_of:
        kind = chunk.duplicate_kind or ""
        return _DUPLICATE_KIND.get(kind, f"{kind} duplicate".strip())
    return _ID_LIKE.sub("…", unit.reason or unit.error_type or unit.status)


def _documents_table(data: ReportData) -> str:
    rows = []
    for doc in data.documents:
        copies = ""
        if doc.other_paths:
            copies = ('<div class="small muted">same bytes also at: '
                      + ", ".join(f'<span class="path">{esc(p)}</span>' for p in doc.other_paths) + "</div>")
        fmt = doc.format or _suffix(doc.path)
        dropped = sum(1 for c in doc.chunks if c.status == "dropped")
        chunk_cell = f"{len(doc.live_chunks):,}" + (f' <span class="muted small">+{dropped} dropped</span>'
                                                    if dropped else "")
        rows.append(
            f'<tr id="row-{esc(doc.doc_id)}" class="docrow st-{esc(doc.status)}">'
            f'<td><a href="#{esc(doc.anchor)}" class="path">{esc(doc.path)}</a>{copies}</td>'
            f'<td>{esc(fmt)}</td><td class="n">{doc.page_count:,}</td><td class="n">{chunk_cell}</td>'
            f'<td class="n">{doc.tokens:,}</td><td>{esc(doc.language or "-")}</td><td>{_badge(doc.status)}</td>'
            f'<td class="small">{esc(doc.first_problem)}</td></tr>')
    return ('<section id="documents"><h2>Documents</h2>'
            f'<p class="small muted">{len(data.documents):,} live documents, worst status first, then by path. '
            'Chunks and tokens count live chunks (those in the hand-off). '
            'The status is the worst of any unit of the document at any stage.</p>'
            '<table class="wide" id="documents-table"><thead><tr><th>path</th><th>format</th><th class="n">pages</th>'
            '<th class="n">chunks</th><th class="n">tokens</th><th>language</th><th>status</th>'
            f'<th>first problem</th></tr></thead><tbody>{"".join(rows)}</tbody></table></section>')


def _suffix(path: str) -> str:
    name = path.rsplit("/", 1)[-1]
    return name.rsplit(".", 1)[-1].lower() if "." in name else ""


def _unit_line(u: UnitAtStage) -> str:
    parts = [f'<div class="unitline">{_badge(u.status)} <b>{esc(u.stage)}</b>']
    if u.reason:
        parts.append(f' <span class="reason">{esc(u.reason)}</span>')
    if u.error_type:
        parts.append(f' <span class="muted small">({esc(u.error_type)})</span>')
    if u.attempt and u.attempt > 1:
        parts.append(f' <span class="muted small">attempt {u.attempt}</span>')
    if u.facts:
        parts.append(' <span class="facts">' + " · ".join(f"{esc(k)} <code>{esc(v)}</code>" for k, v in u.facts)
                     + "</span>")
    parts.append("</div>")
    for w in u.warnings:
        parts.append(f'<div class="warn small">warning: {esc(w)}</div>')
    if u.traceback:
        parts.append(f'<details><summary>traceback</summary>{render_text(u.traceback)}</details>')
    return "".join(parts)


def _page_html(doc: DocumentView, page: PageView) -> str:
    first, last, changed = page.texts()
    lang = ""
    if page.language:
        prob = f" {page.language_prob:.2f}" if page.language_prob is not None else ""
        lang = f' <span class="muted small">language {esc(page.language)}{esc(prob)}</span>'
    head = f'<h4 class="pagehead">{esc(page.label)} {_badge(page.status)}{lang}</h4>'
    lines = "".join(_unit_line(u) for u in page.stages)
    text_html = ""
    if first is not None and last is not None:
        if first is last or first.text == last.text:
            stages = ", ".join(u.stage for u in page.stages if u.text is not None)
            summary = f"text ({len(first.text or ''):,} characters; unchanged through {esc(stages)})"
            text_html = f"<details><summary>{summary}</summary>{render_text(first.text or '')}</details>"
        else:
            body, removed, inserted = render_comparison(
                first.text or "", last.text or "", f"as extracted ({first.stage})",
                f"after {', '.join(changed)}")
            summary = (f"text side by side: {removed:,} characters removed, {inserted:,} inserted "
                       f"by {esc(', '.join(changed))}")
            text_html = f'<details class="cmp"><summary>{summary}</summary>{body}</details>'
    page_id = f"p-{doc.doc_id}-{page.locator.replace('/', '-')}"
    return f'<div class="page" id="{esc(page_id)}">{head}{lines}{text_html}</div>'


def _chunk_html(chunk: ChunkView, owners: dict[str, tuple[DocumentView, ChunkView]]) -> str:
    heading = " › ".join(chunk.heading_path) or "(no heading)"
    bits = [f"#{chunk.index}", esc(chunk.pages)] if chunk.pages else [f"#{chunk.index}"]
    tokens = f"{chunk.tokens:,} tokens" if chunk.tokens is not None else "tokens not counted"
    bits.append(tokens)
    if chunk.language:
        bits.append(esc(chunk.language))
    bits.append(f'id <span class="path">{esc(chunk.chunk_id)}</span>')
    line = (f'<div>{_badge(chunk.status)} <span class="heading">{esc(heading)}</span> '
            f'<span class="muted small">{" · ".join(bits)}</span></div>')
    extra = ""
    if chunk.duplicate_of:
        target = owners.get(chunk.duplicate_of)
        sim = f", similarity {chunk.similarity:.2f}" if chunk.similarity is not None else ""
        kind = chunk.duplicate_kind or ""
        words = _DUPLICATE_WORDS.get(kind, f"{kind} duplicate of".strip())
        if target is not None:
            tdoc, tchunk = target
            extra = (f'<div class="small">{esc(words)} <a class="duplink" href="#c-{esc(tchunk.chunk_id)}">'
                     f'chunk #{tchunk.index} of <span class="path">{esc(tdoc.path)}</span></a>{esc(sim)}</div>')
        else:
            extra = (f'<div class="small">{esc(words)} chunk <span class="path">{esc(chunk.duplicate_of)}'
                     f'</span>{esc(sim)} (not among the live documents of this report)</div>')
    problems = "".join(_unit_line(u) for u in chunk.stages if u.status != "ok" or u.warnings)
    text = f"<details><summary>text ({len(chunk.text):,} characters)</summary>{render_text(chunk.text)}</details>"
    return f'<li id="c-{esc(chunk.chunk_id)}" class="st-{esc(chunk.status)}">{line}{extra}{problems}{text}</li>'


def _document_html(doc: DocumentView, data: ReportData, owners) -> str:
    meta = [f'doc_id <span class="path">{esc(doc.doc_id)}</span>']
    if doc.size is not None:
        meta.append(f"{doc.size:,} bytes")
    fmt = doc.format or _suffix(doc.path)
    if fmt:
        meta.append(esc(fmt))
    if doc.language:
        meta.append(f"language {esc(doc.language)}")
    if doc.first_run:
        meta.append(f"first seen in run {esc(doc.first_run)}")
    copies = ""
    if doc.other_paths:
        copies = ('<p class="small">The same bytes are also at '
                  + ", ".join(f'<span class="path">{esc(p)}</span>' for p in doc.other_paths)
                  + "; this path stands for all of them.</p>")
    title = f'<p class="small">title: {esc(doc.title)}</p>' if doc.title else ""
    stage_line = "; ".join(f"{esc(s.name)} {_status_counts(doc.by_stage[s.name])}"
                           for s in data.stages if s.name in doc.by_stage)
    passed = (f'<p class="small muted">passed by (not for this format): {esc(", ".join(doc.passed_by))}</p>'
              if doc.passed_by else "")
    pages = "".join(_page_html(doc, p) for p in doc.pages) or '<p class="muted">No page units.</p>'
    if doc.chunks:
        chunks = f'<ol class="chunks">{"".join(_chunk_html(c, owners) for c in doc.chunks)}</ol>'
    else:
        chunks = '<p class="muted">No chunks: nothing of this document reached a chunk stage.</p>'
    return (f'<section class="doc st-{esc(doc.status)}" id="{esc(doc.anchor)}">'
            f'<a class="toplink" href="#row-{esc(doc.doc_id)}">back to the table</a>'
            f'<h3 class="doctitle"><span class="path">{esc(doc.path)}</span> {_badge(doc.status)}</h3>'
            f'<p class="small muted">{" · ".join(meta)}</p>{title}{copies}'
            f'<p class="small">units by stage: {stage_line or "none"}</p>{passed}'
            f'<h4>Pages</h4>{pages}<h4>Chunks ({len(doc.live_chunks):,} live of {len(doc.chunks):,})</h4>{chunks}'
            "</section>")


def _csp(style: str) -> str:
    # Only the one style block may apply; no script, no request of any kind.
    digest = base64.b64encode(hashlib.sha256(style.encode("utf-8")).digest()).decode()
    return (f"default-src 'none'; script-src 'none'; style-src 'sha256-{digest}'; img-src 'none'; "
            "font-src 'none'; connect-src 'none'; media-src 'none'; object-src 'none'; frame-src 'none'; "
            "base-uri 'none'; form-action 'none'")


def render(data: ReportData) -> str:
    owners = data.chunk_owner()
    run_id = data.run.run_id
    legend = ('<p class="legend small">In the side-by-side text: <del class="rm">removed text</del> is struck '
              'through on the left, <ins class="add">inserted text</ins> is underlined on the right; '
              '<span class="cp">↵</span> marks a changed line break and <span class="cp">U+00AD</span> an '
              'invisible character by its code point.</p>')
    docs_html = "".join(_document_html(d, data, owners) for d in data.documents)
    generated = data.generated_at.strftime("%Y-%m-%d %H:%M %Z").strip()
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f'<meta http-equiv="Content-Security-Policy" content="{esc(_csp(CSS))}">'
        '<meta name="referrer" content="no-referrer">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>thresher review: run {esc(run_id)}</title><style>{CSS}</style></head><body>"
        f'<header class="top" id="top"><h1>thresher review of run {esc(run_id)}</h1>'
        f'<p>{esc(len(data.documents))} live documents · generated {esc(generated)} from the store at '
        f'{esc(data.store_root)}</p><nav class="jump"><a href="#summary">Summary</a><a href="#charts">Charts</a>'
        '<a href="#problems">Problems</a><a href="#documents">Documents</a><a href="#details">Each document</a>'
        "</nav></header><main>"
        + _summary(data)
        + '<section id="charts"><h2>Charts</h2><div class="charts">'
        + chart_status(data) + chart_tokens(data) + chart_languages(data) + chart_chunk_sizes(data)
        + "</div></section>"
        + _problems(data)
        + _documents_table(data)
        + f'<section id="details"><h2>Each document</h2>{legend}{docs_html}</section>'
        + "</main><footer>Written by thresher report. The page is a single file: no script, "
        "nothing fetched; document text is shown as text.</footer></body></html>\n"
    )
