"""Sweeps: many samples per recipe and prompt, measured, stored resumably, tabled.

- `spec`: the sweep file; `plan`: chunks, the manifest and the job;
- `runner`: the batched runner that decodes whole chunks;
- `folder`: the resumable sweep folder, shards and merging;
- `metrics`, `bootstrap`, `pareto`: measures, intervals and the trade-off front;
- `results`, `report`, `progress`: tables, charts and the progress line.
"""

from tui import lazy_exports

__all__ = ["SweepSpec", "load_sweep", "SweepRunner", "SweepFolder", "compute_results"]
__getattr__ = lazy_exports(__name__, {
    "SweepSpec": "spec", "load_sweep": "spec", "SweepRunner": "runner",
    "SweepFolder": "folder", "compute_results": "results",
})
