"""Converting a llama- or qwen2-family GGUF tensor by tensor, in bounded memory.

transformers' GGUF loader de-quantises every tensor into one state dict and then
builds the model, so a conversion through it needs the whole model in float32 at
once: 30 GB for a 7B model, more than many machines that run one in bfloat16 have.
This module does the same work one tensor at a time: it takes the config from
transformers (`AutoConfig` on the GGUF), the name table from gguf and transformers'
way of asking it (`name_map`, on a model built on the meta device) and the
architecture's `TensorProcessor`; then it de-quantises each tensor with the `gguf`
package, applies the processor (the q/k row permutation for llama), and writes
float32 safetensors shards of at most `SHARD_BYTES`. That is the loop of
`transformers.modeling_gguf_pytorch_utils.load_gguf_checkpoint` (5.24), run as a
stream; `tests/test_models.py` and `tests/test_own_models.py` hold its output to the
whole-model path's, bit for bit, on float32 llama and qwen2 GGUFs and on the embedded
Q4_1 one.

Peak memory: one shard plus a few copies of the largest tensor (`peak_bytes`), and the
pages of the memory-mapped GGUF file, which the system can take back at any time.
Only the families on the fast path are streamed (`STREAMED`); any other
architecture goes through transformers' loader as before.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from tui.model.gguf_file import read_table
from tui.progress import ProgressCallback, ProgressEvent, time_left

STREAMED = frozenset({"llama", "qwen2"})  # GGUF `general.architecture` values streamed here
SHARD_BYTES = 2 * 10**9  # float32 bytes per safetensors shard at most


def peak_bytes(largest: int, parameters: int) -> int:
    """Memory a streamed conversion holds at most: a shard being gathered (the whole
    model when it fits one), plus the largest tensor de-quantised, permuted and copied
    (three float32 copies)."""
    return min(SHARD_BYTES, 4 * parameters) + 3 * 4 * largest


def read_config(gguf_file: Path) -> Any:
    """The transformers config a load of this GGUF would have, in float32, plain weights."""
    import torch
    from transformers import AutoConfig

    config = AutoConfig.from_pretrained(str(gguf_file.parent), gguf_file=gguf_file.name,
                                        local_files_only=True, trust_remote_code=False)
    if hasattr(config, "quantization_config"):
        del config.quantization_config
    config.dtype = torch.float32
    return config


def name_map(skeleton: Any, processor: Any) -> dict[str, str]:
    """GGUF tensor name -> transformers parameter name, for a llama or qwen2 model.

    The top-level pass of transformers' `get_gguf_hf_weights_map` (5.24): gguf's own
    name table for the architecture, asked for every parameter of the model. That
    function then walks every sub-module again (a few hundred rebuilds of the table,
    seconds of a conversion) to catch models saved from a base class; the families
    streamed here need only the top pass. The test against the whole-model path
    holds the two to the same tensors.
    """
    from gguf import MODEL_ARCH_NAMES, get_tensor_name_map

    model_type = skeleton.config.model_type
    arch = next(key for key, value in MODEL_ARCH_NAMES.items() if value == model_type)
    table = get_tensor_name_map(arch, skeleton.config.num_hidden_layers)
    out: dict[str, str] = {}
    for hf_name in map(processor.preprocess_name, skeleton.state_dict()):
        name, suffix = hf_name, ""
        if hf_name.endswith((".weight", ".bias")):
            name, suffix = hf_name.rsplit(".", 1)
            suffix = "." + suffix
        gguf_name = table.get_name(name)
        if gguf_name is not None:
            out[gguf_name + suffix] = hf_name
    return out


def write_weights(gguf_file: Path, config: Any, folder: Path, progress: ProgressCallback, *,
                  single: str, index: str) -> str:
    """Write the GGUF's tensors into `folder` as float32 safetensors; returns the model
    class name (for `config.architectures`).

    Weights that fit one shard go into the file `single`; more go into numbered shards
    mapped by the file `index` (the layout `save_pretrained` uses). `progress` hears the
    bytes of GGUF tensor data done, with the time left.
    """
    import time

    import numpy as np
    import torch
    from gguf import GGUFReader, dequantize
    from safetensors.torch import save_file
    from transformers import AutoModelForCausalLM
    from transformers.modeling_gguf_pytorch_utils import TENSOR_PROCESSORS, TensorProcessor

    reader = GGUFReader(str(gguf_file))
    # the processor reads the config in transformers' names (as the GGUF's parsed config)
    parsed = {"config": config.to_dict(), "tensors": {}}
    processor = TENSOR_PROCESSORS.get(read_table(gguf_file).architecture, TensorProcessor)(
        config=parsed["config"])
    with torch.device("meta"):
        skeleton = AutoModelForCausalLM.from_config(config)
    names = name_map(skeleton, processor)
    wanted = set(skeleton.state_dict())
    if config.tie_word_embeddings:
        wanted.discard("lm_head.weight")  # the embedding matrix; the config ties it back

    task = f"converting {gguf_file.name} (once)"
    total = sum(int(t.n_bytes) for t in reader.tensors)
    done, started = 0, time.monotonic()
    total_f32 = 4 * sum(int(t.n_elements) for t in reader.tensors)
    sharded = total_f32 > SHARD_BYTES
    shard: dict[str, torch.Tensor] = {}
    shard_size, written = 0, 0
    files: list[str] = []
    weight_map: dict[str, str] = {}

    def flush() -> None:
        nonlocal shard, shard_size
        if not shard:
            return
        name = f"model-{len(files) + 1:05d}.safetensors" if sharded else single
        save_file(shard, str(folder / name), metadata={"format": "pt"})
        files.append(name)
        weight_map.update({key: name for key in shard})
        shard, shard_size = {}, 0

    progress(ProgressEvent(task, 0, total, "bytes"))
    for tensor in reader.tensors:
        result = processor.process(weights=dequantize(tensor.data, tensor.tensor_type),
                                   name=tensor.name, tensor_key_mapping=names,
                                   parsed_parameters=parsed)
        key = names.get(result.name)
        if key in wanted:
            value = torch.from_numpy(np.copy(result.weights)).to(torch.float32)
            if sharded and shard and shard_size + value.nbytes > SHARD_BYTES:
                flush()
            shard[key] = value
            shard_size += value.nbytes
            written += value.nbytes
            wanted.discard(key)
        done += int(tensor.n_bytes)
        progress(ProgressEvent(task, done, total, "bytes", time_left(done, total, started)))
    flush()
    if wanted:
        raise ValueError(f"the GGUF has no tensor for {sorted(wanted)[0]} "
                         f"({len(wanted)} weights missing)")
    if sharded:
        table = {"metadata": {"total_size": written}, "weight_map": dict(sorted(weight_map.items()))}
        (folder / index).write_text(json.dumps(table, indent=2) + "\n", encoding="utf-8")
    return type(skeleton).__name__
