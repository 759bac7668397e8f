"""Session transcripts: the format, its typed header, and the atomic writer.

A transcript is a JSON Lines file (format `logitfork-transcript`, version 1; the
README's "Transcript format" section documents every field). Line 1 is the header:
the model, the prompt (text and token ids), every pane's recipe, seed, recipe
changes and fork origin, the draw settings and the package versions. Every later
line is one `StepRecord` with ``"kind": "step"``, in step order, and within a step in
the header's pane order. Readers live in `tui.transcript_reader`.

Files are written atomically: a temp file in the same folder, flushed and fsynced,
then `os.replace`, so an existing transcript is never left half-written.
Nothing here imports torch, Textual or Rich.
"""

from __future__ import annotations

import json
import os
import tempfile
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any, Iterable, Iterator

from tui.record import StepRecord

if TYPE_CHECKING:
    from tui.views import PaneView, SessionView
    from tui.session import SessionInfo

FORMAT = "logitfork-transcript"
RECOVERY_FORMAT = "logitfork-recovery"  # the same header and steps, plus event lines
VERSION = 1  # the newest version this code writes and reads
_PACKAGES = ("logitfork", "torch", "transformers", "numpy", "tokenizers", "textual")


def package_versions() -> dict[str, str]:
    """Installed versions of the packages that decide what a session decodes."""
    from tui import __version__

    out = {}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:  # logitfork run from a source tree
            out[name] = __version__ if name == "logitfork" else "absent"
    return out


@dataclass(frozen=True)
class PaneHeader:
    """One pane as the header records it (its state when the file was written)."""

    id: int
    name: str
    recipe: str  # the recipe in force at the end
    seed: int | None  # the pane's own draw seed (used only when draws are not shared)
    recipe_log: tuple[tuple[int, str], ...] = ()  # (from step, recipe), step order
    origin: tuple[int, int] | None = None  # (source pane id, step) if forked
    stop: str | None = None  # why it stopped, None if it was still running

    def to_json(self) -> dict[str, Any]:
        return {"id": self.id, "name": self.name, "recipe": self.recipe, "seed": self.seed,
                "recipe_log": [[s, r] for s, r in self.recipe_log],
                "origin": list(self.origin) if self.origin else None, "stop": self.stop}

    def rewound(self, step: int) -> "PaneHeader":
        """The entry after a rewind to `step`: later recipe changes take effect at `step`.

        The same rule as the engine's rewind (the latest change wins).
        """
        log: dict[int, str] = {}
        for s, r in self.recipe_log:
            log[min(s, step)] = r
        return replace(self, recipe_log=tuple(sorted(log.items())))

    @classmethod
    def of(cls, pane: "PaneView") -> "PaneHeader":
        return cls(pane.id, pane.name, pane.recipe, pane.seed,
                   tuple((int(s), str(r)) for s, r in pane.recipe_log),
                   tuple(pane.origin) if pane.origin else None, pane.stop)  # type: ignore[arg-type]


@dataclass(frozen=True)
class TranscriptHeader:
    """Everything line 1 holds. `extra` keeps header fields this version does not know."""

    title: str
    created: str  # ISO 8601, UTC
    model_name: str
    model_source: str
    dtype: str
    prompt_text: str | None
    messages: tuple[tuple[str, str], ...] | None  # (role, content) pairs, or None
    prompt_ids: tuple[int, ...]
    max_new_tokens: int
    stop: tuple[str, ...]
    seed: int
    shared_draws: bool
    panes: tuple[PaneHeader, ...]
    versions: dict[str, str] = field(default_factory=dict)
    draw_log: tuple[tuple[int, bool], ...] = ()  # (from step, shared); () = never changed
    extra: dict[str, Any] = field(default_factory=dict)

    def pane(self, pane_id: int) -> PaneHeader:
        for p in self.panes:
            if p.id == pane_id:
                return p
        raise KeyError(pane_id)

    def to_json(self, fmt: str = FORMAT) -> dict[str, Any]:
        messages = None if self.messages is None else [
            {"role": r, "content": c} for r, c in self.messages]
        return {
            "kind": "header", "format": fmt, "version": VERSION, "created": self.created,
            "title": self.title,
            "model": {"name": self.model_name, "source": self.model_source, "dtype": self.dtype},
            "prompt": {"text": self.prompt_text, "messages": messages,
                       "ids": list(self.prompt_ids)},
            "max_new_tokens": self.max_new_tokens, "stop": list(self.stop),
            "seed": self.seed, "shared_draws": self.shared_draws,
            "panes": [p.to_json() for p in self.panes],
            "versions": dict(self.versions),
            **({"draw_log": [list(e) for e in self.draw_log]} if self.draw_log else {}),
            **self.extra,
        }


