"""The shared row step (`tui.session.row_step`) and change log (`tui.session.change_log`).

References: scipy 1.17's `scipy.special.log_softmax` and `scipy.stats.entropy` for the
raw distribution; worked examples for ranks, stop rules and change logs (common
practice, no source).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import log_softmax
from scipy.stats import entropy

from tui.decoding import Recipe
from tui.session.change_log import ChangeLog
from tui.session.record import STOP_CONTEXT, STOP_EOS, STOP_LENGTH, STOP_STRING
from tui.session.row_step import RawStep, StopRules, emit, rank_of, top_ids


def test_raw_step_matches_scipy_on_large_and_peaked_logits():
    rng = np.random.default_rng(3)
    logits = np.stack([rng.normal(0, 4, 500), rng.normal(0, 4, 500) + 900.0,
                       np.r_[50.0, np.full(499, -50.0)]]).astype(np.float32)
    raw = RawStep.of(logits)
    ref = log_softmax(logits.astype(np.float64), axis=-1)
    assert np.allclose(raw.logp, ref, atol=1e-12)
    assert np.allclose(raw.probs.sum(-1), 1.0)
    assert np.allclose(raw.entropy, entropy(np.exp(ref), axis=-1), atol=1e-12)
    assert all(math.copysign(1.0, h) > 0 for h in raw.entropy)  # never -0.0


def test_a_one_hot_final_distribution_has_entropy_plus_zero():
    out = emit(Recipe.parse("greedy").sampler(), np.array([0.0, 3.0, 1.0], np.float32), [], 0.5)
    assert out.token == 1 and out.kept == 1
    assert out.final_entropy == 0.0 and math.copysign(1.0, out.final_entropy) > 0


def test_a_forced_token_is_taken_and_marked():
    out = emit(Recipe.parse("top_k=1").sampler(), np.array([0.0, 3.0, 1.0], np.float32), [], 0.5,
               forced=2)
    assert (out.token, out.forced, out.final[2]) == (2, True, 0.0)


def test_rank_breaks_ties_by_lower_id_and_top_ids_agree():
    logp = np.log(np.array([0.1, 0.3, 0.3, 0.2, 0.1]))
    assert [rank_of(logp, t) for t in range(5)] == [4, 1, 2, 3, 5]
    assert top_ids(logp, 3) == [1, 2, 3]
    assert top_ids(logp, 9) == [1, 2, 3, 0, 4]


@pytest.mark.parametrize("token, step, text, expected", [
    (7, 0, "", STOP_EOS),            # end of sequence wins over everything
    (1, 0, "the end.", STOP_STRING),
    (1, 9, "", STOP_LENGTH),         # the 10th token of max_new_tokens=10
    (1, 4, "", STOP_CONTEXT),        # prompt 15 + 5 tokens = max_context 20
    (1, 3, "", None),
])
def test_stop_rules(token, step, text, expected):
    rules = StopRules(frozenset({7}), ("end.",), max_new_tokens=10, max_context=20)
    assert rules.ending(token, step, 15, text) == expected
    assert rules.span == 4


def test_change_log_rules():
    log = ChangeLog(((0, "a"), (5, "b")))
    assert [log.at(s, "-") for s in (0, 4, 5, 9)] == ["a", "a", "b", "b"]
    assert log.set_from(3, "c").entries == ((0, "a"), (3, "c"))       # the planned change gives way
    assert log.set_from(5, "c").entries == ((0, "a"), (5, "c"))
    assert log.rewound(2).entries == ((0, "a"), (2, "b"))             # later changes take effect at 2
    assert ChangeLog(((0, "a"), (4, "b"), (6, "c"))).rewound(3).entries == ((0, "a"), (3, "c"))
    assert log.after(0) == {5: "b"} and log.starting_at(5) == "b" and log.starting_at(1) is None
