"""The GGUF conversion cache: de-quantise a GGUF once, load safetensors ever after.

Reading a GGUF through transformers de-quantises every tensor and rebuilds the
tokenizer from metadata, which takes tens of seconds. The first load therefore writes
a plain folder (safetensors weights, config, generation config, tokenizer files) to
``<cache root>/models/<first 16 hex of the file's sha256>/``; later loads read that
folder like any `save_pretrained` output.

The folder is built under a temporary name in the same directory and moved into place
with one `os.replace`, and a marker file is written last inside it, so a crash or an
error midway never leaves a folder that a later start would take for complete.

A load through transformers then adds ``logitfork-direct.json`` (`DirectRecord`): the
tokenizer class transformers chose, so that warm starts can skip its model classes.

The cache root is ``platformdirs.user_cache_dir("logitfork")``, or the folder named by
the environment variable ``LOGITFORK_CACHE_DIR``. Heavy imports stay inside functions.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import json
import os
import re
import shutil
import tempfile
import time
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator

from tui.errors import UserError
from tui.files import write_atomic
from tui.progress import ProgressCallback, ProgressEvent, time_left
from tui.settings import CACHE_ENV, settings

CACHE_FORMAT = 1  # bump when the folder layout changes; older folders are rebuilt
MARKER = "logitfork-cache.json"  # written last: a folder without it is not a cache
WEIGHTS = "model.safetensors"
INDEX = "model.safetensors.index.json"  # the weight map of a cache written in shards
STALE_TEMP_SECONDS = 6 * 3600  # temp folders older than this are debris of a killed run
DIRECT = "logitfork-direct.json"  # how transformers loaded the folder: lets warm starts skip it
DIRECT_FORMAT = 1
_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def cache_root() -> Path:
    """Where logitfork keeps converted models: `LOGITFORK_CACHE_DIR` or the user cache dir."""
    override = settings().cache_dir
    if override is not None:
        return override
    import platformdirs

    return Path(platformdirs.user_cache_dir("logitfork"))


def models_dir() -> Path:
    """The folder holding one sub-folder per converted GGUF file."""
    return cache_root() / "models"


def file_digest(path: Path) -> str:
    """First 16 hex digits of the file's sha256: the cache key.

    Not remembered between runs: hashing the 98 MB embedded GGUF takes 0.07 s with the
    file in the page cache and 0.23 s cold on the 2-core machine (measured), under the
    0.3 s that would make a path+size+mtime memo worth its staleness risk.
    """
    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()[:16]


def cache_folder(digest: str) -> Path:
    """The cache folder for a GGUF file with this digest (it may not exist yet)."""
    return models_dir() / digest


def is_ready(folder: Path) -> bool:
    """True when `folder` is a complete conversion in the current cache format."""
    try:
        marker = json.loads((folder / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return (
        isinstance(marker, dict)
        and marker.get("format") == CACHE_FORMAT
        and ((folder / WEIGHTS).is_file() or (folder / INDEX).is_file())
        and (folder / "config.json").is_file()
    )


@dataclass(frozen=True)
class DirectRecord:
    """Which tokenizer class transformers' `AutoTokenizer` chose for a cache folder.

    Choosing it needs the model's config class, whose import is most of a warm start;
    a load through transformers writes this record, and later loads build the tokenizer
    class named here and read the weights without transformers' model classes
    (`tui.model.llama_checkpoint`). It holds for the transformers version that wrote it.
    """

    tokenizer_module: str  # e.g. transformers.tokenization_utils_tokenizers
    tokenizer_class: str  # e.g. TokenizersBackend


def read_direct_record(folder: Path) -> DirectRecord | None:
    """The folder's record if this transformers version wrote it and it names a
    transformers class; otherwise None (the folder then loads through transformers)."""
    try:
        record = json.loads((folder / DIRECT).read_text(encoding="utf-8"))
        version = importlib.metadata.version("transformers")
    except (OSError, ValueError, importlib.metadata.PackageNotFoundError):
        return None
    if not isinstance(record, dict) or record.get("format") != DIRECT_FORMAT:
        return None
    module, name = record.get("tokenizer_module"), record.get("tokenizer_class")
    if record.get("transformers") != version or not isinstance(module, str) or not isinstance(name, str):
        return None
    parts = module.split(".")
    if parts[0] != "transformers" or not all(_IDENTIFIER.fullmatch(p) for p in parts + [name]):
        return None  # never import a module a file names unless it is transformers' own
    return DirectRecord(module, name)


def write_direct_record(folder: Path, tokenizer: Any) -> None:
    """Record `tokenizer`'s class for `folder`, atomically; a read-only cache just goes without."""
    import transformers

    record = {"format": DIRECT_FORMAT, "transformers": transformers.__version__,
              "tokenizer_module": type(tokenizer).__module__, "tokenizer_class": type(tokenizer).__name__}
    with suppress(OSError):
        write_atomic(folder / DIRECT, json.dumps(record, indent=2) + "\n")


