"""Micro-benchmark of recipe math: milliseconds per pane and step at V = 49,152.

The engine runs the recipe for up to 8 panes per ~200 ms step, and all of it should
stay under 10% of the step, so well under 2 ms per pane. `time_chains()` returns the
best-of-repeats time of ``sampler.distribution`` plus one `draw` for a few chains on
model-like logits (a peaked and a flat vector). `make bench` calls it; tests never
assert timings. ``python -m tui.bench.recipe_math`` prints a table.
"""

from __future__ import annotations

import time

import numpy as np

from tui.decoding.draw import draw
from tui.decoding.recipe import Recipe

CHAINS = (
    "",
    "temperature=0.8",
    "repetition_penalty=1.2 temperature=0.8 top_k=50 top_p=0.9",
    "temperature=0.8 top_p=0.95",
    "min_p=0.05 temperature=1.5",
    "typical_p=0.95",
    "eta=0.0003",
    "mirostat(tau=5,learning_rate=0.1)",
    "presence_penalty=0.5 frequency_penalty=0.3 no_repeat_ngram=3 top_k=40",
)


def sample_logits(vocab_size: int, peaked: bool, seed: int = 0) -> np.ndarray:
    """float32 logits shaped like a small LM's: a Gaussian bulk, a few strong candidates."""
    rng = np.random.default_rng(seed)
    logits = rng.standard_normal(vocab_size).astype(np.float32) * (2.5 if peaked else 0.4)
    if peaked:
        logits[rng.integers(0, vocab_size, 20)] += 8.0
    return logits


def time_chains(
    vocab_size: int = 49152, repeats: int = 30, history_length: int = 512, chains: tuple[str, ...] = CHAINS
) -> dict[str, float]:
    """Milliseconds per pane (distribution + draw), worst of the peaked and flat inputs."""
    history = np.random.default_rng(1).integers(0, vocab_size, history_length)
    inputs = [sample_logits(vocab_size, peaked) for peaked in (True, False)]
    result: dict[str, float] = {}
    for text in chains:
        sampler = Recipe.parse(text).sampler()
        worst = 0.0
        for logits in inputs:
            best = float("inf")
            for _ in range(repeats):
                start = time.perf_counter()
                probs = sampler.distribution(logits, history)
                draw(probs, 0.73)
                best = min(best, time.perf_counter() - start)
            worst = max(worst, best)
        result[text or "(empty: the model's distribution)"] = worst * 1e3
    return result


def main() -> None:
    from tui.decoding.allocator import retain_freed_memory

    before = time_chains()
    kept = retain_freed_memory()
    after = time_chains() if kept else before
    print(f"{'recipe':66} {'ms/pane':>8} {'retained':>9}")
    for text in before:
        print(f"{text:66} {before[text]:8.3f} {after[text]:9.3f}")
    print("retained = after tui.decoding.allocator.retain_freed_memory()" if kept else "(glibc tuning unavailable)")


if __name__ == "__main__":
    main()
