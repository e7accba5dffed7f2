"""The words a reader sees in a rendered file (HTML, SVG figure, PDF), for ``verify --render``.

Rendered bytes may differ across machines (fonts, the digits of path coordinates, a
library's version); the words may not. Each reader gives the file's text as a list of
words (NFKC-normalised, so a ligature and its letters are the same word), leaving out what
only the renderer decides:

- HTML and SVG: the text of the elements and the attributes a reader is shown (``alt``,
  ``title``, ``aria-label``); not markup, styles or path data;
- PDF: the text of every page (pypdf), without the page furniture that depends on the page
  count: "page N of M" and the running lines (the lines printed on more than half of the
  pages, a page header or footer), which are compared as a set instead.
"""

from __future__ import annotations

import io
import re
import unicodedata
from collections import Counter
from html.parser import HTMLParser
from typing import NamedTuple

_SHOWN_ATTRIBUTES = frozenset({"alt", "title", "aria-label"})
_HIDDEN_ELEMENTS = frozenset({"style", "script"})
_PAGE_NUMBER = re.compile(r"\bpage \d+ of \d+\b")


class Words(NamedTuple):
    """A file's words in reading order, and the running lines of a PDF (empty otherwise)."""

    words: tuple[str, ...]
    running: frozenset[str] = frozenset()


def _words(text: str) -> list[str]:
    return unicodedata.normalize("NFKC", text).split()


class _Text(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.words: list[str] = []
        self._hidden = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        for name, value in attrs:
            if name in _SHOWN_ATTRIBUTES and value:
                self.words.extend(_words(value))
        if tag in _HIDDEN_ELEMENTS:
            self._hidden += 1

    def handle_endtag(self, tag: str) -> None:
        if tag in _HIDDEN_ELEMENTS and self._hidden:
            self._hidden -= 1

    def handle_data(self, data: str) -> None:
        if not self._hidden:
            self.words.extend(_words(data))


def markup_words(data: bytes) -> Words:
    """The words of an HTML page or an SVG figure."""
    parser = _Text()
    parser.feed(data.decode("utf-8", errors="replace"))
    parser.close()
    return Words(tuple(parser.words))


def pdf_words(data: bytes) -> Words:
    """The words of a PDF, page furniture aside (see the module docstring)."""
    from pypdf import PdfReader

    pages = [
        [
            " ".join(_words(line))
            for line in _PAGE_NUMBER.sub(" ", page.extract_text() or "").splitlines()
        ]
        for page in PdfReader(io.BytesIO(data)).pages
    ]
    pages = [[line for line in lines if line] for lines in pages]
    on_pages = Counter(line for lines in pages for line in set(lines))
    running = frozenset(
        line for line, n in on_pages.items() if len(pages) > 2 and n > len(pages) / 2
    )
    words = [
        word for lines in pages for line in lines if line not in running for word in line.split()
    ]
    return Words(tuple(words), running)


def words_of(name: str, data: bytes) -> Words:
    """The words of a run's rendered file, by its name's suffix."""
    return pdf_words(data) if name.endswith(".pdf") else markup_words(data)


def first_difference(stored: Words, now: Words) -> str | None:
    """Where two files' words first differ, in a few words of context; None if they match."""
    if stored.running != now.running:
        extra = sorted(stored.running - now.running) or sorted(now.running - stored.running)
        return f"in a running page line: {extra[0][:60]!r}"
    a, b = stored.words, now.words
    if a == b:
        return None
    at = next(
        (i for i, (x, y) in enumerate(zip(a, b, strict=False)) if x != y), min(len(a), len(b))
    )
    start = max(0, at - 3)
    return (
        f"from word {at + 1}: {' '.join(a[start : at + 5])!r} where a re-render reads "
        f"{' '.join(b[start : at + 5])!r}"
    )
