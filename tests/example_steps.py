"""A user's own step, loaded by dotted path from a flow definition (see DEVELOPERS.md).

It masks e-mail addresses in page text before chunks reach an index.
"""

from __future__ import annotations

import re
from dataclasses import replace

from thresher.steps.spec import NoParams, StepContext, StepParams, StepSpec
from thresher.steps.units import Block, Page

EMAIL = re.compile(r"[\w.+-]+@[\w-]+(?:\.[\w-]+)+")


class MaskParams(StepParams):
    replacement: str = "[email]"


def mask_emails(pages: list[Page], params: MaskParams, ctx: StepContext) -> list[Page]:
    out = []
    for page in pages:
        n = 0
        blocks = []
        for b in page.blocks:
            text, k = EMAIL.subn(params.replacement, b.text)
            n += k
            blocks.append(Block(b.kind, text, b.level))
        out.append(replace(page, blocks=blocks, parents=[page.locator], payload={"masked": n},
                           warnings=list(page.warnings)))
    return out


MASK_EMAILS = StepSpec(name="mask_emails", version="1", consumes="pages", produces="pages",
                       scope="document", params=MaskParams, run=mask_emails,
                       summary="replace e-mail addresses in page text")


# --- Steps used by the flow-mechanics tests ---------------------------------------

import os
import time
from collections import Counter

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.units import DocPages


class GuardedExtractParams(ExtractParams):
    pass


def stubborn_extract(source, params, ctx):
    """The real extract, except that it hangs or dies on files that ask it to."""
    if b"PLEASE HANG" in source.data:
        time.sleep(3600)
    if b"PLEASE CRASH" in source.data:
        os._exit(70)  # like a parser dying in C code: no exception, the process is gone
    return extract(source, params, ctx)


STUBBORN_EXTRACT = StepSpec(name="extract", version="test", consumes="source", produces="pages",
                            scope="document", params=GuardedExtractParams, run=stubborn_extract,
                            time_limit=lambda p: p.time_limit_seconds)


def fragile_pages(pages, params, ctx):
    """Passes pages on, except that its process dies on a page that asks it to."""
    if any("PLEASE CRASH" in b.text for p in pages for b in p.blocks):
        os._exit(70)
    return [replace(p, parents=[p.locator]) for p in pages]


FRAGILE_PAGES = StepSpec(name="fragile", version="1", consumes="pages", produces="pages", scope="document",
                         params=NoParams, run=fragile_pages)


def tag_html(pages, params, ctx):
    return [replace(p, parents=[p.locator], payload={"tagged": "yes"}) for p in pages]


HTML_ONLY = StepSpec(name="html_only", version="1", consumes="pages", produces="pages", scope="document",
                     params=NoParams, run=tag_html, formats=("html",))


def drop_shared_blocks(docs, params, ctx):
    """A corpus page step: remove blocks whose text appears in two or more documents."""
    seen = Counter()
    for d in docs:
        for text in {b.text for p in d.pages for b in p.blocks}:
            seen[text] += 1
    out = []
    for d in docs:
        pages = []
        for p in d.pages:
            kept = [b for b in p.blocks if seen[b.text] < 2]
            pages.append(replace(p, blocks=kept, parents=[p.locator],
                                 payload={"removed": len(p.blocks) - len(kept)}))
        out.append(DocPages(d.doc_id, d.source_path, d.rank, pages))
    return out


SHARED_BLOCKS = StepSpec(name="shared_blocks", version="1", consumes="pages", produces="pages",
                         scope="corpus", params=NoParams, run=drop_shared_blocks)


def shout_rota_chunks(chunks, params, ctx):
    """A chunk step that changes one file's chunk text and, as `replace` does, carries
    the old count over."""
    rota = ctx.source_path.endswith("rota.html")
    return [replace(c, text=c.text.upper() if rota else c.text, parents=[c.locator], payload={})
            for c in chunks]


SHOUT_ROTA = StepSpec(name="shout_rota", version="1", consumes="chunks", produces="chunks",
                      scope="document", params=NoParams, run=shout_rota_chunks)


def shout_one_path(docs, params, ctx):
    """A corpus chunk step that changes the text of one file's chunks (count carried over)."""
    return [replace(c, text=c.text.upper() if d.source_path.endswith("vans.html") else c.text,
                    parents=[c.locator], payload={}) for d in docs for c in d.chunks]


SHOUT_VANS = StepSpec(name="shout_vans", version="1", consumes="chunks", produces="chunks",
                      scope="corpus", params=NoParams, run=shout_one_path)


# --- Helpers for the child-process tests (tests/test_isolate.py) -------------------

def _sleep_then(seconds: float, value):
    time.sleep(seconds)
    return value


class SlowToUnpack:
    """An argument that takes `seconds` to unpickle in the child, as a large document's
    bytes or a fresh child's start can under load: time before the document's work."""

    def __init__(self, seconds: float, value: str):
        self.seconds, self.value = seconds, value

    def __reduce__(self):
        return (_sleep_then, (self.seconds, self.value))


def imported(names: list[str]) -> list[bool]:
    """Which of these modules the process has imported (run in a warm worker)."""
    import sys

    return [n in sys.modules for n in names]


def echo(value):
    return value


def hang(value):
    time.sleep(3600)


def timed_pieces(pieces):
    """A streamed call: for each (limit, seconds) piece, a Clock, then `seconds` of
    work, then the piece's number and this worker's process id."""
    from thresher.flows.isolate import Clock

    for n, (limit, seconds) in enumerate(pieces):
        yield Clock(limit, n)
        time.sleep(seconds)
        yield (n, os.getpid())


def pieces_then_failure(n):
    """A streamed call: `n` timed pieces of no work, then an error in the next piece's
    cheap set-up (before any Clock), as a step's inputs failing to sort would."""
    yield from timed_pieces([(None, 0.0)] * n)
    raise ValueError("the set-up after the last piece failed")


def changed_after_yield():
    """A streamed call that changes a result after yielding it, as segment.run_segment
    clears the payload and time of the units it hands to the next step."""
    from thresher.flows.isolate import Clock

    result = {"payload": "the step's own"}
    yield Clock(None, 0)
    yield result
    result["payload"] = "cleared for the next step"
    yield Clock(None, 1)
    yield "next step done"


def pass_chunks_along(chunks, params, ctx):
    """A chunk step that hands its input chunks on as they are (payload included)."""
    return [replace(c, parents=[c.locator]) for c in chunks]


PASS_ALONG = StepSpec(name="pass_along", version="1", consumes="chunks", produces="chunks",
                      scope="document", params=NoParams, run=pass_chunks_along)
PASS_ALONG_LATER = StepSpec(name="pass_along_later", version="1", consumes="chunks", produces="chunks",
                            scope="document", params=NoParams, run=pass_chunks_along)
