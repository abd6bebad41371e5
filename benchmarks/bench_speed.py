"""Speed table of issue 11: today's engines (named baseline) against the current ones.

Baseline: ``benchmarks/baseline/`` holds the exact and sample engines and the
group law as they were on main before issue 11 ("baseline", frozen copies).
Each row runs every engine in its own child process (so peak memory is that
run's alone) on the same seeded book from :mod:`speed_books`, and prints

* wall and CPU seconds of ``engine.run`` (the machine is shared: CPU time is
  the steadier figure; ratios are what count),
* the child's peak resident memory (book included) and the part of it added
  by the run,
* the ratio baseline / current, and
* the largest difference between the two engines in EL, VaR and ES at 99%
  and 99.9%, next to the current engine's ``discretisation_error`` (exact
  engine) or the VaR standard error (sampler).

Rows whose baseline takes many minutes (1,000,000 obligors) run the baseline
only with ``--slow-baselines``.  Usage::

    OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_speed.py [--rows NAME ...]
        [--slow-baselines] [--samples 1000000]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

LEVELS = (0.99, 0.999)

#: name -> (book generator, size, engine kind, whether the baseline is slow)
ROWS: dict[str, tuple[str, int, str, bool]] = {
    "exact-100k-all-different": ("all_different", 100_000, "exact", False),
    "exact-1m-all-different": ("all_different", 1_000_000, "exact", True),
    "exact-1m-20-grades": ("rating_grades", 1_000_000, "exact", True),
    "sample-1000-3000-plain": ("linked", 1000, "sample-plain", False),
    "sample-1000-3000-importance": ("linked", 1000, "sample-importance", False),
    "exact-cycle-14": ("lending_cycle", 14, "exact", False),
    "exact-cycle-18": ("lending_cycle", 18, "exact", True),
}


def _engine(kind: str, which: str, samples: int) -> Any:
    if kind == "exact":
        if which == "baseline":
            from baseline.exact_engine import ExactEngine as Old

            return Old(max_component_size=18)
        from debtsim.engines.exact.engine import ExactEngine

        return ExactEngine()
    importance = kind == "sample-importance"
    if which == "baseline":
        from baseline.sample_engine import SampleEngine as OldSample

        return OldSample(samples=samples, seed=2026, importance=importance)
    from debtsim.engines.sample.engine import SampleEngine

    return SampleEngine(samples=samples, seed=2026, importance=importance)


def run_one(row: str, which: str, samples: int) -> dict[str, Any]:
    """Build the row's book, run one engine, return timings, memory and figures."""
    import speed_books

    from debtsim.risk import expected_shortfall, level_key, value_at_risk

    maker, size, kind, _ = ROWS[row]
    model = getattr(speed_books, maker)(size)
    warmup = None
    if kind.startswith("sample") and which == "current":
        # first call: numba loads (or compiles) its kernels; timed apart from the run
        t0 = time.perf_counter()
        _engine(kind, which, 5000).run(model)
        warmup = time.perf_counter() - t0
    engine = _engine(kind, which, samples)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    wall, cpu = time.perf_counter(), time.process_time()
    dist = engine.run(model)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    diag = dist.diagnostics or {}
    se = diag.get("var_standard_error", {}) or {}
    return {
        "wall": wall,
        "cpu": cpu,
        "peak_mb": peak / 1024.0,
        "added_mb": (peak - rss_before) / 1024.0,
        "el": float(dist.mean),
        "var": {str(a): value_at_risk(dist, a) for a in LEVELS},
        "es": {str(a): expected_shortfall(dist, a) for a in LEVELS},
        "error": diag.get("discretisation_error"),
        "var_se": {str(a): se.get(level_key(a)) for a in LEVELS},
        "es_se": {str(a): (diag.get("expected_shortfall_standard_error", {}) or {}).get(
            level_key(a)) for a in LEVELS},
        "el_se": diag.get("expected_loss_standard_error"),
        "warmup": warmup,
    }


def _child(row: str, which: str, samples: int) -> dict[str, Any] | None:
    cmd = [sys.executable, __file__, "--one", row, which, "--samples", str(samples)]
    out = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if out.returncode != 0:
        print(f"  {row} {which}: failed: {out.stderr.strip().splitlines()[-1:]}", flush=True)
        return None
    return json.loads(out.stdout.strip().splitlines()[-1])


def _largest_difference(a: dict[str, Any], b: dict[str, Any]) -> dict[str, float]:
    return {
        "EL": abs(a["el"] - b["el"]),
        "VaR": max(abs(a["var"][k] - b["var"][k]) for k in a["var"]),
        "ES": max(abs(a["es"][k] - b["es"][k]) for k in a["es"]),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", nargs="*", default=list(ROWS))
    parser.add_argument("--slow-baselines", action="store_true")
    parser.add_argument("--samples", type=int, default=1_000_000)
    parser.add_argument("--one", nargs=2, metavar=("ROW", "ENGINE"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        print(json.dumps(run_one(args.one[0], args.one[1], args.samples)))
        return
    print(f"{'row':<30}{'engine':<10}{'wall s':>9}{'cpu s':>9}{'peak MB':>9}{'added MB':>9}"
          f"{'ratio':>8}   largest difference (EL / VaR / ES) and stated error")
    for row in args.rows:
        slow = ROWS[row][3]
        current = _child(row, "current", args.samples)
        base = _child(row, "baseline", args.samples) if args.slow_baselines or not slow else None
        for which, res in (("baseline", base), ("current", current)):
            if res is None:
                continue
            ratio = ""
            note = ""
            if which == "current" and base is not None:
                ratio = f"{base['cpu'] / max(res['cpu'], 1e-9):.1f}x"
                d = _largest_difference(base, res)
                note = f"{d['EL']:.4g} / {d['VaR']:.4g} / {d['ES']:.4g}"
            if which == "current":
                if res["error"] is not None:
                    note += f"  (discretisation error {res['error']:.4g})"
                elif res["var_se"].get("0.999") is not None:
                    note += (f"  (s.e. EL {res['el_se']:.4g}, VaR99 {res['var_se']['0.99']:.4g}"
                             f", VaR99.9 {res['var_se']['0.999']:.4g}"
                             f", ES99.9 {res['es_se']['0.999']:.4g})")
                if res.get("warmup") is not None:
                    note += f"  [warm-up of 5,000 scenarios first: {res['warmup']:.2f} s]"
            print(f"{row:<30}{which:<10}{res['wall']:>9.2f}{res['cpu']:>9.2f}"
                  f"{res['peak_mb']:>9.0f}{res['added_mb']:>9.0f}{ratio:>8}   {note}", flush=True)


if __name__ == "__main__":
    main()
