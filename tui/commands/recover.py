"""`logitfork recover [FILE --out X.jsonl]`: list crash-recovery logs, or turn one into a transcript."""

from __future__ import annotations

import argparse
import sys


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("log", nargs="?", default=None, metavar="FILE",
                   help="a recovery log (a path, or a name from the list); omit to list them")
    p.add_argument("--out", default=None, metavar="X.jsonl",
                   help="the transcript to write from the log")
    p.add_argument("--delete", action="store_true",
                   help="remove the recovery log once the transcript is written")


def main(args: argparse.Namespace) -> int:
    from tui.errors import UserError
    from tui.transcripts.recovery_log import recovery_dir
    from tui.transcripts.recovery_reader import find_recovery, list_recoveries, read_recovery

    if args.log is None:
        if args.out or args.delete:
            raise UserError("--out/--delete: name the recovery log to convert (see the list)")
        return _list(list_recoveries(), recovery_dir())
    if not args.out:
        raise UserError("--out: give the transcript file to write, e.g. --out session.jsonl")
    from tui.files import write_atomic

    path = find_recovery(args.log)
    rec = read_recovery(path)
    try:
        write_atomic(args.out, rec.transcript_lines())
    except OSError as exc:
        raise UserError(f"{args.out}: cannot write the transcript ({exc.strerror or exc})") from None
    print(f"recovered {rec.steps} steps of {len(rec.header.panes)} panes "
          f"({rec.header.title!r}) into {args.out}", file=sys.stderr)
    if args.delete:
        path.unlink(missing_ok=True)
        print(f"removed {path}", file=sys.stderr)
    return 0


def _list(items, folder) -> int:
    if not items:
        print(f"no recovery logs in {folder}")
        return 0
    print(f"recovery logs in {folder} (newest first):")
    print(f"{'last written':19}  {'steps':>5}  {'panes':>5}  title / model / file")
    for s in items:
        when = s.modified.strftime("%Y-%m-%d %H:%M:%S")
        state = "  (still running)" if s.running else ""
        if s.problem:
            print(f"{when}  {'?':>5}  {'?':>5}  unreadable: {s.problem}")
            continue
        print(f"{when}  {s.steps:>5}  {s.panes:>5}  {s.title} / {s.model} / {s.path.name}{state}")
    print("turn one into a transcript: logitfork recover FILE --out session.jsonl")
    return 0
