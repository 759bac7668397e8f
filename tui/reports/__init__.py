"""Reports of one transcript, in HTML or Markdown, from one gathered `Report`.

- `gather`: what both formats show (`Report`, rows, shared formatting);
- `html`, `markdown`: the two renderings; `report`: choosing one and writing it.
"""

from tui import lazy_exports

__all__ = ["Report", "write_report"]
__getattr__ = lazy_exports(__name__, {"Report": "gather", "write_report": "report"})
