"""Read a llama-family checkpoint folder straight into tensors, without transformers' model code.

Importing a transformers model class, and the config class it needs, costs about 2 s on
the 2-core machine (most of a warm start), while the lean path (`tui.model.lean_llama`) needs
only the weights and a dozen numbers. `read_checkpoint` reads `config.json` and
`model.safetensors` itself and hands back exactly what `LeanRunner` takes from a loaded
model: the same tensors under the same names, and a `LlamaShape` with the same values.

It refuses (ValueError, with the reason) anything it does not reproduce exactly: other
architectures or activations, rope types other than "default", sliding windows, sharded
weights, or a tensor set that differs from what transformers' classes would read.
The caller then loads the folder through transformers. References: transformers 5.24.0
`models/llama/modeling_llama.py` (`LlamaRotaryEmbedding.compute_default_rope_parameters`,
the modules' names and biases) and `models/qwen2/modeling_qwen2.py`; tests/test_checkpoint.py
checks every value against a model that transformers built.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch

SUPPORTED_MODELS = {"llama": "LlamaForCausalLM", "qwen2": "Qwen2ForCausalLM"}
WEIGHTS = "model.safetensors"
_INTS = ("hidden_size", "num_hidden_layers", "num_attention_heads", "num_key_value_heads",
         "intermediate_size", "vocab_size", "max_position_embeddings")


@dataclass(frozen=True, eq=False)
class LlamaShape:
    """The numbers the lean path needs from a llama-family model (eq=False: holds a tensor)."""

    layers: int
    heads: int
    kv_heads: int
    head_dim: int
    hidden: int
    eps: float  # RMSNorm epsilon
    inv_freq: torch.Tensor  # (head_dim / 2,) float32 rotary frequencies
    rope_scale: float  # transformers' `attention_scaling` (1.0 for the default rope)
    max_positions: int


@dataclass
class LlamaCheckpoint:
    """A checkpoint's tensors under transformers' state-dict names, with its shape.

    `tensors["lm_head.weight"]` is the embedding matrix itself when the embeddings are
    tied, as in a loaded model. `config` is `config.json` as read.
    """

    shape: LlamaShape
    tensors: dict[str, torch.Tensor]
    config: dict[str, Any]

    @property
    def dtype(self) -> torch.dtype:
        return self.tensors["model.embed_tokens.weight"].dtype

    def cast(self, dtype: torch.dtype) -> None:
        """Cast every tensor, and round the rotary frequencies to `dtype` and back.

        The rounding mirrors `model.to(dtype)`, which casts the rotary buffer too: the
        lean path then computes its cos/sin tables from the same frequencies.
        """
        tied = self.tensors["lm_head.weight"] is self.tensors["model.embed_tokens.weight"]
        cast = {name: t.to(dtype) for name, t in self.tensors.items() if not (tied and name == "lm_head.weight")}
        if tied:
            cast["lm_head.weight"] = cast["model.embed_tokens.weight"]
        self.tensors = cast
        inv_freq = self.shape.inv_freq.to(dtype).float()
        self.shape = LlamaShape(**{**vars(self.shape), "inv_freq": inv_freq})


def read_config(folder: Path) -> dict[str, Any]:
    """`config.json` of `folder` as a dict; ValueError if it is missing or not an object."""
    try:
        config = json.loads((folder / "config.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ValueError(f"config.json: {exc}") from None
    if not isinstance(config, dict):
        raise ValueError("config.json: not a JSON object")
    return config


def config_refusal(config: dict[str, Any]) -> str | None:
    """Why this config cannot be read directly (transformers must load it), or None."""
    kind = config.get("model_type")
    if kind not in SUPPORTED_MODELS:
        return f"model_type {kind!r} is not llama or qwen2"
    if config.get("architectures") != [SUPPORTED_MODELS[kind]]:
        return f"architectures {config.get('architectures')!r} is not [{SUPPORTED_MODELS[kind]!r}]"
    if config.get("hidden_act") != "silu":
        return f"hidden_act {config.get('hidden_act')!r} is not silu"
    for key in _INTS:
        if not _positive_int(config.get(key)):
            return f"{key} is missing or not a positive integer"
    if not isinstance(config.get("rms_norm_eps"), (int, float)):
        return "rms_norm_eps is missing"
    if config.get("head_dim") is not None and not _positive_int(config["head_dim"]):
        return "head_dim is not a positive integer"
    if not isinstance(config.get("tie_word_embeddings"), bool):
        return "tie_word_embeddings is missing"
    rope = config.get("rope_parameters")
    if not isinstance(rope, dict) or rope.get("rope_type") != "default":
        return "rope_parameters is missing or its rope_type is not 'default'"
    if not isinstance(rope.get("rope_theta"), (int, float)) or rope.get("partial_rotary_factor", 1.0) != 1.0:
        return "rope_parameters needs a rope_theta and no partial rotary factor"
    if config.get("use_sliding_window") or "sliding_attention" in (config.get("layer_types") or ()):
        return "sliding-window attention is not supported"
    return None


def shape_from_config(config: dict[str, Any]) -> LlamaShape:
    """The shape transformers' llama/qwen2 classes build from this (accepted) config."""
    heads = int(config["num_attention_heads"])
    head_dim = int(config.get("head_dim") or config["hidden_size"] // heads)
    return LlamaShape(
        layers=int(config["num_hidden_layers"]), heads=heads,
        kv_heads=int(config["num_key_value_heads"]), head_dim=head_dim,
        hidden=int(config["hidden_size"]), eps=float(config["rms_norm_eps"]),
        inv_freq=default_inv_freq(config["rope_parameters"]["rope_theta"], head_dim),
        rope_scale=1.0, max_positions=int(config["max_position_embeddings"]),
    )


def default_inv_freq(theta: float, dim: int) -> torch.Tensor:
    """1 / theta^(2i/dim), computed as transformers' default rope does (same ops, same bits)."""
    return 1.0 / (theta ** (torch.arange(0, dim, 2, dtype=torch.float) / dim))


def expected_shapes(config: dict[str, Any]) -> dict[str, tuple[int, ...]]:
    """Every tensor the model class reads, by state-dict name, with its shape.

    Biases follow the classes: llama puts `attention_bias` on all four attention
    projections and `mlp_bias` on the three MLP ones; qwen2 has q/k/v biases only.
    `lm_head.weight` is left out when the embeddings are tied (it is not read then).
    """
    shape = shape_from_config(config)
    E, V, inter = shape.hidden, int(config["vocab_size"]), int(config["intermediate_size"])
    q, kv = shape.heads * shape.head_dim, shape.kv_heads * shape.head_dim
    if config["model_type"] == "qwen2":
        qkv_bias, o_bias, mlp_bias = True, False, False
    else:
        qkv_bias = o_bias = bool(config.get("attention_bias", False))
        mlp_bias = bool(config.get("mlp_bias", False))
    out: dict[str, tuple[int, ...]] = {"model.embed_tokens.weight": (V, E), "model.norm.weight": (E,)}
    if not config["tie_word_embeddings"]:
        out["lm_head.weight"] = (V, E)
    linears = {"self_attn.q_proj": (q, E, qkv_bias), "self_attn.k_proj": (kv, E, qkv_bias),
               "self_attn.v_proj": (kv, E, qkv_bias), "self_attn.o_proj": (E, q, o_bias),
               "mlp.gate_proj": (inter, E, mlp_bias), "mlp.up_proj": (inter, E, mlp_bias),
               "mlp.down_proj": (E, inter, mlp_bias)}
    for i in range(shape.layers):
        p = f"model.layers.{i}."
        out[p + "input_layernorm.weight"] = out[p + "post_attention_layernorm.weight"] = (E,)
        for name, (rows, cols, bias) in linears.items():
            out[p + name + ".weight"] = (rows, cols)
            if bias:
                out[p + name + ".bias"] = (rows,)
    return out


def read_checkpoint(folder: Path) -> LlamaCheckpoint:
    """The float32 checkpoint in `folder`; ValueError naming what is not read directly."""
    from safetensors.torch import load_file

    config = read_config(folder)
    reason = config_refusal(config)
    if reason is not None:
        raise ValueError(reason)
    if not (folder / WEIGHTS).is_file():
        raise ValueError(f"no single {WEIGHTS} (sharded weights are read by transformers)")
    tensors = load_file(str(folder / WEIGHTS))
    expected = expected_shapes(config)
    if config["tie_word_embeddings"]:
        tensors.pop("lm_head.weight", None)  # transformers ties it to the embedding anyway
    if set(tensors) != set(expected):
        odd = sorted(set(tensors) ^ set(expected))
        raise ValueError(f"{len(odd)} tensor name(s) differ from the model class's, e.g. {odd[0]}")
    for name, want in expected.items():
        if tuple(tensors[name].shape) != want:
            raise ValueError(f"{name} has shape {tuple(tensors[name].shape)}, expected {want}")
        if not tensors[name].dtype.is_floating_point:
            raise ValueError(f"{name} is {tensors[name].dtype}, not floating point")
    tensors = {name: t.float() for name, t in tensors.items()}
    tensors["lm_head.weight"] = tensors.get("lm_head.weight", tensors["model.embed_tokens.weight"])
    return LlamaCheckpoint(shape_from_config(config), tensors, config)


def _positive_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value > 0
