"""A sweep's output folder: what it holds, how chunks are appended, resumed and merged.

    manifest.json   which sweep this is: fingerprint, recipes, prompt count, chunks, shard
    sweep.toml      the text of the sweep file, as it was when the folder was made
    versions.json   Python and package versions, the model, the forward path
    samples.jsonl   the raw samples, chunk by chunk (below)
    results.csv, results.md, front.png   the measures, once every chunk is in

samples.jsonl: a finished chunk is appended as one unit, one line per sample,
``{"chunk": 3, "sample": {...}}`` (a `SampleRecord`), then a closing line
``{"chunk": 3, "end": 8}`` giving the number of samples, then flush and fsync (chunk
indices count from 0, in the order of `SweepJob.chunks`). A chunk
counts only once its closing line is there with the right count. Opening a folder to
resume cuts off whatever follows the last closed chunk (the chunk a crash cut short),
so a crash loses at most that chunk. The manifest's fingerprint guards a folder
against a different sweep. Plain files and JSON; no model, no rich.
"""

from __future__ import annotations

import json
import os
import platform
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import Any, Iterable, Sequence

from tui.errors import UserError
from tui.files import write_atomic
from tui.numbers import json_ready
from tui.sweeps.metrics import SampleRecord

FOLDER_FORMAT = "logitfork-sweep-folder/1"
MANIFEST = "manifest.json"
SWEEP_FILE = "sweep.toml"
VERSIONS = "versions.json"
SAMPLES = "samples.jsonl"
VERSIONED_PACKAGES = ("logitfork", "torch", "transformers", "numpy", "sacrebleu")

Chunks = dict[int, tuple[SampleRecord, ...]]


def shard_text(shard: tuple[int, int] | None) -> str:
    return "the whole sweep" if shard is None else f"shard {shard[0]}/{shard[1]}"


@dataclass(frozen=True)
class Manifest:
    """What a folder holds; enough to build the result tables without the sweep file."""

    fingerprint: str
    title: str
    sweep_file: str  # the sweep file's name, for default folder names
    recipes: tuple[str, ...]
    prompts: int
    samples: int
    chunks: int  # chunks in the whole sweep
    seed: int
    shard: tuple[int, int] | None = None  # (I, N), 1-based; None: every chunk
    merged_from: tuple[str, ...] = ()

    def owns(self, chunk: int) -> bool:
        """Whether this folder's run writes `chunk` (shard I/N: chunk % N == I - 1)."""
        return self.shard is None or chunk % self.shard[1] == self.shard[0] - 1

    def to_json(self) -> dict[str, Any]:
        return {"format": FOLDER_FORMAT, "fingerprint": self.fingerprint, "title": self.title,
                "sweep_file": self.sweep_file, "recipes": list(self.recipes),
                "prompts": self.prompts, "samples": self.samples, "chunks": self.chunks,
                "seed": self.seed, "shard": list(self.shard) if self.shard else None,
                "merged_from": list(self.merged_from)}

    @classmethod
    def from_json(cls, data: Any, where: Path) -> Manifest:
        if not isinstance(data, dict) or data.get("format") != FOLDER_FORMAT:
            raise UserError(f"{where}: not a logitfork sweep manifest ({FOLDER_FORMAT})")
        try:
            shard = data["shard"]
            return cls(fingerprint=str(data["fingerprint"]), title=str(data["title"]),
                       sweep_file=str(data["sweep_file"]),
                       recipes=tuple(str(r) for r in data["recipes"]),
                       prompts=int(data["prompts"]), samples=int(data["samples"]),
                       chunks=int(data["chunks"]), seed=int(data["seed"]),
                       shard=(int(shard[0]), int(shard[1])) if shard else None,
                       merged_from=tuple(str(m) for m in data.get("merged_from", ())))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise UserError(f"{where}: damaged manifest ({type(exc).__name__}: {exc})") from None


def package_versions() -> dict[str, str]:
    """Python and the versions of the packages that shape the numbers."""
    out = {"python": platform.python_version()}
    for name in VERSIONED_PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def json_text(data: Any) -> str:
    """The JSON files of a sweep folder: indented, UTF-8, one trailing newline."""
    return json.dumps(data, indent=2, ensure_ascii=False) + "\n"


