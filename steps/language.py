"""Detect the language of each page and each block with langdetect, and the document's.

Determinism: langdetect draws random n-gram samples. Each `Detector` copies
`DetectorFactory.seed` when it is created and re-seeds its own `random.Random` with
it at the start of every detection (langdetect 1.0.9, detector.py `_detect_block`),
so with a fixed seed and a fresh detector per text the result depends only on the
text, not on call order or on other pages. Without a seed it seeds from the OS and
results change between runs. We keep a private factory (so nobody else's seed
setting leaks in) and create each detector under a lock with our seed set.

Text used: headings, paragraphs and tables; CODE blocks are left out because program
text says nothing about the language of the prose around it, and so is a block that is
mostly identifiers, commands, options, paths or numbers (`technical`): a synopsis line,
a list of files or of cross-references, a table of figures. Such blocks are not judged
and do not vote for their page's, chunk's or document's language; each page counts them
in `unvoted_blocks`. On translated manual pages (tests/test_language_mixed.py) they
were judged as some language with full confidence ("at.allow(5), at.deny(5), atd(8)"
as English) and outvoted short translated pages.

What is judged, and what "unknown" means:
- A block (heading, paragraph, table) of at least `min_chars` characters is judged:
  its top language, or "unknown" when the top probability is below `min_probability`
  or the text has no letters langdetect knows (the probability is kept when there was
  one). A shorter block, and code, get None: not judged.
- A page whose judged blocks hold at least BLOCKS_COVER_PAGE of its characters takes
  its language from them (`weighted_language`): the language holding most of those
  characters, with the character-weighted mean of the blocks' probabilities for it
  (an unknown block or a block in another language adds 0), "unknown" below
  `min_probability`. Any other page (many short blocks) is judged on its non-code
  text joined, like a block. So the text is read once, not once per block and again
  per page (langdetect costs 2-3 ms per paragraph).
- A chunk: the split step applies `weighted_language` to the blocks it holds, so
  detection and its parameters live here only.
- A page first judged whole with at least `page_certainty` (0.999) for one language
  gives that language to its judged blocks without judging each: most pages are in
  one language, and judging blocks is where this step's time goes. A page with a
  second language in it usually scores lower and has its blocks judged; a short
  passage in another language inside a long page can be missed (then its chunk takes
  the page's language). `page_certainty: 1.0` judges every block.
- Cost: langdetect's time is mostly per call (7 sampling trials), about 1.5 ms per
  block here, so judging blocks costs about ten times judging pages on text of many
  short paragraphs (bench/chunking.py prints the rate). `detect_blocks: false` judges
  pages only; chunks then take their pages' languages. Note that langdetect reads
  only the first 10,000 characters of a text (its max_text_length), so a long page
  judged whole is judged on its start.

Chinese, Japanese and Korean: a text written mostly in their scripts is held to the
languages its scripts allow (kana: Japanese; Hangul: Korean; ideographs alone:
Simplified or Traditional Chinese, judged again between the two), and a language
whose script a text lacks is never named for it (`_by_script`): langdetect alone read
Traditional Chinese as Korean.

Document language: the language holding most characters among the judged text with a
detected language: a page judged whole votes with its characters, a page judged from its
blocks votes with each block's (so a page left "unknown" because it holds two languages
still gives the document both; "unknown" text does not vote). It is called mixed when a second
language holds at least MIXED_SHARE of those characters -- our own choice, so that a
glossary page or a quoted passage does not make a document mixed but a bilingual
document (roughly one part in five or more) does. `doc_languages` gives every detected
language's share of those characters.

Filter: with `keep` set, a page whose detected language is not listed is dropped with
the reason (it stays in the table for audit); "unknown" pages are kept.
"""

from __future__ import annotations

import re
import threading

import numpy as np
from collections import defaultdict
from dataclasses import replace

from pydantic import Field

from .spec import StepParams, StepSpec
from .units import CODE, Page

UNKNOWN = "unknown"
MIXED_SHARE = 0.20
# Share of a page's characters its judged blocks must hold for the page to take its
# language from them (ours: most of the text has then been read once already).
BLOCKS_COVER_PAGE = 0.8
# A block whose technical words (below) hold at least this share of its non-space
# characters does not vote (ours: half, so a sentence that names a command or a path
# still votes, a synopsis or a list of paths does not).
TECHNICAL_SHARE = 0.5
# A technical word: holds a digit or a character prose words do not (paths, options,
# placeholders, markup, operators), starts with an option dash, or joins word parts with
# a dot, parenthesis or colon (at.allow(5), os.path, std::vector), or is camelCase or
# snake_case. Letters with an apostrophe or hyphen inside stay prose (l'été, e-mail).
_TECHNICAL = re.compile(r"[\d/\\_=<>{}\[\]$@#%&|*~^+`]|^[-\u2010-\u2015]|\w[.(:]\w|[a-z][A-Z]")


