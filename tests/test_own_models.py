"""A user's own model: folders, hub snapshots and shards read directly, the path told in one
line, memory and disk checked before loading, `--dtype auto`, packing without a second copy.

References: transformers 5.24.0 (`AutoModelForCausalLM.from_pretrained` on the same folder,
its forward pass, `save_pretrained(max_shard_size=...)` for the sharded layout);
huggingface_hub's cache layout (models--ORG--NAME/refs/main, snapshots/<commit>/ holding
symlinks into blobs/); the safetensors format (8-byte header length, JSON header).
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import pytest
import torch

from tui.errors import UserError
from tui.model import sizing
from tui.model.catalogue import load_model, resolve
from tui.model.llama_checkpoint import parameter_count, read_checkpoint, weight_files
from tui.settings import settings

try:
    from tiny_model import build_tiny_gguf, build_tiny_qwen2_model
except ImportError:
    from tests.tiny_model import build_tiny_gguf, build_tiny_qwen2_model

TOL = 1e-4  # the project's parity tolerance, in logits
TEXT = "Zoë ordered tea at the 北 quay 🙂"


@pytest.fixture(autouse=True)
def isolated_caches(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    from huggingface_hub import constants

    monkeypatch.setenv("LOGITFORK_CACHE_DIR", str(tmp_path / "cache"))
    hub = tmp_path / "hub"
    hub.mkdir()
    monkeypatch.setattr(constants, "HF_HUB_CACHE", str(hub))
    settings.cache_clear()
    return hub


@pytest.fixture(scope="module")
def qwen_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_tiny_qwen2_model(tmp_path_factory.mktemp("qwen"))


@pytest.fixture(scope="module")
def sharded_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_tiny_qwen2_model(tmp_path_factory.mktemp("sharded"), max_shard_size="60KB")


def transformers_logits(folder: Path, ids: list[int], dtype: torch.dtype = torch.float32) -> torch.Tensor:
    from transformers import AutoModelForCausalLM

    model = AutoModelForCausalLM.from_pretrained(folder, dtype=torch.float32).to(dtype)
    with torch.inference_mode():
        return model(torch.tensor([ids])).logits[0].float()


def hub_snapshot(hub: Path, hub_id: str, source: Path) -> Path:
    """`source` laid out as huggingface_hub's cache: snapshot files are symlinks into blobs/."""
    commit = "89abcdef0123456789abcdef0123456789abcdef"
    repo = hub / f"models--{hub_id.replace('/', '--')}"
    (repo / "refs").mkdir(parents=True)
    (repo / "refs" / "main").write_text(commit)
    snapshot, blobs = repo / "snapshots" / commit, repo / "blobs"
    snapshot.mkdir(parents=True)
    blobs.mkdir()
    for i, file in enumerate(sorted(source.iterdir())):
        blob = blobs / f"blob{i:04d}"
        shutil.copy(file, blob)
        os.symlink(os.path.relpath(blob, snapshot), snapshot / file.name)
    return snapshot


def test_a_qwen2_folder_is_read_directly_and_matches_transformers(qwen_dir):
    lm = load_model(str(qwen_dir))
    assert lm.checkpoint is not None and lm.loaded_model is None  # no transformers model built
    assert lm.path_note.startswith("fast path: qwen2 weights read directly")
    ids = lm.encode_prompt(TEXT, None)
    kv, last = lm.runner().prefill([ids])
    reference = transformers_logits(qwen_dir, ids)
    assert float(reference.std()) > 0.5  # guard: logits far from flat
    assert float((last[0] - reference[-1]).abs().max()) < TOL


def test_sharded_weights_in_a_hub_snapshot_load_directly(sharded_dir, qwen_dir, isolated_caches):
    files = weight_files(sharded_dir)
    assert len(set(files.values())) > 1 and (sharded_dir / "model.safetensors.index.json").is_file()
    # the same tensors as the unsharded save of the same seed
    whole, split = read_checkpoint(qwen_dir), read_checkpoint(sharded_dir)
    assert set(whole.tensors) == set(split.tensors)
    assert all(torch.equal(whole.tensors[n], split.tensors[n]) for n in whole.tensors)
    snapshot = hub_snapshot(isolated_caches, "tiny-org/tiny-qwen-sharded", sharded_dir)
    assert resolve("tiny-org/tiny-qwen-sharded").folder == snapshot
    lm = load_model("tiny-org/tiny-qwen-sharded")
    assert lm.checkpoint is not None and "fast path" in lm.path_note
    ids = lm.encode_prompt(TEXT, None)
    _, last = lm.runner().prefill([ids])
    assert float((last[0] - transformers_logits(sharded_dir, ids)[-1]).abs().max()) < TOL


