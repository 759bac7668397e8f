"""The two ways a model folder becomes a `LoadedModel`.

- Through transformers' Auto classes (`load_transformers`): any save_pretrained folder,
  hub snapshot or conversion-cache folder. For a cache folder it also writes the
  direct-load record (`tui.model.conversion_cache.DirectRecord`).
- Directly (`load_direct`), for a llama or qwen2 folder whose config passes the lean
  path's allow-list (a save_pretrained folder, a hub snapshot, sharded or not, or a
  conversion-cache folder with its record): the checkpoint read by
  `tui.model.llama_checkpoint` in the chosen dtype, with no transformers model class
  built. Returns the reason when it cannot, and the caller goes through transformers.

torch and transformers are imported inside the functions.
"""

from __future__ import annotations

import importlib
import json
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

from tui.errors import UserError, first_line
from tui.model import conversion_cache as model_cache
from tui.model.loaded import LoadedModel
from tui.model.sources import ResolvedSource
from tui.progress import ProgressCallback, ProgressEvent, no_progress

if TYPE_CHECKING:
    from transformers import PreTrainedModel

CONTEXT_KEYS = ("max_position_embeddings", "n_positions", "n_ctx", "seq_length")  # config keys, in order


def load_transformers(source: ResolvedSource, dtype: str, timings: dict[str, float],
                      report: ProgressCallback) -> LoadedModel:
    """Load through transformers' Auto classes; for a cache folder, record how (`DirectRecord`)."""
    model, tokenizer = _load_folder(source, dtype, timings, report)
    if source.kind == "gguf":
        model_cache.write_direct_record(source.folder, tokenizer)
    config = model.config
    return LoadedModel(
        name=source.name, source=source.location, tokenizer=tokenizer,
        eos_ids=_eos_ids([getattr(config, "eos_token_id", None),
                          getattr(getattr(model, "generation_config", None), "eos_token_id", None)],
                         tokenizer, int(getattr(config, "vocab_size", 0) or 0)),
        max_context=_max_context({key: getattr(config, key, None) for key in CONTEXT_KEYS}, tokenizer),
        dtype=dtype, timings=timings, loaded_model=model,
    )


def direct_refusal(source: ResolvedSource) -> str | None:
    """Why `source` cannot be read straight from its files (transformers loads it), or None.

    Cheap: reads config.json and the weight index, never the weights.
    """
    from tui.model import transformers_internals as hf
    from tui.model.llama_checkpoint import config_refusal, read_config, weight_files

    if source.weights == "pickle":
        return "pickled weights are read by transformers"
    if source.kind == "gguf" and model_cache.read_direct_record(source.folder) is None:
        return "this cache folder has no tokenizer record from this transformers version"
    try:
        reason = hf.version_refusal() or config_refusal(read_config(source.folder))
        if reason is None:
            weight_files(source.folder)
    except ValueError as exc:
        return str(exc)
    return reason


def load_direct(source: ResolvedSource, dtype: str, timings: dict[str, float],
                report: ProgressCallback) -> LoadedModel | str:
    """Read a llama-family folder without transformers' model classes, or say why not.

    A cache folder names its tokenizer class in its `DirectRecord` (a warm start then
    imports no model code at all); any other folder's tokenizer comes from AutoTokenizer.
    The weights are read tensor by tensor in `dtype` (`tui.model.llama_checkpoint`), and
    packing them for the lean path frees the originals. Returns the reason, as a string,
    when the folder is not read exactly this way: the caller loads it through transformers.
    """
    reason = direct_refusal(source)
    if reason is not None:
        return reason
    record = model_cache.read_direct_record(source.folder)
    t = time.perf_counter()
    report(ProgressEvent("importing torch", 0, 3, "stages"))
    import torch

    from tui.model.llama_checkpoint import read_checkpoint

    timings["import torch"] = time.perf_counter() - t
    t = time.perf_counter()
    report(ProgressEvent("reading the weights", 1, 3, "stages"))
    try:
        with torch.inference_mode():
            checkpoint = read_checkpoint(source.folder, getattr(torch, dtype))
    except (ValueError, OSError) as exc:  # not a checkpoint read exactly: transformers reads it
        return f"the weights are not read directly: {first_line(exc)}"
    timings["weights"] = time.perf_counter() - t
    t = time.perf_counter()
    report(ProgressEvent("loading the tokenizer", 2, 3, "stages"))
    try:
        if record is not None:
            tokenizer_class = getattr(importlib.import_module(record.tokenizer_module), record.tokenizer_class)
        else:
            from transformers import AutoTokenizer as tokenizer_class
        with model_cache.quiet_transformers():
            tokenizer = tokenizer_class.from_pretrained(str(source.folder), local_files_only=True,
                                                        trust_remote_code=False)
    except Exception as exc:  # a changed or damaged folder: transformers' loader says what is wrong
        return f"its tokenizer did not load directly ({first_line(exc)})"
    timings["tokenizer"] = time.perf_counter() - t
    config = checkpoint.config
    generation = _read_json(source.folder / "generation_config.json")
    return LoadedModel(
        name=source.name, source=source.location, tokenizer=tokenizer,
        eos_ids=_eos_ids([config.get("eos_token_id"),
                          generation.get("eos_token_id", config.get("eos_token_id"))],
                         tokenizer, int(config["vocab_size"])),
        max_context=_max_context(config, tokenizer), dtype=dtype, timings=timings,
        checkpoint=checkpoint,
        load_transformers_model=lambda: _load_model_only(source, dtype),
    )


