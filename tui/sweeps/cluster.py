"""Running a sweep's chunks on a Ray cluster; the driver alone writes the sweep folder.

`connect` joins a cluster (`auto`, ``host:port``, ``ray://host:port``) or starts a
local one (`local`); `WorkerPool` starts one actor per worker, each of which loads
the model once (its torch threads set so that the workers share the cores), works
out how many rows fit in its memory, and then decodes whole batches of chunks with
the one-process `SweepRunner.run_batch`. The pool's batch is the smallest any worker
can hold, so a batch runs alike wherever it lands. The driver hands out one batch per
idle worker and writes every chunk that comes back, so the folder, its resume,
`sweep-merge` and the reports are those of a local run.

Faults: a worker process that dies (killed, out of memory) costs only the batch it
held: Ray restarts the actor (`WORKER_RESTARTS` times, reloading the model) and the
batch goes back to the front of the queue, for whichever worker is free first. A
batch lost `BATCH_ATTEMPTS` times, every worker gone, or a worker raising an error
ends the run with a `UserError`; the chunks already written stay for a resume.

Ray is imported here only, inside functions: importing this module loads neither Ray
nor torch. Ray's references: docs.ray.io, "Actors", "Fault tolerance: actor
process failure" (max_restarts), `ray.wait` (version 2.60).
"""

from __future__ import annotations

import os
import socket
from collections import Counter, deque
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterator, Sequence

from tui.errors import UserError, first_line

if TYPE_CHECKING:
    from tui.sweeps.metrics import SampleRecord
    from tui.sweeps.runner import Batch, Chunk, SweepJob
    from tui.sweeps.spec import Prompt, SweepSpec

LOCAL = "local"
RAY_PIN = "ray[client]==2.60.0"
WORKER_RESTARTS = 3  # times Ray restarts one worker's process after it dies
BATCH_ATTEMPTS = 3  # a batch lost this many times (its worker died each time) ends the run
READY_SECONDS = 600.0  # a worker that has not loaded its model by then ends the run
POLL_SECONDS = 0.5  # the driver wakes this often while it waits (Ctrl-C stays prompt)
RESTART_POLL_SECONDS = 0.5  # how often a restarting worker is asked whether it is back
# Ray kept quiet and offline: no usage report (the dashboard is never started).
QUIET_ENVIRONMENT = {"RAY_USAGE_STATS_ENABLED": "0"}

WriteBatch = Callable[["list[tuple[Chunk, list[SampleRecord]]]"], None]
Note = Callable[[str], None]


@dataclass(frozen=True)
class WorkerInfo:
    """Who a worker is and what it loaded, as it reports once its model is in."""

    host: str
    pid: int
    threads: int
    versions: dict[str, str]  # `tui.sweeps.folder.package_versions` on the worker
    model: dict[str, str]  # name, source, dtype
    forward: str  # the forward path's class name
    job: SweepJob  # the sweep as the worker encoded it
    batch_rows: int  # rows per forward pass its memory holds (or --batch-rows)
    batch_line: str  # `tui.sweeps.plan.choose_batch`'s line on the worker

    def where(self) -> str:
        return f"{self.host} (pid {self.pid})"


class ChunkWorker:
    """The body of one Ray actor: a loaded model and the sweep's runner, kept between chunks.

    A failure to load is kept and reported by `ready`, so the driver can name it in
    one line instead of Ray's traceback.
    """

    def __init__(self, model: str, allow_pickle: bool, spec: SweepSpec,
                 prompts: tuple[Prompt, ...], threads: int, batch_rows: int | None,
                 recorded: int | None) -> None:
        import torch

        torch.set_num_threads(threads)
        self._error: str | None = None
        self._info: WorkerInfo | None = None
        try:
            from tui.model.catalogue import load_model
            from tui.sweeps.folder import package_versions
            from tui.sweeps.plan import build_job, choose_batch
            from tui.sweeps.runner import SweepRunner

            lm = load_model(model, allow_pickle=allow_pickle)
            job = build_job(spec, prompts, lm)
            rows, line = choose_batch(lm, job, batch_rows, recorded)
            runner = lm.runner()
            self._runner = SweepRunner.for_model(lm, job)
            self._chunks = job.chunks()
            self._info = WorkerInfo(socket.gethostname(), os.getpid(), threads,
                                    package_versions(),
                                    {"name": lm.name, "source": lm.source, "dtype": lm.dtype},
                                    type(runner).__name__, job, rows, line)
        except UserError as exc:
            self._error = str(exc)
        except Exception as exc:  # noqa: BLE001 - any load failure becomes one line
            self._error = f"{type(exc).__name__}: {first_line(exc)}"

    def ready(self) -> WorkerInfo | str:
        """This worker's `WorkerInfo`, or why its model did not load (host and pid in front)."""
        if self._info is None:
            return f"{socket.gethostname()} (pid {os.getpid()}): {self._error}"
        return self._info

    def run(self, indices: list[int], batch_rows: int) -> list[list[SampleRecord]]:
        """Decode the chunks `indices` (into `SweepJob.chunks`, one prompt's) as one batch of
        at most `batch_rows` rows; their records, chunk by chunk."""
        if self._info is None:
            raise RuntimeError(f"the model did not load: {self._error}")
        batch = tuple(self._chunks[i] for i in indices)
        return [records for _, records in self._runner.run_batch(batch, batch_rows)]


