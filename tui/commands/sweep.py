"""`logitfork sweep SWEEP.toml`: many samples per recipe, measured, with the front.

Runs every (recipe, sample) row of every prompt, as many rows per forward pass as
memory allows (`--batch-rows` fixes it), appends each finished chunk to the output
folder, and, once every chunk is in, writes results.csv, results.md and front.png
there and prints the tables. Running the same
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
    from tui.commands.progress_display import ProgressDisplay
    from tui.sweeps.folder import Manifest, SweepFolder
    from tui.sweeps.progress import SweepProgress
    from tui.sweeps.metrics import SampleRecord
    from tui.sweeps.runner import Batch, Chunk, SweepJob
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
    p.add_argument("--batch-rows", type=int, default=None, metavar="N",
                   help="rows per forward pass (default: as many as half the free memory holds, "
                        "up to one prompt's rows); changes no sample, only speed and memory")
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


def _batches(folder: SweepFolder, job: SweepJob, batch_rows: int, out: Path) -> list[Batch]:
    """The batches this run still has to write; says so when it resumes."""
    from tui.sweeps.runner import plan_batches

    owned = [c for c in job.chunks() if folder.manifest.owns(c.index)]
    batches = plan_batches(owned, batch_rows, done=folder.done)
    if folder.done:
        left = sum(len(b) for b in batches)
        print(f"resuming {out}: {len(owned) - left} of {len(owned)} chunks already written",
              file=sys.stderr)
    return batches


def _progress(batches: list[Batch], job: SweepJob, display: ProgressDisplay,
              spec: SweepSpec) -> SweepProgress:
    from tui.sweeps.progress import SweepProgress

    return SweepProgress(sum(len(c.rows) for b in batches for c in b), job.max_new_tokens,
                         chunks=sum(len(b) for b in batches), report=display, say=display.say,
                         title=f"sweep {spec.path.name}")


def _run_here(args: argparse.Namespace, spec: SweepSpec, prompts: tuple[Prompt, ...],
              manifest: Manifest, out: Path) -> SweepFolder:
    """The one-process run: load the model, decode the batches in order, write each."""
    from tui.commands.model_loading import load_for_command
    from tui.commands.progress_display import ProgressDisplay
    from tui.errors import UserError
    from tui.sweeps.folder import SweepFolder, package_versions, recorded_batch_rows
    from tui.sweeps.plan import build_job, choose_batch
    from tui.sweeps.runner import SweepRunner

    try:
        lm = load_for_command(spec.model, allow_pickle=args.allow_pickle)
    except UserError as exc:  # the model the sweep file names: say which file and field
        raise UserError(f"{spec.path}: model: {exc}", exc.exit_code) from None
    job = build_job(spec, prompts, lm)
    batch_rows, line = choose_batch(lm, job, args.batch_rows, recorded_batch_rows(out))
    print(line, file=sys.stderr)
    runner = lm.runner()
    versions = {**package_versions(), "model": {"name": lm.name, "source": lm.source,
                                                "dtype": lm.dtype},
                "forward": type(runner).__name__, "batch_rows": batch_rows}
    folder = SweepFolder.open_for_run(out, manifest, spec.source_text, versions)
    batches = _batches(folder, job, batch_rows, out)
    if batches:
        sweeper = SweepRunner.for_model(lm, job)
        with ProgressDisplay() as display:  # its last line stays, also when interrupted
            progress = _progress(batches, job, display, spec)
            for batch in batches:
                written = sweeper.run_batch(batch, batch_rows, on_step=progress.step)
                folder.append_chunks([(chunk.index, samples) for chunk, samples in written])
                for chunk, _ in written:
                    progress.chunk_done(len(chunk.rows))
    return folder


def _run_on_cluster(args: argparse.Namespace, spec: SweepSpec, prompts: tuple[Prompt, ...],
                    manifest: Manifest, out: Path) -> SweepFolder:
    """The --ray run: workers decode the batches; this process writes each one that comes back.

    The folder is made only once every worker has its model (errors leave it untouched).
    """
    from tui.commands.progress_display import ProgressDisplay
    from tui.sweeps.cluster import open_pool
    from tui.sweeps.folder import SweepFolder, recorded_batch_rows

    with open_pool(args.ray, args.workers, model=spec.model, allow_pickle=args.allow_pickle,
                   spec=spec, prompts=prompts, threads=args.threads,
                   batch_rows=args.batch_rows, recorded=recorded_batch_rows(out)) as pool:
        print(f"ray: {pool.describe()}", file=sys.stderr)
        print(pool.batch_line, file=sys.stderr)
        folder = SweepFolder.open_for_run(out, manifest, spec.source_text,
                                          {**pool.versions(), "batch_rows": pool.batch_rows})
        batches = _batches(folder, pool.job, pool.batch_rows, out)
        if batches:
            with ProgressDisplay() as display:  # its last line stays, also when interrupted
                progress = _progress(batches, pool.job, display, spec)

                def write(written: list[tuple[Chunk, list[SampleRecord]]]) -> None:
                    folder.append_chunks([(chunk.index, samples) for chunk, samples in written])
                    for chunk, samples in written:
                        progress.chunk_done(len(chunk.rows), sum(len(s.token_ids) for s in samples))

                pool.run(batches, write, progress.note)
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
    for name, value in (("--workers", args.workers), ("--threads", args.threads),
                        ("--batch-rows", args.batch_rows)):
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
