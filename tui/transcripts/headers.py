"""The transcript header as typed values: the format names, `TranscriptHeader`, `PaneHeader`.

The writer (`format`), the schema and the reader all build on these; nothing here
reads or writes a file.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from importlib import metadata
from typing import TYPE_CHECKING, Any

from tui.session.change_log import ChangeLog
from tui.session.scenario import EarlierSetup

if TYPE_CHECKING:
    from tui.session.views import PaneView

FORMAT = "logitfork-transcript"
RECOVERY_FORMAT = "logitfork-recovery"  # the same header and steps, plus event lines
VERSION = 1  # the newest version this code writes and reads
_PACKAGES = ("logitfork", "torch", "transformers", "numpy", "tokenizers", "textual")


def setup_json(setup: EarlierSetup) -> dict[str, Any]:
    """One entry of the header's `prompt_edits`."""
    messages = [{"role": r, "content": c} for r, c in setup.messages] or None
    return {"steps": setup.steps, "prompt": {"text": setup.prompt, "messages": messages},
            "max_new_tokens": setup.max_new_tokens, "stop": list(setup.stop)}


def package_versions() -> dict[str, str]:
    """Installed versions of the packages that decide what a session decodes."""
    from tui import __version__
    out = {}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:  # logitfork run from a source tree
            out[name] = __version__ if name == "logitfork" else "absent"
    return out


@dataclass(frozen=True)
class PaneHeader:
    """One pane as the header records it (its state when the file was written)."""

    id: int
    name: str
    recipe: str  # the recipe in force at the end
    seed: int | None  # the pane's own draw seed (used only when draws are not shared)
    recipe_log: tuple[tuple[int, str], ...] = ()  # (from step, recipe), step order
    origin: tuple[int, int] | None = None  # (source pane id, step) if forked
    stop: str | None = None  # why it stopped, None if it was still running

    def to_json(self) -> dict[str, Any]:
        return {"id": self.id, "name": self.name, "recipe": self.recipe, "seed": self.seed,
                "recipe_log": [[s, r] for s, r in self.recipe_log],
                "origin": list(self.origin) if self.origin else None, "stop": self.stop}

    def rewound(self, step: int) -> "PaneHeader":
        """The entry after a rewind to `step` (the engine's rule, `ChangeLog.rewound`)."""
        return replace(self, recipe_log=ChangeLog(self.recipe_log).rewound(step).entries)

    @classmethod
    def of(cls, pane: "PaneView") -> "PaneHeader":
        return cls(pane.id, pane.name, pane.recipe, pane.seed,
                   tuple((int(s), str(r)) for s, r in pane.recipe_log),
                   tuple(pane.origin) if pane.origin else None, pane.stop)  # type: ignore[arg-type]


@dataclass(frozen=True)
class TranscriptHeader:
    """Everything line 1 holds. `extra` keeps header fields this version does not know."""

    title: str
    created: str  # ISO 8601, UTC
    model_name: str
    model_source: str
    dtype: str
    prompt_text: str | None
    messages: tuple[tuple[str, str], ...] | None  # (role, content) pairs, or None
    prompt_ids: tuple[int, ...]
    max_new_tokens: int
    stop: tuple[str, ...]
    seed: int
    shared_draws: bool
    panes: tuple[PaneHeader, ...]
    versions: dict[str, str] = field(default_factory=dict)
    draw_log: tuple[tuple[int, bool], ...] = ()  # (from step, shared); () = never changed
    prompt_edits: tuple[EarlierSetup, ...] = ()  # setups before the user edited the prompt
    extra: dict[str, Any] = field(default_factory=dict)
    dtype_note: str = ""  # why `--dtype auto` chose bfloat16; "" when it was asked or float32

    def pane(self, pane_id: int) -> PaneHeader:
        for p in self.panes:
            if p.id == pane_id:
                return p
        raise KeyError(pane_id)

    def to_json(self, fmt: str = FORMAT) -> dict[str, Any]:
        messages = None if self.messages is None else [
            {"role": r, "content": c} for r, c in self.messages]
        return {
            "kind": "header", "format": fmt, "version": VERSION, "created": self.created,
            "title": self.title,
            "model": {"name": self.model_name, "source": self.model_source, "dtype": self.dtype,
                      **({"dtype_note": self.dtype_note} if self.dtype_note else {})},
            "prompt": {"text": self.prompt_text, "messages": messages,
                       "ids": list(self.prompt_ids)},
            "max_new_tokens": self.max_new_tokens, "stop": list(self.stop),
            "seed": self.seed, "shared_draws": self.shared_draws,
            "panes": [p.to_json() for p in self.panes],
            "versions": dict(self.versions),
            **({"draw_log": [list(e) for e in self.draw_log]} if self.draw_log else {}),
            **({"prompt_edits": [setup_json(e) for e in self.prompt_edits]}
               if self.prompt_edits else {}),
            **self.extra,
        }
