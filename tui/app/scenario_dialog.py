"""The prompt dialog: edit the prompt, the length limit and the stop strings, or save all.

The prompt is one text box. A plain prompt is written as it is; a chat is written as
messages, each opened by a line holding only its role (``@system``, ``@user`` or
``@assistant``). Stop strings are a JSON list, so that ``"\\n\\n"`` can be typed. Every
field is checked before the dialog closes (the error shows in place); the answer is an
`EditedScenario`: restart the session on it, or save it as a scenario file.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, replace
from pathlib import Path

from rich.text import Text
from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Input, Static, TextArea

from tui.app.safe_text import shown
from tui.session.scenario import MAX_NEW_TOKENS, ROLES, Scenario

RESTART, SAVE = "restart", "save"
ROLE_MARK = "@"
PROMPT_HINT = ("A plain prompt as it is, or a chat: each message opened by a line "
               "@system, @user or @assistant. Stop strings: a JSON list, e.g. "
               '["\\n\\n"]. Restart: ctrl+r; save as a scenario file: ctrl+s; Escape cancels.')


@dataclass(frozen=True)
class EditedScenario:
    """What the dialog returns: the scenario as edited, and what to do with it."""

    scenario: Scenario
    action: str  # RESTART or SAVE
    path: Path | None = None  # where to save (SAVE only)


def prompt_text(scenario: Scenario) -> str:
    """The prompt box's text for a scenario (see the module docstring)."""
    if scenario.prompt is not None:
        return scenario.prompt
    return "\n".join(f"{ROLE_MARK}{role}\n{content}" for role, content in scenario.messages)


def parse_prompt(text: str) -> tuple[str | None, tuple[tuple[str, str], ...]]:
    """(plain prompt, ()) or (None, chat messages); ValueError says what is wrong."""
    lines = text.split("\n")
    first = next((line.strip() for line in lines if line.strip()), "")
    if not first:
        raise ValueError("the prompt is empty")
    if not first.startswith(ROLE_MARK):
        return text, ()
    messages: list[tuple[str, list[str]]] = []
    for number, line in enumerate(lines, start=1):
        mark = line.strip()
        if mark.startswith(ROLE_MARK) and " " not in mark:
            role = mark[len(ROLE_MARK):]
            if role not in ROLES:
                raise ValueError(f"line {number}: unknown role {mark!r} (the roles: "
                                 f"{', '.join(ROLE_MARK + r for r in ROLES)})")
            messages.append((role, []))
        elif messages:
            messages[-1][1].append(line)
        elif mark:
            raise ValueError(f"line {number}: text before the first role line")
    out = []
    for role, body in messages:
        content = "\n".join(body).strip("\n")
        if not content.strip():
            raise ValueError(f"the {ROLE_MARK}{role} message is empty")
        out.append((role, content))
    return None, tuple(out)


def parse_stop(text: str) -> tuple[str, ...]:
    """Stop strings from a JSON list of non-empty strings ("" means none)."""
    if not text.strip():
        return ()
    try:
        value = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ValueError(f"stop strings: not a JSON list ({exc.msg}), e.g. [\"\\n\\n\"]") from None
    if not isinstance(value, list) or not all(isinstance(s, str) and s for s in value):
        raise ValueError("stop strings: a JSON list of non-empty strings, e.g. [\"\\n\\n\"]")
    return tuple(value)


def parse_length(text: str) -> int:
    if not (text.isascii() and text.isdigit()) or not 1 <= int(text) <= MAX_NEW_TOKENS:
        raise ValueError(f"max new tokens: a whole number from 1 to {MAX_NEW_TOKENS}, "
                         f"got {text!r}")
    return int(text)


class ScenarioDialog(ModalScreen[EditedScenario | None]):
    """Edit the prompt, max_new_tokens and stop strings of `scenario` (panes as given)."""

    BINDINGS = [Binding("escape", "cancel", "cancel"),
                Binding("ctrl+r", "finish('restart')", "restart", priority=True),
                Binding("ctrl+s", "finish('save')", "save", priority=True)]

    def __init__(self, scenario: Scenario, save_path: Path) -> None:
        super().__init__(classes="dialog-screen scenario-dialog")
        self.scenario = scenario
        self.save_path = save_path
        self._error = ""

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Static(Text("The prompt: the session restarts from it (panes, recipes and "
                              "seed stay)", style="bold"), classes="dialog-title")
            yield TextArea(prompt_text(self.scenario), id="prompt-text", soft_wrap=True,
                           tab_behavior="focus")
            with Horizontal(classes="dialog-row"):
                yield Static(Text("max new tokens"), classes="dialog-label")
                yield Input(str(self.scenario.max_new_tokens), id="max-new-tokens")
            with Horizontal(classes="dialog-row"):
                yield Static(Text("stop strings"), classes="dialog-label")
                yield Input(json.dumps(list(self.scenario.stop), ensure_ascii=False),
                            id="stop-strings")
            with Horizontal(classes="dialog-row"):
                yield Static(Text("save as"), classes="dialog-label")
                yield Input(str(self.save_path), id="save-path")
            yield Static(Text(), id="dialog-error", classes="dialog-error")
            yield Static(Text(PROMPT_HINT), classes="dialog-hint")
            with Horizontal(classes="dialog-buttons"):
                yield Button("Restart", variant="primary", id="scenario-restart")
                yield Button("Save", id="scenario-save")
                yield Button("Cancel", id="dialog-cancel")

    def on_mount(self) -> None:
        self.query_one("#prompt-text", TextArea).focus()

    @property
    def error(self) -> str:
        return self._error

    def edited(self) -> Scenario:
        """The scenario with the fields as typed (ValueError names the bad field)."""
        prompt, messages = parse_prompt(self.query_one("#prompt-text", TextArea).text)
        length = parse_length(self.query_one("#max-new-tokens", Input).value.strip())
        stop = parse_stop(self.query_one("#stop-strings", Input).value)
        return replace(self.scenario, prompt=prompt, messages=messages, max_new_tokens=length,
                       stop=stop)

    def action_finish(self, action: str) -> None:
        try:
            scenario = self.edited()
            path = None
            if action == SAVE:
                path = Path(self.query_one("#save-path", Input).value.strip()).expanduser()
                if not path.name or path.is_dir():
                    raise ValueError("save as: give a file name")
                if not (path.parent if str(path.parent) else Path(".")).is_dir():
                    raise ValueError(f"save as: {path.parent}: no such folder")
        except ValueError as exc:
            self._error = str(exc)
            self.query_one("#dialog-error", Static).update(Text(shown(self._error),
                                                                style="bold"))
            return
        self.dismiss(EditedScenario(scenario, action, path))

    @on(Input.Submitted)
    def _submitted(self, event: Input.Submitted) -> None:
        event.stop()
        self.action_finish(SAVE if event.input.id == "save-path" else RESTART)

    @on(Button.Pressed, "#scenario-restart")
    def _restart(self) -> None:
        self.action_finish(RESTART)

    @on(Button.Pressed, "#scenario-save")
    def _save(self) -> None:
        self.action_finish(SAVE)

    @on(Button.Pressed, "#dialog-cancel")
    def _cancel_button(self) -> None:
        self.dismiss(None)

    def action_cancel(self) -> None:
        self.dismiss(None)
