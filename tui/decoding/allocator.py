"""Keeping freed memory in the process, so per-step vectors do not page-fault.

Each step makes a few fresh (V,) float64 vectors (393 KB at V = 49,152). glibc
hands blocks that large back to the kernel when they are freed, so the next step
faults every page in again; in this project's VM that costs ~0.4 ms per vector,
more than the arithmetic. Raising glibc's mmap and trim thresholds once at start-up
keeps those pages. `open_session` calls `retain_freed_memory()`, which acts once per
process; nothing here calls it on import. (A knob named in `tui.settings`.)
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys
from functools import cache

_M_TRIM_THRESHOLD = -1  # glibc mallopt parameters (malloc.h)
_M_MMAP_THRESHOLD = -3
_KEEP_BYTES = 256 * 1024 * 1024


@cache
def retain_freed_memory() -> bool:
    """Ask glibc to keep freed blocks up to 256 MB; True if the allocator took the setting.

    A no-op returning False on systems without glibc (macOS, Windows, musl). The call
    is made once per process; later calls return the first answer.
    """
    if not sys.platform.startswith("linux"):
        return False
    name = ctypes.util.find_library("c") or "libc.so.6"
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    return bool(mallopt(_M_MMAP_THRESHOLD, _KEEP_BYTES)) and bool(mallopt(_M_TRIM_THRESHOLD, 2 * _KEEP_BYTES))
