"""The options that open a session on a scenario, named and explained once.

`watch` and `run` both open a scenario on a model; they take these options from here,
so that `--help` names and explains each of them the same way in both.
"""

from __future__ import annotations

import argparse

DTYPES = ("auto", "float32", "bfloat16")  # tui.model.catalogue.DTYPES, without importing it


def seed_value(text: str) -> int:
    """A seed from the command line: a whole number >= 0."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 0, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be >= 0, got {value}")
    return value


def add_session_options(parser: argparse.ArgumentParser) -> None:
    """SCENARIO, --model, --seed, --dtype and --allow-pickle."""
    parser.add_argument("scenario", nargs="?", default=None, metavar="SCENARIO",
                        help="a shipped scenario's name or a scenario file (default: "
                        "harbour-town)")
    parser.add_argument("--model", default=None, metavar="NAME",
                        help="a catalogue name or a model folder/GGUF file (overrides the "
                        "scenario's model)")
    parser.add_argument("--seed", type=seed_value, default=None, metavar="S",
                        help="the session's seed, a whole number >= 0 (overrides the "
                        "scenario's)")
    parser.add_argument("--dtype", choices=DTYPES, default="auto",
                        help="weights and activations (default auto: float32 unless the model "
                        "is too big or too slow in it, then bfloat16)")
    parser.add_argument("--allow-pickle", action="store_true",
                        help="allow a model with only pickled (.bin/.pt) weights; they can run "
                        "code when loaded")
