"""The Textual app (the only part of `tui` that imports Textual and Rich).

`make_app` in `app.py` builds it for the `watch` command and for the tests.
"""
