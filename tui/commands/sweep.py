"""`logitfork sweep SWEEP.toml`: many samples per recipe, measured, with the front.

Runs every (recipe, sample) row of every prompt in batched chunks, appends each
finished chunk to the output folder, and, once every chunk is in, writes
results.csv, results.md and front.png there and prints the tables. Running the same
command again resumes: finished chunks are skipped. `--shard I/N` runs only the
chunks whose index % N == I - 1, into a folder of its own, for `sweep-merge`.
`--ray ADDRESS` runs the chunks on the workers of a Ray cluster (`tui.sweeps.cluster`);
this process still writes the folder, so the rest is the same.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from tui.sweeps.folder import Manifest, SweepFolder
    from tui.sweeps.metrics import SampleRecord
    from tui.sweeps.runner import Chunk, SweepJob
    from tui.sweeps.spec import Prompt, SweepSpec


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("sweep", metavar="SWEEP.toml", help="the sweep file")
    p.add_argument("--out", default=None, metavar="DIR",
                   help="output folder (default: sweeps/<file stem>/ in the current folder; "
                        "an existing folder of the same sweep is resumed)")
    p.add_argument("--shard", default=None, metavar="I/N",
                   help="run only shard I of N (1-based): the chunks whose index %% N == I - 1 "
                        "(default folder: sweeps/<file stem>-shard-I-of-N/)")
    p.add_argument("--resamples", type=int, default=1000, metavar="N",
                   help="bootstrap resamples for the 95%% intervals (default 1000)")
    p.add_argument("--allow-pickle", action="store_true",
                   help="allow pickled (.bin/.pt) weights; only for files you trust")
    p.add_argument("--ray", default=None, metavar="ADDRESS",
                   help="run the chunks on a Ray cluster: 'auto' (the running cluster), "
                        "HOST:PORT, ray://HOST:PORT (a client connection), or 'local' (start "
                        "one on this machine); each worker loads the model itself")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="with --ray: how many workers (default: one per CPU of the cluster; "
                        "the CPUs are shared out as torch threads)")
    p.add_argument("--threads", type=int, default=None, metavar="T",
                   help="with --ray: torch threads per worker (default: the cluster's CPUs "
                        "divided by the workers); fix it to keep log-probabilities bit for bit "
                        "across runs with other --workers")


def _todo(folder: SweepFolder, job: SweepJob, out: Path) -> list[Chunk]:
    """The chunks this run still has to write; says so when it resumes."""
    todo = [c for c in job.chunks() if folder.manifest.owns(c.index) and c.index not in folder.done]
    if folder.done:
        owned = len(folder.owned_chunks())
        print(f"resuming {out}: {owned - len(todo)} of {owned} chunks already written",
              file=sys.stderr)
    return todo


def _run_here(args: argparse.Namespace, spec: SweepSpec, prompts: tuple[Prompt, ...],
              manifest: Manifest, out: Path) -> SweepFolder:
    """The one-process run: load the model, decode the chunks in order, write each."""
    from tui.commands.model_loading import load_for_command
    from tui.errors import UserError
    from tui.sweeps.folder import SweepFolder, package_versions
    from tui.sweeps.plan import build_job, check_batch
    from tui.commands.progress_display import ProgressDisplay
    from tui.sweeps.progress import SweepProgress
    from tui.sweeps.runner import SweepRunner

    try:
        lm = load_for_command(spec.model, allow_pickle=args.allow_pickle)
    except UserError as exc:  # the model the sweep file names: say which file and field
        raise UserError(f"{spec.path}: model: {exc}", exc.exit_code) from None
    job = build_job(spec, prompts, lm)
    print(check_batch(spec, lm, job), file=sys.stderr)  # rows per forward pass against free memory
    runner = lm.runner()
    versions = {**package_versions(), "model": {"name": lm.name, "source": lm.source,
                                                "dtype": lm.dtype},
                "forward": type(runner).__name__}
    folder = SweepFolder.open_for_run(out, manifest, spec.source_text, versions)
    todo = _todo(folder, job, out)
    if todo:
        sweeper = SweepRunner.for_model(lm, job)
        with ProgressDisplay() as display:  # its last line stays, also when interrupted
            progress = SweepProgress(sum(len(c.rows) for c in todo), job.max_new_tokens,
                                     chunks=len(todo), report=display, say=display.say,
                                     title=f"sweep {spec.path.name}")
            for chunk in todo:
                folder.append_chunk(chunk.index, sweeper.run_chunk(chunk, on_step=progress.step))
                progress.chunk_done(len(chunk.rows))
    return folder


def _run_on_cluster(args: argparse.Namespace, spec: SweepSpec, prompts: tuple[Prompt, ...],
                    manifest: Manifest, out: Path) -> SweepFolder:
    """The --ray run: workers decode the chunks; this process writes each one that comes back.

    The folder is made only once every worker has its model (errors leave it untouched).
    """
    from tui.sweeps.cluster import open_pool
    from tui.sweeps.folder import SweepFolder
    from tui.commands.progress_display import ProgressDisplay
    from tui.sweeps.progress import SweepProgress

    with open_pool(args.ray, args.workers, model=spec.model, allow_pickle=args.allow_pickle,
                   spec=spec, prompts=prompts, threads=args.threads) as pool:
        print(f"ray: {pool.describe()}", file=sys.stderr)
        folder = SweepFolder.open_for_run(out, manifest, spec.source_text, pool.versions())
        todo = _todo(folder, pool.job, out)
        if todo:
            with ProgressDisplay() as display:  # its last line stays, also when interrupted
                progress = SweepProgress(sum(len(c.rows) for c in todo), pool.job.max_new_tokens,
                                         chunks=len(todo), report=display, say=display.say,
                                         title=f"sweep {spec.path.name}")

                def write(chunk: Chunk, samples: list[SampleRecord]) -> None:
                    folder.append_chunk(chunk.index, samples)
                    progress.chunk_done(len(chunk.rows), sum(len(s.token_ids) for s in samples))

                pool.run(todo, write, progress.note)
    return folder


def main(args: argparse.Namespace) -> int:
    from tui.errors import UserError
    from tui.sweeps.folder import SweepFolder, shard_text
    from tui.sweeps.plan import default_folder, make_manifest, parse_shard, resolve_prompts
    from tui.sweeps.spec import load_sweep

    spec = load_sweep(args.sweep)
    shard = parse_shard(args.shard)
    if args.resamples < 1:
        raise UserError(f"--resamples: must be at least 1, got {args.resamples}")
    prompts = resolve_prompts(spec)
    manifest = make_manifest(spec, prompts, shard)
    out = Path(args.out) if args.out else default_folder(spec, shard)
    SweepFolder.check_existing(out, manifest)  # refuse a wrong folder before loading anything
    for name, value in (("--workers", args.workers), ("--threads", args.threads)):
        if value is not None and args.ray is None:
            raise UserError(f"{name}: only with --ray ADDRESS")
        if value is not None and value < 1:
            raise UserError(f"{name}: must be at least 1, got {value}")
    run = _run_on_cluster if args.ray is not None else _run_here
    folder = run(args, spec, prompts, manifest, out)
    owned = len(folder.owned_chunks())
    print(f"samples: {out / 'samples.jsonl'}", file=sys.stderr)
    if shard is not None:
        print(f"{shard_text(shard)} done: {owned} chunk(s) in {out}; join the shard folders "
              "with: logitfork sweep-merge DIR...", file=sys.stderr)
        return 0

    from tui.sweeps.report import report_folder

    report_folder(folder, sys.stdout, n_resamples=args.resamples)
    print(f"results: {out / 'results.csv'}, {out / 'results.md'}, {out / 'front.png'}",
          file=sys.stderr)
    return 0
