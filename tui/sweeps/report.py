"""Showing a sweep's results: the terminal table (rich), the front in the terminal
(plotext) and the PNG scatter (matplotlib, Agg backend); `report_folder` writes a
finished folder's result files and prints its tables.

Display code only: the numbers come from `tui.sweeps.results`. Both charts put
diversity (distinct-2) across and likelihood (mean log-prob per token) up, so the
recipes worth a look are up and to the right; the trade-off front is joined by a
line and every recipe on it is labelled. rich, plotext and matplotlib are imported
inside the functions that use them.
"""

from __future__ import annotations

import math
import shutil
from pathlib import Path
from typing import Any, TextIO

from tui.files import write_atomic
from tui.sweeps.folder import SweepFolder
from tui.sweeps.results import (AXIS_LABELS, DIVERSITY, LIKELIHOOD, TABLE_COLUMNS, ResultRow,
                                SweepResults, compute_results, count_text, csv_text, endings_text,
                                fixed_note, interval_text, label_of, markdown_text, scope_title)

MIN_CHART_WIDTH = 60  # narrower terminals get no terminal chart
FILE_WIDTH = 400  # console width when the output is not a terminal: every measure fits
# Terminal table columns, most wanted first; a narrow terminal shows a prefix of them.
COLUMN_PRIORITY = ("distinct_2", "mean_logprob", "self_bleu", "repetition_4", "endings",
                   "perplexity", "mean_kept", "mean_final_entropy", "distinct_1")
ALWAYS_SHOWN = 2


def _table(results: SweepResults, prompt: int | None, shown: tuple[str, ...]) -> Any:
    from rich import box
    from rich.table import Table

    columns = {name: (title, digits) for name, title, digits in TABLE_COLUMNS}
    left_out = len(COLUMN_PRIORITY) - len(shown)
    caption = "[95% bootstrap interval]; * on the front of distinct-2 against mean log-prob"
    if fixed_note(results):
        caption += f"; {fixed_note(results)}"
    if left_out:
        caption += f"; {left_out} more measure(s) in results.md"
    table = Table(title=scope_title(results, prompt), caption=caption, box=box.SIMPLE_HEAD)
    table.add_column("", width=1)
    table.add_column("recipe", overflow="fold", min_width=12, max_width=32)
    table.add_column("n", justify="right")
    for name in shown:
        if name == "endings":
            table.add_column("endings", no_wrap=True)
        else:
            table.add_column(columns[name][0], justify="right", no_wrap=True)
    for row in results.scope(prompt):
        m = row.measures
        cells = []
        for name in shown:
            if name == "endings":
                cells.append(endings_text(m.endings))
            else:
                iv = getattr(m, name)
                cells.append(interval_text(iv.estimate, iv.low, iv.high, columns[name][1]))
        table.add_row("*" if row.on_front else "", label_of(row.recipe), count_text(row), *cells)
    return table


def print_tables(results: SweepResults, file: TextIO, *, width: int | None = None) -> None:
    """One rich table per scope (all prompts, then each prompt when there are several).

    On a terminal the table shows as many measures as fit its width (most wanted
    first); into a file or a pipe it is `FILE_WIDTH` wide and shows them all.
    """
    from rich.console import Console
    from rich.measure import Measurement

    if width is None and not (hasattr(file, "isatty") and file.isatty()):
        width = FILE_WIDTH
    console = Console(file=file, width=width, highlight=False, soft_wrap=False)
    unbounded = console.options.update_width(10**6)  # natural widths, not clipped to the console
    for prompt in results.scopes():
        shown = COLUMN_PRIORITY
        while len(shown) > ALWAYS_SHOWN:
            table = _table(results, prompt, shown)
            if Measurement.get(console, unbounded, table).maximum <= console.width:
                break
            shown = shown[:-1]
        console.print(_table(results, prompt, shown))


def _finite(rows: list[ResultRow]) -> list[ResultRow]:
    return [r for r in rows if all(math.isfinite(v) for v in r.point)]


