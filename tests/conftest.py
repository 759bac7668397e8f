"""Shared pytest fixtures.

`tiny_model_dir`: a tiny random-weight llama saved with `save_pretrained`, for fast
tests that need a real model and tokenizer without the embedded GGUF.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tui.settings import prepare_process, settings

prepare_process()  # the test run is an entry point: offline hub, passive OpenMP waits

try:  # tests/ on sys.path (pytest's default rootdir-relative import)
    from tiny_model import build_tiny_model
except ImportError:  # the project root on sys.path
    from tests.tiny_model import build_tiny_model


@pytest.fixture(autouse=True)
def fresh_settings():
    """Settings are read once per process (`tui.settings`): each test reads its own
    environment; a test that changes a variable midway calls `settings.cache_clear()`."""
    settings.cache_clear()
    yield
    settings.cache_clear()


@pytest.fixture(scope="session")
def tiny_model_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Folder holding a tiny `LlamaForCausalLM` and its tokenizer, built once per session.

    Built by `tests/tiny_model.py:build_tiny_model` (see there for details); the same
    bytes every time (fixed training text, torch seed 1234 in a forked RNG).

    - Model: vocab 300, hidden 64, 2 layers, 4 attention heads, 2 KV heads, head_dim 16,
      max_position_embeddings 256, tied embeddings, weights std 0.25 (peaked
      distributions), float32, `model.safetensors`.
    - Tokenizer: byte-level BPE (`tokenizer.json`), ids 0-3 special: `<|end|>` (EOS,
      also `config.eos_token_id` and the pad id), `<|system|>`, `<|user|>`,
      `<|assistant|>`; no BOS, nothing added to plain text. Accented letters, CJK and
      emoji encode as several byte tokens (incremental-decoding cases).
    - Chat template: each message as ``<|role|>content<|end|>\\n``, then
      ``<|assistant|>`` when `add_generation_prompt=True`.

    Read-only: copy it (shutil.copytree) before changing files in it.
    Load with `tui.model.catalogue.load_model(str(tiny_model_dir))`.
    """
    return build_tiny_model(tmp_path_factory.mktemp("tiny_model"))


@pytest.fixture(scope="session")
def embedded_model():
    """The embedded default model (SmolLM2-135M), loaded once for every realmodel test."""
    import warnings

    from tui.model.catalogue import DEFAULT_MODEL, load_model

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return load_model(DEFAULT_MODEL)
