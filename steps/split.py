"""Split a document's pages into chunks that follow its headings and fit a token budget.

How a document is cut:

* The document text is the pages' texts joined by units.BLOCK_SEP, so a chunk that
  runs over a page break reads "tail of start page" + "\\n\\n" + ... + "head of end
  page", and every chunk's span text is one slice of it. For a chunk on one page,
  `chunk.text == page.text[char_start:char_end]`.
* Sections: walking the blocks in order with a heading stack (a heading of level L
  closes every open heading of level >= L), a section is one heading block plus the
  content blocks under it; content before the first heading is a section with an
  empty heading path. The heading levels are what extraction found (PDF outline or
  font sizes, HTML ranks, Word heading styles, Markdown levels). The heading's own
  text opens the section's first chunk, so a chunk reads like the document;
  `heading_path` (heading texts, top down, including the section's own heading)
  gives every chunk its context, so later chunks of a long section do not repeat the
  heading (that would break the span slice above).
* A heading directly followed by another heading has no text of its own; it joins
  the next heading's section rather than becoming a chunk of one line: a title, then
  its first subsection; a site's banner heading, then the page's own; the first of two
  signatures of one function, each a heading. The section keeps the last heading's
  path. Chunks of a heading alone were 381 of 8,201 on a sweep of real HTML,
  Markdown and office files, a fifth of those of rustdoc pages (scratch sweep; the
  same-level and shallower cases, which this rule once left alone). The retrieval
  benchmark's figures moved with it; DEVELOPERS.md says why that is not the chunks.
* A section that fits the budget is one chunk. A longer one is cut at block
  boundaries, then at sentence boundaries, then (in a paragraph that keeps hard line
  breaks: plain text, lists) at line breaks, then at token boundaries (only where a
  token boundary is also a character boundary, checked by decoding); tables are cut
  between rows, code between lines. The pieces are packed greedily in order: a chunk
  takes as many pieces as fit, found from the pieces' token sums and confirmed by
  counting the chunk's text exactly (so a chunk may stop one piece short of the most
  that would fit when the sums misjudge by more than _ESTIMATE_SLACK tokens). Text
  with more than _CHARS_PER_TOKEN_LIMIT characters per budget token is taken not to
  fit without being counted whole. A heading is never left alone at the end of a
  chunk when the first block after it could be split to keep them together.
* Sentences end at ". ! ? ..." followed by whitespace, or at CJK full stops, except
  (common practice; the list is ours, from memory) where the next word starts with a
  lowercase letter ("etc. and"), or a single "." follows a single letter ("z. B.",
  "J. Smith", "p. 12") or an abbreviation in ABBREVIATIONS ("e.g.", "Dr.", "bzw.").
* A table that does not fit is cut between rows, and every piece after the first
  starts with the table's header row (the first row) and "\\n". That repeated header
  is not part of the span: `chunk.prefix_chars` says how many leading characters
  of `chunk.text` are such a prefix (0 otherwise), and
  `chunk.text[prefix_chars:]` is the span's slice.
* A chunk that would end on a sentence (or paragraph) ending in a colon, with more
  after it, ends before it instead, when it fits one chunk with what follows: it
  introduces that (a list, a command).
* Packing sections together: three switches, all off by default, because the
  retrieval benchmark (bench/retrieval.py: Debian's FAQ, developers' reference and
  policy manual; BM25 over the chunks, answers from the HTML editions) ranks one
  section per chunk, packed greedily, best. Measured side by side in one run
  (`python -m bench.retrieval --variant ...`, the variants listed in DEVELOPERS.md),
  top-1 answer-word share / top-3 answered share, FAQ, developers' reference, policy:

    all three off (the defaults)    0.818/0.891  0.734/0.893  0.559/0.701
    merge_below_tokens 100 (before) 0.686/0.844  0.702/0.855  0.582/0.692
    merge_below_tokens 30           0.817/0.891  0.720/0.879  0.552/0.687
    intro_below_tokens 30           0.818/0.891  0.739/0.893  0.560/0.706
    intro_below_tokens 400          0.804/0.859  0.717/0.869  0.564/0.706
    balance_tail_share 0.25         0.808/0.875  0.727/0.897  0.552/0.701

  A rule is on by default only when it raises the mean top-1 of the three manuals
  (each weighing the same) by at least 0.005, about three questions answered whole,
  without lowering the mean top-3; intro_below_tokens 30 gains 0.001 (top-3 +0.002),
  under that bar.
* Small sections merge (`merge_below_tokens`, 0 = off): walking the sections in order,
  a section that fits in one chunk joins the chunk before it when that chunk is a run
  of whole sections too, the section lies under the same parent as the run's first
  section (its heading path starts with the first section's parent path), at least
  one of the two holds fewer than `merge_below_tokens` tokens, and the joined span
  still fits `max_tokens`. The merged chunk's heading_path is the longest common
  prefix of its sections' paths (their parent); payload `merged_sections` says how
  many sections a chunk holds. A section that needs several chunks never merges.
* An intro stays with its first subsection (`intro_below_tokens`, 0 = off): a section
  that fits in one chunk with fewer than `intro_below_tokens` tokens and a heading,
  directly followed by its first subsection that also fits in one chunk, makes one
  chunk with it when the two fit `max_tokens`; its heading_path is the intro's.
* A short tail is rebalanced (`balance_tail_share`, 0 = off): when a section needs
  several chunks and the last holds fewer than `balance_tail_share` x `max_tokens`
  tokens, the section is packed again to the lowest limit under the budget that needs
  no more chunks, so its chunks come out about equal. Merging the tail back into the
  chunk before it was measured too and never applied: greedy packing leaves that chunk
  too full (0 of 30 tails under a quarter of the budget fitted, 0 of 63 under half, on
  the three manuals).
* Overlap (`overlap_tokens`): a chunk that continues a section (not the first of a
  section, not a table piece with a repeated header) starts inside the previous
  chunk. The shared text is the longest proper suffix of the previous chunk that
  starts at a word start (a non-space character after whitespace) and has at most
  `overlap_tokens` tokens counted on its own, found by extending word by word until
  the next word would exceed the limit or the chunk would no longer fit the budget.
  When no word start qualifies (text without spaces, a word longer than the
  overlap), the suffix starts at the earliest character-aligned token boundary that
  keeps it within the limit. Text cut at token boundaries is cut `overlap_tokens`
  short of the budget so that the overlap fits; elsewhere a chunk whose first piece
  leaves no room gets a shorter overlap, or none. Payload `overlap_chars` is the
  shared text's length: `chunk.text[prefix_chars + overlap_chars:]` is what the
  chunk adds after the previous one.
* Language: a chunk's language is the one holding most of its characters among the
  blocks that carry a detected language (set by the language step; short blocks and
  code carry none), and its probability the character-weighted mean of the judged
  blocks' probabilities for that language (a block in another language, or unknown,
  counts 0), so a chunk half in each of two languages scores about 0.5
  (language.weighted_language, the rule pages use too). A chunk with no such block
  takes its pages' languages the same way; with no detected language at all it is
  "unknown" (None when no language step ran).

Token counts use encode_ordinary (special-token text in a document is ordinary text).
"""

