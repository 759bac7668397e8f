"""The model side of a step: prefill, one batched decode step, and KV-cache rows.

A runner hides which forward path is used; `make_runner` picks one. The generic
`Runner` calls the transformers model with a `DynamicCache`; the lean one
(`tui.lean_llama.LeanRunner`) runs llama-family models with fused weights and a cache
written in place. A cache here is our own plain value, `KV`: one (keys, values) pair of
tensors per layer, each (B, H, C, D) with the first `length` of C positions in use, so
that the engine can pick, copy, park, crop and join batch rows without knowing the model.
No Textual, no numpy math: tensors in, tensors out.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Sequence

import torch

if TYPE_CHECKING:
    from tui.lean_llama import LeanRunner

FORWARD_ENV = "LOGITFORK_FORWARD"  # auto (default), lean or generic


@dataclass(eq=False)
class WriteMark:
    """How far some holder has written into a set of shared capacity buffers (mutable)."""

    end: int


@dataclass(frozen=True)
class KV:
    """A KV cache as plain tensors: per layer a (keys, values) pair, each (B, H, C, D).

    The first `length` positions of the capacity C hold the cache. The generic path makes
    exact-size tensors (C == length, `filled` None, no mark). The lean path keeps
    capacity buffers with room to grow and writes new positions in place.

    Ownership rule (why in-place writes are safe): buffers are shared freely (`crop`
    returns views, a step returns the same buffers with a longer length), and every KV
    on the same buffers shares one `WriteMark`. A runner may write positions
    `length, length+1, ...` into a KV's buffers only if `mark.end == length`, that is if
    no other holder has written past this KV's end; it then moves `mark.end` on. Any other
    holder (a crop, or an older KV whose buffers were written since) is copied first, so
    positions below every holder's `length` never change once written.
    """

    layers: tuple[tuple[torch.Tensor, torch.Tensor], ...] = ()
    filled: int | None = None  # positions in use; None: the whole tensors
    mark: WriteMark | None = field(default=None, compare=False)

    @property
    def rows(self) -> int:
        return self.layers[0][0].shape[0] if self.layers else 0

    @property
    def length(self) -> int:
        if not self.layers:
            return 0
        return self.layers[0][0].shape[2] if self.filled is None else self.filled

    @property
    def capacity(self) -> int:
        return self.layers[0][0].shape[2] if self.layers else 0

    def views(self) -> tuple[tuple[torch.Tensor, torch.Tensor], ...]:
        """Per layer (keys, values) of exactly `length` positions: (B, H, length, D) views."""
        if self.filled is None:
            return self.layers
        n = self.filled
        return tuple((k[:, :, :n], v[:, :, :n]) for k, v in self.layers)

    def writable(self, extra: int) -> bool:
        """May a runner write `extra` positions after `length` in place (see the class doc)?"""
        return (self.mark is not None and self.mark.end == self.length
                and self.capacity >= self.length + extra)

    def select(self, rows: Sequence[int]) -> "KV":
        """A new cache (a copy) with the given rows, in that order (rows may repeat)."""
        idx = torch.as_tensor(list(rows), dtype=torch.long)
        if self.mark is None:
            return KV(tuple((k.index_select(0, idx), v.index_select(0, idx)) for k, v in self.layers))
        # Capacity buffers: copy them whole so the copy can grow in place too.
        layers = tuple((k.index_select(0, idx), v.index_select(0, idx)) for k, v in self.layers)
        return KV(layers, self.length, WriteMark(self.length))

    def crop(self, length: int) -> "KV":
        """The first `length` positions (views of the same buffers; no copy)."""
        if not 0 <= length <= self.length:
            raise ValueError(f"crop length must be in 0..{self.length}, got {length}")
        if self.mark is None:
            return KV(tuple((k[:, :, :length], v[:, :, :length]) for k, v in self.layers))
        return KV(self.layers, length, self.mark)

    @staticmethod
    def join(parts: Sequence["KV"]) -> "KV":
        """Stack caches of equal length along the batch (a copy unless there is one part)."""
        parts = [p for p in parts if p.rows]
        if not parts:
            return KV()
        if len(parts) == 1:
            return parts[0]
        if len({p.length for p in parts}) > 1:
            raise ValueError(f"join needs equal lengths, got {[p.length for p in parts]}")
        views = [p.views() for p in parts]
        return KV(tuple(
            (torch.cat([v[i][0] for v in views]), torch.cat([v[i][1] for v in views]))
            for i in range(len(views[0]))
        ))

    def nbytes(self) -> int:
        return sum(k.numel() * k.element_size() * 2 for k, _ in self.layers)


class Runner:
    """Runs a transformers causal LM for the engine (the generic forward path)."""

    kind = "generic"

    def __init__(self, model: Any) -> None:
        self.model = model
        self.config = model.config
        self.vocab_size = int(model.get_output_embeddings().weight.shape[0])

    @torch.inference_mode()
    def prefill(self, ids: Sequence[Sequence[int]]) -> tuple[KV, torch.Tensor]:
        """Run whole equal-length sequences; return their cache and last logits (B, V)."""
        from transformers import DynamicCache

        x = torch.as_tensor([list(r) for r in ids], dtype=torch.long)  # (B, T)
        cache = DynamicCache(config=self.config)
        out = self.model(input_ids=x, cache=cache, use_cache=True, logits_to_keep=1)
        return _to_kv(cache), out.logits[:, -1, :].float()

    @torch.inference_mode()
    def extend(self, kv: KV, ids: Sequence[Sequence[int]]) -> tuple[KV, torch.Tensor]:
        """Feed equal-length token blocks (B, T) after an existing cache of B rows."""
        from transformers import DynamicCache

        x = torch.as_tensor([list(r) for r in ids], dtype=torch.long)
        start = kv.length
        cache = DynamicCache(ddp_cache_data=list(kv.views()), config=self.config)
        pos = torch.arange(start, start + x.shape[1]).unsqueeze(0).expand(x.shape[0], -1)
        out = self.model(input_ids=x, cache=cache, use_cache=True,
                         position_ids=pos, cache_position=torch.arange(start, start + x.shape[1]),
                         logits_to_keep=1)
        return _to_kv(cache), out.logits[:, -1, :].float()

    def step(self, kv: KV, tokens: Sequence[int]) -> tuple[KV, torch.Tensor]:
        """One decode step: one new token per row. Returns the cache and logits (B, V)."""
        return self.extend(kv, [[t] for t in tokens])

    @torch.inference_mode()
    def logits_of(self, ids: Sequence[int]) -> torch.Tensor:
        """Logits (T, V) of a whole sequence, no cache kept: for log-likelihoods and inspect."""
        out = self.model(input_ids=torch.as_tensor([list(ids)], dtype=torch.long), use_cache=False)
        return out.logits[0].float()


def forward_choice() -> str:
    """`LOGITFORK_FORWARD`: auto (unset), lean or generic; UserError for anything else."""
    from tui.errors import UserError

    choice = os.environ.get(FORWARD_ENV, "auto").strip().lower() or "auto"
    if choice not in ("auto", "lean", "generic"):
        raise UserError(f"{FORWARD_ENV}: must be auto, lean or generic, got {choice!r}")
    return choice


def make_runner(source: Any) -> "Runner | LeanRunner":
    """The fastest runner for `source`: the lean llama path, else the generic one.

    `source` is a transformers model, or a `LlamaCheckpoint` read without one (which
    only the lean path runs). `LOGITFORK_FORWARD=generic` forces the generic path; `=lean`
    insists on the lean one (a UserError says why a model cannot take it); unset or
    `auto` chooses. `LoadedModel.runner()` picks the source.
    """
    from tui.errors import UserError
    from tui.lean_llama import LeanRunner, lean_refusal
    from tui.llama_checkpoint import LlamaCheckpoint

    choice = forward_choice()
    if isinstance(source, LlamaCheckpoint):
        if choice == "generic":
            raise UserError(f"{FORWARD_ENV}=generic needs a transformers model, not a checkpoint")
        return LeanRunner(source)
    if choice == "generic":
        return Runner(source)
    reason = lean_refusal(source)
    if reason is None:
        return LeanRunner(source)
    if choice == "lean":
        raise UserError(f"{FORWARD_ENV}=lean: {reason}; unset it to use the generic path")
    return Runner(source)


def _to_kv(cache: Any) -> KV:
    return KV(tuple((layer.keys, layer.values) for layer in cache.layers))
