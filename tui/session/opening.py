"""Glue between a loaded model, a scenario and the engine: one place builds a session.

The command line, the app and the tests all open sessions through `open_session`,
so that a prompt is encoded, and stop rules are set, the same way everywhere.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from tui.decoding.allocator import retain_freed_memory
from tui.errors import located
from tui.session.engine import Engine
from tui.session.scenario import EarlierSetup, Scenario
from tui.session.views import EngineError

if TYPE_CHECKING:
    from tui.model.catalogue import LoadedModel


@dataclass(frozen=True)
class SessionInfo:
    """What a transcript header needs beyond the engine's own state."""

    scenario: Scenario
    model_name: str
    model_source: str
    dtype: str
    dtype_note: str = ""  # why `--dtype auto` chose bfloat16 ("" otherwise)
    prompt_edits: tuple[EarlierSetup, ...] = ()  # setups before each prompt edit, oldest first


def open_session(lm: "LoadedModel", scenario: Scenario, *, seed: int | None = None,
                 max_new_tokens: int | None = None) -> tuple[Engine, SessionInfo]:
    """Encode the scenario's prompt, prefill it once and return a ready engine.

    What the scenario file could not know alone (a prompt longer than this model's
    context) is refused as a `UserError` naming the scenario's prompt field.
    """
    retain_freed_memory()  # per-step (V,) vectors then reuse pages instead of faulting
    prompt_ids = lm.encode_prompt(scenario.prompt, scenario.message_dicts)
    try:
        engine = Engine(
            lm.runner(), lm.decode, prompt_ids, scenario.panes,
            seed=scenario.seed if seed is None else seed,
            shared_draws=scenario.shared_draws,
            max_new_tokens=max_new_tokens or scenario.max_new_tokens,
            stop_strings=scenario.stop, eos_ids=lm.eos_ids, max_context=lm.max_context,
        )
    except EngineError as exc:
        field = "prompt" if scenario.prompt is not None else "message"
        raise located(scenario.path or "<scenario>", field, f"{exc} ({lm.name})") from None
    return engine, SessionInfo(scenario, lm.name, lm.source, lm.dtype, lm.dtype_note)
