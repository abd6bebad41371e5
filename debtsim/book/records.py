"""Frozen records of a credit book: obligors, links and the book itself.

Loading and validation live in :mod:`debtsim.book.loader`; this module only holds the
validated, immutable result.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from debtsim.book.dependence import DependenceSpec

__all__ = ["DEFAULT_FACTOR_QUBITS", "MAX_ASSET_CORRELATION", "Book", "Link", "Obligor"]

#: Factor resolution used when the book does not set ``model.factor_qubits``.
DEFAULT_FACTOR_QUBITS = 5

#: Largest asset correlation a book or a stress may give.  Closer to 1 an obligor's
#: conditional PD is a step in the factor so sharp that the exact engine's grid would
#: need tens of thousands of nodes and the circuit's fixed nodes cannot place it; no
#: portfolio calibration comes near (the Basel IRB formulas give at most 0.30).
MAX_ASSET_CORRELATION = 0.999


@dataclass(frozen=True, slots=True)
class Obligor:
    """One firm the lender is exposed to.

    Attributes
    ----------
    id : str
        Unique, non-empty identifier.
    ead : float
        Exposure at default, > 0.
    pd : float
        One-year probability of own default, 0 < pd < 1 in a book (a stress
        scenario may set it to exactly 1).
    lgd : float
        Loss given default, in [0, 1].
    asset_correlation : float
        Loading ``R`` on the systemic factor, in [0, 1).
    name, sector : str
        Optional descriptive text.
    maturity : float
        Effective maturity in years, 1 to 5 (default 2.5); feeds only the
        Basel II IRB yardstick.
    line : int or None
        Line of the record in its source file, for messages.
    """

    id: str
    ead: float
    pd: float
    lgd: float
    asset_correlation: float
    name: str = ""
    sector: str = ""
    maturity: float = 2.5
    line: int | None = field(default=None, compare=False)


@dataclass(frozen=True, slots=True)
class Link:
    """A claim that ``creditor`` holds on ``debtor``.

    If the debtor defaults, the link is live with probability ``contagion``
    and then drags the creditor into default.

    Attributes
    ----------
    creditor, debtor : str
        Obligor ids; distinct.
    contagion : float
        Probability ``q`` in [0, 1] that the link transmits a default.
    amount : float or None
        Size of the claim, reported only.
    line : int or None
        Line of the record in its source file, for messages.
    """

    creditor: str
    debtor: str
    contagion: float
    amount: float | None = None
    line: int | None = field(default=None, compare=False)


@dataclass(frozen=True, slots=True)
class Book:
    """A validated credit book.

    Attributes
    ----------
    name : str
        Free-text title (the YAML ``book`` field).
    currency : str
        Currency code or label; empty when not given.
    obligors : tuple of Obligor
        In file order.
    links : tuple of Link
        In file order.
    factor_qubits : int
        Factor resolution ``k``: the circuit uses ``2**k`` factor nodes.
    source : str
        Path of the book file as the user gave it.
    dependence : DependenceSpec or None
        Sector factors and dependence family from ``model:``; None for the
        one-factor Gaussian model.
    """

    name: str
    currency: str
    obligors: tuple[Obligor, ...]
    links: tuple[Link, ...] = ()
    factor_qubits: int = DEFAULT_FACTOR_QUBITS
    source: str = ""
    dependence: DependenceSpec | None = None

    @property
    def total_exposure(self) -> float:
        """Sum of EAD over all obligors."""
        return float(sum(o.ead for o in self.obligors))

    def without_links(self) -> Book:
        """Return the same book with every link removed (the copula reading)."""
        return Book(
            name=self.name,
            currency=self.currency,
            obligors=self.obligors,
            links=(),
            factor_qubits=self.factor_qubits,
            source=self.source,
            dependence=self.dependence,
        )
