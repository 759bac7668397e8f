"""`logitfork recipe check "TEXT"`: parse a recipe and print its canonical form.

Exit status 0 with the canonical text on stdout, or 2 with ``error: <message>`` on
stderr. `--explain` adds one line per stage. A stage after `greedy` gets a
``warning:`` line on stderr: greedy leaves one token, so it can change nothing. Nothing heavy is imported until the
command runs (the decoding package needs only numpy).
"""

from __future__ import annotations

import argparse
import sys


def add_arguments(parser: argparse.ArgumentParser) -> None:
    actions = parser.add_subparsers(dest="recipe_action", metavar="ACTION", required=True)
    check = actions.add_parser(
        "check",
        help="parse a recipe and print its canonical form",
        description="Parse a recipe (stages applied left to right, e.g. "
        '"repetition_penalty=1.2 temperature=0.8 top_p=0.9") and print its canonical form.',
    )
    check.add_argument("text", metavar="TEXT", help="the recipe, quoted as one argument")
    check.add_argument("--explain", action="store_true", help="also print one line per stage")


def _summary(doc: str | None) -> str:
    """The first paragraph of a docstring, on one line."""
    paragraph = (doc or "").strip().split("\n\n")[0]
    return " ".join(paragraph.split())


def main(args: argparse.Namespace) -> int:
    from tui.decoding import Recipe, RecipeError

    try:
        recipe = Recipe.parse(args.text)
    except RecipeError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    print(str(recipe))
    idle = recipe.after_greedy
    if idle:
        names = " ".join(stage.text() for stage in idle)
        print(f"warning: {names}: after greedy, which keeps one token, "
              f"{'this stage changes' if len(idle) == 1 else 'these stages change'} nothing",
              file=sys.stderr)
    if getattr(args, "explain", False):
        if not recipe.stages:
            print("  (no stages: tokens are drawn from the model's own distribution)")
        for position, stage in enumerate(recipe.stages, start=1):
            print(f"  {position}. {stage.text():28} {_summary(type(stage).__doc__)}")
    return 0
