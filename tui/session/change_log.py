"""`ChangeLog`: a setting that changes from a step on, and the one set of rules for it.

A pane's recipe and a session's draw setting are both logs of (from step, value)
entries in step order: the value in force at step t is the latest entry starting at
or before t. The engine, the transcript header, rerun, the step analysis and the
report all read and change such logs; they do it through this type so that the rules
(what a rewind does to later changes, what a new change does to planned ones) live
in one place. Common practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Generic, Iterable, Iterator, TypeVar

T = TypeVar("T")
Entries = tuple[tuple[int, T], ...]


@dataclass(frozen=True)
class ChangeLog(Generic[T]):
    """(from step, value) entries, steps ascending and distinct."""

    entries: Entries = ()

    @classmethod
    def of(cls, entries: Iterable[tuple[int, T]]) -> "ChangeLog[T]":
        return cls(tuple((int(s), v) for s, v in entries))

    def __iter__(self) -> Iterator[tuple[int, T]]:
        return iter(self.entries)

    def __len__(self) -> int:
        return len(self.entries)

    def at(self, step: int, default: T) -> T:
        """The value in force at `step` (`default` before the first entry)."""
        value = default
        for start, v in self.entries:
            if start > step:
                break
            value = v
        return value

    def set_from(self, step: int, value: T) -> "ChangeLog[T]":
        """`value` from `step` on: changes planned at or after `step` give way to it."""
        return ChangeLog(tuple(e for e in self.entries if e[0] < step) + ((step, value),))

    def rewound(self, step: int) -> "ChangeLog[T]":
        """After a rewind to `step`: changes made later take effect at `step` (the latest wins)."""
        out: dict[int, T] = {}
        for start, v in self.entries:
            out[min(start, step)] = v
        return ChangeLog(tuple(sorted(out.items())))

    def starting_at(self, step: int) -> T | None:
        """The value set exactly at `step` (the last such entry), or None."""
        found = None
        for start, v in self.entries:
            if start == step:
                found = v
        return found

    def after(self, step: int) -> dict[int, T]:
        """Changes strictly after `step`: step -> value."""
        return {s: v for s, v in self.entries if s > step}
