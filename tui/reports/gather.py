"""What a report of one transcript shows, gathered once, and the formatting both renderings share.

`gather(session)` reads the transcript once (streaming) and keeps, per record, only the
few numbers a report shows. `plots_png(report)` draws entropy, kept-set size and the
chosen token's probability over the steps, one line per pane, with matplotlib's Agg
backend.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass
from pathlib import Path

from tui import token_style as ts
from tui.numbers import fixed
from tui.session.parting import EDIT, FORK, PART, TextMark, compared_with, text_marks
from tui.session.record import mean_logprob, perplexity
from tui.transcripts.headers import PaneHeader, TranscriptHeader
from tui.transcripts.reader import StoredSession

# Okabe & Ito 2008 colours for the panes' plot lines, then line styles to tell 8 apart.
PANE_COLOURS = ("#0072B2", "#E69F00", "#CC79A7", "#009E73", "#D55E00", "#56B4E9",
                "#000000", "#F0E442")
PANE_DASHES = ("-", "--", "-.", ":")


@dataclass(frozen=True)
class Row:
    """The part of one record a report shows."""

    step: int
    token_id: int
    text: str
    rank: int
    raw_prob: float
    final_prob: float
    kept: int
    raw_entropy: float
    final_entropy: float
    forced: bool
    stop: str | None


@dataclass(frozen=True)
class PaneReport:
    header: PaneHeader
    colour: str  # its plot line's colour
    rows: tuple[Row, ...]

    @property
    def text(self) -> str:
        return "".join(r.text for r in self.rows)

    # What `tui.session.parting` reads of a pane (`Compared`), as of a live one.
    @property
    def id(self) -> int:
        return self.header.id

    @property
    def name(self) -> str:
        return self.header.name

    @property
    def recipe(self) -> str:
        return self.header.recipe

    @property
    def origin(self) -> tuple[int, int] | None:
        return self.header.origin

    @property
    def recipe_log(self) -> tuple[tuple[int, str], ...]:
        return self.header.recipe_log

    @property
    def records(self) -> tuple[Row, ...]:
        return self.rows

    @property
    def mean_logprob(self) -> float:
        return mean_logprob(self._logprobs())

    @property
    def perplexity(self) -> float:
        return perplexity(self._logprobs())

    def _logprobs(self) -> list[float]:
        return [math.log(r.raw_prob) if r.raw_prob > 0 else -math.inf for r in self.rows]

    def mean(self, field: str) -> float:
        vals = [float(getattr(r, field)) for r in self.rows]
        return sum(vals) / len(vals) if vals else math.nan

    @property
    def forced(self) -> int:
        return sum(r.forced for r in self.rows)


@dataclass(frozen=True)
class Report:
    source: Path
    header: TranscriptHeader
    panes: tuple[PaneReport, ...]
    steps: int

    def at(self, step: int) -> list[Row | None]:
        """Each pane's row at a step (None where it had stopped)."""
        return [p.rows[step] if step < len(p.rows) else None for p in self.panes]

    def marks(self, pane: PaneReport) -> tuple[TextMark, ...]:
        """The marks of a pane's text, as the app draws them (`tui.session.parting`)."""
        return text_marks(pane, compared_with(pane, self.panes))


def gather(session: StoredSession) -> Report:
    """One streaming pass over the transcript."""
    rows: dict[int, list[Row]] = {p.id: [] for p in session.panes}
    for r in session.iter_records():
        rows[r.pane].append(Row(r.step, r.token_id, r.text, r.rank, r.raw_prob, r.final_prob,
                                r.kept, r.raw_entropy, r.final_entropy, r.forced, r.stop))
    panes = tuple(PaneReport(p, PANE_COLOURS[i % len(PANE_COLOURS)], tuple(rows[p.id]))
                  for i, p in enumerate(session.panes))
    return Report(session.path, session.header, panes, session.steps)


