"""Small sweep files on the tiny model, for the sweep tests."""

from __future__ import annotations

import json
from pathlib import Path

PROMPTS = ("The lighthouse keeper of Vellmar Quay", "Tea at the Copper Kettle:")


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
