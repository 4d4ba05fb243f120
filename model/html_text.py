"""Visible text and links of an HTML part, by linear scans (no DOM, no recursion).

Every search moves forward through the string, so malformed input (unclosed comments, a
megabyte of "<") costs time proportional to its length.
"""

from __future__ import annotations

import html
import re
from dataclasses import dataclass, field
from typing import Final

_HIDDEN_BLOCK: Final = re.compile(r"(?i)<(script|style|template|!--)")
_BLOCK_END: Final = {
    "script": re.compile(r"(?i)</script\s*>"),
    "style": re.compile(r"(?i)</style\s*>"),
    "template": re.compile(r"(?i)</template\s*>"),
    "!--": re.compile(r"--!?>"),
}
# Tags that do not break a word when a browser renders them ("fr<b></b>ee" shows "free").
# The names' alternation is factored by first letter: the engine then tries one or two names
# at a "<" instead of each in turn (63 against 84 µs for 8 KB of newsletter markup).
_INLINE_TAG: Final = re.compile(
    r"(?i)</?(?:a(?:bbr)?|b(?:ig)?|em|font|i|s(?:mall|pan|trong|u[bp])|u|wbr)\b[^<>]*>"
)
_ANY_TAG: Final = re.compile(r"<[^<>]*>")
_ANCHOR: Final = re.compile(r"(?i)<(/?)a\b([^<>]*)>")
_SRC_ATTR: Final = re.compile(r"(?i)<(?:img|area|form|iframe)\b[^<>]*?\b(?:src|href|action)\s*=")
_ATTR_VALUE: Final = re.compile(r"""\s*(?:"([^"]*)"|'([^']*)'|([^\s"'>]+))""")
_HREF: Final = re.compile(r"(?i)\bhref\s*=")
# Inline styles that hide text.  For ASCII markup lower-cased once, each half is searched from
# its first letter, which the engine skips to; the case-blind alternation of both, kept for
# other markup, is tried at every character (14 against 210 µs for 8 KB of newsletter markup
# without either).
_DISPLAY_NONE: Final = re.compile(r"display\s*:\s*none")
_ZERO_FONT: Final = re.compile(r"font-size\s*:\s*[01](?:px|pt)?(?![\d.])")
_HIDDEN_STYLE: Final = re.compile(f"(?i){_DISPLAY_NONE.pattern}|{_ZERO_FONT.pattern}")
MAX_LINKS: Final = 200


@dataclass
class HtmlContent:
    """What the tokenizer needs from one HTML part.

    Attributes
    ----------
    text : str
        Visible text, entities decoded, tags removed.
    links : list of (str, str)
        (href, visible text) of each anchor, at most MAX_LINKS.
    sources : list of str
        URLs of images, image-map areas, forms and frames.
    hidden_style : bool
        The markup hides text with inline styles (display:none, zero font size).
    """

    text: str
    links: list[tuple[str, str]] = field(default_factory=list)
    sources: list[str] = field(default_factory=list)
    hidden_style: bool = False


def drop_hidden_blocks(markup: str) -> str:
    """Remove scripts, styles, templates and comments; an unclosed one runs to the end."""
    pieces: list[str] = []
    pos = 0
    while True:
        match = _HIDDEN_BLOCK.search(markup, pos)
        if match is None:
            pieces.append(markup[pos:])
            break
        pieces.append(markup[pos : match.start()])
        end = _BLOCK_END[match.group(1).lower()].search(markup, match.end())
        if end is None:
            break
        pieces.append(" ")
        pos = end.end()
    return "".join(pieces)


def _attr(tag_body: str, name_match: re.Match[str] | None) -> str:
    if name_match is None:
        return ""
    value = _ATTR_VALUE.match(tag_body, name_match.end())
    if value is None:
        return ""
    return html.unescape(next(v for v in value.groups() if v is not None)).strip()


def visible_text(markup: str) -> str:
    """Visible text of markup already passed through ``drop_hidden_blocks``."""
    text = _ANY_TAG.sub(" ", _INLINE_TAG.sub("", markup))
    return html.unescape(text) if "&" in text else text


def _links(markup: str) -> list[tuple[str, str]]:
    links: list[tuple[str, str]] = []
    open_href: str | None = None
    open_end = 0
    for match in _ANCHOR.finditer(markup):
        if open_href is not None:
            links.append((open_href, visible_text(markup[open_end : match.start()])))
            open_href = None
            if len(links) >= MAX_LINKS:
                break
        if not match.group(1):
            body = match.group(2)
            open_href, open_end = _attr(body, _HREF.search(body)), match.end()
    if open_href is not None and len(links) < MAX_LINKS:
        links.append((open_href, visible_text(markup[open_end : open_end + 2000])))
    return [(href, text) for href, text in links if href]


def _sources(markup: str) -> list[str]:
    found = []
    for match in _SRC_ATTR.finditer(markup):
        value = _ATTR_VALUE.match(markup, match.end())
        if value is not None:
            found.append(next(v for v in value.groups() if v is not None))
        if len(found) >= MAX_LINKS:
            break
    return found


def parse_html(markup: str) -> HtmlContent:
    """Extract visible text, links and hidden-text hints from one HTML document or fragment."""
    shown = drop_hidden_blocks(markup)
    return HtmlContent(
        text=visible_text(shown),
        links=_links(shown),
        sources=_sources(shown),
        hidden_style=_hides_text(shown),
    )


def _hides_text(markup: str) -> bool:
    """Whether ``_HIDDEN_STYLE`` occurs in *markup*."""
    if not markup.isascii():  # case-blind matching reaches beyond ASCII ("ſ" is an "s")
        return _HIDDEN_STYLE.search(markup) is not None
    lowered = markup.lower()
    return bool(_DISPLAY_NONE.search(lowered) or _ZERO_FONT.search(lowered))
