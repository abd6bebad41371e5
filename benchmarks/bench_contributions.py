"""Benchmark: cost of risk contributions on the ``exact`` engine.

Baseline (measured in the same run): the exact engine's law of the same book
without contributions.  With contributions the run keeps each factor node's
law, then a second pass runs the deconvolution series per class of identical
obligors at the nodes whose law straddles a VaR.  Targets: at most 3x the
baseline on a rating-grade book, at most 10x on all-different obligors.

Books: the 20,000-obligor rating-grade and all-different books of
``bench_exact.py`` (same generators, same seed).  Usage::

    .venv/bin/python benchmarks/bench_contributions.py [--obligors 20000] [--seed 7]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_exact import continuous_book, rating_book  # noqa: E402

from debtsim.contributions import allocate  # noqa: E402
from debtsim.engines.exact.contributions import NodeLawStore, exact_moments  # noqa: E402
from debtsim.engines.exact.engine import ExactEngine  # noqa: E402
from debtsim.risk import measures  # noqa: E402

LEVELS = (0.99, 0.999)
BASELINE = "exact engine law alone"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--obligors", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args()
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


if __name__ == "__main__":
    main()
