"""`logitfork run SCENARIO`: decode a scenario without screens and write its transcript."""

from __future__ import annotations

import argparse
import statistics
import sys
import time

from tui.commands.session_options import add_session_options


def add_arguments(p: argparse.ArgumentParser) -> None:
    add_session_options(p)
    p.add_argument("--steps", type=int, default=None, metavar="N",
                   help="stop after N steps (default: the scenario's max_new_tokens)")
    p.add_argument("--out", default=None, metavar="FILE.jsonl|-",
                   help="write the transcript here ('-' for standard output)")


def main(args: argparse.Namespace) -> int:
    from tui.commands.model_loading import load_for_command
    from tui.errors import UserError
    from tui.files import write_atomic
    from tui.session.scenario import find_scenario, load_scenario

    scenario = load_scenario(find_scenario(args.scenario))  # check the file before loading
    if args.steps is not None and args.steps < 1:
        raise UserError(f"--steps: must be at least 1, got {args.steps}")

    from tui.commands.progress_display import ProgressDisplay
    from tui.model.catalogue import DEFAULT_MODEL
    from tui.progress import ProgressEvent
    from tui.session.opening import open_session
    from tui.transcripts import format as transcript
    model_name = args.model or scenario.model or DEFAULT_MODEL
    try:
        lm = load_for_command(model_name, dtype=args.dtype, allow_pickle=args.allow_pickle)
    except UserError as exc:  # say where the model's name came from
        where = "--model" if args.model else f"{scenario.path}: model" if scenario.model else None
        raise (UserError(f"{where}: {exc}", exc.exit_code) if where else exc) from None
    engine, info = open_session(lm, scenario, seed=args.seed)
    steps = min(args.steps or scenario.max_new_tokens, scenario.max_new_tokens)
    times: list[float] = []
    tokens = 0
    with ProgressDisplay(log_every=None) as display:  # a bar on a terminal only
        for i in range(steps):
            start = time.perf_counter()
            out = engine.step()
            if not out:
                break
            times.append(time.perf_counter() - start)
            tokens += len(out)
            display(ProgressEvent("run", i + 1, steps, "steps", f"{len(out)} panes live"))

    view = engine.view()
    if args.out:
        text_lines = transcript.lines(view, info, engine.prompt_ids)
        if args.out == "-":
            transcript.write_stream(sys.stdout, text_lines)
        else:
            try:
                write_atomic(args.out, text_lines)
            except OSError as exc:
                raise UserError(f"{args.out}: cannot write the transcript: "
                                f"{exc.strerror or exc}") from None
            print(f"transcript: {args.out}", file=sys.stderr)
    out_fh = sys.stderr if args.out == "-" else sys.stdout
    for pane in view.panes:
        stop = f" [{pane.stop}]" if pane.stop else ""
        print(f"== {pane.name}: {pane.recipe}{stop}", file=out_fh)
        print(pane.text, file=out_fh)
    median_ms = statistics.median(times) * 1000 if times else 0.0
    rate = tokens / sum(times) if times else 0.0
    print(f"summary: panes={len(view.panes)} steps={len(times)} "
          f"step_ms_median={median_ms:.1f} tokens_per_s={rate:.1f}", file=sys.stderr)
    return 0
