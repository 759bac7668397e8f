"""The forward paths against transformers' own forward pass, on tiny random-weight models.

Reference: transformers 5.24.0 `LlamaForCausalLM` / `Qwen2ForCausalLM`, `model(input_ids).logits`
(one full forward with no cache: position t's logits depend on tokens 0..t only). The lean
path (`tui.model.lean_llama.LeanRunner`) must give the same logits to 1e-4 at prefill, over
cached decode steps, in a batch, and after the engine's cache surgery (select/crop/join).
"""

from __future__ import annotations

import pytest
import torch

from tui.errors import UserError
from tui.model import lean_llama
from tui.model.forward import FORWARD_ENV, Runner, make_runner
from tui.model.kv import KV
from tui.model.lean_llama import LeanRunner, lean_refusal
from tui.settings import settings

try:
    from tiny_model import LAYERS_VOCAB as VOCAB
    from tiny_model import tiny_llama, tiny_qwen2
except ImportError:
    from tests.tiny_model import LAYERS_VOCAB as VOCAB
    from tests.tiny_model import tiny_llama, tiny_qwen2

TOL = 1e-4  # the project's parity tolerance, in logits

LLAMA3_ROPE = {"rope_type": "llama3", "rope_theta": 500000.0, "factor": 8.0, "low_freq_factor": 1.0,
               "high_freq_factor": 4.0, "original_max_position_embeddings": 16}
VARIANTS = {
    "tied": {},
    "untied-theta": {"tie_word_embeddings": False, "rope_theta": 500000.0},
    "llama3-rope": {"tie_word_embeddings": False, "rope_parameters": LLAMA3_ROPE},
    "biases": {"attention_bias": True, "mlp_bias": True},
}


@torch.inference_mode()
def reference(model: torch.nn.Module, ids: torch.Tensor) -> torch.Tensor:
    """transformers' logits (B, T, V) for whole sequences, no cache."""
    return model(input_ids=ids).logits.float()


def random_ids(rows: int, length: int, seed: int = 0) -> torch.Tensor:
    return torch.randint(0, VOCAB, (rows, length), generator=torch.Generator().manual_seed(seed))


def max_err(a: torch.Tensor, b: torch.Tensor) -> float:
    return float((a - b).abs().max())


@pytest.fixture(scope="module", params=list(VARIANTS))
def model(request: pytest.FixtureRequest) -> torch.nn.Module:
    return tiny_llama(**VARIANTS[request.param])


@pytest.fixture(autouse=True)
def small_sizes(monkeypatch: pytest.MonkeyPatch) -> None:
    # Capacity grows every 8 positions, so decode runs cross several cache re-allocations;
    # oneDNN sums run in chunks of 24 (16 in the output projection) of the tiny widths.
    monkeypatch.setattr(lean_llama, "CACHE_BUCKET", 8)
    monkeypatch.setattr(lean_llama, "K_CHUNK", 24)
    monkeypatch.setattr(lean_llama, "HEAD_K_CHUNK", 16)


def test_the_tiny_models_logits_are_far_from_flat(model):
    # Guard for the checks below: with near-zero logits a 1e-4 tolerance would hide bugs.
    ref = reference(model, random_ids(1, 12))
    assert float(ref.std()) > 0.5


@pytest.mark.parametrize("rows", [1, 3])
@pytest.mark.parametrize("packed, chunked", [(True, True), (True, False), (False, True)],
                         ids=["onednn-chunked", "onednn-whole", "plain"])
def test_prefill_and_20_cached_steps_match_transformers(model, rows, packed, chunked):
    if packed and not torch.backends.mkldnn.is_available():
        pytest.skip("this torch build has no oneDNN")
    ids = random_ids(rows, 28, seed=rows)
    ref = reference(model, ids)  # (B, 28, V)
    runner = LeanRunner(model, packed=packed, chunked=chunked)
    if packed:
        assert len(runner.layers[0].down.chunks) == (4 if chunked else 1)  # 96 wide: 4 x 24
    kv, logits = runner.prefill(ids[:, :8].tolist())
    assert max_err(logits, ref[:, 7]) < TOL
    for t in range(8, 28):  # 20 decode steps, each on the in-place cache
        kv, logits = runner.step(kv, ids[:, t].tolist())
        assert max_err(logits, ref[:, t]) < TOL, f"step at position {t}"
    assert kv.length == 28 and kv.rows == rows


def test_logits_of_and_extend_match_transformers(model):
    ids = random_ids(2, 20, seed=3)
    ref = reference(model, ids)
    runner = LeanRunner(model)
    assert max_err(runner.logits_of(ids[1].tolist()), ref[1]) < TOL  # all positions (T, V)
    kv, _ = runner.prefill(ids[:, :9].tolist())
    kv, logits = runner.extend(kv, ids[:, 9:20].tolist())  # a block after a cache: masked SDPA
    assert max_err(logits, ref[:, 19]) < TOL


def test_batched_stepping_equals_batch_one_stepping(model):
    # Each row alone, then all three together: the same logits (the batching contract).
    ids = random_ids(3, 18, seed=11)
    runner = LeanRunner(model)
    kv, _ = runner.prefill(ids[:, :6].tolist())
    batched = []
    for t in range(6, 18):
        kv, logits = runner.step(kv, ids[:, t].tolist())
        batched.append(logits)
    for r in range(3):
        kv1, _ = runner.prefill(ids[r:r + 1, :6].tolist())
        for i, t in enumerate(range(6, 18)):
            kv1, logits = runner.step(kv1, [int(ids[r, t])])
            assert max_err(logits[0], batched[i][r]) < TOL


