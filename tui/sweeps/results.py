"""A sweep's result tables: measures per recipe and per (recipe, prompt), and the front.

`compute_results` measures the samples of every recipe over all prompts, and of every
(recipe, prompt) pair when there are several prompts (`tui.sweeps.metrics.measure_samples`,
95% percentile-bootstrap intervals). The trade-off front (`tui.sweeps.pareto`) is taken in
each scope on two axes, both larger-is-better:

- diversity: distinct-2 (Li et al. 2016), the share of distinct token bigrams among
  the samples of a prompt, averaged over prompts;
- likelihood: the mean natural-log probability per token under the raw model.

A recipe that keeps one token at every step (greedy) runs once per prompt
(`tui.sweeps.spec.samples_for`); its one sample is counted as many times as the sweep
asked for, so that its set measures mean what they mean for every other recipe, and
its row says "fixed".

CSV and Markdown writers live here too (plain text, no rich); the terminal table and
the charts are in `tui.sweeps.report`.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass, replace
from typing import Sequence

from tui.decoding import Recipe
from tui.numbers import fixed, plain_zero
from tui.session.record import STOP_REASONS
from tui.sweeps.metrics import MEASURE_NAMES, RecipeMeasures, SampleRecord, measure_samples
from tui.sweeps.pareto import pareto_front

DIVERSITY = "distinct_2"
LIKELIHOOD = "mean_logprob"
AXIS_LABELS = {DIVERSITY: "distinct-2 (diversity)", LIKELIHOOD: "mean log-prob (likelihood)"}


def label_of(recipe: str) -> str:
    """How a recipe is named in tables and charts (the empty recipe changes nothing)."""
    return recipe or "(model as is)"


@dataclass(frozen=True)
class ResultRow:
    """One recipe's measures in one scope: all prompts (`prompt` None) or one prompt."""

    recipe: str
    prompt: int | None  # prompt index from 0, or None for all prompts
    measures: RecipeMeasures
    on_front: bool
    fixed: bool = False  # ran once per prompt: the recipe keeps one token at every step

    @property
    def point(self) -> tuple[float, float]:
        """(diversity, likelihood) estimates."""
        return (getattr(self.measures, DIVERSITY).estimate,
                getattr(self.measures, LIKELIHOOD).estimate)


@dataclass(frozen=True)
class SweepResults:
    """Every result row of a sweep, overall rows first, then prompt by prompt."""

    title: str
    recipes: tuple[str, ...]
    prompts: int
    rows: tuple[ResultRow, ...]
    n_resamples: int
    samples: int = 0  # samples per prompt and recipe the sweep asked for (0: not known)

    def scope(self, prompt: int | None) -> list[ResultRow]:
        """The rows of one scope, in recipe order."""
        return [r for r in self.rows if r.prompt == prompt]

    def scopes(self) -> list[int | None]:
        """None (all prompts), then each prompt when there are several."""
        return [None] + (list(range(self.prompts)) if self.prompts > 1 else [])

    def front(self, prompt: int | None = None) -> list[ResultRow]:
        """The scope's front, by diversity ascending."""
        return sorted((r for r in self.scope(prompt) if r.on_front), key=lambda r: r.point)


def _stand_in(group: list[SampleRecord], samples: int) -> list[SampleRecord]:
    """A fixed recipe's one sample per prompt, counted `samples` times (as sample 0..n-1)."""
    out: list[SampleRecord] = []
    for prompt in dict.fromkeys(s.prompt_index for s in group):
        mine = [s for s in group if s.prompt_index == prompt]
        if len(mine) == 1:
            mine = [replace(mine[0], sample_index=i) for i in range(samples)]
        out += mine
    return out


def compute_results(title: str, recipes: Sequence[str], prompts: int,
                    samples: Sequence[SampleRecord], *, n_resamples: int = 1000,
                    seed: int = 0, samples_per_prompt: int = 0) -> SweepResults:
    """Measure every recipe (and every recipe and prompt) and mark the fronts.

    `samples_per_prompt` is the sweep's `samples`: a recipe that keeps one token has one
    sample per prompt, measured as that many copies of it (0: measured as it is).
    """
    ordered = sorted(samples, key=lambda s: (s.prompt_index, s.sample_index))
    by_recipe = {r: [s for s in ordered if s.recipe == r] for r in recipes}
    stray = sorted({s.recipe for s in ordered} - set(recipes))
    if stray:
        raise ValueError(f"samples of recipes the sweep does not list: {', '.join(stray)}")
    rows: list[ResultRow] = []
    scopes: list[int | None] = [None] + (list(range(prompts)) if prompts > 1 else [])
    fixed_recipes = {r for r in recipes if samples_per_prompt > 1 and Recipe.parse(r).keeps_one_token}
    for scope in scopes:
        measured = []
        for recipe in recipes:
            group = [s for s in by_recipe[recipe] if scope is None or s.prompt_index == scope]
            if not group:
                raise ValueError(f"no samples of recipe {recipe!r}"
                                 + ("" if scope is None else f" for prompt {scope + 1}"))
            if recipe in fixed_recipes:
                m = measure_samples(_stand_in(group, samples_per_prompt), n_resamples=n_resamples, seed=seed)
                ran = {reason: sum(s.ending == reason for s in group) for reason in STOP_REASONS}
                measured.append(replace(m, n_samples=len(group), endings=ran))  # n, endings: what ran
            else:
                measured.append(measure_samples(group, n_resamples=n_resamples, seed=seed))
        points = [(getattr(m, DIVERSITY).estimate, getattr(m, LIKELIHOOD).estimate)
                  for m in measured]
        front = set(pareto_front(points, maximize=(True, True)))
        rows += [ResultRow(r, scope, m, i in front, r in fixed_recipes)
                 for i, (r, m) in enumerate(zip(recipes, measured))]
    return SweepResults(title, tuple(recipes), prompts, tuple(rows), n_resamples, samples_per_prompt)


