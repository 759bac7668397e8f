"""The stage list the app shows (tui.decoding.STAGES) says what each stage accepts truly.

The app's recipe dialog and help screen list every stage with `accepts` and `meaning`
from `STAGES`; this test holds each `accepts` text against the stage's own validation,
probing values at and just past each bound through `Recipe.parse`. A project contract
(the listing must not drift from the code); no outside source.
"""

from __future__ import annotations

import re

import pytest

from tui.decoding import STAGES, Recipe, RecipeError

NUDGE = 1e-6


def parses(text: str) -> bool:
    try:
        Recipe.parse(text)
    except RecipeError:
        return False
    return True


def probes(accepts: str) -> list[tuple[str, bool]]:
    """(value text, should parse) pairs for an `accepts` text of the listing."""
    if accepts == "any number":
        return [("-5", True), ("0", True), ("7.5", True)]
    if accepts == "whole number >= 0":
        return [("0", True), ("3", True), ("-1", False), ("1.5", False)]
    bound = re.fullmatch(r"(>=|>) (\S+)", accepts)
    if bound:
        low = float(bound.group(2))
        return [(repr(low), bound.group(1) == ">="), (repr(low - NUDGE), False),
                (repr(low + 100), True)]
    interval = re.fullmatch(r"([\[(])(\S+), (\S+)([\])])", accepts)
    assert interval, f"an accepts text this test cannot read: {accepts!r}"
    left, low, high, right = interval.groups()
    low, high = float(low), float(high)
    return [(repr(low), left == "["), (repr(low - NUDGE), False),
            (repr((low + high) / 2), True), (repr(high), right == "]"),
            (repr(high + NUDGE), False)]


@pytest.mark.parametrize("name", [n for n, s in STAGES.items() if s.kind in ("real", "whole")])
def test_the_listed_range_is_what_the_stage_accepts(name):
    spec = STAGES[name]
    for value, ok in probes(spec.accepts):
        assert parses(f"{name}={value}") == ok, (name, value, spec.accepts)


def test_the_flag_and_the_parameter_stages_as_listed():
    assert STAGES["greedy"].accepts == "no value"
    assert parses("greedy") and not parses("greedy=1")
    spec = STAGES["mirostat"]
    assert spec.accepts.startswith("tau > 0, learning_rate > 0")
    assert parses("mirostat(tau=3,learning_rate=0.0001)") and parses("mirostat=3")
    assert not parses("mirostat(tau=0)") and not parses("mirostat(tau=3,learning_rate=0)")


def test_every_stage_has_a_meaning_of_one_line():
    for spec in STAGES.values():
        assert spec.meaning and "\n" not in spec.meaning and len(spec.meaning) <= 100
