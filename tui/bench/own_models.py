"""`make bench`, own models: random-weight models of deployed shapes, built here, against the
bandwidth floor.

    python -m tui.bench.own_models [--quick] [--keep]

Two shapes (`SHAPES`): a llama of 1B shape and a qwen2 of 0.5B shape, written once as
sharded bfloat16 safetensors folders (as models ship) with the embedded model's tokenizer,
under the conversion cache's `bench/` folder. Each (shape, dtype) is loaded in a fresh
process through `load_model`, as a user's folder would be, and that process reports:
the decode step time at 1, 4 and 8 panes (medians, after a prefilled context), the
resident memory after the steps, and which forward path ran. The floor: a decode step
reads every weight once, so it takes at least (weight bytes) / (memory bandwidth); the
bandwidth is measured here by summing a 1 GB float32 tensor (best of 5), a read-only
figure, so the floor is optimistic. Targets (issue: own models): 4 panes at most 1.3x
1 pane; one pane within 1.5x the bfloat16 floor; RSS within 1.3x the weights. The 1B
shape is also written as an F16 GGUF and converted both ways (`conversion_rows`), for
the peak memory of a streamed conversion against transformers' whole-model load.
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import Any, Sequence

from tui.bench.step import Row, ms, render, verdict

SHAPES: dict[str, dict[str, Any]] = {
    "llama-1b": {"model_type": "llama", "architectures": ["LlamaForCausalLM"], "hidden_size": 2048,
                 "num_hidden_layers": 16, "num_attention_heads": 32, "num_key_value_heads": 8,
                 "intermediate_size": 8192, "vocab_size": 49152, "tie_word_embeddings": True,
                 "attention_bias": False, "mlp_bias": False, "head_dim": 64},
    "qwen2-0.5b": {"model_type": "qwen2", "architectures": ["Qwen2ForCausalLM"], "hidden_size": 896,
                   "num_hidden_layers": 24, "num_attention_heads": 14, "num_key_value_heads": 2,
                   "intermediate_size": 4864, "vocab_size": 151936, "tie_word_embeddings": True,
                   "use_sliding_window": False},
}
COMMON = {"hidden_act": "silu", "rms_norm_eps": 1e-6, "max_position_embeddings": 4096,
          "rope_parameters": {"rope_type": "default", "rope_theta": 10000.0},
          "bos_token_id": 1, "eos_token_id": 2}
PANES = (1, 4, 8)
DTYPES = ("bfloat16", "float32")
SHARD_BYTES = 1 << 30  # about 1 GB per shard
CONTEXT = 64


def build_folder(folder: Path, shape: dict[str, Any], tokenizer_folder: Path) -> int:
    """Write a random-weight model of `shape` (bfloat16, std 0.02, seed 0) as sharded
    safetensors with an index; return its parameter count. Kept between runs."""
    import torch
    from safetensors.torch import save_file

    from tui.model.llama_checkpoint import expected_shapes

    config = {**COMMON, **shape}
    if (folder / "model.safetensors.index.json").is_file():
        return sum(_numel(s) for s in expected_shapes(config).values())
    temp = folder.with_name(folder.name + ".tmp")
    shutil.rmtree(temp, ignore_errors=True)
    temp.mkdir(parents=True)
    gen = torch.Generator().manual_seed(0)
    weight_map: dict[str, str] = {}
    shard: dict[str, torch.Tensor] = {}
    shards: list[dict[str, torch.Tensor]] = []
    size = 0
    for name, dims in expected_shapes(config).items():
        if name.endswith("norm.weight"):
            tensor = torch.ones(dims, dtype=torch.bfloat16)
        else:
            tensor = (torch.randn(dims, generator=gen) * 0.02).to(torch.bfloat16)
        shard[name] = tensor
        size += tensor.numel() * 2
        if size >= SHARD_BYTES:
            shards.append(shard)
            shard, size = {}, 0
    if shard:
        shards.append(shard)
    total = 0
    for i, part in enumerate(shards, start=1):
        file = f"model-{i:05d}-of-{len(shards):05d}.safetensors"
        save_file(part, str(temp / file), metadata={"format": "pt"})
        weight_map.update({name: file for name in part})
        total += sum(t.numel() for t in part.values())
    (temp / "model.safetensors.index.json").write_text(json.dumps(
        {"metadata": {"total_size": total * 2}, "weight_map": weight_map}, indent=1))
    (temp / "config.json").write_text(json.dumps({**config, "torch_dtype": "bfloat16"}, indent=1))
    for name in ("tokenizer.json", "tokenizer_config.json"):
        shutil.copy(tokenizer_folder / name, temp / name)
    shutil.rmtree(folder, ignore_errors=True)
    temp.rename(folder)
    return total


def _numel(dims: Sequence[int]) -> int:
    n = 1
    for d in dims:
        n *= d
    return n


def read_bandwidth(gigabytes: float = 1.0, rounds: int = 5) -> float:
    """GB/s of summing a float32 tensor much larger than the caches (best of `rounds`)."""
    import torch

    x = torch.ones(int(gigabytes * 1e9 / 4), dtype=torch.float32)
    x.sum()  # first touch
    best = min(_timed(x.sum) for _ in range(rounds))
    return x.numel() * 4 / best / 1e9


def _timed(fn: Any) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def measure_one(folder: Path, dtype: str, steps: int) -> dict[str, Any]:
    """In this process: load `folder` in `dtype`, time decode steps, read the RSS."""
    import psutil
    import torch

    from tui.model.catalogue import load_model

    before = psutil.Process().memory_info().rss  # the interpreter with torch, before the model
    started = time.perf_counter()
    lm = load_model(str(folder), dtype=dtype)
    runner = lm.runner()
    load_s = time.perf_counter() - started
    vocab = runner.vocab_size
    ctx = [(7 * i + 3) % vocab for i in range(CONTEXT)]
    out: dict[str, Any] = {"path": lm.path_note, "weights": lm.weights_bytes, "load_s": load_s,
                           "step_s": {}, "threads": torch.get_num_threads(), "rss_before": before}
    kv0, _ = runner.prefill([ctx])
    for panes in PANES:
        kv = kv0.select([0] * panes)
        kv, _ = runner.step(kv, [5] * panes)  # warm-up: first touch of the cache buffers
        times = []
        for i in range(steps):
            start = time.perf_counter()
            kv, _ = runner.step(kv, [(11 * i + r) % vocab for r in range(panes)])
            times.append(time.perf_counter() - start)
        out["step_s"][str(panes)] = statistics.median(times)
        del kv
    out["rss"] = psutil.Process().memory_info().rss
    return out


def own_model_rows(quick: bool, keep: bool = True) -> list[Row]:
    """Build the folders, run every (shape, dtype) in a fresh process, make the rows."""
    from tui.model.catalogue import DEFAULT_MODEL
    from tui.model.conversion_cache import cache_root
    from tui.model.sources import resolve

    tokenizer_folder = resolve(DEFAULT_MODEL).folder
    if not (tokenizer_folder / "tokenizer.json").is_file():  # a first run: convert the embedded model
        from tui.model.catalogue import load_model

        load_model(DEFAULT_MODEL)
    bandwidth = read_bandwidth()
    rows = [Row("own models", "memory read bandwidth (1 GB float32 sum, best of 5)", f"{bandwidth:.1f} GB/s",
                "the floor's denominator; LOGITFORK_BANDWIDTH_GBS tells --dtype auto")]
    steps = 3 if quick else 10
    root = cache_root() / "bench"
    for name, shape in SHAPES.items():
        folder = root / name
        print(f"... own models: {name} ({folder})", file=sys.stderr, flush=True)
        parameters = build_folder(folder, shape, tokenizer_folder)
        for dtype in DTYPES:
            got = _run_child(folder, dtype, steps)
            if "error" in got:
                rows.append(Row("own models", f"{name} {dtype}", "not run", got["error"]))
                continue
            weights = parameters * (2 if dtype == "bfloat16" else 4)
            floor16 = parameters * 2 / (bandwidth * 1e9)
            floor = weights / (bandwidth * 1e9)
            one, four, eight = (got["step_s"][str(p)] for p in PANES)
            tag = f"{name} {dtype}"
            rows += [
                Row("own models", f"{tag}: step at 1/4/8 panes", f"{ms(one)} / {ms(four)} / {ms(eight)}",
                    f"{parameters / 1e9:.2f}B parameters, {got['threads']} threads, loaded in "
                    f"{got['load_s']:.0f} s; {got['path']}"),
                Row("own models", f"{tag}: 4 panes / 1 pane", f"{four / one:.2f}x", "", "<= 1.3x",
                    verdict(four / one <= 1.3)),
                Row("own models", f"{tag}: 1 pane / bandwidth floor", f"{one / floor:.2f}x",
                    f"floor {ms(floor)} ({weights / 1e9:.2f} GB per step)"),
                Row("own models", f"{tag}: 1 pane / bfloat16 floor", f"{one / floor16:.2f}x",
                    f"bfloat16 floor {ms(floor16)}", "<= 1.5x", verdict(one / floor16 <= 1.5)),
                Row("own models", f"{tag}: RSS / weights", f"{got['rss'] / weights:.2f}x",
                    f"RSS {got['rss'] / 1e9:.2f} GB, weights {weights / 1e9:.2f} GB; "
                    f"{got['rss_before'] / 1e9:.2f} GB before the model (Python, torch), "
                    f"{(got['rss'] - got['rss_before']) / weights:.2f}x above that", "<= 1.3x",
                    verdict(got["rss"] / weights <= 1.3)),
            ]
        if name == "llama-1b":
            rows += conversion_rows(folder, root, tokenizer_folder)
        if not keep:
            shutil.rmtree(folder, ignore_errors=True)
            (root / f"{name}.f16.gguf").unlink(missing_ok=True)
    return rows


def conversion_rows(folder: Path, root: Path, tokenizer_folder: Path) -> list[Row]:
    """The 1B shape written as an F16 GGUF, converted streamed and whole in fresh processes:
    peak resident memory and time of each (`tui.model.gguf_stream` against transformers'
    whole-model load). Peak RSS counts the memory-mapped GGUF's pages in both."""
    from tui.bench.gguf_writer import write_gguf
    from tui.model.gguf_file import read_table
    from tui.model.gguf_stream import peak_bytes

    gguf_file = root / f"{folder.name}.f16.gguf"
    if not gguf_file.is_file():
        jinja = tokenizer_folder / "chat_template.jinja"
        template = (jinja.read_text(encoding="utf-8") if jinja.is_file() else json.loads(
            (tokenizer_folder / "tokenizer_config.json").read_text())["chat_template"])
        temp = write_gguf(folder, gguf_file.with_suffix(".tmp"), chat_template=template,
                                half=True, name=f"bench-{folder.name}")
        temp.rename(gguf_file)
    table = read_table(gguf_file)
    got = {mode: _run_convert(gguf_file, mode) for mode in ("stream", "whole")}
    if any("error" in g for g in got.values()):
        return [Row("own models", f"{folder.name} F16 GGUF conversion", "not run",
                    "; ".join(g.get("error", "") for g in got.values()))]
    s, w = got["stream"], got["whole"]
    return [
        Row("own models", f"{folder.name} F16 GGUF conversion: peak RSS streamed / whole",
            f"{s['peak_rss'] / 1e9:.2f} / {w['peak_rss'] / 1e9:.2f} GB",
            f"{w['peak_rss'] / s['peak_rss']:.2f}x less streamed; file {table.file_bytes / 1e9:.2f} GB "
            f"(its mapped pages count in both); the check's estimate {peak_bytes(table.largest, table.parameters) / 1e9:.2f} GB"),
        Row("own models", f"{folder.name} F16 GGUF conversion: time streamed / whole",
            f"{s['seconds']:.0f} / {w['seconds']:.0f} s", "the same bytes written (a test holds them equal)"),
    ]


