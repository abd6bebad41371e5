"""Today's engines, frozen as the named baseline of ``bench_speed.py``.

Copies of ``debtsim/engines/exact/{engine,loss_grid}.py``,
``debtsim/model/linked_group_law.py`` and
``debtsim/engines/sample/{engine,scenario_draws}.py`` as they were on main
before issue 11, with only their imports pointed at each other.  Not part
of the package; not linted for style beyond ruff's defaults.
"""
