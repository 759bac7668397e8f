"""The process knobs (`tui.settings`): read once, validated by name, no side effects on import."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tui.errors import UserError
from tui.settings import (ASSUMED_BANDWIDTH_GBS, PROCESS_DEFAULTS, Settings, prepare_process,
                          read_settings, settings)

ROOT = Path(__file__).resolve().parents[1]


def test_an_empty_environment_gives_the_defaults():
    assert read_settings({}) == Settings()
    assert read_settings({}).bandwidth_gbs == ASSUMED_BANDWIDTH_GBS


def test_every_variable_is_read():
    got = read_settings({"LOGITFORK_FORWARD": " Generic ", "LOGITFORK_LOADER": "transformers",
                         "LOGITFORK_CACHE_DIR": "~/c", "LOGITFORK_STATE_DIR": "/s",
                         "LOGITFORK_THREADS": "3", "LOGITFORK_BANDWIDTH_GBS": "12.5"})
    assert got == Settings(forward="generic", loader="transformers",
                           cache_dir=Path("~/c").expanduser(), state_dir=Path("/s"), threads=3,
                           bandwidth_gbs=12.5, bandwidth_measured=True)


@pytest.mark.parametrize("name, value, message", [
    ("LOGITFORK_FORWARD", "fastest", "LOGITFORK_FORWARD: must be auto, lean or generic, got 'fastest'"),
    ("LOGITFORK_LOADER", "fast", "LOGITFORK_LOADER: must be auto or transformers, got 'fast'"),
    ("LOGITFORK_THREADS", "0", "LOGITFORK_THREADS: must be a whole number >= 1, got 0"),
    ("LOGITFORK_THREADS", "two", "LOGITFORK_THREADS: must be a number, got 'two'"),
    ("LOGITFORK_BANDWIDTH_GBS", "-1", "LOGITFORK_BANDWIDTH_GBS: must be a positive number"),
])
def test_a_bad_value_names_the_variable(name, value, message):
    with pytest.raises(UserError, match=message):
        read_settings({name: value})


def test_the_environment_is_read_once(monkeypatch):
    monkeypatch.setenv("LOGITFORK_FORWARD", "generic")
    first = settings()
    monkeypatch.setenv("LOGITFORK_FORWARD", "lean")
    assert settings() is first and settings().forward == "generic"  # kept until cleared
    settings.cache_clear()
    assert settings().forward == "lean"


def test_prepare_process_sets_only_what_is_unset():
    environ = {"OMP_WAIT_POLICY": "ACTIVE"}
    prepare_process(environ)
    assert environ == {**PROCESS_DEFAULTS, "OMP_WAIT_POLICY": "ACTIVE"}


def test_a_thread_count_reaches_torch_without_loading_it_early():
    # reference: torch.get_num_threads() honours OMP_NUM_THREADS read when torch loads
    # (PyTorch docs, "CPU threading and TorchScript inference")
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LOGITFORK_THREADS": "1"}
    code = ("import sys\nfrom tui.settings import prepare_process\nprepare_process()\n"
            "early = 'torch' in sys.modules\nimport torch\nprint(early, torch.get_num_threads())\n")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         check=True)
    assert out.stdout.split() == ["False", "1"]


def test_importing_and_loading_a_model_set_nothing_in_the_environment(tiny_model_dir):
    # A fresh process with a clean environment: importing the package and loading a
    # model must leave os.environ as it was (the knobs are set by entry points only).
    env = {k: v for k, v in os.environ.items() if k not in PROCESS_DEFAULTS}
    env["PYTHONPATH"] = str(ROOT)
    code = ("import os, json\nbefore = dict(os.environ)\n"
            "import tui.settings, tui.model.catalogue, tui.reports.gather\n"
            f"tui.model.catalogue.load_model({str(tiny_model_dir)!r})\n"
            "print(json.dumps(sorted(set(os.environ.items()) ^ set(before.items()))))\n")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []
