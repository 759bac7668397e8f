"""The step and matmul sections of `make bench` run on a tiny model (figures not checked).

The benchmark only runs on the real model by hand, so a section that no longer fits the
code it measures would go unnoticed until then. These run the `tui.bench.step` sections
once on a tiny random-weight llama and check the rows they report; speed targets stay in
`make bench`.
"""

from __future__ import annotations

import torch

from tui.bench import step as bench_step
from tui.bench.step import render
from tui.model.forward import Runner
from tui.model.lean_llama import LeanRunner, onednn_works

try:
    from tiny_model import tiny_llama
except ImportError:
    from tests.tiny_model import tiny_llama


def test_the_matmul_section_measures_every_layout_at_one_and_four_rows():
    model = tiny_llama()
    rows = bench_step.matmul_rows(model, rounds=1)
    names = [r.name for r in rows]
    variants = 6 if onednn_works(torch.float32) else 4  # the oneDNN layouts need oneDNN here
    assert len(rows) == 2 * 2 * variants  # two weights, two row counts
    assert any("oneDNN packed" in n for n in names) == onednn_works(torch.float32)
    assert all(r.value.endswith(" ms") for r in rows)
    assert "F.linear" in render(rows)


def test_the_step_sections_cover_both_paths_and_every_pane_count():
    model = tiny_llama()
    runners = {"generic": Runner(model), "lean": LeanRunner(model)}
    contexts = {n: bench_step.context_ids(list(range(1, 20)), n) for n in (10, 40)}
    grid = bench_step.step_grid(runners, contexts, (1, 4), steps=2)
    assert set(grid) == {(path, ctx, panes) for path in runners for ctx in (10, 40) for panes in (1, 4)}
    rows = bench_step.step_rows(grid, (10, 40), (1, 4))
    rows += bench_step.chunk_rows(runners["lean"], LeanRunner(model, chunked=False), contexts[10], 2)
    rows += bench_step.prefill_rows(runners, contexts, rounds=1)
    rows += bench_step.thread_rows(runners["lean"], contexts[10], 2)
    assert {r.section for r in rows} >= {"prefill", "threads"}
    assert any(r.status in ("PASS", "MISS") for r in rows)  # the 4-pane/1-pane target row


def test_the_own_models_section_builds_a_sharded_folder_that_loads_directly(tmp_path, tiny_model_dir,
                                                                           monkeypatch):
    from tui.bench import own_models
    from tui.model.llama_checkpoint import parameter_count, weight_files

    monkeypatch.setattr(own_models, "SHARD_BYTES", 20_000)
    shape = {**own_models.SHAPES["qwen2-0.5b"], "hidden_size": 32, "num_hidden_layers": 2,
             "num_attention_heads": 4, "num_key_value_heads": 2, "intermediate_size": 48,
             "vocab_size": 300}
    folder = tmp_path / "qwen"
    parameters = own_models.build_folder(folder, shape, tiny_model_dir)
    assert parameters == parameter_count(folder) and len(set(weight_files(folder).values())) > 1
    got = own_models.measure_one(folder, "float32", steps=1)
    assert got["path"].startswith("fast path: qwen2") and got["weights"] == 4 * parameters
    assert set(got["step_s"]) == {"1", "4", "8"} and got["rss"] > 0