def _load_model_only(source: ResolvedSource, dtype: str) -> "PreTrainedModel":
    """transformers' model for a folder that was first read directly (its tokenizer is loaded)."""
    model, _ = _load_folder(source, dtype, {}, no_progress, tokenizer=False)
    return model


def _read_json(path: Path) -> dict[str, Any]:
    """A JSON object from `path`, or {} if it is missing or not an object."""
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return value if isinstance(value, dict) else {}


def _load_folder(source: ResolvedSource, dtype: str, timings: dict[str, float],
                 report: ProgressCallback, tokenizer: bool = True) -> tuple[Any, Any]:
    """Model in `dtype` and tokenizer (None unless `tokenizer`) from a save_pretrained-style
    folder, under inference mode. The weights load in `dtype` (no float32 copy first);
    `model.to(dtype)` then casts what transformers kept in float32 (the rotary buffer),
    so the result equals loading in float32 and casting, the reference."""
    folder = str(source.folder)
    common = {"local_files_only": True, "trust_remote_code": False}
    t = time.perf_counter()
    report(ProgressEvent("importing torch", 0, 4, "stages"))
    import torch

    timings["import torch"] = time.perf_counter() - t
    t = time.perf_counter()
    report(ProgressEvent("importing transformers", 1, 4, "stages"))
    from transformers import AutoConfig, AutoTokenizer

    timings["import transformers"] = time.perf_counter() - t
    with model_cache.quiet_transformers(), torch.inference_mode():
        try:
            t = time.perf_counter()
            config = AutoConfig.from_pretrained(folder, **common)
            model_class = _causal_lm_class(source, config)  # imports the model's code
            timings["import model code"] = time.perf_counter() - t
            t = time.perf_counter()
            report(ProgressEvent("loading the tokenizer", 2, 4, "stages"))
            loaded_tokenizer = AutoTokenizer.from_pretrained(folder, **common) if tokenizer else None
            timings["tokenizer"] = time.perf_counter() - t
            t = time.perf_counter()
            report(ProgressEvent("loading the weights", 3, 4, "stages"))
            model = model_class.from_pretrained(
                folder,
                config=config,
                dtype=getattr(torch, dtype),
                attn_implementation="sdpa",
                use_safetensors=source.weights != "pickle",
                **common,
            )
            if dtype != "float32":
                model.to(getattr(torch, dtype))
            model.eval()
            model.requires_grad_(False)
            timings["weights"] = time.perf_counter() - t
        except UserError:
            raise
        except Exception as exc:
            raise UserError(
                f"model {source.name}: cannot load {source.location}: {first_line(exc)}; "
                "check that it is a complete save_pretrained folder (config.json, weights, tokenizer files)"
            ) from None
    return model, loaded_tokenizer


def _causal_lm_class(source: ResolvedSource, config: Any) -> Any:
    """The transformers class for this config's causal LM; UserError if there is none."""
    from transformers.models.auto.modeling_auto import MODEL_FOR_CAUSAL_LM_MAPPING

    try:
        return MODEL_FOR_CAUSAL_LM_MAPPING[type(config)]
    except KeyError:
        raise UserError(
            f"model {source.name}: its config (model_type {getattr(config, 'model_type', '?')!r}) is not a "
            "causal language model that transformers can generate with; pick a decoder-only model"
        ) from None


def _eos_ids(named: Sequence[Any], tokenizer: Any, vocab: int) -> tuple[int, ...]:
    """End-of-text ids: those `named` (the config's, then the generation config's), then the
    tokenizer's, deduplicated and within the vocabulary (`vocab`, 0: the tokenizer's size).

    Empty if none names one (a pane then stops only on length, stop strings or context).
    """
    found: list[int] = []
    vocab = vocab or len(tokenizer)
    for value in [*named, tokenizer.eos_token_id]:
        for token_id in value if isinstance(value, (list, tuple)) else [value]:
            if isinstance(token_id, int) and 0 <= token_id < vocab and token_id not in found:
                found.append(token_id)
    return tuple(found)


def _max_context(config: dict[str, Any], tokenizer: Any) -> int:
    """The longest sequence the model takes: its position limit, else the tokenizer's."""
    for key in CONTEXT_KEYS:
        value = config.get(key)
        if isinstance(value, int) and value > 0:
            return value
    limit = getattr(tokenizer, "model_max_length", None)
    if isinstance(limit, int) and 0 < limit < 1_000_000:
        return limit
    return 2048  # no limit stated anywhere: a conservative guess, common practice, no source
