"""Today's engines, frozen as the named baseline of ``bench_speed.py``.

Copies of ``debtsim/engines/exact/{engine,loss_grid}.py``,
``debtsim/model/linked_group_law.py`` and
``debtsim/engines/sample/{engine,scenario_draws}.py`` as they were on main
before issue 11, with only their imports pointed at each other; and
``exact_contributions.py``, ``debtsim/engines/exact/contributions.py`` before
its group states were batched and its rest-of-book laws blocked (it still
imports the package's exact engine, so both allocations share one engine).  Not part
of the package; not linted for style beyond ruff's defaults.
"""
