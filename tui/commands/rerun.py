"""`logitfork rerun FILE.jsonl`: decode a saved session again and compare token by token.

Exit status 0 when every token matches, 3 at the first difference (step, pane, both
tokens, both top-5 lists, and the package versions then and now).
"""

from __future__ import annotations

import argparse

EXIT_DIFFERENT = 3


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("transcript", metavar="FILE.jsonl", help="a transcript saved by the app or `run`")
    p.add_argument("--model", default=None,
                   help="run on this model instead of the one the header names")
    p.add_argument("--allow-pickle", action="store_true",
                   help="allow pickled (.bin/.pt) weights; only for files you trust")


def main(args: argparse.Namespace) -> int:
    from tui.commands.model_loading import load_for_command
    from tui.transcripts.reader import StoredSession

    session = StoredSession.open(args.transcript)  # check the whole file before loading
    head = session.header

    from tui.model.catalogue import DTYPES
    from tui.transcripts.rerun import describe, rerun

    name = args.model or head.model_name
    dtype = head.dtype if head.dtype in DTYPES else "float32"
    lm = load_for_command(name, dtype=dtype, allow_pickle=args.allow_pickle)
    result = rerun(session, lm)
    for line in describe(result, args.transcript, name):
        print(line)
    return 0 if result.identical else EXIT_DIFFERENT
