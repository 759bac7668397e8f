"""The lockstep engine: one model, one prompt, up to eight panes decoding side by side.

Each step runs ONE batched forward pass for all live panes (a batch row and a KV-cache
row per pane). The prompt is prefilled once and its cache copied to every row. All live
panes always hold the same number of tokens, so no padding is ever needed; a pane that
stops leaves the batch and its cache row is parked, so that a rewind can bring it back.

Draws are inverse-CDF draws of one uniform number per pane and step. The number is a
pure function of (seed, stream, step): with shared draws (the default) every pane reads
stream 0 at a step (common random numbers), so differences between panes come from the
recipes, and a rewind or a forced token replays the same numbers.

Threads: one thread steps; any number may read. Every mutation holds `self._lock`;
`view()` hands out immutable snapshots.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass, field, replace
from typing import Callable, Sequence

import numpy as np
import torch

from tui.decoding import Recipe, Sampler, StageResult
from tui.model.forward import Runner
from tui.model.kv import KV
from tui.session.change_log import ChangeLog
from tui.session.record import TOP_N, IncrementalDecoder, StepRecord, TopToken
from tui.session.row_step import Emitted, RawStep, StopRules, emit, rank_of, top_ids
from tui.session.scenario import MAX_PANES, PaneSpec
from tui.session.views import EngineError, PaneView, SessionView

DecodeFn = Callable[[Sequence[int]], str]
LOGITS_KEPT = 48  # recent steps whose logits stay in memory, per pane (196 KB each at V=49152)


@dataclass
class Pane:
    """One pane's live state. Owned by the engine; readers get `PaneView`s."""

    id: int
    name: str
    recipe: Recipe
    sampler: Sampler
    seed: int | None
    stream: int  # which draw stream this pane reads when draws are not shared
    records: list[StepRecord] = field(default_factory=list)
    samplers: list[tuple[Recipe, Sampler]] = field(default_factory=list)  # before each step
    forced_next: int | None = None
    decoder: IncrementalDecoder | None = None  # rebuilt lazily after a rewind
    recipe_log: ChangeLog[str] = field(default_factory=ChangeLog)  # (from step, recipe)
    origin: tuple[int, int] | None = None  # (source pane id, step) for a fork

    @property
    def tokens(self) -> list[int]:
        return [r.token_id for r in self.records]

    @property
    def stop(self) -> str | None:
        return self.records[-1].stop if self.records else None


