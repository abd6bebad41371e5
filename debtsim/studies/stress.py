"""Stress testing: run the book and each scenario, compare their risk.

The base book and every scenario run with the same engine options (engine,
samples, seed, shots, levels, copula), so differences between rows come from
the scenario alone.  Runs go in-process or on Dask like sweep points
(:class:`debtsim.studies.sweep.Execution`); each run's result travels back as plain
arrays, so where it ran does not change it.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from debtsim.book.records import Book
from debtsim.distribution import LossDistribution
from debtsim.errors import DebtsimError
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import level_key, measures
from debtsim.runner import Analysis, RunOptions, analyse
from debtsim.studies.scenarios import BASE_NAME, Scenario, apply_scenario, folder_name
from debtsim.studies.sweep import Execution, measure_columns, measure_row, run_tasks

__all__ = [
    "MOVERS_SHOWN",
    "StressResult",
    "default_probability_table",
    "run_stress",
    "scenario_table",
    "write_stress",
]

#: Obligors listed in the report's "default probabilities that moved most".
MOVERS_SHOWN = 15


@dataclass(frozen=True, eq=False)
class StressResult:
    """The base run and every scenario run.

    Attributes
    ----------
    book : Book
        The unstressed book.
    scenarios : tuple of Scenario
        The base (a neutral scenario named ``base``) first, then the file's.
    analyses : tuple of Analysis
        One per scenario, in the same order; each holds its stressed book.
    options : RunOptions
    table : pandas.DataFrame
        ``scenarios.csv``: see :func:`scenario_table`.
    default_probabilities : pandas.DataFrame
        See :func:`default_probability_table`.
    execution : str
        Where the runs went.
    seconds : float
        Wall time.

    """

    book: Book
    scenarios: tuple[Scenario, ...]
    analyses: tuple[Analysis, ...]
    options: RunOptions
    table: pd.DataFrame
    default_probabilities: pd.DataFrame
    execution: str
    seconds: float

    @property
    def folders(self) -> tuple[str, ...]:
        """Sub-folder name of each run."""
        return tuple(folder_name(s.name) for s in self.scenarios)


def _pack(dist: LossDistribution | None) -> dict[str, Any] | None:
    if dist is None:
        return None
    return {
        "losses": np.asarray(dist.losses),
        "probabilities": np.asarray(dist.probabilities),
        "default_probability": np.asarray(dist.default_probability),
        "engine": dist.engine,
        "samples": dist.samples,
        "seed": dist.seed,
        "settings": dict(dist.settings),
        "diagnostics": dict(dist.diagnostics),
    }


def _unpack(data: dict[str, Any] | None) -> LossDistribution | None:
    return None if data is None else LossDistribution(**data)


def _evaluate(book: Book, task: tuple[Scenario, RunOptions]) -> dict[str, Any]:
    """Run one scenario; the result as picklable plain data."""
    scenario, options = task
    stressed = book if scenario.name == BASE_NAME else apply_scenario(book, scenario)
    analysis = analyse(stressed, options)
    return {
        "engine": analysis.engine,
        "engine_reason": analysis.engine_reason,
        "distribution": _pack(analysis.distribution),
        "copula": _pack(analysis.copula_distribution),
        "notes": tuple(analysis.notes),
    }


def _rebuild(book: Book, scenario: Scenario, options: RunOptions, data: dict[str, Any]) -> Analysis:
    stressed = book if scenario.name == BASE_NAME else apply_scenario(book, scenario)
    dist = _unpack(data["distribution"])
    assert dist is not None
    copula = _unpack(data["copula"])
    return Analysis(
        book=stressed,
        model=LinkedFactorModel.from_book(stressed),
        options=options,
        engine=data["engine"],
        engine_reason=data["engine_reason"],
        distribution=dist,
        measures=measures(dist, options.levels),
        copula_distribution=copula,
        copula_measures=measures(copula, options.levels) if copula is not None else None,
        notes=tuple(data["notes"]),
    )


def scenario_table(
    names: Sequence[str], analyses: Sequence[Analysis], levels: Sequence[float]
) -> pd.DataFrame:
    """Build the ``scenarios.csv`` table.

    Parameters
    ----------
    names : sequence of str
        Scenario names, base first.
    analyses : sequence of Analysis
        One per name.
    levels : sequence of float
        Confidence levels.

    Returns
    -------
    pandas.DataFrame
        Columns ``scenario``, then :func:`debtsim.studies.sweep.measure_columns`.

    """
    columns = ["scenario", *measure_columns(levels)]
    rows = [
        {"scenario": name, **measure_row(a.measures, levels)}
        for name, a in zip(names, analyses, strict=True)
    ]
    return pd.DataFrame(rows, columns=columns)


def default_probability_table(
    book: Book, names: Sequence[str], analyses: Sequence[Analysis]
) -> pd.DataFrame:
    """Tabulate the final default probability of every obligor under every scenario.

    Parameters
    ----------
    book : Book
        The unstressed book (ids, names, sectors).
    names : sequence of str
        Scenario names, base first.
    analyses : sequence of Analysis
        One per name.

    Returns
    -------
    pandas.DataFrame
        ``id``, ``name``, ``sector``, ``pd`` (the book's own PD), one column
        per scenario with the final (contagion included) default probability,
        and ``largest_change``: the largest absolute change from the base over
        the scenarios (signed).  Sorted by the size of that change, largest
        first; ties keep book order.

    """
    frame = pd.DataFrame(
        {
            "id": [o.id for o in book.obligors],
            "name": [o.name for o in book.obligors],
            "sector": [o.sector for o in book.obligors],
            "pd": [float(o.pd) for o in book.obligors],
        }
    )
    for name, a in zip(names, analyses, strict=True):
        frame[name] = np.asarray(a.distribution.default_probability, dtype=float)
    base = frame[names[0]].to_numpy()
    if len(names) > 1:
        changes = np.column_stack([frame[n].to_numpy() - base for n in names[1:]])
        pick = np.argmax(np.abs(changes), axis=1)
        largest = changes[np.arange(len(frame)), pick]
    else:
        largest = np.zeros(len(frame))
    frame["largest_change"] = largest
    order = np.argsort(-np.abs(largest), kind="stable")
    return frame.iloc[order].reset_index(drop=True)


def run_stress(
    book: Book,
    scenarios: Sequence[Scenario],
    options: RunOptions,
    *,
    execution: Execution | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> StressResult:
    """Run the base book and each scenario with the same options.

    Parameters
    ----------
    book : Book
        The unstressed book.
    scenarios : sequence of Scenario
        From :func:`debtsim.studies.scenarios.load_scenarios`.
    options : RunOptions
        Engine options shared by every run.
    execution : Execution, optional
        In-process when omitted.
    progress : callable, optional
        ``progress(done, total)`` over runs.

    Returns
    -------
    StressResult

    Raises
    ------
    DebtsimError
        When any run fails (e.g. the requested engine refuses a stressed
        book); the message names the scenario.

    """
    started = time.perf_counter()
    execution = execution or Execution()
    runs = (Scenario(name=BASE_NAME), *scenarios)
    results: list[dict[str, Any] | None] = [None] * len(runs)
    errors: list[str] = []
    done = 0
    if progress is not None:
        progress(0, len(runs))

    def on_result(index: int, outcome: dict[str, Any] | BaseException) -> None:
        nonlocal done
        if isinstance(outcome, BaseException):
            text = (
                str(outcome)
                if isinstance(outcome, DebtsimError)
                else (f"{type(outcome).__name__}: {outcome}")
            )
            errors.append(f"scenario {runs[index].name!r}: {text}")
        else:
            results[index] = outcome
        done += 1
        if progress is not None:
            progress(done, len(runs))

    run_tasks(_evaluate, book, [(s, options) for s in runs], execution, on_result)
    if errors:
        raise DebtsimError("; ".join(errors))
    analyses = tuple(
        _rebuild(book, s, options, data)
        for s, data in zip(runs, results, strict=True)
        if data is not None
    )
    names = [s.name for s in runs]
    return StressResult(
        book=book,
        scenarios=runs,
        analyses=analyses,
        options=options,
        table=scenario_table(names, analyses, options.levels),
        default_probabilities=default_probability_table(book, names, analyses),
        execution=execution.label,
        seconds=time.perf_counter() - started,
    )


def write_stress(result: StressResult, out_dir: Path | str, *, source: str = "") -> Path:
    """Write the stress folder atomically.

    ``scenarios.csv``, ``default_probabilities.csv``, ``summary.json`` (marker
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
    from debtsim.report import write_run
    from debtsim.report.files import atomic_output_dir, generator, write_csv, write_json
    from debtsim.report.study_pages import write_stress_report

    out_dir = Path(out_dir)
    with atomic_output_dir(out_dir) as tmp:
        for folder, analysis in zip(result.folders, result.analyses, strict=True):
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
        write_json(tmp / "summary.json", _summary(result, generator(), source))
        write_stress_report(tmp / "report.html", result)
    return out_dir


def _summary(result: StressResult, marker: str, source: str) -> dict[str, Any]:
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
            for s, folder, a in zip(result.scenarios, result.folders, result.analyses, strict=True)
        ],
    }
