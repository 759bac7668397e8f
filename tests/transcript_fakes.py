"""Hand-made transcripts for the transcript tests: no model, numbers chosen by hand.

`sample_header()` and `sample_records()` make a two-pane session whose probabilities
are simple fractions, so that reports' numbers can be checked by hand. `run_cli`
calls the real `logitfork` router with only the transcript commands registered, so
the tests do not depend on the other commands' modules.
"""

from __future__ import annotations

import json
from pathlib import Path

from tui.files import write_atomic
from tui.session.record import STOP_LENGTH, StepRecord, TopToken
from tui.transcripts.format import transcript_lines
from tui.transcripts.headers import PaneHeader, TranscriptHeader

TRANSCRIPT_COMMANDS = ("report", "rerun", "recover")


def sample_header(**changes) -> TranscriptHeader:
    head = TranscriptHeader(
        title="Two panes by hand", created="2025-01-02T03:04:05+00:00",
        model_name="hand-made", model_source="nowhere", dtype="float32",
        prompt_text="Once upon", messages=None, prompt_ids=(11, 12), max_new_tokens=3,
        stop=("\n\n",), seed=7, shared_draws=True,
        panes=(PaneHeader(0, "greedy", "greedy", None, ((0, "greedy"),), None, STOP_LENGTH),
               PaneHeader(1, "warm", "temperature=1.5", 4, ((0, "temperature=1.5"),), None,
                          STOP_LENGTH)),
        versions={"logitfork": "0.1.0", "torch": "2.13.0"})
    return TranscriptHeader(**{**head.__dict__, **changes})


def record(step: int, pane: int, token: int, text: str, p: float, rank: int = 1,
           stop: str | None = None, forced: bool = False) -> StepRecord:
    top = (TopToken(token, text, p, p), TopToken(token + 1, "x", (1 - p) / 2, (1 - p) / 2))
    return StepRecord(step=step, pane=pane, token_id=token, text=text, rank=rank, raw_prob=p,
                      final_prob=p, kept=2, raw_entropy=0.5, final_entropy=0.25, u=0.125,
                      top=top, forced=forced, stop=stop)


def sample_records() -> list[list[StepRecord]]:
    """Pane 0: raw p 1/2, 1/4, 1/2; pane 1: 1/8, 1/2, 1/4 (both stop on length at step 2)."""
    return [
        [record(0, 0, 20, " a", 0.5), record(1, 0, 21, " time", 0.25),
         record(2, 0, 22, ",", 0.5, stop=STOP_LENGTH)],
        [record(0, 1, 30, " the", 0.125, rank=4, forced=True), record(1, 1, 31, " sea", 0.5),
         record(2, 1, 32, "!", 0.25, rank=2, stop=STOP_LENGTH)],
    ]


def write_sample(path: Path) -> Path:
    return write_atomic(path, transcript_lines(sample_header(), sample_records()))


def sample_lines() -> list[dict]:
    return [json.loads(line) for line in transcript_lines(sample_header(), sample_records())]


def write_objects(path: Path, objs: list[dict]) -> Path:
    path.write_text("".join(json.dumps(o) + "\n" for o in objs), encoding="utf-8")
    return path


def run_cli(argv: list[str], monkeypatch) -> int:
    """`logitfork ARGV` through the real router, with only the transcript commands."""
    from tui import cli
    monkeypatch.setattr(cli, "COMMANDS", {k: v for k, v in cli.COMMANDS.items()
                                          if k in TRANSCRIPT_COMMANDS})
    return cli.main(argv)
