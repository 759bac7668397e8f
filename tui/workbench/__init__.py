"""What the app drives, with no Textual: sources of session views and the stepping thread.

- `source`: `SessionSource` (a live engine, or a stored session), `SessionLoader`;
- `replay_source`: views of a transcript or a recovery log, without a model;
- `operations`: the changes the app asks of the engine, as typed values;
- `stepper`: the thread that steps the engine and reports through callbacks.
"""

from tui import lazy_exports

__all__ = ["LiveSource", "SessionLoader", "SessionSource", "StaticSource", "Stepper"]
__getattr__ = lazy_exports(__name__, {
    "LiveSource": "source", "SessionLoader": "source", "SessionSource": "source",
    "StaticSource": "source", "Stepper": "stepper",
})
