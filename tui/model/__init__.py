"""Models: the catalogue, where a model comes from, the conversion cache, loading, forward paths.

- `catalogue`: `load_model` (a catalogue name, folder, GGUF file or hub id);
- `sources`: reading `models.txt` and resolving `--model` to a source;
- `conversion_cache`: GGUF files converted once to safetensors folders, and the direct-load record;
- `loading`: loading through transformers, or straight from a checkpoint;
- `loaded`: `LoadedModel` (prompt encoding, decoding, runners);
- `kv`: the cache rows every forward path shares; `forward`: the generic runner and `make_runner`;
- `llama_checkpoint`, `lean_llama`: the fast llama-family path and what it accepts (an
  allow-list of config keys); `transformers_internals`: what those paths read of
  transformers beyond its public API;
- `sizing`: sizes from file headers, the memory and disk checks, `--dtype auto`.

Everything that imports torch or transformers does it inside functions or in the
forward modules only, so `tui.model.catalogue` is cheap to import.
"""

from tui import lazy_exports

__all__ = ["LoadedModel", "load_model", "make_runner", "KV"]
__getattr__ = lazy_exports(__name__, {
    "LoadedModel": "loaded", "load_model": "catalogue", "make_runner": "forward", "KV": "kv",
})
