"""Measures of a recipe's samples, with percentile-bootstrap intervals.

A sweep draws several samples per prompt and recipe; this module turns them into
numbers a user can compare: diversity (distinct-n, Li et al. 2016; self-BLEU, Zhu et
al. 2018), repetition inside one sample, the model's own likelihood of what was
written (mean log-probability, perplexity), the mean kept-set size and final entropy,
and how samples ended. Every measure carries a percentile-bootstrap interval (Efron &
Tibshirani 1993, sec. 13.3), computed by `tui.sweeps.bootstrap`. Pure numpy; sacrebleu is
imported only for self-BLEU.

Bootstrap of set measures. Distinct-n and self-BLEU are properties of a *set* of
samples. A resample drawn with replacement holds copies of one sample, and a plain
recomputation would treat each copy as a fresh, perfectly matching sample: self-BLEU
jumps toward 100 and distinct-n falls by about a third, so the interval misses the
estimate altogether. Here a set measure is told which positions are copies of one
sample (``sources``) and never compares copies with each other: a copy is scored
against the other samples only, and an n-gram that only that sample holds counts once
per copy, as a fresh draw's own n-grams would. A resample still holds fewer distinct
samples than the set (about 63%), which lowers self-BLEU (fewer references to match);
`measure_samples` therefore re-centres the set measures' replicates on the estimate
(``recentre=True``: the bootstrap bias estimate, Efron & Tibshirani 1993, sec. 10.2, is
taken off). Coverage of these 95% intervals, measured by `tests/set_measure_coverage.py`
on synthetic Markov-Zipf text: see the README ("What a sweep measures").

No variation, no interval: when every prompt's samples are the same text (greedy), every
resample is the same set, and each interval is the point. (The copy rule above would
otherwise read copies of one text as variation: greedy x3 gave distinct-2
0.333 [0.260, 0.927].)
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from typing import Any, Callable, Hashable, Literal, Sequence, TypeVar

import numpy as np

from tui.session.record import STOP_REASONS
from tui.sweeps.bootstrap import SetStatistic, bootstrap_ci_sets

T = TypeVar("T")
BLEU_ORDER = 4  # sacrebleu's default maximum n-gram order, passed explicitly


def _check_order(n: object) -> int:
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise ValueError(f"n must be an integer >= 1, got {n!r}")
    return n


def _rows_and_members(items: Sequence[T], sources: Sequence[Hashable] | None,
                      same: Callable[[T, T], bool]) -> tuple[list[T], np.ndarray]:
    """One row per distinct source (its first item) and each position's row index."""
    if sources is None:
        return list(items), np.arange(len(items))
    if len(sources) != len(items):
        raise ValueError(f"sources has {len(sources)} entries for {len(items)} samples")
    row_of: dict[Hashable, int] = {}
    rows: list[T] = []
    members = np.empty(len(items), dtype=np.int64)
    for pos, (item, src) in enumerate(zip(items, sources)):
        key = src.item() if isinstance(src, np.generic) else src
        if key not in row_of:
            row_of[key] = len(rows)
            rows.append(item)
        elif not same(rows[row_of[key]], item):
            raise ValueError(f"sources: position {pos} shares source {key!r} with a different sample")
        members[pos] = row_of[key]
    return rows, members


# --- distinct-n ------------------------------------------------------------------

class DistinctN:
    """Distinct n-grams of a fixed set of samples, for any multiset of them."""

    def __init__(self, samples: Sequence[Sequence[int | str]], n: int,
                 denominator: Literal["ngrams", "tokens"] = "ngrams") -> None:
        self.n = _check_order(n)
        if denominator not in ("ngrams", "tokens"):
            raise ValueError(f"denominator must be 'ngrams' or 'tokens', got {denominator!r}")
        ids: dict[tuple, int] = {}
        rows, grams = [], []
        for r, seq in enumerate(samples):
            for gram in {tuple(seq[i:i + n]) for i in range(len(seq) - n + 1)}:
                rows.append(r)
                grams.append(ids.setdefault(gram, len(ids)))
        self._row = np.asarray(rows, dtype=np.int64)
        self._gram = np.asarray(grams, dtype=np.int64)
        self._n_grams = len(ids)
        lengths = np.asarray([len(s) for s in samples], dtype=np.int64)
        self._size = np.maximum(lengths - n + 1, 0) if denominator == "ngrams" else lengths

    def __call__(self, members: np.ndarray) -> float:
        """Distinct share of the multiset ``members`` (row indices; repeats are copies)."""
        copies = np.bincount(members, minlength=len(self._size))
        total = int(copies @ self._size)
        if total == 0:
            return math.nan
        held = copies[self._row]
        present = held > 0
        grams, weight = self._gram[present], held[present]
        holders = np.bincount(grams, minlength=self._n_grams)
        copies_of_holder = np.bincount(grams, weights=weight, minlength=self._n_grams)
        distinct = copies_of_holder[holders == 1].sum() + np.count_nonzero(holders >= 2)
        return float(distinct / total)


