"""The catalogue's own words on screens and in the report: ``[display] item = "lot"``,
``user = "member"`` make every screen and the report say lots and members.

Only text for people changes: file columns, JSON keys, settings and ids keep their names
(``item``, ``user``), so scripts that read the files do not break.
"""
from __future__ import annotations

import re

GENERIC = {"item": "item", "user": "user"}
# a whole word: not part of a flag, a field or a file name (--per-user, new_items, lot-item)
_WORD = re.compile(r"(?<![-\w])(item|user|Item|User)(s?)(?![-\w])")


def nouns_of(cfg: dict | None) -> dict:
    """The ``[display]`` nouns of a settings mapping (older settings have none: the generic ones)."""
    shown = dict(GENERIC)
    shown.update({k: v for k, v in ((cfg or {}).get("display") or {}).items() if k in GENERIC and v})
    return shown


def speak(text: str, nouns: dict) -> str:
    """``text`` with item(s) and user(s) in the catalogue's words (capitals kept; plurals by s).

    >>> speak("3 items have no ratings; Users asked: 5", {"item": "lot", "user": "member"})
    '3 lots have no ratings; Members asked: 5'
    >>> speak("new_items, item_id and --per-user stay", {"item": "lot", "user": "member"})
    'new_items, item_id and --per-user stay'
    """
    if nouns == GENERIC:
        return text

    def swap(m):
        word = nouns[m.group(1).lower()] + m.group(2)
        return word[:1].upper() + word[1:] if m.group(1)[0].isupper() else word
    return _WORD.sub(swap, text)


_PROSE = ("h1", "h2", "h3", "p", "th", "figcaption", "li", "title")


def speak_html(page: str, nouns: dict) -> str:
    """The report's headings, paragraphs, captions and table headings in the catalogue's words;
    table cells (names, ids), scripts and figures' drawing untouched."""
    if nouns == GENERIC:
        return page
    parts = re.split(r"(<[^>]+>)", page)
    open_tags = []
    for j, part in enumerate(parts):
        if part.startswith("<"):
            tag = re.match(r"</?([a-zA-Z0-9]+)", part)
            if tag and not part.endswith("/>"):
                name = tag.group(1).lower()
                if part.startswith("</"):
                    if name in open_tags:
                        del open_tags[len(open_tags) - 1 - open_tags[::-1].index(name)]
                else:
                    open_tags.append(name)
            continue
        inner = open_tags[-1] if open_tags else ""
        if inner in _PROSE and not {"script", "style", "td"} & set(open_tags):
            parts[j] = speak(part, nouns)
    return "".join(parts)
