"""logitfork: fork one model's next-token distribution into several decoding settings.

The package is layered; each folder is one room (`tests/test_layering.py` holds the
table of which may import which, and fails on an import cycle):

- `decoding`: recipes, stages and the draw, in pure numpy;
- `model`: the catalogue, model sources, the conversion cache, loading, forward paths;
- `session`: the lockstep engine, its records and views, scenarios, step analysis;
- `transcripts`: the transcript format, readers, the recovery log, rerun;
- `reports`: HTML and Markdown reports of a transcript;
- `sweeps`: many samples per recipe, their measures, folders and tables;
- `workbench`: what the app drives without Textual (sources, the stepping thread);
- `app`: the Textual screens, which only show and command;
- `commands`: one module per command; `bench`: `make bench`.

Sub-packages export their public names lazily, so that importing one light module
(a record, a view) never pulls torch in through a package's `__init__`.
"""

from __future__ import annotations

import importlib
from typing import Any, Callable

__version__ = "0.1.0"


def lazy_exports(package: str, exports: dict[str, str]) -> Callable[[str], Any]:
    """A module `__getattr__` (PEP 562) that imports `exports[name]`'s module on first use."""

    def __getattr__(name: str) -> Any:
        module = exports.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        return getattr(importlib.import_module(f"{package}.{module}"), name)

    return __getattr__
