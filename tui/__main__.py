"""`python -m tui` is the `logitfork` command."""

from tui.cli import main

raise SystemExit(main())
