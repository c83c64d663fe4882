"""The personal-data step against published examples, and its precision on real text.

Sources, named beside each check. Values marked "from memory" were written down
from the named publication without a copy at hand; the check digits make a wrong
one fail loudly (the step reports only numbers whose check passes).
"""

from __future__ import annotations

import glob
import subprocess
import warnings
from collections import Counter
from pathlib import Path

import phonenumbers
import pytest
from bs4 import BeautifulSoup, XMLParsedAsHTMLWarning

from thresher.steps.personal import (PersonalParams, _digit_count, _phone_findings, _phones, card_issuer_ok,
                                     find, find_personal, marker)
from thresher.steps.units import Chunk

GB = PersonalParams(region="GB", countries=["fi", "se", "nl", "no"])


def _kinds(text: str, params: PersonalParams = GB) -> list[tuple[str, str]]:
    return [(k, text[s:e]) for k, s, e in find(text, params)]


# Example IBANs: the IBAN registry (SWIFT, "IBAN Registry", one example per country;
# from memory) and ISO 13616-1's example (GB82 WEST...; from memory).
REGISTRY_IBANS = [
    "GB29 NWBK 6016 1331 9268 19",
    "DE89 3704 0044 0532 0130 00",
    "FR14 2004 1010 0505 0001 3M02 606",
    "NL91 ABNA 0417 1643 00",
    "BE68 5390 0754 7034",
    "CH93 0076 2011 6238 5295 7",
    "GB82 WEST 1234 5698 7654 32",  # ISO 13616-1
]


@pytest.mark.parametrize("iban", REGISTRY_IBANS)
def test_registry_ibans_are_found_whole_in_a_sentence(iban):
    text = f"Please pay the refund to {iban} by Friday."
    assert _kinds(text) == [("iban", iban)]
    # One wrong digit breaks the mod-97 check: no bank kind at all.
    broken = iban[:-1] + str((int(iban[-1]) + 1) % 10)
    assert [k for k, _ in _kinds(f"Account {broken} closed.")] == []


# Card numbers the networks and processors publish for testing (Visa, Mastercard,
# American Express, Discover, JCB and Diners test numbers as listed in payment
# processors' public test-card tables; from memory).
TEST_CARDS = ["4111 1111 1111 1111", "4012888888881881", "5555 5555 5555 4444", "5105-1051-0510-5100",
              "378282246310005", "371449635398431", "6011111111111117", "6011 0009 9013 9424",
              "3530111333300000", "3566002020360505", "30569309025904", "38520000023237"]


@pytest.mark.parametrize("card", TEST_CARDS)
def test_published_test_cards_are_found(card):
    assert _kinds(f"Card on file: {card}, expires soon.") == [("card", card)]


def test_luhn_alone_is_not_a_card():
    # Passes Luhn (common practice check: 0000000000000000 and 7992739871-style strings)
    # but lies in no issuer range or length.
    assert not card_issuer_ok("9999999999999995")
    assert _kinds("Record 9999 9999 9999 9995 archived.") == []
    # A Visa-range number whose Luhn check fails.
    assert _kinds("Ref 4111 1111 1111 1112.") == []


@pytest.mark.parametrize("region", ["GB", "DE", "FR", "US", "NL"])
def test_the_libraries_example_numbers_are_found(region):
    # Reference: phonenumbers' own example number per region (its metadata, from
    # Google's libphonenumber), written both ways a person would.
    number = phonenumbers.example_number(region)
    intl = phonenumbers.format_number(number, phonenumbers.PhoneNumberFormat.INTERNATIONAL)
    national = phonenumbers.format_number(number, phonenumbers.PhoneNumberFormat.NATIONAL)
    params = PersonalParams(region=region)
    assert _kinds(f"Call the desk on {intl} after ten.", params) == [("phone", intl)]
    assert _kinds(f"Call the desk on {national} after ten.", params) == [("phone", national)]


