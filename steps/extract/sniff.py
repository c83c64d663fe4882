"""What a file is, judged by its bytes; and how its text decodes.

The extension only breaks ties (HTML fragment vs text, Markdown vs text) and is
reported in a warning when the content says otherwise. Order of the checks:

1. Signatures: PDF, zip containers (a .docx is a zip with word/document.xml), OLE2
   (legacy Office, or an encrypted Office file), RTF, images (PNG, JPEG, GIF, TIFF,
   BMP, WebP), and common binary formats.
2. Binary test on the first 64 KiB: control bytes (C0 other than tab, line and page
   breaks and ESC, plus DEL; NUL counts) in more than STRAY_CONTROL_LIMIT of the bytes
   mean "not text" (outside UTF-16/32 text). Up to that share they are stray bytes in a
   text file: removed before decoding (they are single bytes in UTF-8 and in every
   ASCII-compatible code page, never part of a longer sequence), counted in
   `control_bytes` and in a warning. Git and grep call a file binary on any NUL in its
   first 8000 bytes (common practice); we do not, because a text file with one stray
   NUL is still text (see STRAY_CONTROL_LIMIT for where the limit comes from).
3. Decoding (see `decode`); text with more than 10 % unprintable characters after
   decoding is not text either.
4. HTML when the text starts like an HTML document (a doctype, html, head or body tag
   first, after any XML declaration and comments), or is named .html/.htm/.xhtml and
   holds markup; Markdown when named .md/.markdown; everything else is plain text.
"""

from __future__ import annotations

import codecs
import io
import re
import zipfile
from dataclasses import dataclass, field

import charset_normalizer


SAMPLE = 64 * 1024


def codec_modules() -> list[str]:
    """The codec modules charset-normalizer may import while it probes legacy bytes.

    A process that imports them ahead (the parser processes' fork server) saves about
    0.2 s on its first legacy-encoded file, time that is not that file's work.
    """
    from charset_normalizer.constant import IANA_SUPPORTED

    return [f"encodings.{name}" for name in IANA_SUPPORTED]

# Stray control bytes a text file may hold, as a share of the first 64 KiB. Measured once
# on a Debian 12 machine (first 64 KiB of each file, a one-off script): of 1,486 text
# files (common-licenses, copyright files, Perl modules, Python sources, /etc *.conf) the
# highest share was 0.03 % (diagnostics.pm: 6 bytes); of the binaries that no signature
# names (300 gettext .mo catalogues, 200 .pyc files, 42 terminfo entries, 23 fonts) the
# lowest was 0.32 % (pydoc topics .pyc), then 4.6 %, 8.4 % (.mo). 0.1 % sits between,
# about three times from each side. tests/test_extract_text.py re-checks it on Debian's
# .mo catalogues, terminfo entries, the pydoc topics .pyc and licence texts, and on a
# UTF-8 stress-test file. A short file
# may hold STRAY_CONTROL_FEW whatever its length: the fewest control bytes among those
# binaries was 28 (the 308-byte terminfo entry "dumb"). Not below STRAY_CONTROL_MIN_BYTES:
# of 100 random 16-byte blobs 65 would then pass as text (17 with no allowance), of 100
# random blobs of 64 bytes 1 (1), of 256 bytes or more none (measured, seeded blobs).
STRAY_CONTROL_LIMIT = 0.001
STRAY_CONTROL_FEW = 4
STRAY_CONTROL_MIN_BYTES = 256
UNPRINTABLE_SHARE_LIMIT = 0.10

# Format names the extension suggests, to warn when the content disagrees.
EXTENSION_FORMATS = {
    "pdf": "pdf",
    "docx": "docx",
    "xlsx": "xlsx",
    "xlsm": "xlsx",
    "xls": "xls",
    "ods": "ods",
    "pptx": "pptx",
    "odp": "odp",
    "odt": "odt",
    "rtf": "rtf",
    "epub": "epub",
    "doc": "doc",
    "ppt": "ppt",
    "html": "html",
    "htm": "html",
    "xhtml": "html",
    "md": "markdown",
    "markdown": "markdown",
    "txt": "text",
    "text": "text",
    "eml": "email",
    "mbox": "mbox",
    "zip": "zip",
    "tar": "tar",
}

