"""Opening the app: the model loads in a worker behind a progress panel; bad input is one line.

References: the NO_COLOR convention (no-color.org: "when present and not an empty
string"); the rest is the app's own contract, checked by driving `make_app` and the
`watch` command as the command line does.
"""

from __future__ import annotations

from tui.app.app import LogitforkApp, make_app
from tui.app.loading_panel import LoadingPanel
from tui.cli import main as cli_main
from tui.commands.watch import wants_mono
from tui.session.scenario import find_scenario, load_scenario
from tui.workbench.source import SessionLoader

try:
    from app_session import wait_until
except ImportError:
    from tests.app_session import wait_until


async def test_the_model_loads_behind_a_progress_panel(tiny_model_dir):
    seen: list[str] = []

    def hook(message) -> None:
        if isinstance(message, LogitforkApp.LoadProgress):
            seen.append(message.event.task)

    app = make_app(None, model=str(tiny_model_dir), seed=4)
    async with app.run_test(size=(80, 24), message_hook=hook) as pilot:
        assert app.grid.screen.query(LoadingPanel), "the screen shows at once, loading"
        assert app.check_action("fork", ()) is None  # nothing to fork yet
        await wait_until(pilot, lambda: app.stepper is not None and app.grid.panes(),
                         what="the model to load")
        assert not app.grid.screen.query(LoadingPanel)
        assert seen, "progress was reported while loading"
        assert app.view.seed == 4 and len(app.view.panes) == 4  # the default scenario
        await pilot.press("n")
        await wait_until(pilot, lambda: app.view.step == 1, what="a step")


async def test_a_model_that_cannot_load_ends_the_app_with_one_line(tmp_path):
    app = make_app(None, model=str(tmp_path / "no-such-model"))
    async with app.run_test(size=(80, 24)) as pilot:
        await wait_until(pilot, lambda: app.error_message is not None, what="the failure")
    assert app.return_code == 2
    assert "\n" not in app.error_message and "no-such-model" in app.error_message
    assert not app.error_message.startswith("UserError")  # the message itself, one line


def test_the_loader_takes_the_scenarios_model_unless_told():
    sc = load_scenario(find_scenario(None))
    assert SessionLoader(sc, model="x").model_name == "x"
    from tui.model.catalogue import DEFAULT_MODEL

    assert SessionLoader(sc).model_name == (sc.model or DEFAULT_MODEL)


def test_watch_refuses_a_bad_scenario_before_any_screen(capsys):
    assert cli_main(["watch", "no-such-scenario"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: no-such-scenario: no such scenario file")
    assert err.count("\n") == 1


def test_no_color_means_mono():
    # no-color.org: NO_COLOR set and not empty turns colour off
    assert wants_mono(False, {"NO_COLOR": "1"})
    assert not wants_mono(False, {"NO_COLOR": ""})
    assert not wants_mono(False, {})
    assert wants_mono(True, {})


async def test_the_loading_panel_says_what_happens_and_never_shows_an_unknown_percentage():
    from textual.app import App

    class Host(App[None]):
        def compose(self):
            yield LoadingPanel("some-model", id="loading")

    app = Host()
    async with app.run_test(size=(80, 24)) as pilot:
        panel = app.query_one(LoadingPanel)
        title = lambda: panel.query_one("#loading-title").content.plain  # noqa: E731
        stage = lambda: panel.query_one("#loading-stage").content.plain  # noqa: E731
        assert "convert" not in title()  # a warm start claims no conversion
        panel.set_progress("loading the weights", 0.5)
        await pilot.pause()
        assert stage() == "loading the weights  50%" and "convert" not in title()
        panel.set_progress("reading the prompt", None)  # a stage with no fraction
        await pilot.pause()
        assert stage() == "reading the prompt  50%"  # the bar stays, no "--%"
        assert "--%" not in app.export_screenshot()
        panel.set_progress("de-quantising weights", 0.3)  # a first GGUF load says so
        await pilot.pause()
        assert "converting the GGUF file once" in title() and stage().endswith("50%")
