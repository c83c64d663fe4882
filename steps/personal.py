"""Find personal data in chunk text; record it, and mask or drop by kind.

Kinds: email, phone, iban, bank_account, card, national_id, ip. Values are never
kept: a chunk records the kinds and counts, and per finding its kind and char span
in the chunk text (`personal_findings`), from which `thresher trail` finds the page.

Why a chunk step between split and dedup: the policies act on chunks (a dropped
chunk is a chunk, and an index filters chunks), masking changes only this stage's
text so every earlier stage keeps the original for audit, and dedup and tokens then
see the text the index will get. A value cut in two by a chunk border is not found
(chunks break at sentence, line or block boundaries, which values rarely span).

Masking keeps the length: the marker "⟦kind⟧" is padded with "•" to the value's
length, so the chunk's char spans and every finding's offsets stay true for the
masked text (a value shorter than the marker keeps a shortened kind name).

Precision (see DEVELOPERS.md for the measured rate on real text): numbers with a
check digit (IBAN mod 97, card Luhn, national IDs) are reported only when the check
passes; a card also needs a known issuer range and length; a phone number must be
valid for its region (phonenumbers) and be written like one (a leading + or 0 or a
bracket, or separated groups), not be an ISBN, a date, a version or part of a
longer run of digits and dots.
"""

from __future__ import annotations

import ipaddress
import re
from dataclasses import replace
from typing import Literal

from pydantic import Field, field_validator

from .spec import StepParams, StepSpec
from .units import Chunk

KINDS = ("email", "phone", "iban", "bank_account", "card", "national_id", "ip")
# When findings overlap, the earlier kind in this order wins (an IBAN holds digits a
# phone pattern could match; an e-mail address can hold digits too).
_PRIORITY = {k: i for i, k in enumerate(("email", "iban", "card", "national_id", "bank_account", "phone", "ip"))}

Policy = Literal["keep", "mask", "drop"]

# National identification numbers with a check digit, per country code: the
# python-stdnum module that validates them, and what a candidate looks like in text.
NATIONAL_IDS: dict[str, tuple[str, str]] = {
    "be": ("stdnum.be.nn", r"\b\d{2}\.?\d{2}\.?\d{2}[-\s]?\d{3}[.\s]?\d{2}\b"),
    "dk": ("stdnum.dk.cpr", r"\b\d{6}-?\d{4}\b"),
    "es": ("stdnum.es.dni", r"\b\d{8}-?[A-Z]\b"),
    "fi": ("stdnum.fi.hetu", r"\b\d{6}[-+A]\d{3}[0-9A-Z]\b"),
    "fr": ("stdnum.fr.nir", r"\b[12]\s?\d{2}\s?\d{2}\s?(?:\d{2}|2A|2B)\s?\d{3}\s?\d{3}\s?\d{2}\b"),
    "gb": ("stdnum.gb.nhs", r"\b\d{3}[ -]?\d{3}[ -]?\d{4}\b"),
    "it": ("stdnum.it.codicefiscale", r"\b[A-Z]{6}\d{2}[A-Z]\d{2}[A-Z]\d{3}[A-Z]\b"),
    "nl": ("stdnum.nl.bsn", r"\b\d{4}\.?\d{2}\.?\d{3}\b"),
    "no": ("stdnum.no.fodselsnummer", r"\b\d{6}\s?\d{5}\b"),
    "pl": ("stdnum.pl.pesel", r"\b\d{11}\b"),
    "se": ("stdnum.se.personnummer", r"\b(?:\d{2})?\d{6}[-+]?\d{4}\b"),
}
# Bank account numbers (besides IBANs) that carry a check digit, per country.
BANK_ACCOUNTS: dict[str, tuple[str, str]] = {
    "no": ("stdnum.no.kontonr", r"\b\d{4}\.?\d{2}\.?\d{5}\b"),
    "nz": ("stdnum.nz.bankaccount", r"\b\d{2}-\d{4}-\d{7}-\d{2,3}\b"),
    "us": ("stdnum.us.rtn", r"\b\d{9}\b"),
}

_EMAIL = re.compile(r"(?<![\w.+-])[A-Za-z0-9][A-Za-z0-9._%+-]*@(?:[A-Za-z0-9](?:[A-Za-z0-9-]*[A-Za-z0-9])?\.)+"
                    r"[A-Za-z]{2,24}(?![\w-])")
