"""The step's faster langdetect detector against langdetect's own Detector.

Reference: langdetect 1.0.9 (PyPI `langdetect`), its unmodified `Detector`, on the same
text with the same seed: the n-grams it extracts, the text it keeps, and the
probabilities it ends with must be exactly equal. Text: the first translated manual
pages Debian ships in `manpages-de`, `manpages-fr` and `manpages-es` (read as in
tests/test_language_mixed.py), plus short texts in other scripts and with capital
words, runs of spaces and a text that stops mid-word, and long texts with URLs and
addresses where the detector cuts them.
"""

from __future__ import annotations

import pytest
from test_language_mixed import PACKAGES, man_blocks

from thresher.steps import language


def _texts() -> list[str]:
    import re
    import subprocess

    texts = []
    for lang, package in PACKAGES.items():
        listed = subprocess.run(["dpkg-query", "-L", package], capture_output=True, text=True)
        paths = sorted(p for p in listed.stdout.split()
                       if re.search(rf"/man/{lang}/man[18]/[^/]+\.gz$", p))[:3]
        if len(paths) < 3:
            pytest.fail(f"install the Debian package {package} (make system-deps)")
        for path in paths:
            blocks = man_blocks(path)
            texts.append("\n".join(blocks))  # a whole page, past 10,000 characters for some
            texts.extend(blocks[:15])
    texts += [
        "THE GNU General Public LICENSE, version 3 -- see  https://example.org/x  or mail a@b.org",
        "Ceci est un TEST  avec   des espaces, l'été et des mots EN CAPITALES",
        "Привет, мир! Это проверка.", "日本語のテキストとカタカナ", "中文文本测试", "한국어 텍스트",
        "Tiếng Việt có dấu", "ends mid-wor",
        # Past twice langdetect's 10,000 characters, where the detector cuts a long text
        # at a space before removing URLs and addresses: a URL and an address across
        # character 20,000, a text whose start is nearly all URLs, and one where the
        # 10,000th character kept is the start of a URL across character 20,000
        # (9,523 characters of words and 238 URLs of 43 characters keep 9,999).
        "word " * 3999 + "xyhttps://example.org/path/to/page and more words" * 800,
        "mot " * 4999 + "jean.dupont@example.org, des mots " * 900,
        "https://example.org/a " * 3000 + "Ceci est la fin du texte, en français cette fois. " * 400,
        "word " * 1904 + "abc" + ("https://example.org/" + "p" * 23 + " ") * 238
        + "https://example.org/last and then more words" * 500,
        "Настройка и проверка файла конфигурации: API_[x]", "Ẫẫ Ỗỗ ab", "テキスト ABC def", "A", " ", "",
    ]
    return texts


def _pair(text: str):
    from langdetect.detector import Detector

    fast = language._detector(0)
    plain = Detector(language._factory)
    fast.append(text)
    plain.append(text)
    return fast, plain


def test_same_text_ngrams_and_probabilities_as_langdetect():
    from langdetect.lang_detect_exception import LangDetectException

    checked = 0
    for text in _texts():
        fast, plain = _pair(text)
        assert fast.text == plain.text
        fast.cleaning_text()
        plain.cleaning_text()
        assert fast.text == plain.text, text[:60]
        assert fast._extract_ngrams() == plain._extract_ngrams(), text[:60]
        fast, plain = _pair(text)
        try:
            expected = [(p.lang, p.prob) for p in plain.get_probabilities()]
        except LangDetectException:
            with pytest.raises(LangDetectException):
                fast.get_probabilities()
            continue
        assert [(p.lang, p.prob) for p in fast.get_probabilities()] == expected, text[:60]
        checked += 1
    assert checked > 50
