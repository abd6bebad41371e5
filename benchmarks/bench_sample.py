"""Benchmark of the ``sample`` engine: importance-sampling variance reduction and speed.

Prints three tables, each with ratios against the baseline "plain MC" (the
same engine with importance sampling off) measured in the same run:

1. variance of VaR and ES estimates over independent seeds, plain MC versus
   importance sampling at the same number of scenarios, on a 1,000-obligor
   heterogeneous book (without and with 3,000 links);
2. time of 10^6 scenarios on the 1,000-obligor, 3,000-link book;
3. time of 200,000 scenarios on a 20,000-obligor book without links.

Books are built programmatically with fixed seeds.  Usage::

    .venv/bin/python benchmarks/bench_sample.py [--seeds 20] [--samples 20000]
        [--big 1000000] [--wide 200000] [--workers 2] [--sections 123]
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from debtsim.book.records import Book, Link, Obligor  # noqa: E402
from debtsim.engines.sample.engine import SampleEngine  # noqa: E402
from debtsim.model.specification import LinkedFactorModel  # noqa: E402
from debtsim.risk import expected_shortfall, value_at_risk  # noqa: E402

BASELINE = "plain MC"


def build_book(n: int, links: int, seed: int = 7) -> Book:
    """A heterogeneous book: log-normal PDs (0.03%-20%), IRB-style R, log-normal EAD."""
    rng = np.random.default_rng(seed)
    pd = np.clip(np.exp(rng.normal(np.log(0.01), 1.0, n)), 3e-4, 0.2)
    w = (1 - np.exp(-50 * pd)) / (1 - np.exp(-50))
    r = 0.12 * w + 0.24 * (1 - w)
    ead = np.round(np.exp(rng.normal(0, 1, n)) * 1e6, 2)
    lgd = rng.uniform(0.25, 0.65, n)
    obligors = tuple(
        Obligor(id=f"F{i:05d}", ead=float(ead[i]), pd=float(pd[i]), lgd=float(lgd[i]),
                asset_correlation=float(r[i]))
        for i in range(n)
    )
    creditor = rng.integers(0, n, links)
    debtor = rng.integers(0, n - 1, links)
    debtor = debtor + (debtor >= creditor)
    q = rng.uniform(0.05, 0.4, links)
    lk = tuple(
        Link(creditor=obligors[c].id, debtor=obligors[d].id, contagion=float(x))
        for c, d, x in zip(creditor, debtor, q, strict=True)
    )
    return Book(name=f"bench {n}/{links}", currency="EUR", obligors=obligors, links=lk)


def timed(engine: SampleEngine, model: LinkedFactorModel):
    """Run ``engine`` on ``model``; return (law, wall seconds, process CPU seconds)."""
    t0, c0 = time.perf_counter(), time.process_time()
    law = engine.run(model)
    return law, time.perf_counter() - t0, time.process_time() - c0


def variance_table(
    model: LinkedFactorModel, label: str, seeds: int, samples: int, workers: int
) -> None:
    names = ("EL", "VaR 0.99", "ES 0.99", "VaR 0.999", "ES 0.999")
    results: dict[bool, np.ndarray] = {}
    seconds: dict[bool, float] = {}
    cpu: dict[bool, float] = {}
    for importance in (False, True):
        rows = []
        t0, c0 = time.perf_counter(), time.process_time()
        for s in range(seeds):
            law = SampleEngine(samples=samples, seed=1000 + s, importance=importance,
                               workers=workers).run(model)
            rows.append((law.mean, value_at_risk(law, 0.99), expected_shortfall(law, 0.99),
                         value_at_risk(law, 0.999), expected_shortfall(law, 0.999)))
        seconds[importance] = time.perf_counter() - t0
        cpu[importance] = time.process_time() - c0
        results[importance] = np.array(rows)
    plain, tilted = results[False], results[True]
    print(f"\n  {label}: {seeds} seeds x {samples:,} scenarios each "
          f"({BASELINE} {seconds[False]:.1f} s wall / {cpu[False]:.1f} s CPU, "
          f"IS {seconds[True]:.1f} s / {cpu[True]:.1f} s in all)")
    print(f"  {'measure':<10} {BASELINE + ' mean':>16} {BASELINE + ' sd':>14} {'IS mean':>14} "
          f"{'IS sd':>12} {'variance ratio':>15} {'per CPU-s':>10}")
    cost = cpu[True] / cpu[False]
    for j, name in enumerate(names):
        vp, vi = plain[:, j].var(ddof=1), tilted[:, j].var(ddof=1)
        ratio = vp / vi if vi > 0 else float("inf")
        print(f"  {name:<10} {plain[:, j].mean():>16,.0f} {np.sqrt(vp):>14,.0f} "
              f"{tilted[:, j].mean():>14,.0f} {np.sqrt(vi):>12,.0f} {ratio:>14.1f}x "
              f"{ratio / cost:>9.1f}x")


def speed_table(model: LinkedFactorModel, label: str, samples: int, workers: int) -> None:
    print(f"\n  {label}: {samples:,} scenarios, {workers} worker thread(s)")
    print(f"  {'method':<12} {'wall s':>8} {'CPU s':>8} {'scenarios/s':>12} "
          f"{'wall vs ' + BASELINE:>18}")
    base = None
    for importance, name in ((False, BASELINE), (True, "IS (default)")):
        engine = SampleEngine(samples=samples, seed=1, importance=importance, workers=workers)
        _, wall, cpu = timed(engine, model)
        base = wall if base is None else base
        print(f"  {name:<12} {wall:>8.1f} {cpu:>8.1f} {samples / wall:>12,.0f} "
              f"{wall / base:>17.2f}x")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--samples", type=int, default=20_000)
    parser.add_argument("--big", type=int, default=1_000_000)
    parser.add_argument("--wide", type=int, default=200_000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--sections", default="123", help="which tables to print, e.g. 23")
    args = parser.parse_args()

    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"debtsim sample engine benchmark ({os.cpu_count()} CPUs, load average {load:.1f} "
          f"at start; baseline: {BASELINE} = same engine, importance sampling off)")

    plain_book = LinkedFactorModel.from_book(build_book(1000, 0))
    linked_book = LinkedFactorModel.from_book(build_book(1000, 3000))
    if "1" in args.sections:
        print("\n(1) importance-sampling variance reduction, 1,000-obligor heterogeneous book")
        print("    variance ratio = variance of plain MC estimates / variance of IS estimates; "
              "per CPU-s also divides by the CPU-time ratio (IS / plain MC)")
        variance_table(plain_book, "no links", args.seeds, args.samples, args.workers)
        variance_table(linked_book, "3,000 links", args.seeds, args.samples, args.workers)
    if "2" in args.sections:
        print("\n(2) speed, 1,000 obligors and 3,000 links")
        speed_table(linked_book, "1,000 obligors, 3,000 links", args.big, args.workers)
    if "3" in args.sections:
        print("\n(3) speed, 20,000 obligors without links")
        wide = LinkedFactorModel.from_book(build_book(20_000, 0, seed=8))
        speed_table(wide, "20,000 obligors", args.wide, args.workers)


if __name__ == "__main__":
    main()
