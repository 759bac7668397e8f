"""Reading transcripts: a streaming, validating reader and `StoredSession` for replay.

Files are read line by line, never whole. `StoredSession.open` makes one validating
pass (every line's fields, steps in order, panes known to the header, nothing after
a pane's stop) and keeps only the byte offset where each step begins, so that a
replay can jump to any step and read its records back from disk.

Bad input raises `TranscriptError` (a `UserError`): one line, ``FILE:LINE: reason``,
exit status 2. A last line cut short with no newline (the writer was killed mid-line)
is dropped with a warning on stderr; anything else wrong is an error.
"""

from __future__ import annotations

import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator

from tui.errors import UserError, open_input
from tui.session.record import StepRecord, TopToken
from tui.transcripts.headers import FORMAT, RECOVERY_FORMAT, PaneHeader, TranscriptHeader
from tui.transcripts.schema import (SchemaError, check_format, check_step, old_spellings,
                                    parse_header, parse_step, upgrade_header)

MAX_LINE_BYTES = 16 * 1024 * 1024  # a step line is a few KB; a header holds the prompt
Warn = Callable[[str], None]


class TranscriptError(UserError):
    """A transcript that cannot be read, as ``FILE:LINE: reason``."""

    def __init__(self, path: str | os.PathLike[str], line: int, reason: str) -> None:
        super().__init__(f"{path}:{line}: {reason}")
        self.path, self.line, self.reason = str(path), line, reason


def warn_stderr(message: str) -> None:
    print(f"warning: {message}", file=sys.stderr)


@dataclass(frozen=True)
class RawLine:
    number: int  # 1-based
    offset: int  # byte offset of the line's start
    end: int  # byte offset just after the line (and its newline)
    obj: dict[str, Any]


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not valid JSON")


_DECODER = json.JSONDecoder(parse_constant=_reject_constant)  # RFC 8259 has no NaN


def iter_json_lines(path: str | os.PathLike[str], *, start: int = 0, first_line: int = 1,
                    stop: int | None = None, warn: Warn | None = None) -> Iterator[RawLine]:
    """Each line of `path` as a JSON object, from byte `start` up to byte `stop`."""
    with open_input(path, "transcript") as fh:
        fh.seek(start)
        offset, number = start, first_line
        while stop is None or offset < stop:
            raw = fh.readline(MAX_LINE_BYTES + 1)
            if not raw:
                return
            end = offset + len(raw)
            complete = raw.endswith(b"\n")
            if not complete and len(raw) > MAX_LINE_BYTES:
                raise TranscriptError(path, number, f"line is longer than "
                                      f"{MAX_LINE_BYTES // (1024 * 1024)} MiB")
            try:
                obj = _DECODER.decode(raw.decode("utf-8"))
            except (UnicodeDecodeError, ValueError) as exc:
                if not complete:  # only the last line can lack its newline
                    (warn or warn_stderr)(f"{path}:{number}: the last line is cut short (the "
                                          f"writer stopped mid-line); it is left out")
                    return
                reason = ("not UTF-8 text" if isinstance(exc, UnicodeDecodeError)
                          else f"not a JSON line ({exc})")
                raise TranscriptError(path, number, reason) from None
            if not isinstance(obj, dict):
                raise TranscriptError(path, number, f"a line must be a JSON object, "
                                      f"got {type(obj).__name__}")
            yield RawLine(number, offset, end, obj)
            offset, number = end, number + 1


