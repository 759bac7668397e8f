"""Writing a llama or qwen2 safetensors folder as a GGUF file, laid out the way llama.cpp does.

The benchmark converts a 1B-shape GGUF to measure the conversion's memory, and the
tests convert a tiny one; no GGUF of either exists to download, so both are written
here from a folder (one `model.safetensors` or shards) with gguf's own `GGUFWriter`.
Tensor names come from gguf's name table; for llama, q and k rows are permuted as
llama.cpp's converter does (reference: llama.cpp convert_hf_to_gguf.py,
LlamaModel.permute; transformers' LlamaTensorProcessor._reverse_permute_weights undoes
it), while qwen2 keeps them as they are (its converter does not permute); the tokenizer
goes in as a "gpt2" (byte-level BPE) vocabulary with its merges. A tied model has no
`output.weight`, which is how a GGUF says tie_word_embeddings.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any


def llama_cpp_permute(weight: Any, n_head: int) -> Any:
    """Reorder q/k rows the way llama.cpp's converter does (rotary halves interleaved)."""
    rows = weight.shape[0]
    return weight.reshape(n_head, 2, rows // n_head // 2, *weight.shape[1:]).swapaxes(1, 2).reshape(weight.shape)


ARCHES = {"llama": "LLAMA", "qwen2": "QWEN2"}  # config model_type -> gguf.MODEL_ARCH member


def write_gguf(folder: Path, path: Path, *, chat_template: str, half: bool = False,
               name: str = "logitfork-model") -> Path:
    """Write the llama or qwen2 model in `folder` to the GGUF file `path` (F32, or F16
    matrices with `half`); return `path`."""
    import gguf
    import numpy as np
    from safetensors.torch import load_file

    from tui.model.llama_checkpoint import weight_files

    config = json.loads((folder / "config.json").read_text(encoding="utf-8"))
    tok = json.loads((folder / "tokenizer.json").read_text(encoding="utf-8"))
    arch = config["model_type"]
    if arch not in ARCHES:
        raise ValueError(f"{folder}: model_type {arch!r}; llama and qwen2 are written")
    writer = gguf.GGUFWriter(str(path), arch=arch)
    writer.add_name(name)
    writer.add_context_length(config["max_position_embeddings"])
    writer.add_embedding_length(config["hidden_size"])
    writer.add_block_count(config["num_hidden_layers"])
    writer.add_feed_forward_length(config["intermediate_size"])
    writer.add_head_count(config["num_attention_heads"])
    writer.add_head_count_kv(config["num_key_value_heads"])
    writer.add_layer_norm_rms_eps(config["rms_norm_eps"])
    rope = config.get("rope_parameters") or {}
    writer.add_rope_freq_base(float(config.get("rope_theta") or rope.get("rope_theta", 10000.0)))
    writer.add_file_type(gguf.LlamaFileType.MOSTLY_F16 if half else gguf.LlamaFileType.ALL_F32)

    vocab: dict[str, int] = dict(tok["model"]["vocab"])
    for added in tok["added_tokens"]:
        vocab[added["content"]] = added["id"]
    tokens = [t for t, _ in sorted(vocab.items(), key=lambda item: item[1])]
    special = {a["content"] for a in tok["added_tokens"] if a["special"]}
    writer.add_tokenizer_model("gpt2")
    writer.add_tokenizer_pre("default")
    writer.add_token_list(tokens)
    writer.add_token_types([gguf.TokenType.CONTROL if t in special else gguf.TokenType.NORMAL
                            for t in tokens])
    writer.add_token_merges([m if isinstance(m, str) else " ".join(m) for m in tok["model"]["merges"]])
    eos = config["eos_token_id"]
    writer.add_eos_token_id(eos[0] if isinstance(eos, list) else eos)
    writer.add_pad_token_id(eos[0] if isinstance(eos, list) else eos)
    writer.add_chat_template(chat_template)

    table = gguf.get_tensor_name_map(getattr(gguf.MODEL_ARCH, ARCHES[arch]),
                                     config["num_hidden_layers"])
    permute = arch == "llama"
    n_head, n_kv = config["num_attention_heads"], config["num_key_value_heads"]
    for file in sorted(set(weight_files(folder).values())):
        for hf_name, tensor in load_file(str(file)).items():
            if hf_name == "lm_head.weight" and config.get("tie_word_embeddings", False):
                continue
            array = tensor.float().numpy()
            if permute and hf_name.endswith("q_proj.weight"):
                array = llama_cpp_permute(array, n_head)
            elif permute and hf_name.endswith("k_proj.weight"):
                array = llama_cpp_permute(array, n_kv)
            if half and array.ndim == 2:
                array = array.astype(np.float16)
            writer.add_tensor(table.get_name(hf_name, try_suffixes=(".weight", ".bias")), array)
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()
    return path