# Signatures of binary formats we do not read; the name goes into the reason.
_IMAGE_SIGNATURES = (
    b"\x89PNG\r\n\x1a\n", b"\xff\xd8\xff", b"GIF87a", b"GIF89a", b"II*\x00", b"MM\x00*",
)
_BINARY_SIGNATURES = (
    (b"7z\xbc\xaf\x27\x1c", "7-Zip archive"),
    (b"Rar!\x1a\x07", "RAR archive"),
    (b"\x7fELF", "ELF executable"),
    (b"PAR1", "Parquet file"),
    (b"SQLite format 3\x00", "SQLite database"),
)
# Compressed single files (RFC 1952 gzip; bzip2; the xz format): read as the file inside.
_COMPRESSED_SIGNATURES = (
    (b"\x1f\x8b", "gzip"),
    (b"BZh", "bzip2"),
    (b"\xfd7zXZ\x00", "xz"),
)
_OLE2 = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
# An encrypted .docx/.xlsx is an OLE2 file holding a stream with this name (MS-OFFCRYPTO).
_ENCRYPTION_INFO = "EncryptionInfo".encode("utf-16-le")

# Byte-order marks, longest first (the UTF-32-LE mark starts with the UTF-16-LE one).
_BOMS = (
    (codecs.BOM_UTF32_LE, "utf-32-le"),
    (codecs.BOM_UTF32_BE, "utf-32-be"),
    (codecs.BOM_UTF8, "utf-8"),
    (codecs.BOM_UTF16_LE, "utf-16-le"),
    (codecs.BOM_UTF16_BE, "utf-16-be"),
)

_HTML_START = re.compile(
    r"\A\s*(?:<\?xml[^>]*>\s*)?(?:<!--.*?-->\s*)*(?:<!doctype\s+html|<(?:html|head|body)[\s>/])",
    re.IGNORECASE | re.DOTALL,
)
_ANY_TAG = re.compile(r"</?[a-zA-Z][a-zA-Z0-9-]*(?:\s[^<>]*)?/?>")
_META_CHARSET = re.compile(
    rb"""<meta[^>]+charset\s*=\s*["']?\s*([A-Za-z0-9._:-]+)""", re.IGNORECASE
)

# WHATWG Encoding Standard: these labels decode as windows-1252, and a <meta> that
# names UTF-16 in a file without a BOM means UTF-8 (HTML standard, "prescan").
_WHATWG_LABELS = {
    "iso-8859-1": "cp1252",
    "iso8859-1": "cp1252",
    "latin1": "cp1252",
    "latin-1": "cp1252",
    "l1": "cp1252",
    "ascii": "cp1252",
    "us-ascii": "cp1252",
    "windows-1252": "cp1252",
    "utf-16": "utf-8",
    "utf-16le": "utf-8",
    "utf-16be": "utf-8",
}


# Control characters other than tab and line feed, surrogates, private-use code
# points and U+FFFD (what decoders put where bytes made no sense).
_UNPRINTABLE = re.compile(
    "[\x00-\x08\x0b-\x1f\x7f-\x9f\ud800-\udfff\ue000-\uf8ff"
    "\U000f0000-\U000ffffd\U00100000-\U0010fffd\ufffd]"
)


def unprintable_count(text: str) -> int:
    return len(_UNPRINTABLE.findall(text))


def extension(source_path: str) -> str:
    """The file name's extension, lower case, without the dot ("" if none)."""
    name = re.split(r"[\\/]", source_path)[-1]
    _, dot, ext = name.rpartition(".")
    return ext.lower() if dot else ""


class NotText(Exception):
    """The bytes do not decode to text; the message is the reason's detail."""


