"""The save dialog: a transcript path with a sensible default, checked before writing.

The default is `<scenario>-seed<seed>-<date-time>.jsonl` in the current folder. A path
whose folder does not exist is refused; an existing file is overwritten only after a
second Enter on the same path.
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

from tui.app.input_dialog import InputDialog

SAVE_HINT = "A JSON Lines transcript (written atomically). Enter to save, Escape to cancel."


def default_path(scenario: str, seed: int, now: datetime | None = None,
                 folder: Path | None = None) -> Path:
    """A new file name in `folder` (the current folder by default)."""
    stamp = (now or datetime.now()).strftime("%Y%m%d-%H%M%S")
    safe = "".join(c if c.isalnum() or c in "-_" else "-" for c in scenario) or "session"
    return (folder or Path(".")) / f"{safe}-seed{seed}-{stamp}.jsonl"


class SaveDialog(InputDialog):
    """Ask for the path to save the transcript to; returns a `Path`."""

    def __init__(self, path: Path) -> None:
        super().__init__("Save the transcript", str(path), hint=SAVE_HINT, check=self._check,
                         ok_label="Save")
        self._confirmed: str | None = None

    def _check(self, text: str) -> str | None:
        if not text:
            return "give a file path"
        path = Path(text).expanduser()
        if path.is_dir():
            return f"{path}: is a folder; give a file name"
        parent = path.parent if str(path.parent) else Path(".")
        if not parent.is_dir():
            return f"{parent}: no such folder"
        if path.exists() and self._confirmed != text:
            self._confirmed = text
            return f"{path}: exists; press Enter again to overwrite it"
        return None

    def result(self) -> Path:
        return Path(self.value().strip()).expanduser()
