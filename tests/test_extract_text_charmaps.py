"""Legacy single-byte text files decoded as the C library's charmaps say they should be.

Outside reference: glibc's charmap files as Debian ships them (package locales,
/usr/share/i18n/charmaps/CP1252.gz, KOI8-R.gz, ISO-8859-1.gz, CP1250.gz, CP1254.gz): each maps byte values
to Unicode code points ("<U20AC> /x80 EURO SIGN"). The expected text is built from
those tables byte by byte, not from Python's codecs, so both the detection of the
encoding and the decoding are checked. The sample sentences are our own.
"""

from __future__ import annotations

import gzip
import re
from pathlib import Path

import pytest

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import OK, Source

CHARMAPS = Path("/usr/share/i18n/charmaps")
_LINE = re.compile(r"^<U([0-9A-F]{4,6})>\s+/x([0-9a-f]{2})\s", re.MULTILINE)


def charmap(name: str) -> dict[int, str]:
    path = CHARMAPS / f"{name}.gz"
    if not path.exists():
        pytest.fail(f"needs glibc's charmap {name} (Debian package locales): run `make system-deps`")
    text = gzip.decompress(path.read_bytes()).decode("ascii", "replace")
    table = {int(b, 16): chr(int(u, 16)) for u, b in _LINE.findall(text)}
    assert len(table) >= 200, name
    return table


SAMPLES = {
    # Curly quotes, dashes and the euro sign sit in 0x80-0x9F, where CP1252 differs
    # from ISO-8859-1.
    "CP1252": ("\u201cThe reading room\u201d reopens on Monday \u2013 bring your card. The "
               "replacement fee is \u20ac2.50 \u2014 members\u2019 guests pay the same.\n\n"
               "Caf\u00e9 corner: tea \u20ac1, coffee \u20ac1.50; \u201cquiet hour\u201d from "
               "three until four \u2026 please keep phones silent.\n"),
    "KOI8-R": ("\u0427\u0438\u0442\u0430\u043b\u044c\u043d\u044b\u0439 \u0437\u0430\u043b "
               "\u0437\u0430\u043a\u0440\u044b\u0442 \u0434\u043e \u043f\u043e\u043d\u0435"
               "\u0434\u0435\u043b\u044c\u043d\u0438\u043a\u0430. \u041a\u043d\u0438\u0433"
               "\u0438 \u043c\u043e\u0436\u043d\u043e \u0432\u0435\u0440\u043d\u0443\u0442"
               "\u044c \u0432 \u043b\u044e\u0431\u043e\u0439 \u0444\u0438\u043b\u0438\u0430"
               "\u043b \u0431\u0438\u0431\u043b\u0438\u043e\u0442\u0435\u043a\u0438.\n\n"
               "\u0421\u043f\u0430\u0441\u0438\u0431\u043e \u0437\u0430 \u0442\u0435\u0440"
               "\u043f\u0435\u043d\u0438\u0435 \u0438 \u0434\u043e \u0432\u0441\u0442\u0440"
               "\u0435\u0447\u0438 \u0432 \u043d\u043e\u0432\u043e\u043c \u0437\u0430\u043b"
               "\u0435.\n"),
    "ISO-8859-1": ("La biblioth\u00e8que de la coop\u00e9rative rouvre lundi. \u00c0 c\u00f4t\u00e9 "
                   "de la fen\u00eatre, les p\u00e9riodiques restent \u00e0 disposition.\n\n"
                   "Merci de votre patience ; le caf\u00e9 du hall est ouvert d\u00e8s neuf "
                   "heures.\n"),
    # Czech in the Central European code page: its letters also read as (wrong)
    # Western ones in CP1252, so the detector's word must win here.
    "CP1250": ("\u010c\u00edt\u00e1rna dru\u017estevn\u00ed knihovny je zav\u0159en\u00e1 do "
               "pond\u011bl\u00ed. Knihy m\u016f\u017eete vr\u00e1tit v kter\u00e9koli "
               "pobo\u010dce, d\u011bkujeme za trp\u011blivost a t\u011b\u0161\u00edme se na "
               "shledanou v nov\u00e9 \u010d\u00edt\u00e1rn\u011b.\n"),
    # Turkish: the dotless i, s and g with cedilla and breve sit where CP1252 has
    # Icelandic letters, so read as CP1252 it looks like Western European prose.
    "CP1254": ("Okuma salonu pazartesiye kadar kapal\u0131. Kitaplar\u0131 herhangi bir "
               "\u015fubeye iade edebilirsiniz; sabr\u0131n\u0131z i\u00e7in "
               "te\u015fekk\u00fcr ederiz.\n\n\u00c7ay oca\u011f\u0131 her sabah dokuzda "
               "a\u00e7\u0131l\u0131r; \u0130kinci kattaki toplant\u0131 odas\u0131 "
               "a\u011fustos boyunca kapal\u0131 kalacak.\n"),
    # Icelandic in CP1252: the same byte values as Turkish letters above, with the
    # accented vowels Turkish does not write; it must stay CP1252.
    "CP1252-is": ("Lesstofan er loku\u00f0 fram \u00e1 m\u00e1nudag. \u00de\u00fa getur "
                  "skila\u00f0 b\u00f3kum \u00ed hva\u00f0a \u00fatib\u00fa sem er; "
                  "\u00fe\u00f6kkum \u00feolinm\u00e6\u00f0ina og sj\u00e1umst \u00ed "
                  "n\u00fdju lesstofunni.\n"),
}
CODECS = {"CP1252": "cp1252", "KOI8-R": "koi8-r", "ISO-8859-1": "latin-1", "CP1250": "cp1250", "CP1254": "cp1254",
          "CP1252-is": "cp1252"}


@pytest.mark.parametrize("name", sorted(SAMPLES))
def test_legacy_text_decodes_as_the_charmap_says(name):
    table = charmap(name.split("-is")[0])
    data = SAMPLES[name].encode(CODECS[name])
    expected = "".join(table.get(b, chr(b)) if b >= 0x80 else chr(b) for b in data)
    source = Source(doc_id="d", source_path="notices/notice.txt", data=data, size=len(data), mtime=0.0)
    (page,) = extract(source, ExtractParams(), StepContext())
    assert page.status == OK, page.reason
    assert page.text == "\n\n".join(p.strip() for p in expected.strip().split("\n\n"))
    assert page.payload["unprintable_share"] == 0.0
    assert not any("invalid byte" in w for w in page.warnings)
