"""`logitfork watch [SCENARIO]`: open the app on a scenario (also plain `logitfork`).

Light imports only: Textual and the model are imported when the command runs.
"""

from __future__ import annotations

import argparse
import os

from tui.commands.session_options import add_session_options


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_session_options(parser)
    parser.add_argument("--mono", action="store_true",
                        help="no colour: text styles carry the rank (also when NO_COLOR is set)")


def wants_mono(flag: bool, environ: dict[str, str] | os._Environ[str] = os.environ) -> bool:
    """--mono, or the NO_COLOR convention (no-color.org: set and not empty)."""
    return flag or bool(environ.get("NO_COLOR"))


def main(args: argparse.Namespace) -> int:
    import sys

    from tui.app.app import make_app
    from tui.errors import UserError

    app = make_app(args.scenario, model=args.model, seed=args.seed,
                   mono=wants_mono(args.mono), dtype=args.dtype,
                   allow_pickle=args.allow_pickle, recovery=True)
    app.run()
    if app.error_message:
        raise UserError(app.error_message)
    if app.return_code not in (None, 0):
        print("error: the app stopped on an internal error (see above)", file=sys.stderr)
    return int(app.return_code or 0)