@dataclass
class Decoded:
    text: str
    encoding: str
    warnings: list[str] = field(default_factory=list)


@dataclass
class Sniffed:
    """The verdict: a format and, for text formats, the decoded text.

    `reason` is set (and the document fails with it) when the bytes cannot be read.
    """

    format: str = ""
    reason: str = ""
    text: str | None = None
    encoding: str = ""
    warnings: list[str] = field(default_factory=list)
    control_bytes: int = 0  # stray control bytes removed from a text file


def codec_name(name: str) -> str | None:
    """Python's canonical name for an encoding label, or None if it has none."""
    try:
        return codecs.lookup(name).name
    except (LookupError, TypeError):
        return None


def _bom(data: bytes) -> tuple[str, int] | None:
    for mark, name in _BOMS:
        if data.startswith(mark):
            return name, len(mark)
    return None


def _normalise_newlines(text: str) -> str:
    return text.replace("\r\n", "\n").replace("\r", "\n")


def _wide_without_bom(sample: bytes) -> str | None:
    """UTF-32 or UTF-16 text without a BOM, or None.

    Told by where its NULs fall: in UTF-32 the top byte of every four is NUL (the
    next one too for all but the rare characters past U+FFFF); in UTF-16 the high byte
    of every Latin, Greek or Cyrillic character is NUL, while the other side of a pair
    is NUL only for the few characters whose low byte is 00 (U+0100, U+2000, U+3000,
    U+4E00, surrogates such as U+DC00), so a small share there is allowed. The sample
    must then decode without error. A 16-bit or 32-bit binary table can share the NUL
    pattern and decode: sniff's check of the decoded text (unprintable_count) refuses it.
    UTF-16 text with no characters below U+0100 (Chinese, say) has too few NULs to
    tell without a BOM; it is read as binary.
    """
    if len(sample) < 8 or 0 not in sample:  # most text: one scan, not six strided copies
        return None
    quarters = [sample[i::4].count(0) for i in range(4)]
    n4 = len(sample) // 4
    even, odd = sample[0::2].count(0), sample[1::2].count(0)
    half = len(sample) // 2
    candidates = []
    if quarters[3] >= 0.98 * n4 and quarters[2] >= 0.5 * n4 and quarters[0] < 0.9 * n4:
        candidates.append(("utf-32-le", 4))
    if quarters[0] >= 0.98 * n4 and quarters[1] >= 0.5 * n4 and quarters[3] < 0.9 * n4:
        candidates.append(("utf-32-be", 4))
    if odd >= 0.3 * half and even <= 0.05 * odd:
        candidates.append(("utf-16-le", 2))
    if even >= 0.3 * half and odd <= 0.05 * even:
        candidates.append(("utf-16-be", 2))
    for name, width in candidates:
        try:
            codecs.getincrementaldecoder(name)().decode(sample[:len(sample) - len(sample) % width])
        except UnicodeDecodeError:
            continue
        return name
    return None


# C0 controls other than tab, LF, VT, FF, CR, and ESC (used by terminal colours), plus
# DEL: bytes that text does not hold.
_CONTROL_BYTES = bytes(b for b in range(0x20) if b not in (0x09, 0x0A, 0x0B, 0x0C, 0x0D, 0x1B)) + b"\x7f"


def _control_count(sample: bytes) -> int:
    return len(sample) - len(sample.translate(None, _CONTROL_BYTES))


def _strip_controls(data: bytes) -> tuple[bytes, str]:
    """The bytes without control bytes, and what was removed ("" when nothing)."""
    kept = data.translate(None, _CONTROL_BYTES)
    if len(kept) == len(data):
        return data, ""
    counts = {b: data.count(bytes([b])) for b in _CONTROL_BYTES}
    names = ", ".join(f"{n} x {_control_name(b)}" for b, n in counts.items() if n)
    return kept, names


def _control_name(b: int) -> str:
    return {0x00: "NUL", 0x7F: "DEL"}.get(b, f"0x{b:02X}")


