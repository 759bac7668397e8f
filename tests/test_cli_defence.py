"""The command line's last line of defence, and a closed standard output.

Rules under test are the project's own: an unexpected exception is one `error:` line
naming the command and a crash report in the state folder, exit status 1, and `--debug`
shows the traceback instead; standard output closed by its reader ends the command
quietly, as the Python docs' "Note on SIGPIPE" (library reference, module `signal`)
recommends: catch BrokenPipeError, point stdout at devnull, exit with status 1.
"""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tui.cli import main as cli

ROOT = Path(__file__).resolve().parent.parent


def run_cli(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = cli(argv)
    return rc, out.getvalue(), err.getvalue()


@pytest.fixture
def state(tmp_path, monkeypatch) -> Path:
    folder = tmp_path / "state"
    monkeypatch.setenv("LOGITFORK_STATE_DIR", str(folder))
    return folder


@pytest.fixture
def broken_recipe_command(monkeypatch):
    """`logitfork recipe check` with a bug planted in it."""
    import tui.commands.recipe as recipe_command

    def fails(args):
        return 1 // 0

    monkeypatch.setattr(recipe_command, "main", fails)


def test_an_unexpected_exception_is_one_line_and_a_crash_report(state, broken_recipe_command) -> None:
    rc, out, err = run_cli(["recipe", "check", "top_p=0.9"])
    assert rc == 1 and out == ""
    lines = err.splitlines()
    assert len(lines) == 1 and "Traceback" not in err
    assert lines[0].startswith("error: `logitfork recipe check top_p=0.9` failed: unexpected "
                               "ZeroDivisionError: integer division or modulo by zero; the full "
                               "report is in ")
    reports = list((state / "crash-reports").iterdir())
    assert len(reports) == 1 and str(reports[0]) in lines[0]
    text = reports[0].read_text(encoding="utf-8")
    assert "doing: `logitfork recipe check top_p=0.9`" in text
    assert "Traceback (most recent call last)" in text and "1 // 0" in text


@pytest.mark.parametrize("argv", [["--debug", "recipe", "check", "greedy"],
                                  ["recipe", "check", "greedy", "--debug"]])
def test_debug_shows_the_traceback_instead(state, broken_recipe_command, argv) -> None:
    rc, _, err = run_cli(argv)
    assert rc == 1
    assert "Traceback (most recent call last)" in err and "1 // 0" in err
    assert err.splitlines()[-1].startswith("error: `logitfork ")
    assert not state.exists()  # nothing written: the traceback is on screen


def test_a_state_folder_that_cannot_be_written_is_said(tmp_path, monkeypatch, broken_recipe_command) -> None:
    blocker = tmp_path / "file"
    blocker.write_text("not a folder", encoding="utf-8")
    monkeypatch.setenv("LOGITFORK_STATE_DIR", str(blocker))
    rc, _, err = run_cli(["recipe", "check", "greedy"])
    assert rc == 1 and len(err.splitlines()) == 1
    assert "; no report could be written (" in err


def test_user_errors_stay_exit_2_without_a_report(state) -> None:
    rc, _, err = run_cli(["recipe", "check", "top_p=1.5"])
    assert rc == 2 and len(err.splitlines()) == 1
    assert err.startswith("error: ") and "top_p must be in (0, 1], got 1.5" in err
    assert not state.exists()


def test_the_app_names_a_crash_report_for_a_step_that_fails_unexpectedly(state) -> None:
    # the stepper's one line for a failed step (the app shows it and stays paused; the
    # pausing itself is tested in test_app_stepper.py and test_app_controls.py)
    from tui.session.views import EngineError
    from tui.workbench.stepper import describe

    try:
        2.0 ** 5000
    except OverflowError as exc:
        line = describe(exc, "a step in the app")
    assert line.startswith("unexpected OverflowError: (34, 'Numerical result out of range'); "
                           "the full report is in ")
    (report,) = (state / "crash-reports").iterdir()
    assert str(report) in line and "doing: a step in the app" in report.read_text(encoding="utf-8")
    # the expected kinds stay plain, with no report
    assert describe(MemoryError(), "a step in the app") == "out of memory"
    assert describe(EngineError("no pane with id 9"), "a step in the app") == "no pane with id 9"
    assert len(list((state / "crash-reports").iterdir())) == 1


def subprocess_env(state: Path) -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": str(ROOT), "LOGITFORK_STATE_DIR": str(state)}


def test_a_closed_stdout_ends_the_command_quietly(state) -> None:
    # a command writing far more than a pipe holds (64 KiB on Linux), read by one that
    # stops after the first line, like `| head -1`
    script = (
        "import sys, tui.commands.recipe as r\n"
        "def chatty(args):\n"
        "    for i in range(200000):\n"
        "        print('line', i)\n"
        "    return 0\n"
        "r.main = chatty\n"
        "from tui.cli import main\n"
        "raise SystemExit(main(['recipe', 'check', 'greedy']))\n")
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, env=subprocess_env(state), cwd=ROOT)
    assert proc.stdout is not None and proc.stderr is not None
    assert proc.stdout.readline() == b"line 0\n"
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 1  # the status the Python docs' recipe uses
    assert err == ""  # no traceback, no "Exception ignored ... BrokenPipeError"
    assert not state.exists()


def test_report_to_a_pipe_closed_early_is_quiet(tmp_path, state, tiny_model_dir) -> None:
    scenario = tmp_path / "s.toml"
    scenario.write_text('title = "pipe"\nprompt = "The lighthouse keeper"\nmax_new_tokens = 40\n'
                        + "".join(f'[[pane]]\nname = "p{i}"\nrecipe = "temperature=1.5"\n'
                                  for i in range(8)), encoding="utf-8")
    transcript = tmp_path / "t.jsonl"
    rc, _, err = run_cli(["run", str(scenario), "--model", str(tiny_model_dir), "--out", str(transcript)])
    assert rc == 0, err
    proc = subprocess.Popen([sys.executable, "-m", "tui", "report", str(transcript), "--out", "-"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=subprocess_env(state),
                            cwd=ROOT)
    assert proc.stdout is not None and proc.stderr is not None
    assert proc.stdout.readline().startswith(b"# pipe")
    proc.stdout.close()
    err = proc.stderr.read().decode()
    rc = proc.wait(timeout=120)
    # quiet either way: the report may already sit whole in the pipe's buffer (exit 0)
    assert err == "" and rc in (0, 1)