@dataclass(frozen=True)
class Connection:
    """A driver joined to a cluster (by `connect`); `cpus` counts the whole cluster's."""

    address: str
    cpus: int
    local: bool


def _import_ray() -> Any:
    for key, value in QUIET_ENVIRONMENT.items():
        os.environ.setdefault(key, value)
    try:
        import ray
    except ImportError:
        raise UserError(f"--ray: Ray is not installed; install it with: pip install '{RAY_PIN}'"
                        ) from None
    return ray


def _refuse_unreachable(address: str) -> None:
    """Fail at once on ``host:port`` that takes no connection (Ray would retry for minutes)."""
    target = address.removeprefix("ray://")
    host, sep, port = target.rpartition(":")
    if not sep or not port.isdigit():
        return  # `auto` and the like: Ray finds the cluster and names the problem itself
    try:
        socket.create_connection((host or "127.0.0.1", int(port)), timeout=5.0).close()
    except OSError as exc:
        raise UserError(f"--ray: cannot reach the cluster at {address} ({exc.strerror or exc}); "
                        "start it with `ray start --head` or give its address") from None


def local_cpus(wanted: int) -> int:
    """The CPUs a local cluster offers: the machine's cores, or more if asked for more."""
    return max(os.cpu_count() or 1, wanted)


def model_for_workers(model: str) -> str:
    """The model as workers should name it: a relative local path made absolute.

    A catalogue name stays a name (each worker resolves it in its own catalogue and
    cache); a path that exists here becomes absolute, which is right for a local
    cluster or a shared file system, and a path that does not exist here is passed on.
    """
    from tui.model.sources import read_catalogue

    if any(entry.name == model.strip() for entry in read_catalogue()):
        return model
    path = Path(model).expanduser()
    return str(path.resolve()) if path.exists() else model


@contextmanager
def connect(address: str, wanted_cpus: int = 1) -> Iterator[Connection]:
    """Join the cluster at `address`, or start a local one for `LOCAL`; leave it on exit.

    A local cluster lives as long as the connection (`ray.shutdown` stops it); on a
    shared cluster only this driver's job and its workers end.
    """
    ray = _import_ray()
    import logging

    local = address == LOCAL
    if local:
        os.environ.setdefault("RAY_AUTH_MODE", "token")  # Ray's default, said so: no warning
        # address "local": a new cluster even where another one runs (`ray start`, RAY_ADDRESS)
        options: dict[str, Any] = {"address": "local", "num_cpus": local_cpus(wanted_cpus),
                                   "include_dashboard": False}
    else:
        _refuse_unreachable(address)
        options = {"address": address}
    try:
        ray.init(log_to_driver=False, logging_level=logging.ERROR, **options)
    except UserError:
        raise
    except Exception as exc:  # noqa: BLE001 - Ray raises many kinds; each becomes one line
        where = "start a local cluster" if local else f"connect to the cluster at {address}"
        raise UserError(f"--ray: cannot {where}: {first_line(exc)}") from None
    # Ray 2.60 prints the cluster's error messages (a worker's death, with its advice) to
    # the driver's stdout, where the tables go; the pool says what happened in one line.
    # (Only a private switch exists; `ray.util.rpdb` uses it the same way.)
    printing = getattr(ray._private.worker, "_worker_logs_enabled", None)
    if printing is not None:
        ray._private.worker._worker_logs_enabled = False
    try:
        cpus = int(ray.cluster_resources().get("CPU", 0))
        yield Connection(address, cpus, local)
    finally:
        ray.shutdown()
        if printing is not None:
            ray._private.worker._worker_logs_enabled = printing


