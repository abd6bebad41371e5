"""Benchmark of sector factors: exact engine cost and importance-sampling gain.

Prints, measured in one run on this machine, for one 20,000-obligor book in
8 sectors (loadings form, no links; rating-grade PDs, IRB correlation,
log-normal EAD, LGD 25/45/75%):

1. ``exact``: time of the full loss law with the 8 sector loadings against
   the baseline "same book, one factor" (``model`` section without sectors),
   side by side, and the two books' VaR99.9;
2. ``sample``: variance of the VaR99.9 and ES99.9 estimates with importance
   sampling against the baseline "plain Monte Carlo at equal scenarios",
   each from ``--repeats`` independent runs with different seeds (the sample
   variance over the repeats), reported as the ratio plain / IS.

Usage::

    .venv/bin/python benchmarks/bench_sectors.py [--obligors 20000] [--samples 100000]
        [--repeats 12] [--seed 7] [--skip-sample] [--skip-exact]
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from debtsim.book.dependence import DependenceSpec  # noqa: E402
from debtsim.book.records import Book, Obligor  # noqa: E402
from debtsim.engines.exact.engine import ExactEngine  # noqa: E402
from debtsim.model.specification import LinkedFactorModel  # noqa: E402
from debtsim.risk import expected_shortfall, value_at_risk  # noqa: E402

LEVEL = 0.999
GRADES = np.array(
    [
        3e-4,
        5e-4,
        8e-4,
        0.0012,
        0.002,
        0.003,
        0.005,
        0.008,
        0.012,
        0.018,
        0.027,
        0.04,
        0.06,
        0.09,
        0.13,
        0.2,
    ]
)
SECTORS = ("grain", "dairy", "haulage", "timber", "retail", "energy", "housing", "shipyards")
LOADINGS = (0.55, 0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9)


def sector_book(n: int, seed: int) -> Book:
    """Rating-grade book spread over 8 sectors of unequal size."""
    rng = np.random.default_rng(seed)
    pd = GRADES[np.clip(np.round(rng.normal(7, 2.5, n)), 0, GRADES.size - 1).astype(int)]
    w = (1 - np.exp(-50 * pd)) / (1 - np.exp(-50))
    r = 0.12 * w + 0.24 * (1 - w)
    lgd = rng.choice([0.25, 0.45, 0.75], n, p=[0.2, 0.6, 0.2])
    ead = np.round(rng.lognormal(np.log(250_000), 1.0, n), 2)
    share = np.array([0.25, 0.2, 0.15, 0.12, 0.1, 0.08, 0.06, 0.04])
    sector = rng.choice(len(SECTORS), n, p=share)
    obligors = tuple(
        Obligor(
            f"B{i}",
            float(ead[i]),
            float(pd[i]),
            float(lgd[i]),
            float(r[i]),
            sector=SECTORS[sector[i]],
        )
        for i in range(n)
    )
    return Book(name=f"sectors {n}", currency="EUR", obligors=obligors)


def with_sectors(book: Book) -> Book:
    return replace(book, dependence=DependenceSpec(sectors=SECTORS, loadings=LOADINGS))


def bench_exact(book: Book) -> None:
    one = LinkedFactorModel.from_book(book)
    sec = LinkedFactorModel.from_book(with_sectors(book))
    # warm-up: compiled kernels are built (or loaded from numba's cache) on first use
    small = replace(book, obligors=book.obligors[:400])
    start = time.perf_counter()
    for model in (
        LinkedFactorModel.from_book(small),
        LinkedFactorModel.from_book(with_sectors(small)),
    ):
        ExactEngine().run(model)
    print(
        f"warm-up (compile or cache load, 400 obligors, both books): "
        f"{time.perf_counter() - start:.2f} s"
    )
    rows = []
    for label, model in (("one factor (baseline)", one), ("8 sector loadings", sec)):
        start = time.perf_counter()
        dist = ExactEngine().run(model)
        seconds = time.perf_counter() - start
        rows.append((label, seconds, value_at_risk(dist, LEVEL), dist.settings))
    base = rows[0][1]
    print(f"\nexact engine, {one.n_obligors:,} obligors, full loss law")
    print(f"{'book':<24}{'seconds':>10}{'ratio':>8}{'VaR99.9':>18}  nodes")
    for label, seconds, var, settings in rows:
        nodes = settings.get("factor_nodes")
        inner = settings.get("sector_inner_nodes")
        extra = f"{nodes} global" + (f" + {inner} sector" if inner else "")
        print(f"{label:<24}{seconds:>10.2f}{seconds / base:>8.2f}{var:>18,.0f}  {extra}")


def bench_sample(book: Book, samples: int, repeats: int, seed: int) -> None:
    from debtsim.engines.sample.engine import SampleEngine

    model = LinkedFactorModel.from_book(with_sectors(book))
    print(
        f"\nsample engine, {model.n_obligors:,} obligors in 8 sectors, {samples:,} scenarios,"
        f" {repeats} seeds"
    )
    print(f"{'run':<34}{'var(VaR99.9)':>16}{'var(ES99.9)':>16}{'seconds':>10}")
    out = {}
    for label, importance in (
        ("plain Monte Carlo (baseline)", False),
        ("importance sampling", True),
    ):
        vs, es = [], []
        start = time.perf_counter()
        for k in range(repeats):
            engine = SampleEngine(
                samples=samples, seed=seed + k, levels=(0.99, LEVEL), importance=importance
            )
            dist = engine.run(model)
            vs.append(value_at_risk(dist, LEVEL))
            es.append(expected_shortfall(dist, LEVEL))
        seconds = (time.perf_counter() - start) / repeats
        out[label] = (np.var(vs, ddof=1), np.var(es, ddof=1))
        print(f"{label:<34}{out[label][0]:>16.4g}{out[label][1]:>16.4g}{seconds:>10.2f}")
    plain, tilted = out["plain Monte Carlo (baseline)"], out["importance sampling"]
    print(
        f"variance ratio plain / IS: VaR99.9 {plain[0] / tilted[0]:.1f}x, "
        f"ES99.9 {plain[1] / tilted[1]:.1f}x"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--obligors", type=int, default=20_000)
    parser.add_argument("--samples", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=12)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--skip-exact", action="store_true")
    parser.add_argument("--skip-sample", action="store_true")
    args = parser.parse_args()
    book = sector_book(args.obligors, args.seed)
    if not args.skip_exact:
        bench_exact(book)
    if not args.skip_sample:
        bench_sample(book, args.samples, args.repeats, args.seed)


if __name__ == "__main__":
    main()