def _run_convert(gguf_file: Path, mode: str) -> dict[str, Any]:
    cmd = [sys.executable, "-m", "tui.bench.own_models", "--convert", str(gguf_file), mode]
    done = subprocess.run(cmd, capture_output=True, text=True)
    if done.returncode != 0:
        lines = (done.stderr or done.stdout).strip().splitlines()
        return {"error": lines[-1] if lines else f"exit {done.returncode}"}
    return json.loads(done.stdout.strip().splitlines()[-1])


def convert_one(gguf_file: Path, mode: str) -> dict[str, Any]:
    """In a fresh process: convert `gguf_file` into a temporary folder; time and peak RSS."""
    import resource
    import tempfile

    from tui.model.conversion_cache import write_conversion
    from tui.progress import no_progress

    with tempfile.TemporaryDirectory(dir=gguf_file.parent) as out:
        started = time.perf_counter()
        write_conversion(gguf_file, Path(out), no_progress, stream=mode == "stream")
        seconds = time.perf_counter() - started
    return {"seconds": seconds, "peak_rss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}


def _run_child(folder: Path, dtype: str, steps: int) -> dict[str, Any]:
    cmd = [sys.executable, "-m", "tui.bench.own_models", "--one", str(folder), dtype, str(steps)]
    done = subprocess.run(cmd, capture_output=True, text=True)
    if done.returncode != 0:
        lines = (done.stderr or done.stdout).strip().splitlines()
        return {"error": lines[-1] if lines else f"exit {done.returncode}"}
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv: Sequence[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m tui.bench.own_models", description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="3 steps per pane count instead of 10")
    p.add_argument("--drop", action="store_true", help="delete the built folders afterwards")
    p.add_argument("--one", nargs=3, metavar=("FOLDER", "DTYPE", "STEPS"), help=argparse.SUPPRESS)
    p.add_argument("--convert", nargs=2, metavar=("GGUF", "MODE"), help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    from tui.settings import prepare_process

    prepare_process()
    if args.convert:
        print(json.dumps(convert_one(Path(args.convert[0]), args.convert[1])))
        return 0
    if args.one:
        folder, dtype, steps = args.one
        print(json.dumps(measure_one(Path(folder), dtype, int(steps))))
        return 0
    rows = own_model_rows(args.quick, keep=not args.drop)
    print(render(rows))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
