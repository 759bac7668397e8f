"""Each shipped scenario's claim (its README line), checked on the embedded model.

The README table of scenarios says what each one shows; these tests run the scenario
with its own seed on SmolLM2-135M-Instruct (loaded once for the module) for a few
steps and check exactly that claim. Definitions used, with their sources:
- rank 1 is the raw distribution's most likely token; "cut" means its final
  (truncated) probability is 0 (the kept set, as in Holtzman et al. 2020 for top-p);
- typical sampling may leave the most likely token out (Meister et al. 2023:
  the kept set is ordered by |-log p - H|, not by p), top-p never does (its kept set
  is a prefix of the tokens sorted by probability, Holtzman et al. 2020, sec. 3.1);
- min-p keeps p >= min_p * p_max (Nguyen et al. 2024), so at p_max >= 0.5 and
  min_p = 0.1 it keeps at most 11 tokens: no rank above 11 can be drawn there;
- eta's threshold min(epsilon, sqrt(epsilon) * exp(-H)) (Hewitt et al. 2022) falls
  as the entropy H rises, where epsilon sampling's stays fixed;
- mirostat adjusts its cut mu after every step toward the target surprise tau (Basu et
  al. 2021, Alg. 1), so its kept-set size moves from step to step;
- the repetition penalty divides the logit of every token already in the context,
  the prompt included (Keskar et al. 2019, CTRL, sec. 4.1).
"""

from __future__ import annotations


import pytest

from tui.session.opening import open_session
from tui.session.scenario import find_scenario, load_scenario

pytestmark = pytest.mark.realmodel


@pytest.fixture(scope="module")
def lm(embedded_model):
    return embedded_model


def panes_after(lm, name: str, steps: int) -> dict:
    """The scenario's panes by name after `steps` steps (its own seed)."""
    engine, _ = open_session(lm, load_scenario(find_scenario(name)))
    for _ in range(steps):
        if not engine.step():
            break
    return {p.name: p for p in engine.view().panes}


def top_cut(record) -> bool:
    """The raw distribution's most likely token is out of the pane's kept set."""
    return record.top[0].final_prob == 0.0


def test_harbour_town_wide_top_k_lets_poor_tokens_in_on_peaked_steps_min_p_does_not(lm):
    panes = panes_after(lm, "harbour-town", 20)

    def poor_on_peaked(pane) -> list[int]:  # steps where p_max >= 0.5 and rank > 11 was drawn
        return [r.step for r in pane.records if r.top[0].raw_prob >= 0.5 and r.rank > 11]

    assert poor_on_peaked(panes["hot, wide top-k"])
    assert poor_on_peaked(panes["hot, min-p"]) == []


def test_tea_shop_typical_cuts_the_most_likely_token_top_p_never_does(lm):
    panes = panes_after(lm, "tea-shop", 10)
    wide, narrow, typical = panes["top-p 0.95"], panes["top-p 0.5"], panes["typical 0.5"]
    # step 0: the same context in every pane, so the kept sets compare directly
    assert wide.records[0].kept >= 10 * narrow.records[0].kept
    assert top_cut(typical.records[0])
    assert sum(top_cut(r) for r in typical.records) >= 3
    assert not any(top_cut(r) for p in (wide, narrow) for r in p.records)


def test_planet_question_eta_cut_moves_with_the_entropy_more_than_epsilon(lm):
    panes = panes_after(lm, "planet-question", 40)
    eta = [r.kept for r in panes["eta 0.0009"].records]
    eps = [r.kept for r in panes["epsilon 0.0003"].records]
    assert min(eta) < min(eps) and max(eta) > max(eps)
    # mirostat moves its cut every step to hold the surprise near tau (Basu et al. 2021)
    miro = [r.kept for r in panes["mirostat tau 3"].records]
    assert max(miro) >= 10 * min(miro)


def test_captain_name_a_repetition_penalty_garbles_the_name_the_prompt_gave(lm):
    panes = panes_after(lm, "captain-name", 12)
    assert "Ysolde Marrowick" in panes["greedy"].text
    assert "Ysolde Marrowick" in panes["presence 1.5"].text
    garbled = panes["repetition 1.5"].text
    assert "Marrowick" not in garbled and "Ysolde" not in garbled
