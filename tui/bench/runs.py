"""Benchmark parts that time whole runs: generate() per recipe vs the lockstep engine,
the recipe math's share of a step, and cold and warm start of `logitfork run`.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
import warnings
from typing import Any, Sequence

import torch

from tui.bench.step import Row, ms, verdict

RECIPES = ("greedy", "temperature=0.8 top_p=0.9", "top_k=40", "min_p=0.1")


class TimedRunner:
    """A runner wrapper that adds up the seconds spent in `step` (the forward pass)."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.vocab_size = inner.vocab_size
        self.seconds = 0.0

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)

    def step(self, kv: Any, tokens: Sequence[int]) -> Any:
        start = time.perf_counter()
        out = self.inner.step(kv, tokens)
        self.seconds += time.perf_counter() - start
        return out


def generate_seconds(model: Any, prompt: list[int], tokens: int, eos_id: int, seed: int) -> float:
    """transformers' generate(), once per recipe, each making exactly `tokens` tokens."""
    from tui.decoding import Recipe
    from tui.decoding.hf import to_generation_config

    x = torch.tensor([prompt])
    total = 0.0
    for text in RECIPES:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            cfg = to_generation_config(Recipe.parse(text))
        cfg.max_new_tokens = cfg.min_new_tokens = tokens
        cfg.pad_token_id = cfg.eos_token_id = eos_id
        torch.manual_seed(seed)
        start = time.perf_counter()
        with torch.inference_mode(), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            out = model.generate(x, attention_mask=torch.ones_like(x), generation_config=cfg)
        total += time.perf_counter() - start
        assert out.shape[1] == len(prompt) + tokens, out.shape
    return total


def engine_seconds(runner: Any, lm: Any, prompt: list[int], tokens: int,
                   seed: int) -> tuple[float, float, float]:
    """The lockstep engine, one pane per recipe: seconds in all, in the steps, in their forward."""
    from tui.session.engine import Engine
    from tui.session.scenario import PaneSpec

    timed_runner = TimedRunner(runner)
    start = time.perf_counter()
    engine = Engine(timed_runner, lm.decode, prompt, [PaneSpec(f"p{i}", r) for i, r in enumerate(RECIPES)],
                    seed=seed, max_new_tokens=tokens, eos_ids=(), max_context=lm.max_context)
    stepping = time.perf_counter()
    for _ in range(tokens):
        engine.step()
    end = time.perf_counter()
    assert all(len(p.records) == tokens for p in engine.view().panes)
    return end - start, end - stepping, timed_runner.seconds


def run_rows(lm: Any, runners: dict[str, Any], prompt: list[int], tokens: int, rounds: int) -> list[Row]:
    """generate() per recipe against the engine's 4-pane lockstep run, same token count."""
    eos = lm.eos_ids[0]
    generate_seconds(lm.model, prompt, 2, eos, seed=0)  # warm-up: first-call costs left out
    for runner in runners.values():
        engine_seconds(runner, lm, prompt, 2, seed=0)
    gen: list[float] = []
    eng: dict[str, list[tuple[float, float, float]]] = {name: [] for name in runners}
    for r in range(rounds):
        gen.append(generate_seconds(lm.model, prompt, tokens, eos, seed=r))
        for name, runner in runners.items():
            eng[name].append(engine_seconds(runner, lm, prompt, tokens, seed=r))
    g = statistics.median(gen)
    made = tokens * len(RECIPES)
    rows = [Row("run", f"generate() x {len(RECIPES)} recipes, {tokens} tokens each",
                f"{g:.2f} s", f"{made / g:.1f} tokens/s")]
    for name in runners:
        total = statistics.median(t for t, _, _ in eng[name])
        outside = statistics.median(s - f for _, s, f in eng[name])  # engine.step minus forward
        target = "" if name == "generic" else ">= 3"
        rows.append(Row("run", f"engine, {len(RECIPES)} panes lockstep, {name}", f"{total:.2f} s",
                        f"{made / total:.1f} tokens/s"))
        rows.append(Row("run", f"speed-up over generate(), {name}", f"{g / total:.2f}x",
                        "plain batching (before)" if not target else "", target,
                        verdict(g / total >= 3) if target else ""))
        rows.append(Row("run", f"engine bookkeeping per step, {name}", ms(outside / tokens),
                        f"engine.step outside the forward pass, {len(RECIPES)} panes"))
    return rows


def recipe_share_rows(runner: Any, prompt: list[int], step_seconds: float, rounds: int) -> list[Row]:
    """Recipe.distribution for 4 panes on real logits, against the 4-pane step time."""
    from tui.decoding import Recipe

    kv, logits = runner.prefill([prompt])
    kv, logits = runner.step(kv.select([0] * 4), [prompt[-1]] * 4)  # real (4, V) logits
    rows_np = logits.numpy()
    recipes = [Recipe.parse(r) for r in RECIPES]
    samples = []
    for _ in range(rounds * 5):
        start = time.perf_counter()
        for recipe, row in zip(recipes, rows_np):
            recipe.sampler().distribution(row, prompt)
        samples.append(time.perf_counter() - start)
    t = statistics.median(samples)
    share = t / step_seconds
    return [Row("recipes", f"recipe math, {len(recipes)} panes (Recipe.distribution)", ms(t),
                f"{share * 100:.1f}% of the lean 4-pane step ({ms(step_seconds)})", "< 10%",
                verdict(share < 0.10))]


def start_rows(cold: bool, model_name: str | None) -> list[Row]:
    """Wall time of `logitfork run harbour-town --steps 1` in a fresh process."""
    cmd = [sys.executable, "-m", "tui", "run", "harbour-town", "--steps", "1"]
    if model_name:
        cmd += ["--model", model_name]
    rows = []
    if cold:
        with tempfile.TemporaryDirectory(prefix="logitfork-cold-") as empty:
            t, err = _run(cmd, {"LOGITFORK_CACHE_DIR": empty})
            rows.append(Row("start", "cold start (first GGUF conversion) to first token",
                            err or f"{t:.1f} s", "empty LOGITFORK_CACHE_DIR"))
    times: dict[str, list[float]] = {"direct": [], "transformers": []}
    for _ in range(3):  # interleaved, so both ways see the same machine
        for way in times:
            t, err = _run(cmd, {"LOGITFORK_LOADER": "auto" if way == "direct" else "transformers"})
            if err:
                return rows + [Row("start", f"warm start to first token ({way})", err, "", "< 6 s", "MISS")]
            times[way].append(t)
    direct, before = (statistics.median(times[way]) for way in ("direct", "transformers"))
    rows.append(Row("start", "warm start to first token", f"{direct:.1f} s",
                    "`logitfork run harbour-town --steps 1`, median of 3; cache read directly",
                    "< 6 s", verdict(direct < 6)))
    rows.append(Row("start", "warm start through transformers' classes", f"{before:.1f} s",
                    f"LOGITFORK_LOADER=transformers (before); direct is {before / direct:.2f}x faster"))
    return rows


def _run(cmd: list[str], env: dict[str, str]) -> tuple[float, str]:
    """Seconds a command takes, and its last stderr line if it failed."""
    start = time.perf_counter()
    done = subprocess.run(cmd, env={**os.environ, **env}, capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if done.returncode != 0:
        last = (done.stderr.strip().splitlines() or ["no output"])[-1]
        return seconds, f"failed ({done.returncode}): {last[:60]}"
    return seconds, ""
