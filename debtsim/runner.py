"""The run step: choose an engine, compute the loss distribution, measure the risk.

Data flows one way: book -> model -> engine -> risk.  The result,
:class:`RunResult`, holds everything a report needs; writing it is the
report layer's job (:meth:`RunResult.write` hands it over).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from debtsim.book.loader import OBLIGOR_FIELDS
from debtsim.book.records import Book
from debtsim.contributions import Allocation, contribution_table, sector_table
from debtsim.distribution import LossDistribution
from debtsim.engines import ProgressHook, choose_engine
from debtsim.engines.allocation import run_with_contributions
from debtsim.link_effects import obligor_contagion
from debtsim.model.specification import LinkedFactorModel
from debtsim.options import RunOptions
from debtsim.risk import RiskMeasures, measures

__all__ = ["OBLIGOR_COLUMNS", "ProgressFactory", "RunResult", "run_book"]

#: Makes a progress hook for a named stage ("model", "copula"); may return None.
ProgressFactory = Callable[[str], ProgressHook | None]

#: Columns of ``obligors.csv`` and :attr:`RunResult.obligors`: the book's fields, the
#: contract's two results, then the contagion uplift and (sampled runs) its error.
OBLIGOR_COLUMNS: tuple[str, ...] = (
    *OBLIGOR_FIELDS,
    "default_probability",
    "expected_loss",
    "contagion_uplift",
    "default_probability_standard_error",
)

#: Above this relative PD error of the circuit's factor nodes, the run carries a note.
NODE_ERROR_NOTE = 0.01


@dataclass(frozen=True, eq=False)
class RunResult:
    """One finished run of a book.

    Attributes
    ----------
    book : Book
        The book as loaded.
    model : LinkedFactorModel
        The model built from it.
    options : RunOptions
        What was asked.
    engine : str
        Name of the engine that ran.
    engine_reason : str
        Why it was chosen.
    loss_distribution : LossDistribution
        Loss distribution with contagion; ``.to_frame()`` gives
        ``loss, probability``.
    measures : RiskMeasures
        EL, loss std, and VaR, ES, economic capital keyed by float level.
    copula_distribution, copula_measures : LossDistribution, RiskMeasures or None
        The same book without links (Gaussian copula); None when not asked.
    notes : tuple of str
        Model warnings for the reader (e.g. coarse factor nodes).
    allocation : Allocation or None
        Euler risk contributions of every obligor (None when not asked or
        not available, i.e. the circuit engine with shots).
    """

    book: Book
    model: LinkedFactorModel
    options: RunOptions
    engine: str
    engine_reason: str
    loss_distribution: LossDistribution
    measures: RiskMeasures
    copula_distribution: LossDistribution | None = None
    copula_measures: RiskMeasures | None = None
    notes: tuple[str, ...] = field(default=())
    allocation: Allocation | None = None

    @property
    def diagnostics(self) -> Mapping[str, Any]:
        """Error estimates and checks of the engine that ran (read-only)."""
        return self.loss_distribution.diagnostics

    @cached_property
    def obligors(self) -> pd.DataFrame:
        """One row per obligor in book order, the columns of ``obligors.csv``."""
        return obligor_table(self.book, self.loss_distribution)

    @cached_property
    def contributions(self) -> pd.DataFrame | None:
        """Risk contributions, one row per obligor: the columns of ``contributions.csv``.

        ``id, sector, expected_loss, loss_std``, per level ``var_<a>,
        expected_shortfall_<a>, economic_capital_<a>``, each measure again
        with ``_contagion`` (the part carried by defaults along links), then
        ``irb_capital``.  None when the run allocated nothing.
        """
        if self.allocation is None:
            return None
        return contribution_table(self.book, self.allocation)

    @cached_property
    def sector_contributions(self) -> pd.DataFrame | None:
        """The contributions summed by sector: the columns of ``sectors.csv``."""
        table = self.contributions
        return None if table is None else sector_table(table)

    def write(self, out_dir: Path | str) -> Path:
        """Write ``summary.json``, the CSV files and ``report.html`` into ``out_dir``.

        Exactly the files ``debtsim run`` writes, atomically: an existing
        folder is replaced only when it is a previous debtsim output.

        Raises
        ------
        OutputError
            When ``out_dir`` cannot be written; nothing there is changed then.
        """
        from debtsim.report import write_run

        return write_run(self, out_dir)


def obligor_table(book: Book, dist: LossDistribution) -> pd.DataFrame:
    """Per-obligor results in book order, columns :data:`OBLIGOR_COLUMNS`.

    ``default_probability_standard_error`` is NaN where the distribution is
    exact.
    """
    oc = obligor_contagion(book, dist.default_probability)
    errors = dist.diagnostics.get("default_probability_standard_error")
    n = len(book.obligors)
    data: dict[str, Any] = {
        name: [getattr(o, name) for o in book.obligors] for name in OBLIGOR_FIELDS
    }
    for name in ("ead", "pd", "lgd", "asset_correlation"):
        data[name] = np.asarray(data[name], dtype=float)
    data["default_probability"] = np.asarray(oc.default_probability, dtype=float)
    data["expected_loss"] = np.asarray(oc.expected_loss, dtype=float)
    data["contagion_uplift"] = np.asarray(oc.contagion_uplift, dtype=float)
    data["default_probability_standard_error"] = (
        np.full(n, np.nan) if errors is None else np.asarray(errors, dtype=float)
    )
    return pd.DataFrame(data, columns=list(OBLIGOR_COLUMNS))


def run_book(
    book: Book,
    options: RunOptions | None = None,
    progress: ProgressFactory | None = None,
) -> RunResult:
    """Run the model of ``book`` and measure its risk.

    Parameters
    ----------
    book : Book
        A validated book.
    options : RunOptions, optional
        Engine, samples, seed, levels; defaults when omitted.
    progress : callable, optional
        ``progress(stage)`` returns a hook the engine reports progress to.

    Returns
    -------
    RunResult

    Raises
    ------
    EngineRefusedError
        When the requested engine cannot run the book.
    """
    options = options or RunOptions()
    model = LinkedFactorModel.from_book(book)
    choice = choose_engine(options.engine, model, options)
    hook = progress("model") if progress else None
    allocation: Allocation | None = None
    if options.contributions and not (choice.engine.name == "circuit" and options.shots):
        dist, allocation = run_with_contributions(
            choice.engine, model, options.levels, progress=hook
        )
    else:
        dist = choice.engine.run(model, progress=hook)
    copula_dist = copula_measures = None
    if options.copula:
        if model.n_links == 0:
            copula_dist = dist  # without links the book is its own comparison
        else:
            copula_dist = choice.engine.run_without_links(
                model, progress=progress("copula") if progress else None
            )
        copula_measures = measures(copula_dist, options.levels)
    return RunResult(
        book=book,
        model=model,
        options=options,
        engine=choice.engine.name,
        engine_reason=choice.reason,
        loss_distribution=dist,
        measures=measures(dist, options.levels),
        copula_distribution=copula_dist,
        copula_measures=copula_measures,
        notes=model_notes(dist) + unused_option_notes(options, choice.engine.name),
        allocation=allocation,
    )


def model_notes(dist: LossDistribution) -> tuple[str, ...]:
    """Warnings for the reader that the distribution's own diagnostics call for."""
    notes = []
    node_error = float(dist.diagnostics.get("factor_node_pd_error", 0.0))
    if node_error > NODE_ERROR_NOTE:
        nodes = dist.settings.get("factor_nodes", "its")
        notes.append(
            f"The circuit's {nodes} factor nodes reproduce an obligor's PD only to within "
            f"{node_error:.1%} (high asset correlation makes the conditional PD nearly a step); "
            "raise model.factor_qubits or use the exact engine, which places its nodes where "
            "the conditional distribution moves."
        )
    if dist.samples is not None and dist.diagnostics.get("expected_loss_standard_error", 0) is None:
        notes.append(
            f"Every one of the {dist.samples:,} sampled scenarios gave the same loss, so the "
            "sampling error of these figures cannot be estimated; raise the number of samples."
        )
    return tuple(notes)


def unused_option_notes(options: RunOptions, engine: str) -> tuple[str, ...]:
    """Say which options the engine that ran does not use (so none is ignored silently)."""
    notes = []
    if options.shots is not None and engine != "circuit":
        notes.append(f"shots ({options.shots:,}) apply to the circuit engine only; "
                     f"the {engine} engine ran and did not use them.")
    if options.samples is not None and engine != "sample":
        notes.append(f"samples ({options.samples:,}) apply to the sample engine only; "
                     f"the {engine} engine ran and did not use them.")
    return tuple(notes)