def distinct_n(samples: Sequence[Sequence[int | str]], n: int, *,
               denominator: Literal["ngrams", "tokens"] = "ngrams",
               sources: Sequence[Hashable] | None = None) -> float:
    """Distinct-n of a set of samples (Li et al. 2016): distinct n-grams / all n-grams.

    Corpus level: n-grams are pooled over all samples of the set (an n-gram that two
    samples share counts once), not averaged per sample. Samples are token sequences
    (model token ids or strings). ``denominator="ngrams"`` (default) divides by the
    number of n-grams, sum of max(len - n + 1, 0); ``"tokens"`` divides by the number
    of tokens, the scaling Li et al. describe ("scaled by total number of generated
    tokens", recalled from memory); the two agree for n = 1. NaN when there is no
    n-gram. ``sources``: positions with equal labels are copies of one sample (from a
    bootstrap resample); see the module docstring.
    """
    rows, members = _rows_and_members(samples, sources, lambda a, b: tuple(a) == tuple(b))
    return DistinctN(rows, n, denominator)(members)


def repeated_ngram_share(tokens: Sequence[int], n: int = 4) -> float:
    """Share of one sample's n-grams that repeat an n-gram seen earlier in it.

    With the L - n + 1 overlapping n-grams g_0..g_{L-n}, the share is
    #{i : g_i == g_j for some j < i} / (L - n + 1); equal to 1 - distinct-n of the
    sample alone. 0.0 for a sample shorter than n. Example: "a a a a a" with n = 2
    has four bigrams, three of them repeats: 0.75.
    """
    _check_order(n)
    if len(tokens) < n:
        return 0.0
    seen: set[tuple] = set()
    repeats = 0
    for i in range(len(tokens) - n + 1):
        gram = tuple(tokens[i:i + n])
        repeats += gram in seen
        seen.add(gram)
    return repeats / (len(tokens) - n + 1)


# --- self-BLEU -------------------------------------------------------------------

class SelfBleu:
    """Self-BLEU of a fixed set of texts, for any multiset of them.

    Tokenised once with sacrebleu's "13a" tokenizer; each multiset is then scored from
    n-gram counts in numpy, and `sacrebleu.BLEU.compute_bleu` gives the score from the
    statistics, with the settings of ``sacrebleu.sentence_bleu``: 4-gram, "exp"
    smoothing, effective order, case kept, 0..100. Clipping takes the maximum count
    over the references and the brevity penalty the closest reference length (ties:
    the shorter), as sacrebleu does.
    """

    def __init__(self, texts: Sequence[str]) -> None:
        from sacrebleu.metrics import BLEU

        self._compute = BLEU.compute_bleu
        tokenizer = BLEU(tokenize="13a").tokenizer
        tokens = [tokenizer(t.rstrip()).split() for t in texts]
        self._len = np.asarray([len(t) for t in tokens], dtype=np.int64)
        self._orders = []  # per order: rows, counts, gram ids, sorted by (gram, -count, row)
        for n in range(1, BLEU_ORDER + 1):
            ids: dict[tuple, int] = {}
            rows, counts, grams = [], [], []
            for r, toks in enumerate(tokens):
                for gram, c in Counter(tuple(toks[i:i + n]) for i in range(len(toks) - n + 1)).items():
                    rows.append(r)
                    counts.append(c)
                    grams.append(ids.setdefault(gram, len(ids)))
            row, count, gram = (np.asarray(a, dtype=np.int64) for a in (rows, counts, grams))
            order = np.lexsort((row, -count, gram))
            self._orders.append((row[order], count[order], gram[order]))

    def __call__(self, members: np.ndarray) -> float:
        """Mean BLEU of each member against the members from other rows; NaN if none."""
        copies = np.bincount(members, minlength=len(self._len))
        present = np.flatnonzero(copies)
        if len(present) < 2:
            return math.nan
        is_present = copies > 0
        correct = np.zeros((BLEU_ORDER, len(self._len)), dtype=np.int64)
        for k, (row, count, gram) in enumerate(self._orders):
            keep = is_present[row]
            row, count, gram = row[keep], count[keep], gram[keep]
            if len(row) == 0:
                continue
            first = np.r_[True, gram[1:] != gram[:-1]]
            start = np.flatnonzero(first)
            group = np.cumsum(first) - 1
            top_row, top = row[start], count[start]
            has_second = np.r_[start[1:], len(row)] - start >= 2
            second = np.where(has_second, count[np.minimum(start + 1, len(row) - 1)], 0)
            ref_max = np.where(top_row[group] == row, second[group], top[group])
            correct[k] = np.bincount(row, weights=np.minimum(count, ref_max),
                                     minlength=len(self._len)).astype(np.int64)
        lens = self._len[present]
        gap = np.abs(lens[:, None] - lens[None, :]).astype(np.float64)
        np.fill_diagonal(gap, np.inf)
        closest = lens[np.argmin(gap * (lens.max() + 1) + lens[None, :], axis=1)]
        total = np.maximum(lens[None, :] - np.arange(BLEU_ORDER)[:, None], 0)
        scores = np.array([
            self._compute([int(c) for c in correct[:, r]], [int(t) for t in total[:, j]],
                          int(lens[j]), int(closest[j]), smooth_method="exp",
                          effective_order=True, max_ngram_order=BLEU_ORDER).score
            for j, r in enumerate(present)])
        return float(scores @ copies[present] / copies[present].sum())


