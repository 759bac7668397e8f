"""Validation of transcript lines: the header, step and event objects, field by field.

Each `parse_*` function takes one decoded JSON object and returns a typed value, or
raises `SchemaError` naming the field and the bad value. Line numbers and the file
name are added by `tui.transcripts.reader`. Versions: `check_format` accepts every
version up to `VERSION` (there is only version 1 so far; an older version would be
upgraded here, in `_UPGRADES`) and refuses newer ones.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

from tui.decoding import Recipe, RecipeError
from tui.decoding.grammar import upgrade_stored_recipe
from tui.session.record import STOP_REASONS, StepRecord, TopToken
from tui.session.scenario import EarlierSetup
from tui.transcripts.headers import VERSION, PaneHeader, TranscriptHeader

_STEP_KEYS = frozenset({"kind", "step", "pane", "token_id", "text", "rank", "raw_prob",
                        "final_prob", "kept", "raw_entropy", "final_entropy", "u", "top",
                        "forced", "stop"})
_HEADER_KEYS = frozenset({"kind", "format", "version", "created", "title", "model", "prompt",
                          "max_new_tokens", "stop", "seed", "shared_draws", "panes",
                          "versions", "draw_log", "prompt_edits"})
EVENT_KINDS = ("rewind", "pane", "remove_pane", "session")
_NUMBER = (float, int)  # JSON numbers; bool is excluded by an exact type test
_ENTROPY_SLACK = 1e-9  # -(p log p) summed in floating point can land just below zero

# version -> function turning a header of that version into one of the next version.
_UPGRADES: dict[int, Callable[[dict[str, Any]], dict[str, Any]]] = {}


class SchemaError(ValueError):
    """One field of one line is wrong; the message names it."""


@dataclass(frozen=True)
class Event:
    """A recovery-log event: a rewind, a pane added or changed, a pane removed, a restart."""

    kind: str
    step: int | None = None  # rewind: every pane keeps its first `step` records
    pane: PaneHeader | None = None  # pane: add or replace this pane's entry
    pane_id: int | None = None  # remove_pane
    seed: int | None = None  # session
    shared_draws: bool | None = None  # session
    draw_log: tuple[tuple[int, bool], ...] | None = None  # session: the whole log; None in older logs


def check_format(obj: dict[str, Any], formats: tuple[str, ...]) -> int:
    """The header's version, if its format is one of `formats` and not newer than ours."""
    fmt = obj.get("format")
    if fmt not in formats:
        raise SchemaError(f"not a logitfork file: format is {fmt!r}, expected "
                          + " or ".join(repr(f) for f in formats))
    version = obj.get("version")
    if isinstance(version, bool) or not isinstance(version, int):
        raise SchemaError(f"version: must be an integer, got {version!r}")
    if version > VERSION:
        raise SchemaError(f"format version {version} is newer than this logitfork reads "
                          f"({VERSION}); upgrade logitfork")
    if version < 1:
        raise SchemaError(f"version: unknown format version {version}")
    return version


def upgrade_header(obj: dict[str, Any], version: int) -> dict[str, Any]:
    """Bring an older header up to the current version, one version at a time."""
    while version < VERSION:
        obj = _UPGRADES[version](obj)
        version += 1
    return obj