def recorded_batch_rows(folder: Path) -> int | None:
    """The rows per forward pass of the folder's first run (versions.json), if it says."""
    try:
        rows = json.loads((folder / VERSIONS).read_text(encoding="utf-8")).get("batch_rows")
    except (OSError, ValueError, AttributeError):
        return None
    return rows if isinstance(rows, int) and not isinstance(rows, bool) and rows >= 1 else None


def read_manifest(folder: Path) -> Manifest:
    path = folder / MANIFEST
    if not path.is_file():
        raise UserError(f"{folder}: not a sweep folder (no {MANIFEST})")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{path}: cannot be read ({exc})") from None
    return Manifest.from_json(data, path)


def _chunk_lines(index: int, samples: Sequence[SampleRecord]) -> bytes:
    lines = [json.dumps({"chunk": index, "sample": json_ready(s.to_json())}, ensure_ascii=False)
             for s in samples]
    lines.append(json.dumps({"chunk": index, "end": len(samples)}))
    return ("\n".join(lines) + "\n").encode("utf-8")


def read_samples_file(path: Path) -> tuple[Chunks, int]:
    """The closed chunks of a samples file and the byte offset just after the last one.

    Damage before the last closed chunk is an error; after it, a cut-short chunk.
    """
    chunks: Chunks = {}
    if not path.exists():
        return chunks, 0
    data = path.read_bytes()
    offset = end_of_closed = 0
    open_chunk: int | None = None
    pending: list[SampleRecord] = []
    problem: str | None = None  # first damage after the last closed chunk
    for number, raw in enumerate(data.splitlines(keepends=True), start=1):
        offset += len(raw)
        try:
            if not raw.endswith(b"\n"):
                raise ValueError("the line is cut short (no line end)")
            entry = json.loads(raw)
            chunk = entry["chunk"]
            if "sample" in entry:
                if open_chunk is not None and chunk != open_chunk:
                    raise ValueError(f"chunk {chunk} starts before chunk {open_chunk} is closed")
                open_chunk = chunk
                pending.append(SampleRecord.from_json(entry["sample"]))
                continue
            if chunk != open_chunk or entry["end"] != len(pending):
                raise ValueError(f"closing line of chunk {chunk} does not match its samples")
            if chunk in chunks:
                raise ValueError(f"chunk {chunk} is written twice")
        except (ValueError, KeyError, TypeError) as exc:
            problem = problem or f"line {number}: {exc}"
            open_chunk, pending = None, []
            continue
        if problem is not None:
            raise UserError(f"{path}: {problem}")
        chunks[chunk] = tuple(pending)
        open_chunk, pending, end_of_closed = None, [], offset
    return chunks, end_of_closed