def self_bleu(texts: Sequence[str], *, sources: Sequence[Hashable] | None = None) -> float:
    """Self-BLEU (Zhu et al. 2018, Texygen): mean over samples of the BLEU of each
    sample against all the others as references, on sacrebleu's 0..100 scale.

    BLEU is sacrebleu's sentence BLEU with its defaults written out (see `SelfBleu`).
    NaN for fewer than two samples (no references). ``sources``: positions with equal
    labels are copies of one sample and are not references of each other.
    """
    rows, members = _rows_and_members(texts, sources, lambda a, b: a == b)
    return SelfBleu(rows)(members)


# --- likelihood ------------------------------------------------------------------

# --- one recipe's samples ----------------------------------------------------------

@dataclass(frozen=True, slots=True)
class SampleRecord:
    """One finished sample of a sweep: what was written and how the model saw it.

    ``logprobs`` are the raw model's natural-log probabilities of each chosen token;
    ``kept`` and ``final_entropy`` (nats) describe the recipe's final distribution at
    each step; ``ending`` is one of `tui.session.record.STOP_REASONS`.
    """

    recipe: str
    prompt_index: int
    sample_index: int
    token_ids: tuple[int, ...]
    text: str
    logprobs: tuple[float, ...]
    kept: tuple[int, ...]
    final_entropy: tuple[float, ...]
    ending: str

    def __post_init__(self) -> None:
        for name in ("prompt_index", "sample_index"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                raise ValueError(f"sample record: {name} must be an integer >= 0, got {value!r}")
        steps = len(self.token_ids)
        for name in ("logprobs", "kept", "final_entropy"):
            if len(getattr(self, name)) != steps:
                raise ValueError(f"sample record: {name} has {len(getattr(self, name))} "
                                 f"entries for {steps} tokens")
        if self.ending not in STOP_REASONS:
            raise ValueError(f"sample record: ending must be one of {', '.join(STOP_REASONS)}, "
                             f"got {self.ending!r}")

    def to_json(self) -> dict[str, Any]:
        return {"recipe": self.recipe, "prompt_index": self.prompt_index,
                "sample_index": self.sample_index, "token_ids": list(self.token_ids),
                "text": self.text, "logprobs": list(self.logprobs), "kept": list(self.kept),
                "final_entropy": list(self.final_entropy), "ending": self.ending}

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> SampleRecord:
        """Inverse of `to_json`; a missing or unknown field raises ValueError naming it."""
        if not isinstance(data, dict):
            raise ValueError(f"sample record: must be a JSON object, got {type(data).__name__}")
        fields = cls.__dataclass_fields__
        missing = [f for f in fields if f not in data]
        unknown = sorted(set(data) - set(fields))
        if missing or unknown:
            what = f"missing field {missing[0]!r}" if missing else f"unknown field {unknown[0]!r}"
            raise ValueError(f"sample record: {what}")
        return cls(recipe=data["recipe"], prompt_index=data["prompt_index"],
                   sample_index=data["sample_index"],
                   token_ids=tuple(int(t) for t in data["token_ids"]), text=data["text"],
                   logprobs=tuple(float(x) for x in data["logprobs"]),
                   kept=tuple(int(k) for k in data["kept"]),
                   final_entropy=tuple(float(x) for x in data["final_entropy"]),
                   ending=data["ending"])


@dataclass(frozen=True, slots=True)
class Interval:
    """A measure's estimate with its percentile-bootstrap interval."""

    estimate: float
    low: float
    high: float

    def to_json(self) -> dict[str, float]:
        return {"estimate": self.estimate, "low": self.low, "high": self.high}


@dataclass(frozen=True)
class RecipeMeasures:
    """Every measure of one recipe's samples, each with its interval.

    Set measures (distinct_1, distinct_2 over model token ids; self_bleu over texts,
    0..100) are taken per prompt and averaged over prompts: diversity means samples
    that differ for the same prompt. Token measures (mean_logprob, perplexity,
    mean_kept, mean_final_entropy) pool all tokens of all samples. repetition_4 is
    the mean over samples of `repeated_ngram_share` with n = 4.
    """

    recipe: str
    n_samples: int
    distinct_1: Interval
    distinct_2: Interval
    self_bleu: Interval
    mean_logprob: Interval
    perplexity: Interval
    repetition_4: Interval
    mean_kept: Interval
    mean_final_entropy: Interval
    endings: dict[str, int]

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"recipe": self.recipe, "n_samples": self.n_samples}
        for name in MEASURE_NAMES:
            out[name] = getattr(self, name).to_json()
        out["endings"] = dict(self.endings)
        return out