def convert_gguf(gguf_file: Path, folder: Path, progress: ProgressCallback) -> None:
    """De-quantise `gguf_file` through transformers and publish the result as `folder`.

    `progress` hears the de-quantisation in bytes of the GGUF's tensors (with the time
    left), then the writing of the cache (the caller checks the free disk space first:
    `tui.model.sizing.check_disk`). On any failure the temporary folder is removed and
    `folder` is left untouched.
    """
    parent = folder.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UserError(
            f"model cache {parent}: cannot create it ({exc.strerror}); set {CACHE_ENV} to a writable folder"
        ) from None
    _remove_stale_temps(parent)
    temp = Path(tempfile.mkdtemp(prefix=f".tmp-{folder.name}-", dir=parent))
    try:
        write_conversion(gguf_file, temp, progress)
        _publish(temp, folder)
    finally:
        shutil.rmtree(temp, ignore_errors=True)


def read_tokenizer(gguf_file: Path, progress: ProgressCallback) -> Any:
    """The tokenizer transformers rebuilds from the GGUF's metadata."""
    from transformers import AutoTokenizer

    progress(ProgressEvent(f"converting {gguf_file.name} (once)", 0, None, "bytes",
                           "rebuilding the tokenizer from GGUF metadata"))
    return AutoTokenizer.from_pretrained(str(gguf_file.parent), gguf_file=gguf_file.name,
                                         local_files_only=True, trust_remote_code=False)


def read_gguf(gguf_file: Path, progress: ProgressCallback) -> tuple[Any, Any]:
    """(model, tokenizer) read by transformers' own GGUF loader, in float32."""
    import torch
    from transformers import AutoModelForCausalLM

    common = {"gguf_file": gguf_file.name, "local_files_only": True, "trust_remote_code": False}
    task = f"converting {gguf_file.name} (once)"
    tokenizer = read_tokenizer(gguf_file, progress)
    started = time.monotonic()

    def tensors_done(done: int, total: int) -> None:
        progress(ProgressEvent(task, done, total, "bytes", time_left(done, total, started)))

    with _tensor_progress(tensors_done):
        model = AutoModelForCausalLM.from_pretrained(str(gguf_file.parent), dtype=torch.float32, **common)
    return model, tokenizer


def write_conversion(gguf_file: Path, folder: Path, progress: ProgressCallback,
                     stream: bool | None = None) -> None:
    """Write the converted model into the (empty, temporary) `folder`; marker last.

    llama and qwen2 GGUFs are streamed tensor by tensor (`tui.model.gguf_stream`, in
    bounded memory); others, or any with ``stream=False``, go through transformers'
    whole-model loader. The tokenizer's class goes into the direct-load record too, so
    that even the first load after a conversion reads the weights directly.
    """
    import transformers
    from transformers import GenerationConfig

    from tui.model import gguf_stream
    from tui.model.gguf_file import read_table

    if stream is None:
        stream = read_table(gguf_file).architecture in gguf_stream.STREAMED
    with quiet_transformers():
        if stream:
            tokenizer = read_tokenizer(gguf_file, progress)
            config = gguf_stream.read_config(gguf_file)
            config.architectures = [gguf_stream.write_weights(gguf_file, config, folder, progress,
                                                              single=WEIGHTS, index=INDEX)]
            generation = GenerationConfig.from_model_config(config)
        else:
            model, tokenizer = read_gguf(gguf_file, progress)
            _write_whole(model, folder, progress)
            config, generation = model.config, model.generation_config
            if hasattr(config, "quantization_config"):
                del config.quantization_config  # the weights are plain float32 now
            config.architectures = [type(model).__name__]
        config.save_pretrained(folder)
        generation.save_pretrained(folder)
        tokenizer.save_pretrained(folder)
        write_direct_record(folder, tokenizer)
    marker = {
        "format": CACHE_FORMAT,
        "source": str(gguf_file),
        "converted_by": f"transformers {transformers.__version__}",
        "created": time.strftime("%Y-%m-%dT%H:%M:%S"),
    }
    (folder / MARKER).write_text(json.dumps(marker, indent=2) + "\n", encoding="utf-8")
    _sync_to_disk(folder)


