"""Running a sweep through the model: many (recipe, sample) rows per forward pass.

For each prompt the rows are every (recipe, sample) pair, recipe by recipe; they are
saved in chunks of `chunk_rows` rows (the unit of output, resume and shards), and a
chunk never spans two prompts. How many rows share a forward pass is the *batch*, a
property of the machine, not of the sweep: `plan_batches` puts consecutive chunks of
one prompt together up to `batch_rows` rows, and a chunk larger than that runs in
parts. The prompt is prefilled once and its cache copied into every row of a batch.
Within a batch the rows decode in lockstep, as the engine's panes do: every live row
holds the same number of tokens, so no padding is needed, and a row that has ended
leaves the batch. Memory is bounded by one batch: its cache rows and one (rows, V)
block of logits.

Draws are inverse-CDF draws (`tui.decoding.draw`). The uniform number of a row at
step t is the t-th number of a PCG64 stream seeded by numpy's SeedSequence from
(seed, prompt index, recipe text, sample index): a pure function of those and t, so
the samples do not depend on the chunking, on the batching, on which chunks ran
before, or on the order in which an interrupted sweep is resumed.

No rich, no Textual: the terminal table lives in `tui.sweeps.report`.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable, Collection, Protocol, Sequence

import numpy as np
import torch

from tui.decoding import Recipe, Sampler
from tui.model.kv import KV
from tui.session.record import IncrementalDecoder
from tui.session.row_step import StopRules, emit, log_softmax
from tui.sweeps.metrics import SampleRecord
from tui.sweeps.spec import DEFAULT_CHUNK_ROWS, samples_for

if TYPE_CHECKING:
    from tui.model.loaded import LoadedModel

DecodeFn = Callable[[Sequence[int]], str]
StepHook = Callable[[int, int], None]  # (rows that emitted a token, rows that ended this step)


class ForwardRunner(Protocol):
    """What the sweep needs of a forward path (`LoadedModel.runner()` gives one)."""

    def prefill(self, ids: Sequence[Sequence[int]]) -> tuple[KV, torch.Tensor]: ...

    def step(self, kv: KV, tokens: Sequence[int]) -> tuple[KV, torch.Tensor]: ...


@dataclass(frozen=True)
class Chunk:
    """One unit of output, resume and sharding: rows of one prompt, saved together."""

    index: int  # position among all chunks of the sweep, from 0
    prompt_index: int
    rows: tuple[tuple[int, int], ...]  # (recipe index, sample index), in row order


Batch = tuple[Chunk, ...]  # chunks of one prompt that share forward passes (`plan_batches`)


@dataclass(frozen=True)
class SweepJob:
    """A sweep resolved for one model: encoded prompts and canonical recipe texts."""

    prompt_ids: tuple[tuple[int, ...], ...]
    recipes: tuple[str, ...]
    samples: int
    max_new_tokens: int
    seed: int = 0
    chunk_rows: int = DEFAULT_CHUNK_ROWS
    stop: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if not self.prompt_ids or any(not p for p in self.prompt_ids):
            raise ValueError("sweep job: every prompt needs at least one token")
        if not self.recipes:
            raise ValueError("sweep job: no recipe")
        for name in ("samples", "max_new_tokens", "chunk_rows"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"sweep job: {name} must be an integer >= 1, got {value!r}")

    def pairs(self) -> list[tuple[int, int]]:
        """Every (recipe index, sample index) row of one prompt, recipe by recipe.

        A recipe that keeps one token (greedy) has one row per prompt (`samples_for`)."""
        return [(r, s) for r, recipe in enumerate(self.recipes)
                for s in range(samples_for(recipe, self.samples))]

    def rows_per_prompt(self) -> int:
        return len(self.pairs())

    def chunks(self) -> list[Chunk]:
        """Every chunk of the sweep, prompt by prompt; indices count from 0."""
        out: list[Chunk] = []
        pairs = self.pairs()
        for p in range(len(self.prompt_ids)):
            for start in range(0, len(pairs), self.chunk_rows):
                out.append(Chunk(len(out), p, tuple(pairs[start:start + self.chunk_rows])))
        return out


def plan_batches(chunks: Sequence[Chunk], batch_rows: int,
                 done: Collection[int] = frozenset()) -> list[Batch]:
    """`chunks` in forward batches: runs of consecutive chunks of one prompt whose rows fit
    in `batch_rows` together; a chunk with more rows than that is a batch alone (it runs
    in parts). The batches are planned over `chunks` whole and the chunks in `done` are
    left out after, so a resumed run with the same `batch_rows` runs the very batches
    of an uninterrupted one, whatever was written before."""
    if batch_rows < 1:
        raise ValueError(f"sweep batch: batch_rows must be >= 1, got {batch_rows}")
    batches: list[list[Chunk]] = []
    rows = 0
    for chunk in chunks:
        last = batches[-1] if batches else None
        if (last is not None and last[0].prompt_index == chunk.prompt_index
                and rows + len(chunk.rows) <= batch_rows):
            last.append(chunk)
            rows += len(chunk.rows)
        else:
            batches.append([chunk])
            rows = len(chunk.rows)
    kept = (tuple(c for c in batch if c.index not in done) for batch in batches)
    return [batch for batch in kept if batch]


def recipe_key(recipe: str) -> int:
    """A 64-bit integer naming a recipe text in the seed (sha256 of its UTF-8, first 8 bytes)."""
    return int.from_bytes(hashlib.sha256(recipe.encode("utf-8")).digest()[:8], "big")


def row_uniforms(seed: int, prompt_index: int, recipe: str, sample_index: int,
                 steps: int) -> np.ndarray:
    """The uniform numbers in [0, 1) a row draws with at steps 0..steps-1.

    Entry t does not depend on `steps` (a longer request extends the same stream).
    """
    seq = np.random.SeedSequence(entropy=seed,
                                 spawn_key=(prompt_index, recipe_key(recipe), sample_index))
    return np.random.Generator(np.random.PCG64(seq)).random(steps)


@dataclass(eq=False)
class _Row:
    """One sample being written (mutable, owned by `SweepRunner.run_rows`)."""

    recipe: str
    sample_index: int
    sampler: Sampler
    uniforms: np.ndarray
    decoder: IncrementalDecoder
    tokens: list[int] = field(default_factory=list)
    logprobs: list[float] = field(default_factory=list)
    kept: list[int] = field(default_factory=list)
    entropies: list[float] = field(default_factory=list)
    tail: str = ""  # the last characters written, enough to find a stop string
    ending: str | None = None


class SweepRunner:
    """Decodes a `SweepJob`'s chunks, many rows per batched forward pass."""

    def __init__(self, runner: ForwardRunner, decode: DecodeFn, job: SweepJob, *,
                 eos_ids: Sequence[int], max_context: int) -> None:
        for p, ids in enumerate(job.prompt_ids):
            if len(ids) >= max_context:
                raise ValueError(f"prompt {p + 1} has {len(ids)} tokens; the model's context "
                                 f"holds {max_context}")
        self.runner = runner
        self.job = job
        self._decode = decode
        self._stops = StopRules(frozenset(int(e) for e in eos_ids), job.stop,
                                job.max_new_tokens, max_context)
        self._recipes = [Recipe.parse(r) for r in job.recipes]
        self._prefilled: tuple[int, KV, torch.Tensor] | None = None  # the last prompt's

    @classmethod
    def for_model(cls, lm: "LoadedModel", job: SweepJob) -> "SweepRunner":
        """The runner on a loaded model's forward path, stop tokens and context."""
        return cls(lm.runner(), lm.decode, job, eos_ids=lm.eos_ids, max_context=lm.max_context)

    def prompt_state(self, prompt_index: int) -> tuple[KV, torch.Tensor]:
        """The prompt's cache (1 row) and next-token logits (V,), prefilled once."""
        if self._prefilled is None or self._prefilled[0] != prompt_index:
            kv, logits = self.runner.prefill([self.job.prompt_ids[prompt_index]])
            self._prefilled = (prompt_index, kv, logits[0])
        return self._prefilled[1], self._prefilled[2]

    def run_chunk(self, chunk: Chunk, on_step: StepHook | None = None) -> list[SampleRecord]:
        """Write every row of `chunk` to its end in one batch; records in the chunk's row order."""
        return self.run_rows(chunk.prompt_index, chunk.rows, on_step)

    def run_batch(self, batch: Batch, batch_rows: int,
                  on_step: StepHook | None = None) -> list[tuple[Chunk, list[SampleRecord]]]:
        """Write the chunks of one `plan_batches` batch, `batch_rows` rows per forward pass at
        most; each chunk with its records, in row order."""
        if len({c.prompt_index for c in batch}) != 1:
            raise ValueError("sweep batch: the chunks of a batch share one prompt")
        rows = [pair for chunk in batch for pair in chunk.rows]
        records: list[SampleRecord] = []
        for start in range(0, len(rows), batch_rows):
            records += self.run_rows(batch[0].prompt_index, rows[start:start + batch_rows], on_step)
        out, at = [], 0
        for chunk in batch:
            out.append((chunk, records[at:at + len(chunk.rows)]))
            at += len(chunk.rows)
        return out

    def run_rows(self, prompt_index: int, pairs: Sequence[tuple[int, int]],
                 on_step: StepHook | None = None) -> list[SampleRecord]:
        """Write the rows `pairs` ((recipe index, sample index)) of one prompt to their end,
        decoding them in lockstep; records in the order of `pairs`."""
        job = self.job
        prompt = job.prompt_ids[prompt_index]
        rows = [_Row(job.recipes[r], s, self._recipes[r].sampler(),
                     row_uniforms(job.seed, prompt_index, job.recipes[r], s, job.max_new_tokens),
                     IncrementalDecoder(self._decode, prompt))
                for r, s in pairs]
        prompt_kv, prompt_logits = self.prompt_state(prompt_index)
        live = list(range(len(rows)))  # indices into `rows`, in batch-row order
        kv = prompt_kv.select([0] * len(rows))
        logits = prompt_logits.unsqueeze(0).expand(len(rows), -1)  # (B, V)
        step = 0
        while live:
            logits_np = logits.float().numpy()  # (B, V)
            logp = log_softmax(logits_np)  # the raw model's
            tokens = [self._emit(rows[i], step, prompt, logits_np[b], logp[b])
                      for b, i in enumerate(live)]
            keep = [b for b, i in enumerate(live) if rows[i].ending is None]
            if on_step is not None:
                on_step(len(live), len(live) - len(keep))
            if not keep:
                break
            if len(keep) < len(live):
                kv = kv.select(keep)
                live = [live[b] for b in keep]
                tokens = [tokens[b] for b in keep]
            kv, logits = self.runner.step(kv, tokens)
            step += 1
        return [self._record(row, prompt_index, prompt) for row in rows]

    def _emit(self, row: _Row, step: int, prompt: tuple[int, ...], logits: np.ndarray,
              logp: np.ndarray) -> int:
        """Draw one token for a row and note what the sample needs; returns the token."""
        out = emit(row.sampler, logits, prompt + tuple(row.tokens), float(row.uniforms[step]))
        token = out.token
        row.tokens.append(token)
        row.logprobs.append(float(logp[token]))
        row.kept.append(out.kept)
        row.entropies.append(out.final_entropy)
        span = self._stops.span
        text = ""
        if span:  # the text matters only for stop strings (the sample's is made once)
            text = row.tail + row.decoder.push(token)
            row.tail = text[-span:]
        row.ending = self._stops.ending(token, step, len(prompt), text)
        return token

    def _record(self, row: _Row, prompt_index: int, prompt: tuple[int, ...]) -> SampleRecord:
        assert row.ending is not None
        return SampleRecord(recipe=row.recipe, prompt_index=prompt_index,
                            sample_index=row.sample_index, token_ids=tuple(row.tokens),
                            text=sample_text(self._decode, prompt, row.tokens),
                            logprobs=tuple(row.logprobs), kept=tuple(row.kept),
                            final_entropy=tuple(row.entropies), ending=row.ending)


def sample_text(decode: DecodeFn, prompt: Sequence[int], tokens: Sequence[int]) -> str:
    """The text the tokens add after the prompt (a few prompt tokens give spacing context)."""
    context = list(prompt[-6:])
    before = decode(context)
    after = decode(context + list(tokens))
    return after[len(before):] if after.startswith(before) else decode(list(tokens))

