"""The recovery log: a running session's records, appended to disk as they are made.

After a crash or `kill -9`, at most the last few steps are lost; `logitfork recover`
lists the logs and turns one into a normal transcript (`tui.transcripts.recovery_reader`).

A log lives in ``platformdirs.user_state_dir("logitfork")/recovery/`` (the
environment variable ``LOGITFORK_STATE_DIR`` replaces the state folder, for tests).
It is a JSON Lines file of format `logitfork-recovery`: the transcript header, then
step lines and event lines in the order things happened (see the README section
"Transcript format"). Nothing is buffered in Python between flushes: pending lines
are written with one `os.write` and fsynced every `flush_every` steps, at every event
and on close.

The API the app calls (all methods are thread-safe; none raises on a disk error:
the log then stops writing and `error` says why):

    log = RecoveryLog(None)                  # or RecoveryLog(path); flush_every=4, fsync=True
    log.begin(view, info, prompt_ids)        # once, when the session starts
    log.append(engine.step())                # after every step: that step's records
    log.event("rewind", step=t)              # after engine.rewind(t) / force(...)
    log.event("pane", pane=view.panes[i])    # after fork / add_pane / set_recipe / rename
    log.event("remove_pane", pane=pane_id)   # after remove_pane
    log.event("session", seed=s, shared_draws=b, draw_log=...)  # after restart / set_shared_draws
    log.sync(engine.view())                  # or instead of all the above: diff and write
    log.restart(view, info, prompt_ids)      # after a prompt edit: the file starts over
    log.close(delete=True)                   # on a clean quit after a save
    log.close(delete=False)                  # on a quit without saving: keep it

Call it from the worker that steps the engine, not the UI thread: a flush fsyncs, which
takes a few milliseconds. `append` notices a rewind by itself (a record for a step the log already holds).
`sync(view)` compares the view with what the log holds and writes whatever changed;
calling it after every engine call is the simplest correct use.
"""

from __future__ import annotations

import os
import threading
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable

from tui.files import state_folder
from tui.session.record import StepRecord
from tui.transcripts.format import dumps, header_of, step_line
from tui.transcripts.headers import RECOVERY_FORMAT, PaneHeader

if TYPE_CHECKING:
    from tui.session.opening import SessionInfo
    from tui.session.views import PaneView, SessionView

FLUSH_EVERY = 4


def state_dir() -> Path:
    """The user state folder (or `$LOGITFORK_STATE_DIR`): `tui.files.state_folder`."""
    return state_folder()


def recovery_dir() -> Path:
    return state_dir() / "recovery"


def new_log_path(folder: Path | None = None) -> Path:
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S%fZ")
    return (folder or recovery_dir()) / f"session-{stamp}-{os.getpid()}.jsonl"