def _write_whole(model: Any, folder: Path, progress: ProgressCallback) -> None:
    """Save a model transformers loaded whole as one float32 safetensors file."""
    from safetensors.torch import save_file

    state = unaliased_state_dict(model)
    size = sum(t.numel() * t.element_size() for t in state.values())
    task = "writing the converted model"
    progress(ProgressEvent(task, 0, size, "bytes"))
    save_file(state, str(folder / WEIGHTS), metadata={"format": "pt"})
    progress(ProgressEvent(task, size, size, "bytes"))


def unaliased_state_dict(model: Any) -> dict[str, Any]:
    """The state dict with every tensor that shares memory with an earlier one dropped.

    For a tied model this drops `lm_head.weight` (it is the embedding matrix);
    `tie_word_embeddings` in the config restores it on load. safetensors refuses
    aliased tensors, and writing the matrix twice would cost 113 MB for nothing.
    """
    seen: set[tuple[int, int]] = set()
    kept: dict[str, Any] = {}
    for name, tensor in model.state_dict().items():
        key = (tensor.untyped_storage().data_ptr(), tensor.storage_offset())
        if key in seen:
            continue
        seen.add(key)
        kept[name] = tensor.detach().contiguous()
    return kept


def _sync_to_disk(folder: Path) -> None:
    """fsync every file and the folder, so a power cut after the rename finds whole files."""
    for path in [*folder.iterdir(), folder]:
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _publish(temp: Path, folder: Path) -> None:
    """Move the finished `temp` folder to `folder` in one rename."""
    if folder.exists() and not is_ready(folder):  # an older format, or not ours
        trash = Path(tempfile.mkdtemp(prefix=f".old-{folder.name}-", dir=folder.parent))
        os.replace(folder, trash / "old")
        shutil.rmtree(trash, ignore_errors=True)
    try:
        os.replace(temp, folder)
    except OSError:
        if not is_ready(folder):  # not a race lost to another process converting the same file
            raise


def _remove_stale_temps(parent: Path) -> None:
    """Delete temporary folders left by runs killed mid-conversion (older than 6 hours)."""
    now = time.time()
    for entry in parent.glob(".tmp-*"):
        try:
            if entry.is_dir() and now - entry.stat().st_mtime > STALE_TEMP_SECONDS:
                shutil.rmtree(entry, ignore_errors=True)
        except OSError:
            pass


@contextmanager
def _tensor_progress(report: Callable[[int, int], None]) -> Iterator[None]:
    """Report (bytes done, bytes in all) of transformers' GGUF de-quantisation loop.

    That loop iterates over the GGUF reader's tensors through `tqdm`, looked up in its
    module; swapping in a counting generator while the load runs gives progress without
    tqdm's own bar. If the seam moves in another transformers version, the load still
    works, just without steps.
    """
    try:
        from transformers import modeling_gguf_pytorch_utils as gguf_utils
    except ImportError:
        yield
        return
    original = getattr(gguf_utils, "tqdm", None)
    if original is None:
        yield
        return

    def counting(iterable: Any, *args: Any, **kwargs: Any) -> Iterator[Any]:
        items = list(iterable)
        sizes = [int(getattr(item, "n_bytes", 0) or 0) or 1 for item in items]
        total, done = sum(sizes), 0
        for item, size in zip(items, sizes):
            yield item
            done += size
            report(done, total)

    gguf_utils.tqdm = counting
    try:
        yield
    finally:
        gguf_utils.tqdm = original


@contextmanager
def quiet_transformers() -> Iterator[None]:
    """Silence transformers' progress bars and info/warning logs for the duration."""
    from transformers.utils import logging as hf_logging

    bars, level = hf_logging.is_progress_bar_enabled(), hf_logging.get_verbosity()
    hf_logging.disable_progress_bar()
    hf_logging.set_verbosity_error()
    try:
        yield
    finally:
        hf_logging.set_verbosity(level)
        if bars:
            hf_logging.enable_progress_bar()
