"""The `logitfork` command line: a router over small command modules.

Each command lives in `tui/commands/<name>.py` with two functions,
``add_arguments(parser)`` and ``main(args) -> int``. Those modules import nothing
heavy at module level, so `logitfork recipe check` answers without loading torch.
Every `UserError` (and `RecipeError`) becomes one `error: ...` line on stderr.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from typing import Sequence

from tui import __version__
from tui.errors import UserError
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
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        mod = importlib.import_module(f"tui.commands.{module}")
        mod.add_arguments(p)
        p.set_defaults(_module=mod)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or (argv[0] not in COMMANDS and argv[0] not in ("-h", "--help", "--version")):
        argv.insert(0, "watch")  # `logitfork [SCENARIO]` opens the app
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        prepare_process()  # offline hub, passive OpenMP waits: before torch loads (tui.settings)
        return int(args._module.main(args) or 0)
    except UserError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    except ValueError as exc:  # RecipeError is a ValueError with a full message
        if type(exc).__name__ == "RecipeError":
            print(f"error: {exc}", file=sys.stderr)
            return 2
        raise
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