def _decode_replacing(data: bytes, encoding: str) -> tuple[str, int]:
    """Decode with U+FFFD for bad bytes; count the bad sequences (not existing U+FFFDs)."""
    text = data.decode(encoding, errors="replace")
    existing = data.count("\ufffd".encode(encoding)) if encoding.startswith("utf") else 0
    return text, max(0, text.count("\ufffd") - existing)


def decode(data: bytes, declared: str | None = None) -> Decoded:
    """Decode text bytes; raises NotText when no encoding fits.

    Order: byte-order mark; UTF-32 or UTF-16 without one (_wide_without_bom);
    a declared charset (HTML <meta>); strict UTF-8; UTF-8 with
    a few bad sequences (when valid multi-byte sequences outnumber the bad ones, the
    file is UTF-8 with damage, not a legacy encoding: our rule of thumb); windows-1254
    when the text reads as Turkish in it (see _turkish_cp1254); windows-1252
    when the text reads as Western European prose in it (see _western_cp1252), unless
    charset-normalizer names a Central European code page and language; else
    charset-normalizer's best guess (legacy single-byte code pages such as KOI8-R).
    Line endings become "\\n".
    """
    warnings: list[str] = []
    bom = _bom(data)
    if bom:
        name, skip = bom
        text, bad = _decode_replacing(data[skip:], name)
        if bad:
            warnings.append(f"{bad} invalid byte sequences replaced (declared {name} by BOM)")
        return Decoded(_normalise_newlines(text), name, warnings)

    utf16 = _wide_without_bom(data[:SAMPLE])
    if utf16:
        text, bad = _decode_replacing(data, utf16)
        if bad:
            warnings.append(f"{bad} invalid byte sequences replaced")
        return Decoded(_normalise_newlines(text), utf16, warnings)

    if declared:
        label = declared.strip().lower()
        name = codec_name(_WHATWG_LABELS.get(label, label))
        if name:
            text, bad = _decode_replacing(data, name)
            if bad:
                warnings.append(
                    f"{bad} invalid byte sequences replaced (declared charset {declared})"
                )
            return Decoded(_normalise_newlines(text), name, warnings)
        warnings.append(f"declared charset {declared!r} is unknown; detected instead")

    try:
        return Decoded(_normalise_newlines(data.decode("utf-8")), "utf-8", warnings)
    except UnicodeDecodeError:
        pass

    text, bad = _decode_replacing(data, "utf-8")
    non_ascii = len(text) - len(text.encode("ascii", "ignore"))
    multibyte = non_ascii - bad
    if multibyte >= bad:
        warnings.append(f"{bad} invalid byte sequences replaced")
        return Decoded(_normalise_newlines(text), "utf-8", warnings)

    turkish = _turkish_cp1254(data)
    if turkish is not None:
        return Decoded(_normalise_newlines(turkish), "cp1254", warnings)
    matches = list(charset_normalizer.from_bytes(data))
    western = _western_cp1252(data)
    if western is not None and not _central_european(matches):
        return Decoded(_normalise_newlines(western), "cp1252", warnings)
    if not matches:
        raise NotText("no text encoding fits the bytes")
    best = matches[0]
    # On a tie (same mess and coherence scores: the bytes cannot tell the code pages
    # apart) take windows-1252, the HTML standard's default legacy encoding for most
    # locales; charset-normalizer would otherwise pick e.g. cp1250 and turn a French
    # "à" into "ŕ".
    for match in matches[1:]:
        if (
            match.encoding == "cp1252"
            and abs(match.chaos - best.chaos) < 1e-9
            and abs(match.coherence - best.coherence) < 1e-9
        ):
            best = match
            break
    name = codec_name(best.encoding) or best.encoding
    return Decoded(_normalise_newlines(str(best)), name, warnings)