def test_a_missing_shard_is_named(sharded_dir, tmp_path):
    broken = tmp_path / "broken"
    shutil.copytree(sharded_dir, broken)
    index = json.loads((broken / "model.safetensors.index.json").read_text())
    shard = sorted(set(index["weight_map"].values()))[-1]
    (broken / shard).unlink()
    with pytest.raises(ValueError, match=f"shard {shard} is missing"):
        weight_files(broken)
    lm_error = None
    try:
        load_model(str(broken))
    except UserError as exc:
        lm_error = str(exc)
    assert lm_error is not None and "\n" not in lm_error  # transformers' route says what is wrong


def test_a_config_key_off_the_allow_list_sends_the_model_to_the_generic_path(qwen_dir, tmp_path):
    from tui.model.forward import Runner

    odd = tmp_path / "odd"
    shutil.copytree(qwen_dir, odd)
    config = json.loads((odd / "config.json").read_text())
    (odd / "config.json").write_text(json.dumps({**config, "final_logit_softcapping": 30.0}))
    lm = load_model(str(odd))
    assert lm.checkpoint is None
    assert lm.path_note == ("generic path: transformers' forward, as the lean path cannot run it: "
                            "config key 'final_logit_softcapping' is not on the lean path's allow-list "
                            "(it may change the maths)")
    assert type(lm.runner()) is Runner


def test_packing_frees_the_original_weights_and_runners_share_them(qwen_dir):
    lm = load_model(str(qwen_dir))
    first, second = lm.runner(), lm.runner()
    assert first is not second and first.layers is second.layers  # one packed copy
    if first.packed:  # oneDNN holds the only copy of every projection
        assert not [n for n in lm.checkpoint.tensors if n.endswith("_proj.weight") or n == "lm_head.weight"]
    ids = lm.encode_prompt(TEXT, None)
    assert torch.equal(first.prefill([ids])[1], second.prefill([ids])[1])


def test_bfloat16_read_directly_equals_transformers_cast(qwen_dir):
    lm = load_model(str(qwen_dir), dtype="bfloat16")
    assert lm.checkpoint.dtype == torch.bfloat16 and lm.weights_bytes == 2 * parameter_count(qwen_dir)
    ids = lm.encode_prompt(TEXT, None)
    _, last = lm.runner().prefill([ids])
    # bfloat16 keeps 8 bits of mantissa: agreement within a few hundredths, not 1e-4
    reference = transformers_logits(qwen_dir, ids, torch.bfloat16)
    assert float((last[0] - reference[-1]).abs().max()) < 0.1


def test_the_parameter_count_comes_from_the_safetensors_headers(qwen_dir):
    from transformers import AutoModelForCausalLM

    model = AutoModelForCausalLM.from_pretrained(qwen_dir)
    # reference: transformers' own count (the head is untied, so every tensor is stored)
    assert parameter_count(qwen_dir) == sum(p.numel() for p in model.parameters())


# ---------------------------------------------------------------- sizes, worked by hand


def test_auto_keeps_float32_for_a_small_model():
    # 135M parameters: 0.54 GB in float32; at 8 GB/s a step reads it in 0.068 s (14.8 steps/s)
    assert sizing.choose_dtype("auto", 135_000_000, 16 * 10**9, 8.0) == sizing.DtypeChoice("float32")


def test_auto_picks_bfloat16_when_float32_would_be_slow():
    # 1.5B parameters: 6 GB in float32; 8 GB/s / 6 GB = 1.33 steps/s, under 2
    choice = sizing.choose_dtype("auto", 1_500_000_000, 64 * 10**9, 8.0)
    assert choice.dtype == "bfloat16"
    assert "about 1.3 steps/s (6.0 GB of weights read per step at 8 GB/s, assumed" in choice.note


def test_auto_picks_bfloat16_when_float32_would_not_fit():
    # 0.5B parameters: 2 GB in float32, 2.5 GB with the 1.25 margin, and 2 GB available
    choice = sizing.choose_dtype("auto", 500_000_000, 2 * 10**9, 100.0)
    assert choice.dtype == "bfloat16" and "float32 needs 2.5 GB and 2.0 GB is available" in choice.note