def test_skipping_the_phone_matcher_loses_no_number():
    # The step skips phonenumbers' matcher on text with fewer than six digits, and on
    # text with no plus sign when no region is set; the matcher run on every text is the
    # reference. Texts: phonenumbers' example number for every region it supports (its
    # metadata, from Google's libphonenumber), written in international form with an
    # ASCII and a full-width plus sign and in national form, and short texts below six
    # digits; each judged without a region and with the number's own.
    checked = found = 0
    for region in sorted(phonenumbers.SUPPORTED_REGIONS):
        number = phonenumbers.example_number(region)
        if number is None:
            continue
        intl = phonenumbers.format_number(number, phonenumbers.PhoneNumberFormat.INTERNATIONAL)
        national = phonenumbers.format_number(number, phonenumbers.PhoneNumberFormat.NATIONAL)
        texts = [f"Call the desk on {intl} after ten.", f"Call the desk on {intl.replace('+', '＋')}.",
                 f"Call the desk on {national} after ten.", f"Room {national[:4]}, desk 5."]
        for text in texts:
            for judged_in in (None, region):
                want = _phone_findings(text, judged_in)
                assert _phones(text, judged_in, _digit_count(text)) == want, (region, text, judged_in)
                checked += 1
                found += bool(want)
    # Most regions' numbers are found, written either way (a few regions' example
    # numbers are too short for the step's six-digit rule).
    assert checked > 1500 and found > 700


# National IDs with check digits, from the issuing authorities' published examples
# (from memory): Finland's personal identity code as the Digital and Population Data
# Services Agency explains it (131052-308T); Sweden's personnummer as Skatteverket's
# leaflet shows it (811218-9876); the Netherlands' BSN test number the government's
# test environments use (111222333, eleven-test).
@pytest.mark.parametrize("value", ["131052-308T", "811218-9876", "111222333"])
def test_national_ids_of_named_countries(value):
    assert _kinds(f"Identity number {value} on the form.") == [("national_id", value)]
    # Not looked for unless the definition names the country.
    assert [k for k, _ in _kinds(f"Identity number {value} on the form.", PersonalParams())] == []


def test_emails_and_ips():
    # RFC 2606 reserves example.org; RFC 5737 and RFC 3849 the documentation addresses.
    text = "Write to desk.clerk@example.org or log in from 192.0.2.14 or 2001:db8::8a2e:370:7334 today."
    assert _kinds(text) == [("email", "desk.clerk@example.org"), ("ip", "192.0.2.14"),
                            ("ip", "2001:db8::8a2e:370:7334")]


def test_the_shortest_addresses_are_found():
    # The step looks for an "@", four digits and three dots, or two colons with at most
    # four hex digits between them, before running each pattern; the shortest forms
    # must still be found. RFC 4291 writes the link-local prefix as fe80::/10.
    assert _kinds("Mail x@example.org now") == [("email", "x@example.org")]
    assert _kinds("Ping 1.2.3.4 now") == [("ip", "1.2.3.4")]
    assert _kinds("Ping fe80::1 now") == [("ip", "fe80::1")]


def test_versions_dates_isbns_and_numbers_are_not_phones_or_cards():
    # Common practice list of look-alikes; none may be reported.
    text = ("Version 2.4.1-3 ships on 2024-01-15; see ISBN 978-0-306-40615-7 and ISBN 0-306-40615-2, "
            "page 1234 of 2000, order no. 20240115123045, timestamp 2024-01-15T10:30:45Z, "
            "build 20231204.1, serial 4111-1111 1111-1111, release 10.0.19045.3803.")
    found = _kinds(text)
    assert [f for f in found if f[0] in ("phone", "card", "iban", "bank_account", "national_id")] == []


