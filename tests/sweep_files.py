"""Small sweep files on the tiny model, for the sweep tests."""

from __future__ import annotations

import contextlib
import io
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

PROMPTS = ("The lighthouse keeper of Vellmar Quay", "Tea at the Copper Kettle:")
RESAMPLES = "100"  # bootstrap resamples in the sweep tests: an interval, quickly


def toml_value(value: object) -> str:
    """A TOML value from a Python str, int, float or list of them (JSON-compatible)."""
    return json.dumps(value, ensure_ascii=False)


def write_sweep(path: Path, model_dir: Path, **fields: object) -> Path:
    """A sweep file: two prompts, greedy and top-k sampling, 4 samples, 10 tokens."""
    data: dict[str, object] = {
        "title": "tiny sweep", "model": str(model_dir), "prompts": list(PROMPTS),
        "recipes": ["greedy", "temperature=1.0 top_k=20"], "samples": 4,
        "max_new_tokens": 10, "seed": 7, "chunk_rows": 4,
    }
    data.update(fields)
    lines = [f"{key} = {toml_value(value)}" for key, value in data.items() if value is not None]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


# Makes the real command pause after each chunk it writes, so that the test can kill it
# between chunks; loaded by Python's `site` module at start-up (sitecustomize).
SLOW_CHUNKS = """\
import time
import tui.sweeps.folder as folder

_append = folder.SweepFolder.append_chunks


def _append_then_wait(self, written):
    _append(self, written)
    time.sleep(2.0)


folder.SweepFolder.append_chunks = _append_then_wait
"""


def run(*argv: str) -> tuple[int, str, str]:
    """`logitfork ARGV` in this process: (exit status, stdout, stderr)."""
    from tui.cli import main as cli

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = cli(list(argv))
    return rc, out.getvalue(), err.getvalue()


# Fixtures shared by the resume and cluster tests (imported into their modules).

@pytest.fixture(scope="module")
def base(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp(request.module.__name__.rsplit(".", 1)[-1])


@pytest.fixture(scope="module")
def sweep(base: Path, tiny_model_dir: Path) -> Path:
    """2 prompts x 2 recipes x 4 samples in chunks of 4 rows: 4 chunks."""
    return write_sweep(base / "lamp.toml", tiny_model_dir, stop=["."])


@pytest.fixture(scope="module")
def reference(base: Path, sweep: Path) -> tuple[Path, str]:
    """The uninterrupted one-process run's folder, and the tables it printed."""
    rc, out, err = run("sweep", str(sweep), "--out", str(base / "whole"), "--resamples", RESAMPLES)
    assert rc == 0, err
    return base / "whole", out


def kill_after_first_chunk(base: Path, sweep: Path, out: Path, *options: str) -> int:
    """Run `logitfork sweep` in a child that pauses after each chunk it writes, kill it
    (SIGKILL) once a whole chunk is in `out`, and return its exit status."""
    root = Path(__file__).resolve().parent.parent
    hooks = base / f"hooks-{out.name}"
    hooks.mkdir()
    (hooks / "sitecustomize.py").write_text(SLOW_CHUNKS)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(hooks), str(root)])}
    proc = subprocess.Popen([sys.executable, "-m", "tui", "sweep", str(sweep), "--out", str(out),
                             "--resamples", RESAMPLES, *options], env=env, cwd=base,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    samples = out / "samples.jsonl"
    deadline = time.monotonic() + 120
    try:
        while b'"end"' not in (samples.read_bytes() if samples.exists() else b""):
            assert proc.poll() is None, proc.stderr.read().decode()
            assert time.monotonic() < deadline, "no chunk written in 120 s"
            time.sleep(0.02)
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.kill()
        proc.wait()
        proc.stderr.close()
    return proc.returncode
