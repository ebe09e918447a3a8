"""Reading a rendered page back for the tests: its tags, its numbers, what it would fetch."""

from __future__ import annotations

import re
from html.parser import HTMLParser

VOID = {"meta", "br", "hr", "img", "input", "link", "area", "base", "col", "source", "wbr"}
SVG_SELF_CLOSING = re.compile(r"/\s*$")


class Structure(HTMLParser):
    """Collects start tags, ``data-key``/``data-value`` pairs and ids, and checks that every
    element opened is closed in order (HTML's void elements and SVG's self-closed ones aside)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.values: dict[str, list[str]] = {}
        self.ids: list[str] = []
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        found = dict(attrs)
        self.tags.append((tag, found))
        if "data-key" in found:
            self.values.setdefault(str(found["data-key"]), []).append(str(found["data-value"]))
        if "id" in found:
            self.ids.append(str(found["id"]))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        found = dict(attrs)
        self.tags.append((tag, found))
        if "id" in found:
            self.ids.append(str(found["id"]))

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes {self.stack[-1:]}")
            return
        self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parse(page: str) -> Structure:
    found = Structure()
    found.feed(page)
    found.close()
    return found


def external_references(page: str) -> list[str]:
    """Everything in ``page`` that would make a browser fetch something: URLs with a scheme
    (http, https, ftp, file, data is allowed only for nothing), ``<link>``, ``<script>``,
    ``<img>``, ``<iframe>``, ``<object>``, ``<embed>``, ``src=``, ``srcset=`` and ``poster=``
    attributes (what any media element fetches through),
    CSS ``@import`` and ``url(...)`` other than to an element of the page (``url(#id)``), and
    ``href`` other than to an element of the page (``#id``)."""
    found = []
    found += re.findall(r"(?i)\b(?:https?|ftp|file|data):[^\s\"'<>)]*", page)
    found += re.findall(r"(?i)<(?:link|script|img|iframe|object|embed)\b", page)
    found += re.findall(r"(?i)\b(?:src|srcset|poster)\s*=", page)
    found += re.findall(r"(?i)@import", page)
    found += [u for u in re.findall(r"(?i)url\(\s*([^)]*)\)", page) if not u.startswith("#")]
    found += [
        h for h in re.findall(r"(?i)\bhref\s*=\s*\"([^\"]*)\"", page) if not h.startswith("#")
    ]
    return found
