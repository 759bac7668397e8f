"""The re-run check: decode a stored session again and compare it token by token.

Everything needed is in the transcript's header: the model, the prompt's token ids,
every pane's recipe with its changes (`recipe_log`), its seed and fork origin, the
session seed and the draw setting with its changes (`draw_log`); forced tokens are marked
on their records. The engine's draws are a pure function of (seed, stream, step), so the
same model and libraries give the same tokens. The walk follows the file step by step: forks are
made at their step, recipe changes applied at theirs, forced tokens forced again.

A pane added mid-session (no fork origin) is run from the start, which is what the
engine's `add_pane` does too.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from tui.errors import UserError
from tui.session.change_log import ChangeLog
from tui.session.record import StepRecord
from tui.session.scenario import PaneSpec
from tui.transcripts.headers import PaneHeader, TranscriptHeader, package_versions
from tui.transcripts.reader import StoredSession

if TYPE_CHECKING:
    from tui.model.catalogue import LoadedModel
    from tui.session.engine import Engine


@dataclass(frozen=True)
class Difference:
    """The first place where the re-run and the file disagree."""

    step: int
    pane: PaneHeader
    stored: StepRecord | None  # None: the file has no record here (the pane had stopped)
    fresh: StepRecord | None  # None: the re-run made no record here


@dataclass(frozen=True)
class RerunResult:
    steps: int  # steps compared
    records: int  # records compared
    difference: Difference | None
    prompt_note: str | None  # set when today's tokenizer encodes the prompt differently
    versions_then: dict[str, str]
    versions_now: dict[str, str]

    @property
    def identical(self) -> bool:
        return self.difference is None


def recipe_at_start(pane: PaneHeader) -> str:
    """The recipe a pane decoded its first own step with (step 0, or its fork step)."""
    first = pane.origin[1] if pane.origin else 0
    at = ChangeLog(pane.recipe_log).starting_at(first)
    return pane.recipe if at is None else at


def _changes(pane: PaneHeader) -> dict[int, str]:
    """Recipe changes after the pane's first own step: step -> recipe."""
    return ChangeLog(pane.recipe_log).after(pane.origin[1] if pane.origin else 0)


def build_engine(head: TranscriptHeader, lm: "LoadedModel", where: str = "<transcript>"
                 ) -> tuple["Engine", dict[int, int]]:
    """An engine holding the panes that decode from the prompt; header id -> engine id.

    `where` names the file in errors."""
    from tui.session.engine import Engine
    from tui.session.views import EngineError

    starters = [p for p in head.panes if p.origin is None]
    if not starters:
        raise UserError(f"{where}: panes: no pane starts from the prompt (every one is a fork)")
    runner = lm.runner()
    outside = [i for i in head.prompt_ids if i >= runner.vocab_size]
    if outside:  # a model's embedding lookup would fail on it (or torch on a huge one)
        raise UserError(f"{where}: prompt.ids: token id {outside[0]} is outside the vocabulary "
                        f"of {lm.name} (0..{runner.vocab_size - 1})")
    specs = [PaneSpec(p.name, recipe_at_start(p), p.seed) for p in starters]
    try:
        engine = Engine(runner, lm.decode, head.prompt_ids, specs, seed=head.seed,
                        shared_draws=head.draw_log[0][1] if head.draw_log else head.shared_draws,
                        max_new_tokens=head.max_new_tokens,
                        stop_strings=head.stop, eos_ids=lm.eos_ids, max_context=lm.max_context,
                        streams=[p.id for p in starters])  # the draw stream follows the original id
    except EngineError as exc:
        raise UserError(f"{where}: cannot re-run: {exc}") from None
    return engine, {pane.id: live.id for pane, live in zip(starters, engine.view().panes)}