# Marks Western European text carries outside ASCII besides letters (cp1252's 0x80-0x9F
# punctuation, and the Latin-1 signs that occur in prose).
_TYPOGRAPHIC = set("\u201c\u201d\u2018\u2019\u201a\u201e\u2013\u2014\u2026\u20ac\u00a3\u00a5"
                   "\u00a9\u00ae\u00b0\u00b1\u00d7\u00f7\u00a7\u00b6\u2022\u00b7\u00ab\u00bb"
                   "\u00a0\u2122\u00bd\u00bc\u00be\u2030\u2020\u2021")
_CENTRAL = {"Czech", "Polish", "Slovak", "Hungarian", "Slovene", "Croatian", "Romanian", "Serbian"}


def _western_cp1252(data: bytes) -> str | None:
    """The text as windows-1252, when it reads like Western European prose; else None.

    Short legacy texts give charset-normalizer too little to tell the Latin code pages
    apart (it read a French Latin-1 note and an English cp1252 note as Baltic cp775).
    windows-1252 is the HTML standard's legacy default for most locales, so it is
    taken when every non-ASCII character it yields is a letter or a typographic mark
    and at most 30 % of the letters are non-ASCII: French, German or Spanish prose
    has a few per cent; text in another script read as cp1252 (KOI8-R Russian, say)
    turns nearly every letter into an accented one. (Our rule of thumb.)
    """
    try:
        text = data.decode("cp1252")
    except UnicodeDecodeError:
        return None  # 0x81, 0x8D, 0x8F, 0x90 or 0x9D: not windows-1252
    non_ascii = [c for c in text if ord(c) > 127]
    if any(not (c.isalpha() or c in _TYPOGRAPHIC) for c in non_ascii):
        return None
    letters = sum(1 for c in text if c.isalpha())
    accented = sum(1 for c in non_ascii if c.isalpha())
    return text if accented <= 0.3 * max(1, letters) else None


# Turkish letters windows-1254 puts where windows-1252 has Icelandic ones (0xD0, 0xDD,
# 0xDE, 0xF0, 0xFD, 0xFE), and the other letters of Turkish outside ASCII.
_TURKISH_ONLY = set("\u011e\u011f\u0130\u0131\u015e\u015f")
_TURKISH = _TURKISH_ONLY | set("\u00e7\u00c7\u00f6\u00d6\u00fc\u00dc\u00e2\u00c2\u00ee\u00ce\u00fb\u00db")


def _turkish_cp1254(data: bytes) -> str | None:
    """The text as windows-1254, when it reads as Turkish there; else None.

    Read as windows-1252, Turkish comes out with Icelandic letters ("yap\u00fdlan" for
    "yap\u0131lan"), every one of them a letter, so it passed for Western European prose,
    and charset-normalizer, given a short text, named other code pages (cp1257
    "Croatian" for a Turkish notice of ours). Taken when at least one non-ASCII
    character in windows-1254 is a letter only Turkish has there and every one is a
    Turkish letter or a typographic mark: Icelandic, which writes \u00f0, \u00fe and
    \u00fd at those bytes, also writes \u00e1, \u00e9, \u00ed, \u00f3, \u00fa and \u00e6,
    which Turkish does not. Our rule of thumb, checked against glibc's CP1254 and
    CP1252 charmaps (tests/test_extract_text_charmaps.py).
    """
    try:
        text = data.decode("cp1254")
    except UnicodeDecodeError:
        return None  # bytes windows-1254 leaves undefined
    non_ascii = [c for c in text if ord(c) > 127]
    if any(c in _TURKISH_ONLY for c in non_ascii) and all(c in _TURKISH or c in _TYPOGRAPHIC for c in non_ascii):
        return text
    return None


def _central_european(matches) -> bool:
    """charset-normalizer is sure of a Central European code page (Czech in cp1250:
    its letters also read as Western ones in cp1252, wrongly)."""
    if not matches:
        return False
    best = matches[0]
    return (codec_name(best.encoding) in ("cp1250", "iso8859-2", "mac-latin2")
            and best.language in _CENTRAL)


