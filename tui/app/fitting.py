"""Fitting words into narrow cells: cut at a boundary with an ellipsis, never silently.

A recipe is cut between its stages ("temperature=0.8 top_p=0.9" -> "temperature=0.8 …"),
a title between words, so that no stage is shown with half its value (two different
recipes must never read alike); a status line is packed into at most `max_lines` lines,
falling back to shorter forms of its parts before anything is dropped.
"""

from __future__ import annotations

from typing import Sequence

from rich.cells import cell_len

ELLIPSIS = "\u2026"


def cut_items(text: str, width: int) -> str:
    """`text` in at most `width` cells, cut between space-separated items with "…"."""
    if cell_len(text) <= width:
        return text
    items = text.split(" ")
    kept: list[str] = []
    for item in items:
        trial = " ".join([*kept, item, ELLIPSIS])
        if cell_len(trial) > width:
            break
        kept.append(item)
    if kept:
        return " ".join([*kept, ELLIPSIS])
    # not even the first item fits: show its start, plainly marked as cut
    out = ""
    for ch in items[0]:
        if cell_len(out + ch + ELLIPSIS) > width:
            break
        out += ch
    return out + ELLIPSIS


def pack_lines(parts: Sequence[str], width: int, separator: str = " \u00b7 ") -> list[str]:
    """Greedy packing of `parts` into lines of `width` cells; a part is never split."""
    lines: list[str] = []
    line = ""
    for part in parts:
        if not line:
            line = part
        elif cell_len(line + separator + part) <= width:
            line += separator + part
        else:
            lines.append(line)
            line = part
    if line:
        lines.append(line)
    return lines


def fit_parts(variants: Sequence[Sequence[str]], width: int, max_lines: int = 2) -> list[str]:
    """The lines of the first variant (longest wording first) that fits in `max_lines`;
    the last variant, cut with "…" at `max_lines`, when none does."""
    lines: list[str] = []
    for parts in variants:
        lines = pack_lines(parts, width)
        if len(lines) <= max_lines and all(cell_len(li) <= width for li in lines):
            return lines
    lines = [cut_items(li, width) for li in lines[:max_lines]]
    return lines


def cut_apart(texts: Sequence[str], width: int) -> list[str]:
    """Each text cut as `cut_items` does, except that two different texts never read
    alike: where their cuts would match, each starts from the first item they differ
    in ("… top_p=0.9" beside "… top_p=0.95")."""
    plain = [cut_items(t, width) for t in texts]
    cuts = list(plain)
    for i, text in enumerate(texts):
        twins = [j for j, c in enumerate(plain) if c == plain[i] and texts[j] != text]
        if not twins:
            continue
        items = text.split(" ")
        first = min(_first_difference(items, texts[j].split(" ")) for j in twins)
        if first > 0:
            cuts[i] = cut_items(" ".join([ELLIPSIS, *items[first:]]), width)
    return cuts


def _first_difference(a: list[str], b: list[str]) -> int:
    for k, (x, y) in enumerate(zip(a, b)):
        if x != y:
            return k
    return min(len(a), len(b))
