"""A tiny random-weight llama, built offline, for fast tests and the benchmark.

`build_tiny_model(path)` trains a small byte-level BPE tokenizer on a few invented
sentences (with multi-byte UTF-8 characters, so incremental decoding has byte pieces
to join), builds a 2-layer `LlamaForCausalLM` from a fixed seed, and saves both with
`save_pretrained` (safetensors). `build_tiny_gguf(model_dir, path)` writes the same
model as an unquantised (F32) GGUF file, the way llama.cpp lays one out, so the GGUF
conversion cache can be tested without the 98 MB embedded model.

Run as a script to build one: ``python tests/tiny_model.py OUT_DIR [--gguf FILE]``.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

# The tokenizer's special tokens. EOS_TOKEN ends a text; the role tokens frame chat turns.
EOS_TOKEN = "<|end|>"
ROLE_TOKENS = ("<|system|>", "<|user|>", "<|assistant|>")
VOCAB_SIZE = 300  # 256 byte symbols + 4 special tokens + 40 merges
SEED = 1234

# One turn per message, then the assistant's opening tag when a reply is wanted.
CHAT_TEMPLATE = (
    "{% for message in messages %}"
    "{{ '<|' + message['role'] + '|>' + message['content'] + '<|end|>' + '\n' }}"
    "{% endfor %}"
    "{% if add_generation_prompt %}{{ '<|assistant|>' }}{% endif %}"
)

# Invented text. Accented letters (2 bytes), CJK (3 bytes) and an emoji (4 bytes) make
# characters that the 300-token vocabulary can only write as several byte tokens.
TRAINING_TEXT = [
    "The lighthouse keeper of Vellmar Quay counted the gulls every morning.",
    "Tea at the Copper Kettle: smoky lapsang, jasmine pearls and a café crème.",
    "def add(a, b):\n    return a + b\n",
    "On the planet Orrin the rivers run uphill after the second sunset.",
    "Señora Ibáñez sold naïve paintings of the harbour to the ferry crew.",
    "The old map said 北の港 in faded ink, and the sailor smiled 🙂 at it.",
    "Fog rolled over the quay; the ferry bell rang twice, then three times.",
    "Zoë ordered a crème brûlée and a pot of smoky tea for the long wait.",
]


def _train_tokenizer():
    """A byte-level BPE `PreTrainedTokenizerFast` with EOS, role tokens and a chat template."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers
    from transformers import PreTrainedTokenizerFast

    backend = Tokenizer(models.BPE())
    backend.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    backend.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=VOCAB_SIZE,
        special_tokens=[EOS_TOKEN, *ROLE_TOKENS],
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    backend.train_from_iterator(TRAINING_TEXT * 4, trainer=trainer)
    return PreTrainedTokenizerFast(
        tokenizer_object=backend,
        eos_token=EOS_TOKEN,
        additional_special_tokens=list(ROLE_TOKENS),
        chat_template=CHAT_TEMPLATE,
        clean_up_tokenization_spaces=False,
    )


def build_tiny_model(path: str | Path) -> Path:
    """Build the tiny llama and its tokenizer into `path` (created if missing); return it.

    Deterministic: the tokenizer is trained on fixed text and the weights come from
    torch seed `SEED` inside a forked RNG, so the caller's random state is untouched.
    Weights are drawn with std 0.25 (not transformers' 0.02) so the next-token
    distributions are peaked enough for top-k / top-p to matter.
    """
    import torch
    from transformers import GenerationConfig, LlamaConfig, LlamaForCausalLM

    path = Path(path)
    path.mkdir(parents=True, exist_ok=True)
    tokenizer = _train_tokenizer()
    eos_id = tokenizer.convert_tokens_to_ids(EOS_TOKEN)
    config = LlamaConfig(
        vocab_size=len(tokenizer),
        hidden_size=64,
        intermediate_size=128,
        num_hidden_layers=2,
        num_attention_heads=4,
        num_key_value_heads=2,
        max_position_embeddings=256,
        rms_norm_eps=1e-6,
        rope_theta=10000.0,
        initializer_range=0.25,
        tie_word_embeddings=True,
        bos_token_id=None,
        eos_token_id=eos_id,
        pad_token_id=eos_id,
    )
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(SEED)
        model = LlamaForCausalLM(config).eval()
    model.generation_config = GenerationConfig(eos_token_id=eos_id, pad_token_id=eos_id)
    model.save_pretrained(path)
    tokenizer.save_pretrained(path)
    return path


