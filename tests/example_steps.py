"""A user's own step, loaded by dotted path from a flow definition (see DEVELOPERS.md).

It masks e-mail addresses in page text before chunks reach an index.
"""

from __future__ import annotations

import re
from dataclasses import replace

from thresher.steps.spec import StepContext, StepParams, StepSpec
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