MEASURE_NAMES = ("distinct_1", "distinct_2", "self_bleu", "mean_logprob", "perplexity",
                 "repetition_4", "mean_kept", "mean_final_entropy")


def measure_samples(samples: Sequence[SampleRecord], *, n_resamples: int = 1000,
                    confidence: float = 0.95, seed: int = 0) -> RecipeMeasures:
    """Measure one recipe's samples; intervals resample samples within each prompt.

    All measures use the same resamples (same seed), drawn with replacement among the
    samples of each prompt, so every resample keeps the number of samples per prompt;
    the set measures' intervals are re-centred (module docstring).
    """
    items = list(samples)
    if not items:
        raise ValueError("measure_samples: no samples")
    recipes = sorted({s.recipe for s in items})
    if len(recipes) > 1:
        raise ValueError(f"measure_samples: samples of several recipes: {', '.join(recipes)}")
    prompts = [s.prompt_index for s in items]
    where = [np.flatnonzero(np.asarray(prompts) == p) for p in dict.fromkeys(prompts)]
    local = np.empty(len(items), dtype=np.int64)
    for w in where:
        local[w] = np.arange(len(w))

    def per_prompt(make: Callable[[list[SampleRecord]], Callable[[np.ndarray], float]]
                   ) -> SetStatistic:
        tables = [make([items[i] for i in w]) for w in where]
        return lambda _s, src: float(np.mean([t(local[src[w]]) for t, w in zip(tables, where)]))

    def pooled(values: Callable[[SampleRecord], Sequence[float]],
               then: Callable[[float], float] = lambda x: x) -> SetStatistic:
        sums = np.array([float(np.sum(values(s))) for s in items])
        counts = np.array([len(values(s)) for s in items], dtype=np.float64)
        return lambda _s, src: (float(then(sums[src].sum() / counts[src].sum()))
                                if counts[src].sum() else math.nan)

    repeats = np.array([repeated_ngram_share(s.token_ids, 4) for s in items])
    fns: dict[str, SetStatistic] = {
        "distinct_1": per_prompt(lambda g: DistinctN([s.token_ids for s in g], 1)),
        "distinct_2": per_prompt(lambda g: DistinctN([s.token_ids for s in g], 2)),
        "self_bleu": per_prompt(lambda g: SelfBleu([s.text for s in g])),
        "mean_logprob": pooled(lambda s: s.logprobs),
        "perplexity": pooled(lambda s: s.logprobs, then=lambda m: np.exp(-m)),
        "repetition_4": lambda _s, src: float(repeats[src].mean()),
        "mean_kept": pooled(lambda s: s.kept),
        "mean_final_entropy": pooled(lambda s: s.final_entropy),
    }
    set_measures = ("distinct_1", "distinct_2", "self_bleu")
    if all(len({items[i].token_ids for i in w}) == 1 for w in where):  # nothing varies
        everyone = np.arange(len(items))
        intervals = {name: Interval(*(fn(items, everyone),) * 3) for name, fn in fns.items()}
    else:
        intervals = {name: Interval(*bootstrap_ci_sets(items, fn, n_resamples, confidence, seed,
                                                       strata=prompts, recentre=name in set_measures))
                     for name, fn in fns.items()}
    counts = Counter(s.ending for s in items)
    return RecipeMeasures(recipe=recipes[0], n_samples=len(items),
                          endings={reason: counts.get(reason, 0) for reason in STOP_REASONS},
                          **intervals)