def html_declared_charset(data: bytes) -> str | None:
    """The charset a <meta> declares in the first 1024 bytes (the HTML standard's prescan)."""
    found = _META_CHARSET.search(data[:1024])
    return found.group(1).decode("ascii", "replace") if found else None


# OpenDocument mimetypes (the zip's first member, ODF 1.2 part 3, 3.3) and what they are.
ODF_KINDS = {
    "application/vnd.oasis.opendocument.text": "odt",
    "application/vnd.oasis.opendocument.text-template": "odt",
    "application/vnd.oasis.opendocument.spreadsheet": "ods",
    "application/vnd.oasis.opendocument.spreadsheet-template": "ods",
    "application/vnd.oasis.opendocument.presentation": "odp",
    "application/vnd.oasis.opendocument.presentation-template": "odp",
}
EPUB_MIMETYPE = b"application/epub+zip"


def _zip_kind(data: bytes, ext: str) -> Sniffed:
    """An Office or OpenDocument package, an EPUB, or a zip we do not read.

    OOXML is known by its main part (word/document.xml, xl/workbook.xml,
    ppt/presentation.xml), ODF and EPUB by their `mimetype` member. Any other zip is
    an archive of documents, not one document.
    """
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            names = set(archive.namelist())
            mimetype = b""
            if "mimetype" in names:
                mimetype = archive.read("mimetype")[:100].strip()
            encrypted_odf = (mimetype.startswith(b"application/vnd.oasis.opendocument")
                             and "META-INF/manifest.xml" in names
                             and b"encryption-data" in archive.read("META-INF/manifest.xml"))
    except (zipfile.BadZipFile, OSError, EOFError, ValueError, KeyError,
            NotImplementedError, RuntimeError) as exc:
        what = {"docx": "DOCX", "xlsx": "XLSX", "xlsm": "XLSX", "pptx": "PPTX",
                "odt": "OpenDocument", "ods": "OpenDocument", "odp": "OpenDocument",
                "epub": "EPUB"}.get(ext, "zip archive")
        return Sniffed(reason=f"unreadable {what}: {exc}")
    if "word/document.xml" in names:
        return Sniffed(format="docx")
    if "xl/workbook.xml" in names:
        return Sniffed(format="xlsx")
    if "ppt/presentation.xml" in names:
        return Sniffed(format="pptx")
    kind = ODF_KINDS.get(mimetype.decode("ascii", "replace"))
    if kind:
        if encrypted_odf:
            return Sniffed(reason="password protected")
        return Sniffed(format=kind)
    if mimetype.startswith(b"application/vnd.oasis.opendocument"):
        return Sniffed(reason=f"unsupported format: OpenDocument file "
                              f"({mimetype.decode('ascii', 'replace')})")
    if mimetype == EPUB_MIMETYPE:
        return Sniffed(format="epub")
    return Sniffed(format="zip")  # any other zip: an archive whose members are documents


def _utf16(name: str) -> bytes:
    return name.encode("utf-16-le")


# Stream names in an OLE2 compound file's directory (stored as UTF-16LE) that say which
# legacy Office program wrote it ([MS-DOC] 2.1, [MS-XLS] 2.1.2, [MS-PPT] 2.1.1).
_OLE_KINDS = (
    (_utf16("WordDocument"), "doc"),
    (_utf16("PowerPoint Document"), "ppt"),
    # Checked last: a Word or PowerPoint file may embed a workbook.
    (_utf16("Workbook"), "xls"),
    (_utf16("Book\x00"), "xls"),  # Excel 5/95 workbooks
)


