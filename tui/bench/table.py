"""`make bench`: how fast a step is, on the generic and the lean forward path, and why.

    python -m tui.bench [--quick] [--cold] [--model NAME] [--threads N] [--no-own-models]

Prints one plain-text table, one row per measurement. Every ratio is computed from
numbers measured in the same run with the variants interleaved (timings on this shared
2-core machine swing 20-30% between runs), and each target gets PASS or
MISS beside it. Sections: parity of the lean path on the real model, decode step time
(1/2/4/8 panes, context ~50 and ~400), prefill, matmul layouts tried, threads, the
4-recipe run against transformers' generate(), the recipe math's share of a step,
bfloat16's deviation and speed, the sweep's batching gain, the sweep in one process
against a local Ray cluster of 1 and 2 workers, start-up time (cold only with --cold:
~40 s), and models of 1B llama and 0.5B qwen2 shape against the bandwidth floor
(`tui.bench.own_models`; --no-own-models leaves them out).
"""

from __future__ import annotations

import argparse
import sys
import time
from typing import Sequence

from tui.bench.step import Row, render

PANES = (1, 2, 4, 8)
CONTEXTS = (50, 400)  # context lengths for the step times


def parse_args(argv: Sequence[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="python -m tui.bench", description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="fewer steps and rounds (about a minute)")
    p.add_argument("--cold", action="store_true", help="also time a first GGUF conversion (~40 s)")
    p.add_argument("--model", default=None, help="a catalogue name or local folder (default: the embedded model)")
    p.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's choice)")
    p.add_argument("--no-own-models", action="store_true",
                   help="leave out the 1B llama / 0.5B qwen2 shapes (tui.bench.own_models: minutes)")
    args = p.parse_args(argv)
    if args.threads is not None and args.threads < 1:
        p.error(f"--threads: must be at least 1, got {args.threads}")
    return args


def sweep_rows(lm: object, quick: bool) -> list[Row]:
    """The sweep's batching gain (`tui.bench.sweep`): 32 rows per forward against 1."""
    from tui.bench.sweep import bench_sweep

    out = bench_sweep(lm, new_tokens=8 if quick else 16)  # type: ignore[arg-type]
    return [Row("sweep", f"sweep tokens/s, {out['rows_per_forward']} rows per forward vs 1 row",
                f"{out['speedup']:.1f}x", f"{out['tokens_per_s_batched']:.0f} vs "
                f"{out['tokens_per_s_single']:.1f} tokens/s, {out['forward']}",
                f">= {out['target_speedup']:g}", "PASS" if out["meets_target"] else "MISS")]


def cluster_rows(model: str, quick: bool) -> list[Row]:
    """The same sweep in one process and on a local Ray cluster of 1 and 2 workers."""
    from tui.bench.sweep import bench_cluster

    out = bench_cluster(model, new_tokens=8 if quick else 16)
    rates = " / ".join(f"{out['ray'][n]:.0f}" for n in sorted(out["ray"]))
    threads = ", ".join(f"{n} worker(s) x {t} thread(s)" for n, t in sorted(out["threads"].items()))
    return [Row("sweep", "sweep tokens/s: one process | ray, 1 / 2 local workers",
                f"{out['one_process']:.0f} | {rates}",
                f"{out['tokens']} tokens in {out['chunks']} chunks; one process "
                f"{out['one_process_threads']} thread(s); {threads}; model loads not timed")]


def main(argv: Sequence[str] | None = None) -> int:
    args = parse_args(argv)
    from tui.settings import prepare_process

    prepare_process()
    import torch

    from tui.bench import precision, runs, step
    from tui.model.catalogue import DEFAULT_MODEL, load_model
    from tui.model.forward import Runner
    from tui.model.lean_llama import LeanRunner, lean_refusal
    from tui.session.scenario import find_scenario, load_scenario

    if args.threads:
        torch.set_num_threads(args.threads)
    started = time.perf_counter()
    lm = load_model(args.model or DEFAULT_MODEL)
    reason = lean_refusal(lm.model)
    if reason is not None:
        print(f"error: the lean path cannot run {lm.name}: {reason}", file=sys.stderr)
        return 2
    runners = {"generic": Runner(lm.model), "lean": LeanRunner(lm.model)}
    whole = LeanRunner(lm.model, chunked=False)  # oneDNN sums in one chain: faster, less exact
    scenario = load_scenario(find_scenario("harbour-town"))
    prompt = lm.encode_prompt(scenario.prompt, scenario.message_dicts)
    quick = args.quick
    contexts = {n: step.context_ids(prompt, n) for n in CONTEXTS}
    steps, rounds = (6, 1) if quick else (16, 3)
    rows: list[Row] = [Row("setup", "model, threads, lean matmuls", lm.name,
                           f"{torch.get_num_threads()} threads, "
                           f"{'oneDNN packed' if runners['lean'].packed else 'F.linear'}")]

    def section(name: str) -> None:
        print(f"... {name} ({time.perf_counter() - started:.0f} s)", file=sys.stderr, flush=True)

    section("parity")
    rows += precision.parity_rows(lm.model, {**runners, "lean, whole sums": whole},
                                        contexts[50], 30 if quick else 100)
    section("decode steps")
    grid = step.step_grid(runners, contexts, PANES, steps)
    rows += step.step_rows(grid, CONTEXTS, PANES)
    rows += step.chunk_rows(runners["lean"], whole, contexts[50], steps)
    section("prefill")
    rows += step.prefill_rows(runners, contexts, rounds)
    if not quick:
        section("matmul layouts")
        rows += step.matmul_rows(lm.model, rounds)
        section("threads")
        rows += step.thread_rows(runners["lean"], contexts[50], steps)
    section("generate() vs engine")
    rows += runs.run_rows(lm, runners, prompt, 12 if quick else 32, 1 if quick else 2)
    section("recipe math")
    rows += runs.recipe_share_rows(runners["lean"], prompt, grid[("lean", 50, 4)], rounds)
    section("bfloat16")
    rows += precision.bf16_rows(lm.model, runners["lean"], prompt, 50, steps)
    section("sweep")
    rows += sweep_rows(lm, quick)
    section("sweep on a local Ray cluster")
    rows += cluster_rows(args.model or DEFAULT_MODEL, quick)
    section("start")
    rows += runs.start_rows(args.cold, args.model)
    if not args.no_own_models:
        from tui.bench.own_models import own_model_rows

        section("own models")
        rows += own_model_rows(quick)
    print(render(rows))
    met = sum(r.status == "PASS" for r in rows)
    missed = sum(r.status == "MISS" for r in rows)
    print(f"\n{met} targets met, {missed} missed; {time.perf_counter() - started:.0f} s")
    return 0