class LanguageParams(StepParams):
    min_chars: int = Field(40, ge=0)
    min_probability: float = Field(0.80, ge=0.0, le=1.0)
    seed: int = 0
    # Languages to keep (ISO 639-1 as langdetect gives them); empty keeps every page.
    # Pages whose language is "unknown" are always kept: too little text to judge is
    # not evidence of a wrong language.
    keep: list[str] = Field(default_factory=list)
    # Judge each block too (per-chunk languages). Off: pages only, about ten times
    # cheaper on text of many paragraphs, and chunks take their pages' languages.
    detect_blocks: bool = True
    # A page judged whole at least this sure of one language gives it to its blocks
    # without judging each (most pages of a drive are in one language, and judging
    # blocks is where the step's time goes). 1.0 judges the blocks of every page.
    page_certainty: float = Field(0.999, ge=0.0, le=1.0)


_factory = None
_detector_class = None
_factory_lock = threading.Lock()
# langdetect's character normalisation (NGram.normalize) depends on the character
# only, so it is worked out once per distinct character and kept.
_normalized: dict[str, str] = {}


def _fast_detector_class():
    """langdetect's Detector with its per-character and per-draw loops rewritten to give
    the same results faster (langdetect 1.0.9, pinned in pyproject.toml;
    tests/test_language_detector.py checks them against the original). Profiled with cProfile on the bench text and
    on translated manual pages, n-gram extraction (a Python call per character through
    NGram.add_char and NGram.normalize, on up to 10,000 characters) was over half of
    the step's time and the trials' loop (a method call and a 55-language product in
    Python per drawn n-gram) most of the rest."""
    from langdetect.detector import Detector
    from langdetect.utils.ngram import NGram

    normalize = NGram.normalize

    class FastDetector(Detector):
        def _extract_ngrams(self):
            # Detector._extract_ngrams gives, for each space-separated word of the
            # normalised text, n-grams that depend on that word alone (the buffer
            # restarts at every space), so they are worked out once per distinct word
            # and the list is the same, in the same order.
            known = self.word_lang_prob_map
            text = self.text
            missing = set(text).difference(_normalized)
            for ch in missing:
                _normalized[ch] = normalize(ch)
            if len(_word_grams) > WORD_CACHE:
                _word_grams.clear()
            words = text.translate({ord(ch): _normalized[ch] for ch in set(text)}).split(" ")
            result = []
            for k, word in enumerate(words):
                if not word:
                    continue
                # The last word has no space after it unless the text ends with one.
                closed = k < len(words) - 1
                grams = _word_grams.get((word, closed))
                if grams is None:
                    grams = _word_grams[(word, closed)] = _grams(word, closed, known)
                result.extend(grams)
            return result

        def cleaning_text(self):
            # Detector.cleaning_text's two per-character loops as regular expressions:
            # count the characters from "A" to "z" and those from U+0300 up (its test
            # for the Latin Extended Additional block compares the block's number with
            # a name, so it never holds), and when the first are under half the
            # second, drop the first.
            text = self.text
            latin = _LATIN.subn("", text)
            if latin[1] * 2 < len(_FROM_U0300.findall(text)):
                self.text = latin[0]

        def append(self, text):
            # Detector.append's per-character loop (keep the first max_text_length
            # characters, runs of spaces made one) as one slice and one substitution.
            # A long text is first cut at a space past twice that length: no URL,
            # address or Vietnamese mark the substitutions replace holds a space, so
            # what they make of the part before the cut is the start of what they make
            # of the whole; the whole is read only if that start is too short.
            limit = self.max_text_length
            cut = text.find(" ", 2 * limit) if len(text) > 2 * limit else -1
            if cut > 0:
                head = self._stripped(text[:cut])
                if len(head) >= limit:
                    self.text += _SPACES.sub(" ", head[:limit])
                    return
            self.text += _SPACES.sub(" ", self._stripped(text)[:limit])

        def _stripped(self, text):
            text = self.URL_RE.sub(" ", text)
            text = self.MAIL_RE.sub(" ", text)
            return NGram.normalize_vi(text)

        def _detect_block(self):
            # Detector._detect_block with its update and normalisation inlined: the same
            # random draws and the same floating-point operations in the same order.
            from langdetect.lang_detect_exception import ErrorCode, LangDetectException

            self.cleaning_text()
            ngrams = self._extract_ngrams()
            if not ngrams:
                raise LangDetectException(ErrorCode.CantDetectError, "No features in text.")
            table = self.word_lang_prob_map
            n_langs = len(self.langlist)
            self.langprob = [0.0] * n_langs
            rand = self.random
            rand.seed(self.seed)
            # random.choice(ngrams) as CPython draws it (Random._randbelow with
            # getrandbits: k bits, drawn again while the number is out of range),
            # without its two calls per draw.
            getrandbits, n_grams = rand.getrandbits, len(ngrams)
            bits = n_grams.bit_length()
            exact = rand._randbelow == rand._randbelow_with_getrandbits
            choice = rand.choice
            conv, limit = self.CONV_THRESHOLD, self.ITERATION_LIMIT
            rows = _rows
            if len(rows) > ROW_CACHE:
                rows.clear()
            step = np.empty(n_langs)
            add, multiply = np.add, np.multiply
            for _ in range(self.n_trial):
                prob = np.array(self._init_probability())
                alpha = self.alpha + rand.gauss(0.0, 1.0) * self.ALPHA_WIDTH
                weight = alpha / self.BASE_FREQ
                i = 0
                while True:
                    if exact:
                        r = getrandbits(bits)
                        while r >= n_grams:
                            r = getrandbits(bits)
                        word = ngrams[r]
                    else:
                        word = choice(ngrams)
                    row = rows.get(word)
                    if row is None:
                        listed = table.get(word)
                        if listed is not None:
                            row = rows[word] = np.array(listed)
                    if row is not None:
                        # Element by element the same two operations as the original
                        # (weight + row, then prob times that), into a kept array.
                        add(row, weight, out=step)
                        multiply(prob, step, out=prob)
                    if i % 5 == 0:
                        # Python's own sum, as the original: numpy's sum adds pairwise.
                        prob /= sum(prob.tolist())
                        if prob.max() > conv or i >= limit:
                            break
                    i += 1
                self.langprob = [lp + p / self.n_trial
                                 for lp, p in zip(self.langprob, prob.tolist())]

    return FastDetector


