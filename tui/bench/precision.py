"""Benchmark parts about numbers rather than time: parity of the forward paths with
transformers' own forward on the real model, and bfloat16's deviation from float32.
"""

from __future__ import annotations

import copy
import statistics
from typing import Any, Sequence

import torch

from tui.bench.step import Row, interleaved_steps, ms, verdict

TOL = 1e-4  # the parity target: logits within 1e-4 of transformers' forward, in float32


def greedy_rows(runner: Any, contexts: Sequence[Sequence[int]], steps: int) -> torch.Tensor:
    """Contexts (B, T) continued greedily for `steps` tokens: the token ids (B, T + steps)."""
    kv, logits = runner.prefill([list(c) for c in contexts])
    out = torch.tensor([list(c) for c in contexts])
    for _ in range(steps):
        nxt = logits.argmax(-1)  # (B,)
        out = torch.cat([out, nxt[:, None]], dim=1)
        kv, logits = runner.step(kv, nxt.tolist())
    return out


def deviations(runner: Any, ids: torch.Tensor, start: int, ref: torch.Tensor) -> torch.Tensor:
    """max |logit - reference| per row and decode step, feeding `ids` after a prefill of `start`."""
    kv, logits = runner.prefill(ids[:, :start].tolist())
    worst = [(logits - ref[:, start - 1]).abs().max(-1).values]
    for t in range(start, ids.shape[1] - 1):
        kv, logits = runner.step(kv, ids[:, t].tolist())
        worst.append((logits - ref[:, t]).abs().max(-1).values)
    return torch.cat(worst)  # (rows * steps,)


def parity_rows(model: Any, runners: dict[str, Any], prompt: Sequence[int], steps: int) -> list[Row]:
    """Each path's logits against `model(input_ids).logits`, at 1 row and at 4 rows."""
    rows = []
    for batch in (1, 4):
        contexts = [list(prompt[r:]) + list(prompt[:r]) for r in range(batch)]  # 4 different starts
        ids = greedy_rows(runners["generic"], contexts, steps)
        with torch.inference_mode():
            ref = model(input_ids=ids).logits.float()  # (B, T, V), no cache
        for name, runner in runners.items():
            dev = deviations(runner, ids, len(prompt), ref)
            worst, p99 = float(dev.max()), float(dev.quantile(0.99))
            target = "" if name == "generic" else "<= 1e-4"
            rows.append(Row("parity", f"{name} vs transformers forward, {batch} row{'s' if batch > 1 else ''}, "
                            f"{steps} steps", f"{worst:.1e}", f"max |delta logit| (p99 {p99:.1e})"
                            + ("; transformers' own cached decode, for scale" if not target else ""),
                            target, verdict(worst <= TOL) if target else ""))
    return rows


def bf16_rows(model: Any, lean32: Any, prompt: list[int], steps: int, step_count: int) -> list[Row]:
    """bfloat16's deviation from float32 over greedy steps, and its 4-pane step time."""
    from tui.model.lean_llama import LeanRunner

    model16 = copy.deepcopy(model).to(torch.bfloat16)
    lean16 = LeanRunner(model16)
    ids32 = greedy_rows(lean32, [prompt], steps)
    ids16 = greedy_rows(lean16, [prompt], steps)
    n = len(prompt)
    # Teacher-forced: bfloat16 reads the float32 tokens, so every step sees the same context.
    _, logits32 = _logits_along(lean32, ids32, n)
    _, logits16 = _logits_along(lean16, ids32, n)
    agree = int((logits32.argmax(-1) == logits16.argmax(-1)).sum())
    delta = (logits32 - logits16).abs()  # (steps, V)
    split = (ids32[0, n:] != ids16[0, n:]).nonzero()
    diverge = "never" if len(split) == 0 else f"step {int(split[0])}"
    samples = interleaved_steps({"float32": (lean32, 4), "bfloat16": (lean16, 4)}, prompt, step_count)
    t32, t16 = statistics.median(samples["float32"]), statistics.median(samples["bfloat16"])
    return [
        Row("bfloat16", f"top-1 agreement with float32, {steps} greedy steps", f"{agree}/{steps}",
            "bfloat16 fed the float32 tokens"),
        Row("bfloat16", "mean |delta logit| vs float32", f"{float(delta.mean()):.3f}",
            f"max {float(delta.max()):.2f}"),
        Row("bfloat16", "free-running greedy text first differs", diverge, f"of {steps} steps"),
        Row("bfloat16", "lean 4-pane step, bfloat16", ms(t16),
            f"{t32 / t16:.2f}x faster than float32 ({ms(t32)})"
            + ("" if lean16.packed else "; oneDNN bfloat16 unavailable here: F.linear")),
    ]


def _logits_along(runner: Any, ids: torch.Tensor, start: int) -> tuple[Any, torch.Tensor]:
    """Logits (steps, V) before each token after `start`, feeding row 0 of `ids`."""
    kv, logits = runner.prefill([ids[0, :start].tolist()])
    seen = [logits[0]]
    for t in range(start, ids.shape[1] - 1):
        kv, logits = runner.step(kv, [int(ids[0, t])])
        seen.append(logits[0])
    return kv, torch.stack(seen)
