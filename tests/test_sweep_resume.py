"""Resuming and sharding a sweep: a killed run finishes with the numbers of an unbroken one.

The reference for "the same numbers" is an uninterrupted run of the same sweep file in
another folder (the definition of resumability this project sets itself): its
results.csv and its raw samples must come out identical, byte for byte and token for
token, after a SIGKILL and a re-run (which batches its chunks as the first run did),
and after running the shards and merging them when the whole run batched its rows as
the shards did. Batched otherwise, the draws are the same and the log-probabilities
differ only in the float sums' last bits.
"""

from __future__ import annotations

import json
import signal
from pathlib import Path

import numpy as np
import pytest

from tui.cli import main as cli
from tui.errors import UserError
from tui.sweeps.folder import SAMPLES, Manifest, SweepFolder, read_samples_file
from tui.sweeps.metrics import SampleRecord

try:
    from sweep_files import (RESAMPLES, base, kill_after_first_chunk, reference, run, sweep,  # noqa: F401 - fixtures
                             write_sweep)
except ImportError:
    from tests.sweep_files import (RESAMPLES, base, kill_after_first_chunk, reference, run, sweep,  # noqa: F401 - fixtures
                             write_sweep)

ROOT = Path(__file__).resolve().parent.parent
def same_samples(a: Path, b: Path) -> bool:
    return ({c: [s.to_json() for s in v] for c, v in SweepFolder.read(a).load_chunks().items()}
            == {c: [s.to_json() for s in v] for c, v in SweepFolder.read(b).load_chunks().items()})


def assert_same_draws(a: Path, b: Path) -> None:
    """Every sample's tokens, text and ending equal; log-probabilities within 1e-4."""
    got, want = SweepFolder.read(a).load_chunks(), SweepFolder.read(b).load_chunks()
    assert sorted(got) == sorted(want)
    for c in want:
        for x, y in zip(got[c], want[c], strict=True):
            assert (x.recipe, x.sample_index, x.token_ids, x.text, x.ending) == \
                   (y.recipe, y.sample_index, y.token_ids, y.text, y.ending)
            assert np.allclose(x.logprobs, y.logprobs, rtol=0, atol=1e-4)


def test_a_killed_run_resumes_to_the_same_numbers(base, sweep, reference):
    out = base / "killed"
    assert kill_after_first_chunk(base, sweep, out) == -signal.SIGKILL
    written = SweepFolder.read(out).done
    assert 1 <= len(written) < 4
    # What a crash in the middle of the next chunk's write leaves: some of its sample
    # lines, the last one cut short, and no closing line.
    missing = min(set(range(4)) - set(written))
    lines = [json.dumps({"chunk": missing, "sample": s.to_json()})
             for s in SweepFolder.read(reference[0]).load_chunks()[missing][:2]]
    with open(out / SAMPLES, "a", encoding="utf-8") as fh:  # (a chunk may hold one sample)
        fh.write("".join(line + "\n" for line in lines[:-1]) + lines[-1][:40])

    rc, stdout, err = run("sweep", str(sweep), "--out", str(out), "--resamples", RESAMPLES)
    assert rc == 0, err
    assert f"{len(written)} of 4 chunks already written" in err
    assert "batch: 5 rows per forward pass (as the folder's first run;" in err
    assert (out / "results.csv").read_text() == (reference[0] / "results.csv").read_text()
    assert same_samples(out, reference[0])
    # the torn tail was cut off and the chunks went on in order: the same file
    assert (out / SAMPLES).read_bytes() == (reference[0] / SAMPLES).read_bytes()
    # and a third run does nothing new
    rc, _, err = run("sweep", str(sweep), "--out", str(out), "--resamples", RESAMPLES)
    assert rc == 0 and "4 of 4 chunks already written" in err


def test_another_sweep_file_for_the_folder_is_refused(base, tiny_model_dir, reference, capsys):
    other = write_sweep(base / "other.toml", tiny_model_dir, stop=["."], seed=8)
    assert cli(["sweep", str(other), "--out", str(reference[0])]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"error: {reference[0]}: holds a different sweep: its fingerprint ")
    assert "differs" in err and err.count("\n") == 1


BY_CHUNK = ("--batch-rows", "4")  # one chunk per forward batch (chunk_rows = 4), as shards run


@pytest.fixture(scope="module")
def shards(base, sweep) -> list[Path]:
    """Shards 1/2 and 2/2 of the sweep, each in its own folder, a chunk per batch."""
    folders = [base / "shard1", base / "shard2"]
    for i, folder in enumerate(folders, start=1):
        rc, stdout, err = run("sweep", str(sweep), "--shard", f"{i}/2", "--out", str(folder),
                              *BY_CHUNK)
        assert rc == 0, err
        assert not (folder / "results.csv").exists() and stdout == ""
    return folders


