"""How big a model is, before it loads: memory and disk checks, `--dtype auto`, sweep batches.

Sizes come from file headers only (safetensors headers, GGUF tensor tables), never
from loading. The rules:

- memory: a model loads only if its weights in the chosen dtype, times
  `MEMORY_MARGIN` (room for the packing step, the packed copy of a tied embedding,
  activations and the KV cache), fit in the memory the system reports available;
- `--dtype auto`: float32 unless it would not fit, or would run under `MIN_STEPS_PER_S`
  by the bandwidth floor (a decode step reads every weight once: seconds per step >=
  weight bytes / memory bandwidth, with the bandwidth assumed or set in `tui.settings`)
  on a CPU with native bfloat16 matmuls; then bfloat16 (half the bytes);
- disk: a GGUF conversion writes float32 weights, so it needs 4 bytes per parameter free;
- a GGUF is converted only when it is whole (its tensor table ends inside the file) and
  its conversion fits in memory: llama and qwen2 stream tensor by tensor, others load
  whole in float32;
- sweeps: rows per forward batch from the memory left once the weights are in.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from tui.errors import UserError
from tui.settings import BANDWIDTH_ENV, settings

BYTES_PER_PARAMETER = {"float32": 4, "bfloat16": 2}
MEMORY_MARGIN = 1.25  # weights x this must fit in available memory (common practice, no source)
MIN_STEPS_PER_S = 2.0  # `--dtype auto` leaves float32 below this (the bandwidth floor's rate)
GB = 1e9

if TYPE_CHECKING:
    from tui.model.sources import ResolvedSource


def gb(size: float) -> str:
    """Bytes as the user reads them: "4.9 GB", or "370 KB" / "12 MB" for small ones."""
    if size >= 0.1 * GB:
        return f"{size / GB:.1f} GB"
    if size >= 1e6:
        return f"{size / 1e6:.0f} MB"
    return f"{size / 1e3:.0f} KB"


def count_text(parameters: int) -> str:
    """"1.24B" or "135M" or "93K" parameters."""
    if parameters >= 1e9:
        return f"{parameters / 1e9:.2f}B"
    if parameters >= 1e6:
        return f"{parameters / 1e6:.0f}M"
    return f"{parameters / 1e3:.0f}K"


def parameter_count(source: "ResolvedSource") -> int | None:
    """Numbers in the model's weights, from file headers; None when unknown (pickled weights)."""
    from tui.model import conversion_cache as model_cache
    from tui.model.llama_checkpoint import parameter_count as folder_count

    try:
        if source.kind == "gguf" and not model_cache.is_ready(source.folder):
            return gguf_parameter_count(source.gguf_file) if source.gguf_file else None
        if source.weights == "pickle":
            return None
        return folder_count(source.folder)
    except (OSError, ValueError, KeyError):
        return None


def gguf_parameter_count(path: Path) -> int:
    """Elements of every tensor in a GGUF file (its header's tensor table, no data read)."""
    from tui.model.gguf_file import read_table

    return read_table(path).parameters


def check_gguf(name: str, path: Path, available: int) -> None:
    """Before a GGUF is converted: UserError when the file is cut short, or when its
    conversion would not fit in memory (`tui.model.gguf_stream.peak_bytes` for a
    streamed family, the whole model in float32 for the others)."""
    from tui.model.gguf_file import read_table
    from tui.model.gguf_stream import STREAMED, peak_bytes

    try:
        table = read_table(path)
    except (OSError, ValueError) as exc:
        raise UserError(f"model {name}: {path}: not a readable GGUF file ({exc})") from None
    if table.cut_short:
        raise UserError(f"model {name}: {path} is cut short: its tensors end at "
                        f"{gb(table.needed_bytes)} but the file holds {gb(table.file_bytes)}; "
                        "a part of a split download or an unfinished copy? (join split parts "
                        "in order into one file, e.g. cat part-0000 part-0001 ... > model.gguf)")
    if table.architecture in STREAMED:
        need, how = peak_bytes(table.largest, table.parameters), "converted tensor by tensor"
    else:
        need, how = table.parameters * BYTES_PER_PARAMETER["float32"], "converted whole, in float32"
    if need * MEMORY_MARGIN > available:
        raise UserError(f"model {name}: its conversion ({table.architecture or 'unknown'} "
                        f"architecture, {how}) needs {gb(need * MEMORY_MARGIN)} with working room "
                        f"but {gb(available)} of memory is available; close other programs")


def available_memory() -> int:
    """Bytes the system says a new allocation can take without swapping."""
    import psutil

    return int(psutil.virtual_memory().available)


