"""Scenario files: one model, one prompt and the panes that decode it.

A scenario is a TOML file of our own format (documented in the README):

    title = "..."            # required
    model = "smollm2-135m-instruct"   # optional, a catalogue name or a path
    prompt = "..."           # either prompt ...
    [[message]]              # ... or chat messages (role, content), in order
    max_new_tokens = 120     # 1..4096
    seed = 7                 # >= 0
    shared_draws = true      # the same uniform number for every pane at a step
    stop = ["\n\n"]          # optional stop strings
    [[pane]]                 # 1 to 8 panes
    name = "..."; recipe = "temperature=0.8 top_p=0.9"; seed = 3 (optional)

Every mistake raises `UserError` as ``FILE: FIELD: reason``. `scenario_toml` writes a
scenario back in this format (the app saves an edited scenario with it).
"""

from __future__ import annotations

import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tui.errors import UserError, located, read_text_input

MAX_PANES = 8
MAX_NEW_TOKENS = 4096
DEFAULT_SCENARIO = "harbour-town"
ROLES = ("system", "user", "assistant")
_TOP_KEYS = {"title", "model", "prompt", "message", "max_new_tokens", "seed",
             "shared_draws", "stop", "pane", "note"}
_PANE_KEYS = {"name", "recipe", "seed"}


@dataclass(frozen=True)
class PaneSpec:
    """One pane as the user asked for it: a name, a recipe text and an optional seed."""

    name: str
    recipe: str
    seed: int | None = None


@dataclass(frozen=True)
class Scenario:
    title: str
    panes: tuple[PaneSpec, ...]
    prompt: str | None = None
    messages: tuple[tuple[str, str], ...] = ()  # (role, content) pairs
    model: str | None = None
    max_new_tokens: int = 120
    seed: int = 0
    shared_draws: bool = True
    stop: tuple[str, ...] = ()
    note: str = ""
    path: Path | None = field(default=None, compare=False)

    @property
    def message_dicts(self) -> list[dict[str, str]] | None:
        return [{"role": r, "content": c} for r, c in self.messages] or None


@dataclass(frozen=True)
class EarlierSetup:
    """A prompt and length settings the session ran with before the user edited them.

    `steps` is how far the session had got when the edit restarted it (those steps were
    dropped). Transcripts list these in the header field `prompt_edits`, oldest first.
    """

    steps: int
    prompt: str | None
    messages: tuple[tuple[str, str], ...]
    max_new_tokens: int
    stop: tuple[str, ...]

    @classmethod
    def of(cls, scenario: "Scenario", steps: int) -> "EarlierSetup":
        return cls(steps, scenario.prompt, scenario.messages, scenario.max_new_tokens,
                   scenario.stop)


def toml_string(text: str) -> str:
    """`text` as a TOML basic string (JSON's escapes are TOML's; DEL must be escaped too)."""
    return json.dumps(text, ensure_ascii=False).replace("\x7f", "\\u007f")


def scenario_toml(scenario: Scenario) -> str:
    """The scenario as a scenario file: `parse_scenario` of it gives the same scenario."""
    out = [f"title = {toml_string(scenario.title)}"]
    if scenario.note:
        out.append(f"note = {toml_string(scenario.note)}")
    if scenario.model is not None:
        out.append(f"model = {toml_string(scenario.model)}")
    if scenario.prompt is not None:
        out.append(f"prompt = {toml_string(scenario.prompt)}")
    out += [f"max_new_tokens = {scenario.max_new_tokens}", f"seed = {scenario.seed}",
            f"shared_draws = {'true' if scenario.shared_draws else 'false'}"]
    if scenario.stop:
        out.append(f"stop = [{', '.join(toml_string(s) for s in scenario.stop)}]")
    for role, content in scenario.messages:
        out += ["", "[[message]]", f"role = {toml_string(role)}",
                f"content = {toml_string(content)}"]
    for pane in scenario.panes:
        out += ["", "[[pane]]", f"name = {toml_string(pane.name)}",
                f"recipe = {toml_string(pane.recipe)}"]
        if pane.seed is not None:
            out.append(f"seed = {pane.seed}")
    return "\n".join(out) + "\n"


def scenarios_dir() -> Path:
    """The shipped scenarios: the repository's folder, or the copy inside the package."""
    package = Path(__file__).resolve().parents[1]  # tui/
    repo = package.parent / "scenarios"
    return repo if repo.is_dir() else package / "scenarios"


