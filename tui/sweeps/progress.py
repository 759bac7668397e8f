"""The sweep's progress line on stderr: a bar, tokens per second and the time left.

Work is counted in row-steps: each row of the sweep may take up to `max_new_tokens`
steps, and a row that ends early counts its unused steps as done, so the bar reaches
100% exactly when the last row ends. On a terminal the line is redrawn in place
(carriage return, at most five times a second); otherwise, as in a log file, a
plain line is written now and then (every `log_every` seconds) and at the end.
Plain text, no rich.
"""

from __future__ import annotations

import sys
import time
from typing import Callable, TextIO

from tui.progress import format_duration

Clock = Callable[[], float]


class SweepProgress:
    """Counts row-steps and tokens; draws ``sweep [####....] 40%  ...  ETA 1m05s``."""

    def __init__(self, total_rows: int, max_new_tokens: int, *, chunks: int,
                 stream: TextIO | None = None, title: str = "sweep", width: int = 24,
                 log_every: float = 15.0, clock: Clock = time.monotonic) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.interactive = bool(getattr(self.stream, "isatty", lambda: False)())
        self.title = title
        self.width = width
        self.total = max(total_rows * max_new_tokens, 1)
        self.max_new_tokens = max_new_tokens
        self.chunks = chunks
        self.log_every = log_every
        self._clock = clock
        self._start = clock()
        self._last_draw = -float("inf")
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
        self._maybe_draw()

    def chunk_done(self, rows: int, tokens: int | None = None) -> None:
        """A chunk of `rows` rows was written: its whole budget counts as done.

        `tokens`: the chunk's tokens, when it ran elsewhere (on a cluster worker) and
        its steps were not counted here.
        """
        self._done += rows * self.max_new_tokens
        self.tokens += tokens or 0
        self._live_steps = self._ended_rows_steps = self._steps_in_chunk = 0
        self.chunks_done += 1
        self._maybe_draw()

    def fraction(self) -> float:
        return min((self._done + self._live_steps + self._ended_rows_steps) / self.total, 1.0)

    def line(self) -> str:
        """The progress line, without line ending."""
        elapsed = self._clock() - self._start
        frac = self.fraction()
        rate = self.tokens / elapsed if elapsed > 0 else 0.0
        eta = elapsed * (1 - frac) / frac if frac > 0 else float("nan")
        filled = int(frac * self.width)
        bar = "#" * filled + "." * (self.width - filled)
        return (f"{self.title} [{bar}] {100 * frac:3.0f}%  chunks {self.chunks_done}/{self.chunks}"
                f"  {self.tokens} tokens  {rate:.1f} tok/s  ETA {format_duration(eta)}")

    def note(self, text: str) -> None:
        """A line of its own (a lost worker, say); the progress line is drawn again below it."""
        self.stream.write(("\r\x1b[K" if self.interactive else "") + text + "\n")
        self.stream.flush()
        self._last_draw = -float("inf")
        self._maybe_draw()

    def finish(self) -> None:
        """Draw the final state and end the line."""
        self.stream.write(("\r" if self.interactive else "") + self.line() + "\n")
        self.stream.flush()

    def _maybe_draw(self) -> None:
        now = self._clock()
        if self.interactive:
            if now - self._last_draw >= 0.2:
                self.stream.write("\r" + self.line())
                self.stream.flush()
                self._last_draw = now
        elif now - self._last_draw >= self.log_every:
            self.stream.write(self.line() + "\n")
            self.stream.flush()
            self._last_draw = now
