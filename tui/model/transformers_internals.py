"""Every transformers internal the forward paths read, in one adapter.

The lean path (`tui.model.lean_llama`) reproduces transformers' llama and qwen2 maths
from a loaded model's parts, and the generic runner (`tui.model.forward.Runner`) passes
caches in and out of it. Those reads lean on names that are not public API (the
rotary module's `inv_freq` and `attention_scaling`, the final norm's
`variance_epsilon`, `DynamicCache`'s constructor and layers). They are checked against
the versions in `VERIFIED_TRANSFORMERS` (pinned in pyproject.toml as well); outside
that range `version_refusal` sends models to the generic path.
References: transformers 5.24.0 `models/llama/modeling_llama.py`,
`models/qwen2/modeling_qwen2.py`, `cache_utils.py`.
"""

from __future__ import annotations

import importlib.metadata
from dataclasses import dataclass
from typing import Any

import torch

from tui.model.kv import KV

VERIFIED_TRANSFORMERS = ((5, 24), (5, 25))  # [low, high) by (major, minor): 5.24.x
VERIFIED_TEXT = "5.24.x"


def version_refusal() -> str | None:
    """Why this transformers version is not one the lean path was checked against, or None."""
    try:
        version = importlib.metadata.version("transformers")
    except importlib.metadata.PackageNotFoundError:
        return None  # the direct reader needs no transformers at all
    try:
        major, minor = (int(p) for p in version.split(".")[:2])
    except ValueError:
        return f"transformers {version} is not a version the lean path can compare"
    low, high = VERIFIED_TRANSFORMERS
    if not low <= (major, minor) < high:
        return f"transformers {version} is outside the verified range {VERIFIED_TEXT}"
    return None


@dataclass(frozen=True)
class ModelParts:
    """What the lean path reads from a loaded llama-family model."""

    layers: int
    norm_eps: float  # the RMSNorm epsilon the model was built with
    inv_freq: torch.Tensor  # (head_dim / 2,) float32: transformers' own rotary frequencies
    rope_scale: float  # the rotary module's `attention_scaling`
    config: dict[str, Any]  # `model.config.to_dict()`


def model_parts(model: Any) -> ModelParts:
    """The lean path's reads of a loaded `LlamaForCausalLM` / `Qwen2ForCausalLM`."""
    body = model.model
    rotary = body.rotary_emb
    return ModelParts(layers=len(body.layers), norm_eps=float(body.norm.variance_epsilon),
                      inv_freq=rotary.inv_freq.detach().float(),
                      rope_scale=float(rotary.attention_scaling), config=model.config.to_dict())


def model_class_name(model: Any) -> str:
    return type(model).__name__


def state_dict(model: Any) -> dict[str, torch.Tensor]:
    """The model's tensors under their state-dict names (tied ones appear under both)."""
    return dict(model.state_dict())


def rebind_parameter(model: Any, name: str, view: torch.Tensor) -> None:
    """Point the model's parameter `name` at `view` (a view of a fused weight)."""
    model.get_parameter(name).data = view


def new_cache(config: Any, kv: KV | None = None) -> Any:
    """A `DynamicCache` for the generic runner, holding `kv`'s layers when given."""
    from transformers import DynamicCache

    if kv is None:
        return DynamicCache(config=config)
    return DynamicCache(ddp_cache_data=list(kv.views()), config=config)


def kv_of(cache: Any) -> KV:
    """Our `KV` value over a `DynamicCache`'s tensors (no copy)."""
    return KV(tuple((layer.keys, layer.values) for layer in cache.layers))