def rerun(stored: StoredSession, lm: "LoadedModel") -> RerunResult:
    """Decode `stored` again on `lm` and return the first difference, if any."""
    from tui.session.views import EngineError

    head = stored.header
    where = str(stored.path)
    engine, ids = build_engine(head, lm, where)
    forks = [(p, p.origin) for p in sorted(head.panes, key=lambda p: p.id) if p.origin]
    back = {live: own for own, live in ids.items()}  # engine pane id -> header pane id
    changes = {p.id: _changes(p) for p in head.panes}
    draw_changes = ChangeLog(head.draw_log).after(0)
    compared = steps = 0
    difference = None
    try:
        for t, recs in stored.iter_steps():
            for pane, (origin, at) in forks:
                if at != t:
                    continue
                source = ids.get(origin)
                if source is None:
                    raise UserError(f"{where}: pane {pane.id}: origin: forked from pane "
                                    f"{origin}, which does not exist at step {t}")
                ids[pane.id] = engine.fork(source, recipe_at_start(pane), pane.name, stream=pane.id)
                back[ids[pane.id]] = pane.id
            if t in draw_changes:
                engine.set_shared_draws(draw_changes[t])
            for pane in head.panes:
                if pane.id in ids and t in changes[pane.id]:
                    engine.set_recipe(ids[pane.id], changes[pane.id][t])
                rec = recs.get(pane.id)
                if rec is not None and rec.forced and pane.id in ids:
                    engine.force(ids[pane.id], t, rec.token_id)
            fresh = {back[r.pane]: r for r in engine.step()}
            steps += 1
            for pane in head.panes:
                if pane.id not in ids:  # a fork enters at its origin step
                    continue
                s, f = recs.get(pane.id), fresh.get(pane.id)
                if s is None and f is None:
                    continue
                compared += 1
                if s is None or f is None or s.token_id != f.token_id or s.stop != f.stop:
                    difference = Difference(t, pane, s, f)
                    break
            if difference:
                break
    except EngineError as exc:
        raise UserError(f"{where}: cannot re-run: {exc}") from None
    return RerunResult(steps, compared, difference, _prompt_note(head, lm), dict(head.versions),
                       package_versions())


def _prompt_note(head: TranscriptHeader, lm: "LoadedModel") -> str | None:
    messages = None if head.messages is None else [{"role": r, "content": c}
                                                   for r, c in head.messages]
    try:
        ids = tuple(lm.encode_prompt(head.prompt_text if messages is None else None, messages))
    except UserError as exc:
        return f"today's tokenizer cannot encode the stored prompt ({exc}); the stored ids were used"
    if ids != head.prompt_ids:
        return ("today's tokenizer encodes the stored prompt differently; the stored token "
                "ids were used")
    return None


# ----- telling the result ----------------------------------------------------------------

def _token(rec: StepRecord | None) -> str:
    if rec is None:
        return "no token (the pane had stopped)"
    stop = f", then stopped: {rec.stop}" if rec.stop else ""
    return (f"token {rec.token_id} {rec.text!r} (rank {rec.rank}, p={rec.raw_prob:.4f}"
            f"{', forced' if rec.forced else ''}{stop})")


def _top5(rec: StepRecord | None) -> str:
    if rec is None:
        return "-"
    return "  ".join(f"{t.token_id} {t.text!r} {t.raw_prob:.4f}" for t in rec.top[:5])


def describe(result: RerunResult, path: str, model: str) -> list[str]:
    """The lines `logitfork rerun` prints."""
    out = []
    if result.prompt_note:
        out.append(f"note: {result.prompt_note}")
    d = result.difference
    if d is None:
        out.append(f"identical: a re-run on {model} matches {path}, token for token "
                   f"({result.records} tokens over {result.steps} steps)")
        return out
    out.append(f"different: {path} and a re-run on {model} first differ at step {d.step}, "
               f"pane {d.pane.id} {d.pane.name!r} ({d.pane.recipe})")
    out.append(f"  file:  {_token(d.stored)}")
    out.append(f"  now:   {_token(d.fresh)}")
    out.append(f"  file top-5:  {_top5(d.stored)}")
    out.append(f"  now top-5:   {_top5(d.fresh)}")
    out.append("  package versions (file -> now):")
    for name in sorted(set(result.versions_then) | set(result.versions_now)):
        then, now = result.versions_then.get(name, "?"), result.versions_now.get(name, "?")
        mark = "" if then == now else "   <- changed"
        out.append(f"    {name}: {then} -> {now}{mark}")
    return out
