"""The folders a stress test and a sweep write: tables, summary, charts and page.

The studies compute (:mod:`debtsim.studies`); this module writes what they
return, atomically, like a run's folder.
"""

from __future__ import annotations

import math
import shutil
from pathlib import Path
from typing import Any

from debtsim.output_files import atomic_output_dir, generator, write_csv, write_json
from debtsim.report import write_run
from debtsim.report.study_pages import sweep_charts, write_stress_report, write_sweep_report
from debtsim.risk import level_key
from debtsim.studies.stress import StressResult
from debtsim.studies.sweep import SWEEP_KIND, SweepResult, partial_dir

__all__ = ["write_stress", "write_sweep"]


def write_stress(result: StressResult, out_dir: Path | str, *, source: str = "") -> Path:
    """Write the stress folder atomically.

    ``scenarios.csv``, ``default_probabilities.csv``, ``contribution_movers.csv``
    (when the runs allocated their risk), ``summary.json`` (marker
    and overview), ``report.html`` and one sub-folder per run (``base`` first)
    with that run's usual files.

    Parameters
    ----------
    result : StressResult
        From :func:`run_stress`.
    out_dir : path-like
        The final folder.
    source : str
        The scenario file, for the record.

    Returns
    -------
    Path
        The folder written.

    """
    out_dir = Path(out_dir)
    with atomic_output_dir(out_dir) as tmp:
        for folder, analysis in zip(result.folders, result.runs, strict=True):
            write_run(analysis, tmp / folder)
        table = result.table
        write_csv(
            tmp / "scenarios.csv",
            list(table.columns),
            list(table.itertuples(index=False, name=None)),
        )
        dp = result.default_probabilities
        write_csv(
            tmp / "default_probabilities.csv",
            list(dp.columns),
            list(dp.itertuples(index=False, name=None)),
        )
        movers = result.contribution_movers
        if movers is not None:
            write_csv(
                tmp / "contribution_movers.csv",
                list(movers.columns),
                list(movers.itertuples(index=False, name=None)),
            )
        write_json(tmp / "summary.json", _stress_summary(result, generator(), source))
        write_stress_report(tmp / "report.html", result)
    return out_dir


def _stress_summary(result: StressResult, marker: str, source: str) -> dict[str, Any]:
    o = result.options
    return {
        "kind": "stress",
        "generator": marker,
        "book": result.book.name,
        "book_source": result.book.source,
        "scenario_file": source,
        "currency": result.book.currency,
        "obligors": len(result.book.obligors),
        "links": len(result.book.links),
        "engine": o.engine,
        "samples": o.samples,
        "seed": o.seed,
        "shots": o.shots,
        "levels": [level_key(a) for a in o.levels],
        "execution": result.execution,
        "seconds": result.seconds,
        "scenarios": [
            {
                "name": s.name,
                "folder": folder,
                "changes": s.describe(),
                "engine": a.engine,
                "measures": a.measures.to_dict(),
            }
            for s, folder, a in zip(result.scenarios, result.folders, result.runs, strict=True)
        ],
        "failed_scenarios": [{"name": name, "error": why} for name, why in result.failures],
    }


def write_sweep(result: SweepResult, out_dir: Path | str) -> Path:
    """Write the sweep's folder atomically and drop its work folder.

    Writes ``sweep.csv``, ``sweep.parquet``, ``summary.json`` (the marker with
    grid, options, counts and per-point seeds), ``charts/*.png`` and
    ``report.html``.

    Parameters
    ----------
    result : SweepResult
        From :func:`run_sweep`.
    out_dir : path-like
        The final folder.

    Returns
    -------
    Path
        The folder written.

    """
    out_dir = Path(out_dir)
    table = result.table
    with atomic_output_dir(out_dir) as tmp:
        rows = [
            [None if isinstance(v, float) and math.isnan(v) else v for v in row]
            for row in table.itertuples(index=False, name=None)
        ]
        write_csv(tmp / "sweep.csv", list(table.columns), rows)
        table.to_parquet(tmp / "sweep.parquet", index=False)
        charts = sweep_charts(table, result.axes, result.options.levels, result.book.currency)
        (tmp / "charts").mkdir()
        for name, png in charts.items():
            (tmp / "charts" / f"{name}.png").write_bytes(png)
        write_json(tmp / "summary.json", _sweep_summary(result, generator()))
        write_sweep_report(tmp / "report.html", result, charts)
    shutil.rmtree(partial_dir(out_dir), ignore_errors=True)
    return out_dir


def _sweep_summary(result: SweepResult, marker: str) -> dict[str, Any]:
    o = result.options
    engines = sorted({p["engine"] for p in result.points if p.get("engine")})
    return {
        "kind": SWEEP_KIND,
        "generator": marker,
        "book": result.book.name,
        "book_source": result.book.source,
        "currency": result.book.currency,
        "obligors": len(result.book.obligors),
        "links": len(result.book.links),
        "grid": {a.name: list(a.values) for a in result.axes},
        "points": len(result.table),
        "failed": result.failed,
        "computed": result.computed,
        "reused": result.reused,
        "execution": result.execution,
        "seconds": result.seconds,
        "engine": o.engine,
        "engines_used": engines,
        "samples": o.samples,
        "seed": o.seed,
        "shots": o.shots,
        "levels": [level_key(a) for a in o.levels],
        "seed_rule": "each point's seed is sha256('debtsim-sweep|<seed>|<point key>') "
        "modulo 2**31-1 (debtsim.studies.sweep.point_seed)",
        "fingerprint": result.fingerprint,
        "point_engines": {p["key"]: p.get("engine", "") for p in result.points},
        "warnings": sorted({w for p in result.points for w in p.get("warnings", [])}),
    }
