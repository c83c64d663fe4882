"""Split a document's pages into chunks that follow its headings and fit a token budget.

How a document is cut:

* The document text is the pages' texts joined by units.BLOCK_SEP, so a chunk that
  runs over a page break reads "tail of start page" + "\\n\\n" + ... + "head of end
  page", and every chunk's span text is one slice of it. For a chunk on one page,
  `chunk.text == page.text[char_start:char_end]`.
* Sections: walking the blocks in order with a heading stack (a heading of level L
  closes every open heading of level >= L), a section is one heading block plus the
  content blocks under it; content before the first heading is a section with an
  empty heading path. The heading's own text opens the section's first chunk, so a
  chunk reads like the document; `heading_path` (heading texts, top down, including
  the section's own heading) gives every chunk its context, so later chunks of a long
  section do not repeat the heading (that would break the span slice above).
* A heading directly followed by a deeper heading (a title, then its first
  subsection) has no text of its own; it joins the subsection's section rather than
  becoming a chunk of one line.
* A section that fits the budget is one chunk. A longer one is cut at block
  boundaries, then at sentence boundaries, then at token boundaries (only where a
  token boundary is also a character boundary, checked by decoding), and the pieces
  are packed greedily in order. A heading is never left alone at the end of a chunk
  when the first block after it could be split to keep them together.
* A table that does not fit is cut between rows, and every piece after the first
  starts with the table's header row (the first row) and "\\n". That repeated header
  is not part of the span: `chunk.prefix_chars` says how many leading characters
  of `chunk.text` are such a prefix (0 otherwise), and
  `chunk.text[prefix_chars:]` is the span's slice.
* Neighbouring small sections stay separate chunks in this version; merging them up
  to the budget is left for later.
* With overlap_tokens > 0, a chunk that continues a section starts up to that many
  tokens before the previous chunk's end (moved forward to a word start), as long as
  the chunk still fits.

Token counts use encode_ordinary (special-token text in a document is ordinary text).
"""

from __future__ import annotations

import bisect
import re
from dataclasses import dataclass, field
from typing import Callable

from pydantic import Field, model_validator

from .spec import StepParams, StepSpec
from .units import BLOCK_SEP, CODE, HEADING, TABLE, Block, Chunk, Page, chunk_locator


class SplitParams(StepParams):
    max_tokens: int = Field(400, gt=0)
    overlap_tokens: int = Field(0, ge=0)
    encoding: str = "cl100k_base"

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
_SENTENCE_END = re.compile(rf"[.!?\u2026]+[{_CLOSERS}]*(?=\s)|[\u3002\uff01\uff1f]+[{_CLOSERS}]*")
# A table header is repeated only when it is small next to the budget.
_MAX_HEADER_SHARE = 0.5


@dataclass
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
    last_heading_level: int = 0


def _heading_level(block: Block) -> int:
    return min(max(block.level, 1), 6)


def _sections(pages: list[Page]) -> tuple[str, list[int], list[_Section]]:
    """Document text, each page's offset in it, and the sections in order."""
    page_starts = []
    offset = 0
    placed: list[tuple[Block, int]] = []
    for page in pages:
        page_starts.append(offset)
        pos = offset
        for block in page.blocks:
            placed.append((block, pos))
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
            fold = (current.blocks and not current.has_content
                    and level > current.last_heading_level)
            if not fold:
                if current.blocks:
                    sections.append(current)
                current = _Section(heading_path=path)
            current.heading_path = path
            current.blocks.append((block, start))
            current.last_heading_level = level
        else:
            current.blocks.append((block, start))
            current.has_content = True
    if current.blocks:
        sections.append(current)
    return doc, page_starts, sections


def _sentence_spans(text: str) -> list[tuple[int, int]]:
    spans = []
    pos = 0
    for match in _SENTENCE_END.finditer(text):
        spans.append((pos, match.end()))
        pos = match.end()
    spans.append((pos, len(text)))
    return _trimmed(text, spans)


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


