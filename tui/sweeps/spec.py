"""Sweep files: which prompts, which recipes, how many samples of each.

A sweep is a TOML file of our own format (documented in the README):

    title = "..."                     # optional, default the file's stem
    model = "smollm2-135m-instruct"   # optional, anything `--model` takes
    prompts = ["text", [{ role = "user", content = "..." }]]   # either prompts ...
    scenario = "harbour-town.toml"    # ... or a scenario file whose prompt is used
    recipes = ["greedy", "top_p=0.9"] # explicit recipe texts, and/or a [grid]
    samples = 8                       # per prompt and recipe, 1..100000 (greedy: 1, see samples_for)
    max_new_tokens = 60               # 1..4096
    seed = 11                         # optional, default 0
    chunk_rows = 32                   # optional, rows saved together (resume, shards), 1..256
    stop = ["\\n\\n"]                 # optional stop strings
    [grid]                            # every combination; stages in written order
    temperature = [0.5, 0.7, 1.0]
    top_p = [0.8, 0.95, 1.0]

Grid order: each expanded recipe applies its stages in the order the keys are written
in the [grid] table, and combinations are listed with the first key changing slowest
(like `itertools.product`). A value is a number (``top_p = [0.9]`` gives "top_p=0.9"),
a string put after ``=`` as written (or right after the name when it opens with "(":
``mirostat = ["(tau=3,learning_rate=0.2)"]``), ``true`` for the bare stage name (``greedy``) or
``false`` to leave the stage out of that combination (a combination that leaves every
stage out is the empty recipe: the model's own distribution). Explicit recipes come
first, then the grid; duplicates (equal canonical text) keep their first place.

Every mistake raises `UserError` as ``FILE: FIELD: reason``; list positions count
from 1, as in scenario files.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any

from tui.errors import UserError, located, read_text_input
from tui.model.catalogue import DEFAULT_MODEL
from tui.session.scenario import ROLES

MAX_NEW_TOKENS = 4096
DEFAULT_CHUNK_ROWS = 32  # rows per saved chunk unless the file says otherwise
MAX_CHUNK_ROWS = 256
MAX_RECIPES = 256
MAX_SAMPLES = 100_000  # per prompt and recipe: far past any useful sweep, short of a hang
# 2: a recipe that keeps one token runs once (`samples_for`), repetition_penalty follows
# transformers' sign rule and mirostat's rate is `learning_rate`; a folder of format 1 is
# refused, not mixed in.
FINGERPRINT_FORMAT = "logitfork-sweep/2"
_KEYS = ("title", "model", "prompts", "scenario", "recipes", "grid", "samples",
         "max_new_tokens", "seed", "chunk_rows", "stop")

Messages = tuple[tuple[str, str], ...]  # (role, content) pairs, as in `tui.session.scenario`
Prompt = str | Messages
GridValue = int | float | str | bool


@dataclass(frozen=True)
class SweepSpec:
    """A validated sweep file. `recipe_texts` is the expanded, canonical recipe list."""

    title: str
    model: str
    prompts: tuple[Prompt, ...]  # empty when `scenario` is given
    scenario: Path | None  # resolved against the sweep file's folder
    explicit_recipes: tuple[str, ...]  # canonical texts of `recipes`
    grid: tuple[tuple[str, tuple[GridValue, ...]], ...]  # (stage, values), written order
    recipe_texts: tuple[str, ...]
    samples: int
    max_new_tokens: int
    seed: int = 0
    chunk_rows: int = DEFAULT_CHUNK_ROWS
    stop: tuple[str, ...] = ()
    path: Path = field(default=Path("<sweep>"), compare=False)
    source_text: str = field(default="", compare=False, repr=False)

    def recipes(self) -> list[str]:
        """Canonical recipe texts, de-duplicated, explicit ones first, then the grid."""
        return list(self.recipe_texts)

    def _scenario_relative(self) -> str | None:
        if self.scenario is None:
            return None
        return PurePosixPath(Path(os.path.relpath(self.scenario, self.path.parent))).as_posix()

    def fingerprint(self) -> str:
        """sha256 hex of everything that can change the sampled tokens.

        Covers model, prompts (or the scenario path as written relative to the sweep
        file; `tui.sweeps.plan.run_fingerprint` adds the scenario's own content), the
        expanded recipes, samples, max_new_tokens, seed, chunk_rows and stop. Not the
        title, nor whether a recipe came from the grid or the explicit list.
        """
        normal = {
            "format": FINGERPRINT_FORMAT, "model": self.model,
            "prompts": [p if isinstance(p, str) else [list(m) for m in p] for p in self.prompts],
            "scenario": self._scenario_relative(), "recipes": list(self.recipe_texts),
            "samples": self.samples, "max_new_tokens": self.max_new_tokens,
            "seed": self.seed, "chunk_rows": self.chunk_rows, "stop": list(self.stop),
        }
        text = json.dumps(normal, sort_keys=True, ensure_ascii=False, separators=(",", ":"))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    def to_toml_text(self) -> str:
        """The spec as a normalised sweep file that parses back to an equal spec."""
        lines = [f"title = {_toml_str(self.title)}", f"model = {_toml_str(self.model)}"]
        if self.scenario is not None:
            lines.append(f"scenario = {_toml_str(self._scenario_relative() or '')}")
        else:
            lines.append("prompts = [")
            lines += [f"  {_toml_prompt(p)}," for p in self.prompts]
            lines.append("]")
        if self.explicit_recipes:
            lines.append(f"recipes = [{', '.join(_toml_str(r) for r in self.explicit_recipes)}]")
        lines += [f"samples = {self.samples}", f"max_new_tokens = {self.max_new_tokens}",
                  f"seed = {self.seed}", f"chunk_rows = {self.chunk_rows}",
                  f"stop = [{', '.join(_toml_str(s) for s in self.stop)}]"]
        if self.grid:
            lines += ["", "[grid]"]
            lines += [f"{stage} = [{', '.join(_toml_value(v) for v in values)}]"
                      for stage, values in self.grid]
        return "\n".join(lines) + "\n"


def samples_for(recipe: str, samples: int) -> int:
    """How many samples of `recipe` a sweep draws per prompt: `samples`, or 1 for a
    recipe that keeps one token at every step (greedy), whose samples would all be
    the same text; its one sample stands for all of them when measured."""
    from tui.decoding import Recipe

    return 1 if Recipe.parse(recipe).keeps_one_token else samples


def _toml_str(text: str) -> str:
    """A TOML basic string (JSON escapes are TOML escapes; DEL must be escaped too)."""
    return json.dumps(text, ensure_ascii=False).replace("\x7f", "\\u007f")


def _toml_value(value: GridValue) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return _toml_str(value)
    return repr(value)


def _toml_prompt(prompt: Prompt) -> str:
    if isinstance(prompt, str):
        return _toml_str(prompt)
    tables = (f"{{ role = {_toml_str(r)}, content = {_toml_str(c)} }}" for r, c in prompt)
    return f"[{', '.join(tables)}]"


def load_sweep(path: str | Path) -> SweepSpec:
    """Read and validate a sweep file."""
    path = Path(path)
    return parse_sweep_text(read_text_input(path, "sweep file"), path)


def parse_sweep_text(text: str, path: str | Path = "<sweep>") -> SweepSpec:
    """Validate the text of a sweep file; `path` names it in errors and anchors `scenario`."""
    path = Path(path)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _syntax_error(path, str(exc)) from None
    unknown = [k for k in data if k not in _KEYS]
    if unknown:
        noun = "unknown field" if len(unknown) == 1 else "unknown fields"
        raise located(path, ", ".join(unknown), f"{noun} (known: {', '.join(_KEYS)})")

    if ("prompts" in data) == ("scenario" in data):
        raise located(path, "prompts", "give exactly one of `prompts` or `scenario`")
    prompts = _prompts(data["prompts"], path) if "prompts" in data else ()
    scenario = None
    if "scenario" in data:
        written = _string(data["scenario"], path, "scenario")
        scenario = Path(os.path.normpath(path.parent / written))

    explicit, grid, recipe_texts = _recipes(data, path)
    if "samples" not in data:
        raise located(path, "samples", f"missing (samples per prompt and recipe, 1..{MAX_SAMPLES})")
    if "max_new_tokens" not in data:
        raise located(path, "max_new_tokens", f"missing (1..{MAX_NEW_TOKENS})")
    stop = data.get("stop", [])
    if not isinstance(stop, list) or not all(isinstance(s, str) and s for s in stop):
        raise located(path, "stop", f"must be a list of non-empty strings, got {stop!r}")
    return SweepSpec(
        title=_string(data["title"], path, "title") if "title" in data else path.stem,
        model=_string(data["model"], path, "model") if "model" in data else DEFAULT_MODEL,
        prompts=prompts, scenario=scenario, explicit_recipes=explicit, grid=grid,
        recipe_texts=recipe_texts,
        samples=_integer(data, "samples", path, 1, MAX_SAMPLES, None),
        max_new_tokens=_integer(data, "max_new_tokens", path, 1, MAX_NEW_TOKENS, None),
        seed=_integer(data, "seed", path, 0, 2**63 - 1, 0),
        chunk_rows=_integer(data, "chunk_rows", path, 1, MAX_CHUNK_ROWS, DEFAULT_CHUNK_ROWS),
        stop=tuple(stop), path=path, source_text=text)


def _syntax_error(path: Path, message: str) -> UserError:
    """``FILE: line N: reason`` from tomllib's "reason (at line N, column M)"."""
    found = re.fullmatch(r"(?s)(.*) \(at line (\d+), column (\d+)\)", message)
    if found:
        reason, line, column = found.groups()
        return UserError(f"{path}: line {line}: {reason} (column {column})")
    found = re.fullmatch(r"(?s)(.*) \(at end of document\)", message)
    if found:
        return UserError(f"{path}: end of file: {found.group(1)}")
    return UserError(f"{path}: not valid TOML: {message}")


def _string(value: Any, path: Path, where: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise located(path, where, f"must be a non-empty string, got {value!r}")
    return value


def _integer(data: dict, key: str, path: Path, low: int, high: int | None,
             default: int | None) -> int:
    value = data.get(key, default)
    in_range = isinstance(value, int) and value >= low and (high is None or value <= high)
    if isinstance(value, bool) or not in_range:
        wanted = f"an integer >= {low}" if high is None else f"an integer in [{low}, {high}]"
        raise located(path, key, f"must be {wanted}, got {value!r}")
    return value


def _prompts(raw: Any, path: Path) -> tuple[Prompt, ...]:
    if not isinstance(raw, list) or not raw:
        raise located(path, "prompts", f"must be a non-empty list of prompts, got {raw!r}")
    out: list[Prompt] = []
    for i, item in enumerate(raw, start=1):
        where = f"prompts[{i}]"
        if isinstance(item, str):
            out.append(_string(item, path, where))
        elif isinstance(item, list) and item:
            out.append(tuple(_message(m, path, f"{where}[{j}]") for j, m in enumerate(item, 1)))
        else:
            raise located(path, where, "must be a non-empty string or a non-empty list of "
                                       f"{{ role, content }} tables, got {item!r}")
    return tuple(out)


def _message(raw: Any, path: Path, where: str) -> tuple[str, str]:
    if not isinstance(raw, dict) or set(raw) != {"role", "content"}:
        raise located(path, where, f"must be a table with `role` and `content` only, got {raw!r}")
    role = raw["role"]
    if role not in ROLES:
        raise located(path, f"{where}.role", f"must be one of {', '.join(ROLES)}, got {role!r}")
    return role, _string(raw["content"], path, f"{where}.content")


def _canonical(text: str, path: Path, where: str, prefix: str = "") -> str:
    """The canonical form of a recipe text; a bad one is located at `where`."""
    from tui.decoding import Recipe, RecipeError

    try:
        return str(Recipe.parse(text))
    except RecipeError as exc:
        raise located(path, where, f"{prefix}{exc}") from None


def _recipes(data: dict, path: Path) -> tuple[tuple[str, ...], tuple, tuple[str, ...]]:
    """(explicit canonical texts, grid, expanded de-duplicated canonical texts)."""
    raw = data.get("recipes", [])
    if not isinstance(raw, list):
        raise located(path, "recipes", f"must be a list of recipe texts, got {raw!r}")
    for i, r in enumerate(raw, start=1):
        if not isinstance(r, str):
            raise located(path, f"recipes[{i}]", f"must be a recipe text, got {r!r}")
    explicit = tuple(_canonical(r, path, f"recipes[{i}]") for i, r in enumerate(raw, start=1))
    grid = _grid(data["grid"], path) if "grid" in data else ()
    combos = math.prod(len(values) for _, values in grid) if grid else 0
    if combos > MAX_RECIPES:
        raise located(path, "grid", f"{combos} combinations, at most {MAX_RECIPES}")
    expanded = list(explicit)
    for choice in (itertools.product(*(values for _, values in grid)) if grid else ()):
        text = " ".join(t for (stage, _), v in zip(grid, choice) if (t := _stage_text(stage, v)))
        expanded.append(_canonical(text, path, "grid", prefix=f"combination {text!r}: "))
    texts = tuple(dict.fromkeys(expanded))
    if not texts:
        raise located(path, "recipes", "no recipe: give `recipes`, a [grid] table, or both")
    if len(texts) > MAX_RECIPES:
        raise located(path, "recipes", f"{len(texts)} recipes, at most {MAX_RECIPES}")
    return explicit, grid, texts


def _stage_text(stage: str, value: GridValue) -> str:
    """The recipe text of one grid value: "" for false, the bare name for true."""
    if isinstance(value, bool):
        return stage if value else ""
    if isinstance(value, str) and value.startswith("("):
        return f"{stage}{value}"
    return f"{stage}={value}"


def _grid(raw: Any, path: Path) -> tuple[tuple[str, tuple[GridValue, ...]], ...]:
    if not isinstance(raw, dict) or not raw:
        raise located(path, "grid", f"must be a table of stage = [values], got {raw!r}")
    out = []
    for stage, values in raw.items():
        where = f"grid.{stage}"
        if not isinstance(values, list) or not values:
            raise located(path, where, f"must be a non-empty list of values, got {values!r}")
        for i, value in enumerate(values, start=1):
            at = f"{where}[{i}]"
            if isinstance(value, float) and not math.isfinite(value):
                raise located(path, at, f"must be a finite number, got {value!r}")
            if not isinstance(value, (int, float, str)):
                raise located(path, at, f"must be a number, a string, true or false, got {value!r}")
            if isinstance(value, str) and not value.strip():
                raise located(path, at, "must not be an empty string")
            if (text := _stage_text(stage, value)):
                _canonical(text, path, at)
        out.append((stage, tuple(values)))
    return tuple(out)
