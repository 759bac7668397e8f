"""`--help` of the commands that open a scenario: the same options, named the same way.

The check is against argparse's own parser objects (the standard library), not against
text the project wrote: each shared option has the same metavar and help in `watch`
and `run`, and every option of both commands has a help line. Project contract, no
outside source.
"""

from __future__ import annotations

import argparse

import pytest

from tui.cli import build_parser, main as cli_main

SHARED = ("scenario", "model", "seed", "dtype", "allow_pickle")


def _actions(command: str) -> dict[str, argparse.Action]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {a.dest: a for a in sub.choices[command]._actions if a.dest != "help"}


def test_watch_and_run_name_and_explain_the_shared_options_alike():
    watch, run = _actions("watch"), _actions("run")
    for dest in SHARED:
        assert (watch[dest].metavar, watch[dest].help, watch[dest].option_strings) == \
            (run[dest].metavar, run[dest].help, run[dest].option_strings), dest
    for actions in (watch, run):
        assert all(a.help for a in actions.values()), [d for d, a in actions.items()
                                                         if not a.help]
    assert "float32" in run["dtype"].help  # the one that had none


@pytest.mark.parametrize("command", ["watch", "run"])
def test_a_negative_seed_is_refused_before_anything_loads(command, capsys):
    with pytest.raises(SystemExit) as stop:
        cli_main([command, "--seed", "-1"])
    assert stop.value.code == 2
    assert "--seed: must be >= 0, got -1" in capsys.readouterr().err
