"""The colour legend, always on screen under the panes."""

from __future__ import annotations

from textual.widgets import Static

from tui.app.colouring import Scheme


class Legend(Static):
    """The token scheme's key (see `colouring.Scheme.legend`)."""

    def __init__(self, scheme: Scheme, id: str | None = None) -> None:
        super().__init__(scheme.legend(), id=id)