_IBAN = re.compile(r"\b[A-Z]{2}\d{2}(?:[ ]?[A-Z0-9]){11,30}")
_CARD = re.compile(r"(?<![\d.,/-])\d(?:[ -]?\d){11,18}(?![\d])")
_IPV4 = re.compile(r"(?<![\w.])(?:\d{1,3}\.){3}\d{1,3}(?![\w.]|\.\d)")
_IPV6 = re.compile(r"(?<![\w:.])(?:[0-9A-Fa-f]{0,4}:){2,7}[0-9A-Fa-f]{0,4}(?![\w:])")
_ISBN = re.compile(r"ISBN(?:-1[03])?:?\s*$", re.I)
# Before a kind's pattern runs over a chunk, a cheap look for what the kind cannot be
# written without (an "@", enough digits, two colons of an IPv6 address): on a
# documentation drive each pattern's run cost as much as the rest of the step, and most
# chunks hold none of these. Text without them cannot match, so nothing is lost.
_DIGIT = re.compile(r"\d")
_IPV6_COLONS = re.compile(r":[0-9A-Fa-f]{0,4}:")


def _digit_count(text: str) -> int:
    """Digits as the patterns' \\d counts them (any script's decimal digits)."""
    if text.isascii():
        return sum(map(text.count, "0123456789"))
    return len(_DIGIT.findall(text))


class PersonalParams(StepParams):
    # Region for phone numbers written without a country code (ISO 3166 alpha-2,
    # e.g. GB); None finds only numbers written with +country code.
    region: str | None = None
    # Countries whose national ID and bank account numbers to look for (ISO 3166
    # alpha-2, lower case), each with a check digit.
    countries: list[str] = Field(default_factory=list)
    # Per kind: keep (record only), mask (replace in the chunk text) or drop (the
    # chunk). Kinds not named are kept.
    policy: dict[str, Policy] = Field(default_factory=dict)

    @field_validator("region")
    @classmethod
    def _region(cls, v: str | None) -> str | None:
        if v is None:
            return v
        import phonenumbers

        if v.upper() not in phonenumbers.SUPPORTED_REGIONS:
            raise ValueError(f"unknown phone region {v!r}; use an ISO 3166 code such as GB or DE")
        return v.upper()

    @field_validator("countries")
    @classmethod
    def _countries(cls, v: list[str]) -> list[str]:
        known = sorted(set(NATIONAL_IDS) | set(BANK_ACCOUNTS))
        bad = [c for c in v if c.lower() not in known]
        if bad:
            raise ValueError(f"no check-digit ID or account numbers known for {', '.join(bad)}; "
                             f"known: {', '.join(known)}")
        return sorted({c.lower() for c in v})

    @field_validator("policy")
    @classmethod
    def _kinds(cls, v: dict[str, str]) -> dict[str, str]:
        bad = [k for k in v if k not in KINDS]
        if bad:
            raise ValueError(f"unknown kind(s) {', '.join(bad)}; kinds are {', '.join(KINDS)}")
        return dict(sorted(v.items()))


Finding = tuple[str, int, int]  # kind, start, end (char offsets in the text)


def _module(name: str):
    import importlib

    return importlib.import_module(name)


def _luhn_ok(digits: str) -> bool:
    total = 0
    for i, ch in enumerate(reversed(digits)):
        d = int(ch)
        if i % 2:
            d = d * 2 - 9 if d > 4 else d * 2
        total += d
    return total % 10 == 0


# Issuer identification ranges and lengths of the major card networks (from memory,
# as the networks publish them; ISO/IEC 7812 assigns the first digits): prefix range
# (inclusive, compared on as many leading digits as the bounds have) -> lengths.
CARD_RANGES: list[tuple[str, str, tuple[int, ...]]] = [
    ("4", "4", (13, 16, 19)),  # Visa
    ("51", "55", (16,)),  # Mastercard
    ("2221", "2720", (16,)),  # Mastercard 2-series
    ("34", "34", (15,)), ("37", "37", (15,)),  # American Express
    ("6011", "6011", (16, 17, 18, 19)), ("644", "649", (16, 17, 18, 19)), ("65", "65", (16, 17, 18, 19)),  # Discover
    ("3528", "3589", (16, 17, 18, 19)),  # JCB
    ("300", "305", (14, 15, 16, 17, 18, 19)), ("36", "36", (14, 15, 16, 17, 18, 19)),  # Diners Club
    ("38", "39", (14, 16, 17, 18, 19)),
    ("62", "62", (16, 17, 18, 19)),  # UnionPay
]


