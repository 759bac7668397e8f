"""A session: the lockstep engine, what it records, the views readers get, scenarios.

- `engine`: `Engine` steps every live pane with one batched forward pass;
- `record`: `StepRecord` (one token of one pane) and the incremental decoder;
- `views`: `SessionView`/`PaneView`, snapshots that need no torch;
- `scenario`: the scenario file format and its validation;
- `opening`: `open_session` builds an engine from a loaded model and a scenario;
- `step_analysis`, `approx_recipes`: one step seen under every pane's recipe.
"""

from tui import lazy_exports

__all__ = ["Engine", "EngineError", "PaneView", "Scenario", "SessionInfo", "SessionView",
           "StepRecord", "load_scenario", "open_session"]
__getattr__ = lazy_exports(__name__, {
    "Engine": "engine", "EngineError": "views", "PaneView": "views", "SessionView": "views",
    "Scenario": "scenario", "load_scenario": "scenario", "SessionInfo": "opening",
    "open_session": "opening", "StepRecord": "record",
})
