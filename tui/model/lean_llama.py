"""A lean forward path for llama-family causal LMs (Llama, Qwen2), same maths as transformers.

The generic path (`tui.model.forward.Runner`) calls the transformers model: about 6,300 small
torch ops per decode step, and a `DynamicCache` that concatenates every step. This path
runs the same computation with everything prepared once:

- q/k/v fused into one weight, gate/up into another: one matmul each;
- every weight packed once for oneDNN (`torch.ops.mkldnn`), whose fp32 kernels run several
  times faster than torch's default (MKL) at 2-8 rows on this CPU; in float32 each sum runs
  over chunks of input columns (see `PackedLinear`) to stay within 1e-4 of transformers;
  prefill and decode both run on the packed copy, so a checkpoint's own tensors are
  freed once packed (a transformers model keeps its own); plain `F.linear` where oneDNN
  is missing;
- rotary cos/sin tables precomputed per position;
- a preallocated KV cache written in place (ownership rule: `tui.model.kv.KV`);
- SDPA attention over the cache; at decode the query heads of a group share one kv head
  by being folded into query rows, so no kv head is ever repeated.

About 30 to 40 ops per layer. Reference: transformers 5.24.0 `models/llama/modeling_llama.py`
and `models/qwen2/modeling_qwen2.py`; tests/test_forward.py holds logits to 1e-4.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass
from functools import partial
from typing import Any, Callable, Sequence

import torch
import torch.nn.functional as F

from tui.model import transformers_internals as hf
from tui.model.kv import KV, WriteMark
from tui.model.llama_checkpoint import SUPPORTED_MODELS, LlamaCheckpoint, LlamaShape, config_refusal

STATIC_ROPE = ("default", "linear", "llama3")  # inv_freq fixed at load; dynamic/longrope/yarn refused
CACHE_BUCKET = 256  # cache capacity grows in steps of this many positions
K_CHUNK = 288  # oneDNN matmuls sum at most this many input columns in one chain...
HEAD_K_CHUNK = 192  # ...and this many in the output projection (cheap there: few calls)
_LINEAR = getattr(getattr(torch.ops.mkldnn, "_linear_pointwise", None), "default", None)
_LINEAR_ADD = getattr(getattr(torch.ops.mkldnn, "_linear_pointwise", None), "binary", None)


def lean_refusal(model: Any) -> str | None:
    """Why the lean path cannot run `model`, or None when it can.

    The model's config must pass the same allow-list as a checkpoint read directly
    (`tui.model.llama_checkpoint.config_refusal`), here with the static rope types, whose
    frequencies the lean path takes from transformers' own rotary module.
    """
    kind = getattr(getattr(model, "config", None), "model_type", None)
    name = hf.model_class_name(model)
    if kind not in SUPPORTED_MODELS or name != SUPPORTED_MODELS[kind]:
        return f"{name} ({kind}) is not a llama-family causal LM"
    reason = hf.version_refusal() or config_refusal(model.config.to_dict(), STATIC_ROPE)
    if reason is not None:
        return reason
    weight = model.get_input_embeddings().weight
    if weight.device.type != "cpu" or not weight.dtype.is_floating_point:
        return f"weights on {weight.device} in {weight.dtype}: the lean path runs float weights on the CPU"
    return None


def shape_of_model(model: Any) -> LlamaShape:
    """The lean path's numbers, read from a loaded model (its own rotary frequencies)."""
    cfg, parts = model.config, hf.model_parts(model)
    heads = cfg.num_attention_heads
    return LlamaShape(
        layers=parts.layers, heads=heads, kv_heads=cfg.num_key_value_heads,
        head_dim=getattr(cfg, "head_dim", None) or cfg.hidden_size // heads,
        hidden=cfg.hidden_size, eps=parts.norm_eps,
        inv_freq=parts.inv_freq, rope_scale=parts.rope_scale,
        max_positions=int(getattr(cfg, "max_position_embeddings", 4096) or 4096),
    )


Rebind = Callable[[str, "torch.Tensor | None"], None]  # (state-dict name, its view, or None: packed)