def card_issuer_ok(digits: str) -> bool:
    for low, high, lengths in CARD_RANGES:
        if len(digits) in lengths and low <= digits[:len(low)] <= high:
            return True
    return False


def _emails(text: str) -> list[Finding]:
    if "@" not in text:
        return []
    return [("email", m.start(), m.end()) for m in _EMAIL.finditer(text)]


def _iban_ok(iban, value: str) -> bool:
    # The country's length and format (the IBAN registry's) and the ISO 13616 mod-97
    # check; not stdnum's optional national checks, some of which look up bank codes.
    try:
        iban.validate(value, check_country=False)
        return True
    except Exception:  # noqa: BLE001 - any validation error means "not an IBAN"
        return False


def _ibans(text: str) -> list[Finding]:
    from stdnum import iban

    out = []
    for m in _IBAN.finditer(text):
        raw = m.group(0)
        # The pattern may run into following words or groups: the longest valid prefix
        # ending on a letter or digit is the IBAN (checked: mod 97 and country format).
        for end in range(len(raw), 14, -1):
            if raw[end - 1] == " ":
                continue
            if end < len(raw) and raw[end - 1].isalnum() and raw[end].isalnum():
                continue  # would cut a group in the middle
            if _iban_ok(iban, raw[:end]):
                out.append(("iban", m.start(), m.start() + end))
                break
    return out


def _cards(text: str, digits: int) -> list[Finding]:
    if digits < 12:  # the pattern's shortest card
        return []
    out = []
    for m in _CARD.finditer(text):
        raw = m.group(0)
        digits = raw.replace(" ", "").replace("-", "")
        # Mixed separators ("1234-5678 9012") are not how a card is written.
        if " " in raw and "-" in raw:
            continue
        if _luhn_ok(digits) and card_issuer_ok(digits):
            out.append(("card", m.start(), m.end()))
    return out


def _checked(text: str, kind: str, table: dict[str, tuple[str, str]], countries: list[str]) -> list[Finding]:
    out = []
    for c in countries:
        if c not in table:
            continue
        module_name, pattern = table[c]
        mod = _module(module_name)
        for m in re.finditer(pattern, text):
            try:
                ok = mod.is_valid(m.group(0))
            except Exception:  # noqa: BLE001 - a validator that chokes means "not valid"
                ok = False
            if ok:
                out.append((kind, m.start(), m.end()))
    return out


def _date_like(raw: str) -> bool:
    """A date or time written with separators ("2024-01-15", "15.01.2024", "12:30")."""
    return bool(re.fullmatch(r"\s*\d{1,4}([-./])\d{1,2}\1\d{1,4}\s*", raw) or re.search(r"\d:\d\d", raw))


# Two cheap looks that skip phonenumbers' matcher where it can find nothing this step
# keeps (the matcher was four fifths of the step's time on a documentation drive, with
# no number found): every number kept has at least six digits, and without a region
# phonenumbers parses only a number that starts with one of its plus signs
# (phonenumberutil._PLUS_CHARS: "+" and the full-width "＋").
_PLUS_SIGNS = ("+", "\uff0b")


def _phones(text: str, region: str | None, digits: int) -> list[Finding]:
    if region is None and not any(sign in text for sign in _PLUS_SIGNS):
        return []
    if digits < 6:
        return []
    return _phone_findings(text, region)


def _phone_findings(text: str, region: str | None) -> list[Finding]:
    import phonenumbers
    from phonenumbers import Leniency, PhoneNumberMatcher

    out = []
    for m in PhoneNumberMatcher(text, region or "ZZ", leniency=Leniency.VALID):
        raw = m.raw_string
        start, end = m.start, m.end
        digits = re.sub(r"\D", "", raw)
        before, after = text[max(0, start - 12):start], text[end:end + 2]
        # Written like a phone number: international prefix, trunk 0, brackets, or
        # groups; a bare run of digits is an order, page or record number.
        if not (raw.startswith(("+", "0", "(")) or re.search(r"\d[\s.-]\d", raw)):
            continue
        if _ISBN.search(before) or _date_like(raw):
            continue
        # Part of a longer number, a version ("1.2.3") or an identifier ("v2", "#123").
        if re.search(r"[\w.#/-]$", before) or re.match(r"[.,/-]?\d|\.\w|\w", after):
            continue
        if raw.count(".") >= 2 and not raw.startswith(("+", "0")):
            continue
        if len(digits) < 6 or not phonenumbers.is_valid_number(m.number):
            continue
        out.append(("phone", start, end))
    return out


