"""Model and prompt text made safe to show: no markup is read, no control reaches the terminal.

Rich and Textual pass control characters inside a `Text` straight to the terminal, so an
ESC from the model could clear the screen or move the cursor. Every piece of text that
comes from the model, the prompt or a file goes through `shown` (pane text, titles) or
`shown_token` (the inspect table, where whitespace must be visible too) before it is put
into a `rich.text.Text`. Text objects are built with `Text(...)`/`append`, never
`Text.from_markup`, so `[bold]` stays four visible characters.

What is escaped (Unicode categories, reference: the Unicode Standard, sec. 4.5 "General
Category"): every Cc control except newline and tab (C0 0x00-0x1F, DEL 0x7F, C1
0x80-0x9F) as ``\\xNN``; the bidirectional embedding, override and isolate controls
(U+202A-U+202E, U+2066-U+2069, which reorder what follows them), the line and paragraph
separators (Zl, Zp) and lone surrogates (Cs) as ``\\uNNNN``.
"""

from __future__ import annotations

import unicodedata
from functools import lru_cache

TAB_WIDTH = 4
SPACE_MARK = "\u2423"  # OPEN BOX, a visible space
NEWLINE_MARK = "\u21b5"  # DOWNWARDS ARROW WITH CORNER LEFTWARDS
TAB_MARK = "\u21e5"  # RIGHTWARDS ARROW TO BAR
EMPTY_MARK = "\u2205"  # EMPTY SET: a token that adds no text (a split byte)
COMBINING_BASE = "\u25cc"  # DOTTED CIRCLE: the base a lone combining mark is shown on
_BIDI_CONTROLS = frozenset(range(0x202A, 0x202F)) | frozenset(range(0x2066, 0x206A))


@lru_cache(maxsize=4096)
def _escape_char(ch: str) -> str | None:
    """The visible escape of one unsafe character, or None when it is safe as it is."""
    code = ord(ch)
    if code < 0x20 or 0x7F <= code <= 0x9F:
        return f"\\x{code:02x}"
    if code in _BIDI_CONTROLS or unicodedata.category(ch) in ("Zl", "Zp", "Cs"):
        return f"\\u{code:04x}"
    return None


def _is_plain(text: str) -> bool:
    """True when no character needs a look-up (the fast path for ordinary text)."""
    return text.isprintable()


def shown(text: str) -> str:
    """Text for the panes and titles: newlines kept, tabs as spaces, controls escaped."""
    if _is_plain(text):
        return text
    out: list[str] = []
    for ch in text:
        if ch == "\n":
            out.append(ch)
        elif ch == "\t":
            out.append(" " * TAB_WIDTH)
        else:
            esc = _escape_char(ch)
            out.append(ch if esc is None else esc)
    return "".join(out)


def shown_line(text: str) -> str:
    """Text on one line (titles, status lines): newlines and tabs become visible marks."""
    return shown(text.replace("\n", NEWLINE_MARK).replace("\t", TAB_MARK))


def shown_token(text: str) -> str:
    """One token for the inspect table: every space, newline and tab as a visible mark.

    A token that starts with a combining mark gets a dotted circle to sit on (the
    Unicode Standard's convention for showing a mark alone, sec. 2.11).
    """
    if text == "":
        return EMPTY_MARK
    out: list[str] = [COMBINING_BASE] if unicodedata.combining(text[0]) else []
    for ch in text:
        if ch == " ":
            out.append(SPACE_MARK)
        elif ch == "\n":
            out.append(NEWLINE_MARK)
        elif ch == "\t":
            out.append(TAB_MARK)
        else:
            esc = _escape_char(ch)
            out.append(ch if esc is None else esc)
    return "".join(out)


def is_safe(text: str) -> bool:
    """True when `text` holds nothing that `shown` would escape (newlines allowed)."""
    return all(ch == "\n" or _escape_char(ch) is None for ch in text)
