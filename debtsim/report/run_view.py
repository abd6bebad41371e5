"""What the report layer reads from a finished run.

The report renders runs; it never imports the run step that makes them.  A
:class:`~debtsim.runner.RunResult` satisfies this protocol.
"""

from __future__ import annotations

from typing import Protocol

import pandas as pd

from debtsim.book.records import Book
from debtsim.contributions import Allocation
from debtsim.distribution import LossDistribution
from debtsim.model.specification import LinkedFactorModel
from debtsim.options import RunOptions
from debtsim.risk import RiskMeasures

__all__ = ["RunView"]


class RunView(Protocol):
    """A finished run, read-only: book, model, options, engine, distributions, measures."""

    @property
    def book(self) -> Book:
        """The book as loaded."""

    @property
    def model(self) -> LinkedFactorModel:
        """The model built from the book."""

    @property
    def options(self) -> RunOptions:
        """What was asked of the run."""

    @property
    def engine(self) -> str:
        """Name of the engine that ran."""

    @property
    def engine_reason(self) -> str:
        """Why it was chosen."""

    @property
    def loss_distribution(self) -> LossDistribution:
        """Loss distribution with contagion."""

    @property
    def measures(self) -> RiskMeasures:
        """Risk measures of the loss distribution."""

    @property
    def copula_distribution(self) -> LossDistribution | None:
        """The same book without links (Gaussian copula), when computed."""

    @property
    def copula_measures(self) -> RiskMeasures | None:
        """Risk measures without links, when computed."""

    @property
    def notes(self) -> tuple[str, ...]:
        """Model warnings for the reader."""

    @property
    def obligors(self) -> pd.DataFrame:
        """Per-obligor results, the columns of ``obligors.csv``."""

    @property
    def allocation(self) -> Allocation | None:
        """Euler risk contributions, when computed."""

    @property
    def contributions(self) -> pd.DataFrame | None:
        """Per-obligor contributions, the columns of ``contributions.csv``."""

    @property
    def sector_contributions(self) -> pd.DataFrame | None:
        """Contributions by sector, the columns of ``sectors.csv``."""
