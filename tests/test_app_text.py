"""Model text is shown literally: markup is never read, control characters never leave.

References: ECMA-48 (5th ed., 1991) for the control characters that drive a terminal
(ESC 0x1B, CSI 0x9B, BEL 0x07, BS 0x08, CR 0x0D; C0 = 0x00-0x1F, C1 = 0x80-0x9F);
the Unicode Standard's General Category (through Python's `unicodedata`) for which
characters are controls (Cc), separators (Zl, Zp) and bidirectional controls
(UAX #9, table 4: U+202A-U+202E, U+2066-U+2069). Rich's markup syntax (`[red]...[/red]`)
is the thing that must not be interpreted (reference: rich 15 `rich.markup`).
"""

from __future__ import annotations

import unicodedata

import pytest
from rich.text import Text

from tui.app.colouring import FORCED_MARK, Scheme
from tui.app.safe_text import SPACE_MARK, is_safe, shown, shown_line, shown_token
from tui.app.token_pane import pane_text
from tui.session.record import StepRecord, TopToken
from tui.session.views import PaneView, SessionView
from tui.workbench.source import StaticSource

try:
    from app_session import live_source, wait_until
except ImportError:
    from tests.app_session import live_source, wait_until

NASTY = "[red]x[/red] \x1b[2J"


def test_terminal_controls_become_visible_escapes():
    # ECMA-48: ESC starts a sequence, CSI (0x9B) is its 8-bit form; BEL, BS, CR act.
    assert shown("\x1b[2J") == "\\x1b[2J"
    assert shown("a\x07b\x08c\rd") == "a\\x07b\\x08c\\x0dd"
    assert shown("\x9b31m") == "\\x9b31m"
    assert shown("\x7f") == "\\x7f"
    assert shown("line one\nline two") == "line one\nline two"  # newlines kept in panes
    assert shown("a\tb") == "a    b"
    assert shown_line("a\nb") == "a\u21b5b"
    # UAX #9: an override would reorder what follows it on screen
    assert shown("abc\u202edef") == "abc\\u202edef"
    assert shown("caf\u00e9 \u5317 \U0001f642") == "caf\u00e9 \u5317 \U0001f642"


def test_every_control_character_is_escaped():
    # Unicode General Category over the whole code space: no Cc (but newline),
    # Zl, Zp or bidi control survives `shown`.
    bidi = set(range(0x202A, 0x202F)) | set(range(0x2066, 0x206A))
    for code in range(0x110000):
        ch = chr(code)
        cat = unicodedata.category(ch)
        if (cat == "Cc" and ch not in "\n\t") or cat in ("Zl", "Zp") or code in bidi:
            out = shown(ch)
            assert out.startswith("\\") and is_safe(out), hex(code)


def test_inspect_tokens_show_whitespace():
    assert shown_token(" the") == SPACE_MARK + "the"
    assert shown_token("\n") == "\u21b5"
    assert shown_token("\t\x1b") == "\u21e5\\x1b"
    assert shown_token("") == "\u2205"
    # the Unicode Standard, sec. 2.11: a lone combining mark is shown on a dotted circle
    assert shown_token("\u0301") == "\u25cc\u0301"


def test_pane_text_never_reads_markup():
    rec = _record(0, NASTY)
    text = pane_text((rec,), Scheme(), prompt="[bold]prompt[/] ")
    assert text.plain == "[bold]prompt[/] [red]x[/red] \\x1b[2J"
    assert all("red" not in str(span.style) for span in text.spans)
    # the control: Rich would read the same string as markup
    assert Text.from_markup("[red]x[/red]").plain == "x"


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


def _rendered(widget) -> list:
    """The segments a widget sends to the terminal, line by line."""
    return [seg for y in range(widget.size.height) for seg in widget.render_line(y)]


async def test_model_text_with_markup_and_escapes_is_shown_literally(lm):
    from tui.app.app import make_app
    from tui.app.inspect_screen import InspectScreen

    source = live_source(lm)
    engine = source.engine
    ids = lm.tokenizer(NASTY, add_special_tokens=False)["input_ids"]
    for t, tok in enumerate(ids):  # the first pane writes NASTY, token by token
        engine.force(0, t, tok)
        engine.step()
    assert "".join(r.text for r in engine.view().panes[0].records) == NASTY
    app = make_app(source=source)
    async with app.run_test(size=(120, 30)) as pilot:
        await wait_until(pilot, lambda: app.view is not None and app.grid.panes())
        body = app.grid.panes()[0].query_one(".pane-body")
        segments = _rendered(body)
        on_screen = "".join(s.text for s in segments).replace(FORCED_MARK, "")  # forced here
        assert "[red]x[/red]" in on_screen and "\\x1b[2J" in on_screen
        assert "\x1b" not in on_screen
        assert not any(s.style and s.style.color and s.style.color.name == "red"
                       for s in segments)
        assert "\x1b" not in app.export_screenshot()
        # the inspect view of the ESC token shows it escaped too
        esc_step = next(r.step for r in engine.view().panes[0].records if "\x1b" in r.text)
        app.open_inspect(engine.view().panes[0].id, esc_step)
        await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen))
        chosen = "".join(s.text for s in _rendered(app.screen.query_one("#inspect-chosen")))
        assert "\\x1b" in chosen and "\x1b" not in chosen


def _record(step: int, text: str, pane: int = 0) -> StepRecord:
    return StepRecord(step=step, pane=pane, token_id=7, text=text, rank=2, raw_prob=0.3,
                      final_prob=0.4, kept=3, raw_entropy=1.1, final_entropy=0.9, u=0.25,
                      top=(TopToken(5, " a", 0.5, 0.6), TopToken(7, text, 0.3, 0.4),
                           TopToken(9, "\x07", 0.1, 0.0)))


async def test_a_read_only_session_shows_but_cannot_change():
    from tui.app.app import make_app
    from tui.app.inspect_screen import InspectScreen

    records = (_record(0, "[bold]hi[/]"), _record(1, "\x07\x08\r"))
    view = SessionView(step=2, seed=1, shared_draws=True, panes=(
        PaneView(0, "[i]name[/i]", "greedy", None, records, None),))
    app = make_app(source=StaticSource(view, "t", "stored-model", "the prompt "))
    async with app.run_test(size=(80, 24)) as pilot:
        await wait_until(pilot, lambda: app.grid.panes())
        body = app.grid.panes()[0].query_one(".pane-body").content.plain
        assert body.endswith("[bold]hi[/]\\x07\\x08\\x0d")
        assert "[i]name[/i]" in app.export_screenshot()  # the name, literal in the title
        assert app.check_action("fork", ()) is None and app.check_action("run_pause", ()) is None
        await pilot.press("f", "space", "x")
        assert app.screen is app.grid.screen and app.stepper is None
        await pilot.press("enter")
        await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen)
                         and app.screen.analysed)
        assert app.screen.recipes is None
        assert [r.token_id for r in app.screen.rows] == [5, 7, 9]