class _Splitter:
    def __init__(self, encoding, params: SplitParams, doc: str):
        self.enc = encoding
        self.max = params.max_tokens
        self.overlap = params.overlap_tokens
        self.doc = doc
        self._sep_cache: dict[str, int] = {}

    def count(self, text: str) -> int:
        return len(self.enc.encode_ordinary(text))

    # -- cutting ---------------------------------------------------------------

    def token_pieces(self, start: int, end: int, fits: Callable[[str], bool],
                     budget: int) -> list[tuple[int, int]]:
        """Cut doc[start:end] at token boundaries that are also character boundaries."""
        text = self.doc[start:end]
        tokens = self.enc.encode_ordinary(text)
        data = text.encode("utf-8")
        # (token index, char offset) for every token boundary on a character boundary.
        cuts = [(0, 0)]
        nbytes = nchars = 0
        for index, piece in enumerate(self.enc.decode_tokens_bytes(tokens), start=1):
            nbytes += len(piece)
            nchars += sum(1 for byte in piece if byte & 0xC0 != 0x80)
            if nbytes == len(data) or data[nbytes] & 0xC0 != 0x80:
                cuts.append((index, nchars))
        pieces = []
        k = 0
        while k < len(cuts) - 1:
            t0, c0 = cuts[k]
            j = k + 1
            while j + 1 < len(cuts) and cuts[j + 1][0] - t0 <= budget:
                j += 1
            # Re-encoding a slice can differ from the slice of the encoding (and the
            # piece is trimmed of whitespace later, which can cost a token): check it.
            while j > k + 1 and not fits(text[c0:cuts[j][1]].strip()):
                j -= 1
            t1, c1 = cuts[j]
            if self.enc.decode(tokens[t0:t1]) != text[c0:c1]:
                raise AssertionError(f"token cut at {start + c1} is not a character cut")
            pieces.append((c0, c1))
            k = j
        return [(start + s, start + e) for s, e in _trimmed(text, pieces)]

    def atoms_for(self, start: int, end: int, spans: list[tuple[int, int]],
                  prefix: str = "") -> list[_Atom]:
        """Atoms for the local spans of doc[start:end]; token-cut any that do not fit."""
        def fits(text: str) -> bool:
            return self.count(prefix + text) <= self.max

        atoms = []
        for s, e in spans:
            s, e = start + s, start + e
            text = self.doc[s:e]
            n = self.count(text)
            if fits(text):
                atoms.append(_Atom(s, e, n, prefix))
                continue
            budget = max(1, self.max - (self.count(prefix) if prefix else 0))
            for ps, pe in self.token_pieces(s, e, fits, budget):
                atoms.append(_Atom(ps, pe, self.count(self.doc[ps:pe]), prefix))
        return atoms

    def block_atoms(self, block: Block, start: int, force_split: bool = False) -> list[_Atom]:
        end = start + len(block.text)
        text = block.text
        n = self.count(text)
        if n <= self.max and not force_split:
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
        atoms = self.atoms_for(start, end, _sentence_spans(text))
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

    def overlap_start(self, start: int, end: int) -> int:
        text = self.doc[start:end]
        tokens = self.enc.encode_ordinary(text)
        want = max(0, len(tokens) - self.overlap)
        nbytes = 0
        data = text.encode("utf-8")
        nchars = 0
        cut = len(text)
        for index, piece in enumerate(self.enc.decode_tokens_bytes(tokens)):
            if index >= want and (nbytes == len(data) or data[nbytes] & 0xC0 != 0x80):
                cut = nchars
                break
            nbytes += len(piece)
            nchars += sum(1 for byte in piece if byte & 0xC0 != 0x80)
        # Start at a word, not inside one.
        if 0 < cut < len(text) and not text[cut - 1].isspace() and not text[cut].isspace():
            ws = re.search(r"\s", text[cut:])
            if ws:
                cut += ws.start()
        while cut < len(text) and text[cut].isspace():
            cut += 1
        return start + cut

    def pack(self, atoms: list[_Atom]) -> list[tuple[int, int, str]]:
        """Greedy packing of atoms into (start, end, prefix) chunks within the budget."""
        doc = self.doc
        seps = [0] + [self.sep_tokens(doc[atoms[k - 1].end:atoms[k].start])
                      for k in range(1, len(atoms))]
        cum = [0]
        for atom, sep in zip(atoms, seps):
            cum.append(cum[-1] + sep + atom.tokens)

        out: list[tuple[int, int, str]] = []
        i = 0
        while i < len(atoms):
            atom = atoms[i]
            prefix = atom.prefix
            start = atom.start
            lead = self.count(prefix) if prefix else 0
            if self.overlap and out and not prefix:
                candidate = self.overlap_start(out[-1][0], out[-1][1])
                if candidate < start and self.count(doc[candidate:atom.end]) <= self.max:
                    lead = self.count(doc[candidate:start])
                    start = candidate

            def fits(j: int) -> bool:
                return self.count(prefix + doc[start:atoms[j].end]) <= self.max

            # Estimate the reach from token sums, then correct it with exact counts.
            target = self.max - lead + cum[i] + seps[i]
            j = min(max(i, bisect.bisect_right(cum, target) - 2), len(atoms) - 1)
            moved_down = False
            while j > i and not fits(j):
                j -= 1
                moved_down = True
            if not moved_down:
                while j + 1 < len(atoms) and fits(j + 1):
                    j += 1
            # Do not end a chunk on a heading when text follows; give it to the next
            # chunk, unless the chunk holds nothing but headings.
            if atoms[j].heading and j + 1 < len(atoms):
                k = j
                while k >= i and atoms[k].heading:
                    k -= 1
                if k >= i:
                    j = k
            out.append((start, atoms[j].end, prefix))
            i = j + 1
        return out

    def section_chunks(self, section: _Section) -> list[tuple[int, int, str]]:
        _, first_start = section.blocks[0]
        last_block, last_start = section.blocks[-1]
        # Leading whitespace is kept (indentation of code); trailing is not text.
        start, end = first_start, last_start + len(last_block.text.rstrip())
        if self.count(self.doc[start:end]) <= self.max:
            return [(start, end, "")]
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
                together = self.doc[heading_start:offset + len(block.text)]
                force = self.count(together) > self.max
            heading_run = False
            atoms.extend(self.block_atoms(block, offset, force_split=force))
        return self.pack(atoms)


