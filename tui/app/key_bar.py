"""The footer: every key of the screen on screen, wrapped onto as many lines as it needs.

Textual's own footer keeps to one line and cuts what does not fit; at 80 columns this
app has more keys than that. Keys that would change a read-only session are dimmed;
the panes' keys are hidden while another screen (a dialog, inspect, help) is on top.
"""

from __future__ import annotations

from rich.style import Style
from rich.text import Text
from textual.geometry import Size
from textual.screen import Screen
from textual.widget import Widget

KEY_STYLE = Style(bold=True, color="#0b0c0e", bgcolor="#56B4E9")
OFF_STYLE = Style(dim=True)


def key_items(screen: Screen) -> list[tuple[str, str, bool]]:
    """(keys shown, description, enabled) per description: keys that share one are joined."""
    order: list[str] = []
    keys: dict[str, list[str]] = {}
    enabled_of: dict[str, bool] = {}
    for _node, binding, enabled, _tooltip in screen.active_bindings.values():
        if not binding.show:
            continue
        desc = binding.description
        if desc not in keys:
            order.append(desc)
            keys[desc], enabled_of[desc] = [], enabled
        display = screen.app.get_key_display(binding)
        if display not in keys[desc]:
            keys[desc].append(display)
    return [("".join(keys[d]) if all(len(k) == 1 for k in keys[d]) else "/".join(keys[d]),
             d, enabled_of[d]) for d in order]


def layout_lines(items: list[tuple[str, str, bool]], width: int) -> list[Text]:
    """Greedy line filling; an item is never split across lines."""
    lines: list[Text] = [Text()]
    for key, desc, enabled in items:
        piece = Text()
        piece.append(key, KEY_STYLE if enabled else OFF_STYLE)
        piece.append(f" {desc} ", None if enabled else OFF_STYLE)
        if lines[-1].cell_len and lines[-1].cell_len + piece.cell_len > width:
            lines.append(Text())
        lines[-1].append_text(piece)
    return lines


class KeyBar(Widget):
    """The app's footer. Redraws when the screen's bindings change."""

    DEFAULT_CSS = """
    KeyBar { height: auto; dock: bottom; }
    """

    def on_mount(self) -> None:
        self.screen.bindings_updated_signal.subscribe(self, self._bindings_changed)

    def on_unmount(self) -> None:
        self.screen.bindings_updated_signal.unsubscribe(self)

    def _bindings_changed(self, screen: Screen) -> None:
        self.refresh(layout=True)

    def _lines(self, width: int) -> list[Text]:
        return layout_lines(key_items(self.screen), max(width, 10))

    def get_content_height(self, container: Size, viewport: Size, width: int) -> int:
        return len(self._lines(width))

    def render(self) -> Text:
        return Text("\n").join(self._lines(self.size.width))
