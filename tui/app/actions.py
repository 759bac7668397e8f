"""The app's key actions: each asks what it needs in a dialog, then queues engine work.

Nothing here calls a locking engine method on the app's thread: every change goes to
the `Stepper` as an operation and the screen follows when its snapshot comes back.
Actions that would change the session are disabled on a read-only source; actions on
the panes are disabled while another screen (inspect, help, a dialog) is on top.
"""

from __future__ import annotations

import random
from pathlib import Path
from typing import TYPE_CHECKING, Any

from textual import work
from textual.binding import Binding

from tui.app.confirm_dialog import ConfirmDialog
from tui.app.help_screen import HelpScreen
from tui.app.input_dialog import InputDialog
from tui.app.recipe_dialog import RecipeChoice, RecipeDialog
from tui.app.safe_text import shown_line
from tui.app.save_dialog import SaveDialog, default_path
from tui.app.token_pane import TokenPane
from tui.session.parting import fork_name
from tui.workbench.operations import (AddPane, EditPrompt, EditRecipe, Force, Fork, Operation,
                                      RemovePane, Restart, Rewind, SetDraws)

if TYPE_CHECKING:
    from tui.app.app import LogitforkApp
    from tui.session.views import SessionView

CHANGES = frozenset({"run_pause", "one_step", "fork", "edit", "add_pane", "remove_pane",
                     "rewind", "toggle_draws", "reseed", "save", "edit_prompt"})
ON_PANES = CHANGES | {"cursor", "cursor_to", "inspect", "next_pane", "copy_text"}
TO_CLIPBOARD, TO_FILE = "c", "f"
ANYWHERE = frozenset({"run_pause"})


def check_seed(text: str) -> str | None:
    if not (text.isascii() and text.isdigit()):  # str.isdigit alone takes "²", which int() refuses
        return f"the seed must be a whole number >= 0, got {text!r}"
    return None


def rewind_question(view: "SessionView", step: int) -> str:
    """What a rewind to `step` throws away, asked before it does."""
    dropped = sum(max(0, len(p.records) - step) for p in view.panes)
    forced = sum(1 for p in view.panes for r in p.records[step:] if r.forced)
    edits = sum(1 for p in view.panes for s, _r in p.recipe_log if s > step and
                not (p.origin is not None and s == p.origin[1]))
    parts = [f"{dropped} token{'s' if dropped != 1 else ''} from step {step} on in "
             f"{sum(1 for p in view.panes if len(p.records) > step)} pane(s)"]
    if forced:
        parts.append(f"{forced} forced token{'s' if forced != 1 else ''}")
    what = " and ".join(parts)
    moved = (f" {edits} recipe change{'s' if edits != 1 else ''} made for a later step "
             f"will apply from step {step} on." if edits else "")
    return f"Rewind to step {step} (steps 0-{step - 1} stay)? This throws away {what}.{moved}" \
        if step else f"Rewind to the prompt? This throws away {what}.{moved}"


