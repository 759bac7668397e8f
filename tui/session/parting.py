"""Where panes part: the step a pane's text leaves another's, and the marks inside a text.

A pane is compared with its fork source when it is a fork (and the source is still
there), else with a twin (another pane with the same recipe), else with the session's
first pane (the baseline, usually greedy). The choice never depends on focus, so that
clicking a pane does not move its text. The marks a pane's text carries, by step: where it parts from the
pane it is compared with, where it was forked, and where its recipe changed. Fork
names stay readable at any depth: `greedy` forks into `greedy/1`, `greedy/2`, and
`greedy/1` into `greedy/1.1`. The app's panes and the reports read the same marks.
No Textual, no torch.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Iterable, Protocol, Sequence

PART = "part"  # the text leaves the compared pane's here
FORK = "fork"  # the fork's own tokens start here
EDIT = "edit"  # the recipe changed from here on

_FORK_PATH = re.compile(r"^(?P<base>.*)/(?P<path>\d+(?:\.\d+)*)$")


class Chosen(Protocol):
    """A step's chosen token: a live `StepRecord`, or a report's row of one."""

    @property
    def token_id(self) -> int: ...


class Compared(Protocol):
    """What the marks read of a pane: a live `PaneView`, or a report's pane."""

    @property
    def id(self) -> int: ...
    @property
    def name(self) -> str: ...
    @property
    def recipe(self) -> str: ...
    @property
    def origin(self) -> tuple[int, int] | None: ...
    @property
    def recipe_log(self) -> tuple[tuple[int, str], ...]: ...
    @property
    def records(self) -> Sequence[Chosen]: ...


def first_difference(a: Sequence[Chosen], b: Sequence[Chosen]) -> int | None:
    """The first step at which the two texts chose different tokens (None: the shorter
    is a prefix of the longer)."""
    for i, (x, y) in enumerate(zip(a, b)):
        if x is not y and x.token_id != y.token_id:
            return i
    return None


def compared_with(pane: Compared, panes: Sequence[Compared]) -> Compared | None:
    """The pane `pane` is compared with: fork source, twin, or the first pane."""
    others = [p for p in panes if p.id != pane.id]
    if pane.origin is not None:
        source = next((p for p in others if p.id == pane.origin[0]), None)
        if source is not None:
            return source
    twin = next((p for p in others if p.recipe == pane.recipe), None)
    if twin is not None:
        return twin
    return panes[0] if panes and panes[0].id != pane.id else None


@dataclass(frozen=True)
class TextMark:
    """One mark inside a pane's text, drawn before the token of `step`."""

    step: int
    kind: str  # PART, FORK or EDIT
    note: str  # what it means, for a tooltip or a report


def text_marks(pane: Compared, compared: Compared | None) -> tuple[TextMark, ...]:
    """The marks of `pane`'s text, in step order."""
    marks: list[TextMark] = []
    fork_step = pane.origin[1] if pane.origin is not None else None
    if fork_step is not None:
        marks.append(TextMark(fork_step, FORK, "forked here"))
    for start, recipe in pane.recipe_log:
        if start > 0 and start != fork_step:
            marks.append(TextMark(start, EDIT, f"recipe from here: {recipe}"))
    if compared is not None:
        step = first_difference(pane.records, compared.records)
        if step is not None:
            marks.append(TextMark(step, PART, f"leaves {compared.name} here"))
    return tuple(sorted(marks, key=lambda m: (m.step, m.kind)))


def fork_name(source: str, names: Iterable[str]) -> str:
    """A readable, unused name for a fork of `source`."""
    taken = set(names)
    match = _FORK_PATH.match(source)
    prefix = f"{source}." if match else f"{source}/"
    n = 1
    while f"{prefix}{n}" in taken:
        n += 1
    return f"{prefix}{n}"
