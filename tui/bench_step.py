"""Benchmark parts that time the forward paths: decode steps, prefill, matmul layouts, bfloat16.

Every comparison is measured in one run with the variants interleaved round by round
(the machine is shared and noisy), and reported as medians and ratios.
"""

from __future__ import annotations

import copy
import statistics
import time
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import torch
import torch.nn.functional as F


@dataclass(frozen=True)
class Row:
    """One line of the benchmark table."""

    section: str
    name: str
    value: str
    note: str = ""
    target: str = ""
    status: str = ""  # PASS, MISS or empty when there is no target


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def ms(seconds: float) -> str:
    return f"{seconds * 1e3:.1f} ms"


def context_ids(base: Sequence[int], n: int) -> list[int]:
    """`n` real tokens: the prompt's tokens repeated as often as needed."""
    return [base[i % len(base)] for i in range(n)]


def timed(fn: Callable[[], Any]) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


# ----- decode steps ------------------------------------------------------------------

def step_times(runner: Any, ctx: Sequence[int], panes: int, steps: int) -> list[float]:
    """Seconds per decode step at `panes` rows after a prefilled context."""
    kv, _ = runner.prefill([list(ctx)])
    kv = kv.select([0] * panes)
    kv, _ = runner.step(kv, [ctx[0]] * panes)  # warm-up: first touch of the buffers
    times = []
    for i in range(steps):
        tokens = [ctx[(i + r) % len(ctx)] for r in range(panes)]
        start = time.perf_counter()
        kv, _ = runner.step(kv, tokens)
        times.append(time.perf_counter() - start)
    return times


def step_grid(runners: dict[str, Any], contexts: dict[int, list[int]], panes: Sequence[int],
              steps: int, rounds: int) -> dict[tuple[str, int, int], float]:
    """Median step seconds per (path, context length, panes), rounds interleaved."""
    samples: dict[tuple[str, int, int], list[float]] = {}
    for _ in range(rounds):
        for n, ctx in contexts.items():
            for p in panes:
                for name, runner in runners.items():
                    samples.setdefault((name, n, p), []).extend(step_times(runner, ctx, p, steps))
    return {key: statistics.median(v) for key, v in samples.items()}


def step_rows(grid: dict[tuple[str, int, int], float], contexts: Sequence[int],
              panes: Sequence[int]) -> list[Row]:
    rows = []
    for n in contexts:
        for p in panes:
            gen, lean = grid[("generic", n, p)], grid[("lean", n, p)]
            label = f"ctx {n}, {p} pane{'s' if p > 1 else ''}"
            rows.append(Row("step", f"{label}, generic", ms(gen)))
            rows.append(Row("step", f"{label}, lean", ms(lean), f"{gen / lean:.2f}x faster than generic"))
    for n in contexts:
        for path in ("generic", "lean"):
            ratio = grid[(path, n, 4)] / grid[(path, n, 1)]
            target = "<= 1.5" if path == "lean" else ""
            rows.append(Row("step", f"4-pane / 1-pane step, ctx {n}, {path}", f"{ratio:.2f}",
                            "" if target else "before (generic path)", target,
                            verdict(ratio <= 1.5) if target else ""))
    return rows


def prefill_rows(runners: dict[str, Any], contexts: dict[int, list[int]], rounds: int) -> list[Row]:
    samples: dict[tuple[str, int], list[float]] = {}
    for _ in range(rounds):
        for n, ctx in contexts.items():
            for name, runner in runners.items():
                samples.setdefault((name, n), []).append(timed(lambda: runner.prefill([ctx])))
    rows = []
    for n in contexts:
        gen = statistics.median(samples[("generic", n)])
        lean = statistics.median(samples[("lean", n)])
        rows.append(Row("prefill", f"{n} tokens, 1 row, generic", ms(gen)))
        rows.append(Row("prefill", f"{n} tokens, 1 row, lean", ms(lean), f"{gen / lean:.2f}x faster than generic"))
    return rows


# ----- matmul layouts (the ideas tried for the small-batch matmul cost) -------------------