def find_scenario(name_or_path: str | None) -> Path:
    """A path as given, or a shipped scenario by its file stem."""
    if name_or_path is None:
        name_or_path = DEFAULT_SCENARIO
    path = Path(name_or_path)
    if path.is_file():
        return path
    shipped = scenarios_dir() / f"{name_or_path}.toml"
    if shipped.is_file():
        return shipped
    known = ", ".join(sorted(p.stem for p in scenarios_dir().glob("*.toml")
                             if not p.stem.startswith("sweep")))
    raise UserError(f"{name_or_path}: no such scenario file (shipped scenarios: {known})")


def load_scenario(path: str | Path) -> Scenario:
    path = Path(path)
    text = read_text_input(path, "scenario file")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None
    return parse_scenario(data, path)


def parse_scenario(data: dict[str, Any], path: Path | str = "<scenario>") -> Scenario:
    """Validate a decoded TOML table into a `Scenario`."""
    from tui.decoding import Recipe, RecipeError

    unknown = sorted(set(data) - _TOP_KEYS)
    if unknown:
        raise located(path, unknown[0], f"unknown field (known: {', '.join(sorted(_TOP_KEYS))})")
    title = _str(data, "title", path, required=True)
    prompt = _str(data, "prompt", path) if "prompt" in data else None
    messages = _messages(data.get("message"), path) if "message" in data else ()
    if (prompt is None) == (not messages):
        raise located(path, "prompt", "give exactly one of `prompt` or `[[message]]` tables")
    model = _str(data, "model", path) if "model" in data else None
    max_new = _int(data, "max_new_tokens", path, 120, 1, MAX_NEW_TOKENS)
    seed = _int(data, "seed", path, 0, 0, 2**63 - 1)
    shared = data.get("shared_draws", True)
    if not isinstance(shared, bool):
        raise located(path, "shared_draws", f"must be true or false, got {shared!r}")
    stop = data.get("stop", [])
    if not isinstance(stop, list) or not all(isinstance(s, str) and s for s in stop):
        raise located(path, "stop", "must be a list of non-empty strings")
    panes_raw = data.get("pane")
    if not isinstance(panes_raw, list) or not panes_raw:
        raise located(path, "pane", "at least one [[pane]] table is needed")
    if len(panes_raw) > MAX_PANES:
        raise located(path, "pane", f"at most {MAX_PANES} panes, got {len(panes_raw)}")
    panes: list[PaneSpec] = []
    for i, raw in enumerate(panes_raw, start=1):
        where = f"pane[{i}]"
        if not isinstance(raw, dict):
            raise located(path, where, "must be a table")
        extra = sorted(set(raw) - _PANE_KEYS)
        if extra:
            raise located(path, f"{where}.{extra[0]}", "unknown field (known: name, recipe, seed)")
        name = _str(raw, "name", path, required=True, where=f"{where}.name")
        text = _str(raw, "recipe", path, required=True, where=f"{where}.recipe")
        try:
            recipe = str(Recipe.parse(text))
        except RecipeError as exc:
            raise located(path, f"{where}.recipe", str(exc)) from None
        pane_seed = (_int(raw, "seed", path, 0, 0, 2**63 - 1, where=f"{where}.seed")
                     if "seed" in raw else None)
        panes.append(PaneSpec(name=name, recipe=recipe, seed=pane_seed))
    note = _str(data, "note", path) if "note" in data else ""
    return Scenario(title=title, panes=tuple(panes), prompt=prompt, messages=messages,
                    model=model, max_new_tokens=max_new, seed=seed, shared_draws=shared,
                    stop=tuple(stop), note=note, path=Path(path))


def _str(table: dict, key: str, path: Path | str, required: bool = False,
         where: str | None = None) -> str:
    where = where or key
    if key not in table:
        if required:
            raise located(path, where, "missing")
        return ""
    value = table[key]
    if not isinstance(value, str) or not value.strip():
        raise located(path, where, f"must be a non-empty string, got {value!r}")
    return value


def _int(table: dict, key: str, path: Path | str, default: int, low: int, high: int,
         where: str | None = None) -> int:
    where = where or key
    value = table.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
        raise located(path, where, f"must be an integer in [{low}, {high}], got {value!r}")
    return value


def _messages(raw: Any, path: Path | str) -> tuple[tuple[str, str], ...]:
    if not isinstance(raw, list) or not raw:
        raise located(path, "message", "must be one or more [[message]] tables")
    out = []
    for i, m in enumerate(raw, start=1):
        where = f"message[{i}]"
        if not isinstance(m, dict) or set(m) - {"role", "content"}:
            raise located(path, where, "must be a table with `role` and `content` only")
        role = _str(m, "role", path, required=True, where=f"{where}.role")
        if role not in ROLES:
            raise located(path, f"{where}.role", f"must be one of {', '.join(ROLES)}, got {role!r}")
        out.append((role, _str(m, "content", path, required=True, where=f"{where}.content")))
    return tuple(out)