def _page_index(page_starts: list[int], offset: int) -> int:
    return bisect.bisect_right(page_starts, offset) - 1


def split(pages: list[Page], params: SplitParams, ctx) -> list[Chunk]:
    """Chunks of one document, in document order."""
    if ctx is None or ctx.encoding is None:
        raise RuntimeError("split needs ctx.encoding to load the token encoding")
    encoding = ctx.encoding(params.encoding)
    doc, page_starts, sections = _sections(pages)
    splitter = _Splitter(encoding, params, doc)

    chunks: list[Chunk] = []
    for section in sections:
        for start, end, prefix in splitter.section_chunks(section):
            first = _page_index(page_starts, start)
            last = _page_index(page_starts, end - 1)
            page = pages[first]
            text = prefix + doc[start:end]
            index = len(chunks)
            chunk = Chunk(
                locator=chunk_locator(index),
                index=index,
                text=text,
                heading_path=list(section.heading_path),
                page_start=page.page,
                page_end=pages[last].page,
                char_start=start - page_starts[first],
                char_end=end - page_starts[last],
                title=page.title,
                format=page.format,
                language=page.language,
                language_prob=page.language_prob,
                token_count=splitter.count(text),
                encoding=params.encoding,
                parents=[p.locator for p in pages[first:last + 1]],
                prefix_chars=len(prefix),
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
    version="1",
    consumes="pages",
    produces="chunks",
    scope="document",
    params=SplitParams,
    run=split,
    summary="chunks that follow the headings and fit a token budget",
    encoding_params=("encoding",),
)
