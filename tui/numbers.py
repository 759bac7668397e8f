"""Numbers as a user reads them: no negative zero in files or tables.

The entropy of a one-hot distribution, computed as ``-sum(p log p)``, is -0.0, and a
tiny negative value shown to three decimals prints as ``-0.000``. Neither means
anything, and both read like a bug, so every writer of JSON lines and every table
formatter goes through here.
"""

from __future__ import annotations

from typing import Any


def plain_zero(value: float) -> float:
    """`value`, with -0.0 turned into 0.0 (IEEE 754: -0.0 + 0.0 is +0.0)."""
    return value + 0.0


def json_ready(obj: Any) -> Any:
    """`obj` with every float -0.0 inside dicts, lists and tuples turned into 0.0."""
    if isinstance(obj, float):
        return obj + 0.0
    if isinstance(obj, dict):
        return {key: json_ready(value) for key, value in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_ready(value) for value in obj]
    return obj


def fixed(value: float, digits: int = 3) -> str:
    """``f"{value:.{digits}f}"``, but never ``-0.000``: a value that rounds to zero is ``0.000``."""
    text = f"{value:.{digits}f}"
    if text.startswith("-") and text.strip("-0.") == "":
        return text[1:]
    return text
