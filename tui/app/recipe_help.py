"""The recipe language in the app: the stage list, stage-name completion, errors explained.

Everything comes from `tui.decoding.STAGES` (names, accepted values, one-line meanings),
so the recipe dialog and the help screen list what the parser takes, and nothing else.
"""

from __future__ import annotations

import re

from rich.table import Table
from rich.text import Text
from textual.suggester import Suggester

from tui.decoding import STAGES

_LAST_NAME = re.compile(r"(?:^|[\s,])([A-Za-z_]+)$")  # a stage name being typed, at the end


def stage_table() -> Table:
    """One row per stage: how it is written, what values it takes, what it does."""
    table = Table.grid(padding=(0, 2))
    table.add_column(no_wrap=True, style="bold")
    table.add_column(no_wrap=True)
    table.add_column(ratio=1)
    for spec in STAGES.values():
        table.add_row(Text(spec.example), Text(spec.accepts), Text(spec.meaning))
    return table


def stage_line(name: str) -> str:
    """`name accepts X: what it does`, for a known stage ("" otherwise)."""
    spec = STAGES.get(name)
    return f"{spec.example}: {spec.accepts}; {spec.meaning}" if spec else ""


def explain(text: str, message: str) -> str:
    """A RecipeError's message, with the listing line of the stage it is about."""
    from tui.decoding.grammar import parse_item, split_items
    from tui.decoding import RecipeError

    try:
        items = split_items(text)
    except RecipeError:
        return message
    for item in items:
        try:
            parse_item(item)
        except RecipeError:
            name = re.match(r"[A-Za-z_][A-Za-z0-9_]*", item)
            line = stage_line(name.group(0)) if name else ""
            return f"{message}\n{line}" if line else message
    return message


class StageNames(Suggester):
    """Completes the stage name typed at the end of a recipe (accept with \u2192 or end)."""

    def __init__(self) -> None:
        super().__init__(use_cache=False, case_sensitive=True)

    async def get_suggestion(self, value: str) -> str | None:
        match = _LAST_NAME.search(value)
        if match is None:
            return None
        typed = match.group(1)
        for spec in STAGES.values():
            if spec.name.startswith(typed) and spec.name != typed:
                tail = "" if spec.kind == "flag" else "="
                return value[: match.start(1)] + spec.name + tail
        return None
