"""A one-screen summary of a validated book: what ``debtsim check`` prints.

Nothing here runs an engine: the figures are sums over the book and facts
about its link graph.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from debtsim.book.records import Book
from debtsim.model.specification import LinkedFactorModel
from debtsim.report.formatting import money, percent

__all__ = ["BookOverview", "format_overview", "overview"]


@dataclass(frozen=True, slots=True)
class BookOverview:
    """Headline figures of a book.

    Attributes
    ----------
    name, currency, source : str
        The book's title, currency label (may be empty) and file.
    obligors, links : int
        Record counts.
    total_exposure : float
        ``sum EAD``.
    loss_if_all_default : float
        ``sum EAD * LGD``: the loss if every obligor defaulted.
    expected_loss_without_contagion : float
        ``sum PD * LGD * EAD``: the expected loss with every link ignored.
        Contagion can only raise it.
    pd_min, pd_max : float
        Smallest and largest PD.
    mean_asset_correlation : float
        Unweighted mean of ``R``.
    sectors : int
        Distinct non-empty sector labels.
    cycles : int
        Groups of two or more obligors that lend to each other in a cycle
        (strongly connected components of the link graph).
    largest_cycle : int
        Obligors in the largest such group; 0 when there is none.
    linked_groups : int
        Groups of two or more obligors joined by links, ignoring direction
        (weakly connected components).
    largest_linked_group : int
        Obligors in the largest weakly connected component; 1 when the book
        has no links.
    factor_qubits : int
        Factor resolution ``k`` (``2**k`` factor nodes).

    """

    name: str
    currency: str
    source: str
    obligors: int
    links: int
    total_exposure: float
    loss_if_all_default: float
    expected_loss_without_contagion: float
    pd_min: float
    pd_max: float
    mean_asset_correlation: float
    sectors: int
    cycles: int
    largest_cycle: int
    linked_groups: int
    largest_linked_group: int
    factor_qubits: int


def _group_sizes(model: LinkedFactorModel, connection: str) -> np.ndarray:
    """Sizes of the connected components of the debtor -> creditor graph."""
    n = model.n_obligors
    graph = sparse.csr_matrix(
        (np.ones(model.n_links), (model.debtor, model.creditor)), shape=(n, n)
    )
    _, labels = connected_components(graph, directed=True, connection=connection)
    return np.bincount(labels)


def overview(book: Book) -> BookOverview:
    """Summarise a validated book.

    Parameters
    ----------
    book : Book
        A book from :func:`debtsim.book.loader.load_book` (at least one obligor).

    Returns
    -------
    BookOverview
        Counts, exposure sums and link-graph facts.

    Notes
    -----
    Cycles are the strongly connected components of more than one obligor,
    as in :attr:`debtsim.model.specification.LinkedFactorModel.cycles`; they are counted here
    from the component labels alone, which stays fast for large books.

    """
    model = LinkedFactorModel.from_book(book)
    strong = _group_sizes(model, "strong")
    weak = _group_sizes(model, "weak")
    cyclic = strong[strong > 1]
    linked = weak[weak > 1]
    sectors = {o.sector for o in book.obligors if o.sector.strip()}
    return BookOverview(
        name=book.name,
        currency=book.currency,
        source=book.source,
        obligors=model.n_obligors,
        links=model.n_links,
        total_exposure=float(model.ead.sum()),
        loss_if_all_default=float(model.loss_given_default.sum()),
        expected_loss_without_contagion=float((model.pd * model.loss_given_default).sum()),
        pd_min=float(model.pd.min()),
        pd_max=float(model.pd.max()),
        mean_asset_correlation=float(model.asset_correlation.mean()),
        sectors=len(sectors),
        cycles=int(cyclic.size),
        largest_cycle=int(cyclic.max()) if cyclic.size else 0,
        linked_groups=int(linked.size),
        largest_linked_group=int(weak.max()) if weak.size else 0,
        factor_qubits=book.factor_qubits,
    )


def _plural(count: int, word: str) -> str:
    return f"{count:,} {word}" + ("" if count == 1 else "s")


def format_overview(ov: BookOverview) -> str:
    """Render an overview as aligned plain text, one fact per line.

    Parameters
    ----------
    ov : BookOverview
        From :func:`overview`.

    Returns
    -------
    str
        A few lines, no trailing newline, no markup.

    """
    if ov.cycles:
        cycles = f"{ov.cycles:,} (largest: {_plural(ov.largest_cycle, 'obligor')})"
    else:
        cycles = "none"
    if ov.linked_groups:
        groups = f"{ov.linked_groups:,} (largest: {_plural(ov.largest_linked_group, 'obligor')})"
    else:
        groups = "none"
    pd_range = (
        percent(ov.pd_min)
        if ov.pd_min == ov.pd_max
        else f"{percent(ov.pd_min)} to {percent(ov.pd_max)}"
    )
    el_share = (
        f" ({percent(ov.expected_loss_without_contagion / ov.total_exposure)} of exposure)"
        if ov.total_exposure > 0
        else ""
    )
    rows = [
        ("Book", ov.name),
        ("File", ov.source),
        ("Currency", ov.currency or "(not given)"),
        ("Obligors", f"{ov.obligors:,}"),
        ("Sectors", f"{ov.sectors:,}" if ov.sectors else "(none given)"),
        ("Links", f"{ov.links:,}"),
        ("Total exposure (EAD)", money(ov.total_exposure, ov.currency)),
        ("Loss if all default", money(ov.loss_if_all_default, ov.currency)),
        (
            "Expected loss without links",
            money(ov.expected_loss_without_contagion, ov.currency) + el_share,
        ),
        ("PD range", pd_range),
        ("Mean asset correlation", f"{ov.mean_asset_correlation:.3f}"),
        ("Lending cycles", cycles),
        ("Linked groups", groups),
        ("Factor resolution", f"{ov.factor_qubits} qubits ({2**ov.factor_qubits} nodes)"),
    ]
    width = max(len(label) for label, _ in rows)
    return "\n".join(f"{label:<{width}}  {value}" for label, value in rows)
