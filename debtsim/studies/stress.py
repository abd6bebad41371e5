"""Stress testing: run the book and each scenario, compare their risk.

The base book and every scenario run with the same engine options (engine,
samples, seed, shots, levels, copula), so differences between rows come from
the scenario alone.  Runs go in-process or on Dask like sweep points
(:class:`debtsim.studies.execution.Execution`); each run's result travels back as plain
arrays, so where it ran does not change it.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from debtsim.book.records import Book
from debtsim.distribution import LossDistribution
from debtsim.errors import DebtsimError
from debtsim.model.specification import LinkedFactorModel
from debtsim.options import RunOptions
from debtsim.risk import measure_columns, measures
from debtsim.runner import RunResult, run_book
from debtsim.studies.execution import Execution, run_tasks
from debtsim.studies.scenarios import BASE_NAME, Scenario, apply_scenario, folder_name

__all__ = [
    "MOVERS_PER_SCENARIO",
    "StressResult",
    "contribution_movers",
    "default_probability_table",
    "run_stress",
    "scenario_table",
]

@dataclass(frozen=True, eq=False)
class StressResult:
    """The base run and every scenario run.

    Attributes
    ----------
    book : Book
        The unstressed book.
    scenarios : tuple of Scenario
        The base (a neutral scenario named ``base``) first, then the file's.
    runs : tuple of RunResult
        One per scenario, in the same order; each holds its stressed book.
    options : RunOptions
    table : pandas.DataFrame
        ``scenarios.csv``: see :func:`scenario_table`.
    default_probabilities : pandas.DataFrame
        See :func:`default_probability_table`.
    contribution_movers : pandas.DataFrame or None
        See :func:`contribution_movers`.
    failures : tuple of (str, str)
        ``(scenario name, reason)`` of each scenario whose run failed (e.g. a
        shift that breaks a sector correlation matrix); the others are in
        ``scenarios``/``runs`` and the tables.
    execution : str
        Where the runs went.
    seconds : float
        Wall time.

    """

    book: Book
    scenarios: tuple[Scenario, ...]
    runs: tuple[RunResult, ...]
    options: RunOptions
    table: pd.DataFrame
    default_probabilities: pd.DataFrame
    contribution_movers: pd.DataFrame | None
    execution: str
    seconds: float
    failures: tuple[tuple[str, str], ...] = ()

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
    analysis = run_book(stressed, options)
    return {
        "engine": analysis.engine,
        "engine_reason": analysis.engine_reason,
        "distribution": _pack(analysis.loss_distribution),
        "copula": _pack(analysis.copula_distribution),
        "notes": tuple(analysis.notes),
        "allocation": analysis.allocation,
    }


def _rebuild(
    book: Book, scenario: Scenario, options: RunOptions, data: dict[str, Any]
) -> RunResult:
    stressed = book if scenario.name == BASE_NAME else apply_scenario(book, scenario)
    dist = _unpack(data["distribution"])
    assert dist is not None
    copula = _unpack(data["copula"])
    return RunResult(
        book=stressed,
        model=LinkedFactorModel.from_book(stressed),
        options=options,
        engine=data["engine"],
        engine_reason=data["engine_reason"],
        loss_distribution=dist,
        measures=measures(dist, options.levels),
        copula_distribution=copula,
        copula_measures=measures(copula, options.levels) if copula is not None else None,
        notes=tuple(data["notes"]),
        allocation=data.get("allocation"),
    )


def scenario_table(
    names: Sequence[str], analyses: Sequence[RunResult], levels: Sequence[float]
) -> pd.DataFrame:
    """Build the ``scenarios.csv`` table.

    Parameters
    ----------
    names : sequence of str
        Scenario names, base first.
    analyses : sequence of RunResult
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
        {"scenario": name, **a.measures.as_row()}
        for name, a in zip(names, analyses, strict=True)
    ]
    return pd.DataFrame(rows, columns=columns)