def parse_header(obj: dict[str, Any]) -> TranscriptHeader:
    model = _table(obj, "model")
    prompt = _table(obj, "prompt")
    messages_raw = prompt.get("messages")
    messages = None
    if messages_raw is not None:
        if not isinstance(messages_raw, list):
            raise SchemaError(f"prompt.messages: must be a list or null, got {messages_raw!r}")
        messages = tuple(_message(m, i) for i, m in enumerate(messages_raw))
    ids = prompt.get("ids")
    if not isinstance(ids, list) or not ids or not all(_is_int(i) and i >= 0 for i in ids):
        raise SchemaError("prompt.ids: must be a non-empty list of token ids >= 0")
    panes_raw = obj.get("panes")
    if not isinstance(panes_raw, list) or not panes_raw:
        raise SchemaError(f"panes: must be a non-empty list, got {_short(panes_raw)}")
    panes = tuple(parse_pane(p, f"panes[{i}]") for i, p in enumerate(panes_raw))
    seen: set[int] = set()
    for p in panes:
        if p.id in seen:
            raise SchemaError(f"panes: pane id {p.id} appears twice")
        seen.add(p.id)
    # A fork's source may be absent: the engine lets a user remove it after the fork.
    stop = obj.get("stop")
    if not isinstance(stop, list) or not all(isinstance(s, str) for s in stop):
        raise SchemaError(f"stop: must be a list of strings, got {_short(stop)}")
    versions = obj.get("versions", {})
    if not isinstance(versions, dict) or not all(isinstance(v, str) for v in versions.values()):
        raise SchemaError("versions: must map package names to version strings")
    text = prompt.get("text")
    if text is not None and not isinstance(text, str):
        raise SchemaError(f"prompt.text: must be a string or null, got {_short(text)}")
    return TranscriptHeader(
        title=_str(obj, "title"), created=_str(obj, "created"),
        model_name=_str(model, "name", "model.name"),
        model_source=_str(model, "source", "model.source"),
        dtype=_str(model, "dtype", "model.dtype"),
        dtype_note=_str(model, "dtype_note", "model.dtype_note") if "dtype_note" in model else "",
        prompt_text=text, messages=messages, prompt_ids=tuple(ids),
        max_new_tokens=_int(obj, "max_new_tokens", low=1), stop=tuple(stop),
        seed=_int(obj, "seed", low=0), shared_draws=_bool(obj, "shared_draws"),
        panes=panes, versions=dict(versions), draw_log=_draw_log(obj),
        prompt_edits=_prompt_edits(obj),
        extra={k: v for k, v in obj.items() if k not in _HEADER_KEYS})


def _prompt_edits(obj: dict[str, Any]) -> tuple[EarlierSetup, ...]:
    """`prompt_edits`: the setups the session ran with before each prompt edit (optional)."""
    raw = obj.get("prompt_edits")
    if raw is None:
        return ()
    if not isinstance(raw, list):
        raise SchemaError(f"prompt_edits: must be a list, got {_short(raw)}")
    out = []
    for i, entry in enumerate(raw):
        where = f"prompt_edits[{i}]"
        if not isinstance(entry, dict):
            raise SchemaError(f"{where}: must be an object, got {_short(entry)}")
        prompt = entry.get("prompt")
        if not isinstance(prompt, dict):
            raise SchemaError(f"{where}.prompt: must be an object, got {_short(prompt)}")
        text = prompt.get("text")
        if text is not None and not isinstance(text, str):
            raise SchemaError(f"{where}.prompt.text: must be a string or null")
        raw_messages = prompt.get("messages")
        if raw_messages is not None and not isinstance(raw_messages, list):
            raise SchemaError(f"{where}.prompt.messages: must be a list or null")
        messages = tuple(_message(m, j) for j, m in enumerate(raw_messages or []))
        stop = entry.get("stop")
        if not isinstance(stop, list) or not all(isinstance(x, str) for x in stop):
            raise SchemaError(f"{where}.stop: must be a list of strings, got {_short(stop)}")
        out.append(EarlierSetup(_int(entry, "steps", low=0, where=f"{where}.steps"), text,
                                messages, _int(entry, "max_new_tokens", low=1,
                                               where=f"{where}.max_new_tokens"), tuple(stop)))
    return tuple(out)


def _draw_log(obj: dict[str, Any]) -> tuple[tuple[int, bool], ...]:
    """`draw_log`: [[from step, shared draws], ...], ascending; absent means never changed."""
    raw = obj.get("draw_log")
    if raw is None:
        return ()
    ok = isinstance(raw, list) and all(
        isinstance(e, list) and len(e) == 2 and _is_int(e[0]) and e[0] >= 0
        and isinstance(e[1], bool) for e in raw)
    if not ok or [e[0] for e in raw] != sorted({e[0] for e in raw}):
        raise SchemaError(f"draw_log: must be ascending [step, true|false] pairs, got {_short(raw)}")
    return tuple((int(s), bool(b)) for s, b in raw)


