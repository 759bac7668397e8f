"""Writing a report of a transcript: HTML or Markdown, chosen by the output's suffix.

The renderers are `tui.reports.html` (one self-contained file: inline CSS, plots as
embedded PNG, no scripts) and `tui.reports.markdown`; both read a `tui.reports.gather.Report`.
`write_report` writes atomically.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Iterator

from tui.errors import UserError
from tui.files import write_atomic
from tui.reports.gather import Report, gather, plots_png
from tui.reports.html import render_html
from tui.reports.markdown import render_md
from tui.transcripts.reader import StoredSession

# ----- writing -------------------------------------------------------------------------------

def render(report: Report, kind: str) -> Iterator[str]:
    if kind == "html":
        return render_html(report, plots_png(report))
    return render_md(report)


def kind_of(out: str | os.PathLike[str]) -> str:
    suffix = Path(out).suffix.lower()
    if suffix in (".html", ".htm"):
        return "html"
    if suffix in (".md", ".markdown"):
        return "md"
    raise UserError(f"--out: {out}: give a file ending in .html or .md")


def write_report(session: StoredSession, out: str | os.PathLike[str]) -> Path:
    """Render the transcript to `out` (.html or .md), atomically."""
    kind = kind_of(out)
    report = gather(session)
    return write_atomic(out, render(report, kind))