def test_an_explicit_dtype_is_kept():
    assert sizing.choose_dtype("float32", 7_000_000_000, 10**9, 1.0) == sizing.DtypeChoice("float32")


def test_a_model_that_will_not_fit_is_refused_before_loading(qwen_dir, monkeypatch):
    monkeypatch.setattr(sizing, "available_memory", lambda: 1000)
    import tui.model.loading as loading

    monkeypatch.setattr(loading, "load_direct", lambda *a: pytest.fail("loading started"))
    count = parameter_count(qwen_dir)
    # the tiny model: 0.1M parameters, 0.2 MB in bfloat16, 0.3 MB with the 1.25 margin
    with pytest.raises(UserError, match=rf"model {qwen_dir}: \d+K parameters need \d+ KB in bfloat16 "
                       r"\(\d+ KB with working room\) but 1 KB of memory is available"):
        load_model(str(qwen_dir))  # auto: float32 does not fit, and neither does bfloat16
    assert sizing.check_memory("m", count, "float32", 10**12) == 4 * count


def test_a_conversion_without_the_disk_space_is_refused(tmp_path, monkeypatch):
    # 1B parameters need 4 GB of float32 weights on disk; 1 GB is free
    monkeypatch.setattr(sizing.shutil, "disk_usage", lambda path: shutil._ntuple_diskusage(10**10, 9 * 10**9, 10**9))
    with pytest.raises(UserError, match="writing the float32 copy needs 4.0 GB on disk .* has 1.0 GB free"):
        sizing.check_disk(tmp_path / "not" / "yet", 1_000_000_000, "model cache x")


def test_rows_per_batch_follows_free_memory():
    # 2 GB available, half of it for the batch; 10 MB a row: 100 rows, capped at the 32 wanted
    assert sizing.rows_per_batch(10**7, 2 * 10**9, wanted=32) == 32
    assert sizing.rows_per_batch(10**7, 2 * 10**9, wanted=256) == 100
    assert sizing.rows_per_batch(10**9, 10**8, wanted=8) == 1  # never zero


def test_an_auto_dtype_choice_is_kept_in_the_transcript_header_and_the_report(tmp_path):
    try:
        from transcript_fakes import sample_header, sample_records
    except ImportError:
        from tests.transcript_fakes import sample_header, sample_records
    from tui.files import write_atomic
    from tui.reports.gather import gather
    from tui.reports.markdown import render_md
    from tui.transcripts.format import transcript_lines
    from tui.transcripts.reader import StoredSession

    note = "auto chose bfloat16: float32 would run at about 1.3 steps/s"
    head = sample_header(dtype="bfloat16", dtype_note=note)
    path = write_atomic(tmp_path / "t.jsonl", transcript_lines(head, sample_records()))
    assert json.loads(path.read_text().splitlines()[0])["model"]["dtype_note"] == note
    stored = StoredSession.open(path)
    assert (stored.header.dtype, stored.header.dtype_note) == ("bfloat16", note)
    assert f"(bfloat16; {note})" in "".join(render_md(gather(stored)))
    plain = write_atomic(tmp_path / "p.jsonl", transcript_lines(sample_header(), sample_records()))
    assert "dtype_note" not in json.loads(plain.read_text().splitlines()[0])["model"]  # no note, no key


def test_the_top_bar_shows_the_dtype_and_the_time_to_the_end():
    from tui.app.top_bar import BarState, bar_text, time_text

    text = bar_text(BarState(model="m", dtype="bfloat16 (auto)", steps_per_second=0.5,
                             running=True, steps_left=90, step=30, cursor=30)).plain
    # worked by hand: 90 steps at 0.5 steps/s take 180 s, shown as 3 min
    assert "m bfloat16 (auto)" in text and "0.5 steps/s (3 min to the end)" in text
    assert (time_text(40), time_text(3725)) == ("40 s", "1 h 2 min")


