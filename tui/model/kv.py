"""KV-cache rows as our own plain value, shared by every forward path and the engine.

One (keys, values) pair of tensors per layer, each (B, H, C, D), with the first
`length` of C positions in use, so that the engine can pick, copy, park, crop and
join batch rows without knowing the model.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import torch


@dataclass(eq=False)
class WriteMark:
    """How far some holder has written into a set of shared capacity buffers (mutable)."""

    end: int


@dataclass(frozen=True)
class KV:
    """A KV cache as plain tensors: per layer a (keys, values) pair, each (B, H, C, D).

    The first `length` positions of the capacity C hold the cache. The generic path makes
    exact-size tensors (C == length, `filled` None, no mark). The lean path keeps
    capacity buffers with room to grow and writes new positions in place.

    Ownership rule (why in-place writes are safe): buffers are shared freely (`crop`
    returns views, a step returns the same buffers with a longer length), and every KV
    on the same buffers shares one `WriteMark`. A runner may write positions
    `length, length+1, ...` into a KV's buffers only if `mark.end == length`, that is if
    no other holder has written past this KV's end; it then moves `mark.end` on. Any other
    holder (a crop, or an older KV whose buffers were written since) is copied first, so
    positions below every holder's `length` never change once written.
    """

    layers: tuple[tuple[torch.Tensor, torch.Tensor], ...] = ()
    filled: int | None = None  # positions in use; None: the whole tensors
    mark: WriteMark | None = field(default=None, compare=False)

    @property
    def rows(self) -> int:
        return self.layers[0][0].shape[0] if self.layers else 0

    @property
    def length(self) -> int:
        if not self.layers:
            return 0
        return self.layers[0][0].shape[2] if self.filled is None else self.filled

    @property
    def capacity(self) -> int:
        return self.layers[0][0].shape[2] if self.layers else 0

    def views(self) -> tuple[tuple[torch.Tensor, torch.Tensor], ...]:
        """Per layer (keys, values) of exactly `length` positions: (B, H, length, D) views."""
        if self.filled is None:
            return self.layers
        n = self.filled
        return tuple((k[:, :, :n], v[:, :, :n]) for k, v in self.layers)

    def writable(self, extra: int) -> bool:
        """May a runner write `extra` positions after `length` in place (see the class doc)?"""
        return (self.mark is not None and self.mark.end == self.length
                and self.capacity >= self.length + extra)

    def select(self, rows: Sequence[int]) -> "KV":
        """A new cache (a copy) with the given rows, in that order (rows may repeat)."""
        idx = torch.as_tensor(list(rows), dtype=torch.long)
        if self.mark is None:
            return KV(tuple((k.index_select(0, idx), v.index_select(0, idx)) for k, v in self.layers))
        # Capacity buffers: copy them whole so the copy can grow in place too.
        layers = tuple((k.index_select(0, idx), v.index_select(0, idx)) for k, v in self.layers)
        return KV(layers, self.length, WriteMark(self.length))

    def crop(self, length: int) -> "KV":
        """The first `length` positions (views of the same buffers; no copy)."""
        if not 0 <= length <= self.length:
            raise ValueError(f"crop length must be in 0..{self.length}, got {length}")
        if self.mark is None:
            return KV(tuple((k[:, :, :length], v[:, :, :length]) for k, v in self.layers))
        return KV(self.layers, length, self.mark)

    @staticmethod
    def join(parts: Sequence["KV"]) -> "KV":
        """Stack caches of equal length along the batch (a copy unless there is one part)."""
        parts = [p for p in parts if p.rows]
        if not parts:
            return KV()
        if len(parts) == 1:
            return parts[0]
        if len({p.length for p in parts}) > 1:
            raise ValueError(f"join needs equal lengths, got {[p.length for p in parts]}")
        views = [p.views() for p in parts]
        return KV(tuple(
            (torch.cat([v[i][0] for v in views]), torch.cat([v[i][1] for v in views]))
            for i in range(len(views[0]))
        ))

    def nbytes(self) -> int:
        return sum(k.numel() * k.element_size() * 2 for k, _ in self.layers)
