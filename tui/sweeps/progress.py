"""Counting a sweep's progress: row-steps done, tokens, the rate and the time left.

Work is counted in row-steps: each row of the sweep may take up to `max_new_tokens`
steps, and a row that ends early counts its unused steps as done, so the work reaches
100% exactly when the last row ends. Nothing is drawn here: every change is reported
as a `tui.progress.ProgressEvent` to the callback the command gave (which draws a bar
on a terminal and plain lines in a log), and a note (a lost worker) goes to `say`.
"""

from __future__ import annotations

import time
from typing import Callable

from tui.progress import ProgressCallback, ProgressEvent, format_duration

Clock = Callable[[], float]


class SweepProgress:
    """Counts row-steps and tokens; reports ``chunks 1/4  812 tokens  40.1 tok/s  ETA 1m05s``."""

    def __init__(self, total_rows: int, max_new_tokens: int, *, chunks: int,
                 report: ProgressCallback, say: Callable[[str], None] = print,
                 title: str = "sweep", clock: Clock = time.monotonic) -> None:
        self.report = report
        self.say = say
        self.title = title
        self.total = max(total_rows * max_new_tokens, 1)
        self.max_new_tokens = max_new_tokens
        self.chunks = chunks
        self._clock = clock
        self._start = clock()
        self._steps_in_chunk = 0
        self._done = 0  # row-steps of finished chunks
        self._live_steps = 0  # row-steps of the chunk running now
        self._ended_rows_steps = 0
        self.tokens = 0
        self.chunks_done = 0

    def step(self, rows: int, ended: int) -> None:
        """One forward step of the running chunk: `rows` emitted a token, `ended` ended."""
        self._steps_in_chunk += 1
        self.tokens += rows
        self._live_steps += rows
        self._ended_rows_steps += ended * (self.max_new_tokens - self._steps_in_chunk)
        self.report(self.event())

    def chunk_done(self, rows: int, tokens: int | None = None) -> None:
        """A chunk of `rows` rows was written: its whole budget counts as done.

        `tokens`: the chunk's tokens, when it ran elsewhere (on a cluster worker) and
        its steps were not counted here.
        """
        self._done += rows * self.max_new_tokens
        self.tokens += tokens or 0
        self._live_steps = self._ended_rows_steps = self._steps_in_chunk = 0
        self.chunks_done += 1
        self.report(self.event())

    def fraction(self) -> float:
        return min(self._row_steps() / self.total, 1.0)

    def event(self) -> ProgressEvent:
        """Where the sweep stands, as the display shows it."""
        elapsed = self._clock() - self._start
        frac = self.fraction()
        rate = self.tokens / elapsed if elapsed > 0 else 0.0
        eta = elapsed * (1 - frac) / frac if frac > 0 else float("nan")
        note = (f"chunks {self.chunks_done}/{self.chunks}  {self.tokens} tokens  "
                f"{rate:.1f} tok/s  ETA {format_duration(eta)}")
        return ProgressEvent(self.title, min(self._row_steps(), self.total), self.total, "", note)

    def note(self, text: str) -> None:
        """A line of its own (a lost worker, say)."""
        self.say(text)

    def _row_steps(self) -> int:
        return self._done + self._live_steps + self._ended_rows_steps