def default_probability_table(
    book: Book, names: Sequence[str], analyses: Sequence[RunResult]
) -> pd.DataFrame:
    """Tabulate the final default probability of every obligor under every scenario.

    Parameters
    ----------
    book : Book
        The unstressed book (ids, names, sectors).
    names : sequence of str
        Scenario names, base first.
    analyses : sequence of RunResult
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
        frame[name] = np.asarray(a.loss_distribution.default_probability, dtype=float)
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


#: Obligors listed per scenario in ``contribution_movers.csv``.
MOVERS_PER_SCENARIO = 10


def contribution_movers(
    names: Sequence[str], runs: Sequence[RunResult], top: int = MOVERS_PER_SCENARIO
) -> pd.DataFrame | None:
    """Obligors whose ES contribution at the highest level moved most in each scenario.

    Parameters
    ----------
    names : sequence of str
        Scenario names, the base first.
    runs : sequence of RunResult
        The base run first; each with its contributions.
    top : int
        Obligors kept per scenario.

    Returns
    -------
    DataFrame or None
        ``scenario, id, sector, base, stressed, change, contagion_change`` (amounts: ES
        contributions and their contagion parts), largest ``|change|`` first within each
        scenario; None when a run has no contributions.
    """
    tables = [r.contributions for r in runs]
    if not runs or any(t is None for t in tables) or not runs[0].options.levels:
        return None
    level = runs[0].options.levels[-1]
    col = f"expected_shortfall_{level}"
    base = tables[0]
    assert base is not None
    rows = []
    for name, table in zip(names[1:], tables[1:], strict=True):
        assert table is not None
        change = table[col].to_numpy() - base[col].to_numpy()
        contagion = table[col + "_contagion"].to_numpy() - base[col + "_contagion"].to_numpy()
        order = np.argsort(-np.abs(change), kind="stable")[:top]
        for i in order.tolist():
            rows.append({
                "scenario": name,
                "id": base["id"].iloc[i],
                "sector": table["sector"].iloc[i],
                "base": float(base[col].iloc[i]),
                "stressed": float(table[col].iloc[i]),
                "change": float(change[i]),
                "contagion_change": float(contagion[i]),
            })
    columns = ["scenario", "id", "sector", "base", "stressed", "change", "contagion_change"]
    return pd.DataFrame(rows, columns=columns)


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
        When the base run fails, or every scenario does; the message names
        them.  A scenario that fails while others finish is listed in
        :attr:`StressResult.failures` instead.

    """
    started = time.perf_counter()
    execution = execution or Execution()
    runs = (Scenario(name=BASE_NAME), *scenarios)
    results: list[dict[str, Any] | None] = [None] * len(runs)
    errors: dict[int, str] = {}
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
            errors[index] = text
        else:
            results[index] = outcome
        done += 1
        if progress is not None:
            progress(done, len(runs))

    run_tasks(_evaluate, book, [(s, options) for s in runs], execution, on_result)
    if 0 in errors or (errors and len(errors) == len(runs) - 1 and len(runs) > 1):
        raise DebtsimError(
            "; ".join(f"scenario {runs[i].name!r}: {text}" for i, text in sorted(errors.items()))
        )
    failures = tuple((runs[i].name, text) for i, text in sorted(errors.items()))
    kept = tuple(s for i, s in enumerate(runs) if i not in errors)
    analyses = tuple(
        _rebuild(book, s, options, data)
        for s, data in zip(runs, results, strict=True)
        if data is not None
    )
    names = [s.name for s in kept]
    return StressResult(
        failures=failures,
        book=book,
        scenarios=kept,
        runs=analyses,
        options=options,
        table=scenario_table(names, analyses, options.levels),
        default_probabilities=default_probability_table(book, names, analyses),
        contribution_movers=contribution_movers(names, analyses),
        execution=execution.label,
        seconds=time.perf_counter() - started,
    )
