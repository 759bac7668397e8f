"""The two ways a model folder becomes a `LoadedModel`.

- Through transformers' Auto classes (`load_transformers`): any save_pretrained folder,
  hub snapshot or conversion-cache folder. For a cache folder it also writes the
  direct-load record (`tui.model.conversion_cache.DirectRecord`).
- Directly (`load_direct`), for a conversion-cache folder with a record: the tokenizer
  class the record names and the checkpoint read by `tui.model.llama_checkpoint`, with no
  transformers model class imported (most of a warm start). Returns None when it
  cannot, and the caller goes through transformers.

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
from tui.model.conversion_cache import Progress
from tui.model.loaded import LoadedModel
from tui.model.sources import ResolvedSource
from tui.settings import settings

if TYPE_CHECKING:
    from transformers import PreTrainedModel

CONTEXT_KEYS = ("max_position_embeddings", "n_positions", "n_ctx", "seq_length")  # config keys, in order


def load_transformers(source: ResolvedSource, dtype: str, timings: dict[str, float],
                      report: Progress) -> LoadedModel:
    """Load through transformers' Auto classes; for a cache folder, record how (`DirectRecord`)."""
    model, tokenizer = _load_folder(source, timings, report)
    if dtype != "float32":
        _cast(model, dtype)
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


def load_direct(source: ResolvedSource, dtype: str, timings: dict[str, float],
                report: Progress) -> LoadedModel | None:
    """Read a cache folder without transformers' model classes, or None when it cannot be.

    Needs a `DirectRecord` from this transformers version and a checkpoint that
    `tui.model.llama_checkpoint` reads exactly; anything else falls back to transformers,
    which then gives the real error, if any. `LOGITFORK_LOADER=transformers` (or
    `LOGITFORK_FORWARD=generic`) always takes transformers' way.
    """
    record = model_cache.read_direct_record(source.folder)
    if record is None:
        return None
    t = time.perf_counter()
    report("importing torch", 0.0)
    import torch

    from tui.model.forward import forward_choice
    from tui.model.llama_checkpoint import read_checkpoint

    timings["import torch"] = time.perf_counter() - t
    if forward_choice() == "generic":
        return None
    t = time.perf_counter()
    report("reading the weights", 0.3)
    try:
        with torch.inference_mode():
            checkpoint = read_checkpoint(source.folder)
    except (ValueError, OSError):  # not a checkpoint read exactly: transformers reads it
        return None
    if dtype != "float32":
        checkpoint.cast(getattr(torch, dtype))
    timings["weights"] = time.perf_counter() - t
    t = time.perf_counter()
    report("loading the tokenizer", 0.6)
    try:
        tokenizer_class = getattr(importlib.import_module(record.tokenizer_module), record.tokenizer_class)
        with model_cache.quiet_transformers():
            tokenizer = tokenizer_class.from_pretrained(str(source.folder), local_files_only=True,
                                                        trust_remote_code=False)
    except Exception:  # a changed or damaged folder: transformers' loader says what is wrong
        return None
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


def loader_choice() -> str:
    """`LOGITFORK_LOADER` (`tui.settings`): auto or transformers."""
    return settings().loader


def _load_model_only(source: ResolvedSource, dtype: str) -> "PreTrainedModel":
    """transformers' model for a folder that was first read directly (its tokenizer is loaded)."""
    model, _ = _load_folder(source, {}, lambda stage, fraction: None, tokenizer=False)
    if dtype != "float32":
        _cast(model, dtype)
    return model


def _read_json(path: Path) -> dict[str, Any]:
    """A JSON object from `path`, or {} if it is missing or not an object."""
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return value if isinstance(value, dict) else {}


def _load_folder(source: ResolvedSource, timings: dict[str, float], report: Progress,
                 tokenizer: bool = True) -> tuple[Any, Any]:
    """Float32 model and tokenizer (None unless `tokenizer`) from a save_pretrained-style
    folder, under inference mode."""
    folder = str(source.folder)
    common = {"local_files_only": True, "trust_remote_code": False}
    t = time.perf_counter()
    report("importing torch", 0.0)
    import torch

    timings["import torch"] = time.perf_counter() - t
    t = time.perf_counter()
    report("importing transformers", 0.25)
    from transformers import AutoConfig, AutoTokenizer

    timings["import transformers"] = time.perf_counter() - t
    with model_cache.quiet_transformers(), torch.inference_mode():
        try:
            t = time.perf_counter()
            config = AutoConfig.from_pretrained(folder, **common)
            model_class = _causal_lm_class(source, config)  # imports the model's code
            timings["import model code"] = time.perf_counter() - t
            t = time.perf_counter()
            report("loading the tokenizer", 0.6)
            loaded_tokenizer = AutoTokenizer.from_pretrained(folder, **common) if tokenizer else None
            timings["tokenizer"] = time.perf_counter() - t
            t = time.perf_counter()
            report("loading the weights", 0.7)
            model = model_class.from_pretrained(
                folder,
                config=config,
                dtype=torch.float32,
                attn_implementation="sdpa",
                use_safetensors=source.weights != "pickle",
                **common,
            )
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


def _cast(model: Any, dtype: str) -> None:
    """Cast the loaded float32 model in place (bfloat16 trades accuracy for speed)."""
    import torch

    with torch.inference_mode():
        model.to(getattr(torch, dtype))


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
