"""Recipe text: the grammar, the stage names, and the parser that turns text into stages.

A recipe is a list of items, applied left to right, separated by spaces or commas::

    recipe := item (sep item)*        sep := spaces and/or ","
    item   := NAME                    e.g. greedy
            | NAME "=" NUMBER         e.g. top_p=0.9
            | NAME "(" KEY "=" NUMBER ("," KEY "=" NUMBER)* ")"
                                      e.g. mirostat(tau=5,learning_rate=0.1)

The empty text is the empty recipe: sample from the model's own distribution.
Every error names the item it is about.
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass
from typing import Callable

from tui.decoding.mirostat import MirostatV2
from tui.decoding.penalties import (FrequencyPenalty, NoRepeatNGram, PresencePenalty,
                                    RepetitionPenalty)
from tui.decoding.scaling import Greedy, Temperature
from tui.decoding.stage import RecipeError, Stage
from tui.decoding.truncation import Epsilon, Eta, MinP, TopK, TopP, TypicalP

_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_WHOLE = re.compile(r"[+-]?\d+")
_ITEM = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)(?:=(.*)|\((.*)\))?", re.DOTALL)


@dataclass(frozen=True, slots=True)
class StageSpec:
    """How one stage name is written: its value kind, an example for messages, the values
    it accepts and what it does in one line (the app's recipe dialog and help list these;
    tests/test_recipe_help.py checks `accepts` against the stage's own validation)."""

    name: str
    kind: str  # "real", "whole", "flag" or "params"
    make: Callable[..., Stage]
    example: str
    accepts: str
    meaning: str
    keys: tuple[str, ...] = ()  # parameter names for kind "params"; the first is the shorthand
    renamed: tuple[tuple[str, str], ...] = ()  # (old parameter name, new one), for messages


STAGES: dict[str, StageSpec] = {
    spec.name: spec
    for spec in (
        StageSpec("temperature", "real", Temperature, "temperature=0.8", ">= 0",
                  "divide the logits by T: below 1 sharper, above 1 flatter, 0 is greedy"),
        StageSpec("top_k", "whole", TopK, "top_k=50", "whole number >= 0",
                  "keep the k most likely tokens (0 keeps all)"),
        StageSpec("top_p", "real", TopP, "top_p=0.9", "(0, 1]",
                  "keep the fewest most likely tokens whose probability adds up to p"),
        StageSpec("min_p", "real", MinP, "min_p=0.05", "[0, 1]",
                  "keep tokens at least min_p times as likely as the most likely one"),
        StageSpec("typical_p", "real", TypicalP, "typical_p=0.95", "(0, 1]",
                  "keep tokens whose surprise is closest to the entropy, up to mass p; "
                  "can cut the most likely token"),
        StageSpec("epsilon", "real", Epsilon, "epsilon=0.0003", "[0, 1)",
                  "keep tokens with probability above epsilon"),
        StageSpec("eta", "real", Eta, "eta=0.0003", "[0, 1)",
                  "keep tokens above a threshold that falls as the entropy rises"),
        StageSpec("mirostat", "params", MirostatV2, "mirostat(tau=5,learning_rate=0.1)",
                  "tau > 0, learning_rate > 0 (default 0.1)",
                  "aim at a target surprise of tau bits per token, adapting the cut each step",
                  ("tau", "learning_rate"), renamed=(("eta", "learning_rate"),)),
        StageSpec("repetition_penalty", "real", RepetitionPenalty, "repetition_penalty=1.2",
                  "> 0", "make tokens already in the text less likely: divide a positive "
                  "logit by R, multiply a negative one"),
        StageSpec("presence_penalty", "real", PresencePenalty, "presence_penalty=0.5",
                  "any number", "subtract a fixed amount from tokens already in the text"),
        StageSpec("frequency_penalty", "real", FrequencyPenalty, "frequency_penalty=0.5",
                  "any number", "subtract the amount once per earlier use of the token"),
        StageSpec("no_repeat_ngram", "whole", NoRepeatNGram, "no_repeat_ngram=3",
                  "whole number >= 0", "ban tokens that would repeat an n-gram of the text"),
        StageSpec("greedy", "flag", Greedy, "greedy", "no value",
                  "keep only the most likely token"),
    )
}


def split_items(text: str) -> list[str]:
    """The items of a recipe text: split at spaces and commas outside parentheses."""
    items: list[str] = []
    current: list[str] = []
    depth = 0
    for char in text:
        if char == "(":
            depth += 1
        elif char == ")":
            depth -= 1
            if depth < 0:
                raise RecipeError(f"unbalanced ')' in recipe {text.strip()!r}")
        if depth == 0 and (char.isspace() or char == ","):
            if current:
                items.append("".join(current))
                current = []
            continue
        current.append(char)
    if depth != 0:
        raise RecipeError(f"unbalanced '(' in recipe {text.strip()!r}")
    if current:
        items.append("".join(current))
    return items


def _unknown(name: str, item: str) -> RecipeError:
    close = difflib.get_close_matches(name, list(STAGES), n=1)
    hint = f" (did you mean {close[0]}?)" if close else ""
    return RecipeError(f"{item!r}: unknown stage {name!r}{hint}; known stages: {', '.join(STAGES)}")


def _number(spec: StageSpec, item: str, label: str, value: str, whole: bool) -> float | int:
    value = value.strip()
    if not value:
        raise RecipeError(f"{item!r}: {label} needs a value, e.g. {spec.example}")
    if whole:
        if not _WHOLE.fullmatch(value):
            raise RecipeError(f"{item!r}: {label} must be a whole number, got {value!r}")
        return int(value)
    if not _NUMBER.fullmatch(value):
        raise RecipeError(f"{item!r}: {label} must be a number, got {value!r}")
    return float(value)


def _params(spec: StageSpec, item: str, inner: str) -> dict[str, float]:
    values: dict[str, float] = {}
    for part in (p for p in re.split(r"[,\s]+", inner.strip()) if p):
        key, eq, value = part.partition("=")
        if not eq:
            raise RecipeError(f"{item!r}: {spec.name} parameters are written key=value, e.g. {spec.example}")
        if key not in spec.keys:
            new = dict(spec.renamed).get(key)
            if new is not None:
                raise RecipeError(f"{item!r}: {spec.name} parameter {key} is now called {new}; "
                                  f"write e.g. {spec.example}")
            raise RecipeError(f"{item!r}: {spec.name} has no parameter {key!r}; it takes {', '.join(spec.keys)}")
        if key in values:
            raise RecipeError(f"{item!r}: {spec.name} parameter {key} is given twice")
        values[key] = float(_number(spec, item, f"{spec.name} {key}", value, whole=False))
    return values


def parse_item(item: str) -> Stage:
    """One stage from one item of recipe text."""
    match = _ITEM.fullmatch(item)
    if match is None:
        raise RecipeError(f"{item!r}: not a stage; write name=value, e.g. top_p=0.9")
    name, value, inner = match.group(1), match.group(2), match.group(3)
    spec = STAGES.get(name)
    if spec is None:
        raise _unknown(name, item)
    if spec.kind == "flag":
        if value is not None or inner is not None:
            raise RecipeError(f"{item!r}: {name} takes no value; write just {name}")
        return spec.make()
    if spec.kind == "params":
        if inner is not None:
            params = _params(spec, item, inner)
        elif value is not None:
            params = {spec.keys[0]: float(_number(spec, item, spec.name, value, whole=False))}
        else:
            params = {}
        if spec.keys[0] not in params:
            raise RecipeError(f"{item!r}: {name} needs {spec.keys[0]}, e.g. {spec.example}")
        return spec.make(**params)
    if inner is not None:
        raise RecipeError(f"{item!r}: {name} takes one value; write {spec.example}")
    if value is None:
        raise RecipeError(f"{item!r}: {name} needs a value, e.g. {spec.example}")
    return spec.make(_number(spec, item, name, value, whole=spec.kind == "whole"))


def parse_stages(text: str) -> tuple[Stage, ...]:
    """All stages of a recipe text, in written order."""
    if not isinstance(text, str):
        raise RecipeError(f"a recipe must be text, got {type(text).__name__}")
    return tuple(parse_item(item) for item in split_items(text))


_OLD_MIROSTAT_ETA = re.compile(r"(\bmirostat\s*\([^)]*?)\beta(\s*=)")


def upgrade_stored_recipe(text: str) -> tuple[str, bool]:
    """A recipe text from a file written by an older version, in today's spelling.

    Transcripts written before mirostat's learning rate was renamed hold
    ``mirostat(tau=5,eta=0.1)``; that `eta` can only mean the learning rate (the eta
    stage is never written inside parentheses). Returns the text with it renamed
    `learning_rate`, and whether anything changed. Every other text is returned as is.
    """
    upgraded = text
    while True:
        changed = _OLD_MIROSTAT_ETA.sub(r"\1learning_rate\2", upgraded)
        if changed == upgraded:
            return upgraded, upgraded != text
        upgraded = changed
