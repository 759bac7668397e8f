"""The one way library code reports progress: a callback that takes a `ProgressEvent`.

Library layers (model conversion, sweeps, runs) never draw anything; they call the
`ProgressCallback` they were given, and the commands layer shows the events with
`rich.progress` (the app with its loading panel). `done` and `total` are in `unit`s:
bytes, chunks, tokens or steps; `total` is None while it is not yet known.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable


@dataclass(frozen=True)
class ProgressEvent:
    """How far one task has come."""

    task: str  # what is being done, as the user should read it: "converting model.gguf"
    done: float
    total: float | None = None
    unit: str = ""  # "bytes", "chunks", "tokens", "steps", or "" for a plain fraction
    note: str = ""  # a short extra, such as a token rate

    def amount(self) -> str:
        """"1.20/4.50 GB", "12/40 steps", "" for a plain fraction."""
        if self.unit == "bytes":
            return (f"{self.done / 1e9:.2f}/{self.total / 1e9:.2f} GB" if self.total
                    else f"{self.done / 1e9:.2f} GB")
        if not self.unit:
            return ""
        total = f"/{self.total:g}" if self.total else ""
        return f"{self.done:g}{total} {self.unit}"

    def text(self) -> str:
        """One line for a status display: "converting x.gguf  1.20/4.50 GB  about 40 s left"."""
        return "  ".join(part for part in (self.task, self.amount(), self.note) if part)

    @property
    def fraction(self) -> float | None:
        if not self.total:
            return None
        return min(1.0, max(0.0, self.done / self.total))


ProgressCallback = Callable[[ProgressEvent], None]


def no_progress(event: ProgressEvent) -> None:
    """A callback that shows nothing."""


def time_left(done: float, total: float | None, started: float, now: float | None = None) -> str:
    """"about 40 s left" from the rate so far (`started`: a `time.monotonic()` reading);
    "" until there is a rate to go by."""
    now = time.monotonic() if now is None else now
    if not total or done <= 0 or done >= total or now <= started:
        return ""
    seconds = (total - done) * (now - started) / done
    if seconds >= 90:
        return f"about {seconds / 60:.0f} min left"
    return f"about {max(1, round(seconds))} s left"


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
