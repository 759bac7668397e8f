"""The one way library code reports progress: a callback that takes a `ProgressEvent`.

Library layers (model conversion, sweeps, runs) never draw anything; they call the
`ProgressCallback` they were given, and the commands layer shows the events with
`rich.progress` (the app with its loading panel). `done` and `total` are in `unit`s:
bytes, chunks, tokens or steps; `total` is None while it is not yet known.
"""

from __future__ import annotations

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

    @property
    def fraction(self) -> float | None:
        if not self.total:
            return None
        return min(1.0, max(0.0, self.done / self.total))


ProgressCallback = Callable[[ProgressEvent], None]


def no_progress(event: ProgressEvent) -> None:
    """A callback that shows nothing."""
