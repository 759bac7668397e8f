"""Glue between a loaded model, a scenario and the engine: one place builds a session.

The command line, the app and the tests all open sessions through `open_session`,
so that a prompt is encoded, and stop rules are set, the same way everywhere.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from tui.decoding.allocator import retain_freed_memory
from tui.session.engine import Engine
from tui.session.scenario import EarlierSetup, Scenario

if TYPE_CHECKING:
    from tui.model.catalogue import LoadedModel


@dataclass(frozen=True)
class SessionInfo:
    """What a transcript header needs beyond the engine's own state."""

    scenario: Scenario
    model_name: str
    model_source: str
    dtype: str
    prompt_edits: tuple[EarlierSetup, ...] = ()  # setups before each prompt edit, oldest first


def open_session(lm: "LoadedModel", scenario: Scenario, *, seed: int | None = None,
                 max_new_tokens: int | None = None) -> tuple[Engine, SessionInfo]:
    """Encode the scenario's prompt, prefill it once and return a ready engine."""
    retain_freed_memory()  # per-step (V,) vectors then reuse pages instead of faulting
    prompt_ids = lm.encode_prompt(scenario.prompt, scenario.message_dicts)
    engine = Engine(
        lm.runner(), lm.decode, prompt_ids, scenario.panes,
        seed=scenario.seed if seed is None else seed,
        shared_draws=scenario.shared_draws,
        max_new_tokens=max_new_tokens or scenario.max_new_tokens,
        stop_strings=scenario.stop, eos_ids=lm.eos_ids, max_context=lm.max_context,
    )
    return engine, SessionInfo(scenario, lm.name, lm.source, lm.dtype)
