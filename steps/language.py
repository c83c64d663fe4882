"""Detect each page's language with langdetect, and the document's from its pages.

Determinism: langdetect draws random n-gram samples. Each `Detector` copies
`DetectorFactory.seed` when it is created and re-seeds its own `random.Random` with
it at the start of every detection (langdetect 1.0.9, detector.py `_detect_block`),
so with a fixed seed and a fresh detector per page the result depends only on the
text, not on call order or on other pages. Without a seed it seeds from the OS and
results change between runs. We keep a private factory (so nobody else's seed
setting leaks in) and create each detector under a lock with our seed set.

Text used: headings, paragraphs and tables; CODE blocks are left out because program
text says nothing about the language of the prose around it.

Document language: the language holding most characters among the pages with a
detected language ("unknown" pages do not vote). It is called mixed when a second
language holds at least MIXED_SHARE of those characters -- our own choice, so that a
glossary page or a quoted passage does not make a document mixed but a bilingual
document (roughly one part in five or more) does.
"""

from __future__ import annotations

import threading
from collections import defaultdict
from dataclasses import replace

from pydantic import Field

from .spec import StepParams, StepSpec
from .units import CODE, Page

UNKNOWN = "unknown"
MIXED_SHARE = 0.20


class LanguageParams(StepParams):
    min_chars: int = Field(40, ge=0)
    min_probability: float = Field(0.80, ge=0.0, le=1.0)
    seed: int = 0
    # Languages to keep (ISO 639-1 as langdetect gives them); empty keeps every page.
    # Pages whose language is "unknown" are always kept: too little text to judge is
    # not evidence of a wrong language.
    keep: list[str] = Field(default_factory=list)


_factory = None
_factory_lock = threading.Lock()


def _detector(seed: int):
    global _factory
    from langdetect.detector_factory import PROFILES_DIRECTORY, DetectorFactory

    with _factory_lock:
        if _factory is None:
            # Profiles ship inside the langdetect package (no network).
            factory = DetectorFactory()
            factory.load_profile(PROFILES_DIRECTORY)
            _factory = factory
        _factory.set_seed(seed)
        return _factory.create()


def detection_text(page: Page) -> str:
    return "\n".join(b.text for b in page.blocks if b.kind != CODE).strip()


def detect_text(text: str, params: LanguageParams) -> tuple[str, float | None]:
    """(language, probability) for one text; language is "unknown" when unsure."""
    from langdetect.lang_detect_exception import LangDetectException

    if len(text) < params.min_chars:
        return UNKNOWN, None
    detector = _detector(params.seed)
    detector.append(text)
    try:
        ranked = detector.get_probabilities()
    except LangDetectException:  # no letters langdetect knows (digits, symbols only)
        return UNKNOWN, None
    if not ranked:
        return UNKNOWN, None
    top = ranked[0]
    if top.prob < params.min_probability:
        return UNKNOWN, float(top.prob)
    return top.lang, float(top.prob)


def document_language(weights: dict[str, int]) -> tuple[str, bool]:
    """(language, mixed) from characters per detected language."""
    known = {lang: n for lang, n in weights.items() if lang != UNKNOWN and n > 0}
    total = sum(known.values())
    if not total:
        return UNKNOWN, False
    # Ties go to the alphabetically first code, so the answer never depends on order.
    ranked = sorted(known.items(), key=lambda item: (-item[1], item[0]))
    mixed = len(ranked) > 1 and ranked[1][1] / total >= MIXED_SHARE
    return ranked[0][0], mixed


def detect_language(pages: list[Page], params: LanguageParams, ctx=None) -> list[Page]:
    """Page step: language per page, document language on every page."""
    results = []
    weights: dict[str, int] = defaultdict(int)
    for page in pages:
        text = detection_text(page)
        lang, prob = detect_text(text, params)
        results.append((lang, prob))
        weights[lang] += len(text)
    doc_lang, doc_mixed = document_language(weights)

    kept = sorted(set(params.keep))
    out = []
    for page, (lang, prob) in zip(pages, results):
        new = Page(
            locator=page.locator,
            page=page.page,
            blocks=[replace(b) for b in page.blocks],
            title=page.title,
            format=page.format,
            language=lang,
            language_prob=prob,
            parents=[page.locator],
            payload={"doc_language": doc_lang, "doc_mixed": doc_mixed},
        )
        if kept and lang != UNKNOWN and lang not in kept:
            new.drop(f"language {lang} not in kept languages [{', '.join(params.keep)}]")
        out.append(new)
    return out


LANGUAGE = StepSpec(
    name="language",
    version="1",
    consumes="pages",
    produces="pages",
    scope="document",
    params=LanguageParams,
    run=detect_language,
    summary="language per page (langdetect, fixed seed) and per document",
)
