"""`LoadedModel`: a loaded causal LM with its tokenizer, what sessions and commands hold.

It encodes prompts (plain text or chat messages through the chat template), decodes
ids, and gives runners. `tui.model.loading` builds it; torch and transformers are not
imported here.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable, Sequence

from tui.errors import UserError, first_line

if TYPE_CHECKING:
    from transformers import PreTrainedModel, PreTrainedTokenizerBase

    from tui.model.forward import Runner
    from tui.model.lean_llama import LeanRunner
    from tui.model.llama_checkpoint import LlamaCheckpoint


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
    path_note: str = ""  # which forward path runs the model, and why: one line for the user
    dtype_note: str = ""  # why `--dtype auto` chose `dtype`, when it chose bfloat16
    weights_bytes: int = 0  # the weights in `dtype` (0: not measured)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)
    _runner: "Runner | LeanRunner | None" = field(default=None, repr=False)

    @property
    def model(self) -> "PreTrainedModel":
        """transformers' model, loaded now if this model was read directly (thread-safe)."""
        with self._lock:
            return self._model_locked()

    def _model_locked(self) -> "PreTrainedModel":
        if self.loaded_model is None:
            assert self.load_transformers_model is not None
            self.loaded_model = self.load_transformers_model()
        return self.loaded_model

    def cache_shape(self) -> tuple[int, int, int, int]:
        """(layers, kv heads, head dim, vocabulary): what one KV-cache row costs per position."""
        if self.checkpoint is not None:
            shape = self.checkpoint.shape
            return shape.layers, shape.kv_heads, shape.head_dim, int(self.checkpoint.config["vocab_size"])
        cfg = self.model.config
        heads = int(getattr(cfg, "num_attention_heads", 1) or 1)
        kv = int(getattr(cfg, "num_key_value_heads", None) or heads)
        head_dim = int(getattr(cfg, "head_dim", None) or int(getattr(cfg, "hidden_size", 64)) // heads)
        return int(getattr(cfg, "num_hidden_layers", 1)), kv, head_dim, int(getattr(cfg, "vocab_size", 0) or 0)

    def runner(self) -> "Runner | LeanRunner":
        """A fresh runner on the fastest path (`tui.model.forward.make_runner`).

        The weights are prepared (fused, packed) once per model and shared by every
        runner: packing a checkpoint frees its original tensors, and a second packed
        copy per session would double the memory.
        """
        from tui.model.forward import forward_choice, make_runner

        with self._lock:
            if self._runner is None:
                direct = self.checkpoint is not None and forward_choice() != "generic"
                source = self.checkpoint if direct else self._model_locked()
                self._runner = make_runner(source)
            runner = self._runner
        fresh = getattr(runner, "fresh", None)
        return fresh() if fresh is not None else runner

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
            raise UserError(f"messages: model {self.name}'s chat template refused them: {first_line(exc)}") from None
        return list(ids)

    def decode(self, ids: Sequence[int]) -> str:
        """Text of `ids`, special tokens included, spacing untouched."""
        return self.tokenizer.decode(list(ids), skip_special_tokens=False, clean_up_tokenization_spaces=False)