class SweepFolder:
    """An open output folder: its manifest and which chunks are written.

    Samples stay on disk while a sweep runs (memory does not grow with the sweep);
    `load_chunks` and `samples` read them when the tables are made.
    """

    def __init__(self, path: Path, manifest: Manifest, done: Iterable[int]) -> None:
        self.path = path
        self.manifest = manifest
        self.done = set(done)

    @classmethod
    def open_for_run(cls, path: Path, manifest: Manifest, sweep_text: str,
                     versions: dict[str, Any]) -> SweepFolder:
        """Make the folder, or reopen it to resume (same fingerprint and shard required)."""
        old = cls.check_existing(path, manifest)
        if old is not None:
            manifest = old
        else:
            path.mkdir(parents=True, exist_ok=True)
            write_atomic(path / SWEEP_FILE, sweep_text)
            write_atomic(path / VERSIONS, json_text(versions))
            write_atomic(path / MANIFEST, json_text(manifest.to_json()))
        chunks, end = read_samples_file(path / SAMPLES)
        _check_chunks(path / SAMPLES, manifest, chunks)
        samples = path / SAMPLES
        if samples.exists() and samples.stat().st_size != end:
            with open(samples, "r+b") as fh:  # drop the chunk a crash cut short
                fh.truncate(end)
                os.fsync(fh.fileno())
        return cls(path, manifest, chunks)  # keeps the indices only

    @staticmethod
    def check_existing(path: Path, manifest: Manifest) -> Manifest | None:
        """The manifest of a folder this run may resume, None for a new or empty folder.

        Raises `UserError` when the folder holds another sweep or another shard.
        """
        if (path / MANIFEST).exists():
            old = read_manifest(path)
            if old.fingerprint != manifest.fingerprint:
                raise UserError(
                    f"{path}: holds a different sweep: its fingerprint {old.fingerprint[:12]} "
                    f"differs from this sweep file's {manifest.fingerprint[:12]}; give another "
                    f"--out folder, or delete {path} to start again")
            if old.shard != manifest.shard:
                raise UserError(f"{path}: holds {shard_text(old.shard)}, not "
                                f"{shard_text(manifest.shard)}; give another --out folder")
            return old
        if path.exists() and (not path.is_dir() or any(path.iterdir())):
            raise UserError(f"{path}: exists and is not a sweep folder (no {MANIFEST}); "
                            "give another --out folder")
        return None

    @classmethod
    def read(cls, path: Path) -> SweepFolder:
        """Open a folder for reading only (nothing is cut off)."""
        manifest = read_manifest(path)
        chunks, _ = read_samples_file(path / SAMPLES)
        _check_chunks(path / SAMPLES, manifest, chunks)
        return cls(path, manifest, chunks)

    def load_chunks(self) -> Chunks:
        """Every closed chunk's samples, read from samples.jsonl."""
        chunks, _ = read_samples_file(self.path / SAMPLES)
        _check_chunks(self.path / SAMPLES, self.manifest, chunks)
        return chunks

    def append_chunks(self, written: Sequence[tuple[int, Sequence[SampleRecord]]]) -> None:
        """Append finished chunks (index, samples), each a closed unit, in one write; then
        flush and fsync. A batch's chunks go in together, so a run stopped between two
        batches leaves whole batches behind."""
        for index, _ in written:
            if not self.manifest.owns(index):
                raise ValueError(f"chunk {index} is not part of {shard_text(self.manifest.shard)}")
        with open(self.path / SAMPLES, "ab") as fh:
            fh.write(b"".join(_chunk_lines(index, samples) for index, samples in written))
            fh.flush()
            os.fsync(fh.fileno())
        self.done.update(index for index, _ in written)

    def owned_chunks(self) -> list[int]:
        return [c for c in range(self.manifest.chunks) if self.manifest.owns(c)]

    def samples(self) -> list[SampleRecord]:
        """All written samples, in chunk order."""
        chunks = self.load_chunks()
        return [s for c in sorted(chunks) for s in chunks[c]]


def _check_chunks(where: Path, manifest: Manifest, chunks: Chunks) -> None:
    for c in chunks:
        if not 0 <= c < manifest.chunks or not manifest.owns(c):
            raise UserError(f"{where}: chunk {c} does not belong to {shard_text(manifest.shard)} "
                            f"of a sweep of {manifest.chunks} chunks")


NUMBERS_TOLERANCE = 1e-3  # two copies of a chunk whose numbers differ by more are different


def draws_gap(a: Sequence[SampleRecord], b: Sequence[SampleRecord]) -> float | None:
    """How far two copies of a chunk differ: None when any sample drew other tokens or
    ended otherwise, else the largest difference of their log-probabilities and
    entropies (0.0 for identical copies; the batch and the thread count move only the
    float sums' last bits). Copies further apart than `NUMBERS_TOLERANCE` are None."""
    if len(a) != len(b):
        return None
    gap = 0.0
    for x, y in zip(a, b):
        if (x.recipe, x.prompt_index, x.sample_index, x.token_ids, x.text, x.kept, x.ending) != \
                (y.recipe, y.prompt_index, y.sample_index, y.token_ids, y.text, y.kept, y.ending):
            return None
        for u, v in ((x.logprobs, y.logprobs), (x.final_entropy, y.final_entropy)):
            gap = max([gap, *(abs(p - q) for p, q in zip(u, v))])
    return gap if gap <= NUMBERS_TOLERANCE else None


