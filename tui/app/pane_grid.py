"""The panes side by side: one row of columns for up to 4 panes, two rows for 5 to 8.

`sync` makes the grid's children match a `SessionView`: panes that left are removed,
new ones mounted, and every pane redrawn up to the session cursor.
"""

from __future__ import annotations

from textual.containers import Container

from tui.app.colouring import Scheme
from tui.app.token_pane import TokenPane
from tui.session.views import SessionView


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

    def panes(self) -> list[TokenPane]:
        return list(self.query_children(TokenPane))

    def pane_for(self, pane_id: int) -> TokenPane | None:
        for pane in self.panes():
            if pane.pane_id == pane_id:
                return pane
        return None

    def sync(self, view: SessionView, cursor: int) -> None:
        """Match the children to `view` and draw each pane up to `cursor` tokens."""
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
            widget.show(pane, cursor)
        columns, rows = grid_shape(len(wanted))
        self.styles.grid_size_columns = columns
        self.styles.grid_size_rows = rows