@pytest.mark.parametrize("region,text", [
    ("US", "Order 2024011512 shipped."),  # a bare run of digits: an order number
    ("US", "Page 2125550123 of the log."),
    ("US", "Build 7.0.1.2345678 is current."),  # a version
    ("DE", "Siehe ISBN 0-306-40615-2 im Katalog."),  # ISBN-10 form of the ISBN standard's example
    ("GB", "Ticket #020 7946 0958 closed."),  # an identifier, not a number to call
])
def test_look_alikes_the_phone_library_accepts_are_filtered(region, text):
    # Each of these is a valid number to phonenumbers' matcher on its own (checked
    # when the case was written); the step's look-alike filters must turn it down.
    assert _kinds(text, PersonalParams(region=region)) == []


def _chunk(text: str) -> Chunk:
    return Chunk(locator="chunk/00000", text=text, char_start=10, char_end=10 + len(text))


def test_mask_keeps_lengths_and_drop_names_kinds_only():
    text = "Refund to GB29 NWBK 6016 1331 9268 19, questions to pay.desk@example.org."
    params = PersonalParams(region="GB", policy={"iban": "mask"})
    out = find_personal([_chunk(text)], params, None)[0]
    assert out.ok and len(out.text) == len(text)
    assert "GB29" not in out.text and "pay.desk@example.org" in out.text
    assert out.text[10:37] == marker("iban", 27) and out.text[10:16] == "⟦iban•"
    assert out.payload["personal_counts"] == {"email": 1, "iban": 1}
    assert out.payload["masked"] == 1
    # Offsets point at the value in the original text.
    f = out.payload["personal_findings"][0]
    assert text[f["start"]:f["end"]] == "GB29 NWBK 6016 1331 9268 19"
    dropped = find_personal([_chunk(text)], PersonalParams(policy={"email": "drop", "iban": "drop"}), None)[0]
    assert dropped.status == "dropped"
    assert dropped.reason == "personal data of kind email, iban (policy drop)"
    assert "GB29" not in dropped.reason and "example.org" not in dropped.reason
    kept = find_personal([_chunk(text)], PersonalParams(), None)[0]
    assert kept.text == text and kept.payload["personal_counts"] == {"email": 1, "iban": 1}


def test_unknown_kinds_countries_and_regions_are_refused():
    from pydantic import ValidationError

    with pytest.raises(ValidationError, match="unknown kind"):
        PersonalParams(policy={"passport": "mask"})
    with pytest.raises(ValidationError, match="no check-digit"):
        PersonalParams(countries=["xx"])
    with pytest.raises(ValidationError, match="unknown phone region"):
        PersonalParams(region="QQ")


def debian_manual_texts() -> dict[str, str]:
    """Text of the Debian manuals other reference tests read (poppler's pdftotext)."""
    out = {}
    for pdf in ("/usr/share/doc/shared-mime-info/shared-mime-info-spec.pdf",
                "/usr/share/doc/libtasn1-doc/libtasn1.pdf"):
        if Path(pdf).exists():
            out[pdf] = subprocess.run(["pdftotext", "-layout", pdf, "-"], capture_output=True, text=True,
                                      check=True).stdout
    for html in sorted(glob.glob("/usr/share/doc/libxslt1-dev/**/*.html", recursive=True)):
        with warnings.catch_warnings():  # the libxslt pages are XHTML, read as HTML on purpose
            warnings.simplefilter("ignore", XMLParsedAsHTMLWarning)
            out[html] = BeautifulSoup(Path(html).read_bytes(), "lxml").get_text("\n")
    return out


def test_no_bank_card_id_or_phone_findings_in_the_debian_manuals():
    texts = debian_manual_texts()
    if len(texts) < 3:
        pytest.fail("Debian manuals missing: `make system-deps` installs shared-mime-info, libtasn1-doc, "
                    "libxslt1-dev")
    params = PersonalParams(region="GB", countries=["fi", "se", "nl", "no"])
    kinds: Counter = Counter()
    wrong = []
    for path, text in texts.items():
        for kind, s, e in find(text, params):
            kinds[kind] += 1
            if kind in ("iban", "card", "bank_account", "national_id", "phone"):
                wrong.append((path, kind, text[max(0, s - 20):e + 20]))
    assert wrong == []
    assert sum(len(t) for t in texts.values()) > 500_000
