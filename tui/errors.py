"""The one error type that reaches the user as a single line, and its helpers.

Anything the user can get wrong (a file, a field, a model name) raises `UserError`;
the command line prints `error: <message>` on stderr and exits with `exit_code`,
never with a traceback. `open_input`/`read_text_input` turn a file that cannot be read
into such a line; `first_line` shortens a library's exception for one.

Anything else is a bug: `crash_note` writes its traceback to a crash report in the
user state folder and gives the words for the one line that says what failed and where
the report is (the command line and the app both use it).
"""

from __future__ import annotations

import os
import platform
import re
import traceback
from datetime import datetime, timezone
from pathlib import Path
from typing import BinaryIO

STATE_DIR_ENV = "LOGITFORK_STATE_DIR"  # replaces the user state folder (tests use it)


class UserError(Exception):
    """A mistake in the user's input, told in one line.

    The message should name the file, the field and the reason, e.g.
    ``scenarios/tea.toml: pane[2].recipe: top_p must be in (0, 1], got 1.5``.
    """

    def __init__(self, message: str, exit_code: int = 2) -> None:
        super().__init__(message)
        self.exit_code = exit_code


def located(path: object, field: str, reason: str) -> UserError:
    """`UserError` in the standard ``FILE: FIELD: reason`` form."""
    return UserError(f"{path}: {field}: {reason}")



def open_input(path: str | os.PathLike[str], what: str) -> BinaryIO:
    """A user's file opened for reading bytes, or a `UserError` saying why it cannot be.

    `what` names the expected kind of file ("transcript", "sweep file") in the message
    for a folder given instead.
    """
    try:
        return open(path, "rb")
    except FileNotFoundError:
        raise UserError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise UserError(f"{path}: is a folder, not a {what}") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot be read ({exc.strerror})") from None


def read_text_input(path: Path, what: str) -> str:
    """A user's UTF-8 text file (see `open_input`), or a `UserError`."""
    with open_input(path, what) as fh:
        try:
            data = fh.read()
        except OSError as exc:
            raise UserError(f"{path}: cannot be read ({exc.strerror})") from None
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise UserError(f"{path}: not UTF-8 text ({exc.reason})") from None


def first_line(exc: BaseException) -> str:
    """The first line of an exception's message, whitespace folded, at most 240 characters."""
    text = str(exc).strip().splitlines()
    line = text[0] if text else type(exc).__name__
    line = re.sub(r"\s+", " ", line)
    return line if len(line) <= 240 else line[:237] + "..."


def state_folder() -> Path:
    """The user state folder: $LOGITFORK_STATE_DIR, else platformdirs' user state dir.

    The one place that decides it (recovery logs and crash reports live there); on the
    floor, because the command line may not import the transcripts room.
    """
    override = os.environ.get(STATE_DIR_ENV)
    if override:
        return Path(override)
    import platformdirs

    return Path(platformdirs.user_state_dir("logitfork"))


def write_crash_report(doing: str, exc: BaseException) -> Path:
    """Write the traceback of an unexpected failure, with what was being done and the
    versions, to ``crash-reports/`` in the state folder; return the file. Raises OSError."""
    from tui import __version__
    from tui.files import write_atomic

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