def now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def header_of(view: "SessionView", info: "SessionInfo",
              prompt_ids: Iterable[int]) -> TranscriptHeader:
    """The header of a live session."""
    sc = info.scenario
    return TranscriptHeader(
        title=sc.title, created=now_iso(), model_name=info.model_name,
        model_source=info.model_source, dtype=info.dtype, prompt_text=sc.prompt,
        messages=tuple(sc.messages) if sc.messages else None,
        prompt_ids=tuple(int(i) for i in prompt_ids), max_new_tokens=sc.max_new_tokens,
        stop=tuple(sc.stop), seed=view.seed, shared_draws=view.shared_draws,
        panes=tuple(PaneHeader.of(p) for p in view.panes), versions=package_versions(),
        draw_log=view.draw_log if len(view.draw_log) > 1 else ())


def header(view: "SessionView", info: "SessionInfo", prompt_ids: Iterable[int]) -> dict[str, Any]:
    """The header line of a live session, as a JSON object."""
    return header_of(view, info, prompt_ids).to_json()


def dumps(obj: dict[str, Any]) -> str:
    """One JSON line: strict JSON (no NaN), UTF-8 text kept as is."""
    return json.dumps(obj, ensure_ascii=False, allow_nan=False)


def step_line(rec: StepRecord) -> str:
    return dumps({"kind": "step", **rec.to_json()})


def transcript_lines(head: TranscriptHeader, panes_records: Iterable[Iterable[StepRecord]],
                     fmt: str = FORMAT) -> Iterator[str]:
    """Header, then records step by step, panes in the order given (the header's)."""
    yield dumps(head.to_json(fmt))
    columns = [list(rs) for rs in panes_records]
    longest = max((len(c) for c in columns), default=0)
    for t in range(longest):
        for col in columns:
            if t < len(col):
                yield step_line(col[t])


def lines(view: "SessionView", info: "SessionInfo", prompt_ids: Iterable[int]) -> Iterator[str]:
    """The transcript as text lines (header first), steps in step order then pane order."""
    return transcript_lines(header_of(view, info, prompt_ids), [p.records for p in view.panes])


def write_atomic(path: str | os.PathLike[str], text_lines: Iterable[str]) -> Path:
    """Write lines to `path` through a temp file in the same folder, fsync, then replace.

    If anything fails (the lines' generator raises, the disk fills), the temp file is
    removed and whatever was at `path` before is left untouched.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            for line in text_lines:
                fh.write(line)
                fh.write("\n")
            fh.flush()
            os.fchmod(fh.fileno(), _mode_for(path))
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    _fsync_folder(folder)
    return path


def _mode_for(path: Path) -> int:
    """The file's present mode if it exists, else what `open` would give (0o666 - umask).

    mkstemp creates 0o600 files; a saved transcript should get the usual mode.
    """
    try:
        return path.stat().st_mode & 0o7777
    except OSError:
        mask = os.umask(0o022)  # read the umask (the only portable way), then put it back
        os.umask(mask)
        return 0o666 & ~mask


def _fsync_folder(folder: Path) -> None:
    """Make the rename itself durable (POSIX; a no-op where folders cannot be opened)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_stream(fh: IO[str], text_lines: Iterable[str]) -> None:
    for line in text_lines:
        fh.write(line + "\n")
    fh.flush()


def read_records(path: str | os.PathLike[str]) -> tuple[dict[str, Any], list[StepRecord]]:
    """A whole small transcript: its header as a JSON object and every record in file order.

    Kept for callers of the first version; new code should use
    `tui.transcript_reader.StoredSession`, which streams.
    """
    from tui.transcript_reader import StoredSession

    session = StoredSession.open(path)
    return session.header.to_json(), list(session.iter_records())
