"""Replay: a stored transcript or a recovery log as a read-only `StaticSource`.

`replay_source(path)` opens a transcript (or a recovery log, told apart by its header's
format) and builds the `SessionView` the app shows, with the reason every control
that needs the model is off. Nothing here imports torch or the engine, so that
`logitfork replay` opens in well under a second; no Textual either.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path
from typing import TYPE_CHECKING, Mapping, Sequence

from tui.session.record import StepRecord
from tui.session.views import PaneView, SessionView
from tui.transcripts.headers import RECOVERY_FORMAT, TranscriptHeader
from tui.workbench.source import StaticSource

if TYPE_CHECKING:
    from tui.transcripts.reader import StoredSession, Warn
    from tui.transcripts.recovery_reader import RecoveredSession

REPLAY_REASON = "replay: no model loaded \u2014 use `logitfork rerun {file}` to decode it again"
REPLAY_SAVE = "replay: the session is saved already, in {file}"
RECOVERED_REASON = ("replay of a recovery log: no model loaded \u2014 `logitfork recover {name} "
                    "--out X.jsonl` makes it a transcript, `logitfork rerun X.jsonl` decodes it again")
RECOVERED_SAVE = "replay: save it with `logitfork recover {name} --out X.jsonl`"


def session_view(header: TranscriptHeader,
                 records: Mapping[int, Sequence[StepRecord]]) -> SessionView:
    """The session a header and its records describe, as the engine's snapshot type."""
    panes = tuple(PaneView(p.id, p.name, p.recipe, p.seed, tuple(records.get(p.id, ())), p.stop,
                           p.recipe_log, p.origin) for p in header.panes)
    steps = max((len(p.records) for p in panes), default=0)
    draws = header.draw_log or ((0, header.shared_draws),)  # the file omits a log never changed
    return SessionView(steps, header.seed, header.shared_draws, panes, draws)


def stored_view(session: "StoredSession") -> SessionView:
    """Every record of a stored transcript, read into a `SessionView`."""
    records: dict[int, list[StepRecord]] = {p.id: [] for p in session.panes}
    for rec in session.iter_records():
        records[rec.pane].append(rec)
    return session_view(session.header, records)


def shown_prompt(header: TranscriptHeader) -> str:
    """The prompt as the panes show it: the text, or the chat messages one per line."""
    if header.prompt_text is not None:
        return header.prompt_text
    return "".join(f"{role}: {content}\n" for role, content in header.messages or ())


def is_recovery_log(path: str | os.PathLike[str]) -> bool:
    """True when line 1 names the recovery-log format (bad files are left to the readers)."""
    from tui.transcripts.reader import iter_json_lines

    with contextlib.closing(iter_json_lines(path, warn=lambda message: None)) as lines:
        first = next(lines, None)
    return first is not None and first.obj.get("format") == RECOVERY_FORMAT


def replay_source(path: str | os.PathLike[str], *, warn: "Warn | None" = None) -> StaticSource:
    """A transcript or a recovery log, ready for the app; raises `TranscriptError` (exit 2)."""
    if is_recovery_log(path):
        from tui.transcripts.recovery_reader import read_recovery

        return recovered_source(read_recovery(path, warn=warn))
    from tui.transcripts.reader import StoredSession

    session = StoredSession.open(path, warn=warn)
    file = str(path)
    reason = REPLAY_REASON.format(file=file)
    return StaticSource(stored_view(session), session.header.title, session.header.model_name,
                        shown_prompt(session.header), Path(path).stem,
                        prompt_ids=session.header.prompt_ids, reason=reason,
                        save_reason=REPLAY_SAVE.format(file=file),
                        notes=(*session.warnings, reason), label="replay")


def recovered_source(rec: "RecoveredSession") -> StaticSource:
    """A session rebuilt from a recovery log, read-only."""
    name = rec.path.name
    reason = RECOVERED_REASON.format(name=name)
    head = rec.header
    return StaticSource(session_view(head, rec.records), head.title, head.model_name,
                        shown_prompt(head), rec.path.stem, prompt_ids=head.prompt_ids,
                        reason=reason, save_reason=RECOVERED_SAVE.format(name=name),
                        notes=(*rec.warnings, reason), label="recovered")
