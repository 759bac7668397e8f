"""Crash recovery in the app: the live session's recovery log, and the offer to reopen one.

When the app is asked to keep one (`make_app(..., recovery=True)`, as `watch` does), a
live session is followed by a `tui.transcripts.recovery_log.RecoveryLog` in the user state folder:
begun on the engine's worker when the session starts, synced by the `Stepper` after
every step and operation, closed when the app ends. It is deleted on a clean exit with
nothing unsaved (saved, or no steps) and when the user quits without saving (discard),
kept otherwise (a crash, a kill, an error exit).

On start the app also looks for logs left by sessions that are no longer running and
offers the newest: reopen it read-only (the app turns into a replay of it), keep it for
later (`logitfork recover` lists it), or discard it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from textual import work

from tui.app.confirm_dialog import ConfirmDialog
from tui.app.safe_text import shown_line
from tui.workbench.source import LiveSource, SessionSource

if TYPE_CHECKING:
    from tui.app.app import LogitforkApp
    from tui.transcripts.recovery_reader import RecoverySummary

REOPEN, KEEP, DISCARD = "r", "k", "d"


def offer_text(found: "RecoverySummary", older: int) -> str:
    """The question of the offer dialog."""
    when = found.modified.strftime("%Y-%m-%d %H:%M")
    more = (f" ({older} older one{'s' if older > 1 else ''}: `logitfork recover` lists "
            "them)") if older else ""
    return (f"A session did not end cleanly: {shown_line(found.title)!r} on "
            f"{shown_line(found.model)}, {found.steps} steps in {found.panes} panes, last "
            f"written {when}. Its recovery log is {found.path.name}{more}. Reopen it "
            "read-only?")


class RecoveryActions:
    """Mixed into `LogitforkApp`: the recovery log's life and the reopen offer."""

    # ----- the live session's log ------------------------------------------------------

    def _plan_recovery(self: "LogitforkApp") -> None:
        """Choose the log's path now, so that the offer never shows this app's own log."""
        if self.keep_recovery and self.recovery is None and (
                self._loader is not None or isinstance(self.source, LiveSource)):
            from tui.transcripts.recovery_log import RecoveryLog

            self.recovery = RecoveryLog(None)
            self._scan_recoveries()

    def _begin_recovery(self: "LogitforkApp", source: SessionSource) -> None:
        """On the engine's worker, before its first step: create the file, write the header."""
        log = self.recovery
        if log is None or not isinstance(source, LiveSource):
            return
        try:
            source.begin_log(log)
        except RuntimeError:  # closed already: the session was replaced meanwhile
            return
        if log.error:
            self.call_from_thread(self._recovery_failed)

    def _recovery_failed(self: "LogitforkApp") -> None:
        log = self.recovery
        if log is not None and log.error and not self.recovery_told:
            self.recovery_told = True
            self.notify(f"{log.error}; the session goes on without one", severity="warning",
                        timeout=8, markup=False)

    def _close_recovery(self: "LogitforkApp") -> None:
        """Keep the log unless the app ends cleanly with nothing unsaved, or the user
        chose to quit without saving (then the session was thrown away on purpose)."""
        log, self.recovery = self.recovery, None
        if log is not None:
            clean = self.return_code in (None, 0)
            log.close(delete=clean and (self.discarded or not self.unsaved))

    # ----- the offer on start ------------------------------------------------------------

    @work(thread=True, exclusive=True, exit_on_error=False, group="recovery")
    def _scan_recoveries(self: "LogitforkApp") -> None:
        from tui.transcripts.recovery_reader import list_recoveries

        own = self.recovery.path if self.recovery is not None else None
        found = [s for s in list_recoveries() if not s.running and s.problem is None
                 and s.path != own]
        if found:
            self.call_from_thread(self._offer_recovery, found[0], len(found) - 1)

    def _offer_recovery(self: "LogitforkApp", found: "RecoverySummary", older: int) -> None:

        def done(answer: str | None) -> None:
            if answer == REOPEN:
                self._reopen(found)
            elif answer == DISCARD:
                found.path.unlink(missing_ok=True)
                self.notify(f"discarded {found.path.name}", markup=False)

        self.push_screen(ConfirmDialog(offer_text(found, older),
                                       [(REOPEN, "reopen read-only"), (KEEP, "keep for later"),
                                        (DISCARD, "discard")]), done)

    @work(thread=True, exclusive=True, exit_on_error=False, group="recovery")
    def _reopen(self: "LogitforkApp", found: "RecoverySummary") -> None:
        from tui.errors import UserError
        from tui.transcripts.recovery_reader import read_recovery
        from tui.workbench.replay_source import recovered_source

        try:
            source = recovered_source(read_recovery(found.path, warn=lambda message: None))
        except UserError as exc:
            self.call_from_thread(self.notify, f"cannot reopen: {exc}", severity="error",
                                  markup=False)
            return
        self.call_from_thread(self._replace_session, source)

    async def _replace_session(self: "LogitforkApp", source: SessionSource) -> None:
        """Drop the live session (a model still loading is ignored) and show `source`."""
        if self.stepper is not None:
            self.stepper.close()
            self.stepper = None
        self._close_recovery()  # kept if the live session had unsaved steps
        await self.grid.remove_children()  # new panes, with the recovered prompt
        self.view, self.busy, self.steps_per_second = None, [], None
        self.version = self.saved_version = 0
        self.follow = True
        self._start(source)