def terminal_front(results: SweepResults, width: int | None = None,
                   height: int = 18) -> str | None:
    """The overall front as a plotext chart (plain text); None when too narrow or empty."""
    columns = width if width is not None else shutil.get_terminal_size((80, 24)).columns
    rows = _finite(results.scope(None))
    if columns < MIN_CHART_WIDTH or not rows:
        return None
    import plotext as plt

    fig = plt.figure
    fig.clear()
    fig.plot_size(min(columns, 100), height)
    others = [r for r in rows if not r.on_front]
    front = results.front(None)  # tui.sweeps.pareto leaves NaN points off the front
    if others:
        fig.draw(fig.signal([r.point[0] for r in others], [r.point[1] for r in others],
                            marker="·"))
    for number, row in enumerate(front, start=1):  # each front recipe drawn as its number
        fig.draw(fig.text(row.point[0], row.point[1], str(number)))
    for axis, values in (("x", [r.point[0] for r in rows]), ("y", [r.point[1] for r in rows])):
        low, high = min(values), max(values)
        pad = (high - low) * 0.06 or abs(low) * 0.06 or 0.1
        fig.ruler(axis).lim(low - pad, high + pad)
    fig.label("distinct-2", axis="x")
    fig.label("mean log-prob", axis="y")
    fig.title("trade-off front, all prompts (numbers: below; dots: others)")
    chart = fig.build().string(colorless=True)
    fig.clear()
    key = [f"  {n}. {label_of(r.recipe)}" for n, r in enumerate(front, start=1)]
    return chart.rstrip("\n") + "\n" + "\n".join(key) + "\n"


def _gap(high: float, low: float) -> float:
    """An error-bar length; 0 when the interval is undefined."""
    gap = high - low
    return gap if math.isfinite(gap) and gap > 0 else 0.0


def write_scatter_png(results: SweepResults, path: Path) -> None:
    """Diversity against likelihood for every recipe, the front joined and labelled.

    Error bars are the 95% intervals of both measures.
    """
    from matplotlib.figure import (
        Figure,  # no pyplot: no backend to force (tui.settings)
    )

    rows = _finite(results.scope(None))
    fig = Figure(figsize=(8, 5.5), dpi=120)
    ax = fig.subplots()
    try:
        others = [r for r in rows if not r.on_front]
        front = results.front(None)
        for group, style in ((others, dict(color="#8a8a8a", marker="o", label="recipe")),
                             (front, dict(color="#c0392b", marker="D", label="on the front"))):
            if not group:
                continue
            xs = [r.point[0] for r in group]
            ys = [r.point[1] for r in group]
            across = [getattr(r.measures, DIVERSITY) for r in group]
            up = [getattr(r.measures, LIKELIHOOD) for r in group]
            ax.errorbar(xs, ys, xerr=[[_gap(x, iv.low) for x, iv in zip(xs, across)],
                                      [_gap(iv.high, x) for x, iv in zip(xs, across)]],
                        yerr=[[_gap(y, iv.low) for y, iv in zip(ys, up)],
                              [_gap(iv.high, y) for y, iv in zip(ys, up)]],
                        linestyle="none", capsize=2, elinewidth=0.8, **style)
        if front:
            ax.plot([r.point[0] for r in front], [r.point[1] for r in front], color="#c0392b",
                    linewidth=1, alpha=0.6)
            for r in front:
                ax.annotate(label_of(r.recipe), r.point, textcoords="offset points",
                            xytext=(5, 5), fontsize=8)
        ax.set_xlabel(AXIS_LABELS[DIVERSITY])
        ax.set_ylabel(AXIS_LABELS[LIKELIHOOD])
        ax.set_title(f"{results.title}: diversity against likelihood")
        ax.grid(True, alpha=0.3)
        ax.legend(loc="best", fontsize=8)
        fig.tight_layout()
        fig.savefig(path)
    finally:
        fig.clear()  # a pyplot-free figure is freed with its last reference




def report_folder(folder: SweepFolder, out: TextIO, *, n_resamples: int = 1000,
                  chart_width: int | None = None) -> SweepResults:
    """Measure a complete folder's samples, write its result files and print the tables.

    Writes results.csv, results.md and front.png into the folder; prints the tables
    and then (terminal wide enough) the front chart to `out`.
    """
    m = folder.manifest
    results = compute_results(m.title, m.recipes, m.prompts, folder.samples(),
                              n_resamples=n_resamples, seed=m.seed, samples_per_prompt=m.samples)
    write_atomic(folder.path / "results.csv", csv_text(results))
    write_atomic(folder.path / "results.md", markdown_text(results))
    write_scatter_png(results, folder.path / "front.png")
    print_tables(results, out)
    chart = terminal_front(results, chart_width)
    if chart is not None:
        out.write(chart)
    out.flush()
    return results