def count_text(row: ResultRow) -> str:
    """The n column: how many samples ran, and "fixed" for a recipe that ran once per prompt."""
    return f"{row.measures.n_samples} (fixed)" if row.fixed else str(row.measures.n_samples)


def fixed_note(results: SweepResults) -> str:
    """What "(fixed)" means, for a table's caption; empty when no row is fixed."""
    if not any(r.fixed for r in results.rows):
        return ""
    return (f"(fixed): keeps one token at every step, so it ran once per prompt and that "
            f"sample counts as all {results.samples}; its intervals are points")


def scope_name(prompt: int | None) -> str:
    return "all" if prompt is None else str(prompt + 1)


def csv_text(results: SweepResults) -> str:
    """One line per result row: estimate, low and high of every measure, endings, front."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    header = ["recipe", "prompt", "n_samples"]
    for name in MEASURE_NAMES:
        header += [name, f"{name}_low", f"{name}_high"]
    header += [f"ended_{reason.replace(' ', '_')}" for reason in STOP_REASONS] + ["on_front", "fixed"]
    writer.writerow(header)
    for row in results.rows:
        m = row.measures
        line: list[object] = [row.recipe, scope_name(row.prompt), m.n_samples]
        for name in MEASURE_NAMES:
            iv = getattr(m, name)
            line += [_number(iv.estimate), _number(iv.low), _number(iv.high)]
        line += [m.endings[reason] for reason in STOP_REASONS] + [int(row.on_front), int(row.fixed)]
        writer.writerow(line)
    return out.getvalue()


def _number(value: float) -> str:
    """A float in CSV: repr precision, empty for NaN, never -0.0."""
    return "" if math.isnan(value) else repr(plain_zero(float(value)))


def interval_text(estimate: float, low: float, high: float, digits: int = 3) -> str:
    """``0.512 [0.480, 0.550]``; ``-`` for an undefined estimate."""
    if math.isnan(estimate):
        return "-"
    if math.isnan(low) or math.isnan(high):
        return fixed(estimate, digits)
    return f"{fixed(estimate, digits)} [{fixed(low, digits)}, {fixed(high, digits)}]"


# (measure, column title, digits) for the human-readable tables
TABLE_COLUMNS = (
    ("distinct_1", "distinct-1", 3), ("distinct_2", "distinct-2", 3),
    ("self_bleu", "self-BLEU", 1), ("mean_logprob", "mean log-prob", 3),
    ("perplexity", "perplexity", 2), ("repetition_4", "repeated 4-grams", 3),
    ("mean_kept", "kept", 1), ("mean_final_entropy", "entropy (nats)", 3),
)


def endings_text(endings: dict[str, int]) -> str:
    """``eos 3, stop 1, length 4`` (only the reasons that occurred)."""
    short = {"end of text": "eos", "stop string": "stop", "length": "length",
             "context full": "context"}
    parts = [f"{short.get(r, r)} {n}" for r, n in endings.items() if n]
    return ", ".join(parts) or "-"


def scope_title(results: SweepResults, prompt: int | None) -> str:
    if prompt is None:
        return f"{results.title}: all {results.prompts} prompt(s)"
    return f"{results.title}: prompt {prompt + 1}"


def markdown_text(results: SweepResults) -> str:
    """Markdown tables, one per scope; a front recipe is marked with `*`."""
    note = fixed_note(results)
    lines = [f"# {_md(results.title)}", "",
             f"Estimates with 95% bootstrap intervals ({results.n_resamples} resamples of "
             "samples within each prompt; percentile intervals, recentred on the estimate for "
             "distinct-n and self-BLEU). `*`: on the trade-off front of "
             f"{AXIS_LABELS[DIVERSITY]} against {AXIS_LABELS[LIKELIHOOD]}."
             + (f" {_md(note)}." if note else ""), ""]
    for prompt in results.scopes():
        lines += [f"## {_md(scope_title(results, prompt))}", ""]
        header = ["front", "recipe", "n"] + [title for _, title, _ in TABLE_COLUMNS] + ["endings"]
        lines.append("| " + " | ".join(header) + " |")
        lines.append("|" + "|".join(" --- " for _ in header) + "|")
        for row in results.scope(prompt):
            m = row.measures
            cells = ["*" if row.on_front else "", f"`{_md(label_of(row.recipe))}`",
                     count_text(row)]
            for name, _, digits in TABLE_COLUMNS:
                iv = getattr(m, name)
                cells.append(interval_text(iv.estimate, iv.low, iv.high, digits))
            cells.append(endings_text(m.endings))
            lines.append("| " + " | ".join(cells) + " |")
        lines.append("")
    return "\n".join(lines)


def _md(text: str) -> str:
    """Text safe inside a Markdown table cell."""
    return text.replace("|", "\\|").replace("\n", " ")