def _ole_kind(data: bytes, ext: str) -> Sniffed:
    if _ENCRYPTION_INFO in data or _utf16("EncryptedPackage") in data:
        return Sniffed(reason="password protected")
    for name, kind in _OLE_KINDS:
        if name in data:
            if _legacy_encrypted(data, kind):
                return Sniffed(reason="password protected")
            return Sniffed(format=kind)
    if _utf16("__substg1.0_") in data:  # MAPI property streams ([MS-OXMSG] 2.1)
        return Sniffed(reason="unsupported format: Outlook message (.msg); save it as .eml to have it read")
    if ext in ("doc", "xls", "ppt"):
        return Sniffed(reason=f"unreadable {ext.upper()}: the compound file names no Word, "
                              "Excel or PowerPoint stream (damaged or truncated)")
    return Sniffed(
        reason="unsupported format: OLE2 compound file that is not a Word, Excel or "
               "PowerPoint document"
    )


def _legacy_encrypted(data: bytes, kind: str) -> bool:
    """A .doc, .xls or .ppt encrypted with a password: the Word FIB's fEncrypted bit
    ([MS-DOC] 2.5.2, bit 0x0100 of the flags at offset 10), a FILEPASS record (type
    0x002F) among the records that open an Excel workbook ([MS-XLS] 2.4.117), or
    PowerPoint's EncryptedSummary stream ([MS-PPT] 2.1.3). An unreadable compound
    file is left to the reader to report."""
    if kind == "ppt":
        return _utf16("EncryptedSummary") in data
    import olefile

    try:
        with olefile.OleFileIO(data) as ole:
            if kind == "doc" and ole.exists("WordDocument"):
                fib = ole.openstream("WordDocument").read(12)
                return len(fib) >= 12 and bool(int.from_bytes(fib[10:12], "little") & 0x0100)
            if kind == "xls":
                stream = "Workbook" if ole.exists("Workbook") else "Book"
                if not ole.exists(stream):
                    return False
                head = ole.openstream(stream).read(4096)
                pos = 0
                for _ in range(40):  # FILEPASS follows BOF closely when present
                    if pos + 4 > len(head):
                        break
                    rtype = int.from_bytes(head[pos:pos + 2], "little")
                    size = int.from_bytes(head[pos + 2:pos + 4], "little")
                    if rtype == 0x002F:
                        return True
                    if rtype == 0x0085:  # BOUNDSHEET: past the workbook's opening records
                        break
                    pos += 4 + size
    except Exception:  # olefile raises several kinds for damaged compound files
        return False
    return False


def _webp_or_bmp(data: bytes) -> bool:
    if data[:4] == b"RIFF" and data[8:12] == b"WEBP":
        return True
    # BMP: "BM", then the file size and the pixel offset (little-endian) that fit it.
    if data[:2] == b"BM" and len(data) >= 26:
        size = int.from_bytes(data[2:6], "little")
        offset = int.from_bytes(data[10:14], "little")
        return size == len(data) and 26 <= offset < size
    return False


