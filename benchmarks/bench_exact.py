"""Benchmark of the ``exact`` engine against the sampler.

Prints two tables, measured in one run on this machine:

1. time of the exact law of a 20,000-obligor book against the baseline
   "sample engine, 200,000 scenarios" (importance sampling on, as ``auto``
   would run it), for a rating-grade book and for a book whose PD, LGD and
   correlation all differ from obligor to obligor;
2. time at EQUAL VaR99.9 accuracy on 1,000-, 10,000- and 100,000-obligor
   rating-grade books: the exact engine's time and reported relative error,
   against the time the sampler (importance sampling on) and plain Monte
   Carlo (off) would need to bring the standard error of VaR99.9 down to
   that error, and down to 1%.  Scenario counts are projected from a pilot
   run's batch standard error (``N = N_pilot (se_pilot / target)^2``) and
   times as ``fixed + N * per scenario``, both measured from the pilot and a
   500-scenario run.

Books are built programmatically with fixed seeds.  Usage::

    .venv/bin/python benchmarks/bench_exact.py [--obligors 20000]
        [--samples 200000] [--sizes 1000 10000 100000] [--seed 7]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from debtsim.book.records import Book, Obligor  # noqa: E402
from debtsim.engines.exact.engine import ExactEngine  # noqa: E402
from debtsim.model.specification import LinkedFactorModel  # noqa: E402
from debtsim.risk import expected_shortfall, level_key, value_at_risk  # noqa: E402

BASELINE = "sample engine, 200,000 scenarios"
LEVEL = 0.999
#: Scenario count of the run that measures a sampler's fixed set-up time.
SMALL = 500
GRADES = np.array([3e-4, 5e-4, 8e-4, 0.0012, 0.002, 0.003, 0.005, 0.008, 0.012, 0.018,
                   0.027, 0.04, 0.06, 0.09, 0.13, 0.2])


def basel_correlation(pd: np.ndarray) -> np.ndarray:
    w = (1 - np.exp(-50 * pd)) / (1 - np.exp(-50))
    return 0.12 * w + 0.24 * (1 - w)


def rating_book(n: int, seed: int) -> LinkedFactorModel:
    """Rating-grade book: 16 PD grades, IRB correlation, LGD 25/45/75%, log-normal EAD."""
    rng = np.random.default_rng(seed)
    pd = GRADES[np.clip(np.round(rng.normal(7, 2.5, n)), 0, GRADES.size - 1).astype(int)]
    lgd = rng.choice([0.25, 0.45, 0.75], n, p=[0.2, 0.6, 0.2])
    ead = np.round(rng.lognormal(np.log(250_000), 1.0, n), 2)
    return _model(f"rating {n}", ead, pd, lgd, basel_correlation(pd))


def continuous_book(n: int, seed: int) -> LinkedFactorModel:
    """Every obligor different: log-normal PD (0.03%-20%), IRB R, uniform LGD, log-normal EAD."""
    rng = np.random.default_rng(seed)
    pd = np.clip(np.exp(rng.normal(np.log(0.01), 1.0, n)), 3e-4, 0.2)
    ead = np.round(np.exp(rng.normal(0, 1, n)) * 1e6, 2)
    lgd = rng.uniform(0.25, 0.65, n)
    return _model(f"continuous {n}", ead, pd, lgd, basel_correlation(pd))


def _model(name: str, ead, pd, lgd, r) -> LinkedFactorModel:
    obligors = tuple(
        Obligor(id=f"F{i:06d}", ead=float(ead[i]), pd=float(pd[i]), lgd=float(lgd[i]),
                asset_correlation=float(r[i]))
        for i in range(len(ead))
    )
    return LinkedFactorModel.from_book(Book(name=name, currency="EUR", obligors=obligors))


def timed(fn):
    start = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - start


def sampler(samples: int, seed: int, importance: bool):
    from debtsim.engines.sample.engine import SampleEngine

    return SampleEngine(samples=samples, seed=seed, levels=(0.99, LEVEL), importance=importance)


def table_speed(n: int, samples: int, seed: int) -> None:
    baseline = BASELINE if samples == 200_000 else f"sample engine, {samples:,} scenarios"
    print(f"\n1. Exact law of a {n:,}-obligor book vs baseline '{baseline}'")
    print(f"{'book':<22}{'engine':<34}{'time s':>9}{'VaR99.9':>16}{'ES99.9':>16}"
          f"{'EL rel. err':>13}{'speed-up':>10}")
    for make in (rating_book, continuous_book):
        model = make(n, seed)
        el = float(np.sum(model.pd * model.lgd * model.ead))
        exact, t_exact = timed(lambda model=model: ExactEngine().run(model))
        sample, t_sample = timed(lambda model=model: sampler(samples, seed, True).run(model))
        name = make.__name__.replace("_book", "")
        for label, dist, t in (("exact", exact, t_exact), (baseline, sample, t_sample)):
            print(f"{name:<22}{label:<34}{t:>9.2f}{value_at_risk(dist, LEVEL):>16,.0f}"
                  f"{expected_shortfall(dist, LEVEL):>16,.0f}{abs(dist.mean / el - 1):>13.1e}"
                  f"{t_sample / t:>9.1f}x")
        d = exact.diagnostics
        print(f"{'':<22}exact: {exact.settings['factor_nodes']} factor nodes, "
              f"{exact.settings['grid_points']:,} grid points, unit "
              f"{exact.settings['grid_unit']:,.0f}; discretisation error "
              f"{d['discretisation_error']:,.0f} ({d['discretisation_error_relative']:.1e} rel.)")
        se = sample.diagnostics["var_standard_error"][level_key(LEVEL)]
        print(f"{'':<22}sampler: VaR99.9 standard error {se:,.0f} "
              f"({se / value_at_risk(sample, LEVEL):.1e} rel.)")


def table_equal_accuracy(sizes: list[int], seed: int) -> None:
    print("\n2. Time to VaR99.9 at equal accuracy (rating-grade books)")
    print(f"{'obligors':>9}  {'method':<44}{'rel. error':>11}{'scenarios':>15}{'time s':>12}"
          f"{'vs exact':>10}")
    for n in sizes:
        model = rating_book(n, seed)
        exact, t_exact = timed(lambda model=model: ExactEngine().run(model))
        target = exact.diagnostics["discretisation_error_relative"]
        print(f"{n:>9,}  {'exact (measured)':<44}{target:>11.1e}{'-':>15}{t_exact:>12.2f}"
              f"{1.0:>9.1f}x")
        pilots = {True: max(5_000, min(50_000, 100_000_000 // n)),
                  False: max(20_000, min(200_000, 400_000_000 // n))}
        for importance, label in ((True, "sampler, importance sampling"),
                                  (False, "plain Monte Carlo")):
            pilot = pilots[importance]
            _, t_small = timed(lambda model=model, importance=importance: sampler(
                SMALL, seed, importance).run(model))
            dist, t_pilot = timed(
                lambda model=model, importance=importance, pilot=pilot: sampler(
                    pilot, seed, importance
                ).run(model)
            )
            per = max(t_pilot - t_small, 0.0) / (pilot - SMALL)
            fixed = max(t_small - SMALL * per, 0.0)
            var = value_at_risk(dist, LEVEL)
            se = dist.diagnostics["var_standard_error"][level_key(LEVEL)]
            for goal in (target, 0.01):
                need = pilot * (se / (goal * var)) ** 2
                t_need = fixed + per * need
                print(f"{'':>9}  {label + ' (projected)':<44}{goal:>11.1e}{need:>15,.0f}"
                      f"{t_need:>12.3g}{t_need / t_exact:>9.3g}x")
            print(f"{'':>9}  {'  pilot: ' + f'{pilot:,} scenarios':<44}{se / var:>11.1e}"
                  f"{pilot:>15,}{t_pilot:>12.2f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--obligors", type=int, default=20_000)
    parser.add_argument("--samples", type=int, default=200_000)
    parser.add_argument("--sizes", type=int, nargs="*", default=[1_000, 10_000, 100_000])
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args()
    table_speed(args.obligors, args.samples, args.seed)
    if args.sizes:
        table_equal_accuracy(args.sizes, args.seed)


if __name__ == "__main__":
    main()
