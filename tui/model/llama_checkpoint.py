"""Read a llama-family checkpoint folder straight into tensors, without transformers' model code.

Importing a transformers model class, and the config class it needs, costs about 2 s on
the 2-core machine (most of a warm start), while the lean path (`tui.model.lean_llama`) needs
only the weights and a dozen numbers. `read_checkpoint` reads `config.json` and
`model.safetensors` itself and hands back exactly what `LeanRunner` takes from a loaded
model: the same tensors under the same names, and a `LlamaShape` with the same values.

It refuses (ValueError, with the reason) anything it does not reproduce exactly: a
config key or value outside its allow-list (`config_refusal`: other architectures or
activations, rope types other than "default", sliding windows, any key it does not
know), or a tensor set that differs from what transformers' classes would read. One
`model.safetensors` or shards with `model.safetensors.index.json` are read.
The caller then loads the folder through transformers. References: transformers 5.24.0
`models/llama/modeling_llama.py` (`LlamaRotaryEmbedding.compute_default_rope_parameters`,
the modules' names and biases) and `models/qwen2/modeling_qwen2.py`; tests/test_checkpoint.py
checks every value against a model that transformers built.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import torch

from tui.model.conversion_cache import INDEX, WEIGHTS

SUPPORTED_MODELS = {"llama": "LlamaForCausalLM", "qwen2": "Qwen2ForCausalLM"}
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
    embedding_rows: torch.Tensor | None = None  # the file's embedding, mapped, not read (see read_checkpoint)

    @property
    def dtype(self) -> torch.dtype:
        return self.tensors["model.norm.weight"].dtype

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


def config_refusal(config: dict[str, Any], rope_types: tuple[str, ...] = ("default",)) -> str | None:
    """Why this config cannot run on the lean path (transformers must run it), or None.

    An allow-list: every key must be one `ALLOWED_KEYS` names for this model type, with
    a value its check accepts; any other key (soft-capping, q/k norms, per-layer eps, a
    quantisation config...) could change the maths, so its name is the reason. Keys in
    `INERT_KEYS` are metadata, training-only or generation defaults, which no forward
    pass reads. `rope_types`: the rope types the caller can reproduce (the direct reader:
    only "default"; a runner on a loaded model reads transformers' own frequencies).
    """
    kind = config.get("model_type")
    if kind not in SUPPORTED_MODELS:
        return f"model_type {kind!r} is not llama or qwen2"
    arch = config.get("architectures")
    if arch is not None and arch != [SUPPORTED_MODELS[kind]]:
        return f"architectures {arch!r} is not [{SUPPORTED_MODELS[kind]!r}]"
    checks = {**_COMMON_CHECKS, **_FAMILY_CHECKS[kind]}
    for key, value in config.items():
        if key in INERT_KEYS:
            continue
        if key not in checks:
            return f"config key {key!r} is not on the lean path's allow-list (it may change the maths)"
        reason = checks[key](value)
        if reason:
            return f"{key} {_short(value)} {reason}"
    for key in _INTS:
        if key not in config:
            return f"{key} is missing"
    for key in ("rms_norm_eps", "tie_word_embeddings", "hidden_act"):
        if key not in config:
            return f"{key} is missing"
    rope = _rope(config)
    if rope is None:
        return "no rope_theta (rope_parameters or rope_theta) is given"
    if rope.get("rope_type", "default") not in rope_types:
        return f"rope_type {rope.get('rope_type')!r} is not one of {', '.join(rope_types)}"
    extra = set(rope) - ({"rope_type", "rope_theta"} if rope_types == ("default",) else set(rope))
    if extra:
        return f"rope_parameters key {sorted(extra)[0]!r} is not on the allow-list"
    return None


def _short(value: object) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _is(kind: type | tuple[type, ...], what: str) -> Callable[[Any], str]:
    def check(value: Any) -> str:
        ok = isinstance(value, kind) and not (kind is not bool and isinstance(value, bool))
        return "" if ok else f"is not {what}"
    return check


def _equals(*allowed: Any) -> Callable[[Any], str]:
    return lambda value: "" if any(value == a and type(value) is type(a) for a in allowed) else \
        f"is not {' or '.join(repr(a) for a in allowed)}"


def _positive(value: Any) -> str:
    return "" if _positive_int(value) else "is not a positive integer"


def _positive_or_none(value: Any) -> str:
    return "" if value is None or _positive_int(value) else "is not a positive integer"


def _rope_parameters(value: Any) -> str:
    if not isinstance(value, dict) or "rope_type" not in value:
        return "is not one set of rope parameters (per-layer ones are not supported)"
    if not isinstance(value.get("rope_theta"), (int, float)) or isinstance(value.get("rope_theta"), bool):
        return "has no numeric rope_theta"
    if value.get("partial_rotary_factor", 1.0) != 1.0:
        return "has a partial rotary factor"
    return ""


def _full_attention_only(value: Any) -> str:
    ok = value is None or (isinstance(value, list) and all(v == "full_attention" for v in value))
    return "" if ok else "asks for attention other than full attention (sliding windows)"


_NUMBER = _is((int, float), "a number")
_COMMON_CHECKS: dict[str, Callable[[Any], str]] = {
    **{key: _positive for key in _INTS},
    "hidden_act": _equals("silu"),
    "rms_norm_eps": _NUMBER,
    "head_dim": _positive_or_none,
    "tie_word_embeddings": _is(bool, "true or false"),
    "rope_parameters": _rope_parameters,
    "rope_theta": _NUMBER,  # the layout before rope_parameters
    "rope_scaling": _equals(None),  # ditto: None means the default rope
    "layer_types": _full_attention_only,
    "chunk_size_feed_forward": _equals(0),
    "is_encoder_decoder": _equals(False),
    "attention_dropout": _NUMBER,  # dropout is off in eval mode
}
_FAMILY_CHECKS: dict[str, dict[str, Callable[[Any], str]]] = {
    "llama": {"attention_bias": _is(bool, "true or false"), "mlp_bias": _is(bool, "true or false"),
              "pretraining_tp": _equals(1)},
    "qwen2": {"use_sliding_window": _equals(False),
              "sliding_window": _positive_or_none, "max_window_layers": _positive_or_none},  # unread without it
}
# Keys no forward pass reads: names, token ids, generation and training settings.
INERT_KEYS = frozenset({
    "model_type", "architectures", "_name_or_path", "_model_name_or_path", "name_or_path",
    "transformers_version", "torch_dtype", "dtype", "use_cache", "bos_token_id", "eos_token_id",
    "pad_token_id", "unk_token_id", "sep_token_id", "decoder_start_token_id", "initializer_range",
    "id2label", "label2id", "num_labels", "output_attentions", "output_hidden_states",
    "return_dict", "problem_type", "tokenizer_class", "task_specific_params", "prefix",
    "finetuning_task", "_commit_hash", "_attn_implementation_autoset", "use_return_dict",
})


def _rope(config: dict[str, Any]) -> dict[str, Any] | None:
    """The rope parameters in either layout (rope_parameters, or rope_theta + rope_scaling)."""
    rope = config.get("rope_parameters")
    if isinstance(rope, dict):
        return rope
    if isinstance(config.get("rope_theta"), (int, float)):
        return {"rope_type": "default", "rope_theta": config["rope_theta"]}
    return None


def shape_from_config(config: dict[str, Any]) -> LlamaShape:
    """The shape transformers' llama/qwen2 classes build from this (accepted) config."""
    heads = int(config["num_attention_heads"])
    head_dim = int(config.get("head_dim") or config["hidden_size"] // heads)
    return LlamaShape(
        layers=int(config["num_hidden_layers"]), heads=heads,
        kv_heads=int(config["num_key_value_heads"]), head_dim=head_dim,
        hidden=int(config["hidden_size"]), eps=float(config["rms_norm_eps"]),
        inv_freq=default_inv_freq(_rope(config)["rope_theta"], head_dim),
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


def weight_files(folder: Path) -> dict[str, Path]:
    """Each tensor's safetensors file: one `model.safetensors`, or the shards that
    `model.safetensors.index.json` maps; ValueError when there are neither."""
    single, index = folder / WEIGHTS, folder / INDEX
    if index.is_file():
        try:
            weight_map = json.loads(index.read_text(encoding="utf-8"))["weight_map"]
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise ValueError(f"{INDEX}: unreadable ({exc})") from None
        if not isinstance(weight_map, dict) or not all(isinstance(v, str) and "/" not in v
                                                       for v in weight_map.values()):
            raise ValueError(f"{INDEX}: weight_map must map tensor names to file names in the folder")
        files = {name: folder / shard for name, shard in weight_map.items()}
        missing = sorted({f.name for f in files.values() if not f.is_file()})
        if missing:
            raise ValueError(f"{INDEX}: shard {missing[0]} is missing")
        return files
    if single.is_file():
        return {name: single for name in safetensors_header(single)}
    raise ValueError(f"no {WEIGHTS} or {INDEX}")


def safetensors_header(path: Path) -> dict[str, dict[str, Any]]:
    """The tensor entries of a safetensors file's header (dtype, shape, offsets), read
    without touching the data: 8 bytes of length, then that much JSON (the format's spec)."""
    with open(path, "rb") as handle:
        size = int.from_bytes(handle.read(8), "little")
        if not 0 < size < 100_000_000:
            raise ValueError(f"{path.name}: not a safetensors file")
        header = json.loads(handle.read(size))
    return {k: v for k, v in header.items() if k != "__metadata__"}


def parameter_count(folder: Path) -> int:
    """Numbers stored in the folder's safetensors weights (all files, from their headers)."""
    total = 0
    for path in sorted(set(weight_files(folder).values())):
        for entry in safetensors_header(path).values():
            count = 1
            for dim in entry.get("shape", ()):
                count *= int(dim)
            total += count
    return total


def read_checkpoint(folder: Path, dtype: torch.dtype = torch.float32) -> LlamaCheckpoint:
    """The checkpoint in `folder` in `dtype`; ValueError naming what is not read directly.

    Tensors are read one at a time and cast as they come, so a bfloat16 read of a
    float32 file never holds the float32 copy; a sharded folder is read shard by shard.
    Every tensor is copied off safetensors' memory map, so each shard's mapping leaves
    the process once read. `embedding_rows` maps the embedding matrix from its file
    without reading it: with tied embeddings the lean path packs the matrix for the
    output projection and looks token rows up there, touching only the rows it reads.
    """
    from safetensors import safe_open

    config = read_config(folder)
    reason = config_refusal(config)
    if reason is not None:
        raise ValueError(reason)
    files = weight_files(folder)
    expected = expected_shapes(config)
    if config["tie_word_embeddings"]:
        files.pop("lm_head.weight", None)  # transformers ties it to the embedding anyway
    if set(files) != set(expected):
        odd = sorted(set(files) ^ set(expected))
        raise ValueError(f"{len(odd)} tensor name(s) differ from the model class's, e.g. {odd[0]}")
    tensors: dict[str, torch.Tensor] = {}
    for path in sorted(set(files.values())):
        with safe_open(str(path), framework="pt") as handle:
            for name in handle.keys():
                if name not in expected:
                    continue
                tensor = handle.get_tensor(name)
                if tuple(tensor.shape) != expected[name]:
                    raise ValueError(f"{name} has shape {tuple(tensor.shape)}, expected {expected[name]}")
                if not tensor.dtype.is_floating_point:
                    raise ValueError(f"{name} is {tensor.dtype}, not floating point")
                cast = tensor.to(dtype)
                if cast is tensor:  # the same dtype: a copy, off the file's mapping
                    cast = tensor.clone()
                tensors[name] = cast
                del tensor, cast
    tensors["lm_head.weight"] = tensors.get("lm_head.weight", tensors["model.embed_tokens.weight"])
    shape = shape_from_config(config)
    if dtype != torch.float32:  # as `model.to(dtype)` rounds the rotary buffer (see `cast`)
        shape = LlamaShape(**{**vars(shape), "inv_freq": shape.inv_freq.to(dtype).float()})
    rows = mapped_tensor(files["model.embed_tokens.weight"], "model.embed_tokens.weight")
    return LlamaCheckpoint(shape, tensors, config, rows)


_SAFETENSORS_DTYPES = {"F32": torch.float32, "BF16": torch.bfloat16, "F16": torch.float16}


def mapped_tensor(path: Path, name: str) -> torch.Tensor | None:
    """Tensor `name` of a safetensors file as a read-only private mapping of the file
    (`torch.from_file`: pages are read when touched), or None for a dtype not mapped here."""
    with open(path, "rb") as handle:
        size = int.from_bytes(handle.read(8), "little")
    entry = safetensors_header(path)[name]
    dtype = _SAFETENSORS_DTYPES.get(entry.get("dtype"))
    start, end = entry["data_offsets"]
    if dtype is None or (8 + size + start) % dtype.itemsize:
        return None
    raw = torch.from_file(str(path), shared=False, size=path.stat().st_size, dtype=torch.uint8)
    return raw[8 + size + start:8 + size + end].view(dtype).view(*entry["shape"])


def _positive_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value > 0