def test_rope_theta_is_honoured():
    # Same weights, two rope bases: transformers' logits differ, and each lean runner
    # matches its own reference, so the base cannot have been ignored.
    ids = random_ids(1, 24, seed=5)
    a, b = tiny_llama(), tiny_llama(rope_theta=500000.0)
    ref_a, ref_b = reference(a, ids), reference(b, ids)
    assert max_err(ref_a, ref_b) > 1e-2
    assert max_err(LeanRunner(b).logits_of(ids[0].tolist()), ref_b[0]) < TOL


def test_select_crop_join_then_step_equals_recomputing():
    model = tiny_llama()
    runner = LeanRunner(model)
    ids = random_ids(3, 16, seed=9)
    kv, _ = runner.prefill(ids[:, :10].tolist())
    # Rows 2 and 0 (reordered, 0 twice), cropped to 7 positions, joined with a fresh row.
    picked = kv.select([2, 0, 0]).crop(7)
    other, _ = runner.prefill(ids[1:2, :7].tolist())
    joined = KV.join([picked, other])
    assert (joined.rows, joined.length) == (4, 7)
    feed = [int(ids[2, 7]), int(ids[0, 7]), 5, int(ids[1, 7])]
    _, logits = runner.step(joined, feed)
    seqs = torch.stack([ids[2, :8], ids[0, :8], torch.cat([ids[0, :7], torch.tensor([5])]), ids[1, :8]])
    assert max_err(logits, reference(model, seqs)[:, 7]) < TOL


def test_stepping_a_crop_does_not_corrupt_the_longer_holder():
    # The ownership rule (tui.model.forward.KV): a crop shares buffers; writing into it copies first.
    model = tiny_llama()
    runner = LeanRunner(model)
    ids = random_ids(1, 12, seed=4)
    full, _ = runner.prefill(ids[:, :10].tolist())
    short = full.crop(6)
    _, short_logits = runner.step(short, [3])  # would overwrite position 6 in place if unsafe
    _, full_logits = runner.step(full, [int(ids[0, 10])])
    stale_logits = runner.step(full, [9])[1]  # `full` again: it was written past since
    ref_full = reference(model, ids[:, :11])[0, 10]
    ref_short = reference(model, torch.cat([ids[0, :6], torch.tensor([3])])[None])[0, 6]
    ref_stale = reference(model, torch.cat([ids[0, :10], torch.tensor([9])])[None])[0, 10]
    assert max_err(full_logits[0], ref_full) < TOL
    assert max_err(short_logits[0], ref_short) < TOL
    assert max_err(stale_logits[0], ref_stale) < TOL


def test_caches_pass_between_the_generic_and_the_lean_path():
    model = tiny_llama()
    ids = random_ids(2, 12, seed=6)
    ref = reference(model, ids)
    lean, generic = LeanRunner(model), Runner(model)
    kv, _ = generic.prefill(ids[:, :8].tolist())  # exact-size tensors, no write mark
    kv, logits = lean.step(kv, ids[:, 8].tolist())  # copied into a capacity buffer
    assert max_err(logits, ref[:, 8]) < TOL
    kv, logits = generic.step(kv, ids[:, 9].tolist())  # reads the lean buffers' views
    assert max_err(logits, ref[:, 9]) < TOL


def test_qwen2_biases_match_transformers():
    model = tiny_qwen2()
    assert lean_refusal(model) is None
    ids = random_ids(2, 14, seed=8)
    ref = reference(model, ids)
    runner = LeanRunner(model)
    kv, logits = runner.prefill(ids[:, :6].tolist())
    assert max_err(logits, ref[:, 5]) < TOL
    for t in range(6, 14):
        kv, logits = runner.step(kv, ids[:, t].tolist())
        assert max_err(logits, ref[:, t]) < TOL


def test_make_runner_picks_lean_and_falls_back(monkeypatch: pytest.MonkeyPatch):
    monkeypatch.delenv(FORWARD_ENV, raising=False)
    assert isinstance(make_runner(tiny_llama()), LeanRunner)
    # Dynamic NTK rope rescales with the sequence length: refused, the generic path runs.
    dynamic = tiny_llama(rope_parameters={"rope_type": "dynamic", "rope_theta": 10000.0, "factor": 2.0})
    assert "dynamic" in (lean_refusal(dynamic) or "")
    assert type(make_runner(dynamic)) is Runner
    monkeypatch.setenv(FORWARD_ENV, "generic")
    settings.cache_clear()
    assert type(make_runner(tiny_llama())) is Runner
    monkeypatch.setenv(FORWARD_ENV, "lean")
    settings.cache_clear()
    with pytest.raises(UserError, match="dynamic"):
        make_runner(dynamic)
    monkeypatch.setenv(FORWARD_ENV, "fastest")
    settings.cache_clear()
    with pytest.raises(UserError, match="LOGITFORK_FORWARD"):
        make_runner(tiny_llama())


def test_kv_crop_checks_its_length():
    kv, _ = LeanRunner(tiny_llama()).prefill([[1, 2, 3]])
    with pytest.raises(ValueError, match="crop length"):
        kv.crop(4)
