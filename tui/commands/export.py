"""`logitfork export "RECIPE" --as generation-config DIR` or `--as python`: take a recipe away.

`--as generation-config DIR` writes DIR/generation_config.json, a transformers
GenerationConfig. GenerationConfig applies its stages in one fixed order and has no
field for some of ours; when the recipe needs either, the command names what would
be lost and fails (exit 2) unless `--lossy` is given. `--as python` prints a short
snippet that calls `model.generate` with `Recipe.generate_kwargs()`, which keeps
the recipe whole and switches off the model's own sampling defaults (it needs
logitfork installed where it runs).
"""

from __future__ import annotations

import argparse
import sys

FORMS = ("generation-config", "python")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("recipe", metavar="RECIPE", help="the recipe, quoted as one argument")
    # FORM and DIR are taken together after --as, so that DIR may follow it
    p.add_argument("--as", dest="target", required=True, nargs="+", metavar=("FORM", "DIR"),
                   help="'generation-config DIR': write DIR/generation_config.json; "
                        "'python': print a snippet for model.generate")
    p.add_argument("--lossy", action="store_true",
                   help="write the generation config even when it cannot express the whole "
                        "recipe (what is lost is named on stderr)")


def python_snippet(recipe_text: str) -> str:
    """Python that samples with the recipe inside `model.generate`."""
    return f'''# logitfork recipe {recipe_text!r} for transformers' generate(), in its stage order.
from tui.decoding import Recipe

recipe = Recipe.parse({recipe_text!r})
# generate_kwargs() holds the recipe's processors and switches off every sampling stage
# generate() would add itself (a model's generation_config.json may set some), so each
# step samples from exactly the recipe's distribution. Call it anew for every generate()
# call: mirostat keeps its state in it.
# outputs = model.generate(**inputs, **recipe.generate_kwargs(), max_new_tokens=64)
'''


def main(args: argparse.Namespace) -> int:
    from tui.decoding import Recipe
    from tui.errors import UserError

    form, rest = args.target[0], args.target[1:]
    if form not in FORMS:
        raise UserError(f"--as: must be one of {', '.join(FORMS)}, got {form!r}")
    recipe = Recipe.parse(args.recipe)  # a RecipeError becomes one `error:` line
    if form == "python":
        if rest:
            raise UserError(f"--as python: prints to standard output and takes no folder, "
                            f"got {' '.join(rest)!r}")
        if args.lossy:
            raise UserError("--lossy: only for --as generation-config (python keeps the whole recipe)")
        sys.stdout.write(python_snippet(str(recipe)))
        return 0
    if len(rest) != 1:
        raise UserError("--as generation-config: needs exactly one folder to write, "
                        f"got {len(rest)}")
    return _write_generation_config(recipe, rest[0], args.lossy)


def _write_generation_config(recipe: object, folder: str, lossy: bool) -> int:
    import warnings

    from tui.decoding.hf import RecipeWarning
    from tui.errors import UserError, first_line

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        config = recipe.to_generation_config()  # type: ignore[attr-defined]
    lost = [str(w.message) for w in caught if issubclass(w.category, RecipeWarning)]
    for w in caught:
        if not issubclass(w.category, RecipeWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    if lost and not lossy:
        raise UserError(f"{'; '.join(lost)}; add --lossy to write the generation config anyway")
    try:
        config.save_pretrained(folder)
    except (OSError, ValueError) as exc:
        raise UserError(f"{folder}: cannot write the generation config: {first_line(exc)}") from None
    for message in lost:
        print(f"warning: {message}", file=sys.stderr)
    print(f"generation config: {folder}/generation_config.json", file=sys.stderr)
    return 0
