"""Loading a model for a command: a byte bar for a first conversion, then one line naming the path.

Every command that loads a model goes through `load_for_command`, so all of them show
a first GGUF conversion the same way (a `rich.progress` bar on a terminal, nothing in a
pipe or on a warm start) and print the same line afterwards: the model, its dtype and
why it runs on the fast or the generic forward path.
"""

from __future__ import annotations

import sys
from typing import Any

from tui.commands.progress_display import ProgressDisplay


def load_for_command(name: str, **options: Any) -> Any:
    """`load_model(name, **options)` with the conversion bar, then the model line on stderr."""
    from tui.model.catalogue import load_model

    with ProgressDisplay(units={"bytes"}, log_every=None) as display:
        lm = load_model(name, progress=display, **options)
    print(model_line(lm), file=sys.stderr)
    return lm


def model_line(lm: Any) -> str:
    """The one line a command prints after loading: the model, its dtype, its path and why."""
    note = f"; {lm.dtype_note}" if lm.dtype_note else ""
    return f"model {lm.name} ({lm.dtype}{note}): {lm.path_note}"
