"""`python -m tui.bench`: the benchmark table (`tui.bench.table`)."""

from tui.bench.table import main

raise SystemExit(main())