def test_a_qwen2_gguf_streams_to_what_transformers_whole_load_gives(qwen_dir, tmp_path):
    import json

    from safetensors.torch import load_file

    from tui.model import conversion_cache as model_cache
    from tui.progress import no_progress

    gguf_file = build_tiny_gguf(qwen_dir, tmp_path / "qwen.gguf")  # untied, with q/k/v biases
    # reference: transformers 5.24.0's GGUF loader, the whole model at once
    whole, streamed = tmp_path / "whole", tmp_path / "streamed"
    for folder, stream in ((whole, False), (streamed, None)):
        folder.mkdir()
        model_cache.write_conversion(gguf_file, folder, no_progress, stream=stream)
    a, b = (load_file(str(f / model_cache.WEIGHTS)) for f in (whole, streamed))
    assert sorted(a) == sorted(b) and "lm_head.weight" in b and any(k.endswith(".bias") for k in b)
    assert all(torch.equal(a[k], b[k]) for k in a)
    for name in ("config.json", "generation_config.json"):
        assert json.loads((whole / name).read_text()) == json.loads((streamed / name).read_text())
    # an F32 GGUF is lossless: the streamed cache gives the source folder's logits
    lm = load_model(str(gguf_file))
    ids = [3, 4, 5, 6, 7]
    assert torch.allclose(lm.runner().prefill([ids])[1][0], transformers_logits(qwen_dir, ids)[-1],
                          atol=1e-4)


def test_a_sweep_batch_is_chosen_from_free_memory(qwen_dir):
    from tui.sweeps.plan import MAX_BATCH_ROWS, choose_batch
    from tui.sweeps.runner import SweepJob

    lm = load_model(str(qwen_dir))
    job = SweepJob(((1, 2, 3, 4),), ("greedy", "top_k=5"), samples=99, max_new_tokens=6,
                   chunk_rows=8)  # 1 + 99 = 100 rows per prompt
    # worked by hand: 2 layers x 2 kv heads x 16 dims x 10 positions x (k, v) x 4 bytes
    # = 5,120 bytes of cache, plus 3 float64 vectors of the 300-token vocabulary (7,200)
    per_row = 5_120 + 7_200
    rows, room = choose_batch(lm, job, available=100 * per_row)  # half of it holds 50 rows
    assert rows == 50 and room.startswith("batch: 50 rows per forward pass (memory allows 50: ")
    assert "at 10 positions, half of" in room
    rows, line = choose_batch(lm, job, available=1000 * per_row)  # 500 fit; a prompt has 100
    assert rows == 100 and "(a prompt has 100 rows; memory allows 500" in line
    big = SweepJob(((1, 2, 3, 4),), ("top_k=5",), samples=900, max_new_tokens=6)
    assert choose_batch(lm, big, available=10_000 * per_row)[0] == MAX_BATCH_ROWS
    assert choose_batch(lm, job, requested=7, available=100 * per_row) == \
        (7, "batch: 7 rows per forward pass (--batch-rows; " + room.split("(", 1)[1])
    with pytest.raises(UserError, match=r"^--batch-rows: 60 rows per forward pass do not fit in "
                                        r"memory with model .*; give 50 or less \(memory allows 50"):
        choose_batch(lm, job, requested=60, available=100 * per_row)
    # a resumed folder keeps its first run's batch while it fits, and says when it cannot
    assert choose_batch(lm, job, recorded=30, available=100 * per_row)[1].startswith(
        "batch: 30 rows per forward pass (as the folder's first run; memory allows 50")
    rows, line = choose_batch(lm, job, recorded=80, available=100 * per_row)
    assert rows == 50 and "the folder's first run used 80" in line


def test_auto_keeps_float32_for_speed_without_native_bfloat16():
    # the same 1.5B model as above: too slow in float32, but an emulated bfloat16 is no
    # faster, so only memory would make auto leave float32
    assert sizing.choose_dtype("auto", 1_500_000_000, 64 * 10**9, 8.0, native_bf16=False).dtype == "float32"
    assert sizing.choose_dtype("auto", 1_500_000_000, 6 * 10**9, 8.0, native_bf16=False).dtype == "bfloat16"


def test_a_tied_embedding_is_held_once(tiny_model_dir):
    from tui.model.lean_llama import LeanRunner

    lm = load_model(str(tiny_model_dir))  # a tied llama
    runner = lm.runner()
    if runner.packed:  # the packed head holds the matrix; lookups read the file's mapping
        assert runner.embed is lm.checkpoint.embedding_rows
        assert "model.embed_tokens.weight" not in lm.checkpoint.tensors
    ids = lm.encode_prompt(TEXT, None)
    # the same logits as a runner on transformers' model (its own embedding in memory)
    assert torch.equal(runner.prefill([ids])[1], LeanRunner(lm.model).prefill([ids])[1])
