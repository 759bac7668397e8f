"""The commands' progress display for loading a model: `rich.progress` on stderr.

Library code reports through `tui.progress.ProgressCallback`; this is where those
events are drawn, one bar per task, with the bytes done and the time left for a
conversion. Nothing is drawn when stderr is not a terminal, and the bar opens only
for a task measured in bytes (a first GGUF conversion), so a warm start stays quiet.
"""

from __future__ import annotations

import sys
from types import TracebackType
from typing import Any

from tui.progress import ProgressEvent


class ModelProgress:
    """A `ProgressCallback` drawing on stderr; use it as a context manager."""

    def __init__(self, stream: Any = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self._bars: Any = None  # rich.progress.Progress, once a bar is open
        self._tasks: dict[str, Any] = {}

    def __enter__(self) -> "ModelProgress":
        return self

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if self._bars is not None:
            self._bars.stop()
            self._bars = None

    def __call__(self, event: ProgressEvent) -> None:
        if self._bars is None:
            if event.unit != "bytes" or not self.stream.isatty():
                return
            self._open()
        bars = self._bars
        amount = _amount(event)
        task = self._tasks.get(event.task)
        if task is None:
            task = self._tasks[event.task] = bars.add_task(event.task, total=event.total, amount=amount,
                                                           note=event.note)
        bars.update(task, completed=event.done, total=event.total, amount=amount, note=event.note)

    def _open(self) -> None:
        from rich.console import Console
        from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn, TimeRemainingColumn

        self._bars = Progress(TextColumn("{task.description}"), BarColumn(), TaskProgressColumn(),
                              TextColumn("{task.fields[amount]}"), TimeRemainingColumn(),
                              TextColumn("{task.fields[note]}", style="dim"),
                              console=Console(file=self.stream, stderr=True), transient=False)
        self._bars.start()


def _amount(event: ProgressEvent) -> str:
    if event.unit != "bytes":
        return ""
    total = f"/{event.total / 1e9:.2f} GB" if event.total else " GB"
    return f"{event.done / 1e9:.2f}{total}"


def model_line(lm: Any) -> str:
    """The one line a command prints after loading: the model, its dtype, its path and why."""
    note = f"; {lm.dtype_note}" if lm.dtype_note else ""
    return f"model {lm.name} ({lm.dtype}{note}): {lm.path_note}"
