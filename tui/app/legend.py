"""The token encoding's key, always on screen under the panes."""

from __future__ import annotations

from textual.widgets import Static

from tui.app.colouring import Scheme


class Legend(Static):
    """The scheme's key (see `colouring.Scheme.legend`), worded to the screen's width."""

    def __init__(self, scheme: Scheme, id: str | None = None) -> None:
        super().__init__(scheme.legend(), id=id)
        self.scheme = scheme

    def on_resize(self) -> None:
        self.update(self.scheme.legend(self.size.width))