class SessionActions:
    """Mixed into `LogitforkApp`: one `action_*` per key of the main screen."""

    def check_action(self: "LogitforkApp", action: str,  # type: ignore[misc]
                     parameters: tuple[object, ...]) -> bool | None:
        if action in ON_PANES and action not in ANYWHERE and len(self.screen_stack) > 1:
            return False
        if action in CHANGES and (self.source is None or self.source.engine is None):
            return None  # shown, but disabled
        if action in ON_PANES and self.view is None:
            return None
        return True

    def submit(self: "LogitforkApp", operation: Operation) -> None:
        """Queue engine work on the worker; the top bar shows it until it is done."""
        if self.stepper is None:
            return
        self.busy.append(operation)
        self.stepper.submit(operation)
        self.schedule_redraw()

    def after_operation(self: "LogitforkApp", operation: Operation, result: Any) -> None:
        """Follow-ups on the app's side once an operation is done."""
        if isinstance(operation, (Fork, AddPane)) and isinstance(result, int):
            self.focus_wanted = result  # focused once the redraw has mounted it
        elif isinstance(operation, Force):
            self.follow = True
            if self.view is not None:
                self.cursor = self.view.step
        elif isinstance(operation, (Restart, EditPrompt)):
            self.follow, self.cursor = True, 0
            if self.source is not None and self.source.prompt_text != self.grid.prompt:
                self.grid.prompt = self.source.prompt_text  # an edited prompt (sync passes it on)
                self.show_scenario(self.source)

    # ----- running and the cursor ---------------------------------------------------

    def action_run_pause(self: "LogitforkApp") -> None:
        if self.stepper is None or self.view is None:
            return
        if self.stepper.running:
            self.stepper.pause()
        elif self.view.finished:
            self.notify("every pane has stopped: rewind (r) or restart with a new seed (S)",
                        markup=False)
        else:
            self.follow, self.cursor = True, self.view.step
            self.stepper.run()
        self.schedule_redraw()

    def action_one_step(self: "LogitforkApp") -> None:
        if self.stepper is None:
            return
        if self.stepper.running:
            self.stepper.pause()
        elif self.view is not None and self.view.finished:
            self.notify("every pane has stopped: rewind (r) or restart with a new seed (S)",
                        markup=False)
        else:
            self.follow = True
            self.stepper.step_once()

    def action_cursor(self: "LogitforkApp", delta: int) -> None:
        if self.view is None:
            return
        self.cursor = max(0, min(self.view.step, self.cursor + delta))
        self.follow = self.cursor == self.view.step
        self.redraw()

    def action_cursor_to(self: "LogitforkApp", where: str) -> None:
        if self.view is None:
            return
        self.cursor = 0 if where == "start" else self.view.step
        self.follow = self.cursor == self.view.step
        self.redraw()

    def action_next_pane(self: "LogitforkApp", delta: int = 1) -> None:
        panes = self.grid.panes()
        if not panes:
            return
        current = self.focused_pane()
        i = panes.index(current) if current in panes else -delta
        panes[(i + delta) % len(panes)].focus()

    # ----- views ---------------------------------------------------------------------

    def action_inspect(self: "LogitforkApp") -> None:
        pane = self.focused_pane()
        if pane is None or pane.pane is None:
            return
        upto = min(self.cursor, len(pane.pane.records))
        if upto == 0:
            self.notify("no token at the cursor yet: step first (n)", markup=False)
            return
        self.open_inspect(pane.pane_id, upto - 1)

    def open_inspect(self: "LogitforkApp", pane_id: int, step: int) -> None:
        from tui.app.inspect_screen import InspectScreen

        if self.view is None or self.source is None:
            return
        self.push_screen(InspectScreen(self.source, self.view, pane_id, step, self.scheme),
                         self._inspect_closed)

    def _inspect_closed(self: "LogitforkApp", force: tuple[int, int, int] | None) -> None:
        if force is not None:
            self.force_token(*force)

    def on_token_pane_token_clicked(self: "LogitforkApp", message: TokenPane.TokenClicked) -> None:
        self.open_inspect(message.pane_id, message.step)

    def action_help(self: "LogitforkApp") -> None:
        if isinstance(self.screen, HelpScreen):
            return
        rows = [(self.get_key_display(b), b.tooltip or b.description)
                for b in self.BINDINGS if isinstance(b, Binding)]  # the key bar's hidden ones too
        rows.append(("escape", "close a view or dialog"))
        scenario = (self.source.title, self.source.note) if self.source else ("", "")
        self.push_screen(HelpScreen(rows, self.scheme, scenario))

    # ----- changing the session -------------------------------------------------------

    def action_fork(self: "LogitforkApp") -> None:
        pane = self.focused_pane()
        if pane is None or pane.pane is None or self.view is None:
            return
        src = pane.pane
        at = min(self.cursor, len(src.records))  # at the cursor: the text the pane shows
        if at == len(src.records) and src.stop is not None:
            self.notify(f"{shown_line(src.name)} has stopped ({src.stop}); move the cursor "
                        "back (\u2190) to fork it before its last step", severity="warning",
                        markup=False)
            return

        def done(choice: RecipeChoice | None) -> None:
            if choice is not None:
                self.submit(Fork(src.id, choice.recipe, choice.name, at))

        later = (f"; it catches up to step {self.view.step - 1}" if at < self.view.step
                 else "")
        title = (f"Fork {shown_line(src.name)} at step {at}: the new pane's recipe, from "
                 f"step {at} on{later}")
        self.push_screen(RecipeDialog(title, src.recipe, name=fork_name(src.name, [p.name for p in self.view.panes])), done)

    def action_edit(self: "LogitforkApp") -> None:
        pane = self.focused_pane()
        if pane is None or pane.pane is None:
            return
        src = pane.pane

        def done(choice: RecipeChoice | None) -> None:
            if choice is not None and choice.recipe != src.recipe:
                self.submit(EditRecipe(src.id, choice.recipe))

        title = (f"Recipe of {shown_line(src.name)} from step {len(src.records)} on "
                 "(earlier steps stay)")
        self.push_screen(RecipeDialog(title, src.recipe), done)

    def action_add_pane(self: "LogitforkApp") -> None:
        if self.view is None:
            return
        pane = self.focused_pane()
        recipe = pane.pane.recipe if pane is not None and pane.pane is not None else "greedy"

        def done(choice: RecipeChoice | None) -> None:
            if choice is not None:
                self.submit(AddPane(choice.recipe, choice.name))

        title = (f"A new pane from the prompt (it catches up to step {self.view.step - 1})"
                 if self.view.step else "A new pane from the prompt")
        self.push_screen(RecipeDialog(title, recipe, name=f"pane {len(self.view.panes) + 1}"),
                         done)

    def action_remove_pane(self: "LogitforkApp") -> None:
        pane = self.focused_pane()
        if pane is None or pane.pane is None or self.view is None:
            return
        if len(self.view.panes) == 1:
            self.notify("the last pane cannot be removed", severity="warning", markup=False)
            return
        pane_id, name = pane.pane_id, pane.pane.name

        def done(answer: str | None) -> None:
            if answer == "y":
                self.submit(RemovePane(pane_id))
                self.call_after_refresh(self.action_next_pane)

        self.push_screen(ConfirmDialog(f"Remove the pane {name!r} and its text?",
                                       [("y", "remove"), ("n", "keep")]), done)

    def action_rewind(self: "LogitforkApp") -> None:
        if self.view is None or self.stepper is None:
            return
        step = self.cursor
        if step == self.view.step:
            self.notify("the cursor is at the end: move it back (\u2190, home) to rewind",
                        markup=False)
            return

        def done(answer: str | None) -> None:
            if answer == "y" and self.stepper is not None:
                self.stepper.pause()
                self.follow = True
                self.submit(Rewind(step))

        self.push_screen(ConfirmDialog(rewind_question(self.view, step),
                                       [("y", "rewind"), ("n", "keep")]), done)

    def action_toggle_draws(self: "LogitforkApp") -> None:
        if self.view is None:
            return
        shared = not self.view.shared_draws
        self.submit(SetDraws(shared))

    def action_reseed(self: "LogitforkApp") -> None:
        def done(text: str | None) -> None:
            if text is not None:
                seed = int(text)
                if self.stepper is not None:
                    self.stepper.pause()
                self.submit(Restart(seed))

        self.push_screen(InputDialog("Restart from the prompt with the seed",
                                     str(random.randrange(10**6)), check=check_seed,
                                     hint="Every pane goes back to the prompt; recipes stay."),
                         done)

    def action_edit_prompt(self: "LogitforkApp") -> None:
        from dataclasses import replace

        from tui.app.scenario_dialog import RESTART, EditedScenario, ScenarioDialog
        from tui.session.scenario import PaneSpec
        from tui.workbench.source import LiveSource

        source, view = self.source, self.view
        if not isinstance(source, LiveSource) or view is None:
            return
        now = replace(source.info.scenario, seed=view.seed, shared_draws=view.shared_draws,
                      panes=tuple(PaneSpec(p.name, p.recipe, p.seed) for p in view.panes))
        stem = now.path.stem if now.path is not None else "session"
        path = (self.save_folder or Path(".")) / f"{stem}-edited.toml"

        def done(answer: EditedScenario | None) -> None:
            if answer is None:
                return
            if answer.action != RESTART:
                if answer.path is not None:
                    self._write_scenario(answer.path, answer.scenario)
                return
            if self.stepper is not None:
                self.stepper.pause()
            self.submit(EditPrompt(source, answer.scenario, self.recovery))

        self.push_screen(ScenarioDialog(now, path), done)

    @work(thread=True, exclusive=False, exit_on_error=False, group="save")
    def _write_scenario(self: "LogitforkApp", path: Path, scenario: Any) -> None:
        from tui.files import write_atomic
        from tui.session.scenario import scenario_toml

        try:
            write_atomic(path, scenario_toml(scenario))
        except OSError as exc:
            self.call_from_thread(self.notify, f"could not save {path}: "
                                  f"{exc.strerror or exc}", severity="error", markup=False)
            return
        self.call_from_thread(self.notify, f"saved the scenario to {path} (open it with "
                              f"`logitfork watch {path}`)", markup=False)

    def force_token(self: "LogitforkApp", pane_id: int, step: int, token_id: int) -> None:
        """Force a token at a step, then run the session back to where it was."""
        if self.stepper is None or self.view is None:
            return
        back_to = self.view.step
        self.stepper.pause()

        self.submit(Force(pane_id, step, token_id))
        self.stepper.run(until=max(back_to, step + 1))

    # ----- copying a pane's text ---------------------------------------------------------

    def action_copy_text(self: "LogitforkApp") -> None:
        pane = self.focused_pane()
        if pane is None or pane.pane is None:
            return
        name = pane.pane.name
        text = "".join(r.text for r in pane.pane.records[:self.cursor])
        if not text:
            self.notify(f"{shown_line(name)} has no text up to the cursor yet", markup=False)
            return

        def done(answer: str | None) -> None:
            if answer == TO_CLIPBOARD:
                self.copy_to_clipboard(text)  # OSC 52: the terminal may ignore it silently
                self.notify(f"sent {len(text)} characters of {shown_line(name)} to the "
                            "clipboard (OSC 52); if nothing arrives, your terminal does not "
                            "allow it: copy to a file instead (c, then f)", timeout=8,
                            markup=False)
            elif answer == TO_FILE:
                stem = self.source.scenario_name if self.source is not None else "session"
                path = default_path(f"{stem}-{name}", self.view.seed if self.view else 0,
                                    folder=self.save_folder).with_suffix(".txt")
                self._write_text(path, text)

        self.push_screen(ConfirmDialog(
            f"Copy the text of {name!r} up to the cursor ({len(text)} characters)?",
            [(TO_CLIPBOARD, "to the clipboard"), (TO_FILE, "to a file"), ("n", "cancel")]),
            done)

    @work(thread=True, exclusive=False, exit_on_error=False, group="save")
    def _write_text(self: "LogitforkApp", path: Path, text: str) -> None:
        from tui.files import write_atomic

        try:
            write_atomic(path, text)
        except OSError as exc:
            self.call_from_thread(self.notify, f"could not write {path}: "
                                  f"{exc.strerror or exc}", severity="error", markup=False)
            return
        self.call_from_thread(self.notify, f"wrote the text to {path}", markup=False)

    # ----- saving and quitting -----------------------------------------------------------

    def action_save(self: "LogitforkApp", then_quit: bool = False) -> None:
        if self.view is None or self.source is None or self.source.engine is None:
            return
        path = default_path(self.source.scenario_name, self.view.seed, folder=self.save_folder)

        def done(chosen: Path | None) -> None:
            if chosen is not None and self.view is not None:
                self._write_transcript(chosen, self.view, self.version, then_quit)

        self.push_screen(SaveDialog(path), done)

    @work(thread=True, exclusive=False, exit_on_error=False, group="save")
    def _write_transcript(self: "LogitforkApp", path: Path, view: Any, version: int,
                          then_quit: bool) -> None:
        from tui.files import write_atomic

        assert self.source is not None
        lines = self.source.transcript_lines(view)
        try:
            write_atomic(path, lines or [])
        except OSError as exc:
            self.call_from_thread(self.notify, f"could not save {path}: {exc.strerror or exc}",
                                  severity="error", markup=False)
            return
        self.call_from_thread(self._saved, path, version, then_quit)

    def _saved(self: "LogitforkApp", path: Path, version: int, then_quit: bool) -> None:
        self.saved_version = version
        self.notify(f"saved {path}", markup=False)
        if then_quit:
            self.exit()

    def action_quit_app(self: "LogitforkApp") -> None:
        if not self.unsaved or self.source is None or self.source.engine is None:
            self.exit()
            return

        def done(answer: str | None) -> None:
            if answer == "s":
                self.action_save(then_quit=True)
            elif answer == "d":
                self.discarded = True  # thrown away on purpose: no recovery log either
                self.exit()

        self.push_screen(ConfirmDialog("The session has unsaved steps. Save a transcript "
                                       "before quitting?",
                                       [("s", "save"), ("d", "quit without saving"),
                                        ("c", "cancel")]), done)
