"""A sweep end to end on the tiny random-weight llama: rows, samples, files, tables, errors.

Outside references: transformers 5.24.0 (greedy `generate` and the full-sequence
forward pass of LlamaForCausalLM for log-probabilities), the tokenizer's own decode,
and measures recomputed by hand in the test (distinct-2 by counting bigrams, Li et al.
2016; the mean of the recorded log-probabilities).
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

from tui.cli import main as cli
from tui.model.forward import make_runner
from tui.progress import format_duration
from tui.session.record import STOP_EOS, STOP_LENGTH, STOP_REASONS, STOP_STRING
from tui.sweeps.folder import SweepFolder
from tui.sweeps.progress import SweepProgress
from tui.sweeps.runner import Chunk, SweepJob, SweepRunner, plan_batches, row_uniforms

try:
    from sweep_files import PROMPTS, write_sweep
except ImportError:
    from tests.sweep_files import PROMPTS, write_sweep

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


@pytest.fixture(scope="module")
def swept(tiny_model_dir, tmp_path_factory):
    """One sweep of 2 recipes x 4 samples x 2 prompts through the command line."""
    base = tmp_path_factory.mktemp("sweep_run")
    sweep = write_sweep(base / "tiny.toml", tiny_model_dir)
    out, err = io.StringIO(), io.StringIO()

    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = cli(["sweep", str(sweep), "--out", str(base / "out"), "--resamples", "100"])
    return rc, base / "out", sweep, out.getvalue(), err.getvalue()


def results_rows(folder: Path) -> dict[tuple[str, str], dict[str, str]]:
    with open(folder / "results.csv", newline="", encoding="utf-8") as fh:
        return {(r["recipe"], r["prompt"]): r for r in csv.DictReader(fh)}


def bigrams(tokens) -> list[tuple[int, int]]:
    return [tuple(tokens[i:i + 2]) for i in range(len(tokens) - 1)]


def test_the_sweep_writes_every_file_and_prints_the_tables(swept):
    rc, out, sweep, stdout, stderr = swept
    assert rc == 0, stderr
    for name in ("sweep.toml", "versions.json", "manifest.json", "samples.jsonl",
                 "results.csv", "results.md", "front.png"):
        assert (out / name).is_file(), name
    assert (out / "sweep.toml").read_text() == sweep.read_text()
    versions = json.loads((out / "versions.json").read_text())
    import importlib.metadata

    assert versions["transformers"] == importlib.metadata.version("transformers")
    assert versions["torch"] == importlib.metadata.version("torch")
    assert versions["model"]["dtype"] == "float32"
    assert (out / "front.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)
    assert "tiny sweep: all 2 prompt(s)" in stdout and "tiny sweep: prompt 2" in stdout
    assert "greedy" in stdout and "temperature=1 top_k=20" in stdout
    assert "100%" in stderr and "chunks 4/4" in stderr  # the progress line, not a terminal
    md = (out / "results.md").read_text()
    assert md.count("| `greedy` |") == 3  # overall and each of the two prompts


def test_the_numbers_follow_from_the_samples(swept):
    _, out, *_ = swept
    samples = SweepFolder.read(out).samples()
    assert len(samples) == 2 * (1 + 4)  # greedy keeps one token: one sample per prompt
    rows = results_rows(out)
    for recipe in ("greedy", "temperature=1 top_k=20"):
        mine = [s for s in samples if s.recipe == recipe]
        copies = 4 if recipe == "greedy" else 1  # greedy's one sample stands for all 4 (README)
        # distinct-2 (Li et al. 2016): distinct bigrams / all bigrams, pooled per prompt, then
        # averaged over prompts (the README's definition); counted by hand here.
        per_prompt = []
        for p in range(2):
            grams = [g for s in mine if s.prompt_index == p for g in bigrams(s.token_ids)] * copies
            per_prompt.append(len(set(grams)) / len(grams))
        row = rows[(recipe, "all")]
        assert float(row["distinct_2"]) == pytest.approx(np.mean(per_prompt))
        logprobs = [x for s in mine for x in s.logprobs]
        assert float(row["mean_logprob"]) == pytest.approx(np.mean(logprobs))
        assert float(row["perplexity"]) == pytest.approx(math.exp(-np.mean(logprobs)))
        assert sum(int(row[f"ended_{r.replace(' ', '_')}"]) for r in STOP_REASONS) == 8 // copies
        assert float(row["mean_logprob_low"]) <= float(row["mean_logprob"]) <= float(row["mean_logprob_high"])
        for p in range(2):
            assert int(rows[(recipe, str(p + 1))]["n_samples"]) == (1 if recipe == "greedy" else 4)
    # two recipes: each is on the front unless the other beats it on both axes (definition)
    g, t = rows[("greedy", "all")], rows[("temperature=1 top_k=20", "all")]
    g_beats = float(g["distinct_2"]) >= float(t["distinct_2"]) and float(g["mean_logprob"]) >= float(t["mean_logprob"])
    assert t["on_front"] == ("0" if g_beats else "1")


def test_kept_sets_and_entropies_match_the_recipes(swept):
    _, out, *_ = swept
    for s in SweepFolder.read(out).samples():
        if s.recipe == "greedy":  # greedy keeps one token: entropy 0 (common practice, no source)
            assert set(s.kept) == {1} and set(s.final_entropy) == {0.0}
        else:  # top-k keeps exactly k tokens when no logits tie (Fan et al. 2018)
            assert set(s.kept) == {20}
            assert all(0 < h <= math.log(20) + 1e-9 for h in s.final_entropy)  # H <= log k


def test_greedy_rows_equal_transformers_greedy_generate(swept, lm):
    _, out, *_ = swept
    greedy = [s for s in SweepFolder.read(out).samples() if s.recipe == "greedy"]
    for p, prompt in enumerate(PROMPTS):
        ids = torch.tensor([lm.encode_prompt(prompt, None)])
        # reference: transformers 5.24.0 GenerationMixin.generate, do_sample=False
        ref = lm.model.generate(ids, do_sample=False, max_new_tokens=10, eos_token_id=list(lm.eos_ids),
                                pad_token_id=lm.eos_ids[0])
        rows = [list(s.token_ids) for s in greedy if s.prompt_index == p]
        assert rows == [ref[0, ids.shape[1]:].tolist()]  # run once: 4 runs would be 4 copies


def test_a_recipe_that_cannot_vary_runs_once_and_the_table_says_so(swept):
    _, out, _, stdout, _ = swept
    rows = results_rows(out)
    for scope in ("all", "1", "2"):
        g, t = rows[("greedy", scope)], rows[("temperature=1 top_k=20", scope)]
        assert (g["fixed"], t["fixed"]) == ("1", "0")
        # nothing varies, so every interval is the point (a degenerate sampling distribution)
        for name in ("distinct_1", "distinct_2", "self_bleu", "mean_logprob", "repetition_4"):
            assert g[f"{name}_low"] == g[name] == g[f"{name}_high"], (scope, name)
        assert float(g["self_bleu"]) == pytest.approx(100.0)  # BLEU of a text against its copies (sacrebleu)
        assert float(t["mean_logprob_low"]) < float(t["mean_logprob_high"])  # sampling does vary
    assert "(fixed)" in stdout and "ran once per prompt" in stdout
    md = (out / "results.md").read_text()
    assert "| `greedy` | 2 (fixed) |" in md and "ran once per prompt" in md


def test_logprobs_and_text_match_the_full_forward_pass(swept, lm):
    _, out, *_ = swept
    for s in SweepFolder.read(out).samples()[::3]:
        prompt = lm.encode_prompt(PROMPTS[s.prompt_index], None)
        ids = torch.tensor([prompt + list(s.token_ids)])
        with torch.inference_mode():  # reference: transformers 5.24.0 LlamaForCausalLM forward
            logp = torch.log_softmax(lm.model(ids).logits[0].double(), dim=-1)
        want = [float(logp[len(prompt) - 1 + i, t]) for i, t in enumerate(s.token_ids)]
        assert np.allclose(s.logprobs, want, atol=1e-3)
        assert s.text == lm.decode(list(s.token_ids))  # the tokenizer's own decode


def test_endings_follow_their_rules(lm):
    prompt = tuple(lm.encode_prompt(PROMPTS[0], None))
    job = SweepJob((prompt,), ("temperature=1.0",), samples=8, max_new_tokens=12, seed=3,
                   chunk_rows=8, stop=("e",))
    sweeper = SweepRunner(make_runner(lm.model), lm.decode, job, eos_ids=lm.eos_ids,
                          max_context=lm.max_context)
    samples = [s for c in job.chunks() for s in sweeper.run_chunk(c)]
    seen = set()
    for s in samples:
        seen.add(s.ending)
        body = lm.decode(list(s.token_ids[:-1]))
        assert lm.eos_ids[0] not in s.token_ids[:-1] and "e" not in body  # stops at the first one
        if s.ending == STOP_STRING:
            assert "e" in s.text
        elif s.ending == STOP_EOS:
            assert s.token_ids[-1] in lm.eos_ids
        else:
            assert s.ending == STOP_LENGTH and len(s.token_ids) == 12
    assert STOP_STRING in seen


def test_samples_do_not_depend_on_the_chunking(lm):
    prompts = tuple(tuple(lm.encode_prompt(p, None)) for p in PROMPTS)
    recipes = ("temperature=0.9 top_p=0.9", "mirostat(tau=3,learning_rate=0.1)")
    runs = []
    for rows in (1, 3):  # 3 rows: chunks that split a recipe's samples
        job = SweepJob(prompts, recipes, samples=2, max_new_tokens=6, seed=11, chunk_rows=rows)
        sweeper = SweepRunner(make_runner(lm.model), lm.decode, job, eos_ids=lm.eos_ids,
                              max_context=lm.max_context)
        found = {(s.recipe, s.prompt_index, s.sample_index): s.token_ids
                 for c in reversed(job.chunks()) for s in sweeper.run_chunk(c)}
        runs.append(found)
    assert runs[0] == runs[1]  # chunk sizes differ, and the chunks ran last to first
    assert len(set(runs[0].values())) == 8  # the samples really differ


def test_batches_join_the_chunks_of_one_prompt_and_keep_their_plan_on_resume():
    job = SweepJob(((1, 2), (3,)), ("greedy", "top_k=5"), samples=4, max_new_tokens=2,
                   chunk_rows=2)  # 5 rows a prompt: chunks of 2, 2, 1 rows, prompt by prompt
    chunks = job.chunks()
    assert [(c.index, c.prompt_index, len(c.rows)) for c in chunks] == \
        [(0, 0, 2), (1, 0, 2), (2, 0, 1), (3, 1, 2), (4, 1, 2), (5, 1, 1)]
    ids = lambda batches: [[c.index for c in b] for b in batches]  # noqa: E731
    assert ids(plan_batches(chunks, 4)) == [[0, 1], [2], [3, 4], [5]]
    assert ids(plan_batches(chunks, 64)) == [[0, 1, 2], [3, 4, 5]]  # never across prompts
    assert ids(plan_batches(chunks, 1)) == [[0], [1], [2], [3], [4], [5]]  # each in parts
    # written chunks are left out of the batches an unbroken run would have run
    assert ids(plan_batches(chunks, 4, done={0, 4})) == [[1], [2], [3], [5]]
    assert ids(plan_batches(chunks[3:], 64, done={3, 4, 5})) == []


def test_a_batch_writes_each_chunk_as_its_own_run_would(lm):
    prompts = tuple(tuple(lm.encode_prompt(p, None)) for p in PROMPTS)
    job = SweepJob(prompts, ("temperature=0.9 top_p=0.9", "min_p=0.2"), samples=3,
                   max_new_tokens=6, seed=5, chunk_rows=2)
    sweeper = SweepRunner(make_runner(lm.model), lm.decode, job, eos_ids=lm.eos_ids,
                          max_context=lm.max_context)
    alone = {c.index: sweeper.run_chunk(c) for c in job.chunks()}
    for rows in (6, 4, 1):  # whole prompts; chunks joined; every chunk cut into rows
        got = {c.index: r for b in plan_batches(job.chunks(), rows)
               for c, r in sweeper.run_batch(b, rows)}
        assert sorted(got) == sorted(alone)
        for index, records in alone.items():
            for a, b in zip(records, got[index], strict=True):
                assert (a.recipe, a.sample_index, a.token_ids, a.text) == \
                       (b.recipe, b.sample_index, b.token_ids, b.text)
                assert np.allclose(a.logprobs, b.logprobs, rtol=0, atol=1e-4)  # float sums only
    with pytest.raises(ValueError, match="share one prompt"):
        sweeper.run_batch((Chunk(0, 0, ((0, 0),)), Chunk(1, 1, ((0, 0),))), 4)


def test_row_uniforms_are_a_pure_function_of_their_key():
    a = row_uniforms(7, 1, "top_p=0.9", 2, 5)
    assert np.array_equal(a, row_uniforms(7, 1, "top_p=0.9", 2, 5))
    assert np.array_equal(a, row_uniforms(7, 1, "top_p=0.9", 2, 9)[:5])  # steps only extends
    for other in (row_uniforms(8, 1, "top_p=0.9", 2, 5), row_uniforms(7, 0, "top_p=0.9", 2, 5),
                  row_uniforms(7, 1, "top_p=0.8", 2, 5), row_uniforms(7, 1, "top_p=0.9", 3, 5)):
        assert not np.array_equal(a, other)
    assert ((0 <= a) & (a < 1)).all()


def test_a_bad_sweep_file_is_one_line_and_exit_2(tmp_path, tiny_model_dir, capsys):
    bad = write_sweep(tmp_path / "bad.toml", tiny_model_dir, samples=0)
    assert cli(["sweep", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err == f"error: {bad}: samples: must be an integer in [1, 100000], got 0\n"
    grid = tmp_path / "grid.toml"
    grid.write_text(bad.read_text().replace("samples = 0", "samples = 2")
                    + "[grid]\ntop_p = [0.9, 1.5]\n")
    assert cli(["sweep", str(grid)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"error: {grid}: grid.top_p[2]: ") and "1.5" in err
    assert err.count("\n") == 1 and "Traceback" not in err


def test_a_batch_that_does_not_fit_is_one_line_and_nothing_is_written(tmp_path, tiny_model_dir,
                                                                      capsys):
    sweep = write_sweep(tmp_path / "s.toml", tiny_model_dir)
    out = tmp_path / "out"
    assert cli(["sweep", str(sweep), "--out", str(out), "--batch-rows", str(10**9)]) == 2
    lines = capsys.readouterr().err.splitlines()  # the model's line, then the error
    assert lines[-1].startswith(f"error: --batch-rows: {10**9} rows per forward pass do not fit "
                                "in memory with model ") and "or less (memory allows " in lines[-1]
    assert len(lines) == 2 and lines[0].startswith("model ") and not out.exists()
    assert cli(["sweep", str(sweep), "--out", str(out), "--batch-rows", "0"]) == 2
    assert capsys.readouterr().err == "error: --batch-rows: must be at least 1, got 0\n"


def test_a_bad_sweep_file_is_refused_before_torch_loads(tmp_path, tiny_model_dir):
    bad = write_sweep(tmp_path / "bad.toml", tiny_model_dir, max_new_tokens=0)
    code = ("import sys\nfrom tui.cli import main\n"
            f"rc = main(['sweep', {str(bad)!r}])\nprint('torch' in sys.modules, rc)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert done.stdout.strip() == "False 2"
    assert done.stderr == f"error: {bad}: max_new_tokens: must be an integer in [1, 4096], got 0\n"


def test_command_line_mistakes_name_the_option(tmp_path, tiny_model_dir, capsys):
    sweep = write_sweep(tmp_path / "s.toml", tiny_model_dir)
    assert cli(["sweep", str(sweep), "--shard", "3/2"]) == 2
    assert capsys.readouterr().err.startswith("error: --shard: must be I/N with 1 <= I <= N")
    (tmp_path / "taken").mkdir()
    (tmp_path / "taken" / "notes.txt").write_text("mine")
    assert cli(["sweep", str(sweep), "--out", str(tmp_path / "taken")]) == 2
    assert "is not a sweep folder" in capsys.readouterr().err
    scen = write_sweep(tmp_path / "scen.toml", tiny_model_dir, prompts=None, scenario="gone.toml")
    assert cli(["sweep", str(scen)]) == 2
    assert capsys.readouterr().err.startswith(f"error: {scen}: scenario: ")


def test_progress_line_counts_row_steps_and_estimates_the_time_left():
    # worked example (common practice, no source: linear extrapolation of the time left)
    now = [0.0]
    events: list = []
    bar = SweepProgress(4, 10, chunks=2, report=events.append, clock=lambda: now[0])
    now[0] = 5.0
    for _ in range(5):
        bar.step(2, 0)
    bar.step(2, 2)  # both rows end at step 6: their 4 unused steps count as done
    bar.chunk_done(2)
    assert bar.fraction() == pytest.approx(0.5)  # 20 of 40 row-steps
    last = events[-1]
    assert (last.done, last.total, last.fraction) == (20, 40, 0.5)
    assert "ETA 5s" in last.note  # 5 s for half: 5 s more
    assert "chunks 1/2" in last.note and "12 tokens" in last.note
    assert len(events) == 7  # one event per step and per written chunk
    assert [format_duration(s) for s in (45, 185, 7620)] == ["45s", "3m05s", "2h07m"]


def test_the_plain_display_writes_a_line_now_and_then_and_the_last_one():
    # a log (not a terminal): the first event, then nothing until log_every has passed,
    # then the finished task's line (ProgressDisplay, commands layer)
    from tui.commands.progress_display import ProgressDisplay
    from tui.progress import ProgressEvent

    out = io.StringIO()
    with ProgressDisplay(out, log_every=3600) as display:
        for done in range(1, 11):
            display(ProgressEvent("sweep s.toml", done, 10, "", f"chunks {done}/10"))
        display.say("a note of its own")
    lines = out.getvalue().splitlines()
    assert lines == [" 10%  sweep s.toml  chunks 1/10", "100%  sweep s.toml  chunks 10/10",
                     "a note of its own"]