# Distinct words kept with their n-grams; emptied when it grows past this (ours: a few
# tens of MB at most).
WORD_CACHE = 200_000
_word_grams: dict[tuple[str, bool], tuple[str, ...]] = {}
_SPACES = re.compile(" {2,}")
_LATIN = re.compile("[A-z]")
_FROM_U0300 = re.compile("[\u0300-\U0010ffff]")
# Profile rows (one probability per language) of n-grams drawn, as numpy arrays;
# emptied past this many (ours: 55 languages x 8 bytes, so at most about 20 MB).
ROW_CACHE = 50_000
_rows: dict = {}


def _grams(word: str, closed: bool, known) -> tuple[str, ...]:
    """langdetect's n-grams of one normalised word (NGram.add_char and
    Detector._extract_ngrams, langdetect 1.0.9), with those of the space after it when
    `closed`."""
    out = []
    grams, capital = " ", False
    for c in word + (" " if closed else ""):
        last = grams[-1]
        if len(grams) >= 3:
            grams = grams[1:]
        grams += c
        capital = c.isupper() and (capital or last.isupper())
        if capital:
            continue
        if c != " " and c in known:
            out.append(c)
        w = grams[-2:]
        if w in known:
            out.append(w)
        if len(grams) >= 3 and grams in known:
            out.append(grams)
    return tuple(out)


def _detector(seed: int):
    global _factory, _detector_class
    from langdetect.detector_factory import PROFILES_DIRECTORY, DetectorFactory

    with _factory_lock:
        if _factory is None:
            # Profiles ship inside the langdetect package (no network).
            factory = DetectorFactory()
            factory.load_profile(PROFILES_DIRECTORY)
            _detector_class = _fast_detector_class()
            _factory = factory
        _factory.set_seed(seed)
        return _detector_class(_factory)


