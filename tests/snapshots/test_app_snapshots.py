"""Snapshots of the main screen and the inspect view, at every colour depth and in mono.

Fixed terminal sizes (80x24, the smallest the app supports, and 160x45), the tiny
model, a fixed seed and scenario, and 12 steps. The colour depth is pinned (true colour,
256, 16, mono): each depth's ink comes from that depth's own palette, so the stored
SVG shows the colours a terminal of that depth is sent. The stored SVGs were looked at
before they were accepted; update with `pytest --snapshot-update` only after reading
the report.
"""

from __future__ import annotations

import pytest

from tui.app.inspect_screen import InspectScreen

try:
    from app_session import live_app, run_to, wait_until
except ImportError:
    from tests.app_session import live_app, run_to, wait_until

STEPS = 12


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


async def _stepped(pilot) -> None:
    await run_to(pilot, pilot.app, STEPS)


async def _inspecting(pilot) -> None:
    await _stepped(pilot)
    app = pilot.app
    await pilot.press("tab")  # the second pane: a sampled one, with a kept set to show
    await pilot.press("enter")
    await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen)
                     and app.screen.analysed)


CASES = [((80, 24), "truecolor"), ((80, 24), "mono"), ((160, 45), "truecolor")]
IDS = ["80x24-colour", "80x24-mono", "160x45-colour"]
DEPTHS = [((80, 24), "256"), ((80, 24), "16")]
DEPTH_IDS = ["80x24-256", "80x24-16"]


def _app(lm, depth: str):
    return live_app(lm, mono=depth == "mono", depth=depth)


@pytest.mark.parametrize("size,depth", CASES + DEPTHS, ids=IDS + DEPTH_IDS)
def test_main_screen(snap_compare, lm, size, depth):
    assert snap_compare(_app(lm, depth), terminal_size=size, run_before=_stepped)


@pytest.mark.parametrize("size,depth", CASES, ids=IDS)
def test_inspect_view(snap_compare, lm, size, depth):
    assert snap_compare(_app(lm, depth), terminal_size=size, run_before=_inspecting)
