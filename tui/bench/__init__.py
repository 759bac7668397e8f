"""`make bench`: one table of speed, memory and precision figures, each against its target.

`python -m tui.bench [--quick] [--cold]` prints `table`'s table; `step`, `runs`, `precision`
and `sweep` hold its sections, `recipe_math` the recipe math's own table.
"""