def test_shards_merge_into_the_unsharded_tables(base, sweep, shards, reference):
    # shard I of N holds the chunks whose index % N == I - 1 (README)
    assert SweepFolder.read(shards[0]).done == {0, 2}
    assert SweepFolder.read(shards[1]).done == {1, 3}
    merged = base / "merged"
    rc, stdout, err = run("sweep-merge", *map(str, shards), "--out", str(merged),
                          "--resamples", RESAMPLES)
    assert rc == 0, err
    assert "tiny sweep: all 2 prompt(s)" in stdout
    # batched as the shards were, the whole run is the merged one to the last digit
    whole = base / "whole-by-chunk"
    rc, _, err = run("sweep", str(sweep), "--out", str(whole), "--resamples", RESAMPLES, *BY_CHUNK)
    assert rc == 0 and "batch: 4 rows per forward pass (--batch-rows;" in err
    assert (merged / "results.csv").read_text() == (whole / "results.csv").read_text()
    assert same_samples(merged, whole)
    # the default run put both chunks of a prompt in one batch of 5 rows: the same draws,
    # log-probabilities that differ only in the float sums' last bits, the same tables
    assert_same_draws(merged, reference[0])
    assert (merged / "results.md").read_text() == (reference[0] / "results.md").read_text()


def test_merge_reports_missing_overlapping_and_foreign_folders(base, sweep, shards,
                                                              tiny_model_dir, capsys):
    shard1, shard2 = shards
    assert cli(["sweep-merge", str(shard1), "--out", str(base / "m-out")]) == 2
    assert capsys.readouterr().err == ("error: chunks 1, 3 of 4 are missing (shard 2/2); run them "
                                       "(or resume their folder) and merge again\n")
    assert not (base / "m-out").exists()
    assert cli(["sweep-merge", str(shard1), str(shard1), str(shard2), "--out",
                str(base / "m-twice"), "--resamples", "10"]) == 0
    err = capsys.readouterr().err
    assert f"note: chunk 0 is in both {shard1} and {shard1}" in err
    other = write_sweep(base / "foreign.toml", tiny_model_dir, seed=99, samples=1)
    assert cli(["sweep", str(other), "--shard", "2/2", "--out", str(base / "foreign")]) == 0
    capsys.readouterr()
    assert cli(["sweep-merge", str(shard1), str(base / "foreign"), "--out", str(base / "x")]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"error: {base / 'foreign'}: holds a different sweep from {shard1}")
    assert cli(["sweep", str(sweep), "--shard", "1/2", "--out", str(shard2)]) == 2
    assert "holds shard 2/2, not shard 1/2" in capsys.readouterr().err


def record(chunk: int, sample: int) -> SampleRecord:
    return SampleRecord(recipe="greedy", prompt_index=0, sample_index=sample,
                        token_ids=(chunk, sample), text="ab", logprobs=(-0.5, -1.0),
                        kept=(1, 1), final_entropy=(0.0, 0.0), ending="length")


def test_a_torn_chunk_is_cut_off_and_damage_before_the_last_chunk_is_an_error(tmp_path):
    manifest = Manifest("f" * 64, "t", "t.toml", ("greedy",), 1, 4, 4, 0)
    folder = SweepFolder.open_for_run(tmp_path / "f", manifest, "text", {})
    folder.append_chunks([(0, [record(0, 0), record(0, 1)])])
    folder.append_chunks([(1, [record(1, 2), record(1, 3)])])
    path = tmp_path / "f" / SAMPLES
    whole = path.read_bytes()
    path.write_bytes(whole + b'{"chunk": 2, "sample": {"recipe": "gr')
    reopened = SweepFolder.open_for_run(tmp_path / "f", manifest, "text", {})
    assert reopened.done == {0, 1} and path.read_bytes() == whole
    assert reopened.load_chunks()[1][1] == record(1, 3)
    # a closing line that lost its line end is cut off too: the next chunk would join it
    path.write_bytes(whole[:-1])
    assert SweepFolder.open_for_run(tmp_path / "f", manifest, "text", {}).done == {0}
    reopened.append_chunks([(1, [record(1, 2), record(1, 3)])])
    assert path.read_bytes() == whole
    # a damaged first chunk followed by a closed one is not a crash's trace: refuse it
    lines = whole.decode().splitlines(keepends=True)
    path.write_text(lines[0] + lines[1][:-5] + "\n" + "".join(lines[2:]))
    with pytest.raises(UserError, match=r"samples.jsonl: line 2: "):
        read_samples_file(path)
    assert read_samples_file(tmp_path / "absent.jsonl") == ({}, 0)


def test_two_copies_of_a_chunk_are_one_when_they_drew_the_same_tokens():
    from dataclasses import replace

    from tui.sweeps.folder import draws_gap

    copy = [record(0, 0), record(0, 1)]
    assert draws_gap(copy, copy) == 0.0
    nudged = [copy[0], replace(copy[1], logprobs=(-0.5, -1.0 + 2e-6))]  # another batch's sums
    assert draws_gap(copy, nudged) == pytest.approx(2e-6)
    assert draws_gap(copy, [copy[0], replace(copy[1], logprobs=(-0.5, -0.99))]) is None
    assert draws_gap(copy, [copy[0], replace(copy[1], token_ids=(0, 2))]) is None
    assert draws_gap(copy, [copy[0], replace(copy[1], ending="end of text")]) is None
    assert draws_gap(copy, copy[:1]) is None