def parse_pane(obj: Any, where: str) -> PaneHeader:
    if not isinstance(obj, dict):
        raise SchemaError(f"{where}: must be an object, got {_short(obj)}")
    seed = obj.get("seed")
    if seed is not None and not (_is_int(seed) and seed >= 0):
        raise SchemaError(f"{where}.seed: must be an integer >= 0 or null, got {seed!r}")
    log_raw = obj.get("recipe_log", [])
    if not isinstance(log_raw, list):
        raise SchemaError(f"{where}.recipe_log: must be a list of [step, recipe] pairs")
    log = []
    for i, entry in enumerate(log_raw):
        if (not isinstance(entry, list) or len(entry) != 2 or not _is_int(entry[0])
                or entry[0] < 0 or not isinstance(entry[1], str)):
            raise SchemaError(f"{where}.recipe_log[{i}]: must be [step >= 0, recipe], "
                              f"got {_short(entry)}")
        log.append((entry[0], _recipe(entry[1], f"{where}.recipe_log[{i}]")))
    if [s for s, _ in log] != sorted(s for s, _ in log):
        raise SchemaError(f"{where}.recipe_log: steps must be in order")
    origin = obj.get("origin")
    if origin is not None:
        if (not isinstance(origin, list) or len(origin) != 2
                or not all(_is_int(v) and v >= 0 for v in origin)):
            raise SchemaError(f"{where}.origin: must be [source pane id, step] or null, "
                              f"got {_short(origin)}")
        origin = (origin[0], origin[1])
    return PaneHeader(id=_int(obj, "id", where=f"{where}.id", low=0),
                      name=_str(obj, "name", f"{where}.name"),
                      recipe=_recipe(_str(obj, "recipe", f"{where}.recipe", empty=True),
                                     f"{where}.recipe"), seed=seed,
                      recipe_log=tuple(log), origin=origin,
                      stop=_stop(obj.get("stop"), f"{where}.stop"))


def _recipe(text: str, where: str) -> str:
    """A stored recipe text in today's spelling, checked to parse (`upgrade_stored_recipe`)."""
    upgraded, _ = upgrade_stored_recipe(text)
    try:
        Recipe.parse(upgraded)
    except RecipeError as exc:
        raise SchemaError(f"{where}: {exc}") from None
    return upgraded


def old_spellings(obj: dict[str, Any]) -> bool:
    """Whether a raw header's pane recipes use a spelling `upgrade_stored_recipe` renames
    (call it on a header `parse_header` accepted)."""
    texts = [t for p in obj["panes"]
             for t in (p.get("recipe"), *(r for _, r in p.get("recipe_log", ())))]
    return any(upgrade_stored_recipe(t)[1] for t in texts)


def check_step(obj: dict[str, Any]) -> None:
    """Check a step line's every field for presence, type and range (builds nothing)."""
    unknown = [k for k in obj if k not in _STEP_KEYS]
    if unknown:
        raise SchemaError(f"{unknown[0]}: unknown field in a step line")
    for key in ("step", "pane", "token_id", "kept", "rank"):
        _int(obj, key, low=1 if key in ("rank", "kept") else 0)
    _str(obj, "text", empty=True)
    for key in ("raw_prob", "final_prob", "u"):
        _prob(obj, key)
    for key in ("raw_entropy", "final_entropy"):
        _entropy(obj, key)
    top = _get(obj, "top", "top")
    if type(top) is not list:
        raise SchemaError(f"top: must be a list, got {_short(top)}")
    for i, t in enumerate(top):  # the hot loop of reading: plain type checks, no calls
        if (type(t) is not list or len(t) != 4 or type(t[0]) is not int or t[0] < 0
                or type(t[1]) is not str):
            raise SchemaError(f"top[{i}]: must be [token_id, text, raw_prob, final_prob], "
                              f"got {_short(t)}")
        for j, name in ((2, "raw_prob"), (3, "final_prob")):
            v = t[j]
            if type(v) not in _NUMBER or not 0.0 <= v <= 1.0:
                raise SchemaError(f"top[{i}] {name}: must be a probability in [0, 1], "
                                  f"got {_short(v)}")
    forced = obj.get("forced", False)
    if not isinstance(forced, bool):
        raise SchemaError(f"forced: must be true or false, got {forced!r}")
    _stop(obj.get("stop"), "stop")