class WorkerPool:
    """One Ray actor per worker, each with the model loaded; hands out batches and retries lost ones."""

    # Called as (first chunk index, worker pid) just after a batch is sent: a hook for tests.
    on_dispatch: Callable[[int, int], None] | None = None

    def __init__(self, connection: Connection, workers: int | None, *, model: str,
                 allow_pickle: bool, spec: SweepSpec, prompts: tuple[Prompt, ...],
                 threads: int | None = None, batch_rows: int | None = None,
                 recorded: int | None = None) -> None:
        ray = _import_ray()
        cpus = max(connection.cpus, 1)
        count = workers or max(1, cpus // (threads or 1))
        self.threads = threads or max(1, cpus // count)
        if count * self.threads > cpus and not connection.local:
            raise UserError(f"--workers {count} x {self.threads} thread(s): the cluster at "
                            f"{connection.address} has {connection.cpus} CPUs")
        self.connection = connection
        actor = ray.remote(num_cpus=self.threads, max_restarts=WORKER_RESTARTS,
                           max_task_retries=0)(ChunkWorker)
        self._actors = [actor.remote(model, allow_pickle, spec, prompts, self.threads, batch_rows,
                                     recorded) for _ in range(count)]
        self.infos = self._wait_ready(ray, model)
        self.job: SweepJob = self.infos[0].job
        smallest = min(self.infos, key=lambda i: i.batch_rows)
        self.batch_rows = smallest.batch_rows
        self.batch_line = f"{smallest.batch_line} on {smallest.where()}"

    def _wait_ready(self, ray: Any, model: str) -> list[WorkerInfo]:
        from ray.exceptions import RayError

        probes = [a.ready.remote() for a in self._actors]
        _, pending = ray.wait(probes, num_returns=len(probes), timeout=READY_SECONDS)
        if pending:
            raise UserError(f"--ray: {len(pending)} of {len(probes)} workers did not start within "
                            f"{READY_SECONDS:.0f} s (each needs {self.threads} CPU(s) on one node "
                            "and its model loaded)")
        infos: list[WorkerInfo] = []
        for probe in probes:
            try:
                answer = ray.get(probe)
            except RayError as exc:
                raise UserError(f"--ray: a worker could not start ({first_line(exc)}); every "
                                "worker needs logitfork installed, the same version as here"
                                ) from None
            if isinstance(answer, str) and ": --batch-rows: " in answer:
                raise UserError(f"--ray: the worker on {answer}")
            if isinstance(answer, str):
                raise UserError(f"--ray: the worker on {answer}; the model {model!r} must resolve "
                                "on every worker (a catalogue name with the model in that "
                                "worker's cache, or a path that exists there)")
            infos.append(answer)
        _check_alike(infos)
        return infos

    def versions(self) -> dict[str, Any]:
        """What versions.json records for this run: the workers' packages, model and path."""
        import ray

        first = self.infos[0]
        return {**first.versions, "model": dict(first.model), "forward": first.forward,
                "cluster": {"ray": ray.__version__, "workers": len(self._actors),
                            "threads_per_worker": self.threads,
                            "hosts": sorted({i.host for i in self.infos})}}

    def describe(self) -> str:
        hosts = len({i.host for i in self.infos})
        return (f"{len(self._actors)} worker(s) on {hosts} node(s), {self.threads} thread(s) each, "
                f"model {self.infos[0].model['name']}, {self.batch_rows} rows per forward pass")

    def run(self, batches: Sequence[Batch], write: WriteBatch, note: Note) -> None:
        """Decode every batch (`tui.sweeps.runner.plan_batches` at `batch_rows`) on the
        workers; `write` each one's chunks as it comes back.

        Batches come back in the order they finish, not in index order (the folder's
        format allows any order). A worker's death is told through `note`.
        """
        import ray
        from ray.exceptions import RayActorError, RayError

        queue: deque[Batch] = deque(batches)
        idle: deque[int] = deque(range(len(self._actors)))
        running: dict[Any, tuple[int, Batch]] = {}  # result ref -> (worker slot, batch)
        restarting: dict[Any, int] = {}  # ready probe of a restarted worker -> slot
        lost: Counter[int] = Counter()  # by the batch's first chunk index
        while queue or running:
            while idle and queue:
                slot, batch = idle.popleft(), queue.popleft()
                indices = [c.index for c in batch]
                running[self._actors[slot].run.remote(indices, self.batch_rows)] = (slot, batch)
                if self.on_dispatch is not None:
                    self.on_dispatch(batch[0].index, self.infos[slot].pid)
            if not running and not restarting:
                left = sum(len(b) for b in queue)
                raise UserError(f"--ray: every worker was lost; {left} chunk(s) not run; "
                                "the chunks written stay: run the same command again to resume")
            done, _ = ray.wait([*running, *restarting], num_returns=1, timeout=POLL_SECONDS)
            for ref in done:
                if ref in restarting:
                    self._rejoin(ray, restarting.pop(ref), ref, restarting, idle, note)
                    continue
                slot, batch = running.pop(ref)
                where, what = self.infos[slot].where(), chunk_list(batch)
                try:
                    results = ray.get(ref)
                except RayActorError as exc:
                    lost[batch[0].index] += 1
                    if lost[batch[0].index] >= BATCH_ATTEMPTS:
                        raise UserError(f"--ray: {what} was lost {BATCH_ATTEMPTS} times (its "
                                        f"worker died each time; last on {where}); the chunks "
                                        "written stay for a resume") from None
                    queue.appendleft(batch)
                    restarting[self._actors[slot].ready.remote()] = slot
                    again = "runs again" if len(batch) == 1 else "run again"
                    note(f"worker {where} was lost while it ran {what} "
                         f"({type(exc).__name__}); {what} {again}")
                    continue
                except RayError as exc:
                    cause = getattr(exc, "cause", None) or exc
                    raise UserError(f"--ray: {what} failed on {where}: "
                                    f"{type(cause).__name__}: {first_line(cause)}") from None
                write(list(zip(batch, results, strict=True)))
                idle.append(slot)

    def close(self) -> None:
        """End every worker now (leaving the connection ends them too)."""
        import ray

        for actor in self._actors:
            ray.kill(actor, no_restart=True)
        self._actors = []

    def _rejoin(self, ray: Any, slot: int, probe: Any, restarting: dict[Any, int],
                idle: deque[int], note: Note) -> None:
        """A restarted worker's probe came back: back to work, asked again, or out of the pool."""
        import time

        from ray.exceptions import ActorUnavailableError, RayError

        try:
            answer = ray.get(probe)
        except ActorUnavailableError:  # still restarting: calls fail fast meanwhile
            time.sleep(RESTART_POLL_SECONDS)
            restarting[self._actors[slot].ready.remote()] = slot
            return
        except RayError:
            note(f"worker {self.infos[slot].where()} is gone for good (Ray restarts a "
                 f"worker {WORKER_RESTARTS} times at most); the others go on")
            return
        if isinstance(answer, str):
            raise UserError(f"--ray: the restarted worker on {answer}")
        self.infos[slot] = answer
        note(f"worker {answer.where()} is back (restarted, its model loaded again)")
        idle.append(slot)


def chunk_list(batch: "Batch") -> str:
    """``chunk 4`` or ``chunks 4, 5, 6``: the chunks of a batch, for messages."""
    indices = ", ".join(str(c.index) for c in batch)
    return f"chunk {indices}" if len(batch) == 1 else f"chunks {indices}"


def _check_alike(infos: Sequence[WorkerInfo]) -> None:
    """Refuse workers whose samples could differ: other packages, model or encoded prompts."""
    first = infos[0]
    for other in infos[1:]:
        for key in sorted(set(first.versions) | set(other.versions)):
            a, b = first.versions.get(key), other.versions.get(key)
            if a != b:
                raise UserError(f"--ray: the workers differ: {first.where()} has {key} {a}, "
                                f"{other.where()} has {key} {b}; install the same versions on "
                                "every worker (samples would depend on where they ran)")
        if other.model != first.model or other.forward != first.forward:
            raise UserError(f"--ray: the workers loaded different models: {first.where()} "
                            f"{first.model} ({first.forward}), {other.where()} {other.model} "
                            f"({other.forward})")
        if other.job != first.job:
            raise UserError(f"--ray: the workers encode the sweep differently ({first.where()} "
                            f"and {other.where()}): another tokenizer on one of them?")


@contextmanager
def open_pool(address: str, workers: int | None, *, model: str, allow_pickle: bool,
              spec: SweepSpec, prompts: tuple[Prompt, ...],
              threads: int | None = None, batch_rows: int | None = None,
              recorded: int | None = None) -> Iterator[WorkerPool]:
    """Connect and start the workers; every check is done before this yields.

    Losing the cluster itself (the head node, the network) ends the run in one line;
    the chunks written so far stay for a resume.
    """
    with connect(address, (workers or 1) * (threads or 1)) as connection:
        from ray.exceptions import RayError

        try:
            yield WorkerPool(connection, workers, model=model_for_workers(model),
                             allow_pickle=allow_pickle, spec=spec, prompts=prompts,
                             threads=threads, batch_rows=batch_rows, recorded=recorded)
        except (ConnectionError, RayError) as exc:
            raise UserError(f"--ray: lost the cluster at {address} ({type(exc).__name__}: "
                            f"{first_line(exc)}); the chunks written stay: run the same "
                            "command again to resume") from None
