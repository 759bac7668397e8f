"""`logitfork watch [SCENARIO]`: open the app on a scenario (also plain `logitfork`).

Light imports only: Textual and the model are imported when the command runs.
"""

from __future__ import annotations

import argparse
import os


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("scenario", nargs="?", default=None, metavar="SCENARIO",
                        help="a shipped scenario's name or a scenario file (default: the "
                        "default scenario)")
    parser.add_argument("--model", default=None, metavar="NAME",
                        help="a catalogue name or a model folder/GGUF file (overrides the "
                        "scenario's model)")
    parser.add_argument("--seed", type=_seed, default=None, metavar="S",
                        help="the session's seed (overrides the scenario's)")
    parser.add_argument("--mono", action="store_true",
                        help="no colour: text styles carry the rank (also when NO_COLOR is set)")
    parser.add_argument("--dtype", choices=("auto", "float32", "bfloat16"), default="auto",
                        help="weights and activations (default auto: float32 unless the model "
                        "is too big or too slow in it, then bfloat16)")
    parser.add_argument("--allow-pickle", action="store_true",
                        help="allow a model with only pickled (.bin/.pt) weights; they can run "
                        "code when loaded")


def _seed(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 0, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be >= 0, got {value}")
    return value


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