def build_tiny_qwen2_model(path: str | Path, max_shard_size: str | None = None) -> Path:
    """A tiny random-weight `Qwen2ForCausalLM` (q/k/v biases, untied head) with the same
    tokenizer, saved with `save_pretrained`; `max_shard_size` (e.g. "60KB") splits the
    weights into shards with a `model.safetensors.index.json`, as big models ship."""
    import torch
    from transformers import GenerationConfig, Qwen2Config, Qwen2ForCausalLM

    path = Path(path)
    path.mkdir(parents=True, exist_ok=True)
    tokenizer = _train_tokenizer()
    eos_id = tokenizer.convert_tokens_to_ids(EOS_TOKEN)
    config = Qwen2Config(
        vocab_size=len(tokenizer), hidden_size=64, intermediate_size=128, num_hidden_layers=2,
        num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=256,
        rms_norm_eps=1e-6, rope_theta=1000000.0, initializer_range=0.25, tie_word_embeddings=False,
        bos_token_id=None, eos_token_id=eos_id, pad_token_id=eos_id,
    )
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(SEED)
        model = _random_biases(Qwen2ForCausalLM(config).eval())
    model.generation_config = GenerationConfig(eos_token_id=eos_id, pad_token_id=eos_id)
    model.save_pretrained(path, **({"max_shard_size": max_shard_size} if max_shard_size else {}))
    tokenizer.save_pretrained(path)
    return path


def build_tiny_gguf(model_dir: str | Path, path: str | Path) -> Path:
    """Write the tiny llama (or qwen2) in `model_dir` as an F32 GGUF file at `path`;
    return it (`tui.bench.gguf_writer`, the way llama.cpp lays one out)."""
    from tui.bench.gguf_writer import write_gguf

    return write_gguf(Path(model_dir), Path(path), chat_template=CHAT_TEMPLATE, name="tiny")


# ------------------------------------------------- bare models for the forward-path tests

LAYERS_VOCAB = 128  # vocabulary of the bare models below (no tokenizer)
LAYERS_SEED = 7


def tiny_llama(**overrides: object) -> Any:
    """hidden 64, 2 layers, 4 heads, 2 kv heads, vocab 128; weights std 0.3 so logits spread."""
    import torch
    from transformers import LlamaConfig, LlamaForCausalLM

    cfg = dict(hidden_size=64, intermediate_size=96, num_hidden_layers=2, num_attention_heads=4,
               num_key_value_heads=2, vocab_size=LAYERS_VOCAB, max_position_embeddings=128,
               initializer_range=0.3, tie_word_embeddings=True)
    cfg.update(overrides)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(LAYERS_SEED)
        return _random_biases(LlamaForCausalLM(LlamaConfig(**cfg)).eval())


def _random_biases(model: Any) -> Any:
    """transformers starts biases at zero, where a dropped bias would go unnoticed."""
    import torch

    with torch.no_grad():
        for module in model.modules():
            if isinstance(module, torch.nn.Linear) and module.bias is not None:
                module.bias.normal_(0.0, 0.3)
    return model


def tiny_qwen2() -> Any:
    """A Qwen2 of the same size: biases on q, k and v only."""
    import torch
    from transformers import Qwen2Config, Qwen2ForCausalLM

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(LAYERS_SEED)
        return _random_biases(Qwen2ForCausalLM(Qwen2Config(
            hidden_size=64, intermediate_size=96, num_hidden_layers=2, num_attention_heads=4,
            num_key_value_heads=2, vocab_size=LAYERS_VOCAB, max_position_embeddings=128,
            initializer_range=0.3, tie_word_embeddings=False)).eval())


if __name__ == "__main__":
    if len(sys.argv) not in (2, 4) or (len(sys.argv) == 4 and sys.argv[2] != "--gguf"):
        raise SystemExit("usage: python tests/tiny_model.py OUT_DIR [--gguf FILE]")
    out = build_tiny_model(sys.argv[1])
    print(out)
    if len(sys.argv) == 4:
        print(build_tiny_gguf(out, sys.argv[3]))