@dataclass(frozen=True)
class DtypeChoice:
    """The dtype a model loads in, and the reason when `auto` chose bfloat16 ("" otherwise)."""

    dtype: str
    note: str = ""


def native_bfloat16() -> bool:
    """Does this CPU multiply bfloat16 natively (oneDNN's check: AVX-512 BF16 or AMX)?

    Without it, each row of a bfloat16 matmul costs about a full pass: measured by
    `make bench` on a 2-core AVX2 machine (1B llama shape), bfloat16 steps took 126 /
    436 / 859 ms at 1 / 4 / 8 panes against 359 / 489 / 521 ms in float32. Half the bytes
    then make a faster step only for a few panes, so the speed rule stays out.
    """
    import torch

    try:
        return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())
    except (AttributeError, RuntimeError):
        return True  # cannot tell: the bandwidth rule alone decides


def choose_dtype(requested: str, parameters: int | None, available: int,
                 bandwidth_gbs: float, measured: bool = False, native_bf16: bool = True) -> DtypeChoice:
    """`requested` as is, or for "auto" float32 unless it would not fit, or would be too
    slow while the CPU has native bfloat16 (`native_bf16`) to make bfloat16 faster."""
    if requested != "auto":
        return DtypeChoice(requested)
    if not parameters:
        return DtypeChoice("float32")  # size unknown: the exact choice
    fp32 = parameters * BYTES_PER_PARAMETER["float32"]
    rate = bandwidth_gbs * GB / fp32  # steps/s at the bandwidth floor
    where = "set in " + BANDWIDTH_ENV if measured else "assumed; set " + BANDWIDTH_ENV
    if fp32 * MEMORY_MARGIN > available:
        why = f"float32 needs {gb(fp32 * MEMORY_MARGIN)} and {gb(available)} is available"
    elif rate < MIN_STEPS_PER_S and native_bf16:
        why = (f"float32 would run at about {rate:.1f} steps/s ({gb(fp32)} of weights read per step "
               f"at {bandwidth_gbs:g} GB/s, {where})")
    else:
        return DtypeChoice("float32")
    return DtypeChoice("bfloat16", f"auto chose bfloat16: {why}")


def resolve_dtype(requested: str, source: "ResolvedSource") -> tuple[DtypeChoice, int | None]:
    """`choose_dtype` for this source on this machine, and its parameter count."""
    parameters = parameter_count(source)
    knobs = settings()
    native = native_bfloat16() if requested == "auto" else True
    return choose_dtype(requested, parameters, available_memory(), knobs.bandwidth_gbs,
                        knobs.bandwidth_measured, native), parameters


def check_memory(name: str, parameters: int | None, dtype: str, available: int) -> int:
    """The weights' bytes in `dtype`; UserError naming the sizes when they will not fit."""
    if not parameters:
        return 0
    weights = parameters * BYTES_PER_PARAMETER[dtype]
    if weights * MEMORY_MARGIN > available:
        hint = "; try --dtype bfloat16" if dtype == "float32" else ""
        raise UserError(
            f"model {name}: {count_text(parameters)} parameters need {gb(weights)} in {dtype} "
            f"({gb(weights * MEMORY_MARGIN)} with working room) but {gb(available)} of memory is "
            f"available{hint}; close other programs or pick a smaller model")
    return weights


def check_disk(folder: Path, parameters: int | None, what: str) -> None:
    """UserError when `folder`'s disk has less room than float32 weights of `parameters` take."""
    if not parameters:
        return
    need = parameters * BYTES_PER_PARAMETER["float32"]
    probe = folder
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    free = shutil.disk_usage(probe).free
    if need * 1.05 > free:
        raise UserError(f"{what}: writing the float32 copy needs {gb(need)} on disk and {folder} "
                        f"has {gb(free)} free; free some space or set LOGITFORK_CACHE_DIR elsewhere")


def rows_per_batch(row_bytes: int, available: int, wanted: int, share: float = 0.5) -> int:
    """How many sweep rows one forward batch may hold: at most `wanted`, at least 1.

    Each row holds its KV cache and activations (`row_bytes`); with the weights already
    loaded, the batch may use `share` of the memory still available, so the system
    keeps the rest.
    """
    room = max(0.0, available * share)
    return max(1, min(wanted, int(room // max(row_bytes, 1))))


def row_bytes(layers: int, kv_heads: int, head_dim: int, context: int, vocab: int,
              bytes_per_number: int) -> int:
    """Memory one batch row takes at `context` positions: its keys and values in every
    layer, plus its float32 logits and the decoding's float64 copies of them (about 3
    vectors of the vocabulary)."""
    cache = 2 * layers * kv_heads * head_dim * context * bytes_per_number
    return cache + 3 * vocab * 8