from __future__ import annotations

import bisect
import re
from dataclasses import dataclass, field
from itertools import accumulate
from typing import Callable

from pydantic import Field, model_validator

from .language import UNKNOWN, weighted_language
from .spec import StepParams, StepSpec
from .token_offsets import SliceCounter
from .units import BLOCK_SEP, CODE, HEADING, TABLE, Block, Chunk, Page, chunk_locator


class SplitParams(StepParams):
    max_tokens: int = Field(400, gt=0)
    overlap_tokens: int = Field(0, ge=0)
    encoding: str = "cl100k_base"
    merge_below_tokens: int = Field(0, ge=0)
    intro_below_tokens: int = Field(0, ge=0)
    balance_tail_share: float = Field(0.0, ge=0, le=1)

    @model_validator(mode="after")
    def _overlap_below_budget(self):
        if self.overlap_tokens >= self.max_tokens:
            raise ValueError(
                f"overlap_tokens ({self.overlap_tokens}) must be smaller than "
                f"max_tokens ({self.max_tokens})"
            )
        return self


# Sentence ends: Latin-script punctuation followed by whitespace, or CJK full stops.
_CLOSERS = "\"'\u201d\u2019\u00bb)\\]"
# Written to start with one character class, which lets the regular-expression engine
# skip to candidate characters instead of trying every position; the lookbehind picks
# the branch by that first character. Group 1 is the first non-space character after
# the punctuation (None at the end), so the next word's case is read in the same pass.
_SENTENCE_END = re.compile(
    rf"[.!?\u2026\u3002\uff01\uff1f](?:(?<=[.!?\u2026])[.!?\u2026]*[{_CLOSERS}]*(?=\s)"
    rf"|(?<=[\u3002\uff01\uff1f])[\u3002\uff01\uff1f]*[{_CLOSERS}]*)(?=\s*(\S)|)")
