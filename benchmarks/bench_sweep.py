"""Time a parameter sweep in-process against a local Dask cluster of 2 workers.

Run: ``PYTHONPATH=. .venv/bin/python benchmarks/bench_sweep.py [--book PATH]
[--engine NAME] [--samples N] [--pd-scales ...] [--contagion-scales ...]``

Default: the ``grain_coop`` demo book (60 obligors, lending cycles) with the
``auto`` engine (exact for this book) over ``pd_scale`` in 6 values times ``contagion_scale`` in 4
values (24 points).  The same sweep runs in-process (the baseline,
``in-process``) and with ``Execution(workers=2)`` (a ``LocalCluster`` of 2
worker processes, one thread each); the Dask time includes starting the
cluster and shipping the book.  Both tables must agree exactly.  The ratio
column is baseline time / time (above 1 is faster).
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import pandas as pd

from debtsim.book.loader import load_book
from debtsim.runner import RunOptions
from debtsim.studies.sweep import Execution, GridAxis, run_sweep

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--book", type=Path, default=ROOT / "scenarios" / "grain_coop.yaml")
    parser.add_argument("--engine", default="auto")
    parser.add_argument("--samples", type=int, default=None)
    parser.add_argument("--pd-scales", default="0.5,0.75,1,1.5,2,3")
    parser.add_argument("--contagion-scales", default="0.5,1,1.5,2")
    args = parser.parse_args()

    book = load_book(args.book)
    axes = (
        GridAxis("pd_scale", tuple(float(v) for v in args.pd_scales.split(","))),
        GridAxis("contagion_scale", tuple(float(v) for v in args.contagion_scales.split(","))),
    )
    points = len(axes[0].values) * len(axes[1].values)
    options = RunOptions(engine=args.engine, samples=args.samples, copula=False)
    print(
        f"book {args.book.name}: {len(book.obligors)} obligors, {len(book.links)} links; "
        f"grid {points} points; engine {args.engine}"
        + (f", samples {args.samples}" if args.samples else "")
        + f"; {os.cpu_count()} CPUs"
    )

    runs: list[tuple[str, float, pd.DataFrame]] = []
    with tempfile.TemporaryDirectory() as tmp:
        for label, execution in (
            ("in-process", Execution()),
            ("--workers 2", Execution(workers=2)),
        ):
            t0 = time.perf_counter()
            result = run_sweep(
                book,
                axes,
                options,
                Path(tmp) / label.strip("-").replace(" ", ""),
                execution=execution,
            )
            wall = time.perf_counter() - t0
            per_point = [p["seconds"] for p in result.points if p.get("seconds")]
            runs.append((label, wall, result.table))
            print(
                f"  ran {label}: {wall:.2f} s, engines "
                f"{sorted({p['engine'] for p in result.points})}, "
                f"mean point time {sum(per_point) / len(per_point):.3f} s"
            )

    base_label, base_time, base_table = runs[0]
    print()
    print(f"{'execution':<14}{'wall s':>10}{'points/s':>11}{'ratio vs ' + base_label:>22}")
    for label, wall, table in runs:
        same = table.equals(base_table)
        print(
            f"{label:<14}{wall:>10.2f}{points / wall:>11.2f}{base_time / wall:>22.2f}"
            + ("" if same else "   TABLE DIFFERS")
        )
    print("\nratio = in-process wall time / wall time (includes Dask cluster start-up)")


if __name__ == "__main__":
    main()
