"""The panes side by side: one row of columns for up to 4 panes, two rows for 5 to 8.

`sync` makes the grid's children match a `SessionView`: panes that left are removed,
new ones mounted, and each pane handed its snapshot, its version (`PaneVersions`: it
moves only when that pane's records changed) and the marks of its text (where it
parts from the pane it is compared with; see `tui.session.parting`). A pane redraws
only when one of those moved.
"""

from __future__ import annotations

from textual.containers import Container

from tui.app.colouring import Scheme
from tui.app.token_pane import TokenPane
from tui.session.parting import TextMark, compared_with, text_marks
from tui.session.views import SessionView
from tui.workbench.pane_versions import PaneVersions


def grid_shape(n_panes: int) -> tuple[int, int]:
    """(columns, rows) for a number of panes: side by side up to 4, then two rows."""
    if n_panes <= 4:
        return max(n_panes, 1), 1
    return (n_panes + 1) // 2, 2


class PaneGrid(Container):
    """Holds one `TokenPane` per pane of the session."""

    def __init__(self, scheme: Scheme, prompt: str = "", id: str | None = None) -> None:
        super().__init__(id=id)
        self.scheme = scheme
        self.prompt = prompt
        self.versions = PaneVersions()
        # marks by pane: (own version, compared pane id and version) -> marks
        self._marks: dict[int, tuple[tuple, tuple[TextMark, ...]]] = {}

    def panes(self) -> list[TokenPane]:
        return list(self.query_children(TokenPane))

    def pane_for(self, pane_id: int) -> TokenPane | None:
        for pane in self.panes():
            if pane.pane_id == pane_id:
                return pane
        return None

    def sync(self, view: SessionView, cursor: int) -> None:
        """Match the children to `view` and draw each pane up to `cursor` tokens."""
        versions = self.versions.update(view)
        wanted = [p.id for p in view.panes]
        for widget in self.panes():
            if widget.pane_id not in wanted:
                widget.remove()
        have = {w.pane_id for w in self.panes() if w.pane_id in wanted}
        for pane in view.panes:
            widget = self.pane_for(pane.id) if pane.id in have else None
            if widget is None:
                widget = TokenPane(pane.id, self.scheme, self.prompt)
                self.mount(widget)
            if widget.prompt != self.prompt:
                widget.prompt = self.prompt
            other = compared_with(pane, view.panes)
            key = (versions[pane.id], pane.recipe_log, pane.origin,
                   (other.id, versions[other.id]) if other is not None else None)
            cached = self._marks.get(pane.id)
            if cached is None or cached[0] != key:
                cached = (key, text_marks(pane, other))
                self._marks[pane.id] = cached
            widget.show(pane, cursor, versions[pane.id], cached[1])
        for gone in set(self._marks) - set(wanted):
            del self._marks[gone]
        columns, rows = grid_shape(len(wanted))
        if (self.styles.grid_size_columns, self.styles.grid_size_rows) != (columns, rows):
            self.styles.grid_size_columns = columns  # a layout pass: only when it changes
            self.styles.grid_size_rows = rows
