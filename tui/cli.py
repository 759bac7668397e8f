"""The `logitfork` command line: a router over small command modules.

Each command lives in `tui/commands/<name>.py` with two functions,
``add_arguments(parser)`` and ``main(args) -> int``. Those modules import nothing
heavy at module level, so `logitfork recipe check` answers without loading torch.

What reaches the user:
- a `UserError` (or `RecipeError`): one `error: ...` line on stderr, exit 2;
- any other exception (a bug): one `error:` line saying which command failed and
  where the full report (the traceback) was written, exit 1; `--debug` prints the
  traceback instead;
- standard output closed early (`logitfork report X --out - | head -3`): a quiet
  exit, as the Python docs' "Note on SIGPIPE" (module `signal`) recommends.
"""

from __future__ import annotations

import argparse
import importlib
import os
import shlex
import sys
import traceback
from typing import Sequence

from tui import __version__
from tui.errors import UserError, first_line
from tui.files import crash_note
from tui.settings import prepare_process

# command name -> (module under tui.commands, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "watch": ("watch", "open the app on a scenario (the default command)"),
    "run": ("run", "run a scenario without screens and write a transcript"),
    "models": ("models", "list the model catalogue and what loads offline"),
    "recipe": ("recipe", "check a recipe text and print its canonical form"),
    "report": ("report", "write an HTML or Markdown report of a transcript"),
    "replay": ("replay", "open a saved transcript in the app, read-only, without the model"),
    "rerun": ("rerun", "decode a transcript's session again and compare token by token"),
    "recover": ("recover", "list crash-recovery logs, or turn one into a transcript"),
    "sweep": ("sweep", "draw many samples per recipe, measure them and find the trade-off front"),
    "sweep-merge": ("sweep_merge", "join the shard folders of one sweep into its result tables"),
    "export": ("export", "write a recipe as a transformers GenerationConfig or Python snippet"),
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="logitfork",
        description="Fork one small model's next-token distribution into several "
        "decoding settings and watch them side by side.",
        epilog="Generated text is raw, unfiltered model output: it can be false, biased "
        "or offensive. Check any setting chosen here on your own data before use.",
    )
    parser.add_argument("--version", action="version", version=f"logitfork {__version__}")
    parser.add_argument("--debug", action="store_true",
                        help="on an unexpected failure, print the full traceback")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        mod = importlib.import_module(f"tui.commands.{module}")
        mod.add_arguments(p)
        _add_debug(p)
        p.set_defaults(_module=mod)
    return parser


def _add_debug(parser: argparse.ArgumentParser) -> None:
    """`--debug` after the command name too (and after a sub-command's, as `recipe check`).

    SUPPRESS keeps the top-level value when the option is not repeated further on.
    """
    parser.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                        help="on an unexpected failure, print the full traceback")
    for action in parser._actions:  # argparse keeps nested sub-parsers only here
        if isinstance(action, argparse._SubParsersAction):
            for nested in action.choices.values():
                _add_debug(nested)


def _unexpected(argv: Sequence[str], exc: Exception, debug: bool) -> int:
    """The last line of defence: one `error:` line and a crash report (exit status 1)."""
    command = shlex.join(argv)
    doing = f"`logitfork {command if len(command) <= 120 else command[:117] + '...'}`"
    if debug:
        traceback.print_exception(exc, file=sys.stderr)
        print(f"error: {doing} failed: unexpected {type(exc).__name__}: {first_line(exc)}",
              file=sys.stderr)
        return 1
    print(f"error: {doing} failed: {crash_note(doing, exc)}; run it again with --debug to see "
          "the traceback", file=sys.stderr)
    return 1


def _stdout_closed() -> int:
    """Standard output's reader went away: stop quietly (Python docs, "Note on SIGPIPE")."""
    try:  # later flushes, at exit included, go nowhere instead of raising again
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # stdout is not a real file (tests)
        pass
    return 1


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    first = 1 if argv[:1] == ["--debug"] else 0
    rest = argv[first:]
    if not rest or (rest[0] not in COMMANDS and rest[0] not in ("-h", "--help", "--version")):
        argv.insert(first, "watch")  # `logitfork [SCENARIO]` opens the app
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        prepare_process()  # offline hub, passive OpenMP waits: before torch loads (tui.settings)
        status = int(args._module.main(args) or 0)
        sys.stdout.flush()  # a closed pipe shows here, inside the try, not at exit
        return status
    except BrokenPipeError:
        return _stdout_closed()
    except UserError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    except ValueError as exc:  # RecipeError is a ValueError with a full message
        if type(exc).__name__ == "RecipeError":
            print(f"error: {exc}", file=sys.stderr)
            return 2
        return _unexpected(argv, exc, args.debug)
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the last line of defence, see the module doc
        return _unexpected(argv, exc, args.debug)


if __name__ == "__main__":
    raise SystemExit(main())