def _rebind_or_free(tensors: dict[str, torch.Tensor], name: str, view: torch.Tensor | None) -> None:
    """A checkpoint's tensor swapped for its view of the fused weight, or freed once packed."""
    if view is None:
        tensors.pop(name, None)
    else:
        tensors[name] = view


def _rebind_model(model: Any, name: str, view: torch.Tensor | None) -> None:
    """A model's parameter pointed at its view; packed, the model keeps its own weights."""
    if view is not None:
        hf.rebind_parameter(model, name, view)


class PackedLinear:
    """Linears that read the same input, as one: y = x [W1; W2; ...]^T + [b1; b2; ...] (+ residual).

    Packed (oneDNN present), the fused weight is reordered once for oneDNN, in chunks of
    at most `k_chunk` input columns whose partial sums are then added: oneDNN adds up a
    whole row in one fp32 chain, and shorter chains keep its logits within 1e-4 of
    transformers' (measured by `make bench`). Every call runs on the packed chunks, so
    the original weights are no longer needed: their owner may free them (`LeanRunner`
    does for a checkpoint), and the packed copy is the only one.
    Unpacked (no oneDNN), one fused copy serves every call and the parts become views of
    it; the owner of the original weights swaps them for `views()` (no extra memory).
    """

    def __init__(self, parts: Sequence[tuple[torch.Tensor, torch.Tensor | None]], packed: bool,
                 k_chunk: int | None = None) -> None:
        parts = tuple(parts)  # (weight (out, in), bias (out,) or None), shared with the owner
        self.rows = tuple(int(w.shape[0]) for w, _ in parts)
        self.bias = _cat_bias(parts)
        self.packed = packed
        weights = [w for w, _ in parts]
        fused = weights[0] if len(weights) == 1 else torch.cat(weights)  # (sum out, in)
        k = fused.shape[1]
        n = 1 if not k_chunk else -(-k // k_chunk)  # equal chunks, none longer than k_chunk
        size = -(-k // n)
        self.bounds = tuple((a, min(a + size, k)) for a in range(0, k, size))
        if packed:  # the packed chunks cover every use; `fused` and the parts are dropped
            self.chunks = tuple(torch.ops.mkldnn._reorder_linear_weight(fused[:, a:b].contiguous())
                                for a, b in self.bounds)
        else:
            self.weight = fused

    def views(self) -> tuple[torch.Tensor, ...]:
        """Unpacked: each part's weight as a view of the fused one, in order."""
        starts = [sum(self.rows[:i]) for i in range(len(self.rows))]
        return tuple(self.weight[a:a + r] for a, r in zip(starts, self.rows))

    def __call__(self, x: torch.Tensor, residual: torch.Tensor | None = None) -> torch.Tensor:
        # x: (N, in), residual: (N, out) -> (N, out)
        if self.packed:
            return self._onednn(x, residual)
        y = F.linear(x, self.weight, self.bias)
        return y if residual is None else residual + y

    def _onednn(self, x: torch.Tensor, residual: torch.Tensor | None) -> torch.Tensor:
        if len(self.chunks) == 1:  # the residual add fused into the matmul
            if residual is None:
                return _LINEAR(x, self.chunks[0], self.bias, "none", [], "")
            return _LINEAR_ADD(x, residual, self.chunks[0], self.bias, "add")
        parts = self._split(x)  # contiguous column blocks of x, one per weight chunk
        y = _LINEAR(parts[0], self.chunks[0], self.bias, "none", [], "")
        for part, w in zip(parts[1:], self.chunks[1:]):  # y += x[:, a:b] W[:, a:b]^T
            y = _LINEAR_ADD(part, y, w, None, "add")
        return y if residual is None else residual + y

    def _split(self, x: torch.Tensor) -> Sequence[torch.Tensor]:
        """x (N, in) as contiguous (N, chunk) blocks: one copy when the chunks are equal."""
        n, k = len(self.bounds), x.shape[1]
        if k % n:
            return [x[:, a:b].contiguous() for a, b in self.bounds]
        return x.view(x.shape[0], n, k // n).transpose(0, 1).contiguous()  # (n, N, k/n)


def _cat_bias(parts: Sequence[tuple[torch.Tensor, torch.Tensor | None]]) -> torch.Tensor | None:
    """The fused bias (zeros where a part has none), or None when no part has one."""
    if all(b is None for _, b in parts):
        return None
    return torch.cat([b if b is not None else torch.zeros(w.shape[0], dtype=w.dtype) for w, b in parts])


def onednn_works(dtype: torch.dtype) -> bool:
    """Is oneDNN's packed linear present here and does it agree with F.linear?"""
    try:
        if not torch.backends.mkldnn.is_available() or _LINEAR is None or _LINEAR_ADD is None:
            return False
        gen = torch.Generator().manual_seed(0)
        w = torch.randn(96, 64, generator=gen).to(dtype)
        x = torch.randn(3, 64, generator=gen).to(dtype)
        got = _LINEAR(x, torch.ops.mkldnn._reorder_linear_weight(w), None, "none", [], "").float()
        return bool(torch.allclose(got, F.linear(x, w).float(), rtol=1e-2, atol=1e-2))
    except (RuntimeError, AttributeError, NotImplementedError):
        return False


@dataclass(frozen=True)
class LayerWeights:
    """One decoder layer's weights, fused and packed."""

    attn_norm: torch.Tensor  # (E,)
    qkv: PackedLinear  # E -> (Hq + 2 Hkv) D
    out: PackedLinear  # Hq D -> E
    mlp_norm: torch.Tensor  # (E,)
    gate_up: PackedLinear  # E -> 2 I
    down: PackedLinear  # I -> E


class LeanRunner:
    """The engine's Runner interface (prefill/extend/step/logits_of) on the lean path.

    Built from a loaded transformers model, or from a `LlamaCheckpoint` read straight
    from its files (no transformers model at all); both give the same weights and shape.
    """

    kind = "lean"

    def __init__(self, source: Any, packed: bool | None = None, chunked: bool | None = None) -> None:
        """`source`: a llama-family transformers model or a `LlamaCheckpoint`.
        `packed`: use oneDNN (None: when it works here); `chunked`: split its sums
        (K_CHUNK; None: in float32 only, as each partial sum would be rounded to bfloat16)."""
        if isinstance(source, LlamaCheckpoint):
            shape, tensors = source.shape, source.tensors
            if "model.layers.0.self_attn.q_proj.weight" not in tensors:
                raise ValueError("lean path: this checkpoint was packed into a runner already; "
                                 "copy that runner (`LeanRunner.fresh`) instead")
            rebind: Rebind = partial(_rebind_or_free, tensors)  # the checkpoint keeps views, or frees
        else:
            reason = lean_refusal(source)
            if reason is not None:
                raise ValueError(f"lean path: {reason}")
            shape, tensors = shape_of_model(source), hf.state_dict(source)
            rebind = partial(_rebind_model, source)  # unpacked: the model reads the fused weights
        self.dtype = tensors["model.embed_tokens.weight"].dtype
        self.packed = onednn_works(self.dtype) if packed is None else packed
        chunked = self.dtype == torch.float32 if chunked is None else chunked
        self.k_chunk = K_CHUNK if chunked else None
        self.n_heads, self.n_kv, self.head_dim = shape.heads, shape.kv_heads, shape.head_dim
        self.hidden = shape.hidden
        self.scale = self.head_dim ** -0.5
        self.eps = shape.eps
        self.embed = tensors["model.embed_tokens.weight"]  # (V, E)
        self.layers = tuple(self._layer(tensors, f"model.layers.{i}.", rebind) for i in range(shape.layers))
        self.final_norm = tensors["model.norm.weight"]
        head = tensors["lm_head.weight"]
        self.lm_head = PackedLinear([(head, None)], self.packed, HEAD_K_CHUNK if chunked else None)  # E -> V
        self.vocab_size = int(head.shape[0])
        if self.packed and head is not self.embed:
            rebind("lm_head.weight", None)
        elif self.packed and isinstance(source, LlamaCheckpoint) and source.embedding_rows is not None:
            # tied: the packed head holds the matrix; lookups read rows off the file mapping,
            # so the embedding is not held a second time
            self.embed = source.embedding_rows
            rebind("model.embed_tokens.weight", None)
            rebind("lm_head.weight", None)
        del head
        self.inv_freq = shape.inv_freq  # (D/2,) float32, transformers' own values
        self.rope_scale = shape.rope_scale
        self.cos = self.sin = torch.empty(0, self.head_dim, dtype=self.dtype)
        self._rope_tables(min(shape.max_positions, 4096))

    def _layer(self, tensors: dict[str, torch.Tensor], p: str, rebind: Rebind) -> LayerWeights:
        def linear(names: Sequence[str]) -> PackedLinear:
            keys = [p + name for name in names]
            fused = PackedLinear([(tensors[k + ".weight"], tensors.get(k + ".bias")) for k in keys],
                                 self.packed, self.k_chunk)
            if self.packed:  # the packed copy is the only one needed: the owner may free its own
                for key in keys:
                    rebind(key + ".weight", None)
            elif len(keys) > 1:  # the owner drops its copies for views
                for key, view in zip(keys, fused.views()):
                    rebind(key + ".weight", view)
            return fused

        return LayerWeights(
            attn_norm=tensors[p + "input_layernorm.weight"],
            qkv=linear(("self_attn.q_proj", "self_attn.k_proj", "self_attn.v_proj")),
            out=linear(("self_attn.o_proj",)),
            mlp_norm=tensors[p + "post_attention_layernorm.weight"],
            gate_up=linear(("mlp.gate_proj", "mlp.up_proj")),
            down=linear(("mlp.down_proj",)),
        )

    def fresh(self) -> "LeanRunner":
        """Another runner on the same packed weights (a runner holds no session state
        besides its rotary tables, which it replaces rather than changes in place)."""
        return copy.copy(self)

    def _rope_tables(self, n: int) -> None:
        """cos and sin (n, D) as transformers computes them; sin's first half negated."""
        pos = torch.arange(n, dtype=torch.float32)
        freqs = pos[:, None] * self.inv_freq  # (n, D/2)
        emb = torch.cat((freqs, freqs), dim=-1)  # (n, D)
        half = self.head_dim // 2
        sign = torch.cat((-torch.ones(half), torch.ones(half)))  # rotate_half(x) = roll(x) * sign
        self.cos = (emb.cos() * self.rope_scale).to(self.dtype)
        self.sin = (emb.sin() * self.rope_scale * sign).to(self.dtype)

    # ----- the Runner interface -----------------------------------------------------

    @torch.inference_mode()
    def prefill(self, ids: Sequence[Sequence[int]]) -> tuple[KV, torch.Tensor]:
        """Run whole equal-length sequences; return their cache and last logits (B, V)."""
        return self.extend(KV(), ids)

    @torch.inference_mode()
    def extend(self, kv: KV, ids: Sequence[Sequence[int]]) -> tuple[KV, torch.Tensor]:
        """Feed equal-length token blocks (B, T) after an existing cache of B rows."""
        x = torch.as_tensor([list(r) for r in ids], dtype=torch.long)  # (B, T)
        kv, h = self._forward(x, kv)
        return kv, self._logits(h[:, -1]).float()  # (B, V)

    def step(self, kv: KV, tokens: Sequence[int]) -> tuple[KV, torch.Tensor]:
        """One decode step: one new token per row. Returns the cache and logits (B, V)."""
        return self.extend(kv, [[t] for t in tokens])

    @torch.inference_mode()
    def logits_of(self, ids: Sequence[int]) -> torch.Tensor:
        """Logits (T, V) of a whole sequence, no cache kept: for log-likelihoods and inspect."""
        _, h = self._forward(torch.as_tensor([list(ids)], dtype=torch.long), KV())
        return self._logits(h[0]).float()

    # ----- the model -------------------------------------------------------------------

    def _forward(self, ids: torch.Tensor, kv: KV) -> tuple[KV, torch.Tensor]:
        """Run tokens (B, T) after `kv`; return the grown cache and final hidden (B, T, E)."""
        B, T = ids.shape
        if kv.rows and kv.rows != B:
            raise ValueError(f"the cache has {kv.rows} rows but {B} token rows were given")
        start, end = kv.length, kv.length + T
        kv = self._room(kv, B, T)
        if end > self.cos.shape[0]:
            self._rope_tables(max(end, 2 * self.cos.shape[0]))
        cos, sin = self.cos[start:end], self.sin[start:end]  # (T, D)
        Hq, Hkv, D = self.n_heads, self.n_kv, self.head_dim
        x = F.embedding(ids, self.embed).to(self.dtype).view(B * T, self.hidden)  # (BT, E)
        for w, (keys, values) in zip(self.layers, kv.layers):
            # attention: fused q/k/v, rotary on q and k together, cache written in place
            h = F.rms_norm(x, (self.hidden,), w.attn_norm, self.eps)  # (BT, E)
            qkv = w.qkv(h).view(B, T, Hq + 2 * Hkv, D).transpose(1, 2)  # (B, Hq+2Hkv, T, D)
            qk = qkv[:, :Hq + Hkv]
            qk = qk * cos + qk.roll(D // 2, dims=-1) * sin  # (B, Hq+Hkv, T, D)
            keys[:, :, start:end] = qk[:, Hq:]
            values[:, :, start:end] = qkv[:, Hq + Hkv:]
            att = self._attend(qk[:, :Hq], keys[:, :, :end], values[:, :, :end], start)  # (BT, Hq D)
            x = w.out(att, residual=x)  # (BT, E)
            # MLP: fused gate/up, SiLU gate
            h = F.rms_norm(x, (self.hidden,), w.mlp_norm, self.eps)
            gate, up = w.gate_up(h).chunk(2, dim=-1)  # (BT, I) each
            x = w.down(F.silu(gate) * up, residual=x)  # (BT, E)
        mark = kv.mark
        assert mark is not None
        mark.end = end
        return KV(kv.layers, end, mark), x.view(B, T, self.hidden)

    def _attend(self, q: torch.Tensor, keys: torch.Tensor, values: torch.Tensor,
                start: int) -> torch.Tensor:
        """SDPA of q (B, Hq, T, D) over the cache (B, Hkv, L, D) -> (BT, Hq D)."""
        B, Hq, T, D = q.shape
        if T == 1:  # decode: fold each group's query heads into rows of its kv head; no mask
            qg = q.reshape(B, self.n_kv, Hq // self.n_kv, D)  # (B, Hkv, G, D)
            out = F.scaled_dot_product_attention(qg, keys, values, scale=self.scale)
            return out.reshape(B, Hq * D)  # head h = kv * G + g, as transformers' repeat_kv
        if start == 0:
            out = F.scaled_dot_product_attention(q, keys, values, is_causal=True,
                                                 scale=self.scale, enable_gqa=True)
        else:  # a block after a cache: query i sees positions up to start + i
            L = keys.shape[2]
            mask = torch.arange(L)[None, :] <= torch.arange(start, start + T)[:, None]  # (T, L)
            out = F.scaled_dot_product_attention(q, keys, values, attn_mask=mask,
                                                 scale=self.scale, enable_gqa=True)
        return out.transpose(1, 2).reshape(B * T, Hq * D)

    def _logits(self, h: torch.Tensor) -> torch.Tensor:
        """Final norm and output projection: hidden (N, E) -> logits (N, V)."""
        h = F.rms_norm(h, (self.hidden,), self.final_norm, self.eps)
        return self.lm_head(h.contiguous())

    def _room(self, kv: KV, rows: int, extra: int) -> KV:
        """`kv` if it may be written in place for `extra` more positions, else a roomier copy."""
        if kv.rows and kv.writable(extra):
            return kv
        length = kv.length
        cap = -(-(length + extra) // CACHE_BUCKET) * CACHE_BUCKET
        n = len(self.layers)
        buf = torch.empty(2, n, rows, self.n_kv, cap, self.head_dim, dtype=self.dtype)
        layers = tuple((buf[0, i], buf[1, i]) for i in range(n))
        for (k, v), (k_old, v_old) in zip(layers, kv.views()):
            k[:, :, :length] = k_old
            v[:, :, :length] = v_old
        return KV(layers, length, WriteMark(length))