def plots_png(report: Report, dpi: int = 96) -> bytes:
    """Entropy, kept-set size and chosen-token probability over the steps, as a PNG."""
    from matplotlib.figure import (
        Figure,  # renders with Agg by itself: no backend forced (tui.settings)
    )

    fig = Figure(figsize=(10, 7.5), dpi=dpi, layout="constrained")
    axes = fig.subplots(3, 1, sharex=True)
    panels = (("final_entropy", "entropy of the final\ndistribution (nats)", False),
              ("kept", "kept-set size\n(tokens, log scale)", True),
              ("raw_prob", "chosen token's\nprobability (raw model)", False))
    for i, pane in enumerate(report.panes):
        steps = [r.step for r in pane.rows]
        for ax, (field, _, _) in zip(axes, panels):
            ax.plot(steps, [getattr(r, field) for r in pane.rows], color=pane.colour,
                    linestyle=PANE_DASHES[(i // len(PANE_COLOURS) + i) % len(PANE_DASHES)],
                    linewidth=1.4, label=f"{pane.header.name}")
    for ax, (_, label, log) in zip(axes, panels):
        ax.set_ylabel(label, fontsize=9)
        ax.grid(True, alpha=0.3)
        if log:
            ax.set_yscale("log")
    axes[2].set_ylim(-0.02, 1.02)
    axes[2].set_xlabel("step")
    axes[0].legend(loc="upper right", fontsize=8, ncol=min(4, max(1, len(report.panes))))
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


# ----- small text helpers both renderers use ------------------------------------------------

def visible(text: str) -> str:
    """Control characters as their Unicode control pictures (U+2400 block)."""
    out = []
    for ch in text:
        code = ord(ch)
        if ch in "\n\t":
            out.append(ch)
        elif code < 0x20:
            out.append(chr(0x2400 + code))
        elif code == 0x7F:
            out.append("\u2421")
        elif 0x80 <= code < 0xA0:
            out.append(f"\\x{code:02x}")
        else:
            out.append(ch)
    return "".join(out)


def token_cell(text: str) -> str:
    """A token shown alone: spaces as open boxes, newlines and tabs as arrows."""
    return visible(text).replace(" ", "\u2423").replace("\n", "\u21b5").replace("\t", "\u21e5")


def fmt(v: float, digits: int = 3) -> str:
    """A number for a report: fixed digits, never ``-0.000``; ``n/a`` for NaN."""
    if isinstance(v, float) and not math.isfinite(v):
        return "n/a" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    return fixed(v, digits)


def origin_text(pane: PaneHeader, report: Report) -> str:
    if pane.origin is None:
        return "from the prompt"
    src = next((p.header.name for p in report.panes if p.header.id == pane.origin[0]),
               "since removed")
    return f"forked from pane {pane.origin[0]} ({src}) at step {pane.origin[1]}"


def recipe_changes(pane: PaneHeader) -> list[str]:
    return [f"from step {s}: {r}" for s, r in pane.recipe_log]


def prompt_edit_lines(header: TranscriptHeader) -> list[str]:
    """One line per earlier setup the session ran with before the prompt was edited,
    oldest first: how far it got, its prompt (shortened) and its length settings."""
    out = []
    for i, setup in enumerate(header.prompt_edits, start=1):
        prompt = setup.prompt if setup.prompt is not None else " ".join(
            f"[{r}] {c}" for r, c in setup.messages)
        shown = prompt if len(prompt) <= 120 else prompt[:119] + "…"
        stop = ", ".join(repr(x) for x in setup.stop) or "none"
        out.append(f"{i}. ran {setup.steps} step(s) with the prompt {visible(shown)!r}, at most "
                   f"{setup.max_new_tokens} new tokens, stop strings {stop}; then the prompt "
                   "was edited and the session restarted")
    return out


MARK_SIGNS = {PART: ts.PART_MARK, FORK: ts.FORK_MARK, EDIT: ts.EDIT_MARK}


def mark_lines(marks: tuple[TextMark, ...]) -> list[str]:
    """``≠ step 4: leaves greedy here`` for each mark, in step order."""
    return [f"{MARK_SIGNS[m.kind]} step {m.step}: {m.note}" for m in marks]