def read_header_line(path: str | os.PathLike[str], line: RawLine | None,
                     formats: tuple[str, ...]) -> tuple[TranscriptHeader, str]:
    """Validate line 1: a header of one of `formats`, not newer than this code."""
    if line is None:
        raise TranscriptError(path, 1, "empty file: no header line")
    kind = line.obj.get("kind")
    if kind != "header":
        raise TranscriptError(path, 1, f"the first line must be the header (kind "
                              f"\"header\"), got kind {kind!r}")
    try:
        version = check_format(line.obj, formats)
        return parse_header(upgrade_header(line.obj, version)), line.obj["format"]
    except SchemaError as exc:
        if line.obj.get("format") == RECOVERY_FORMAT and RECOVERY_FORMAT not in formats:
            raise TranscriptError(path, 1, "this is a recovery log, not a transcript; turn "
                                  "it into one with `logitfork recover FILE --out X.jsonl`")
        if line.obj.get("format") == FORMAT and FORMAT not in formats:
            raise TranscriptError(path, 1, "this is a transcript, not a recovery log; open it "
                                  "with `logitfork replay FILE`")
        raise TranscriptError(path, 1, str(exc)) from None


def open_lines(path: Path, formats: tuple[str, ...], warn: Warn | None
               ) -> tuple[TranscriptHeader, RawLine, Iterator[RawLine], list[str]]:
    """Start reading a file of one of `formats`: its header, the header's line, the lines
    after it, and the list their warnings go to (each also told to `warn`, stderr by default)."""
    warnings: list[str] = []

    def note(message: str) -> None:
        warnings.append(message)
        (warn or warn_stderr)(message)

    lines = iter_json_lines(path, warn=note)
    first = next(lines, None)
    head, _ = read_header_line(path, first, formats)
    assert first is not None  # read_header_line raised otherwise
    if old_spellings(first.obj):
        note(f"{path}: written with mirostat's old parameter name eta; read as learning_rate")
    return head, first, lines, warnings


def step_of(path: str | os.PathLike[str], line: RawLine) -> StepRecord:
    try:
        return parse_step(line.obj)
    except SchemaError as exc:
        raise TranscriptError(path, line.number, str(exc)) from None


def check_step_line(path: str | os.PathLike[str], line: RawLine) -> tuple[int, int, str | None]:
    """Check a step line without building its record: (step, pane, stop)."""
    try:
        check_step(line.obj)
    except SchemaError as exc:
        raise TranscriptError(path, line.number, str(exc)) from None
    return line.obj["step"], line.obj["pane"], line.obj.get("stop")


class _OrderCheck:
    """Steps count up from 0 in each pane; a step's lines follow the header's pane order."""

    def __init__(self, path: str | os.PathLike[str], head: TranscriptHeader) -> None:
        self.path = path
        self.order = {p.id: i for i, p in enumerate(head.panes)}
        self.counts = {p.id: 0 for p in head.panes}
        self.last_stop: dict[int, str | None] = {p.id: None for p in head.panes}
        self.step, self.index = 0, -1

    def check(self, number: int, step: int, pane: int, stop: str | None) -> bool:
        """Check one record's place; True if it starts a new step."""
        def err(reason: str) -> TranscriptError:
            return TranscriptError(self.path, number, reason)

        if pane not in self.order:
            known = ", ".join(str(i) for i in self.order)
            raise err(f"pane: {pane} is not a pane of the header (panes: {known})")
        if step < self.step:
            raise err(f"step: {step} after step {self.step}; lines must be in step order")
        if self.last_stop[pane] is not None:
            raise err(f"pane {pane} has a step after it stopped ({self.last_stop[pane]})")
        held = self.counts[pane]
        if step != held:
            was = f"goes from step {held - 1} to" if held else "starts at step"
            raise err(f"step: pane {pane} {was} {step}; each pane's steps count up from 0 "
                      "with none missing")
        new_step = step > self.step or self.index < 0
        if step > self.step:
            self.step, self.index = step, -1
        if self.order[pane] <= self.index:
            raise err(f"pane: pane {pane} out of order within step {step}; a step's lines "
                      "follow the header's pane order, once each")
        self.index = self.order[pane]
        self.counts[pane] = held + 1
        self.last_stop[pane] = stop
        return new_step


