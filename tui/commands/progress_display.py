"""Showing `ProgressEvent`s on stderr: a `rich.progress` bar on a terminal, plain lines in a log.

Library code reports progress through `tui.progress.ProgressCallback` and never draws;
the commands hand it `ProgressDisplay.update`. On a terminal each task is one bar with
its count, rate note and time left, redrawn in place; when stderr is a file or a pipe
(a cluster job's log), a plain line is written every `log_every` seconds and when a
task ends, so that logs stay readable.
"""

from __future__ import annotations

import sys
import time
from types import TracebackType
from typing import Any, TextIO

from tui.progress import ProgressEvent


def format_duration(seconds: float) -> str:
    """``45s``, ``3m05s``, ``2h07m``; ``?`` when unknown."""
    if seconds != seconds or seconds < 0 or seconds == float("inf"):
        return "?"
    s = int(round(seconds))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s // 3600}h{s % 3600 // 60:02d}m"


def format_amount(value: float, unit: str) -> str:
    if unit == "bytes":
        for scale, name in ((1 << 30, "GiB"), (1 << 20, "MiB"), (1 << 10, "KiB")):
            if value >= scale:
                return f"{value / scale:.1f} {name}"
        return f"{value:.0f} B"
    return f"{value:g} {unit}".rstrip()


class ProgressDisplay:
    """A context manager; `update(event)` is a `ProgressCallback`."""

    def __init__(self, stream: TextIO | None = None, *, log_every: float = 15.0) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.interactive = bool(getattr(self.stream, "isatty", lambda: False)())
        self.log_every = log_every
        self._bars: Any = None
        self._tasks: dict[str, Any] = {}
        self._started: dict[str, float] = {}
        self._last_line: dict[str, float] = {}
        self._last: dict[str, ProgressEvent] = {}

    def __enter__(self) -> "ProgressDisplay":
        if self.interactive:
            from rich.console import Console
            from rich.progress import (BarColumn, Progress, TaskProgressColumn, TextColumn,
                                       TimeRemainingColumn)

            self._bars = Progress(TextColumn("{task.description}"), BarColumn(),
                                  TaskProgressColumn(), TextColumn("{task.fields[amount]}"),
                                  TextColumn("{task.fields[note]}"), TimeRemainingColumn(),
                                  console=Console(file=self.stream), transient=False)
            self._bars.start()
        return self

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if self._bars is not None:
            self._bars.stop()
        else:
            for event in self._last.values():
                if event.fraction != 1.0:  # a task cut short still leaves its last line
                    self._write_line(event)

    def update(self, event: ProgressEvent) -> None:
        self._last[event.task] = event
        now = time.monotonic()
        self._started.setdefault(event.task, now)
        if self._bars is not None:
            self._update_bar(event)
            return
        finished = event.fraction == 1.0
        if finished or now - self._last_line.get(event.task, -float("inf")) >= self.log_every:
            self._write_line(event)
            self._last_line[event.task] = now

    def line(self, event: ProgressEvent) -> str:
        """The plain line for an event: task, percent, amount, note, time left."""
        parts = [event.task]
        frac = event.fraction
        if frac is not None:
            parts.append(f"{100 * frac:3.0f}%")
        total = f"/{format_amount(event.total, event.unit)}" if event.total else ""
        parts.append(format_amount(event.done, event.unit) + total)
        if event.note:
            parts.append(event.note)
        elapsed = time.monotonic() - self._started.get(event.task, time.monotonic())
        if frac:
            parts.append(f"left {format_duration(elapsed * (1 - frac) / frac)}")
        return "  ".join(parts)

    def _write_line(self, event: ProgressEvent) -> None:
        self.stream.write(self.line(event) + "\n")
        self.stream.flush()

    def _update_bar(self, event: ProgressEvent) -> None:
        amount = format_amount(event.done, event.unit)
        if event.total:
            amount += "/" + format_amount(event.total, event.unit)
        task = self._tasks.get(event.task)
        if task is None:
            task = self._tasks[event.task] = self._bars.add_task(
                event.task, total=event.total, amount=amount, note=event.note)
        self._bars.update(task, completed=event.done, total=event.total, amount=amount,
                          note=event.note)
