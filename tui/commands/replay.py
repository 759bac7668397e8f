"""`logitfork replay FILE.jsonl`: open a saved session in the app, read-only, with no model.

The cursor, the colouring, the inspect view (from the stored top-20 lists) and the
sparklines work from the file; what needs the model (step, run, fork, edit, add,
rewind, force, reseed, draws) is shown dimmed and says why. A recovery log is accepted
too. Light imports: no torch is loaded at all, so the app opens in well under a second.
"""

from __future__ import annotations

import argparse


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("transcript", metavar="FILE.jsonl",
                   help="a transcript saved by the app or `run` (or a recovery log)")
    p.add_argument("--mono", action="store_true",
                   help="no colour: text styles carry the rank (also when NO_COLOR is set)")


def main(args: argparse.Namespace) -> int:
    import sys

    from tui.commands.watch import wants_mono
    from tui.workbench.replay_source import replay_source

    source = replay_source(args.transcript)  # bad files: one error line, before any screen
    from tui.app.app import make_app

    app = make_app(source=source, mono=wants_mono(args.mono))
    app.run()
    if app.return_code not in (None, 0):
        print("error: the app stopped on an internal error (see above)", file=sys.stderr)
    return int(app.return_code or 0)