_WORD_BEFORE = re.compile(r"(?:\w+\.)*\w+$")
_NON_SPACE = re.compile(r"\S")
# A period after these (casefolded, without the final period) does not end a sentence.
# English, German, French and Spanish forms from memory (common practice, not a source).
ABBREVIATIONS = frozenset({
    # English
    "mr", "mrs", "ms", "dr", "prof", "sr", "jr", "st", "mt", "vs", "e.g", "i.e", "cf",
    "approx", "no", "nos", "vol", "fig", "figs", "pp", "ch", "sec", "dept", "inc", "ltd",
    "co", "corp", "jan", "feb", "mar", "apr", "jun", "jul", "aug", "sep", "sept", "oct",
    "nov", "dec", "ref", "tel", "ext", "min", "max", "esp",
    # German
    "z.b", "d.h", "u.a", "bzw", "ca", "nr", "vgl", "ggf", "evtl", "inkl", "zzgl", "bspw",
    "abs", "art", "hr", "fr", "str", "tsd", "mio", "mrd", "usf", "s.o", "s.u", "u.u",
    # French
    "mme", "mlle", "mm", "env", "p.ex", "c.-à-d", "av", "bd",
    # Spanish
    "sra", "srta", "dra", "ud", "uds", "p.ej", "pág", "aprox", "núm",
})
# A table header is repeated only when it is small next to the budget.
_MAX_HEADER_SHARE = 0.5
# Packing tries a longer chunk only when its estimated count (corrected by the error
# seen on the current one) is at most this far over the budget.
_ESTIMATE_SLACK = 2
# Text with more characters than this many per budget token is taken not to fit without
# counting it (cl100k_base averages about 4 characters per token on English prose).
_CHARS_PER_TOKEN_LIMIT = 10


@dataclass(slots=True)
class _Atom:
    """A piece that is never cut further: a slice [start, end) of the document text."""

    start: int
    end: int
    tokens: int
    prefix: str = ""  # put before the slice when this atom starts a chunk
    heading: bool = False


@dataclass
class _Section:
    heading_path: list[str]
    blocks: list[tuple[Block, int]] = field(default_factory=list)  # (block, doc offset)
    has_content: bool = False


@dataclass
class _Piece:
    """A chunk before it becomes a Chunk: a span of the document text and its context."""

    start: int
    end: int
    prefix: str
    heading_path: list[str]
    tokens: int  # exact count of prefix + span text
    sections: int = 1
    overlap: int = 0  # leading characters of the span shared with the previous piece


@dataclass
class _Placed:
    """A block's place in the document text, for chunk languages."""

    start: int
    end: int
    page: int  # index into the pages list
    language: str | None
    prob: float | None


def _heading_level(block: Block) -> int:
    return min(max(block.level, 1), 6)


def _sections(pages: list[Page]) -> tuple[str, list[int], list[_Section], list[_Placed]]:
    """Document text, each page's offset in it, the sections in order, and the blocks."""
    page_starts = []
    offset = 0
    placed: list[tuple[Block, int]] = []
    spans: list[_Placed] = []
    for index, page in enumerate(pages):
        page_starts.append(offset)
        pos = offset
        for block in page.blocks:
            placed.append((block, pos))
            spans.append(_Placed(pos, pos + len(block.text), index, block.language,
                                 block.language_prob))
            pos += len(block.text) + len(BLOCK_SEP)
        offset += len(page.text) + len(BLOCK_SEP)
    doc = BLOCK_SEP.join(page.text for page in pages)

    sections: list[_Section] = []
    stack: list[tuple[int, str]] = []
    current = _Section(heading_path=[])
    for block, start in placed:
        if not block.text.strip():
            continue
        if block.kind == HEADING:
            level = _heading_level(block)
            while stack and stack[-1][0] >= level:
                stack.pop()
            stack.append((level, " ".join(block.text.split())))
            path = [text for _, text in stack]
            # A heading with no text of its own joins the next heading's section,
            # whatever that heading's level: a title before its first subsection, a
            # page's banner heading before its main heading, the first of two
            # signatures of one function.
            fold = current.blocks and not current.has_content
            if not fold:
                if current.blocks:
                    sections.append(current)
                current = _Section(heading_path=path)
            current.heading_path = path
            current.blocks.append((block, start))
        else:
            current.blocks.append((block, start))
            current.has_content = True
    if current.blocks:
        sections.append(current)
    return doc, page_starts, sections, spans


