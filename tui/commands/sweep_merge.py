"""`logitfork sweep-merge DIR... [--out DIR]`: join the shard folders of one sweep.

Every folder must hold the same sweep (the same fingerprint). The merged folder holds
every chunk once, in order, and gets the same result files and tables as a sweep run
in one piece. A chunk found in two folders is reported (kept once if both copies
agree); chunks found in none are reported with their shard, and nothing is written.
"""

from __future__ import annotations

import argparse
import sys


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("folders", nargs="+", metavar="DIR", help="shard folders of one sweep")
    p.add_argument("--out", default=None, metavar="DIR",
                   help="the merged folder (default: sweeps/<sweep file stem>/)")
    p.add_argument("--resamples", type=int, default=1000, metavar="N",
                   help="bootstrap resamples for the 95%% intervals (default 1000)")


def main(args: argparse.Namespace) -> int:
    from pathlib import Path

    from tui.errors import UserError
    from tui.sweeps.folder import merge_folders, read_manifest
    from tui.sweeps.plan import DEFAULT_ROOT

    if args.resamples < 1:
        raise UserError(f"--resamples: must be at least 1, got {args.resamples}")
    sources = [Path(f) for f in args.folders]
    if args.out:
        out = Path(args.out)
    else:
        out = DEFAULT_ROOT / Path(read_manifest(sources[0]).sweep_file).stem
    if any(out.resolve() == s.resolve() for s in sources):
        raise UserError(f"--out: {out} is one of the folders being merged; give another folder")
    folder, notes = merge_folders(sources, out)
    for note in notes:
        print(f"note: {note}", file=sys.stderr)
    print(f"merged {len(sources)} folder(s), {len(folder.done)} chunks, into {out}",
          file=sys.stderr)

    from tui.sweeps.report import report_folder

    report_folder(folder, sys.stdout, n_resamples=args.resamples)
    return 0
