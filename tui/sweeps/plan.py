"""From a sweep file to a runnable job: prompts, fingerprint, shards, folder names.

`resolve_prompts` takes the prompts from the sweep file or from its scenario;
`run_fingerprint` is the spec's fingerprint, extended with the scenario's prompt
when the prompts come from a scenario (the spec's own fingerprint covers only the
scenario's path); `build_job` encodes the prompts with the model's tokenizer.
Errors are `UserError`s in the ``FILE: FIELD: reason`` form. Importing this module
loads no torch, so a bad sweep file or folder is refused at once.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path
from typing import TYPE_CHECKING

from tui.errors import UserError, located
from tui.sweeps.folder import Manifest
from tui.sweeps.spec import Prompt, SweepSpec, samples_for

if TYPE_CHECKING:
    from tui.model.catalogue import LoadedModel
    from tui.sweeps.runner import SweepJob

DEFAULT_ROOT = Path("sweeps")
MAX_BATCH_ROWS = 256  # rows per forward pass that `choose_batch` picks at most


def parse_shard(text: str | None) -> tuple[int, int] | None:
    """``"2/4"`` -> (2, 4): the second of four shards (1-based); None -> None."""
    if text is None:
        return None
    found = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", text)
    if not found or not 1 <= int(found.group(1)) <= int(found.group(2)):
        raise UserError(f"--shard: must be I/N with 1 <= I <= N (e.g. 2/4), got {text!r}")
    return int(found.group(1)), int(found.group(2))


def default_folder(spec: SweepSpec, shard: tuple[int, int] | None) -> Path:
    """``sweeps/<file stem>/``, or ``sweeps/<file stem>-shard-I-of-N/`` for a shard."""
    stem = spec.path.stem
    if shard is None:
        return DEFAULT_ROOT / stem
    return DEFAULT_ROOT / f"{stem}-shard-{shard[0]}-of-{shard[1]}"


def resolve_prompts(spec: SweepSpec) -> tuple[Prompt, ...]:
    """The sweep's prompts; with `scenario`, the scenario's one prompt or chat."""
    if spec.scenario is None:
        return spec.prompts
    from tui.session.scenario import load_scenario

    try:
        scenario = load_scenario(spec.scenario)
    except UserError as exc:
        raise located(spec.path, "scenario", str(exc)) from None
    return (scenario.prompt,) if scenario.prompt is not None else (scenario.messages,)


def run_fingerprint(spec: SweepSpec, prompts: tuple[Prompt, ...]) -> str:
    """What a folder's samples depend on: the spec, plus the scenario's prompt if used."""
    if spec.scenario is None:
        return spec.fingerprint()
    text = json.dumps([p if isinstance(p, str) else [list(m) for m in p] for p in prompts],
                      ensure_ascii=False, separators=(",", ":"))
    return hashlib.sha256(f"{spec.fingerprint()}\n{text}".encode("utf-8")).hexdigest()


def chunk_count(spec: SweepSpec, prompts: int) -> int:
    rows = sum(samples_for(recipe, spec.samples) for recipe in spec.recipes())
    return prompts * -(-rows // spec.chunk_rows)


def make_manifest(spec: SweepSpec, prompts: tuple[Prompt, ...],
                  shard: tuple[int, int] | None) -> Manifest:
    return Manifest(fingerprint=run_fingerprint(spec, prompts), title=spec.title,
                    sweep_file=spec.path.name, recipes=tuple(spec.recipes()),
                    prompts=len(prompts), samples=spec.samples,
                    chunks=chunk_count(spec, len(prompts)), seed=spec.seed, shard=shard)


def build_job(spec: SweepSpec, prompts: tuple[Prompt, ...], lm: LoadedModel) -> SweepJob:
    """Encode the prompts; a prompt that fills the model's context is refused by name."""
    from tui.sweeps.runner import SweepJob

    encoded = []
    for i, prompt in enumerate(prompts, start=1):
        where = "scenario" if spec.scenario is not None else f"prompts[{i}]"
        try:
            if isinstance(prompt, str):
                ids = lm.encode_prompt(prompt, None)
            else:
                ids = lm.encode_prompt(None, [{"role": r, "content": c} for r, c in prompt])
        except UserError as exc:
            raise located(spec.path, where, str(exc)) from None
        if len(ids) >= lm.max_context:
            raise located(spec.path, where, f"{len(ids)} tokens; the context of model "
                                            f"{lm.name} holds {lm.max_context}")
        encoded.append(tuple(ids))
    return SweepJob(prompt_ids=tuple(encoded), recipes=tuple(spec.recipes()),
                    samples=spec.samples, max_new_tokens=spec.max_new_tokens, seed=spec.seed,
                    chunk_rows=spec.chunk_rows, stop=spec.stop)


def choose_batch(lm: "LoadedModel", job: "SweepJob", requested: int | None = None,
                 recorded: int | None = None, available: int | None = None) -> tuple[int, str]:
    """Rows per forward pass for this model on this machine, and the line that says why.

    The rows that fit are those whose KV caches at their longest, plus their logits, take
    at most half the memory available now (`tui.model.sizing.rows_per_batch`).
    `requested` (``--batch-rows``) is taken if it fits, else it is a `UserError` naming
    both counts. `recorded` (the batch of the folder's first run, when it resumes) is
    taken if it fits, so that the resumed run batches its chunks as an uninterrupted
    run would. Otherwise the batch is as large as memory allows, up to the rows of one
    prompt (a batch never spans two prompts) and `MAX_BATCH_ROWS`. The batch changes no
    draw (see `tui.sweeps.runner`), only the last digits of the log-probabilities, so
    it is not part of the fingerprint.
    """
    from tui.model import sizing

    layers, kv_heads, head_dim, vocab = lm.cache_shape()
    context = max(len(p) for p in job.prompt_ids) + job.max_new_tokens
    per_row = sizing.row_bytes(layers, kv_heads, head_dim, context, vocab,
                               sizing.BYTES_PER_PARAMETER.get(lm.dtype, 4))
    free = sizing.available_memory() if available is None else available
    fits = sizing.rows_per_batch(per_row, free, wanted=10**6)
    room = (f"memory allows {fits}: {sizing.gb(per_row)} a row at {context} positions, "
            f"half of {sizing.gb(free)} available")
    if requested is not None:
        if requested > fits:
            raise UserError(f"--batch-rows: {requested} rows per forward pass do not fit in memory "
                            f"with model {lm.name}; give {fits} or less ({room})")
        return requested, f"batch: {requested} rows per forward pass (--batch-rows; {room})"
    if recorded is not None and recorded <= fits:
        return recorded, f"batch: {recorded} rows per forward pass (as the folder's first run; {room})"
    prompt_rows = job.rows_per_prompt()
    rows = min(fits, prompt_rows, MAX_BATCH_ROWS)
    bound = (room if rows == fits else f"a prompt has {prompt_rows} rows; {room}"
             if rows == prompt_rows else f"at most {MAX_BATCH_ROWS}; {room}")
    if recorded is not None:
        bound += (f"; the folder's first run used {recorded}, so the chunks still to run may "
                  "differ from an uninterrupted run in the last digits of their log-probabilities")
    return rows, f"batch: {rows} rows per forward pass ({bound})"