def _sentence_continues(text: str, match: re.Match) -> bool:
    """True when the punctuation `match` found does not end a sentence."""
    after = match.group(1)
    if after is not None and after.islower():
        return True
    if match.group() != ".":
        return False
    before = _WORD_BEFORE.search(text, max(0, match.start() - 24), match.start())
    if not before:
        return False
    word = before.group()
    return (len(word) == 1 and word.isalpha()) or word.casefold() in ABBREVIATIONS


def _sentence_spans(text: str) -> list[tuple[int, int]]:
    """Sentences of `text`, trimmed of surrounding whitespace."""
    spans = []
    pos = 0
    for match in _SENTENCE_END.finditer(text):
        if _sentence_continues(text, match):
            continue
        end = match.end()
        # A sentence ends on its punctuation (never a space): only its start is trimmed.
        spans.append((_NON_SPACE.search(text, pos, end).start(), end))
        pos = end
    return spans + _trimmed(text, [(pos, len(text))])


def _line_spans(text: str) -> list[tuple[int, int]]:
    spans = []
    pos = 0
    for line in text.split("\n"):
        spans.append((pos, pos + len(line)))
        pos += len(line) + 1
    # Code keeps its indentation: only trailing whitespace is trimmed from a line.
    return [(s, s + len(text[s:e].rstrip())) for s, e in spans if text[s:e].strip()]


def _trimmed(text: str, spans: list[tuple[int, int]]) -> list[tuple[int, int]]:
    out = []
    for s, e in spans:
        piece = text[s:e]
        stripped = piece.strip()
        if stripped:
            s += len(piece) - len(piece.lstrip())
            out.append((s, s + len(stripped)))
    return out


def _char_cuts(enc, text: str) -> tuple[list[int], list[tuple[int, int]]]:
    """The tokens of `text` and (token index, char offset) at every token boundary
    that is also a character boundary."""
    tokens = enc.encode_ordinary(text)
    data = text.encode("utf-8")
    cuts = [(0, 0)]
    nbytes = nchars = 0
    for index, piece in enumerate(enc.decode_tokens_bytes(tokens), start=1):
        nbytes += len(piece)
        nchars += sum(1 for byte in piece if byte & 0xC0 != 0x80)
        if nbytes == len(data) or data[nbytes] & 0xC0 != 0x80:
            cuts.append((index, nchars))
    return tokens, cuts


