"""Showing `ProgressEvent`s on stderr: `rich.progress` bars on a terminal, plain lines in a log.

Library code reports progress through `tui.progress.ProgressCallback` and never draws;
a command hands it a `ProgressDisplay` (it is callable). On a terminal each task gets
one bar with its amount and note (which carries the time left), opened when its first
event arrives, so that a display with nothing to show draws nothing. When stderr is a file or a pipe (a
job's log), a plain line is written every `log_every` seconds and when a task ends;
`log_every=None` writes nothing there. `units` limits the events shown (the model
loader shows only byte-counted work: a first conversion, never a warm start).
"""

from __future__ import annotations

import sys
import time
from types import TracebackType
from typing import Any, Collection, TextIO

from tui.progress import ProgressEvent


class ProgressDisplay:
    """A `ProgressCallback` drawing on stderr; use it as a context manager."""

    def __init__(self, stream: TextIO | None = None, *, units: Collection[str] | None = None,
                 log_every: float | None = 15.0) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.interactive = bool(getattr(self.stream, "isatty", lambda: False)())
        self.units = None if units is None else frozenset(units)
        self.log_every = log_every
        self._bars: Any = None  # rich.progress.Progress, once a bar is open
        self._tasks: dict[str, Any] = {}
        self._logged: dict[str, float] = {}  # task -> when its last plain line was written
        self._last: dict[str, ProgressEvent] = {}

    def __enter__(self) -> "ProgressDisplay":
        return self

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if self._bars is not None:
            self._bars.stop()
            self._bars = None
        elif self.log_every is not None:
            for event in self._last.values():  # a task cut short still leaves its last line
                if event.fraction != 1.0:
                    self._write_line(event)

    def __call__(self, event: ProgressEvent) -> None:
        if self.units is not None and event.unit not in self.units:
            return
        self._last[event.task] = event
        if self.interactive:
            self._update_bar(event)
        elif self.log_every is not None:
            now = time.monotonic()
            if (event.fraction == 1.0
                    or now - self._logged.get(event.task, -float("inf")) >= self.log_every):
                self._write_line(event)
                self._logged[event.task] = now

    def say(self, text: str) -> None:
        """A message line of its own (above the bars on a terminal)."""
        if self._bars is not None:
            self._bars.console.print(text, markup=False, highlight=False)
        else:
            self.stream.write(text + "\n")
            self.stream.flush()

    def _write_line(self, event: ProgressEvent) -> None:
        frac = event.fraction
        percent = "" if frac is None else f"{100 * frac:3.0f}%  "
        self.stream.write(percent + event.text() + "\n")
        self.stream.flush()

    def _update_bar(self, event: ProgressEvent) -> None:
        if self._bars is None:
            from rich.console import Console
            from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn

            self._bars = Progress(TextColumn("{task.description}"), BarColumn(),
                                  TaskProgressColumn(), TextColumn("{task.fields[amount]}"),
                                  TextColumn("{task.fields[note]}", style="dim"),
                                  console=Console(file=self.stream, stderr=True), transient=False)
            self._bars.start()
        task = self._tasks.get(event.task)
        if task is None:
            task = self._tasks[event.task] = self._bars.add_task(
                event.task, total=event.total, amount=event.amount(), note=event.note)
        self._bars.update(task, completed=event.done, total=event.total,
                          amount=event.amount(), note=event.note)
