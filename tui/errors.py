"""The one error type that reaches the user as a single line.

Anything the user can get wrong (a file, a field, a model name) raises `UserError`;
the command line prints `error: <message>` on stderr and exits with `exit_code`,
never with a traceback.
"""

from __future__ import annotations


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
