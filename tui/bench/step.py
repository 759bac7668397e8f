"""Benchmark parts that time the forward paths: decode steps, prefill, matmul layouts, threads.

Every comparison is measured in one run with the variants interleaved round by round
(the machine is shared and noisy), and reported as medians and ratios.
"""

from __future__ import annotations

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


def render(rows: Sequence[Row]) -> str:
    """A plain-text table with aligned columns."""
    head = Row("section", "measurement", "value", "note", "target", "")
    cells = [(r.section, r.name, r.value, r.target, r.status, r.note) for r in (head, *rows)]
    widths = [max(len(c[i]) for c in cells) for i in range(5)]
    lines = []
    for i, c in enumerate(cells):
        lines.append("  ".join(c[j].ljust(widths[j]) for j in range(5)) + "  " + c[5])
        if i == 0:
            lines.append("-" * (sum(widths) + 2 * 5 + 20))
    return "\n".join(line.rstrip() for line in lines)


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

def decode_state(runner: Any, ctx: Sequence[int], panes: int) -> Any:
    """A cache of `panes` rows after the prefilled context and one warm-up step."""
    kv, _ = runner.prefill([list(ctx)])
    kv, _ = runner.step(kv.select([0] * panes), [ctx[0]] * panes)  # first touch of the buffers
    return kv


def step_times(runner: Any, ctx: Sequence[int], panes: int, steps: int) -> list[float]:
    """Seconds per decode step at `panes` rows after a prefilled context."""
    return interleaved_steps({"only": (runner, panes)}, ctx, steps)["only"]


def interleaved_steps(variants: dict[Any, tuple[Any, int]], ctx: Sequence[int],
                      steps: int) -> dict[Any, list[float]]:
    """Step every variant (runner, panes) once per round, so that all see the same load."""
    states = {key: decode_state(runner, ctx, panes) for key, (runner, panes) in variants.items()}
    times: dict[Any, list[float]] = {key: [] for key in variants}
    for i in range(steps):
        for key, (runner, panes) in variants.items():
            tokens = [ctx[(i + r) % len(ctx)] for r in range(panes)]
            start = time.perf_counter()
            states[key], _ = runner.step(states[key], tokens)
            times[key].append(time.perf_counter() - start)
    return times


def step_grid(runners: dict[str, Any], contexts: dict[int, list[int]], panes: Sequence[int],
              steps: int) -> dict[tuple[str, int, int], float]:
    """Median step seconds per (path, context length, panes), all variants interleaved."""
    grid = {}
    for n, ctx in contexts.items():
        variants = {(name, n, p): (runner, p) for name, runner in runners.items() for p in panes}
        for key, times in interleaved_steps(variants, ctx, steps).items():
            grid[key] = statistics.median(times)
    return grid


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


def chunk_rows(chunked: Any, whole: Any, ctx: list[int], steps: int) -> list[Row]:
    """The lean step with oneDNN sums in chunks (the default) against whole-row sums."""
    variants = {(name, p): (runner, p) for name, runner in (("chunked", chunked), ("whole", whole))
                for p in (1, 4)}
    t = {key: statistics.median(v) for key, v in interleaved_steps(variants, ctx, steps).items()}
    rows = []
    for p in (1, 4):
        rows.append(Row("step", f"ctx {len(ctx)}, {p} pane{'s' if p > 1 else ''}, lean with whole-row sums",
                        ms(t[("whole", p)]), f"chunked sums cost {t[('chunked', p)] / t[('whole', p)]:.2f}x"))
    ratio = t[("whole", 4)] / t[("whole", 1)]
    rows.append(Row("step", f"4-pane / 1-pane step, ctx {len(ctx)}, lean with whole-row sums", f"{ratio:.2f}",
                    "", "<= 1.5", verdict(ratio <= 1.5)))
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
    """The output projection (V x E) and one gate/up weight at 1 and 4 rows, several layouts.

    Beside each time: the mean |error| against a float64 matmul, relative to F.linear's.
    """
    from tui.model.lean_llama import HEAD_K_CHUNK, K_CHUNK, PackedLinear, onednn_works

    head = model.get_output_embeddings().weight.detach()  # (V, E)
    mlp = model.model.layers[0].mlp
    gate_up = torch.cat([mlp.gate_proj.weight.detach(), mlp.up_proj.weight.detach()])  # (2I, E)
    rows = []
    for label, w, k_chunk in (("output projection", head, HEAD_K_CHUNK), ("one layer's gate/up", gate_up, K_CHUNK)):
        w_t = w.t().contiguous()  # (E, N), pre-transposed
        blocks = w.split(max(1, w.shape[0] // 8))  # 8 row blocks of the weight
        variants: dict[str, Callable[[torch.Tensor], torch.Tensor]] = {
            "F.linear": lambda x: F.linear(x, w),
            "mm, pre-transposed W": lambda x: torch.mm(x, w_t),
            "W @ x^T": lambda x: torch.mm(w, x.t()).t(),
            "8 vocabulary chunks": lambda x: torch.cat([F.linear(x, c) for c in blocks], dim=1),
        }
        if onednn_works(w.dtype):
            variants["oneDNN packed"] = PackedLinear([(w, None)], packed=True)
            variants[f"oneDNN, sums in {k_chunk}-column chunks"] = PackedLinear([(w, None)], packed=True,
                                                                                k_chunk=k_chunk)
        reps = 1 if w.shape[0] > 10_000 else 30
        for b in (1, 4):
            x = torch.randn(b, w.shape[1], dtype=w.dtype, generator=torch.Generator().manual_seed(b))
            samples: dict[str, list[float]] = {k: [] for k in variants}
            with torch.inference_mode():
                exact = F.linear(x.double(), w.double())
                error = {k: float((fn(x).double() - exact).abs().mean()) for k, fn in variants.items()}
                for _ in range(rounds * 5):
                    for name, fn in variants.items():
                        samples[name].append(timed(lambda: [fn(x) for _ in range(reps)]) / reps)
            base = statistics.median(samples["F.linear"])
            for name in variants:
                t = statistics.median(samples[name])
                rows.append(Row("matmul", f"{label} {tuple(w.shape)}, {b} row{'s' if b > 1 else ''}, {name}",
                                f"{t * 1e3:.2f} ms", f"{base / t:.2f}x F.linear's speed, "
                                f"{error[name] / error['F.linear']:.2f}x its error"))
    return rows


def thread_rows(runner: Any, ctx: list[int], steps: int) -> list[Row]:
    """The lean 4-pane step with 1 thread and with torch's default thread count, interleaved."""
    default = torch.get_num_threads()
    if default == 1:
        return [Row("threads", "lean 4-pane step, 1 thread (default)", ms(statistics.median(step_times(runner, ctx, 4, steps))))]
    kv = {n: decode_state(runner, ctx, 4) for n in (default, 1)}
    samples: dict[int, list[float]] = {default: [], 1: []}
    try:
        for i in range(steps):
            for n in samples:
                torch.set_num_threads(n)
                start = time.perf_counter()
                kv[n], _ = runner.step(kv[n], [ctx[(i + r) % len(ctx)] for r in range(4)])
                samples[n].append(time.perf_counter() - start)
    finally:
        torch.set_num_threads(default)
    one, many = statistics.median(samples[1]), statistics.median(samples[default])
    return [Row("threads", f"lean 4-pane step, {default} threads (default)", ms(many)),
            Row("threads", "lean 4-pane step, 1 thread", ms(one), f"{one / many:.2f}x the default")]
