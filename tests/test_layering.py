"""The engine, recipes, metrics and transcript code import neither Textual nor Rich.

Checked in a fresh interpreter, since this test process has imported the app already.
"""

from __future__ import annotations

import json
import subprocess
import sys

CORE_MODULES = [
    "tui.decoding", "tui.engine", "tui.forward", "tui.record", "tui.scenario",
    "tui.session", "tui.transcript", "tui.models", "tui.metrics", "tui.pareto",
    "tui.sweep_spec", "tui.views", "tui.transcript_reader", "tui.transcript_schema",
    "tui.recovery", "tui.recovery_reader", "tui.report", "tui.report_html", "tui.report_md",
    "tui.rerun", "tui.token_style", "tui.bootstrap", "tui.sweep_runner", "tui.lean_llama",
    "tui.model_cache", "tui.model_sources", "tui.sweep_folder", "tui.sweep_plan",
    "tui.sweep_results", "tui.sweep_progress", "tui.llama_checkpoint",
    "tui.model_loading", "tui.loaded_model",
]


def test_core_modules_import_no_textual_or_rich():
    code = (
        "import importlib, json, sys\n"
        f"mods = {CORE_MODULES!r}\n"
        "found = []\n"
        "for m in mods:\n"
        "    try:\n"
        "        importlib.import_module(m)\n"
        "        found.append(m)\n"
        "    except ModuleNotFoundError as exc:\n"
        "        if exc.name != m: raise\n"
        "bad = sorted(k for k in sys.modules if k.split('.')[0] in ('textual', 'rich'))\n"
        "print(json.dumps({'found': found, 'bad': bad}))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    result = json.loads(out.stdout)
    assert {"tui.decoding", "tui.engine", "tui.transcript"} <= set(result["found"])
    assert result["bad"] == []


def test_the_recipe_command_does_not_load_torch():
    code = ("import sys\nfrom tui.cli import main\n"
            "rc = main(['recipe', 'check', 'top_p=0.9'])\n"
            "print('torch' in sys.modules, rc)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().splitlines()[-1] == "False 0"