def merge_folders(sources: Sequence[Path], out: Path) -> tuple[SweepFolder, list[str]]:
    """Join shard folders of one sweep into a complete folder at `out`; returns notes.

    Every source must hold the same sweep (fingerprint). A chunk found in two folders
    is kept once when both copies drew the same tokens (`draws_gap`; a note says so)
    and is an error otherwise;
    a chunk in none of them is an error naming the chunks and their shard.
    """
    if not sources:
        raise UserError("sweep-merge: give at least one sweep folder")
    folders = [SweepFolder.read(Path(s)) for s in sources]
    first = folders[0]
    for f in folders[1:]:
        if f.manifest.fingerprint != first.manifest.fingerprint:
            raise UserError(f"{f.path}: holds a different sweep from {first.path}: fingerprint "
                            f"{f.manifest.fingerprint[:12]} differs from "
                            f"{first.manifest.fingerprint[:12]}")
    notes: list[str] = []
    chunks: Chunks = {}
    found_in: dict[int, Path] = {}
    for f in folders:
        for c, samples in sorted(f.load_chunks().items()):
            if c in chunks:
                gap = draws_gap(chunks[c], samples)
                if gap is None:
                    raise UserError(f"chunk {c} is in both {found_in[c]} and {f.path} with "
                                    "different samples; merge only one of them")
                same = ("the same samples" if gap == 0 else "the same tokens, log-probabilities "
                        f"within {gap:.1g} (another batch or thread count)")
                notes.append(f"chunk {c} is in both {found_in[c]} and {f.path} ({same}; kept "
                             f"the copy in {found_in[c]})")
                continue
            chunks[c], found_in[c] = samples, f.path
    total = first.manifest.chunks
    missing = [c for c in range(total) if c not in chunks]
    if missing:
        raise UserError(f"chunks {_number_list(missing)} of {total} are missing"
                        f"{_shard_hint(missing, folders)}; run them (or resume their folder) "
                        "and merge again")
    return _write_merged(out, first, folders, chunks), notes


def _number_list(chunks: Iterable[int], limit: int = 12) -> str:
    """Chunk indices (from 0), shortened after `limit`."""
    numbers = [str(c) for c in chunks]
    more = len(numbers) - limit
    return ", ".join(numbers[:limit]) + (f" and {more} more" if more > 0 else "")


def _shard_hint(missing: list[int], folders: Sequence[SweepFolder]) -> str:
    counts = {f.manifest.shard[1] for f in folders if f.manifest.shard}
    if len(counts) != 1:
        return ""
    n = counts.pop()
    shards = sorted({c % n + 1 for c in missing})
    return f" (shard {', '.join(f'{i}/{n}' for i in shards)})"


def _write_merged(out: Path, first: SweepFolder, folders: Sequence[SweepFolder],
                  chunks: Chunks) -> SweepFolder:
    if (out / MANIFEST).exists():
        old = read_manifest(out)
        if not old.merged_from or old.fingerprint != first.manifest.fingerprint:
            raise UserError(f"{out}: holds a sweep run, not an earlier merge of this sweep; "
                            "give another --out folder")
    elif out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise UserError(f"{out}: exists and is not a sweep folder; give another --out folder")
    out.mkdir(parents=True, exist_ok=True)
    sources = tuple(str(f.path) for f in folders)
    m = first.manifest
    manifest = Manifest(m.fingerprint, m.title, m.sweep_file, m.recipes, m.prompts, m.samples,
                        m.chunks, m.seed, shard=None, merged_from=sources)
    for name in (SWEEP_FILE, VERSIONS):
        if (first.path / name).is_file():
            write_atomic(out / name, (first.path / name).read_text(encoding="utf-8"))
    write_atomic(out / SAMPLES, b"".join(_chunk_lines(c, chunks[c]) for c in sorted(chunks)))
    write_atomic(out / MANIFEST, json_text(manifest.to_json()))
    return SweepFolder(out, manifest, chunks)
