"""The Markdown report: the HTML report's facts as text and tables, for an issue or appendix.

No colours survive Markdown, so each token's rank and final probability are written
out in the tables, and the legend names the bands of `tui.token_style` in words.
"""

from __future__ import annotations

import re
from typing import Iterator

from tui import token_style as ts
from tui.reports.gather import (Report, fmt, mark_lines, origin_text, prompt_edit_lines,
                                recipe_changes, token_cell, visible)


def _cell(text: str) -> str:
    """Text safe inside a Markdown table cell."""
    return text.replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ")


def _code(text: str) -> str:
    """An inline code span that survives backticks in `text`."""
    longest = max((len(m) for m in re.findall(r"`+", text)), default=0)
    fence = "`" * (longest + 1)
    pad = " " if text.startswith("`") or text.endswith("`") else ""
    return f"{fence}{pad}{text}{pad}{fence}"


def _block(text: str) -> list[str]:
    longest = max((len(m) for m in re.findall(r"`{3,}", text)), default=0)
    fence = "`" * max(3, longest + 1)
    return [f"{fence}text", visible(text), fence]


def render_md(report: Report) -> Iterator[str]:
    h = report.header
    yield f"# {h.title}"
    yield ""
    yield (f"A logitfork session report, made from `{report.source.name}`. "
           "Generated text is raw model output.")
    yield ""
    yield "| | |"
    yield "|---|---|"
    for k, v in (
        ("model", f"{_code(h.model_name)} ({h.dtype}{'; ' + h.dtype_note if h.dtype_note else ''}) "
                  f"from {_code(h.model_source)}"),
        ("created", h.created),
        ("prompt", f"{len(h.prompt_ids)} tokens (below)"),
        ("seed", str(h.seed)),
        ("draws", "shared (one uniform number per step for every pane)" if h.shared_draws
         else "one stream per pane"),
        ("length", f"at most {h.max_new_tokens} new tokens; {report.steps} steps recorded"),
        ("stop strings", ", ".join(_code(repr(s)) for s in h.stop) or "none"),
        ("versions", ", ".join(f"{k2} {v2}" for k2, v2 in sorted(h.versions.items()))),
    ):
        yield f"| {k} | {_cell(v)} |"
    yield ""
    yield "Prompt:"
    yield ""
    if h.prompt_text is not None:
        yield from _block(h.prompt_text)
    else:
        yield from _block("\n".join(f"[{r}] {c}" for r, c in h.messages or ()))
    yield ""
    edits = prompt_edit_lines(h)
    if edits:
        yield "Earlier prompts (the steps they ran were dropped when the prompt was edited):"
        yield ""
        yield from (_cell(line) for line in edits)
        yield ""
    yield "## Panes"
    yield ""
    yield ("How tokens are coloured in the app and the HTML report: "
           + ts.LEGEND_TEXT + " Here each token's raw rank and final probability are written "
           "in the tables instead.")
    yield ""
    yield "| pane | recipe | start | end | tokens | mean log-prob | perplexity | mean final entropy (nats) | mean kept | by hand |"
    yield "|---|---|---|---|---:|---:|---:|---:|---:|---:|"
    for pane in report.panes:
        p = pane.header
        yield (f"| {_cell(p.name)} (id {p.id}) | {_cell(_code(p.recipe))} | "
               f"{_cell(origin_text(p, report))} | {p.stop or 'running'} | {len(pane.rows)} | "
               f"{fmt(pane.mean_logprob)} | {fmt(pane.perplexity, 2)} | "
               f"{fmt(pane.mean('final_entropy'))} | {fmt(pane.mean('kept'), 1)} | {pane.forced} |")
    yield ""
    for pane in report.panes:
        p = pane.header
        yield f"### {p.name}"
        yield ""
        yield f"Recipe {_code(p.recipe)}" + (f", seed {p.seed}" if p.seed is not None else "") + "."
        changes = recipe_changes(p)
        if len(changes) > 1:
            yield "Recipe changes: " + "; ".join(changes) + "."
        marks = mark_lines(report.marks(pane))
        if marks:
            yield "Marks: " + "; ".join(marks) + "."
        yield ""
        yield from _block(pane.text)
        yield ""
    yield "## Step by step"
    yield ""
    yield "Each cell: the token (␣ = space, ↵ = newline), its raw rank `r` and final probability."
    yield ""
    yield "| step | " + " | ".join(_cell(p.header.name) for p in report.panes) + " |"
    yield "|---:|" + "---|" * len(report.panes)
    for t in range(report.steps):
        cells = []
        for row in report.at(t):
            if row is None:
                cells.append("—")
            else:
                mark = " (by hand)" if row.forced else ""
                cells.append(_cell(f"{_code(token_cell(row.text))} r{row.rank} "
                                   f"{row.final_prob:.2f}{mark}"))
        yield f"| {t} | " + " | ".join(cells) + " |"
    yield ""
    yield "## Every record, pane by pane"
    for pane in report.panes:
        yield ""
        yield f"### {pane.header.name}: records"
        yield ""
        yield "| step | token | id | rank | raw p | final p | kept | raw H | final H | note |"
        yield "|---:|---|---:|---:|---:|---:|---:|---:|---:|---|"
        for r in pane.rows:
            note = "; ".join(x for x in ("by hand" if r.forced else "", r.stop or "") if x)
            yield (f"| {r.step} | {_cell(_code(token_cell(r.text)))} | {r.token_id} | {r.rank} | "
                   f"{r.raw_prob:.4f} | {r.final_prob:.4f} | {r.kept} | {fmt(r.raw_entropy)} | "
                   f"{fmt(r.final_entropy)} | {note} |")
