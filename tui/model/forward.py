"""The model side of a step: prefill, one batched decode step, and KV-cache rows.

A runner hides which forward path is used; `make_runner` picks one. The generic
`Runner` calls the transformers model with a `DynamicCache`; the lean one
(`tui.model.lean_llama.LeanRunner`) runs llama-family models with fused weights and a cache
written in place. A cache here is our own plain value, `KV`: one (keys, values) pair of
tensors per layer, each (B, H, C, D) with the first `length` of C positions in use, so
that the engine can pick, copy, park, crop and join batch rows without knowing the model.
No Textual, no numpy math: tensors in, tensors out.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Sequence

import torch

from tui.model import transformers_internals as hf
from tui.model.kv import KV
from tui.settings import FORWARD_ENV, settings

if TYPE_CHECKING:
    from tui.model.lean_llama import LeanRunner



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
        x = torch.as_tensor([list(r) for r in ids], dtype=torch.long)  # (B, T)
        cache = hf.new_cache(self.config)
        out = self.model(input_ids=x, cache=cache, use_cache=True, logits_to_keep=1)
        return hf.kv_of(cache), out.logits[:, -1, :].float()

    @torch.inference_mode()
    def extend(self, kv: KV, ids: Sequence[Sequence[int]]) -> tuple[KV, torch.Tensor]:
        """Feed equal-length token blocks (B, T) after an existing cache of B rows."""
        x = torch.as_tensor([list(r) for r in ids], dtype=torch.long)
        start = kv.length
        cache = hf.new_cache(self.config, kv)
        pos = torch.arange(start, start + x.shape[1]).unsqueeze(0).expand(x.shape[0], -1)
        out = self.model(input_ids=x, cache=cache, use_cache=True,
                         position_ids=pos, cache_position=torch.arange(start, start + x.shape[1]),
                         logits_to_keep=1)
        return hf.kv_of(cache), out.logits[:, -1, :].float()

    def step(self, kv: KV, tokens: Sequence[int]) -> tuple[KV, torch.Tensor]:
        """One decode step: one new token per row. Returns the cache and logits (B, V)."""
        return self.extend(kv, [[t] for t in tokens])

    @torch.inference_mode()
    def logits_of(self, ids: Sequence[int]) -> torch.Tensor:
        """Logits (T, V) of a whole sequence, no cache kept: for log-likelihoods and inspect."""
        out = self.model(input_ids=torch.as_tensor([list(ids)], dtype=torch.long), use_cache=False)
        return out.logits[0].float()


def forward_choice() -> str:
    """`LOGITFORK_FORWARD` (`tui.settings`): auto, lean or generic."""
    return settings().forward


def make_runner(source: Any) -> "Runner | LeanRunner":
    """The fastest runner for `source`: the lean llama path, else the generic one.

    `source` is a transformers model, or a `LlamaCheckpoint` read without one (which
    only the lean path runs). `LOGITFORK_FORWARD=generic` forces the generic path; `=lean`
    insists on the lean one (a UserError says why a model cannot take it); unset or
    `auto` chooses. `LoadedModel.runner()` picks the source.
    """
    from tui.errors import UserError
    from tui.model.lean_llama import LeanRunner, lean_refusal
    from tui.model.llama_checkpoint import LlamaCheckpoint

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

