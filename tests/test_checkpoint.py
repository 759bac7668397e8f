"""Reading a llama-family checkpoint without transformers' model classes (`tui.model.llama_checkpoint`).

Reference: transformers 5.24.0 building the same models (`LlamaForCausalLM`,
`Qwen2ForCausalLM`, saved with `save_pretrained`): its `state_dict()`, its rotary
embedding's `inv_freq` (`LlamaRotaryEmbedding.compute_default_rope_parameters`), its
config values, and its forward pass (`model(input_ids).logits`). The direct read must
give the lean path bit-identical inputs, hence bit-identical logits.
"""

from __future__ import annotations

import copy
import json
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file, save_file

from tui.model import lean_llama
from tui.model.lean_llama import LeanRunner, shape_of_model
from tui.model.llama_checkpoint import (config_refusal, read_checkpoint, read_config,
                                        shape_from_config)

try:
    from tiny_model import LAYERS_VOCAB, tiny_llama, tiny_qwen2
except ImportError:
    from tests.tiny_model import LAYERS_VOCAB, tiny_llama, tiny_qwen2

ROOT = Path(__file__).resolve().parent.parent
TOL = 1e-4  # the project's parity tolerance, in logits
MODELS = {
    "llama-tied": lambda: tiny_llama(),
    "llama-untied-theta-headdim": lambda: tiny_llama(tie_word_embeddings=False, rope_theta=500000.0,
                                                     head_dim=8),
    "llama-biases": lambda: tiny_llama(attention_bias=True, mlp_bias=True),
    "qwen2": tiny_qwen2,
}


@pytest.fixture(scope="module", params=list(MODELS))
def saved(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory):
    """(model, folder): a tiny model and its save_pretrained folder."""
    model = MODELS[request.param]()
    folder = tmp_path_factory.mktemp(request.param)
    model.save_pretrained(folder)
    return model, folder


