"""Session transcripts: the format, its typed header, and the atomic writer.

A transcript is a JSON Lines file (format `logitfork-transcript`, version 1; the
README's "Transcript format" section documents every field). Line 1 is the header:
the model, the prompt (text and token ids), every pane's recipe, seed, recipe
changes and fork origin, the draw settings and the package versions. Every later
line is one `StepRecord` with ``"kind": "step"``, in step order, and within a step in
the header's pane order. Readers live in `tui.transcripts.reader`.

Files are written with `tui.files.write_atomic`, so an existing transcript is never
left half-written.
Nothing here imports torch, Textual or Rich.
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from typing import IO, TYPE_CHECKING, Any, Iterable, Iterator

from tui.numbers import json_ready
from tui.session.record import StepRecord
from tui.transcripts.headers import FORMAT, PaneHeader, TranscriptHeader, package_versions

if TYPE_CHECKING:
    from tui.session.opening import SessionInfo
    from tui.session.views import SessionView

def now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def header_of(view: "SessionView", info: "SessionInfo",
              prompt_ids: Iterable[int]) -> TranscriptHeader:
    """The header of a live session."""
    sc = info.scenario
    return TranscriptHeader(
        title=sc.title, created=now_iso(), model_name=info.model_name,
        model_source=info.model_source, dtype=info.dtype, dtype_note=info.dtype_note,
        prompt_text=sc.prompt,
        messages=tuple(sc.messages) if sc.messages else None,
        prompt_ids=tuple(int(i) for i in prompt_ids), max_new_tokens=sc.max_new_tokens,
        stop=tuple(sc.stop), seed=view.seed, shared_draws=view.shared_draws,
        panes=tuple(PaneHeader.of(p) for p in view.panes), versions=package_versions(),
        draw_log=view.draw_log if len(view.draw_log) > 1 else (),
        prompt_edits=info.prompt_edits)


def dumps(obj: dict[str, Any]) -> str:
    """One JSON line: strict JSON (no NaN, no -0.0), UTF-8 text kept as is."""
    return json.dumps(json_ready(obj), ensure_ascii=False, allow_nan=False)


def step_line(rec: StepRecord) -> str:
    return dumps({"kind": "step", **rec.to_json()})


def transcript_lines(head: TranscriptHeader, panes_records: Iterable[Iterable[StepRecord]],
                     fmt: str = FORMAT) -> Iterator[str]:
    """Header, then records step by step, panes in the order given (the header's)."""
    yield dumps(head.to_json(fmt))
    columns = [list(rs) for rs in panes_records]
    longest = max((len(c) for c in columns), default=0)
    for t in range(longest):
        for col in columns:
            if t < len(col):
                yield step_line(col[t])


def lines(view: "SessionView", info: "SessionInfo", prompt_ids: Iterable[int]) -> Iterator[str]:
    """The transcript as text lines (header first), steps in step order then pane order."""
    return transcript_lines(header_of(view, info, prompt_ids), [p.records for p in view.panes])


def write_stream(fh: IO[str], text_lines: Iterable[str]) -> None:
    for line in text_lines:
        fh.write(line + "\n")
    fh.flush()
