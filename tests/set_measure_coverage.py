"""How often the sweep's 95% intervals for set measures hold the true value: a simulation.

Not a test (it takes minutes); run it as
``python tests/set_measure_coverage.py [SETS [EXPONENT]]``. The synthetic "text" is a
first-order Markov chain over 200 token ids whose rows are Zipf weights (default
exponent 1.1; larger is more repetitive) in a random order per row, an invented
source whose n-gram statistics are peaked like text's. One sweep cell is `SAMPLES` samples of
`LENGTH` tokens for one prompt. The true value of a set measure is its mean over
`TRUTH_SETS` fresh cells; each of `SETS` further cells gets the intervals that
`tui.sweeps.metrics.measure_samples` reports (1000 resamples, recentred for the set
measures), and the script prints the share of cells whose interval holds the truth,
with its binomial standard error.
"""

from __future__ import annotations

import math
import sys

import numpy as np

from tui.sweeps.metrics import DistinctN, SampleRecord, SelfBleu, measure_samples

VOCAB, LENGTH, SAMPLES = 200, 32, 8
TRUTH_SETS = 2000
MEASURES = ("distinct_1", "distinct_2", "self_bleu")


def chain(seed: int, exponent: float) -> np.ndarray:
    """(V, V) transition matrix: row i is Zipf weights over a random order of the next tokens."""
    rng = np.random.default_rng(seed)
    weights = 1.0 / np.arange(1, VOCAB + 1) ** exponent
    rows = np.stack([weights[rng.permutation(VOCAB)] for _ in range(VOCAB)])
    return rows / rows.sum(axis=1, keepdims=True)


def draw_cell(transitions: np.ndarray, rng: np.random.Generator) -> list[list[int]]:
    cumulative = transitions.cumsum(axis=1)
    cell = []
    for _ in range(SAMPLES):
        token = int(rng.integers(VOCAB))
        seq = [token]
        for u in rng.random(LENGTH - 1):
            token = int(min(np.searchsorted(cumulative[token], u, side="right"), VOCAB - 1))
            seq.append(token)
        cell.append(seq)
    return cell


def text_of(seq: list[int]) -> str:
    return " ".join(f"w{t}" for t in seq)


def point_values(cell: list[list[int]]) -> dict[str, float]:
    everyone = np.arange(len(cell))
    return {"distinct_1": DistinctN(cell, 1)(everyone), "distinct_2": DistinctN(cell, 2)(everyone),
            "self_bleu": SelfBleu([text_of(s) for s in cell])(everyone)}


def records(cell: list[list[int]]) -> list[SampleRecord]:
    return [SampleRecord(recipe="sim", prompt_index=0, sample_index=i, token_ids=tuple(seq),
                         text=text_of(seq), logprobs=(0.0,) * len(seq), kept=(1,) * len(seq),
                         final_entropy=(0.0,) * len(seq), ending="length")
            for i, seq in enumerate(cell)]


def main(sets: int, exponent: float) -> None:
    transitions = chain(0, exponent)
    rng = np.random.default_rng(1)
    truth_rows = [point_values(draw_cell(transitions, rng)) for _ in range(TRUTH_SETS)]
    truth = {m: float(np.mean([row[m] for row in truth_rows])) for m in MEASURES}
    hits = dict.fromkeys(MEASURES, 0)
    for k in range(sets):
        measured = measure_samples(records(draw_cell(transitions, rng)), seed=k)
        for m in MEASURES:
            interval = getattr(measured, m)
            hits[m] += interval.low <= truth[m] <= interval.high
    print(f"Zipf exponent {exponent}: {sets} cells of {SAMPLES} samples x {LENGTH} tokens; "
          f"truth from {TRUTH_SETS} cells")
    for m in MEASURES:
        share = hits[m] / sets
        print(f"{m:11} truth {truth[m]:8.4f}  coverage {share:.3f} +- {math.sqrt(share * (1 - share) / sets):.3f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 400, float(sys.argv[2]) if len(sys.argv) > 2 else 1.1)
