"""A sweep on a Ray cluster: the numbers of a one-process run, and its faults survived.

One local Ray cluster (2 CPUs, started with `ray start --head --block` in its own temp
folder, stopped at the end) serves the module; the commands join it by address. The
reference for "the same numbers" is the one-process run of the same sweep file (the
definition this project sets itself, as in test_sweep_resume): the same tokens for
every sample, log-probabilities within 1e-4 (the forward pass's float sums differ in
the last bits with the threads per process), the same results table (results.md).
Two cluster runs with the same threads per worker must agree bit for bit, however
the chunks were shared out and whichever worker died (Ray's fault-tolerance model:
docs.ray.io, "Actor fault tolerance", max_restarts).
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pytest

from tui.sweeps.folder import SAMPLES, SweepFolder, read_samples_file

try:
    from sweep_files import (RESAMPLES, base, kill_after_first_chunk, reference, run, sweep,  # noqa: F401 - fixtures
                             write_sweep)
except ImportError:
    from tests.sweep_files import (RESAMPLES, base, kill_after_first_chunk, reference, run, sweep,  # noqa: F401 - fixtures
                             write_sweep)

ROOT = Path(__file__).resolve().parent.parent
RAY_CLI = Path(sys.executable).with_name("ray")
# Quiet and offline: no usage report, no token file written to the home folder.
RAY_ENV = {"RAY_USAGE_STATS_ENABLED": "0", "RAY_AUTH_MODE": "disabled"}
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def processes_under(folder: Path) -> list[str]:
    """Command lines of live processes that mention `folder` (Linux /proc)."""
    found = []
    for entry in Path("/proc").glob("[0-9]*"):
        try:
            cmd = (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
        except OSError:
            continue
        if str(folder) in cmd:
            found.append(f"{entry.name}: {cmd[:120]}")
    return found


@pytest.fixture(scope="module")
def ray_env():
    with pytest.MonkeyPatch.context() as mp:
        for key, value in RAY_ENV.items():
            mp.setenv(key, value)
        yield


@pytest.fixture(scope="module")
def cluster(ray_env) -> str:
    """The address of a 2-CPU Ray head started for this module.

    Stopped at the end, and no process of it may be left.
    """
    temp = Path(tempfile.mkdtemp(prefix="lfray-"))  # short: Ray's socket paths must fit
    port, client_port = free_port(), free_port()
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    proc = subprocess.Popen(
        [str(RAY_CLI), "start", "--head", "--block", "--port", str(port), "--num-cpus", "2",
         "--include-dashboard=false", "--disable-usage-stats", "--temp-dir", str(temp),
         "--ray-client-server-port", str(client_port)],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while True:
            assert proc.poll() is None, "ray start exited"
            assert time.monotonic() < deadline, "the Ray head did not start in 120 s"
            with contextlib.suppress(OSError):
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            time.sleep(0.2)
        yield f"127.0.0.1:{port}"
    finally:
        proc.terminate()  # `ray start --block` stops every process it started
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
        deadline = time.monotonic() + 30
        while processes_under(temp) and time.monotonic() < deadline:
            time.sleep(0.5)
        left = processes_under(temp)
        shutil.rmtree(temp, ignore_errors=True)
        assert left == [], left


@pytest.fixture(scope="module")
def on_cluster(base, sweep, cluster) -> tuple[Path, str, str]:
    """The undisturbed cluster run: 2 workers, 1 thread each."""
    out = base / "ray"
    rc, stdout, err = run("sweep", str(sweep), "--out", str(out), "--resamples", RESAMPLES,
                          "--ray", cluster, "--workers", "2")
    assert rc == 0, err
    return out, stdout, err


def chunks_of(folder: Path) -> dict[int, list[dict]]:
    return {c: [s.to_json() for s in v] for c, v in SweepFolder.read(folder).load_chunks().items()}


def assert_same_numbers(folder: Path, reference: Path) -> None:
    """Same tokens and text, log-probabilities within 1e-4, the same results table."""
    got, want = SweepFolder.read(folder).load_chunks(), SweepFolder.read(reference).load_chunks()
    assert sorted(got) == sorted(want) == [0, 1, 2, 3]
    for c in want:
        for a, b in zip(got[c], want[c], strict=True):
            assert (a.recipe, a.prompt_index, a.sample_index, a.token_ids, a.text, a.ending) == \
                   (b.recipe, b.prompt_index, b.sample_index, b.token_ids, b.text, b.ending)
            assert np.allclose(a.logprobs, b.logprobs, rtol=0, atol=1e-4)
    assert (folder / "results.md").read_text() == (reference / "results.md").read_text()


def test_a_cluster_run_has_the_numbers_of_the_one_process_run(on_cluster, reference):
    out, stdout, err = on_cluster
    assert_same_numbers(out, reference[0])
    assert stdout == reference[1]  # the printed tables
    assert "ray: 2 worker(s) on 1 node(s), 1 thread(s) each" in err
    # each worker holds a prompt's 5 rows (greedy once, 4 samples) in one forward batch
    assert ", 5 rows per forward pass\n" in err and "\nbatch: 5 rows per forward pass (a prompt" in err
    assert json.loads((out / "versions.json").read_text())["batch_rows"] == 5
    assert "chunks 4/4" in err and "100%" in err  # the progress line counts every worker's chunks
    versions = json.loads((out / "versions.json").read_text())
    assert versions["cluster"]["workers"] == 2 and versions["cluster"]["threads_per_worker"] == 1
    assert json.loads((out / "manifest.json").read_text()) == \
           json.loads((reference[0] / "manifest.json").read_text())


def test_a_killed_driver_resumes_and_a_killed_worker_costs_only_its_chunk(
        base, sweep, cluster, on_cluster, monkeypatch):
    from tui.sweeps.cluster import WorkerPool

    # 1. the driver is killed (SIGKILL) once a chunk is in the folder
    out = base / "ray-killed"
    kill_after_first_chunk(base, sweep, out, "--ray", cluster, "--workers", "2")
    written = SweepFolder.read(out).done
    assert 1 <= len(written) < 4

    # 2. the resumed run loses a worker: killed as soon as its first chunk is sent, so
    # before it can have finished it (SIGKILL: no clean-up, as a crashed machine)
    killed: list[tuple[int, int]] = []

    def kill_the_first(chunk: int, pid: int) -> None:
        if not killed:
            os.kill(pid, signal.SIGKILL)
            killed.append((chunk, pid))

    monkeypatch.setattr(WorkerPool, "on_dispatch", staticmethod(kill_the_first))
    rc, stdout, err = run("sweep", str(sweep), "--out", str(out), "--resamples", RESAMPLES,
                     "--ray", cluster, "--workers", "2")
    assert rc == 0, err
    assert f"{len(written)} of 4 chunks already written" in err
    chunk, pid = killed[0]  # the first chunk of the batch it was sent
    lost = re.search(rf"\(pid {pid}\) was lost while it ran (chunks? {chunk}\b[\d, ]*) \(", err)
    assert lost is not None, err
    assert f"; {lost.group(1)} run" in err  # "runs again" / "run again"
    assert "gone for good" not in err  # a restarted worker is asked again until it is back
    assert stdout == on_cluster[1]  # the tables only: no word from Ray on stdout
    # the same folder as the undisturbed run, bit for bit (the same threads per worker)
    assert chunks_of(out) == chunks_of(on_cluster[0])
    assert (out / "results.csv").read_bytes() == (on_cluster[0] / "results.csv").read_bytes()


def test_a_cluster_folder_resumes_without_ray(base, sweep, on_cluster, reference):
    # what a driver killed after two chunks leaves, finished by the one-process runner
    out = base / "ray-then-here"
    out.mkdir()
    for name in ("manifest.json", "sweep.toml", "versions.json"):
        shutil.copy(on_cluster[0] / name, out / name)
    lines = (on_cluster[0] / SAMPLES).read_bytes().splitlines(keepends=True)
    kept, closed = [], 0
    for line in lines:
        kept.append(line)
        closed += b'"end"' in line
        if closed == 2:
            break
    (out / SAMPLES).write_bytes(b"".join(kept))
    assert len(read_samples_file(out / SAMPLES)[0]) == 2
    rc, _, err = run("sweep", str(sweep), "--out", str(out), "--resamples", RESAMPLES)
    assert rc == 0, err
    assert "2 of 4 chunks already written" in err
    assert_same_numbers(out, reference[0])


def one_error_line(err: str) -> str:
    assert err.startswith("error: ") and err.count("\n") == 1, err
    return err


def test_an_unreachable_cluster_is_one_line_and_nothing_is_written(base, sweep, ray_env):
    out = base / "unreachable"
    rc, _, err = run("sweep", str(sweep), "--out", str(out), "--ray", f"127.0.0.1:{free_port()}")
    assert rc == 2
    assert one_error_line(err).startswith("error: --ray: cannot reach the cluster at 127.0.0.1:")
    assert not out.exists()


def test_a_worker_that_cannot_load_the_model_is_one_line(base, tiny_model_dir, cluster):
    bad = write_sweep(base / "nomodel.toml", tiny_model_dir, model=str(base / "no-such-model"))
    out = base / "nomodel"
    rc, _, err = run("sweep", str(bad), "--out", str(out), "--ray", cluster, "--workers", "2")
    assert rc == 2
    line = one_error_line(err)
    assert line.startswith("error: --ray: the worker on ") and "no such folder or file" in line
    assert "must resolve on every worker" in line
    assert not out.exists()


def test_a_batch_too_big_for_a_worker_is_one_line_naming_what_fits(base, sweep, cluster):
    out = base / "too-wide"
    rc, _, err = run("sweep", str(sweep), "--out", str(out), "--ray", cluster, "--workers", "1",
                     "--batch-rows", str(10**9))
    assert rc == 2
    line = one_error_line(err)
    assert line.startswith("error: --ray: the worker on ") and "(pid " in line
    assert f": --batch-rows: {10**9} rows per forward pass do not fit in memory" in line
    assert "or less (memory allows" in line and "must resolve" not in line
    assert not out.exists()


def test_more_workers_than_the_cluster_has_cpus_is_refused(base, sweep, cluster):
    rc, _, err = run("sweep", str(sweep), "--out", str(base / "too-many"), "--ray", cluster,
                     "--workers", "3")
    assert rc == 2 and "has 2 CPUs" in one_error_line(err)
    assert not (base / "too-many").exists()


def test_without_ray_installed_the_error_says_how_to_install_it(base, sweep, monkeypatch):
    monkeypatch.setitem(sys.modules, "ray", None)  # `import ray` raises ImportError
    out = base / "noray"
    rc, _, err = run("sweep", str(sweep), "--out", str(out), "--ray", "local")
    assert rc == 2
    assert one_error_line(err) == ("error: --ray: Ray is not installed; install it with: "
                                   "pip install 'ray[client]==2.60.0'\n")
    assert not out.exists()


def test_cluster_options_need_ray(base, sweep):
    for option in ("--workers", "--threads"):
        rc, _, err = run("sweep", str(sweep), "--out", str(base / "x"), option, "2")
        assert rc == 2 and one_error_line(err) == f"error: {option}: only with --ray ADDRESS\n"


def test_a_local_cluster_starts_runs_and_stops(base, sweep, on_cluster, ray_env):
    temp = Path(tempfile.mkdtemp(prefix="lfray-"))
    out = base / "local"
    env = {**os.environ, "RAY_TMPDIR": str(temp),
           "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    try:
        done = subprocess.run([sys.executable, "-m", "tui", "sweep", str(sweep), "--out", str(out),
                               "--resamples", RESAMPLES, "--ray", "local", "--workers", "2",
                               "--threads", "1"], env=env, cwd=base, capture_output=True,
                              text=True, timeout=300)
        assert done.returncode == 0, done.stderr
        assert "ray: 2 worker(s) on 1 node(s), 1 thread(s) each" in done.stderr
        assert chunks_of(out) == chunks_of(on_cluster[0])
        deadline = time.monotonic() + 30
        while processes_under(temp) and time.monotonic() < deadline:
            time.sleep(0.5)
        assert processes_under(temp) == []  # ray.shutdown stopped the cluster it started
    finally:
        shutil.rmtree(temp, ignore_errors=True)


def test_no_command_but_the_cluster_sweep_loads_ray(base, sweep):
    # a one-process sweep run and a recipe checked: Ray stays out of sys.modules (that no
    # other module imports it at all, even inside a function, is checked in test_layering)
    code = (
        "import sys\n"
        "from tui.cli import main\n"
        f"rc = main(['sweep', {str(sweep)!r}, '--out', {str(base / 'no-ray')!r}, '--resamples', '20'])\n"
        "rc2 = main(['recipe', 'check', 'top_p=0.9'])\n"
        "print('ray' in sys.modules, rc, rc2, 'torch' in sys.modules)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=base,
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "False 0 0 True"


def test_the_progress_line_counts_chunks_that_ran_on_workers():
    # chunks that come back whole: their tokens and budget count at once, and a note
    # (a lost worker) gets a line of its own (common practice, no source: log lines
    # between progress lines)
    from tui.sweeps.progress import SweepProgress

    now = [0.0]
    events: list = []
    said: list[str] = []
    bar = SweepProgress(8, 10, chunks=2, report=events.append, say=said.append,
                        clock=lambda: now[0])
    now[0] = 4.0
    bar.chunk_done(4, tokens=30)
    assert bar.fraction() == pytest.approx(0.5) and bar.tokens == 30
    note = events[-1].note
    assert "chunks 1/2" in note and "7.5 tok/s" in note and "ETA 4s" in note
    bar.note("worker w (pid 1) was lost while it ran chunk 1; chunk 1 runs again")
    assert said == ["worker w (pid 1) was lost while it ran chunk 1; chunk 1 runs again"]