class _Splitter:
    def __init__(self, encoding, params: SplitParams, doc: str):
        self.enc = encoding
        self.max = params.max_tokens
        self.overlap = params.overlap_tokens
        self.tail_below = params.balance_tail_share * params.max_tokens
        self.doc = doc
        self._sep_cache: dict[str, int] = {}
        # The document is encoded once; counts of its slices come from that encoding.
        self._slices = SliceCounter(encoding, doc)

    def count(self, text: str) -> int:
        return len(self.enc.encode_ordinary(text))

    def span(self, start: int, end: int) -> int:
        """Tokens of doc[start:end], exactly as count(doc[start:end])."""
        return self._slices.count(start, end)

    # -- cutting ---------------------------------------------------------------

    def token_pieces(self, start: int, end: int, fits: Callable[[str], bool],
                     budget: int) -> list[tuple[int, int]]:
        """Cut doc[start:end] at token boundaries that are also character boundaries.

        Works on byte offsets (a token boundary is a character boundary when the next
        byte is not a UTF-8 continuation byte) so no per-token Python loop is needed."""
        text = self.doc[start:end]
        data = text.encode("utf-8")
        tokens = self.enc.encode_ordinary(text)
        ends = list(accumulate(map(len, self.enc.decode_tokens_bytes(tokens))))
        n = len(tokens)

        def boundary(t: int) -> bool:  # after token t-1
            b = ends[t - 1]
            return b == len(data) or data[b] & 0xC0 != 0x80

        pieces = []
        t0 = b0 = c0 = 0
        while t0 < n:
            t1 = min(n, t0 + budget)
            while t1 > t0 + 1 and not boundary(t1):
                t1 -= 1
            while not boundary(t1):  # one character needs more tokens than the budget
                t1 += 1
            c1 = c0 + len(data[b0:ends[t1 - 1]].decode("utf-8"))
            # Re-encoding a slice can differ from the slice of the encoding (and the
            # piece is trimmed of whitespace later, which can cost a token): check it.
            while t1 > t0 + 1 and not fits(text[c0:c1].strip()):
                t = t1 - 1
                while t > t0 + 1 and not boundary(t):
                    t -= 1
                if not boundary(t):
                    break  # no shorter cut: the piece stays (its chunk fails the budget)
                t1 = t
                c1 = c0 + len(data[b0:ends[t1 - 1]].decode("utf-8"))
            if self.enc.decode(tokens[t0:t1]) != text[c0:c1]:
                raise AssertionError(f"token cut at {start + c1} is not a character cut")
            pieces.append((c0, c1))
            t0, b0, c0 = t1, ends[t1 - 1], c1
        return [(start + s, start + e) for s, e in _trimmed(text, pieces)]

    def atoms_for(self, start: int, end: int, spans: list[tuple[int, int]],
                  prefix: str = "", lines: bool = False) -> list[_Atom]:
        """Atoms for the local spans of doc[start:end]. A span that does not fit is cut
        at its line breaks first when `lines` (hard-wrapped text, lists), then at
        token boundaries."""
        lead = self.count(prefix) if prefix else 0

        def fits(text: str) -> bool:
            return (self.count(prefix + text) if prefix else self.count(text)) <= self.max

        doc, count, atoms = self.doc, self._slices.count, []
        for s, e in spans:
            s, e = start + s, start + e
            n = count(s, e)
            if (n <= self.max) if not prefix else (self.count(prefix + doc[s:e]) <= self.max):
                atoms.append(_Atom(s, e, n, prefix))
                continue
            text = doc[s:e]
            if lines and "\n" in text:
                atoms.extend(self.atoms_for(s, e, _line_spans(text), prefix))
                continue
            # Leave room for the overlap (a piece after a table header never gets one).
            room = lead if prefix else self.overlap
            budget = max(1, self.max - room)
            for ps, pe in self.token_pieces(s, e, fits, budget):
                atoms.append(_Atom(ps, pe, self.span(ps, pe), prefix))
        return atoms

    def block_atoms(self, block: Block, start: int, force_split: bool = False) -> list[_Atom]:
        end = start + len(block.text)
        text = block.text
        # A block far longer than the budget in characters is not counted whole.
        if not force_split and len(text) <= self.max * _CHARS_PER_TOKEN_LIMIT:
            n = self.span(start, end)
            if n <= self.max:
                return [_Atom(start, end, n, heading=block.kind == HEADING)]
        if block.kind == TABLE:
            rows = _line_spans(text)
            if len(rows) < 2:
                return self.atoms_for(start, end, rows)
            header = text[rows[0][0]:rows[0][1]]
            prefix = header + "\n"
            if self.count(prefix) > self.max * _MAX_HEADER_SHARE:
                prefix = ""
            return self.atoms_for(start, end, rows[:1]) + self.atoms_for(
                start, end, rows[1:], prefix)
        if block.kind == CODE:
            return self.atoms_for(start, end, _line_spans(text))
        atoms = self.atoms_for(start, end, _sentence_spans(text), lines=True)
        if block.kind == HEADING:
            for atom in atoms:
                atom.heading = True
        return atoms

    # -- packing ---------------------------------------------------------------

    def sep_tokens(self, sep: str) -> int:
        # A single space joins the next word's token; other separators count as written.
        if sep == " ":
            return 0
        if sep not in self._sep_cache:
            self._sep_cache[sep] = self.count(sep)
        return self._sep_cache[sep]

    def overlap_start(self, prev_start: int, prev_end: int, first_end: int) -> int | None:
        """Where a chunk that continues after doc[prev_start:prev_end] starts, so that it
        shares the longest allowed suffix of it (see the module docstring); None for no
        overlap. `first_end` is the end of the chunk's first atom, which must still fit."""
        doc, limit = self.doc, self.overlap
        starts = []  # word starts within the limit, latest first
        k = prev_end
        while True:
            # The previous word start before k (a non-space after whitespace).
            ws = max(doc.rfind(" ", prev_start, k - 1), doc.rfind("\n", prev_start, k - 1))
            if ws < prev_start:
                break
            k = ws + 1
            while k < prev_end and doc[k].isspace():
                k += 1
            if k >= prev_end:
                k = ws
                continue
            if self.span(k, prev_end) > limit:
                break
            starts.append(k)
            k = ws
        # The longest of them with which the chunk's first piece still fits.
        for k in reversed(starts):
            if self.span(k, first_end) <= self.max:
                return k
        # No word start qualifies: the earliest char-aligned token boundary within limit.
        text = doc[prev_start:prev_end]
        tokens, cuts = _char_cuts(self.enc, text)
        for t, c in cuts:
            if c == 0 or t < len(tokens) - limit:
                continue
            cand = prev_start + c
            while cand < prev_end and doc[cand].isspace():
                cand += 1
            if cand >= prev_end:
                return None
            if self.span(cand, prev_end) <= limit and self.span(cand, first_end) <= self.max:
                return cand
        return None

    def pack(self, atoms: list[_Atom], limit: int | None = None
             ) -> list[tuple[int, int, str, int, int]]:
        """Greedy packing of atoms into (start, end, prefix, overlap, tokens) chunks
        of at most `limit` tokens (the budget when None; a single atom over a lower
        limit still makes a chunk of its own); `tokens` is the chunk text's exact
        count."""
        doc = self.doc
        limit = self.max if limit is None else min(limit, self.max)
        seps = [0] + [self.sep_tokens(doc[atoms[k - 1].end:atoms[k].start])
                      for k in range(1, len(atoms))]
        cum = [0]
        for atom, sep in zip(atoms, seps):
            cum.append(cum[-1] + sep + atom.tokens)

        out: list[tuple[int, int, str, int, int]] = []
        i = 0
        while i < len(atoms):
            atom = atoms[i]
            prefix = atom.prefix
            start = atom.start
            overlap = 0
            lead = self.count(prefix) if prefix else 0
            if self.overlap and out and not prefix:
                prev_start, prev_end = out[-1][0], out[-1][1]
                candidate = self.overlap_start(prev_start, prev_end, atom.end)
                if candidate is not None and candidate < start:
                    lead = self.span(candidate, start)
                    overlap = prev_end - candidate
                    start = candidate

            def tokens(j: int) -> int:
                if prefix:
                    return self.count(prefix + doc[start:atoms[j].end])
                return self.span(start, atoms[j].end)

            def estimate(j: int) -> int:
                return lead + cum[j + 1] - cum[i] - seps[i]

            # Estimate the reach from token sums, then correct it with exact counts.
            # The sums are close to the exact count (a separator may merge with a
            # neighbour), so a longer chunk is tried only when its estimate is near
            # the budget; every chunk taken is counted exactly.
            def reach(error: int) -> int:
                """The last atom whose estimate plus `error` fits the budget."""
                target = limit - error - lead + cum[i] + seps[i]
                return min(max(i, bisect.bisect_right(cum, target) - 2), len(atoms) - 1)

            j = reach(0)
            n = tokens(j)
            moved_down = False
            while j > i and n > limit:
                # Too long: assume the estimate is off by as much further down.
                k = min(j - 1, reach(max(1, n - estimate(j))))
                j, n = k, tokens(k)
                moved_down = True
            if not moved_down:
                # Longer while the estimate, corrected by its error at j, may still fit.
                while (j + 1 < len(atoms)
                       and estimate(j + 1) + n - estimate(j) <= limit + _ESTIMATE_SLACK):
                    longer = tokens(j + 1)
                    if longer > limit:
                        break
                    j, n = j + 1, longer
            moved = _keep_introduction(doc, atoms, i, j, lambda s, e: self.span(s, e) <= limit)
            if moved != j:
                j, n = moved, tokens(moved)
            # Do not end a chunk on a heading when text follows; give it to the next
            # chunk, unless the chunk holds nothing but headings.
            if atoms[j].heading and j + 1 < len(atoms):
                k = j
                while k >= i and atoms[k].heading:
                    k -= 1
                if k >= i:
                    j = k
                    n = tokens(j)
            out.append((start, atoms[j].end, prefix, overlap, n))
            i = j + 1
        return out

    def section_span(self, section: _Section) -> tuple[int, int]:
        _, first_start = section.blocks[0]
        last_block, last_start = section.blocks[-1]
        # Leading whitespace is kept (indentation of code); trailing is not text.
        return first_start, last_start + len(last_block.text.rstrip())

    def section_chunks(self, section: _Section) -> list[tuple[int, int, str, int, int]]:
        start, end = self.section_span(section)
        if end - start <= self.max * _CHARS_PER_TOKEN_LIMIT:
            n = self.span(start, end)
            if n <= self.max:
                return [(start, end, "", 0, n)]
        atoms: list[_Atom] = []
        heading_run = True
        heading_start = None
        for block, offset in section.blocks:
            if block.kind == HEADING and heading_run:
                heading_start = offset if heading_start is None else heading_start
                atoms.extend(self.block_atoms(block, offset))
                continue
            force = False
            if heading_run and heading_start is not None:
                # The first block under the heading(s): split it if that is what it
                # takes to keep the heading with some of its text.
                force = self.span(heading_start, offset + len(block.text)) > self.max
            heading_run = False
            atoms.extend(self.block_atoms(block, offset, force_split=force))
        return self.short_tail(atoms, self.pack(atoms))

    def short_tail(self, atoms: list[_Atom], out: list[tuple[int, int, str, int, int]]
                   ) -> list[tuple[int, int, str, int, int]]:
        """A section whose last chunk holds fewer than balance_tail_share of the budget
        is packed again to the lowest limit that needs no more chunks, so its chunks
        come out about equal (see the module docstring)."""
        if len(out) < 2 or out[-1][4] >= self.tail_below:
            return out
        # The chunk count falls as the limit rises (packing is greedy): find the lowest
        # limit that keeps it, starting from the mean chunk (no lower limit can do).
        lo = max(1, sum(c[4] for c in out) // len(out) - self.overlap)
        hi = self.max
        while lo < hi:
            mid = (lo + hi) // 2
            if len(self.pack(atoms, mid)) <= len(out):
                hi = mid
            else:
                lo = mid + 1
        balanced = self.pack(atoms, lo)
        return balanced if len(balanced) <= len(out) else out


def _keep_introduction(doc: str, atoms: list[_Atom], i: int, j: int,
                       fits: Callable[[int, int], bool]) -> int:
    """Where a chunk of atoms i..j ends when a sentence ending in a colon would close it
    while more follows: that sentence introduces what comes next (a list, a command),
    so it starts the next chunk instead -- when the two fit one chunk together and the
    sentence is not the chunk's only atom (common practice; rule ours)."""
    if (j > i and j + 1 < len(atoms) and not atoms[j - 1].heading
            and doc[atoms[j].start:atoms[j].end].rstrip().endswith(":")
            and fits(atoms[j].start, atoms[j + 1].end)):
        return j - 1
    return j


def _common_prefix(a: list[str], b: list[str]) -> list[str]:
    n = 0
    while n < len(a) and n < len(b) and a[n] == b[n]:
        n += 1
    return a[:n]


def _pieces(splitter: _Splitter, sections: list[_Section], params: SplitParams) -> list[_Piece]:
    """Every chunk's span, with small sections merged and an intro kept with its first
    subsection (see the module docstring)."""
    pieces: list[_Piece] = []
    # The open run of whole sections: its piece, its anchor (parent path), its tokens.
    run: tuple[_Piece, list[str], int] | None = None
    joining = params.merge_below_tokens or params.intro_below_tokens
    for section in sections:
        cut = splitter.section_chunks(section)
        path = section.heading_path
        if len(cut) != 1 or not joining:
            run = None
            pieces.extend(_Piece(s, e, p, list(path), n, overlap=o) for s, e, p, o, n in cut)
            continue
        start, end, _, _, tokens = cut[0]
        if run is not None:
            piece, anchor, run_tokens = run
            under = path[:len(anchor)] == anchor and len(path) > len(anchor)
            small = min(tokens, run_tokens) < params.merge_below_tokens
            # The run is one small section and this one comes first under it.
            intro = (piece.sections == 1 and run_tokens < params.intro_below_tokens
                     and 0 < len(piece.heading_path) < len(path)
                     and path[:len(piece.heading_path)] == piece.heading_path)
            if (under and small) or intro:
                joined = splitter.span(piece.start, end)
                if joined <= params.max_tokens:
                    piece.end = end
                    piece.heading_path = _common_prefix(piece.heading_path, path)
                    piece.sections += 1
                    piece.tokens = joined
                    run = (piece, anchor, joined)
                    continue
        piece = _Piece(start, end, "", list(path), tokens)
        pieces.append(piece)
        run = (piece, path[:-1], tokens)
    return pieces


def chunk_language(blocks: list[_Placed], starts: list[int], pages: list[Page], start: int,
                   end: int) -> tuple[str | None, float | None]:
    """A span's language and probability from its blocks, else its pages, by
    language.weighted_language over the characters of each inside the span.

    `starts` are the blocks' start offsets (sorted, as the blocks are)."""
    parts = []
    page_chars: dict[int, int] = {}
    first = max(0, bisect.bisect_right(starts, start) - 1)
    # Only the blocks that start before the span ends (not a copy of all the rest).
    for block in blocks[first:bisect.bisect_left(starts, end, first)]:
        chars = min(end, block.end) - max(start, block.start)
        if chars <= 0:
            continue
        page_chars[block.page] = page_chars.get(block.page, 0) + chars
        parts.append((block.language, block.prob, chars))
    lang, prob = weighted_language(parts)
    if lang is not None:
        return lang, prob
    lang, prob = weighted_language((pages[i].language, pages[i].language_prob, chars)
                                   for i, chars in page_chars.items())
    if lang is not None:
        return lang, prob
    detected = any(pages[i].language is not None for i in page_chars)
    return (UNKNOWN if detected else None), None


def _page_index(page_starts: list[int], offset: int) -> int:
    return bisect.bisect_right(page_starts, offset) - 1


def split(pages: list[Page], params: SplitParams, ctx) -> list[Chunk]:
    """Chunks of one document, in document order."""
    if ctx is None or ctx.encoding is None:
        raise RuntimeError("split needs ctx.encoding to load the token encoding")
    encoding = ctx.encoding(params.encoding)
    doc, page_starts, sections, blocks = _sections(pages)
    splitter = _Splitter(encoding, params, doc)
    starts = [b.start for b in blocks]

    chunks: list[Chunk] = []
    for piece in _pieces(splitter, sections, params):
        start, end, prefix = piece.start, piece.end, piece.prefix
        first = _page_index(page_starts, start)
        last = _page_index(page_starts, end - 1)
        page = pages[first]
        text = prefix + doc[start:end]
        index = len(chunks)
        language, language_prob = chunk_language(blocks, starts, pages, start, end)
        chunk = Chunk(
            locator=chunk_locator(index),
            index=index,
            text=text,
            heading_path=piece.heading_path,
            page_start=page.page,
            page_end=pages[last].page,
            char_start=start - page_starts[first],
            char_end=end - page_starts[last],
            title=page.title,
            format=page.format,
            language=language,
            language_prob=language_prob,
            token_count=piece.tokens,
            encoding=params.encoding,
            parents=[p.locator for p in pages[first:last + 1]],
            prefix_chars=len(prefix),
            payload={"merged_sections": piece.sections, "overlap_chars": piece.overlap},
        )
        if chunk.token_count > params.max_tokens:
            # Only possible when one character needs more tokens than the budget.
            chunk.fail(
                f"chunk needs {chunk.token_count} tokens in {params.encoding} but "
                f"max_tokens is {params.max_tokens}, and it cannot be cut further "
                f"without cutting a character"
            )
        chunks.append(chunk)
    return chunks


SPLIT = StepSpec(
    name="split",
    version="3",
    consumes="pages",
    produces="chunks",
    scope="document",
    params=SplitParams,
    run=split,
    summary="chunks that follow the headings, fit a token budget and merge small sections",
    encoding_params=("encoding",),
)
