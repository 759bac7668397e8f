"""What the engine records for one pane at one step, and the incremental detokenizer.

`StepRecord` is the single source for colouring, the inspect view, transcripts and
sweeps. It is a frozen dataclass of plain values so that it crosses threads and
serialises to JSON without help. No torch, no Textual.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Sequence

TOP_N = 20  # how many of the most likely raw tokens each record keeps

# Why a pane stopped. Values are the words shown on screen and written to transcripts.
STOP_EOS = "end of text"
STOP_STRING = "stop string"
STOP_LENGTH = "length"
STOP_CONTEXT = "context full"
STOP_REASONS = (STOP_EOS, STOP_STRING, STOP_LENGTH, STOP_CONTEXT)


def mean_logprob(logprobs: Iterable[float]) -> float:
    """Mean natural-log probability per token; NaN for no tokens (the one definition)."""
    values = list(logprobs)
    return math.fsum(values) / len(values) if values else math.nan


def perplexity(logprobs: Iterable[float]) -> float:
    """exp(-mean natural-log probability per token); NaN for no tokens, inf for a zero one."""
    lp = mean_logprob(logprobs)
    return math.nan if math.isnan(lp) else math.exp(-lp) if lp > -math.inf else math.inf


@dataclass(frozen=True, slots=True)
class TopToken:
    """One of the most likely raw tokens at a step."""

    token_id: int
    text: str  # the token decoded on its own (may be a lone byte piece)
    raw_prob: float  # probability under the raw model distribution (softmax of logits)
    final_prob: float  # probability under the pane's final (recipe) distribution


@dataclass(frozen=True, slots=True)
class StepRecord:
    """One emitted token of one pane.

    `step` counts generated tokens from 0. `text` is the piece this token adds to the
    pane's text after incremental decoding: characters split over several byte tokens
    appear whole on the token that completes them (earlier pieces are "").
    """

    step: int
    pane: int
    token_id: int
    text: str
    rank: int  # rank in the raw distribution, 1 = most likely (ties by token id)
    raw_prob: float
    final_prob: float
    kept: int  # size of the final distribution's support
    raw_entropy: float  # nats
    final_entropy: float  # nats
    u: float  # the uniform number of the inverse-CDF draw
    top: tuple[TopToken, ...] = field(default_factory=tuple)
    forced: bool = False  # the user chose this token in the inspect view
    stop: str | None = None  # set on the record that ended the pane

    @property
    def logprob(self) -> float:
        """Natural log of the raw probability (the model's own likelihood)."""
        return math.log(self.raw_prob) if self.raw_prob > 0 else float("-inf")

    def to_json(self) -> dict[str, Any]:
        return {
            "step": self.step,
            "pane": self.pane,
            "token_id": self.token_id,
            "text": self.text,
            "rank": self.rank,
            "raw_prob": self.raw_prob,
            "final_prob": self.final_prob,
            "kept": self.kept,
            "raw_entropy": self.raw_entropy,
            "final_entropy": self.final_entropy,
            "u": self.u,
            "top": [[t.token_id, t.text, t.raw_prob, t.final_prob] for t in self.top],
            "forced": self.forced,
            "stop": self.stop,
        }

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> "StepRecord":
        """Inverse of `to_json`; raises KeyError/TypeError/ValueError on bad input."""
        top = tuple(
            TopToken(int(t[0]), str(t[1]), float(t[2]), float(t[3])) for t in data["top"]
        )
        stop = data.get("stop")
        if stop is not None and stop not in STOP_REASONS:
            raise ValueError(f"unknown stop reason {stop!r}")
        return cls(
            step=int(data["step"]),
            pane=int(data["pane"]),
            token_id=int(data["token_id"]),
            text=str(data["text"]),
            rank=int(data["rank"]),
            raw_prob=float(data["raw_prob"]),
            final_prob=float(data["final_prob"]),
            kept=int(data["kept"]),
            raw_entropy=float(data["raw_entropy"]),
            final_entropy=float(data["final_entropy"]),
            u=float(data["u"]),
            top=top,
            forced=bool(data.get("forced", False)),
            stop=stop,
        )


class IncrementalDecoder:
    """Turns a growing list of token ids into text pieces, one per token.

    Decoding token by token breaks characters that span several byte-level tokens
    (an emoji, most CJK text). The method below is common practice in serving code
    (no single source): decode a short window ending at the new token, subtract the
    window decoded without it, and hold the piece back while it ends in U+FFFD (an
    incomplete UTF-8 sequence).
    """

    def __init__(self, decode: Callable[[Sequence[int]], str], context: Sequence[int] = ()) -> None:
        self._decode = decode
        self._ids: list[int] = list(context[-6:])  # a little context for leading-space rules
        self._prefix = 0  # window start
        self._read = len(self._ids)  # ids before this are already emitted

    def push(self, token_id: int) -> str:
        """Add one token and return the text it completes ("" while a character is split)."""
        self._ids.append(token_id)
        before = self._decode(self._ids[self._prefix : self._read])
        after = self._decode(self._ids[self._prefix :])
        if after.endswith("\ufffd") and len(self._ids) - self._read < 6:
            return ""  # wait for the rest of the character (at most a few bytes)
        piece = after[len(before) :] if after.startswith(before) else after
        self._prefix, self._read = self._read, len(self._ids)
        return piece

    def copy(self) -> "IncrementalDecoder":
        clone = IncrementalDecoder(self._decode)
        clone._ids, clone._prefix, clone._read = list(self._ids), self._prefix, self._read
        return clone