def _ipv4s(text: str, digits: int) -> list[Finding]:
    if digits < 4 or text.count(".") < 3:  # the shortest address, 1.2.3.4
        return []
    out = []
    for m in _IPV4.finditer(text):
        try:
            ipaddress.IPv4Address(m.group(0))
        except ValueError:
            continue
        out.append(("ip", m.start(), m.end()))
    return out


def _ipv6s(text: str) -> list[Finding]:
    if not _IPV6_COLONS.search(text):
        return []
    out = []
    for m in _IPV6.finditer(text):
        raw = m.group(0)
        if raw.count(":") < 2 or not re.search(r"[0-9A-Fa-f]", raw) or len(raw) < 6:
            continue
        try:
            ipaddress.IPv6Address(raw)
        except ValueError:
            continue
        out.append(("ip", m.start(), m.end()))
    return out


def find(text: str, params: PersonalParams) -> list[Finding]:
    """Every finding in text, overlaps resolved by kind priority, in text order."""
    digits = _digit_count(text)
    found = _emails(text) + _ibans(text) + _cards(text, digits) + _ipv4s(text, digits) + _ipv6s(text)
    found += _checked(text, "national_id", NATIONAL_IDS, params.countries)
    found += _checked(text, "bank_account", BANK_ACCOUNTS, params.countries)
    found += _phones(text, params.region, digits)
    found.sort(key=lambda f: (_PRIORITY[f[0]], f[1]))
    taken: list[Finding] = []
    for f in found:
        if all(f[2] <= t[1] or f[1] >= t[2] for t in taken):
            taken.append(f)
    return sorted(taken, key=lambda f: (f[1], f[2]))


def marker(kind: str, length: int) -> str:
    """A marker of the given length naming the kind: ⟦iban•••••••⟧ (shortened if need be)."""
    if length < 2:
        return "•" * length
    name = kind[:length - 2]
    return "⟦" + name + "•" * (length - 2 - len(name)) + "⟧"


def mask(text: str, findings: list[Finding], kinds: set[str]) -> str:
    parts, pos = [], 0
    for kind, start, end in findings:
        if kind in kinds:
            parts.append(text[pos:start])
            parts.append(marker(kind, end - start))
            pos = end
    parts.append(text[pos:])
    return "".join(parts)


def find_personal(chunks: list[Chunk], params: PersonalParams, ctx) -> list[Chunk]:
    """Chunk step: findings per chunk; the policy masks values or drops chunks."""
    masked_kinds = {k for k, p in params.policy.items() if p == "mask"}
    drop_kinds = {k for k, p in params.policy.items() if p == "drop"}
    out = []
    for chunk in chunks:
        findings = find(chunk.text, params)
        counts: dict[str, int] = {}
        for kind, _, _ in findings:
            counts[kind] = counts.get(kind, 0) + 1
        text = mask(chunk.text, findings, masked_kinds) if masked_kinds & set(counts) else chunk.text
        # A masked text has other tokens: its count is cleared (the tokens step counts it).
        recount = {} if text == chunk.text else {"token_count": None, "encoding": None}
        new = replace(chunk, text=text, parents=[chunk.locator], heading_path=list(chunk.heading_path),
                      **recount,
                      warnings=[], payload={
                          "personal_counts": dict(sorted(counts.items())),
                          "personal_findings": [{"kind": k, "start": s, "end": e} for k, s, e in findings],
                          "masked": sum(n for k, n in counts.items() if k in masked_kinds),
                      })
        dropping = sorted(drop_kinds & set(counts))
        if dropping:
            new.drop(f"personal data of kind {', '.join(dropping)} (policy drop)")
        out.append(new)
    return out


PERSONAL = StepSpec(
    name="personal",
    # 2: a masked chunk's token count is cleared (version 1 carried split's count of the
    # unmasked text over, which the tokens step now reuses).
    version="2",
    consumes="chunks",
    produces="chunks",
    scope="document",
    params=PersonalParams,
    run=find_personal,
    summary="personal data per chunk (kinds, counts, spans); mask or drop by kind",
)
