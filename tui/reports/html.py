"""The HTML report: one self-contained file, readable offline and safe to mail around.

Inline CSS only; the plots are embedded PNG (`data:` URLs); there are no scripts and
no external references of any kind. Token colours come from `tui.token_style`, the
scheme the app uses, drawn on the app's dark pane background so a report looks like
the screen it came from. Every token carries a tooltip (title) with its numbers.
"""

from __future__ import annotations

import base64
from html import escape
from typing import Iterator

from tui import token_style as ts
from tui.reports.gather import (MARK_SIGNS, Report, Row, fmt, mark_lines, origin_text,
                                prompt_edit_lines, recipe_changes, token_cell, visible)
from tui.session.parting import TextMark

_PAGE_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 2rem auto;
       max-width: 72rem; padding: 0 1rem; color: #1d2025; background: #fafafa; line-height: 1.45; }
h1 { font-size: 1.6rem; margin-bottom: .2rem; } h2 { margin-top: 2rem; font-size: 1.25rem; }
h3 { margin: 1.2rem 0 .3rem; font-size: 1.05rem; }
table { border-collapse: collapse; font-size: .85rem; margin: .5rem 0; }
th, td { border: 1px solid #d5d8dd; padding: .2rem .45rem; text-align: left; vertical-align: top; }
th { background: #eceef1; } td.num { text-align: right; font-variant-numeric: tabular-nums; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: .15rem 1rem; }
dl.facts dt { font-weight: 600; } dl.facts dd { margin: 0; }
code, .mono { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, monospace; }
.swatch { display: inline-block; width: .9rem; height: .9rem; border-radius: 2px;
          vertical-align: -2px; margin-right: .35rem; }
.pane-text, .legend { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, monospace;
          white-space: pre-wrap; word-break: break-word; background: %(bg)s; color: %(neutral)s;
          padding: .7rem .9rem; border-radius: 6px; font-size: .9rem; }
.legend { margin: .6rem 0 1rem; } .prompt { color: %(prompt)s; font-style: italic; }
.steps td.tok { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, monospace;
          background: %(bg)s; white-space: pre; }
.small { font-size: .8rem; color: #5b616b; } .steps td.tok .small { color: #a9afb8; } details { margin: .4rem 0; }
summary { cursor: pointer; font-weight: 600; } img.plot { max-width: 100%%; }
"""


def _css_look(c: ts.TokenColours) -> str:
    return (f"color: {c.foreground}; background: {c.background};"
            + (" font-weight: 700;" if c.bold else "")
            + (" text-decoration: underline;" if c.underline else "")
            + (" font-style: italic;" if c.italic else ""))


def _token_css() -> str:
    """One class per drawn combination: rank band, final band, alternate, forced."""
    rules = []
    for ri in range(len(ts.RANK_BANDS)):
        for fi in range(len(ts.FINAL_BANDS)):
            for alt in (0, 1):
                c = ts.band_colours(ri, fi, alternate=bool(alt))
                rules.append(f".t{ri}{fi}{alt} {{ {_css_look(c)} }}")
    for alt in (0, 1):
        c = ts.token_colours(1, 1.0, alternate=bool(alt), forced=True)
        rules.append(f".tf{alt} {{ {_css_look(c)} font-weight: 700; }}")
    rules.append(f".mark {{ color: {ts.FORCED_COLOUR}; font-weight: 700; }}")
    rules.append(f".part {{ color: {ts.PALETTES['truecolor'].mark}; font-weight: 700; "
                 "padding: 0 .1em; }")  # the app's parting marks, in its true-colour ink
    return "\n".join(rules)


def _class(rank: int, final_prob: float, alternate: bool, forced: bool) -> str:
    if forced:
        return f"tf{int(alternate)}"
    return f"t{ts.rank_band(rank)}{ts.final_band(min(final_prob, 1.0))}{int(alternate)}"


def _token_span(row: Row, alternate: bool, pane_name: str) -> str:
    tip = (f"{pane_name} · step {row.step} · token {row.token_id} · rank {row.rank} · "
           f"raw p {row.raw_prob:.4f} · final p {row.final_prob:.4f} · kept {row.kept}"
           + (" · chosen by hand" if row.forced else "") + (f" · {row.stop}" if row.stop else ""))
    mark = f'<span class="mark">{ts.FORCED_MARK}</span>' if row.forced else ""
    cls = _class(row.rank, row.final_prob, alternate, row.forced)
    return f'{mark}<span class="{cls}" title="{escape(tip)}">{escape(visible(row.text))}</span>'


def legend_html() -> str:
    """The app's legend line, in the same looks, each band with what it means."""
    parts = ['<b>model rank</b> ']
    for ri, band in enumerate(ts.RANK_BANDS):
        parts.append(f'<span class="t{ri}00">{escape(band.name)} {escape(band.label)}</span> ')
    parts.append("<b>│ pane p</b> ")
    for fi, fband in enumerate(ts.FINAL_BANDS):
        parts.append(f'<span class="t0{fi}0">{escape(fband.name)} {escape(fband.label)}</span> ')
    parts.append(f'<b>│</b> <span class="mark">{ts.FORCED_MARK}</span>'
                 '<span class="tf0">forced</span> ')
    parts.append(f'<b>│</b> <span class="part">{ts.PART_MARK}</span> parts from the pane it is '
                 f'compared with <span class="part">{ts.FORK_MARK}</span> forked here '
                 f'<span class="part">{ts.EDIT_MARK}</span> recipe changed')
    return ('<div class="legend">' + "".join(parts) + "</div>"
            f'<p class="small">{escape(ts.LEGEND_TEXT)}</p>')


def render_html(report: Report, plot_png: bytes) -> Iterator[str]:
    head = report.header
    title = f"logitfork report: {head.title}"
    css = _PAGE_CSS % {"bg": ts.PANE_BACKGROUND, "neutral": ts.NEUTRAL,
                       "prompt": ts.PROMPT_COLOUR}
    yield ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
           f"<title>{escape(title)}</title>\n<style>{css}\n{_token_css()}</style></head><body>")
    yield f"<h1>{escape(head.title)}</h1>"
    yield (f'<p class="small">A logitfork session report, made from '
           f"<code>{escape(report.source.name)}</code>. Generated text is raw model output.</p>")
    yield from _facts(report)
    yield "<h2>Panes</h2>" + legend_html()
    for pane in report.panes:
        yield from _pane(report, pane)
    yield "<h2>Over the steps</h2>"
    yield (f'<img class="plot" alt="entropy, kept-set size and chosen-token probability '
           f'per step, one line per pane" src="data:image/png;base64,'
           f'{base64.b64encode(plot_png).decode("ascii")}">')
    yield from _step_table(report)
    yield "<h2>Every record, pane by pane</h2>"
    for i, pane in enumerate(report.panes):
        yield from _detail_table(pane, open_=(i == 0))
    yield "</body></html>"


def _facts(report: Report) -> Iterator[str]:
    h = report.header
    prompt = (escape(h.prompt_text) if h.prompt_text is not None else
              "<br>".join(f"<b>{escape(r)}</b>: {escape(c)}" for r, c in h.messages or ()))
    rows = [
        ("scenario", escape(h.title)), ("created", escape(h.created)),
        ("model", f"<code>{escape(h.model_name)}</code> ({escape(h.dtype)}"
                  f"{'; ' + escape(h.dtype_note) if h.dtype_note else ''}) from "
                  f"<code>{escape(h.model_source)}</code>"),
        ("prompt", f'<span class="mono">{prompt}</span> '
                   f'<span class="small">({len(h.prompt_ids)} tokens)</span>'),
        ("seed", str(h.seed)),
        ("draws", "shared: every pane draws with the same uniform number at a step"
         if h.shared_draws else "one stream per pane"),
        ("length", f"at most {h.max_new_tokens} new tokens; {report.steps} steps recorded"),
        ("stop strings", ", ".join(f"<code>{escape(repr(s))}</code>" for s in h.stop) or "none"),
        ("versions", ", ".join(f"{escape(k)} {escape(v)}" for k, v in sorted(h.versions.items()))),
    ]
    edits = prompt_edit_lines(h)
    if edits:  # after the prompt: the setups that ran before it was edited
        rows.insert(4, ("earlier prompts", "<br>".join(escape(line) for line in edits)))
    yield '<dl class="facts">' + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in rows) + "</dl>"


def _pane(report: Report, pane) -> Iterator[str]:
    p = pane.header
    stop = f"stopped: {p.stop}" if p.stop else "still running when saved"
    yield (f'<h3 id="pane-{p.id}"><span class="swatch" style="background:{pane.colour}">'
           f"</span>{escape(p.name)} <span class=\"small\">pane {p.id}</span></h3>")
    changes = recipe_changes(p)
    yield (f"<p>recipe <code>{escape(p.recipe)}</code>"
           + (f" · seed {p.seed}" if p.seed is not None else "")
           + f" · {escape(origin_text(p, report))} · {escape(stop)}"
           + (f'<br><span class="small">recipe changes: {escape("; ".join(changes))}</span>'
              if len(changes) > 1 else "") + "</p>")
    yield (f'<p class="small">{len(pane.rows)} tokens · mean log-prob '
           f"{fmt(pane.mean_logprob)} · perplexity {fmt(pane.perplexity, 2)} · mean final "
           f"entropy {fmt(pane.mean('final_entropy'))} nats · mean kept "
           f"{fmt(pane.mean('kept'), 1)} · chosen by hand {pane.forced}</p>")
    marks: dict[int, list[TextMark]] = {}
    for m in report.marks(pane):
        marks.setdefault(m.step, []).append(m)
    spans = "".join(
        "".join(f'<span class="part" title="{escape(m.note)}">{MARK_SIGNS[m.kind]}</span>'
                for m in marks.get(r.step, ()))
        + _token_span(r, i % 2 == 1, p.name) for i, r in enumerate(pane.rows))
    if marks:
        yield '<p class="small">' + " · ".join(map(escape, mark_lines(report.marks(pane)))) + "</p>"
    prompt = report.header.prompt_text
    shown = prompt if prompt is None or len(prompt) <= 200 else "…" + prompt[-200:]
    lead = f'<span class="prompt">{escape(visible(shown))}</span>' if shown else ""
    yield f'<div class="pane-text">{lead}{spans}</div>'


def _step_table(report: Report) -> Iterator[str]:
    yield ("<h3>Step by step</h3><p class=\"small\">Each cell: the token, its raw rank and "
           "its final probability.</p>")
    yield ('<table class="steps"><thead><tr><th>step</th>'
           + "".join(f"<th>{escape(p.header.name)}</th>" for p in report.panes)
           + "</tr></thead><tbody>")
    for t in range(report.steps):
        cells = []
        for pane, row in zip(report.panes, report.at(t)):
            if row is None:
                cells.append('<td class="small">—</td>')
                continue
            cls = _class(row.rank, row.final_prob, False, row.forced)
            cells.append(f'<td class="tok"><span class="{cls}">{escape(token_cell(row.text))}'
                         f'</span> <span class="small">r{row.rank} {row.final_prob:.2f}</span></td>')
        yield f'<tr><td class="num">{t}</td>{"".join(cells)}</tr>'
    yield "</tbody></table>"


def _detail_table(pane, open_: bool) -> Iterator[str]:
    yield (f"<details{' open' if open_ else ''}><summary>{escape(pane.header.name)} "
           f"({len(pane.rows)} records)</summary>")
    yield ('<table><thead><tr><th>step</th><th>token</th><th>id</th><th>rank</th>'
           "<th>raw p</th><th>final p</th><th>kept</th><th>raw H</th><th>final H</th>"
           "<th>note</th></tr></thead><tbody>")
    for r in pane.rows:
        note = "; ".join(x for x in ("chosen by hand" if r.forced else "", r.stop or "") if x)
        yield (f'<tr><td class="num">{r.step}</td><td class="mono">{escape(token_cell(r.text))}'
               f'</td><td class="num">{r.token_id}</td><td class="num">{r.rank}</td>'
               f'<td class="num">{r.raw_prob:.4f}</td><td class="num">{r.final_prob:.4f}</td>'
               f'<td class="num">{r.kept}</td><td class="num">{fmt(r.raw_entropy)}</td>'
               f'<td class="num">{fmt(r.final_entropy)}</td><td>{escape(note)}</td></tr>')
    yield "</tbody></table></details>"
