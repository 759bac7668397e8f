"""Transcripts: the saved session format, reading it back, the recovery log, rerunning.

- `headers`: the header types (`TranscriptHeader`, `PaneHeader`) and format names;
- `format`: writing a transcript (JSON lines) from a session view;
- `schema`, `reader`: validating and streaming a transcript (`StoredSession`);
- `recovery_log`, `recovery_reader`: the crash-recovery log the app appends to;
- `rerun`: decoding a transcript again and comparing.
"""

from tui import lazy_exports

__all__ = ["PaneHeader", "StoredSession", "TranscriptHeader", "RecoveryLog", "rerun"]
__getattr__ = lazy_exports(__name__, {
    "PaneHeader": "headers", "TranscriptHeader": "headers", "StoredSession": "reader",
    "RecoveryLog": "recovery_log", "rerun": "rerun",
})
