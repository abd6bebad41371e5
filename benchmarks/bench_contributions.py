"""Benchmark: cost of risk contributions on the ``exact`` engine.

Baseline (measured in the same run): the exact engine's law of the same book
without contributions.  With contributions the run keeps each factor node's
law, then a second pass runs the deconvolution series per class of identical
obligors at the nodes whose law straddles a VaR.  Targets: at most 3x the
baseline on a rating-grade book, at most 10x on all-different obligors.

Books: the 20,000-obligor rating-grade and all-different books of
``bench_exact.py`` (same generators, same seed).

Second table, the link-heavy demo ``scenarios/regional_bank.yaml`` (3,000
obligors, 651 links in 150 linked groups): the allocation pass alone (the
node laws kept by the run) against the baseline ``today's allocation``, a
frozen copy of ``debtsim/engines/exact/contributions.py`` before the batched
group states and blocked spectra (``benchmarks/baseline/exact_contributions.py``,
on the same engine), with the ratio and the largest difference of any
contribution figure relative to the largest value of its column.  Target:
the allocation within about 3x the law's time.  Usage::

    .venv/bin/python benchmarks/bench_contributions.py [--obligors 20000] [--seed 7]
    .venv/bin/python benchmarks/bench_contributions.py --demo-only
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from baseline import exact_contributions as baseline_contributions  # noqa: E402
from bench_exact import continuous_book, rating_book  # noqa: E402

import debtsim  # noqa: E402
from debtsim.contributions import allocate  # noqa: E402
from debtsim.engines.exact.contributions import NodeLawStore, exact_moments  # noqa: E402
from debtsim.engines.exact.engine import ExactEngine  # noqa: E402
from debtsim.model.specification import LinkedFactorModel  # noqa: E402
from debtsim.risk import measures  # noqa: E402

LEVELS = (0.99, 0.999)
BASELINE = "exact engine law alone"
DEMO = Path(__file__).resolve().parents[1] / "scenarios" / "regional_bank.yaml"
DEMO_BASELINE = "today's allocation (benchmarks/baseline/exact_contributions.py)"


def demo() -> None:
    """Allocation on the link-heavy demo: new module against the frozen baseline (CPU s)."""
    model = LinkedFactorModel.from_book(debtsim.load_book(DEMO))
    engine = ExactEngine()
    store = NodeLawStore()
    engine.node_law_sink = store
    start = time.process_time()
    dist = engine.run(model)
    t_law = time.process_time() - start
    engine.node_law_sink = None
    start = time.process_time()
    new = allocate(exact_moments(engine, model, dist, LEVELS, node_laws=store))
    t_new = time.process_time() - start
    start = time.process_time()
    old = allocate(baseline_contributions.exact_moments(engine, model, dist, LEVELS,
                                                        node_laws=store))
    t_old = time.process_time() - start
    worst = 0.0
    worst_name = ""
    for name, column in old.columns().items():
        scale = float(np.max(np.abs(column)))
        diff = float(np.max(np.abs(new.columns()[name] - column))) / scale if scale else 0.0
        if diff >= worst:
            worst, worst_name = diff, name
    print(f"\nAllocation on {DEMO.name} ({model.n_obligors:,} obligors, {model.n_links} links)"
          f" vs baseline '{DEMO_BASELINE}', CPU seconds")
    print(f"{'law':>8}{'baseline':>10}{'new':>8}{'speed-up':>10}{'new/law':>9}"
          f"{'largest diff (rel. to column max)':>36}")
    print(f"{t_law:>8.2f}{t_old:>10.2f}{t_new:>8.2f}{t_old / t_new:>10.1f}{t_new / t_law:>9.1f}"
          f"{worst:>27.1e} ({worst_name})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--obligors", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--demo-only", action="store_true",
                        help="only the regional_bank demo table")
    args = parser.parse_args()
    if args.demo_only:
        demo()
        return
    print(f"Contributions on the exact engine vs baseline '{BASELINE}' "
          f"({args.obligors:,} obligors, levels {LEVELS})")
    print(f"{'book':<26}{'law s':>9}{'law+contrib s':>15}{'ratio':>8}"
          f"{'ES99.9 sum rel.err':>20}{'VaR window sens.':>18}")
    for make in (rating_book, continuous_book):
        model = make(args.obligors, args.seed)
        engine = ExactEngine()
        start = time.perf_counter()
        dist = engine.run(model)
        t_law = time.perf_counter() - start
        # what a run with contributions does (debtsim.engines.allocation): the law, keeping
        # the node laws, then the allocation pass
        start = time.perf_counter()
        store = NodeLawStore()
        engine.node_law_sink = store
        dist = engine.run(model)
        engine.node_law_sink = None
        moments = exact_moments(engine, model, dist, LEVELS, node_laws=store)
        alloc = allocate(moments)
        total = time.perf_counter() - start
        es = measures(dist, LEVELS).expected_shortfall[LEVELS[-1]]
        err = abs(alloc.expected_shortfall[-1].sum() - es) / es
        print(f"{model.ids and make.__name__:<26}{t_law:>9.2f}{total:>15.2f}"
              f"{total / t_law:>8.2f}{err:>20.1e}"
              f"{moments.diagnostics.get('var_window_sensitivity', np.nan):>18.2e}")
    demo()


if __name__ == "__main__":
    main()
