"""The files logitfork writes: the one atomic writer, the state folder and crash reports.

`write_atomic` is the writer every transcript, report, sweep file and cache record uses.

The file is written to a fresh temp file in the same folder, flushed and fsynced,
renamed over the target with `os.replace`, and the folder is fsynced, so that after
a crash or a power cut the target holds either its old or its new content, never
half of either. If anything fails before the rename (the data's generator raises,
the disk fills), the temp file is removed and the target is left untouched.

A new file gets the mode `open` would give it (0o666 less the umask: the kernel applies
the umask to the temp file's creation, so the process umask is never changed); a file
that already exists keeps its mode. (POSIX rename and fsync semantics: common practice,
no source.)
"""

from __future__ import annotations

import os
import platform
import secrets
import traceback
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterable

from tui.errors import first_line
from tui.settings import settings

Data = str | bytes | Iterable[str]


def write_atomic(path: str | os.PathLike[str], data: Data) -> Path:
    """Replace `path` with `data`: text (UTF-8), bytes, or lines (each gets a newline)."""
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    try:
        mode = path.stat().st_mode & 0o7777
    except OSError:
        mode = None
    tmp = folder / f".{path.name}.{secrets.token_hex(6)}.tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        with os.fdopen(fd, "wb") as fh:
            if isinstance(data, bytes):
                fh.write(data)
            elif isinstance(data, str):
                fh.write(data.encode("utf-8"))
            else:
                for line in data:
                    fh.write(line.encode("utf-8"))
                    fh.write(b"\n")
            fh.flush()
            if mode is not None:
                os.fchmod(fh.fileno(), mode)
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    fsync_folder(folder)
    return path


def fsync_folder(folder: Path) -> None:
    """Make a rename in `folder` durable (a no-op where folders cannot be opened)."""
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


def state_folder() -> Path:
    """The user state folder (`LOGITFORK_STATE_DIR`, else platformdirs' user state dir).

    Recovery logs and crash reports live there.
    """
    override = settings().state_dir
    if override is not None:
        return override
    import platformdirs

    return Path(platformdirs.user_state_dir("logitfork"))


def write_crash_report(doing: str, exc: BaseException) -> Path:
    """Write the traceback of an unexpected failure, with what was being done and the
    versions, to ``crash-reports/`` in the state folder; return the file. Raises OSError."""
    from tui import __version__

    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S%fZ")
    path = state_folder() / "crash-reports" / f"crash-{stamp}-{os.getpid()}.txt"
    path.parent.mkdir(parents=True, exist_ok=True)
    lines = [f"logitfork {__version__} on Python {platform.python_version()} ({platform.platform()})",
             f"doing: {doing}", f"when: {stamp}", "",
             *"".join(traceback.format_exception(exc)).rstrip("\n").splitlines()]
    return write_atomic(path, lines)


def crash_note(doing: str, exc: BaseException) -> str:
    """``unexpected TYPE: MESSAGE; the full report is in FILE`` for a failure while `doing`
    (which the report records); writes the crash report it names."""
    what = f"unexpected {type(exc).__name__}: {first_line(exc)}"
    try:
        return f"{what}; the full report is in {write_crash_report(doing, exc)}"
    except OSError as write_exc:
        return f"{what}; no report could be written ({write_exc.strerror or write_exc})"
