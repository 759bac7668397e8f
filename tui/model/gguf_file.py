"""A GGUF file's tensor table, read from its header alone: sizes, and whether the file is whole.

The memory and disk checks need the parameter count and the largest tensor before
anything is converted, and a file cut short (one part of a split download, an
interrupted copy) must be refused in one line before a conversion of many seconds
fails on a reshape. The `gguf` package's reader maps the whole file and fails on a
short one, so the header is parsed here, following the GGUF specification (version
2 and 3: magic, version, tensor count, metadata count, the metadata key/values, the
tensor infos, then the data, aligned to `general.alignment`, 32 by default; ggml's
docs/gguf.md). Bytes per block of each tensor type come from `gguf.GGML_QUANT_SIZES`.
No torch is imported.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

MAGIC = b"GGUF"
DEFAULT_ALIGNMENT = 32
# metadata value types of the specification: 0-7 and 10-12 are fixed-size scalars
_SCALARS = {0: "<B", 1: "<b", 2: "<H", 3: "<h", 4: "<I", 5: "<i", 6: "<f", 7: "<?",
            10: "<Q", 11: "<q", 12: "<d"}
_STRING, _ARRAY = 8, 9


@dataclass(frozen=True)
class GGUFTable:
    """What a GGUF header says of its tensors, and how long the file must be."""

    architecture: str  # `general.architecture`, e.g. "llama", "qwen2" ("" if unsaid)
    parameters: int  # elements of every tensor
    largest: int  # elements of the largest tensor
    needed_bytes: int  # where the last tensor's data ends
    file_bytes: int

    @property
    def cut_short(self) -> bool:
        return self.file_bytes < self.needed_bytes


def _read(handle: BinaryIO, fmt: str) -> int | float | bool:
    size = struct.calcsize(fmt)
    data = handle.read(size)
    if len(data) != size:
        raise ValueError("the header ends early")
    return struct.unpack(fmt, data)[0]


def _string(handle: BinaryIO) -> bytes:
    length = int(_read(handle, "<Q"))
    if length > 1 << 30:
        raise ValueError("a header string is implausibly long")
    return handle.read(length)


def _skip_value(handle: BinaryIO, kind: int) -> int | float | bool | bytes | None:
    """Read one metadata value; arrays are skipped (returned as None)."""
    if kind == _STRING:
        return _string(handle)
    if kind == _ARRAY:
        item, count = int(_read(handle, "<I")), int(_read(handle, "<Q"))
        if item in _SCALARS:
            handle.seek(struct.calcsize(_SCALARS[item]) * count, 1)
        else:
            for _ in range(count):
                _skip_value(handle, item)
        return None
    if kind not in _SCALARS:
        raise ValueError(f"unknown metadata type {kind}")
    return _read(handle, _SCALARS[kind])


def read_table(path: Path) -> GGUFTable:
    """The tensor table of the GGUF file at `path`; ValueError when it is not one."""
    from gguf import GGML_QUANT_SIZES, GGMLQuantizationType

    with open(path, "rb") as handle:
        if handle.read(4) != MAGIC:
            raise ValueError("not a GGUF file")
        version = int(_read(handle, "<I"))
        if version not in (2, 3):
            raise ValueError(f"GGUF version {version} (versions 2 and 3 are read)")
        tensors, entries = int(_read(handle, "<Q")), int(_read(handle, "<Q"))
        alignment, architecture = DEFAULT_ALIGNMENT, ""
        for _ in range(entries):
            key = _string(handle)
            value = _skip_value(handle, int(_read(handle, "<I")))
            if key == b"general.alignment" and isinstance(value, int) and value > 0:
                alignment = value
            elif key == b"general.architecture" and isinstance(value, bytes):
                architecture = value.decode("utf-8", "replace")
        parameters = largest = end = 0
        for _ in range(tensors):
            _string(handle)
            dims = [int(_read(handle, "<Q")) for _ in range(int(_read(handle, "<I")))]
            kind, offset = int(_read(handle, "<I")), int(_read(handle, "<Q"))
            try:
                block, block_bytes = GGML_QUANT_SIZES[GGMLQuantizationType(kind)]
            except (ValueError, KeyError):
                raise ValueError(f"unknown tensor type {kind}") from None
            count = 1
            for d in dims:
                count *= d
            parameters += count
            largest = max(largest, count)
            end = max(end, offset + count // block * block_bytes)
        data_start = -(-handle.tell() // alignment) * alignment
        size = path.stat().st_size
    return GGUFTable(architecture, parameters, largest, data_start + end, size)