class RecoveryLog:
    """Appends a session's header, steps and events to a recovery file. See the module doc."""

    def __init__(self, path: str | os.PathLike[str] | None = None, *,
                 flush_every: int = FLUSH_EVERY, fsync: bool = True) -> None:
        if isinstance(flush_every, bool) or not isinstance(flush_every, int) or flush_every < 1:
            raise ValueError(f"flush_every must be an integer >= 1, got {flush_every!r}")
        self.path = Path(path) if path is not None else new_log_path()
        self.flush_every = flush_every
        self.fsync = fsync  # False only where durability does not matter (tests)
        self.error: str | None = None
        self._lock = threading.Lock()
        self._fd: int | None = None
        self._pending: list[str] = []
        self._unflushed_steps = 0
        self._panes: dict[int, PaneHeader] = {}
        self._written: dict[int, list[StepRecord]] = {}  # what a reader of the file will hold
        self._seed: int | None = None
        self._shared: bool | None = None
        self._draws: tuple[tuple[int, bool], ...] = ()  # the draw log last written
        self._closed = False

    # ----- the app's calls ----------------------------------------------------------

    def begin(self, view: "SessionView", info: "SessionInfo", prompt_ids: Iterable[int]) -> None:
        """Create the file and write the header (and any records the view already holds)."""
        with self._lock:
            if self._fd is not None or self._closed:
                raise RuntimeError("RecoveryLog.begin: already begun")
            head = header_of(view, info, prompt_ids)
            obj = head.to_json(RECOVERY_FORMAT)
            obj["recovery"] = {"pid": os.getpid(), "started": head.created}
            try:
                self.path.parent.mkdir(parents=True, exist_ok=True)
                self._fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_APPEND,
                                   0o600)
            except OSError as exc:
                self._fail(exc)
                return
            self._pending.append(dumps(obj))
            self._seed, self._shared, self._draws = view.seed, view.shared_draws, view.draw_log
            for p in head.panes:
                self._panes[p.id] = p
                self._written[p.id] = []
            self._write_new_records(view.panes)
            self._flush()

    def restart(self, view: "SessionView", info: "SessionInfo", prompt_ids: Iterable[int]) -> None:
        """Begin again on the same file: the session restarted on a new prompt, so nothing
        the log held applies any more (the header changes)."""
        with self._lock:
            if self._closed or self._fd is None:
                return
            try:
                os.close(self._fd)
            except OSError:
                pass
            self._fd = None
            self._pending, self._unflushed_steps = [], 0
            self._panes, self._written = {}, {}
        self.begin(view, info, prompt_ids)

    def append(self, records: Iterable[StepRecord]) -> None:
        """The records of one step (what `Engine.step()` returned)."""
        with self._lock:
            if not self._usable():
                return
            for rec in records:
                self._append_one(rec)
            self._unflushed_steps += 1
            if self._unflushed_steps >= self.flush_every:
                self._flush()

    def event(self, kind: str, **fields: Any) -> None:
        """A change to the session other than a step; written and flushed at once."""
        with self._lock:
            if not self._usable():
                return
            if kind == "rewind":
                self._rewind(_nonneg_int(fields, "step"))
            elif kind == "pane":
                pane = fields.get("pane")
                if isinstance(pane, PaneHeader):
                    self._upsert(pane)
                elif hasattr(pane, "records") and hasattr(pane, "recipe_log"):
                    self._upsert(PaneHeader.of(pane))
                    self._write_new_records([pane])
                else:
                    raise TypeError(f"event('pane'): pane must be a PaneView or PaneHeader, "
                                    f"got {type(pane).__name__}")
            elif kind == "remove_pane":
                self._remove(_nonneg_int(fields, "pane"))
            elif kind == "session":
                seed, shared = _nonneg_int(fields, "seed"), fields.get("shared_draws")
                if not isinstance(shared, bool):
                    raise TypeError(f"event('session'): shared_draws must be a bool, got {shared!r}")
                draws = tuple((int(a), bool(b)) for a, b in fields.get("draw_log", [(0, shared)]))
                self._session(seed, shared, draws)
            else:
                raise ValueError(f"unknown event kind {kind!r} "
                                 "(known: rewind, pane, remove_pane, session)")
            self._flush()

    def sync(self, view: "SessionView") -> None:
        """Write whatever differs between `view` and the log (rewinds, panes, records)."""
        with self._lock:
            if not self._usable():
                return
            changed = False
            if (view.seed, view.shared_draws, view.draw_log) != (self._seed, self._shared, self._draws):
                self._session(view.seed, view.shared_draws, view.draw_log)
                changed = True
            present = {p.id for p in view.panes}
            for pid in [pid for pid in self._panes if pid not in present]:
                self._remove(pid)
                changed = True
            for pane in view.panes:
                entry = PaneHeader.of(pane)
                if self._panes.get(pane.id) != entry:
                    self._upsert(entry)
                    changed = True
            shared = [(_common_prefix(self._written[p.id], p.records), len(self._written[p.id]))
                      for p in view.panes]
            cut = min((n for n, held in shared if n < held), default=None)
            if cut is not None:
                self._rewind(cut)
                changed = True
            before = len(self._pending)
            self._write_new_records(view.panes)
            if len(self._pending) > before:
                self._unflushed_steps += 1
            if changed or self._unflushed_steps >= self.flush_every:
                self._flush()

    def flush(self) -> None:
        with self._lock:
            if self._usable():
                self._flush()

    def close(self, delete: bool = False) -> None:
        """Flush and close; with `delete`, remove the file (a clean quit after a save)."""
        with self._lock:
            if self._closed:
                return
            if self._fd is not None:
                self._flush()
                try:
                    os.close(self._fd)
                except OSError:
                    pass
                self._fd = None
            self._closed = True
            if delete:
                self.path.unlink(missing_ok=True)

    def __enter__(self) -> "RecoveryLog":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close(delete=False)

    # ----- internals (the lock is held) ------------------------------------------------

    def _usable(self) -> bool:
        """False once closed or failed: late calls (a worker finishing a step) do nothing."""
        return not self._closed and self._fd is not None and self.error is None

    def _append_one(self, rec: StepRecord) -> None:
        written = self._written.get(rec.pane)
        if written is None:
            raise ValueError(f"RecoveryLog: pane {rec.pane} is not in the log; "
                             "call event('pane', pane=view) after adding or forking it")
        if rec.step < len(written):
            self._rewind(rec.step)  # the engine rewound: every pane goes back to rec.step
        elif rec.step > len(written):
            raise ValueError(f"RecoveryLog: pane {rec.pane} jumps from {len(written)} records "
                             f"to step {rec.step}; append every step's records")
        written.append(rec)
        self._pending.append(step_line(rec))

    def _write_new_records(self, panes: Iterable["PaneView"]) -> None:
        """Records beyond what the log holds, in transcript order (step, then pane)."""
        panes = list(panes)
        for p in panes:
            self._written.setdefault(p.id, [])
        longest = max((len(p.records) for p in panes), default=0)
        start = min((len(self._written[p.id]) for p in panes), default=0)
        for t in range(start, longest):  # from the first record not yet written
            for p in panes:
                if t < len(p.records) and t >= len(self._written[p.id]):
                    self._append_one(p.records[t])

    def _rewind(self, step: int) -> None:
        """Every pane back to `step` records; readers clamp recipe changes as the engine does."""
        for written in self._written.values():
            del written[step:]
        self._panes = {pid: p.rewound(step) for pid, p in self._panes.items()}
        self._pending.append(dumps({"kind": "rewind", "step": step}))

    def _upsert(self, entry: PaneHeader) -> None:
        self._panes[entry.id] = entry
        self._written.setdefault(entry.id, [])
        self._pending.append(dumps({"kind": "pane", "pane": entry.to_json()}))

    def _remove(self, pane_id: int) -> None:
        self._panes.pop(pane_id, None)
        self._written.pop(pane_id, None)
        self._pending.append(dumps({"kind": "remove_pane", "pane": pane_id}))

    def _session(self, seed: int, shared: bool, draws: tuple[tuple[int, bool], ...]) -> None:
        self._seed, self._shared, self._draws = seed, shared, tuple(draws)
        self._pending.append(dumps({"kind": "session", "seed": seed, "shared_draws": shared,
                                    "draw_log": [list(e) for e in draws]}))

    def _flush(self) -> None:
        self._unflushed_steps = 0
        if not self._pending or self._fd is None or self.error is not None:
            return
        data = ("\n".join(self._pending) + "\n").encode("utf-8")
        self._pending = []
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(self._fd, view):]
            if self.fsync:
                os.fsync(self._fd)
        except OSError as exc:
            self._fail(exc)

    def _fail(self, exc: OSError) -> None:
        self.error = f"{self.path}: recovery log stopped: {exc.strerror or exc}"
        self._pending = []
        if self._fd is not None:
            try:
                os.close(self._fd)
            except OSError:
                pass
            self._fd = None


def _common_prefix(written: list[StepRecord], records: tuple[StepRecord, ...]) -> int:
    """How many leading records the log and the view share (identity first, it is cheap)."""
    n = min(len(written), len(records))
    if n and written[n - 1] is records[n - 1]:
        return n  # the engine keeps record objects until a rewind replaces them
    i = 0
    while i < n and (written[i] is records[i] or written[i] == records[i]):
        i += 1
    return i


def _nonneg_int(fields: dict[str, Any], key: str) -> int:
    v = fields.get(key)
    if isinstance(v, bool) or not isinstance(v, int) or v < 0:
        raise TypeError(f"event: {key} must be an integer >= 0, got {v!r}")
    return v