def matmul_rows(model: Any, rounds: int) -> list[Row]:
    """The output projection (V x E) and one gate/up weight at 1 and 4 rows, several layouts."""
    from tui.lean_llama import PackedLinear, onednn_works

    head = model.get_output_embeddings().weight.detach()  # (V, E)
    mlp = model.model.layers[0].mlp
    gate_up = torch.cat([mlp.gate_proj.weight.detach(), mlp.up_proj.weight.detach()])  # (2I, E)
    rows = []
    for label, w in (("output projection", head), ("one layer's gate/up", gate_up)):
        w_t = w.t().contiguous()  # (E, N), pre-transposed
        chunks = w.split(max(1, w.shape[0] // 8))  # 8 row blocks of the weight
        variants: dict[str, Callable[[torch.Tensor], torch.Tensor]] = {
            "F.linear": lambda x: F.linear(x, w),
            "mm, pre-transposed W": lambda x: torch.mm(x, w_t),
            "W @ x^T": lambda x: torch.mm(w, x.t()).t(),
            "8 vocabulary chunks": lambda x: torch.cat([F.linear(x, c) for c in chunks], dim=1),
        }
        if onednn_works(w.dtype):
            packed = PackedLinear(w, None, packed=True)
            variants["oneDNN packed"] = packed
        reps = 1 if w.shape[0] > 10_000 else 30
        for b in (1, 4):
            x = torch.randn(b, w.shape[1], dtype=w.dtype)
            samples: dict[str, list[float]] = {k: [] for k in variants}
            with torch.inference_mode():
                for _ in range(rounds * 5):
                    for name, fn in variants.items():
                        samples[name].append(timed(lambda: [fn(x) for _ in range(reps)]) / reps)
            base = statistics.median(samples["F.linear"])
            for name in variants:
                t = statistics.median(samples[name])
                rows.append(Row("matmul", f"{label} {tuple(w.shape)}, {b} row{'s' if b > 1 else ''}, {name}",
                                f"{t * 1e3:.2f} ms", f"{base / t:.2f}x F.linear"))
    return rows


def thread_rows(runner: Any, ctx: list[int], steps: int, rounds: int) -> list[Row]:
    """The lean 4-pane step with 1 thread and with torch's default thread count."""
    default = torch.get_num_threads()
    samples: dict[int, list[float]] = {default: [], 1: []}
    try:
        for _ in range(rounds):
            for n in samples:
                torch.set_num_threads(n)
                samples[n].extend(step_times(runner, ctx, 4, steps))
    finally:
        torch.set_num_threads(default)
    one, many = statistics.median(samples[1]), statistics.median(samples[default])
    return [Row("threads", f"lean 4-pane step, {default} threads (default)", ms(many)),
            Row("threads", "lean 4-pane step, 1 thread", ms(one), f"{one / many:.2f}x the default")]


# ----- bfloat16 ----------------------------------------------------------------------

def greedy_logits(runner: Any, prompt: list[int], steps: int,
                  forced: Sequence[int] | None = None) -> tuple[list[int], list[torch.Tensor]]:
    """Greedy tokens and the logits before each, or the logits along `forced` tokens."""
    kv, logits = runner.prefill([prompt])
    tokens, seen = [], []
    for i in range(steps):
        seen.append(logits[0])
        tokens.append(int(logits[0].argmax()) if forced is None else int(forced[i]))
        kv, logits = runner.step(kv, [tokens[-1]])
    return tokens, seen


def bf16_rows(model: Any, lean32: Any, prompt: list[int], steps: int, step_rounds: int,
              step_count: int) -> list[Row]:
    """bfloat16's deviation from float32 over greedy steps, and its 4-pane step time."""
    from tui.lean_llama import LeanRunner

    model16 = copy.deepcopy(model).to(torch.bfloat16)
    lean16 = LeanRunner(model16)
    ref_tokens, ref_logits = greedy_logits(lean32, prompt, steps)
    _, forced_logits = greedy_logits(lean16, prompt, steps, forced=ref_tokens)  # same context
    free_tokens, _ = greedy_logits(lean16, prompt, steps)
    agree = sum(int(a.argmax()) == int(b.argmax()) for a, b in zip(ref_logits, forced_logits))
    deltas = torch.stack([(a - b).abs() for a, b in zip(ref_logits, forced_logits)])  # (steps, V)
    diverge = next((i for i, (a, b) in enumerate(zip(ref_tokens, free_tokens)) if a != b), None)
    samples: dict[str, list[float]] = {"float32": [], "bfloat16": []}
    for _ in range(step_rounds):
        samples["float32"].extend(step_times(lean32, prompt, 4, step_count))
        samples["bfloat16"].extend(step_times(lean16, prompt, 4, step_count))
    t32, t16 = statistics.median(samples["float32"]), statistics.median(samples["bfloat16"])
    return [
        Row("bfloat16", f"top-1 agreement with float32, {steps} greedy steps", f"{agree}/{steps}",
            "teacher-forced on the float32 tokens"),
        Row("bfloat16", "mean |delta logit| vs float32", f"{float(deltas.mean()):.3f}",
            f"max {float(deltas.max()):.2f}"),
        Row("bfloat16", "free-running greedy text diverges at step",
            "never" if diverge is None else str(diverge), f"of {steps}"),
        Row("bfloat16", "lean 4-pane step, bfloat16", ms(t16), f"{t32 / t16:.2f}x faster than float32 ({ms(t32)})"
            + ("" if lean16.packed else "; oneDNN bf16 unavailable, plain F.linear")),
    ]