# Scripts written without spaces between words (Thai, Lao, Myanmar, Khmer, CJK, kana,
# Yi, Hangul, full-width forms): a "word" there is a whole phrase, so only its other
# characters can be technical ("设置(locale)" is Chinese prose naming a term).
_UNSPACED = re.compile("[\u0e00-\u0eff\u1000-\u109f\u1780-\u17ff\u2e80-\u9fff"
                       "\ua000-\ua4cf\uac00-\ud7af\uf900-\ufaff\uff00-\uffef]")


def technical(text: str) -> bool:
    """Is the text mostly identifiers, commands, options, paths or numbers?"""
    words = text.split()
    if not words:
        return False
    tech = sum(len(w) - len(_UNSPACED.findall(w)) for w in words if _TECHNICAL.search(w))
    return tech >= TECHNICAL_SHARE * sum(len(w) for w in words)


def _votes(block) -> bool:
    return block.kind != CODE and not technical(block.text)


def detection_text(page: Page, votes: list[bool] | None = None) -> str:
    if votes is None:
        votes = [_votes(b) for b in page.blocks]
    return "\n".join(b.text for b, v in zip(page.blocks, votes) if v).strip()


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
    top = _by_script(text, ranked, params.seed)
    if top is None:
        return UNKNOWN, None
    if top.prob < params.min_probability:
        return UNKNOWN, float(top.prob)
    return top.lang, float(top.prob)


# Chinese, Japanese and Korean by their writing systems (Unicode blocks): Han
# ideographs (with the extension blocks and compatibility ideographs), Japanese kana
# (with the phonetic extensions and half-width katakana), Korean Hangul (syllables,
# jamo and compatibility jamo).
_HAN = "\u3400-\u4dbf\u4e00-\u9fff\uf900-\ufaff\U00020000-\U0003134f"
_KANA = "\u3040-\u30ff\u31f0-\u31ff\uff66-\uff9f"
_HANGUL = "\u1100-\u11ff\u3130-\u318f\uac00-\ud7a3"
_CJK = re.compile(f"[{_HAN}{_KANA}{_HANGUL}]")
_SCRIPTS = {"han": re.compile(f"[{_HAN}]"), "kana": re.compile(f"[{_KANA}]"), "hangul": re.compile(f"[{_HANGUL}]")}
_LETTER = re.compile(r"[^\W\d_]")
# The script a language's text cannot do without.
_NEEDS = {"ja": "kana", "ko": "hangul", "zh-cn": "han", "zh-tw": "han"}
# Share of a text's CJK characters in kana (or Hangul) that makes it Japanese (or
# Korean): Japanese prose writes its grammar in kana, Korean is written in Hangul with
# few ideographs, and Chinese has neither (our rule of thumb; a kanji-only heading is
# read as Chinese).
SCRIPT_SHARE = 0.05


def _by_script(text: str, ranked: list, seed: int):
    """langdetect's ranking held to what the text's writing system allows; None when
    nothing it ranked is allowed.

    langdetect 1.0.9 reads Traditional Chinese as Korean (with Hangul absent) and
    Chinese mixed with Latin identifiers as Vietnamese or as an even split between
    Korean and Chinese: on Debian's Traditional Chinese message catalogues it named
    Korean on 108 of 153 pages and Chinese on none (a scratch count over every
    catalogue here; tests/test_language_cjk.py checks the rule on them). So a
    text written mostly in CJK scripts (at least half as many of those characters as
    of other letters: an ideograph stands for a word) is judged again among the
    languages its scripts allow (Japanese with kana, Korean with Hangul, else
    Chinese: Simplified or Traditional, which langdetect's two profiles tell apart
    well once nothing else competes); in any other text a language whose script is
    absent is passed over."""
    counts = {name: 0 for name in _SCRIPTS}
    if _CJK.search(text):
        counts = {name: len(pattern.findall(text)) for name, pattern in _SCRIPTS.items()}
    cjk = sum(counts.values())
    if cjk and 2 * cjk >= len(_LETTER.findall(text)) - cjk:
        if counts["kana"] >= SCRIPT_SHARE * cjk:
            allowed = ("ja",)
        elif counts["hangul"] >= SCRIPT_SHARE * cjk:
            allowed = ("ko",)
        else:
            allowed = ("zh-cn", "zh-tw")
        if all(c.lang in allowed for c in ranked):  # langdetect lists those above 0.1
            return ranked[0]
        detector = _detector(seed)
        detector.set_prior_map({lang: 1.0 / len(allowed) for lang in allowed})
        detector.append(text)
        return detector.get_probabilities()[0]
    for candidate in ranked:
        need = _NEEDS.get(candidate.lang)
        if need is None or counts[need]:
            return candidate
    return None


