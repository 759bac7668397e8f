"""Reading recovery logs: replay their events into a session, list them, convert them.

A recovery log (written by `tui.transcripts.recovery_log.RecoveryLog`) holds the transcript header,
then step and event lines in the order things happened. `read_recovery` applies them
in order — a rewind cuts every pane back, a pane event adds or replaces a pane, a
session event changes the seed or the draw setting — and returns the session as it
stood at the last line that reached the disk. A log is as large as one session, which
the app held in memory anyway, so the result is held in memory too.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from datetime import datetime
from pathlib import Path
from typing import Iterator

from tui.errors import UserError
from tui.session.record import StepRecord
from tui.transcripts.format import transcript_lines
from tui.transcripts.headers import FORMAT, RECOVERY_FORMAT, PaneHeader, TranscriptHeader
from tui.transcripts.reader import TranscriptError, Warn, open_lines, step_of
from tui.transcripts.recovery_log import recovery_dir
from tui.transcripts.schema import SchemaError, parse_event


@dataclass(frozen=True)
class RecoveredSession:
    """A session rebuilt from a recovery log."""

    path: Path
    header: TranscriptHeader  # panes as they stood at the end, stops from their records
    records: dict[int, tuple[StepRecord, ...]]  # pane id -> its records
    pid: int | None
    warnings: tuple[str, ...] = ()

    @property
    def steps(self) -> int:
        return max((len(r) for r in self.records.values()), default=0)

    def transcript_lines(self) -> Iterator[str]:
        """The session as a normal transcript (format `logitfork-transcript`)."""
        extra = {k: v for k, v in self.header.extra.items() if k != "recovery"}
        head = replace(self.header, extra=extra)
        return transcript_lines(head, [self.records[p.id] for p in head.panes], FORMAT)


def read_recovery(path: str | os.PathLike[str], *, warn: Warn | None = None) -> RecoveredSession:
    """Replay a recovery log; raises `TranscriptError` (``FILE:LINE: reason``) on bad lines."""
    path = Path(path)
    head, _, lines, warnings = open_lines(path, (RECOVERY_FORMAT,), warn)
    panes: dict[int, PaneHeader] = {p.id: p for p in head.panes}
    records: dict[int, list[StepRecord]] = {p.id: [] for p in head.panes}
    seed, shared, draw_log = head.seed, head.shared_draws, head.draw_log
    for line in lines:
        kind = line.obj.get("kind")
        if kind == "step":
            rec = step_of(path, line)
            held = records.get(rec.pane)
            if held is None:
                raise TranscriptError(path, line.number, f"pane: {rec.pane} is not a pane of "
                                      "the session at this point of the log")
            if rec.step != len(held):
                raise TranscriptError(path, line.number, f"step: pane {rec.pane} holds "
                                      f"{len(held)} records, so its next step is {len(held)}, "
                                      f"got {rec.step}")
            if held and held[-1].stop is not None:
                raise TranscriptError(path, line.number, f"pane {rec.pane} has a step after "
                                      f"it stopped ({held[-1].stop})")
            held.append(rec)
            continue
        if kind == "header":
            raise TranscriptError(path, line.number, "a second header; the header must be "
                                  "the first line only")
        try:
            ev = parse_event(line.obj)
        except SchemaError as exc:
            raise TranscriptError(path, line.number, str(exc)) from None
        if ev.kind == "rewind":
            for held in records.values():
                del held[ev.step:]
            panes = {pid: p.rewound(ev.step) for pid, p in panes.items()}
        elif ev.kind == "pane":
            assert ev.pane is not None
            panes[ev.pane.id] = ev.pane
            records.setdefault(ev.pane.id, [])
        elif ev.kind == "remove_pane":
            if ev.pane_id not in panes:
                raise TranscriptError(path, line.number, f"pane: {ev.pane_id} is not a pane of "
                                      "the session at this point of the log")
            del panes[ev.pane_id]
            del records[ev.pane_id]
        elif ev.kind == "session":
            seed, shared = ev.seed, ev.shared_draws
            if ev.draw_log is not None:
                draw_log = ev.draw_log if len(ev.draw_log) > 1 else ()  # as in a transcript header
    if not panes:
        raise TranscriptError(path, 1, "the log removes every pane; nothing to recover")
    final = tuple(replace(p, stop=records[p.id][-1].stop if records[p.id] else None)
                  for p in panes.values())
    info = head.extra.get("recovery")
    pid = info.get("pid") if isinstance(info, dict) else None
    header = replace(head, panes=final, seed=seed, shared_draws=shared,  # type: ignore[arg-type]
                     draw_log=draw_log)
    return RecoveredSession(path, header, {k: tuple(v) for k, v in records.items()},
                            pid if isinstance(pid, int) else None, tuple(warnings))


@dataclass(frozen=True)
class RecoverySummary:
    """One line of `logitfork recover`'s list."""

    path: Path
    modified: datetime  # local time of the last write
    title: str
    model: str
    steps: int
    panes: int
    running: bool  # the writing process still exists
    problem: str | None = None  # why the log cannot be read, if it cannot


def list_recoveries(folder: Path | None = None) -> list[RecoverySummary]:
    """The recovery logs in `folder` (the user's by default), newest first."""
    folder = folder or recovery_dir()
    if not folder.is_dir():
        return []
    out = []
    for path in folder.glob("*.jsonl"):
        try:
            modified = datetime.fromtimestamp(path.stat().st_mtime)
        except OSError:
            continue
        try:
            rec = read_recovery(path, warn=lambda message: None)
        except UserError as exc:
            out.append(RecoverySummary(path, modified, "?", "?", 0, 0, False, str(exc)))
            continue
        out.append(RecoverySummary(path, modified, rec.header.title, rec.header.model_name,
                                   rec.steps, len(rec.header.panes), _alive(rec.pid)))
    return sorted(out, key=lambda s: s.modified, reverse=True)


def find_recovery(name: str, folder: Path | None = None) -> Path:
    """A path as given, or a file name in the recovery folder."""
    path = Path(name)
    if path.is_file():
        return path
    inside = (folder or recovery_dir()) / name
    if inside.is_file():
        return inside
    raise UserError(f"{name}: no such recovery file (see `logitfork recover` for the list)")


def _alive(pid: int | None) -> bool:
    if pid is None or pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, owned by someone else
    except OSError:
        return False
    return True