def parse_step(obj: dict[str, Any]) -> StepRecord:
    """A step line, checked by `check_step`, as a `StepRecord`."""
    check_step(obj)
    return StepRecord(
        step=obj["step"], pane=obj["pane"], token_id=obj["token_id"], text=obj["text"],
        rank=obj["rank"], raw_prob=float(obj["raw_prob"]), final_prob=float(obj["final_prob"]),
        kept=obj["kept"], raw_entropy=float(obj["raw_entropy"]),
        final_entropy=float(obj["final_entropy"]), u=float(obj["u"]),
        top=tuple([TopToken(t[0], t[1], float(t[2]), float(t[3])) for t in obj["top"]]),
        forced=obj.get("forced", False), stop=obj.get("stop"))


def parse_event(obj: dict[str, Any]) -> Event:
    kind = obj.get("kind")
    if kind == "rewind":
        return Event("rewind", step=_int(obj, "step", low=0))
    if kind == "pane":
        return Event("pane", pane=parse_pane(obj.get("pane"), "pane"))
    if kind == "remove_pane":
        return Event("remove_pane", pane_id=_int(obj, "pane", low=0))
    if kind == "session":
        return Event("session", seed=_int(obj, "seed", low=0),
                     shared_draws=_bool(obj, "shared_draws"),
                     draw_log=_draw_log(obj) if "draw_log" in obj else None)
    raise SchemaError(f"kind: unknown line kind {kind!r} (known: step, "
                      f"{', '.join(EVENT_KINDS)})")


# ----- field checks -------------------------------------------------------------------

def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _short(v: Any) -> str:
    text = repr(v)
    return text if len(text) <= 60 else text[:57] + "..."


def _table(obj: dict[str, Any], key: str) -> dict[str, Any]:
    v = obj.get(key)
    if not isinstance(v, dict):
        raise SchemaError(f"{key}: {'missing' if key not in obj else 'must be an object'}")
    return v


def _get(obj: dict[str, Any], key: str, where: str) -> Any:
    if key not in obj:
        raise SchemaError(f"{where}: missing")
    return obj[key]


def _int(obj: dict[str, Any], key: str, where: str | None = None, low: int | None = None) -> int:
    where = where or key
    v = _get(obj, key, where)
    if not _is_int(v):
        raise SchemaError(f"{where}: must be an integer, got {_short(v)}")
    if low is not None and v < low:
        raise SchemaError(f"{where}: must be >= {low}, got {v}")
    return v


def _str(obj: dict[str, Any], key: str, where: str | None = None, empty: bool = False) -> str:
    where = where or key
    v = _get(obj, key, where)
    if not isinstance(v, str) or (not empty and not v):
        raise SchemaError(f"{where}: must be a {'' if empty else 'non-empty '}string, "
                          f"got {_short(v)}")
    return v


def _bool(obj: dict[str, Any], key: str) -> bool:
    v = _get(obj, key, key)
    if not isinstance(v, bool):
        raise SchemaError(f"{key}: must be true or false, got {_short(v)}")
    return v


def _prob_value(v: Any, where: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0.0 <= v <= 1.0:
        raise SchemaError(f"{where}: must be a probability in [0, 1], got {_short(v)}")
    return float(v)


def _prob(obj: dict[str, Any], key: str) -> float:
    return _prob_value(_get(obj, key, key), key)


def _entropy(obj: dict[str, Any], key: str) -> float:
    v = _get(obj, key, key)
    if (isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v)
            or v < -_ENTROPY_SLACK):
        raise SchemaError(f"{key}: must be a finite entropy >= 0 (nats), got {_short(v)}")
    return float(v)


def _stop(v: Any, where: str) -> str | None:
    if v is not None and v not in STOP_REASONS:
        raise SchemaError(f"{where}: must be null or one of {', '.join(STOP_REASONS)}, "
                          f"got {_short(v)}")
    return v


def _message(m: Any, i: int) -> tuple[str, str]:
    if (not isinstance(m, dict) or not isinstance(m.get("role"), str)
            or not isinstance(m.get("content"), str)):
        raise SchemaError(f"prompt.messages[{i}]: must be {{\"role\": ..., \"content\": ...}}")
    return m["role"], m["content"]
