"""A version number per pane that moves only when the pane's drawn state changed.

The engine hands out a fresh `SessionView` (fresh tuples) at every step, so a pane
cannot tell "my records changed" from the snapshot's identity. `PaneVersions` compares
each pane's records with the ones it saw last (a stopped pane's records are the very
same objects, so the comparison is a pointer walk) and bumps that pane's version only
when they differ: an appended token, a rewind, a forced token, a re-run. The app's
panes redraw their text only when their version (or the cursor, width or marks) moves.
No Textual.
"""

from __future__ import annotations

from tui.session.record import StepRecord
from tui.session.views import SessionView


class PaneVersions:
    """`update(view)` -> {pane id: version}; versions start at 1 and only grow."""

    def __init__(self) -> None:
        self._seen: dict[int, tuple[tuple[StepRecord, ...], str, int]] = {}

    def update(self, view: SessionView) -> dict[int, int]:
        versions: dict[int, int] = {}
        for pane in view.panes:
            records, recipe = pane.records, pane.recipe
            seen = self._seen.get(pane.id)
            if seen is None:
                version = 1
            elif seen[0] is records or (seen[1] == recipe and _same(seen[0], records)):
                version = seen[2]
            else:
                version = seen[2] + 1
            self._seen[pane.id] = (records, recipe, version)
            versions[pane.id] = version
        for gone in set(self._seen) - set(versions):
            del self._seen[gone]
        return versions


def _same(old: tuple[StepRecord, ...], new: tuple[StepRecord, ...]) -> bool:
    # tuple equality checks identity before __eq__: equal-length tuples of the same
    # record objects compare at C speed
    return len(old) == len(new) and old == new