def sniff(data: bytes, source_path: str) -> Sniffed:
    ext = extension(source_path)
    head = data[:1024]

    if b"%PDF-" in head:
        return _with_extension_note(Sniffed(format="pdf"), ext)
    if data.startswith((b"PK\x03\x04", b"PK\x05\x06")):
        return _with_extension_note(_zip_kind(data, ext), ext)
    if data.startswith(_OLE2):
        return _with_extension_note(_ole_kind(data, ext), ext)
    for magic, fmt in _COMPRESSED_SIGNATURES:
        if data.startswith(magic):
            return Sniffed(format=fmt)
    if data[257:262] == b"ustar":  # POSIX and GNU tar headers (POSIX.1-2001 ustar magic)
        return Sniffed(format="tar")
    mail = _mail_kind(data, ext)
    if mail:
        return Sniffed(format=mail)
    if data.startswith(b"{\\rtf"):
        return _with_extension_note(Sniffed(format="rtf"), ext)
    if data.startswith(_IMAGE_SIGNATURES) or _webp_or_bmp(data):
        return Sniffed(format="image")
    for magic, kind in _BINARY_SIGNATURES:
        if data.startswith(magic):
            return Sniffed(reason=f"not text: {kind} (binary content)")

    sample = data[:SAMPLE]
    declared = None
    stray, stray_warning = 0, ""
    if not _bom(data) and not _wide_without_bom(sample):
        controls = _control_count(sample)
        few = STRAY_CONTROL_FEW if len(sample) >= STRAY_CONTROL_MIN_BYTES else 0
        if controls > max(few, STRAY_CONTROL_LIMIT * len(sample)):
            nuls = sample.count(0)
            what = f"{nuls} NUL bytes and " if nuls else ""
            return Sniffed(reason=f"not text: {what}{controls / len(sample):.1%} of the first {len(sample)} "
                                  "bytes are control bytes (binary content)")
        if controls:
            before = len(data)
            data, names = _strip_controls(data)
            stray = before - len(data)
            stray_warning = (f"{stray} stray control byte(s) removed ({names}): "
                             "too few for binary content")
            sample = data[:SAMPLE]
        if _looks_html(sample.decode("latin-1"), ext):
            declared = html_declared_charset(data)

    try:
        decoded = decode(data, declared)
    except NotText as exc:
        return Sniffed(reason=f"not text: {exc} (binary content)")
    text = decoded.text
    if text:
        share = unprintable_count(text) / len(text)
        if share > UNPRINTABLE_SHARE_LIMIT:
            return Sniffed(
                reason=f"not text: {share:.0%} unprintable characters after decoding as "
                f"{decoded.encoding} (binary content)"
            )

    if _looks_html(text, ext):
        fmt = "html"
    elif ext in ("md", "markdown"):
        fmt = "markdown"
    else:
        fmt = "text"
    warnings = ([stray_warning] if stray_warning else []) + decoded.warnings
    found = Sniffed(format=fmt, text=text, encoding=decoded.encoding, warnings=warnings,
                    control_bytes=stray)
    return _with_extension_note(found, ext)


_HEADER_LINE = re.compile(rb"^[A-Za-z0-9-]+:[ \t]")
# Header fields of which a message has several near its top (RFC 5322, RFC 5321's trace fields).
_MAIL_HEADERS = {b"from", b"to", b"cc", b"subject", b"date", b"message-id", b"mime-version", b"received",
                 b"return-path", b"delivered-to", b"reply-to", b"in-reply-to", b"references", b"content-type"}


def _mail_kind(data: bytes, ext: str) -> str:
    """"email" for an RFC 5322 message, "mbox" for a mailbox, "" otherwise.

    A message starts with a header field and holds at least three of the usual ones
    (From, Date, Subject...) before its first empty line, or two with Content-Type (a
    MIME entity), or one when named .eml; an mbox starts with a "From " line followed
    by such a message. Markdown and HTML files are never taken for mail (our rules).
    """
    if ext in ("md", "markdown", "html", "htm", "xhtml"):
        return ""
    head = data[:SAMPLE].replace(b"\r\n", b"\n")
    kind = "email"
    if head.startswith(b"From "):
        head = head.split(b"\n", 1)[1] if b"\n" in head else b""
        kind = "mbox"
    if not _HEADER_LINE.match(head):
        return ""
    block = head.split(b"\n\n", 1)[0]
    names = {line.split(b":", 1)[0].lower() for line in block.split(b"\n") if _HEADER_LINE.match(line)}
    known = names & _MAIL_HEADERS
    if ext == "eml":
        return kind if known else ""
    return kind if len(known) >= 3 or (b"content-type" in known and len(known) >= 2) else ""


def _looks_html(text: str, ext: str) -> bool:
    if _HTML_START.search(text[:2048]):
        return True
    return ext in ("html", "htm", "xhtml") and bool(_ANY_TAG.search(text[:SAMPLE]))


def _with_extension_note(found: Sniffed, ext: str) -> Sniffed:
    expected = EXTENSION_FORMATS.get(ext)
    if found.format and expected and expected != found.format:
        found.warnings.append(f"content is {found.format} although the file is named .{ext}")
    return found
