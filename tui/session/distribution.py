"""One step's whole distribution, for the inspect view: every rank, the kept set, search.

A `StepRecord` keeps the TOP_N most likely raw tokens (see `record.py`); a transcript
stores no more. A live session can recompute the step's logits (the engine keeps or
recomputes them), so `from_trace` holds the whole vocabulary in raw order with each
token's final probability: any rank can be paged to, the kept set listed in full, and
tokens found by their text. `from_record` is what a replay has: the stored list alone
(`complete` False), and the view says so. Numpy only, no Textual.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from tui.decoding import StageResult
from tui.session.record import StepRecord
from tui.session.step_analysis import TopRow, top_row, top_rows

KEPT_LIST_LIMIT = 5000  # rows listed for "the whole kept set" (a note says when more)


@dataclass(frozen=True)
class StepDistribution:
    """Raw and final probabilities of one step, tokens in raw order (ties by token id)."""

    record: StepRecord
    order: np.ndarray  # (V,) token ids by raw rank; rank r is order[r - 1]
    raw: np.ndarray  # (V,) raw probabilities by token id
    final: np.ndarray  # (V,) final probabilities by token id
    trace: tuple[StageResult, ...] | None  # for "cut by"; None when not known
    complete: bool  # False: only the stored top list (a replay)

    @classmethod
    def from_trace(cls, record: StepRecord, logits: np.ndarray,
                   trace: Sequence[StageResult]) -> "StepDistribution":
        """The whole vocabulary: raw = softmax of the logits, final = the trace's last stage."""
        logits = np.asarray(logits, dtype=np.float64)
        finite = np.isfinite(logits)
        raw = np.zeros_like(logits)
        shifted = np.where(finite, logits - logits[finite].max(), -np.inf)
        raw[finite] = np.exp(shifted[finite])
        raw /= raw.sum()
        final = np.asarray(trace[-1].probs, dtype=np.float64)
        ids = np.arange(len(raw))
        order = np.lexsort((ids, -raw))  # descending raw, ties by the lower id (as `rank`)
        return cls(record, order, raw, final, tuple(trace), True)

    @classmethod
    def from_record(cls, record: StepRecord) -> "StepDistribution":
        """The stored top list alone (and the chosen token when it is off the list)."""
        ids = [t.token_id for t in record.top]
        raw = {t.token_id: t.raw_prob for t in record.top}
        final = {t.token_id: t.final_prob for t in record.top}
        raw.setdefault(record.token_id, record.raw_prob)
        final.setdefault(record.token_id, record.final_prob)
        size = max([*raw, 0]) + 1
        raw_a, final_a = np.zeros(size), np.zeros(size)
        for token, p in raw.items():
            raw_a[token], final_a[token] = p, final[token]
        return cls(record, np.array(ids, dtype=np.int64), raw_a, final_a, None, False)

    @property
    def size(self) -> int:
        """How many ranks can be listed (the vocabulary, or the stored list)."""
        return len(self.order)

    @property
    def kept(self) -> int:
        return int(np.count_nonzero(self.final > 0)) if self.complete else self.record.kept

    def rows(self, count: int, texts: Callable[[int], str]) -> tuple[TopRow, ...]:
        """Ranks 1..count, and the chosen token's row after them when it is further down."""
        if not self.complete:
            return top_rows(self.record)
        ids = self.order[:count]
        rows = self._rows(ids, 1, texts)
        if self.record.token_id not in set(ids.tolist()):
            rows += (self._row(self.record.rank, self.record.token_id, texts, None),)
        return rows

    def kept_rows(self, texts: Callable[[int], str],
                  limit: int = KEPT_LIST_LIMIT) -> tuple[TopRow, ...]:
        """Every token of the final distribution's support, in raw order (at most `limit`)."""
        if not self.complete:
            return tuple(r for r in top_rows(self.record) if r.kept)
        ranks = np.flatnonzero(self.final[self.order] > 0)[:limit]
        return tuple(self._row(int(r) + 1, int(self.order[r]), texts, self._cum(int(r)))
                     for r in ranks)

    def search(self, query: str, texts: Callable[[int], str],
               limit: int = 200) -> tuple[TopRow, ...]:
        """Tokens whose text contains `query` (case-folded), best raw rank first."""
        needle = query.casefold()
        if not needle:
            return ()
        if not self.complete:
            return tuple(r for r in top_rows(self.record) if needle in r.text.casefold())
        found: list[TopRow] = []
        for rank0, token in enumerate(self.order.tolist()):
            if needle in texts(token).casefold():
                found.append(self._row(rank0 + 1, token, texts, self._cum(rank0)))
                if len(found) >= limit:
                    break
        return tuple(found)

    def rank_of(self, token_id: int) -> int | None:
        hits = np.flatnonzero(self.order == token_id)
        return int(hits[0]) + 1 if len(hits) else None

    # ----- rows ----------------------------------------------------------------------------

    def _cum(self, rank0: int) -> float:
        return float(self.raw[self.order[: rank0 + 1]].sum())

    def _rows(self, ids: np.ndarray, first_rank: int,
              texts: Callable[[int], str]) -> tuple[TopRow, ...]:
        cums = np.cumsum(self.raw[self.order[: first_rank - 1 + len(ids)]])[first_rank - 1:]
        return tuple(self._row(first_rank + i, int(t), texts, float(c))
                     for i, (t, c) in enumerate(zip(ids, cums)))

    def _row(self, rank: int, token: int, texts: Callable[[int], str],
             cum: float | None) -> TopRow:
        return top_row(rank, token, texts(token), float(self.raw[token]),
                       float(self.final[token]), cum, token == self.record.token_id,
                       self.trace)
