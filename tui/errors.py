"""The one error type that reaches the user as a single line, and its helpers.

Anything the user can get wrong (a file, a field, a model name) raises `UserError`;
the command line prints `error: <message>` on stderr and exits with `exit_code`,
never with a traceback. `open_input`/`read_text_input` turn a file that cannot be read
into such a line; `first_line` shortens a library's exception for one.

Anything else is a bug: `tui.files.crash_note` writes its traceback to a crash report
and gives the words for the one line that says what failed and where the report is.
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import BinaryIO



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