def weighted_language(parts) -> tuple[str | None, float | None]:
    """(language, probability) of a text made of parts, each (language, probability,
    characters) as judged on its own: the language holding most characters among parts
    with a detected language (ties: alphabetically first), and the character-weighted
    mean probability for it, where a part in another language or "unknown" adds 0.
    (None, None) when no part has a detected language."""
    votes: dict[str, int] = {}
    mass: dict[str, float] = {}
    total = 0
    for lang, prob, chars in parts:
        if lang is None or chars <= 0:
            continue
        total += chars
        if lang != UNKNOWN:
            votes[lang] = votes.get(lang, 0) + chars
            mass[lang] = mass.get(lang, 0.0) + chars * (prob or 0.0)
    if not votes:
        return None, None
    best = min(votes, key=lambda code: (-votes[code], code))
    return best, mass[best] / total


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


def language_shares(weights: dict[str, int]) -> dict[str, float]:
    """Each detected language's share of the characters with a detected language."""
    known = {lang: n for lang, n in weights.items() if lang != UNKNOWN and n > 0}
    total = sum(known.values())
    return {lang: n / total for lang, n in sorted(known.items())} if total else {}


def _judged_blocks(page: Page, params: LanguageParams, votes: list[bool]) -> list[int]:
    return [i for i, (b, v) in enumerate(zip(page.blocks, votes))
            if v and len(b.text.strip()) >= params.min_chars]


def detect_language(pages: list[Page], params: LanguageParams, ctx=None) -> list[Page]:
    """Page step: language per page and per block, document language on every page."""
    results = []
    weights: dict[str, int] = defaultdict(int)
    unvoted = []
    for page in pages:
        # technical() is worked out once per block (it was a sixth of the step's time
        # when asked three times).
        tech = [b.kind != CODE and technical(b.text) for b in page.blocks]
        votes = [b.kind != CODE and not t for b, t in zip(page.blocks, tech)]
        unvoted.append(sum(tech))
        text = detection_text(page, votes)
        blocks = [replace(b, language=None, language_prob=None) for b in page.blocks]
        judged = _judged_blocks(page, params, votes) if params.detect_blocks else []
        if judged and params.page_certainty < 1.0:
            p_lang, p_prob = detect_text(text, params)
            if p_lang != UNKNOWN and p_prob is not None and p_prob >= params.page_certainty:
                for i in judged:  # a page this sure of one language: its blocks share it
                    blocks[i] = replace(blocks[i], language=p_lang, language_prob=p_prob)
                results.append((p_lang, p_prob, blocks))
                weights[p_lang] += len(text)
                continue
        covered = 0
        for i in judged:
            b_lang, b_prob = detect_text(page.blocks[i].text.strip(), params)
            blocks[i] = replace(blocks[i], language=b_lang, language_prob=b_prob)
            covered += len(page.blocks[i].text)
        if text and covered >= BLOCKS_COVER_PAGE * len(text):
            lang, prob = weighted_language((b.language, b.language_prob, len(b.text))
                                           for b in blocks)
            if lang is None:
                lang = UNKNOWN
            elif prob < params.min_probability:
                lang = UNKNOWN
            for b in blocks:  # the blocks vote for the document, each with its language
                if b.language is not None:
                    weights[b.language] += len(b.text)
        else:
            lang, prob = detect_text(text, params)
            weights[lang] += len(text)
        results.append((lang, prob, blocks))
    doc_lang, doc_mixed = document_language(weights)
    shares = language_shares(weights)

    kept = sorted(set(params.keep))
    out = []
    for page, (lang, prob, blocks), n_unvoted in zip(pages, results, unvoted):
        new = Page(
            locator=page.locator,
            page=page.page,
            blocks=blocks,
            title=page.title,
            format=page.format,
            language=lang,
            language_prob=prob,
            parents=[page.locator],
            payload={"doc_language": doc_lang, "doc_mixed": doc_mixed,
                     "doc_languages": dict(shares),
                     "unvoted_blocks": n_unvoted},
        )
        if kept and lang != UNKNOWN and lang not in kept:
            new.drop(f"language {lang} not in kept languages [{', '.join(params.keep)}]")
        out.append(new)
    return out


LANGUAGE = StepSpec(
    name="language",
    version="6",
    consumes="pages",
    produces="pages",
    scope="document",
    params=LanguageParams,
    run=detect_language,
    summary="language per page and per block (langdetect, fixed seed) and per document",
)