class StoredSession:
    """A transcript on disk: its header, and its records read back on demand.

    Open with `StoredSession.open(path)`. Memory held: the header and one byte offset
    per step. Every read goes back to the file, which must not change meanwhile.
    """

    def __init__(self, path: Path, header: TranscriptHeader, step_offsets: list[int],
                 end: int, pane_lengths: dict[int, int], warnings: list[str]) -> None:
        self.path = path
        self.header = header
        self._offsets = step_offsets
        self._end = end
        self.pane_lengths = pane_lengths  # pane id -> its number of records
        self.warnings = warnings
        self._stamp = _stamp(path)

    @classmethod
    def open(cls, path: str | os.PathLike[str], *, warn: Warn | None = None) -> "StoredSession":
        """One validating pass over the file; raises `TranscriptError` on bad input."""
        path = Path(path)
        head, first, lines, warnings = open_lines(path, (FORMAT,), warn)
        order = _OrderCheck(path, head)
        offsets: list[int] = []
        end = first.end
        for line in lines:
            if line.obj.get("kind") != "step":
                kind = line.obj.get("kind")
                reason = ("a second header; the header must be the first line only"
                          if kind == "header" else f"kind: expected \"step\", got {kind!r}")
                raise TranscriptError(path, line.number, reason)
            if order.check(line.number, *check_step_line(path, line)):
                offsets.append(line.offset)
            end = line.end
        for p in head.panes:  # (a cut last line may have taken a stop record with it)
            if not warnings and order.last_stop[p.id] != p.stop:
                said = f"stopped ({p.stop})" if p.stop else "running"
                raise TranscriptError(path, 1, f"panes: pane {p.id} is marked {said} but its "
                                      f"records end {order.last_stop[p.id] or 'running'}")
        return cls(path, head, offsets, end, dict(order.counts), warnings)

    # ----- shape ----------------------------------------------------------------------

    @property
    def panes(self) -> tuple[PaneHeader, ...]:
        return self.header.panes

    @property
    def steps(self) -> int:
        """The number of steps: the longest pane's record count."""
        return len(self._offsets)

    # ----- records --------------------------------------------------------------------

    def iter_records(self, start_step: int = 0) -> Iterator[StepRecord]:
        """Every record from `start_step` on, in file order (step, then pane)."""
        if start_step >= self.steps:
            return
        self._check_unchanged()
        for line in iter_json_lines(self.path, start=self._offsets[start_step], stop=self._end):
            yield step_of(self.path, line)

    def iter_steps(self, start_step: int = 0) -> Iterator[tuple[int, dict[int, StepRecord]]]:
        """(step, {pane id: record}) for each step from `start_step` on."""
        current: dict[int, StepRecord] = {}
        step = start_step
        for rec in self.iter_records(start_step):
            if rec.step != step and current:
                yield step, current
                current = {}
            step = rec.step
            current[rec.pane] = rec
        if current:
            yield step, current

    def records_at(self, step: int) -> dict[int, StepRecord]:
        """{pane id: record} at one step (panes that had stopped are absent)."""
        if not 0 <= step < self.steps:
            raise IndexError(f"step {step} is outside 0..{self.steps - 1}")
        for t, recs in self.iter_steps(step):
            return recs
        return {}

    def record(self, pane_id: int, step: int) -> StepRecord | None:
        return self.records_at(step).get(pane_id)

    def top_at(self, pane_id: int, step: int) -> tuple[TopToken, ...]:
        """The stored top-20 raw tokens of a pane at a step (empty if it had stopped)."""
        rec = self.record(pane_id, step)
        return rec.top if rec else ()

    def pane_records(self, pane_id: int) -> Iterator[StepRecord]:
        self.header.pane(pane_id)  # KeyError for an unknown pane
        return (r for r in self.iter_records() if r.pane == pane_id)

    def pane_text(self, pane_id: int) -> str:
        return "".join(r.text for r in self.pane_records(pane_id))

    def _check_unchanged(self) -> None:
        if _stamp(self.path) != self._stamp:
            raise UserError(f"{self.path}: the file changed after it was opened; open it again")


def _stamp(path: Path) -> tuple[int, int]:
    try:
        st = path.stat()
    except OSError:
        return (-1, -1)
    return (st.st_size, st.st_mtime_ns)
