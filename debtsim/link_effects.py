"""Simple, documented indicators of contagion, for reports.

These are read-outs of a finished run, not part of the model: they take the
book and the final default probabilities an engine computed and rank links
and obligors by how much contagion they carry.  Every function is pure.

The link indicator is a *first-order* measure.  For a link (creditor *c*,
debtor *d*, contagion *q*) it is the expected extra loss at the creditor if
the debtor's final default transmitted along this one link with probability
*q*, counting only scenarios where the creditor would otherwise survive::

    transmitted_loss = q * P(D_d) * (1 - PD_c) * EAD_c * LGD_c

with ``P(D_d)`` the debtor's final default probability (contagion included)
and ``PD_c`` the creditor's own default probability.  It treats the debtor's
default and the creditor's own survival as independent and ignores longer
paths through the creditor, so it ranks links; it does not add up to the
loss from contagion (that is the difference between the model's and the
copula's expected loss).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from debtsim._typing import FloatArray
from debtsim.book.records import Book
from debtsim.risk import RiskMeasures

__all__ = [
    "LinkTransmission",
    "ObligorContagion",
    "contagion_effect",
    "link_transmission",
    "obligor_contagion",
    "rank_links",
]



@dataclass(frozen=True)
class LinkTransmission:
    """First-order contagion indicator of one link.

    Attributes
    ----------
    index : int
        Position of the link in the book.
    creditor, debtor : str
        Obligor ids.
    contagion : float
        Probability ``q`` that the link transmits a default.
    amount : float or None
        Size of the claim, as given in the book.
    debtor_default_probability : float
        Final default probability of the debtor (contagion included).
    creditor_survival : float
        ``1 - PD`` of the creditor (its own survival probability).
    creditor_loss_given_default : float
        ``EAD * LGD`` of the creditor.
    transmitted_loss : float
        ``contagion * debtor_default_probability * creditor_survival *
        creditor_loss_given_default``.

    """

    index: int
    creditor: str
    debtor: str
    contagion: float
    amount: float | None
    debtor_default_probability: float
    creditor_survival: float
    creditor_loss_given_default: float
    transmitted_loss: float


@dataclass(frozen=True, eq=False)
class ObligorContagion:
    """Per-obligor default probabilities with and without contagion.

    Attributes
    ----------
    own_default_probability : ndarray, shape (n,)
        The book's PD.
    default_probability : ndarray, shape (n,)
        Final default probability (contagion included), from the engine.
    contagion_uplift : ndarray, shape (n,)
        ``default_probability - own_default_probability``; a sampled law may
        make it slightly negative.
    expected_loss : ndarray, shape (n,)
        ``default_probability * EAD * LGD``.

    """

    own_default_probability: FloatArray
    default_probability: FloatArray
    contagion_uplift: FloatArray
    expected_loss: FloatArray


def _final_pd(book: Book, default_probability: ArrayLike) -> FloatArray:
    final = np.asarray(default_probability, dtype=float).ravel()
    if final.shape[0] != len(book.obligors):
        raise ValueError(
            f"default_probability must have one entry per obligor ({len(book.obligors)}), "
            f"got {final.shape[0]}"
        )
    return final


def obligor_contagion(book: Book, default_probability: ArrayLike) -> ObligorContagion:
    """Own and final default probabilities and expected loss of each obligor.

    Parameters
    ----------
    book : Book
        The book the run analysed.
    default_probability : array_like, shape (n,)
        Final default probabilities in book order.

    Returns
    -------
    ObligorContagion

    """
    final = np.clip(_final_pd(book, default_probability), 0.0, 1.0)
    own = np.array([o.pd for o in book.obligors], dtype=float)
    lgd_ead = np.array([o.ead * o.lgd for o in book.obligors], dtype=float)
    # no link can reach an obligor that is creditor of no link with positive contagion:
    # its uplift is 0 by construction, whatever an engine's noise
    index = {o.id: i for i, o in enumerate(book.obligors)}
    reachable = np.zeros(len(book.obligors), dtype=bool)
    for link in book.links:
        if link.contagion > 0.0 and link.creditor in index:
            reachable[index[link.creditor]] = True
    uplift = np.where(reachable, final - own, 0.0)
    return ObligorContagion(
        own_default_probability=own,
        default_probability=final,
        contagion_uplift=uplift,
        expected_loss=final * lgd_ead,
    )


def link_transmission(book: Book, default_probability: ArrayLike) -> tuple[LinkTransmission, ...]:
    """First-order transmitted loss of every link, in book order.

    Parameters
    ----------
    book : Book
        The book the run analysed.
    default_probability : array_like, shape (n,)
        Final default probabilities in book order.

    Returns
    -------
    tuple of LinkTransmission

    Notes
    -----
    ``transmitted_loss = q * P(D_d) * (1 - PD_c) * EAD_c * LGD_c``: see the
    module docstring for what it means and what it leaves out.

    """
    final = _final_pd(book, default_probability)
    index = {o.id: i for i, o in enumerate(book.obligors)}
    out = []
    for k, link in enumerate(book.links):
        c = book.obligors[index[link.creditor]]
        p_debtor = float(final[index[link.debtor]])
        survival = 1.0 - float(c.pd)
        lgd = float(c.ead * c.lgd)
        out.append(
            LinkTransmission(
                index=k,
                creditor=link.creditor,
                debtor=link.debtor,
                contagion=float(link.contagion),
                amount=None if link.amount is None else float(link.amount),
                debtor_default_probability=p_debtor,
                creditor_survival=survival,
                creditor_loss_given_default=lgd,
                transmitted_loss=float(link.contagion) * p_debtor * survival * lgd,
            )
        )
    return tuple(out)


def rank_links(
    book: Book, default_probability: ArrayLike, top: int | None = None
) -> tuple[LinkTransmission, ...]:
    """Links by first-order transmitted loss, largest first.

    Parameters
    ----------
    book : Book
        The book the run analysed.
    default_probability : array_like, shape (n,)
        Final default probabilities in book order.
    top : int, optional
        Keep only the first ``top`` links.

    Returns
    -------
    tuple of LinkTransmission
        Descending ``transmitted_loss``; ties keep book order.

    """
    ranked = sorted(
        link_transmission(book, default_probability),
        key=lambda t: (-t.transmitted_loss, t.index),
    )
    return tuple(ranked if top is None else ranked[: max(top, 0)])


def contagion_effect(
    model: RiskMeasures, copula: RiskMeasures | None
) -> dict[str, object]:
    """Differences between the model's measures and the copula's.

    Parameters
    ----------
    model : RiskMeasures
        Measures of the law with contagion.
    copula : RiskMeasures or None
        Measures of the same book without links; None when not computed.

    Returns
    -------
    dict
        ``expected_loss_from_contagion`` (model EL minus copula EL),
        ``expected_loss_with_links_multiple`` (EL with links divided by EL without
        links, None when the latter
        is 0), ``loss_std_from_contagion`` and ``var_from_contagion``,
        ``expected_shortfall_from_contagion``,
        ``economic_capital_from_contagion`` keyed by level.  Every value is
        None when ``copula`` is None.

    """
    keys = list(model.var)
    if copula is None:
        none_by_level: dict[float, float | None] = dict.fromkeys(keys)
        return {
            "expected_loss_from_contagion": None,
            "expected_loss_with_links_multiple": None,
            "loss_std_from_contagion": None,
            "var_from_contagion": dict(none_by_level),
            "expected_shortfall_from_contagion": dict(none_by_level),
            "economic_capital_from_contagion": dict(none_by_level),
        }

    def diff(a: Mapping[float, float], b: Mapping[float, float]) -> dict[float, float | None]:
        return {k: (a[k] - b[k]) if k in b else None for k in keys}

    ratio = model.expected_loss / copula.expected_loss if copula.expected_loss > 0 else None
    return {
        "expected_loss_from_contagion": model.expected_loss - copula.expected_loss,
        "expected_loss_with_links_multiple": ratio,
        "loss_std_from_contagion": model.loss_std - copula.loss_std,
        "var_from_contagion": diff(model.var, copula.var),
        "expected_shortfall_from_contagion": diff(
            model.expected_shortfall, copula.expected_shortfall
        ),
        "economic_capital_from_contagion": diff(model.economic_capital, copula.economic_capital),
    }
