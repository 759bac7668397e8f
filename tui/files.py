"""Writing a user's file atomically: the one writer every transcript, report, sweep file and cache record uses.

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
import secrets
from pathlib import Path
from typing import Iterable

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
