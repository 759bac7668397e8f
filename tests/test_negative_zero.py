"""No negative zero where a user reads numbers: transcripts, reports, sweep tables.

The entropy of a one-hot distribution computed as -sum(p log p) is -0.0 in IEEE 754
arithmetic (the negation of +0.0); Python's json writes it as ``-0.0`` and a format
with three decimals as ``-0.000``. Reference: Python's own `json` and `format` (a
written ``-0.0`` parses back to a float whose sign bit `math.copysign` reads).
"""

from __future__ import annotations

import dataclasses
import json
import math

from transcript_fakes import record, run_cli, sample_header

from tui.files import write_atomic
from tui.numbers import fixed, json_ready
from tui.session.record import STOP_LENGTH
from tui.sweeps.results import interval_text
from tui.transcripts.format import transcript_lines


def is_negative_zero(x: float) -> bool:
    return x == 0.0 and math.copysign(1.0, x) < 0


def test_the_premise_python_writes_negative_zero() -> None:
    entropy_of_one_hot = -(1.0 * math.log(1.0))  # -sum(p log p) for p = (1,)
    assert is_negative_zero(entropy_of_one_hot)
    assert json.dumps(entropy_of_one_hot) == "-0.0" and f"{entropy_of_one_hot:.3f}" == "-0.000"


def greedy_session_lines() -> list[str]:
    """A one-pane greedy transcript whose entropies are -0.0, as the engine computed them."""
    steps = [record(t, 0, 20 + t, "ab"[t], 1.0, stop=STOP_LENGTH if t == 1 else None) for t in range(2)]
    steps = [dataclasses.replace(s, raw_entropy=-0.0, final_entropy=-0.0, kept=1) for s in steps]
    head = sample_header(panes=sample_header().panes[:1])
    return list(transcript_lines(head, [steps]))


def test_transcripts_write_zero_not_negative_zero() -> None:
    lines = greedy_session_lines()
    assert all("-0.0" not in line for line in lines)
    steps = [json.loads(line) for line in lines[1:]]
    assert [s["final_entropy"] for s in steps] == [0.0, 0.0]
    assert not any(is_negative_zero(s["final_entropy"]) for s in steps)


def test_reports_show_zero_not_negative_zero(tmp_path, monkeypatch) -> None:
    # a transcript as an earlier writer left it, with -0.0 in the file
    older = [line.replace('"raw_entropy": 0.0', '"raw_entropy": -0.0').replace(
        '"final_entropy": 0.0', '"final_entropy": -0.0') for line in greedy_session_lines()]
    assert sum(line.count("-0.0") for line in older) == 4
    path = write_atomic(tmp_path / "greedy.jsonl", older)
    for suffix in ("md", "html"):
        out = tmp_path / f"r.{suffix}"
        assert run_cli(["report", str(path), "--out", str(out)], monkeypatch) == 0
        text = out.read_text()
        assert "-0.000" not in text and "0.000" in text, suffix


def test_formatting_helpers() -> None:
    assert fixed(-0.0) == "0.000" and fixed(-0.0004) == "0.000" and fixed(-0.0005, 3) == "-0.001"
    assert fixed(-1.5, 1) == "-1.5" and fixed(-0.0, 0) == "0" and fixed(float("nan")) == "nan"
    assert json.dumps(json_ready({"a": [-0.0, (1, -0.0)], "b": "-0.0"})) == '{"a": [0.0, [1, 0.0]], "b": "-0.0"}'
    assert interval_text(-0.0, -0.0001, 0.0002) == "0.000 [0.000, 0.000]"
