"""Every process knob logitfork reads or sets, named in one place.

Read (environment variables, once per process, by `settings()`; nothing else in `tui/`
reads `os.environ` for these):

- ``LOGITFORK_FORWARD``: auto (unset), lean or generic: which forward path runs a model;
- ``LOGITFORK_LOADER``: auto (unset) or transformers: read llama-family checkpoints
  directly, or always through transformers' Auto classes;
- ``LOGITFORK_CACHE_DIR``: where converted GGUF models go (default: the user cache dir);
- ``LOGITFORK_STATE_DIR``: where crash-recovery logs go (default: the user state dir);
- ``LOGITFORK_THREADS``: torch's intra-op thread count (unset: torch's default);
- ``LOGITFORK_BANDWIDTH_GBS``: memory bandwidth in GB/s assumed by ``--dtype auto``
  (unset: `ASSUMED_BANDWIDTH_GBS`; `make bench` measures this machine's).

Set (only by `prepare_process()`, which the entry points call once; never at import):

- ``HF_HUB_OFFLINE=1`` unless set: logitfork never reaches for the network; it must be
  set before huggingface_hub is imported, which reads it once;
- ``OMP_WAIT_POLICY=PASSIVE`` unless set: OpenMP threads sleep while they wait instead of
  spinning next to the app's own thread (read once, when torch loads);
- ``OMP_NUM_THREADS``, torch's intra-op thread count, when ``LOGITFORK_THREADS`` is set
  (so that a command that never needs torch does not load it to set its threads).

Named here, applied by their owners: glibc's malloc thresholds (`tui.decoding.allocator`,
once per process) and matplotlib's backend (`MATPLOTLIB_BACKEND`, chosen per figure by
`tui.reports.gather` and `tui.sweeps.report`, never by `matplotlib.use`).
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass
from functools import cache
from pathlib import Path
from typing import Mapping

from tui.errors import UserError

FORWARD_ENV = "LOGITFORK_FORWARD"
LOADER_ENV = "LOGITFORK_LOADER"
CACHE_ENV = "LOGITFORK_CACHE_DIR"
STATE_DIR_ENV = "LOGITFORK_STATE_DIR"
THREADS_ENV = "LOGITFORK_THREADS"
BANDWIDTH_ENV = "LOGITFORK_BANDWIDTH_GBS"
# A conservative figure for a laptop or a shared cloud VM (recalled, no source);
# `make bench` prints the measured one, and LOGITFORK_BANDWIDTH_GBS overrides it.
ASSUMED_BANDWIDTH_GBS = 8.0
PROCESS_DEFAULTS = {"HF_HUB_OFFLINE": "1", "OMP_WAIT_POLICY": "PASSIVE"}
MATPLOTLIB_BACKEND = "agg"  # figures render to PNG bytes, never to a window


@dataclass(frozen=True)
class Settings:
    """The knobs as read from the environment (see the module docstring)."""

    forward: str = "auto"  # auto | lean | generic
    loader: str = "auto"  # auto | transformers
    cache_dir: Path | None = None  # None: platformdirs' user cache dir
    state_dir: Path | None = None  # None: platformdirs' user state dir
    threads: int | None = None  # None: torch's default
    bandwidth_gbs: float = ASSUMED_BANDWIDTH_GBS
    bandwidth_measured: bool = False  # True when the user gave it


def read_settings(environ: Mapping[str, str]) -> Settings:
    """The settings in `environ`; UserError naming the variable for a bad value."""
    forward = _choice(environ, FORWARD_ENV, ("auto", "lean", "generic"))
    loader = _choice(environ, LOADER_ENV, ("auto", "transformers"))
    threads = _number(environ, THREADS_ENV, int)
    if threads is not None and threads < 1:
        raise UserError(f"{THREADS_ENV}: must be a whole number >= 1, got {threads}")
    bandwidth = _number(environ, BANDWIDTH_ENV, float)
    if bandwidth is not None and not bandwidth > 0:
        raise UserError(f"{BANDWIDTH_ENV}: must be a positive number of GB/s, got {bandwidth}")
    return Settings(
        forward=forward, loader=loader,
        cache_dir=_folder(environ, CACHE_ENV), state_dir=_folder(environ, STATE_DIR_ENV),
        threads=threads,
        bandwidth_gbs=bandwidth if bandwidth is not None else ASSUMED_BANDWIDTH_GBS,
        bandwidth_measured=bandwidth is not None,
    )


@cache
def settings() -> Settings:
    """This process's settings, read from the environment on first use and kept.

    Tests that change a variable call `settings.cache_clear()` afterwards.
    """
    return read_settings(os.environ)


def prepare_process(environ: "os._Environ[str] | dict[str, str]" = os.environ) -> None:
    """Set the process-wide defaults (`PROCESS_DEFAULTS`, unless set) and the thread count.

    Called once by the entry points (the command line, the benchmark) before torch or
    huggingface_hub load; library code never calls it.
    """
    for name, value in PROCESS_DEFAULTS.items():
        environ.setdefault(name, value)
    threads = read_settings(environ).threads
    if threads is not None:
        environ["OMP_NUM_THREADS"] = str(threads)  # torch reads it once, when it loads
        torch = sys.modules.get("torch")
        if torch is not None:  # already loaded (an embedding program): set it directly
            torch.set_num_threads(threads)


def _choice(environ: Mapping[str, str], name: str, allowed: tuple[str, ...]) -> str:
    value = environ.get(name, "").strip().lower() or allowed[0]
    if value not in allowed:
        raise UserError(f"{name}: must be {', '.join(allowed[:-1])} or {allowed[-1]}, got {value!r}")
    return value


def _number(environ: Mapping[str, str], name: str, kind: type) -> "int | float | None":
    text = environ.get(name, "").strip()
    if not text:
        return None
    try:
        return kind(text)
    except ValueError:
        raise UserError(f"{name}: must be a number, got {text!r}") from None


def _folder(environ: Mapping[str, str], name: str) -> Path | None:
    text = environ.get(name, "").strip()
    return Path(text).expanduser() if text else None