class Engine:
    """A decoding session on one model and prompt. See the module docstring."""

    def __init__(self, runner: Runner, decode: DecodeFn, prompt_ids: Sequence[int],
                 panes: Sequence[PaneSpec], *, seed: int = 0, shared_draws: bool = True,
                 max_new_tokens: int = 120, stop_strings: Sequence[str] = (),
                 eos_ids: Sequence[int] = (), max_context: int = 2048,
                 streams: Sequence[int] | None = None) -> None:
        """`streams`: each pane's draw stream when draws are not shared (default: its id);
        a re-run gives the original ids, so that its draws are the original ones."""
        if not prompt_ids:
            raise EngineError("the prompt is empty: give at least one token")
        if not 1 <= len(panes) <= MAX_PANES:
            raise EngineError(f"a session has 1 to {MAX_PANES} panes, got {len(panes)}")
        if len(prompt_ids) >= max_context:
            raise EngineError(f"the prompt has {len(prompt_ids)} tokens; the model's context "
                              f"holds {max_context}")
        self.runner = runner
        self._decode = decode
        self.prompt_ids: tuple[int, ...] = tuple(prompt_ids)
        self.seed = seed
        self._draw_log: ChangeLog[bool] = ChangeLog(((0, shared_draws),))  # (from step, shared)
        self.max_new_tokens = max_new_tokens
        self.stop_strings = tuple(stop_strings)
        self.eos_ids = frozenset(eos_ids)
        self.max_context = max_context
        self._stops = StopRules(self.eos_ids, self.stop_strings, max_new_tokens, max_context)
        self._lock = threading.RLock()
        self._next_id = 0
        self._panes: list[Pane] = []
        self._token_text: dict[int, str] = {}
        self._logits: OrderedDict[tuple[int, int], np.ndarray] = OrderedDict()
        # The prompt is prefilled once; every row starts from this cache.
        self._prompt_kv, prompt_logits = runner.prefill([self.prompt_ids])
        self._prompt_logits = prompt_logits[0]
        for i, spec in enumerate(panes):
            stream = None if streams is None else streams[i]
            self._panes.append(self._new_pane(spec.name, Recipe.parse(spec.recipe), spec.seed, stream))
        self._live: list[int] = [p.id for p in self._panes]  # pane ids in batch-row order
        self._kv: KV = self._prompt_kv.select([0] * len(self._live))
        self._pending = self._prompt_logits.unsqueeze(0).repeat(len(self._live), 1)  # (B, V)
        self._parked: dict[int, KV] = {}  # stopped panes' cache rows, for rewinds

    # ----- reading ---------------------------------------------------------------

    @property
    def shared_draws(self) -> bool:
        """Whether the panes share one uniform number per step now (the draw log's last entry)."""
        return self._draw_log.entries[-1][1]

    @property
    def step_index(self) -> int:
        """The lockstep position: tokens held by every live pane (or the longest pane)."""
        with self._lock:
            return max((len(p.records) for p in self._panes), default=0)

    def view(self) -> SessionView:
        with self._lock:
            panes = tuple(PaneView(p.id, p.name, str(p.recipe), p.seed, tuple(p.records), p.stop,
                                   p.recipe_log.entries, p.origin) for p in self._panes)
            return SessionView(self.step_index, self.seed, self.shared_draws, panes,
                               self._draw_log.entries)

    def pane(self, pane_id: int) -> Pane:
        for p in self._panes:
            if p.id == pane_id:
                return p
        raise EngineError(f"no pane with id {pane_id}")

    def history(self, pane_id: int, step: int) -> tuple[int, ...]:
        """The context before `step` in a pane: the prompt and the tokens it emitted."""
        with self._lock:
            return self.prompt_ids + tuple(self.pane(pane_id).tokens[:step])

    def logits_at(self, pane_id: int, step: int) -> np.ndarray:
        """The raw logits (V,) a pane saw at a step: kept for recent steps, else recomputed."""
        with self._lock:
            pane = self.pane(pane_id)
            if not 0 <= step <= len(pane.records):
                raise EngineError(f"pane {pane.name!r} has no step {step}")
            cached = self._logits.get((pane_id, step))
            if cached is not None:
                return cached
            context = self.history(pane_id, step)
            return self.runner.logits_of(context)[-1].numpy().astype(np.float32)

    def u_at(self, pane_id: int, step: int) -> float:
        """The uniform number a pane draws with at a step (a pure function of the seed)."""
        pane = self.pane(pane_id)
        shared = self._draw_log.at(step, self.shared_draws)
        if shared:
            key: tuple[int, ...] = (0, step)
            entropy = self.seed
        elif pane.seed is not None:
            key, entropy = (step,), pane.seed
        else:
            key, entropy = (1 + pane.stream, step), self.seed
        seq = np.random.SeedSequence(entropy=entropy, spawn_key=key)
        return float(np.random.Generator(np.random.PCG64(seq)).random())

    # ----- stepping ---------------------------------------------------------------

    def step(self) -> list[StepRecord]:
        """Emit one token in every live pane with one batched forward pass."""
        with self._lock:
            if not self._live:
                return []
            t = len(self.pane(self._live[0]).records)
            logits_np = self._pending.numpy()  # (B, V), float32
            raw = RawStep.of(logits_np)
            emitted: list[StepRecord] = []
            for row, pane_id in enumerate(self._live):
                pane = self.pane(pane_id)
                history = self.prompt_ids + tuple(pane.tokens)
                pane.samplers.append((pane.recipe, pane.sampler.copy()))
                u = self.u_at(pane_id, t)
                out = emit(pane.sampler, logits_np[row], history, u, pane.forced_next)
                pane.forced_next = None
                rec = self._record(pane, t, out, u, raw.logp[row], raw.probs[row],
                                   float(raw.entropy[row]))
                pane.records.append(rec)
                emitted.append(rec)
                self._remember_logits(pane_id, t, logits_np[row])
            self._advance([r.token_id for r in emitted])
            return emitted

    def _record(self, pane: Pane, t: int, out: Emitted, u: float, logp: np.ndarray,
                raw: np.ndarray, raw_entropy: float) -> StepRecord:
        token, final = out.token, out.final
        piece = self._decoder_for(pane).push(token)
        stop = self._stops.ending(token, t, len(self.prompt_ids), self._tail(pane) + piece)
        return StepRecord(
            step=t, pane=pane.id, token_id=token, text=piece, rank=rank_of(logp, token),
            raw_prob=float(raw[token]), final_prob=float(final[token]),
            kept=out.kept, raw_entropy=raw_entropy, final_entropy=out.final_entropy, u=u,
            top=tuple(TopToken(i, self._text_of(i), float(raw[i]), float(final[i]))
                      for i in top_ids(logp, TOP_N)),
            forced=out.forced, stop=stop)

    def _advance(self, tokens: list[int]) -> None:
        """Feed the emitted tokens; stopped panes leave the batch (their rows are parked)."""
        keep = [r for r, pid in enumerate(self._live) if self.pane(pid).stop is None]
        for r, pid in enumerate(self._live):
            if r not in keep:
                self._parked[pid] = self._kv.select([r])
        if len(keep) != len(self._live):
            self._kv = self._kv.select(keep) if keep else KV(())
            self._live = [self._live[r] for r in keep]
            tokens = [tokens[r] for r in keep]
        if self._live:
            self._kv, self._pending = self.runner.step(self._kv, tokens)
        else:
            self._pending = self._pending[:0]

    # ----- changing the session -------------------------------------------------------

    def rewind(self, step: int) -> None:
        """Go back to `step` tokens in every pane; panes that stopped later run again."""
        with self._lock:
            if not 0 <= step <= self.step_index:
                raise EngineError(f"cannot rewind to step {step}: the session is at {self.step_index}")
            rows: dict[int, KV] = {pid: self._kv.select([r]) for r, pid in enumerate(self._live)}
            rows.update(self._parked)
            self._parked = {}
            live: list[int] = []
            for pane in self._panes:
                if len(pane.records) > step or (len(pane.records) == step and pane.stop is None):
                    if len(pane.records) > step:
                        recipe, sampler = pane.samplers[step]
                        # A recipe changed since that step applies from `step` now, afresh.
                        pane.sampler = sampler if recipe == pane.recipe else pane.recipe.sampler()
                    if pane.origin is not None and pane.origin[1] > step:
                        pane.origin = (pane.origin[0], step)
                    del pane.records[step:]
                    del pane.samplers[step:]
                    pane.forced_next = None
                    pane.decoder = None
                    pane.recipe_log = pane.recipe_log.rewound(step)
                    live.append(pane.id)
                else:
                    self._parked[pane.id] = rows[pane.id]  # stopped before `step`: stays stopped
            self._draw_log = self._draw_log.rewound(step)
            for key in [k for k in self._logits if k[1] > step]:
                del self._logits[key]
            self._rebuild(live, {pid: rows[pid] for pid in live}, step)

    def _rebuild(self, live: list[int], rows: dict[int, KV], step: int) -> None:
        """Make the batch of `live` panes at `step`: crop their rows and re-feed one token."""
        self._live = live
        if not live:
            self._kv, self._pending = KV(()), self._pending[:0]
            return
        if step == 0:
            self._kv = self._prompt_kv.select([0] * len(live))
            self._pending = self._prompt_logits.unsqueeze(0).repeat(len(live), 1)
            return
        end = len(self.prompt_ids) + step - 1  # keep all but the last token, then feed it
        kv = KV.join([rows[pid].crop(end) for pid in live])
        last = [self.pane(pid).records[step - 1].token_id for pid in live]
        self._kv, self._pending = self.runner.step(kv, last)

    def fork(self, pane_id: int, recipe: Recipe | str, name: str | None = None, *,
             stream: int | None = None, at: int | None = None) -> int:
        """A new pane that shares `pane_id`'s first `at` tokens (default: all of them) and
        decodes on with `recipe` (`stream`: its draw stream, as in `__init__`). Forked
        before the present step, it catches up at once, as `add_pane` does."""
        with self._lock:
            source = self.pane(pane_id)
            if len(self._panes) >= MAX_PANES:
                raise EngineError(f"a session holds at most {MAX_PANES} panes")
            step = len(source.records) if at is None else at
            if not 0 <= step <= len(source.records):
                raise EngineError(f"pane {source.name!r} has no step {step} to fork at")
            if step == len(source.records) and pane_id not in self._live:
                raise EngineError(f"pane {source.name!r} has stopped ({source.stop}); rewind "
                                  "before its last step to fork it")
            recipe = Recipe.parse(recipe) if isinstance(recipe, str) else recipe
            pane = self._new_pane(name or f"{source.name} fork", recipe, None, stream)
            pane.origin = (pane_id, step)
            pane.recipe_log = source.recipe_log.set_from(step, str(recipe))
            pane.records = [replace(r, pane=pane.id) for r in source.records[:step]]
            pane.samplers = [(r, s.copy()) for r, s in source.samplers[:step]]
            self._panes.append(pane)
            for (pid, s), lg in list(self._logits.items()):
                if pid == pane_id and s < step:
                    self._logits[(pane.id, s)] = lg
            if step == len(source.records):  # at the present step: copy the row as it is
                row = self._live.index(pane_id)
                self._kv = KV.join([self._kv, self._kv.select([row])])
                self._pending = torch.cat([self._pending, self._pending[row:row + 1]])
                self._live.append(pane.id)
                return pane.id
            # Earlier: the source's row (a copy) cropped to the prefix, its last token fed.
            if step == 0:
                kv, pending = self._prompt_kv.select([0]), self._prompt_logits[None]
            else:
                held = (self._kv.select([self._live.index(pane_id)]) if pane_id in self._live
                        else self._parked[pane_id].select([0]))
                kv, pending = self.runner.step(held.crop(len(self.prompt_ids) + step - 1),
                                               [source.records[step - 1].token_id])
            self._catch_up(pane, kv, pending, self.step_index)
            return pane.id

    def add_pane(self, recipe: Recipe | str, name: str | None = None,
                 seed: int | None = None) -> int:
        """A new pane decoding from the prompt; it catches up to the present step at once."""
        with self._lock:
            if len(self._panes) >= MAX_PANES:
                raise EngineError(f"a session holds at most {MAX_PANES} panes")
            recipe = Recipe.parse(recipe) if isinstance(recipe, str) else recipe
            target = self.step_index
            pane = self._new_pane(name or f"pane {self._next_id}", recipe, seed)
            self._panes.append(pane)
            self._catch_up(pane, self._prompt_kv.select([0]), self._prompt_logits[None], target)
            return pane.id

    def _catch_up(self, pane: Pane, kv: KV, pending: torch.Tensor, target: int) -> None:
        """Step `pane` alone from its cache row to `target` tokens (with the same draws it
        would have had in the batch), then put it in the batch or park it."""
        saved = (self._live, self._kv, self._pending, self._parked)
        self._live, self._parked = [pane.id], {}
        self._kv, self._pending = kv, pending
        while pane.stop is None and len(pane.records) < target:
            self.step()
        own_kv, own_pending, own_parked = self._kv, self._pending, self._parked
        self._live, self._kv, self._pending, self._parked = saved
        if pane.stop is not None:
            self._parked.update(own_parked)
        elif self._live:
            self._kv = KV.join([self._kv, own_kv])
            self._pending = torch.cat([self._pending, own_pending])
            self._live.append(pane.id)
        else:  # every other pane had stopped: this one alone is the batch
            self._kv, self._pending, self._live = own_kv, own_pending, [pane.id]

    def remove_pane(self, pane_id: int) -> None:
        with self._lock:
            pane = self.pane(pane_id)
            if len(self._panes) == 1:
                raise EngineError("the last pane cannot be removed")
            if pane_id in self._live:
                row = self._live.index(pane_id)
                keep = [r for r in range(len(self._live)) if r != row]
                self._kv = self._kv.select(keep) if keep else KV(())
                self._pending = self._pending[keep]
                self._live.remove(pane_id)
            self._parked.pop(pane_id, None)
            self._panes.remove(pane)
            for key in [k for k in self._logits if k[0] == pane_id]:
                del self._logits[key]

    def set_recipe(self, pane_id: int, recipe: Recipe | str) -> None:
        """Decode with `recipe` from the next step on (earlier tokens stay as they are)."""
        with self._lock:
            pane = self.pane(pane_id)
            pane.recipe = Recipe.parse(recipe) if isinstance(recipe, str) else recipe
            pane.sampler = pane.recipe.sampler()
            step = len(pane.records)
            pane.recipe_log = pane.recipe_log.set_from(step, str(pane.recipe))

    def force(self, pane_id: int, step: int, token_id: int) -> None:
        """Rewind to `step` and make `pane_id` emit `token_id` there instead of its draw."""
        with self._lock:
            if not 0 <= token_id < self.runner.vocab_size:
                raise EngineError(f"token id {token_id} is outside the vocabulary")
            if step != self.step_index or pane_id not in self._live:
                self.rewind(step)
            pane = self.pane(pane_id)
            if pane.stop is not None or pane_id not in self._live:
                raise EngineError(f"pane {pane.name!r} has stopped before step {step}")
            pane.forced_next = token_id

    def restart(self, seed: int) -> None:
        """Back to the prompt with a new seed; recipes stay, stateful stages reset."""
        with self._lock:
            self.rewind(0)
            self.seed = seed
            self._draw_log = ChangeLog(((0, self.shared_draws),))  # the present setting, from the start
            for pane in self._panes:
                pane.sampler = pane.recipe.sampler()
            self._logits.clear()

    def set_prompt(self, prompt_ids: Sequence[int], *, max_new_tokens: int,
                   stop_strings: Sequence[str] = ()) -> None:
        """Restart every pane from a new prompt (and length limit and stop strings): the
        panes, their recipes, the seed and the draw setting stay; every token goes."""
        with self._lock:
            if not prompt_ids:
                raise EngineError("the prompt is empty: give at least one token")
            if len(prompt_ids) >= self.max_context:
                raise EngineError(f"the prompt has {len(prompt_ids)} tokens; the model's "
                                  f"context holds {self.max_context}")
            self.rewind(0)
            self.prompt_ids = tuple(prompt_ids)
            self.max_new_tokens = max_new_tokens
            self.stop_strings = tuple(stop_strings)
            self._stops = StopRules(self.eos_ids, self.stop_strings, max_new_tokens,
                                    self.max_context)
            self._prompt_kv, prompt_logits = self.runner.prefill([self.prompt_ids])
            self._prompt_logits = prompt_logits[0]
            self.restart(self.seed)  # fresh samplers, the draw log from the start
            self._rebuild(self._live, {}, 0)

    def set_shared_draws(self, shared: bool) -> None:
        """Takes effect from the next step on (the uniform numbers already drawn stay)."""
        with self._lock:
            self._draw_log = self._draw_log.set_from(self.step_index, shared)

    # ----- for the inspect view --------------------------------------------------------

    def trace_at(self, pane_id: int, step: int,
                 logits: np.ndarray | None = None) -> list[StageResult]:
        """The pane's recipe stage by stage at `step`, from the sampler state it had then.

        `logits` are that step's raw logits when the caller has them (an old step's cost
        a forward pass in `logits_at`); else they are found the same way."""
        with self._lock:
            pane = self.pane(pane_id)
            if not 0 <= step < len(pane.samplers):
                raise EngineError(f"pane {pane.name!r} has no step {step}")
            if logits is None:
                logits = self.logits_at(pane_id, step)
            _recipe, sampler = pane.samplers[step]
            return sampler.trace(logits, self.history(pane_id, step))

    def token_text(self, token_id: int) -> str:
        """One token decoded on its own (cached), e.g. for searching a whole distribution."""
        return self._text_of(token_id)

    # ----- helpers --------------------------------------------------------------------

    def _new_pane(self, name: str, recipe: Recipe, seed: int | None,
                  stream: int | None = None) -> Pane:
        pane = Pane(id=self._next_id, name=name, recipe=recipe, sampler=recipe.sampler(),
                    seed=seed, stream=self._next_id if stream is None else stream,
                    recipe_log=ChangeLog(((0, str(recipe)),)))
        self._next_id += 1
        return pane

    def _decoder_for(self, pane: Pane) -> IncrementalDecoder:
        if pane.decoder is None:  # replay the pane's tokens once after a rewind or fork
            pane.decoder = IncrementalDecoder(self._decode, self.prompt_ids)
            for tok in pane.tokens:
                pane.decoder.push(tok)
        return pane.decoder

    def _tail(self, pane: Pane) -> str:
        """Enough of the pane's recent text to find any stop string ending in the next piece."""
        need = self._stops.span
        parts: list[str] = []
        size = 0
        for rec in reversed(pane.records):
            if size >= need:
                break
            parts.append(rec.text)
            size += len(rec.text)
        return "".join(reversed(parts))

    def _text_of(self, token_id: int) -> str:
        text = self._token_text.get(token_id)
        if text is None:
            text = self._token_text[token_id] = self._decode([token_id])
        return text

    def _remember_logits(self, pane_id: int, step: int, logits: np.ndarray) -> None:
        self._logits[(pane_id, step)] = logits.copy()
        limit = LOGITS_KEPT * max(1, len(self._panes))
        while len(self._logits) > limit:
            self._logits.popitem(last=False)

