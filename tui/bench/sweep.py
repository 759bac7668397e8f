"""The sweep row of the benchmark: tokens per second with 32 rows per forward against 1.

A sweep is worth batching only if many rows per forward pass write many more tokens
per second than one row at a time. `bench_sweep` runs the same kind of rows (one
prompt, one recipe, the sweep's own `SweepRunner` and forward path) both ways and
reports the rates and their ratio; the goal is at least `TARGET_SPEEDUP`. The
prompt is prefilled before the clock starts (a sweep prefills once per prompt).
Called by `tui.bench`; tests never assert speed.
"""

from __future__ import annotations

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


if __name__ == "__main__":  # python -m tui.bench.sweep [MODEL]
    import json
    import sys

    from tui.model.catalogue import DEFAULT_MODEL, load_model

    print(json.dumps(bench_sweep(load_model(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_MODEL)),
                     indent=2))
