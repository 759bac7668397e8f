"""The sweep rows of the benchmark: batching gain, and a Ray cluster's rate beside one process.

A sweep is worth batching only if many rows per forward pass write many more tokens
per second than one row at a time. `bench_sweep` runs the same kind of rows (one
prompt, one recipe, the sweep's own `SweepRunner` and forward path) both ways and
reports the rates and their ratio; the goal is at least `TARGET_SPEEDUP`. The
prompt is prefilled before the clock starts (a sweep prefills once per prompt).
`bench_cluster` runs one small sweep in one process and on a local Ray cluster with
1 and 2 workers (`tui.sweeps.cluster`), clocks started once every worker has its
model; no target (the gain depends on the machine's cores).
Called by `tui.bench`; tests never assert speed.
"""

from __future__ import annotations

import json
import time
from typing import TYPE_CHECKING, Any

from tui.sweeps.runner import SweepJob, SweepRunner

if TYPE_CHECKING:
    from tui.model.catalogue import LoadedModel

TARGET_SPEEDUP = 8.0
BENCH_PROMPT = ("Logbook of Skerrow Light, kept by Ada Penhallow, keeper.\n\n"
                "14 November. Wind north-east, rising. ")
BENCH_RECIPE = "temperature=0.8 top_p=0.95"


def _rate(lm: LoadedModel, runner: Any, rows: int, chunk_rows: int,
          new_tokens: int) -> tuple[float, int, float]:
    """(tokens per second, tokens, seconds) for `rows` samples in chunks of `chunk_rows`."""
    prompt = tuple(lm.encode_prompt(BENCH_PROMPT, None))
    job = SweepJob(prompt_ids=(prompt,), recipes=(BENCH_RECIPE,), samples=rows,
                   max_new_tokens=new_tokens, seed=0, chunk_rows=chunk_rows)
    sweeper = SweepRunner(runner, lm.decode, job, eos_ids=lm.eos_ids, max_context=lm.max_context)
    sweeper.prompt_state(0)  # prefill outside the clock
    start = time.perf_counter()
    tokens = sum(len(s.token_ids) for chunk in job.chunks() for s in sweeper.run_chunk(chunk))
    seconds = time.perf_counter() - start
    return (tokens / seconds if seconds > 0 else float("nan")), tokens, seconds


def bench_sweep(lm: LoadedModel, *, rows: int = 32, single_rows: int = 4,
                new_tokens: int = 16) -> dict[str, Any]:
    """Sweep tokens per second at `rows` rows per forward and at 1 row, and the ratio.

    The 1-row rate is measured on `single_rows` samples (one chunk each), enough for a
    steady rate without tripling the run. Keys: rows_per_forward, tokens_per_s_batched,
    tokens_per_s_single, speedup, target_speedup, meets_target, tokens, seconds, new_tokens,
    forward.
    """

    runner = lm.runner()
    batched, batched_tokens, batched_s = _rate(lm, runner, rows, rows, new_tokens)
    single, single_tokens, single_s = _rate(lm, runner, single_rows, 1, new_tokens)
    speedup = batched / single if single > 0 else float("nan")
    return {
        "rows_per_forward": rows,
        "tokens_per_s_batched": batched,
        "tokens_per_s_single": single,
        "speedup": speedup,
        "target_speedup": TARGET_SPEEDUP,
        "meets_target": bool(speedup >= TARGET_SPEEDUP),
        "new_tokens": new_tokens,
        "tokens": {"batched": batched_tokens, "single": single_tokens},
        "seconds": {"batched": batched_s, "single": single_s},
        "forward": type(runner).__name__,
    }


def bench_cluster(model: str, *, samples: int = 32, chunk_rows: int = 8,
                  new_tokens: int = 16, workers: tuple[int, ...] = (1, 2)) -> dict[str, Any]:
    """Sweep tokens per second: one process, then a local Ray cluster with each worker count.

    Each variant decodes one chunk untimed first (each worker, on the cluster), then
    every chunk of the sweep on the clock.

    Keys: one_process, ray (worker count -> tokens/s), threads (worker count -> torch
    threads per worker), tokens, chunks.
    """
    import torch

    from tui.model.catalogue import load_model
    from tui.sweeps import cluster
    from tui.sweeps.plan import build_job, resolve_prompts
    from tui.sweeps.spec import parse_sweep_text

    text = "\n".join([f"model = {json.dumps(model)}", f"prompts = [{json.dumps(BENCH_PROMPT)}]",
                      f"recipes = [{json.dumps(BENCH_RECIPE)}]", f"samples = {samples}",
                      f"max_new_tokens = {new_tokens}", f"chunk_rows = {chunk_rows}", ""])
    spec = parse_sweep_text(text, "<bench sweep>")
    prompts = resolve_prompts(spec)
    lm = load_model(model)
    job = build_job(spec, prompts, lm)
    sweeper = SweepRunner.for_model(lm, job)
    chunks = job.chunks()
    sweeper.run_chunk(chunks[0])  # warm-up, as each worker's below: first passes are slow
    start = time.perf_counter()
    tokens = sum(len(s.token_ids) for c in chunks for s in sweeper.run_chunk(c))
    out: dict[str, Any] = {"one_process": tokens / (time.perf_counter() - start),
                           "one_process_threads": torch.get_num_threads(), "ray": {},
                           "threads": {}, "tokens": tokens, "chunks": len(chunks)}
    with cluster.connect(cluster.LOCAL, max(workers)) as connection:
        for n in workers:
            pool = cluster.WorkerPool(connection, n, model=cluster.model_for_workers(model),
                                      allow_pickle=False, spec=spec, prompts=prompts)
            written = [0]

            def write(chunk: Any, samples: list[Any]) -> None:
                written[0] += sum(len(s.token_ids) for s in samples)

            pool.run(chunks[:1] * n, lambda chunk, samples: None, lambda note: None)  # warm-up
            start = time.perf_counter()
            pool.run(chunks, write, lambda note: None)
            out["ray"][n] = written[0] / (time.perf_counter() - start)
            out["threads"][n] = pool.threads
            pool.close()
    return out


if __name__ == "__main__":  # python -m tui.bench.sweep [MODEL]
    import sys

    from tui.model.catalogue import DEFAULT_MODEL, load_model

    print(json.dumps(bench_sweep(load_model(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_MODEL)),
                     indent=2))