@pytest.fixture(autouse=True)
def small_sizes(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(lean_llama, "CACHE_BUCKET", 8)  # decode crosses cache re-allocations
    monkeypatch.setattr(lean_llama, "K_CHUNK", 24)  # split sums at the tiny widths
    monkeypatch.setattr(lean_llama, "HEAD_K_CHUNK", 16)


def run(runner: LeanRunner, ids: list[int], steps: int = 10) -> list[torch.Tensor]:
    """Prefill logits and `steps` greedy decode steps' logits, two rows."""
    kv, logits = runner.prefill([ids, ids[::-1]])
    out = [logits]
    for _ in range(steps):
        kv, logits = runner.step(kv, logits.argmax(dim=-1).tolist())
        out.append(logits)
    return out


def test_the_shape_read_from_config_json_equals_the_built_models(saved):
    model, folder = saved
    direct, built = read_checkpoint(folder).shape, shape_of_model(model)
    for name in ("layers", "heads", "kv_heads", "head_dim", "hidden", "eps", "rope_scale", "max_positions"):
        assert getattr(direct, name) == getattr(built, name), name
    # reference: transformers' own rotary frequencies, bit for bit
    assert direct.inv_freq.dtype == built.inv_freq.dtype and torch.equal(direct.inv_freq, built.inv_freq)


def test_the_tensors_equal_the_built_models_state_dict(saved):
    model, folder = saved
    tensors = read_checkpoint(folder).tensors
    reference = model.state_dict()
    assert set(tensors) == set(reference)
    for name, value in reference.items():
        assert torch.equal(tensors[name], value), name
    if model.config.tie_word_embeddings:
        assert tensors["lm_head.weight"] is tensors["model.embed_tokens.weight"]


@pytest.mark.parametrize("packed", [True, False], ids=["packed", "unpacked"])
def test_a_runner_on_the_checkpoint_gives_the_models_logits_bit_for_bit(saved, packed):
    model, folder = saved
    ids = torch.randint(0, LAYERS_VOCAB, (9,), generator=torch.Generator().manual_seed(3)).tolist()
    direct = run(LeanRunner(read_checkpoint(folder), packed=packed), ids)
    built = run(LeanRunner(model, packed=packed), ids)
    assert all(torch.equal(a, b) for a, b in zip(direct, built))
    with torch.inference_mode():  # reference: transformers' forward over the same prefix
        ref = model(input_ids=torch.tensor([ids])).logits[0, -1]
    assert float((direct[0][0] - ref).abs().max()) < TOL


def test_unpacked_the_checkpoint_keeps_views_of_the_fused_weights(saved):
    _, folder = saved
    checkpoint = read_checkpoint(folder)
    runner = LeanRunner(checkpoint, packed=False)
    fused = runner.layers[0].qkv.weight
    q = checkpoint.tensors["model.layers.0.self_attn.q_proj.weight"]
    assert q.data_ptr() == fused.data_ptr()  # no second copy of q/k/v or gate/up


def test_a_bfloat16_cast_matches_casting_the_model(saved):
    model, folder = saved
    checkpoint = read_checkpoint(folder)
    checkpoint.cast(torch.bfloat16)
    model16 = copy.deepcopy(model).to(torch.bfloat16)  # model.to casts the rotary buffer too
    ids = list(range(1, 8))
    direct, built = run(LeanRunner(checkpoint), ids, 4), run(LeanRunner(model16), ids, 4)
    assert torch.equal(checkpoint.shape.inv_freq, model16.model.rotary_emb.inv_freq.float())
    assert all(torch.equal(a, b) for a, b in zip(direct, built))


def _edited(folder: Path, tmp_path: Path, **changes) -> Path:
    """A copy of `folder` whose config.json has `changes` (None deletes a key)."""
    out = tmp_path / "edited"
    out.mkdir()
    (out / "model.safetensors").write_bytes((folder / "model.safetensors").read_bytes())
    config = read_config(folder)
    for key, value in changes.items():
        if value is None:
            config.pop(key, None)
        else:
            config[key] = value
    (out / "config.json").write_text(json.dumps(config))
    return out


@pytest.mark.parametrize("changes, reason", [
    ({"model_type": "mistral"}, "model_type"),
    ({"architectures": ["LlamaModel"]}, "architectures"),
    ({"hidden_act": "gelu"}, "hidden_act"),
    ({"rms_norm_eps": None}, "rms_norm_eps"),
    ({"num_key_value_heads": None}, "num_key_value_heads"),
    ({"tie_word_embeddings": None}, "tie_word_embeddings"),
    ({"rope_parameters": {"rope_type": "linear", "rope_theta": 1e4, "factor": 2.0}}, "rope_type"),
    ({"rope_parameters": {"rope_type": "default", "rope_theta": 1e4, "partial_rotary_factor": 0.5}},
     "partial rotary"),
    ({"layer_types": ["sliding_attention", "full_attention"]}, "sliding"),
    # the allow-list: keys it does not know name themselves (these exist in other
    # transformers families: gemma2's soft-capping, q/k norms, quantised weights)
    ({"final_logit_softcapping": 30.0}, "'final_logit_softcapping' is not on the lean path's allow-list"),
    ({"attn_logit_softcapping": 50.0}, "'attn_logit_softcapping'"),
    ({"use_qk_norm": True}, "'use_qk_norm'"),
    ({"quantization_config": {"quant_method": "bitsandbytes"}}, "'quantization_config'"),
    ({"pretraining_tp": 2}, "pretraining_tp 2 is not 1"),
    ({"rope_parameters": {"rope_type": "default", "rope_theta": 1e4, "factor": 2.0}}, "'factor'"),
])
def test_configs_it_does_not_reproduce_are_refused(changes, reason, tmp_path):
    folder = tmp_path / "model"
    tiny_llama().save_pretrained(folder)
    edited = _edited(folder, tmp_path, **changes)
    refusal = config_refusal(read_config(edited))
    assert refusal is not None and reason in refusal
    with pytest.raises(ValueError, match=reason):
        read_checkpoint(edited)


def test_a_qwen2_with_a_sliding_window_is_refused(tmp_path):
    folder = tmp_path / "qwen"
    tiny_qwen2().save_pretrained(folder)
    assert "sliding" in config_refusal({**read_config(folder), "use_sliding_window": True})


@pytest.mark.parametrize("edit, reason", [
    ("extra", "differ"), ("missing", "differ"), ("shape", "shape"), ("integer", "floating"),
    ("no-file", "model.safetensors.index.json"),
])
def test_tensor_sets_it_does_not_reproduce_are_refused(edit, reason, tmp_path):
    folder = tmp_path / "model"
    tiny_llama().save_pretrained(folder)
    path = folder / "model.safetensors"
    tensors = load_file(str(path))
    name = "model.layers.1.mlp.down_proj.weight"
    if edit == "extra":
        tensors["model.layers.1.mlp.down_proj.bias"] = torch.zeros(64)
    elif edit == "missing":
        del tensors[name]
    elif edit == "shape":
        tensors[name] = tensors[name][:, :-1].contiguous()
    elif edit == "integer":
        tensors[name] = tensors[name].to(torch.int32)
    if edit == "no-file":
        path.rename(folder / "model-00001-of-00001.safetensors")
    else:
        save_file(tensors, str(path), metadata={"format": "pt"})
    with pytest.raises(ValueError, match=reason):
        read_checkpoint(folder)


def test_reading_a_checkpoint_imports_no_transformers(tmp_path):
    folder = tmp_path / "model"
    tiny_llama().save_pretrained(folder)
    code = ("import sys; from pathlib import Path; from tui.model.llama_checkpoint import read_checkpoint; "
            "from tui.model.lean_llama import LeanRunner; "
            f"LeanRunner(read_checkpoint(Path({str(folder)!r}))).prefill([[1, 2, 3]]); "
            "print(sorted(m for m in sys.modules if m.split('.')[0] == 'transformers'))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


# config.json as hub models ship it, in the layout before rope_parameters (recalled from
# memory of Qwen2.5-0.5B-Instruct's and a Llama-3.2-style file; the numbers are theirs,
# the point is the set of keys)
QWEN25_STYLE = {
    "architectures": ["Qwen2ForCausalLM"], "attention_dropout": 0.0, "bos_token_id": 151643,
    "eos_token_id": 151645, "hidden_act": "silu", "hidden_size": 896, "initializer_range": 0.02,
    "intermediate_size": 4864, "max_position_embeddings": 32768, "max_window_layers": 21,
    "model_type": "qwen2", "num_attention_heads": 14, "num_hidden_layers": 24,
    "num_key_value_heads": 2, "rms_norm_eps": 1e-06, "rope_theta": 1000000.0,
    "sliding_window": 32768, "tie_word_embeddings": True, "torch_dtype": "bfloat16",
    "transformers_version": "4.43.1", "use_cache": True, "use_sliding_window": False,
    "vocab_size": 151936, "rope_scaling": None,
}
LLAMA32_STYLE = {
    "architectures": ["LlamaForCausalLM"], "attention_bias": False, "attention_dropout": 0.0,
    "bos_token_id": 128000, "eos_token_id": 128001, "head_dim": 64, "hidden_act": "silu",
    "hidden_size": 2048, "initializer_range": 0.02, "intermediate_size": 8192,
    "max_position_embeddings": 131072, "mlp_bias": False, "model_type": "llama",
    "num_attention_heads": 32, "num_hidden_layers": 16, "num_key_value_heads": 8,
    "pretraining_tp": 1, "rms_norm_eps": 1e-05, "rope_theta": 500000.0,
    "rope_scaling": {"factor": 32.0, "high_freq_factor": 4.0, "low_freq_factor": 1.0,
                     "original_max_position_embeddings": 8192, "rope_type": "llama3"},
    "tie_word_embeddings": True, "torch_dtype": "bfloat16", "transformers_version": "4.45.0",
    "use_cache": True, "vocab_size": 128256,
}


def test_a_hub_style_qwen2_config_is_read_directly():
    assert config_refusal(QWEN25_STYLE) is None
    assert shape_from_config(QWEN25_STYLE).head_dim == 64  # 896 / 14
    # and transformers' own reading of it (rope_parameters layout) passes the lean check
    from transformers import Qwen2Config

    assert config_refusal(Qwen2Config(**QWEN25_STYLE).to_dict(), ("default", "linear", "llama3")) is None


def test_a_llama3_rope_is_not_read_directly_but_runs_lean_on_transformers_frequencies():
    assert "rope_scaling" in (config_refusal(LLAMA32_STYLE) or "")
    from transformers import LlamaConfig

    converted = LlamaConfig(**LLAMA32_STYLE).to_dict()
    assert config_refusal(converted) is not None  # the direct reader computes only the default rope
    assert config_refusal(converted, ("default", "linear", "llama3")) is None
