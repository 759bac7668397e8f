"""`logitfork report FILE.jsonl`: a shareable HTML or Markdown report of a transcript."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("transcript", metavar="FILE.jsonl", help="a transcript saved by the app or `run`")
    p.add_argument("--out", default=None, metavar="REPORT.html|REPORT.md|-",
                   help="where to write: .html (one self-contained file) or .md; '-' prints "
                        "Markdown (default: FILE.html beside the transcript)")


def main(args: argparse.Namespace) -> int:
    from tui.errors import UserError
    from tui.reports.gather import gather
    from tui.reports.report import kind_of, write_report
    from tui.transcripts.reader import StoredSession

    out = args.out
    if out is not None and out != "-":
        kind_of(out)  # refuse a bad suffix before reading anything
    session = StoredSession.open(args.transcript)
    if out == "-":
        from tui.reports.markdown import render_md

        for line in render_md(gather(session)):
            print(line)
        return 0
    target = out or Path(args.transcript).with_suffix(".html")
    try:
        path = write_report(session, target)
    except OSError as exc:
        raise UserError(f"{target}: cannot write the report ({exc.strerror or exc})") from None
    print(f"report: {path}", file=sys.stderr)
    return 0
