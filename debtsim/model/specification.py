"""The default-dependence model of a book, as arrays.

One systemic factor ``Z ~ N(0, 1)``; obligor *i* defaults on its own when
``sqrt(R_i) Z + sqrt(1 - R_i) e_i < Phi^-1(PD_i)``; a link (creditor *c*,
debtor *d*, contagion *q*) is live with probability *q*; an obligor's final
default is its own default or reachability from an own default along live
links, debtor to creditor.  This module describes that model; it computes no
loss law.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from scipy.sparse.csgraph import connected_components
from scipy.special import ndtr, ndtri

from debtsim._typing import FloatArray, IntArray
from debtsim.book.records import Book
from debtsim.model.dependence import FactorStructure

__all__ = ["LinkedFactorModel", "conditional_default_probability"]



def conditional_default_probability(
    pd: FloatArray, asset_correlation: FloatArray, z: FloatArray
) -> FloatArray:
    """Own-default probability of each obligor given the systemic factor.

    Parameters
    ----------
    pd : ndarray, shape (n,)
        Unconditional one-year default probabilities, in (0, 1].
    asset_correlation : ndarray, shape (n,)
        Factor loadings ``R`` in [0, 1).
    z : ndarray, shape (m,)
        Factor values.

    Returns
    -------
    ndarray, shape (m, n)
        ``Phi((Phi^-1(PD) - sqrt(R) z) / sqrt(1 - R))``; exactly 1 where PD is 1.

    References
    ----------
    O. Vasicek, "Loan portfolio value", Risk 15 (2002).
    """
    pd = np.asarray(pd, dtype=float)
    r = np.asarray(asset_correlation, dtype=float)
    z = np.atleast_1d(np.asarray(z, dtype=float))
    with np.errstate(over="ignore", invalid="ignore"):
        threshold = ndtri(np.clip(pd, 0.0, 1.0))  # +inf where pd == 1
    x = (threshold[None, :] - np.sqrt(r)[None, :] * z[:, None]) / np.sqrt(1.0 - r)[None, :]
    p = ndtr(x)
    p[:, pd >= 1.0] = 1.0
    p[:, pd <= 0.0] = 0.0
    return p


@dataclass(frozen=True, eq=False)
class LinkedFactorModel:
    """Arrays of one book's default model.

    Build with :meth:`from_book`.  Obligors keep the book's order; link
    arrays index into it.

    Attributes
    ----------
    ids : tuple of str
    ead, lgd, pd, asset_correlation : ndarray, shape (n,)
    creditor, debtor : ndarray of int, shape (m,)
        Obligor indices of each link.
    contagion : ndarray, shape (m,)
    factor_qubits : int
    dependence : FactorStructure or None
        Sector factors and dependence family; None for the one-factor
        Gaussian model of DESIGN.md (then every engine runs as before).
    """

    ids: tuple[str, ...]
    ead: FloatArray
    lgd: FloatArray
    pd: FloatArray
    asset_correlation: FloatArray
    creditor: IntArray
    debtor: IntArray
    contagion: FloatArray
    factor_qubits: int
    dependence: FactorStructure | None = None

    @classmethod
    def from_book(cls, book: Book) -> LinkedFactorModel:
        """Build the model of a validated book."""
        index = {o.id: i for i, o in enumerate(book.obligors)}

        def arr(values: list[float]) -> FloatArray:
            a = np.array(values, dtype=float)
            a.setflags(write=False)
            return a

        def iarr(values: list[int]) -> IntArray:
            a = np.array(values, dtype=np.int64)
            a.setflags(write=False)
            return a

        return cls(
            ids=tuple(o.id for o in book.obligors),
            ead=arr([o.ead for o in book.obligors]),
            lgd=arr([o.lgd for o in book.obligors]),
            pd=arr([o.pd for o in book.obligors]),
            asset_correlation=arr([o.asset_correlation for o in book.obligors]),
            creditor=iarr([index[lk.creditor] for lk in book.links]),
            debtor=iarr([index[lk.debtor] for lk in book.links]),
            contagion=arr([lk.contagion for lk in book.links]),
            factor_qubits=book.factor_qubits,
            dependence=FactorStructure.from_spec(
                book.dependence, [o.sector for o in book.obligors]
            )
            if book.dependence is not None
            else None,
        )

    # ------------------------------------------------------------------ sizes
    @property
    def n_obligors(self) -> int:
        """Number of obligors."""
        return len(self.ids)

    @property
    def n_links(self) -> int:
        """Number of links."""
        return int(self.creditor.shape[0])

    @cached_property
    def loss_given_default(self) -> FloatArray:
        """Loss if the obligor finally defaults: ``EAD * LGD``."""
        out = self.ead * self.lgd
        out.setflags(write=False)
        return out

    @property
    def total_exposure(self) -> float:
        """Sum of EAD."""
        return float(self.ead.sum())

    def conditional_pd(self, z: FloatArray) -> FloatArray:
        """Own-default probabilities given factor values, shape (len(z), n)."""
        return conditional_default_probability(self.pd, self.asset_correlation, z)

    def without_links(self) -> LinkedFactorModel:
        """Return the same obligors with no links: the copula of the same factor structure."""
        empty_i = np.zeros(0, dtype=np.int64)
        empty_i.setflags(write=False)
        empty_f = np.zeros(0, dtype=float)
        empty_f.setflags(write=False)
        return LinkedFactorModel(
            ids=self.ids,
            ead=self.ead,
            lgd=self.lgd,
            pd=self.pd,
            asset_correlation=self.asset_correlation,
            creditor=empty_i,
            debtor=empty_i,
            contagion=empty_f,
            factor_qubits=self.factor_qubits,
            dependence=self.dependence,
        )

    @cached_property
    def reachable_by_links(self) -> NDArray[np.bool_]:
        """Which obligors a default can reach along a link, shape (n,).

        An obligor is reachable when it is the creditor of at least one link
        with positive contagion.  An unreachable obligor defaults only on its
        own: its final default probability is its PD, exactly, on every
        engine, and its contagion uplift is 0 by construction.
        """
        mask = np.zeros(self.n_obligors, dtype=bool)
        mask[self.creditor[self.contagion > 0.0]] = True
        mask.setflags(write=False)
        return mask

    def settle_default_probability(self, computed: FloatArray) -> FloatArray:
        """Return final default probabilities as an engine should report them.

        Clipped to ``[0, 1]`` (float noise can give ``1.0000000000000002``),
        and equal to the PD for every obligor no link can reach
        (:attr:`reachable_by_links`), whatever the sampling noise.  Engines
        that integrate on factor nodes keep their own node values instead
        (the circuit and the exact engine on the same nodes must agree);
        their contagion uplift is zeroed where it is reported
        (:func:`debtsim.link_effects.obligor_contagion`).

        Parameters
        ----------
        computed : ndarray, shape (n,)
            The engine's estimate.

        Returns
        -------
        ndarray, shape (n,)

        """
        out = np.clip(np.asarray(computed, dtype=float), 0.0, 1.0)
        unreachable = ~self.reachable_by_links
        out[unreachable] = self.pd[unreachable]
        return out

    # ------------------------------------------------------------------ graph
    @cached_property
    def _adjacency(self) -> sparse.csr_matrix:
        """Directed graph debtor -> creditor (the way defaults travel)."""
        n = self.n_obligors
        return sparse.csr_matrix(
            (np.ones(self.n_links), (self.debtor, self.creditor)), shape=(n, n)
        )

    @cached_property
    def component_labels(self) -> IntArray:
        """Label of each obligor's weakly connected component of the link graph."""
        _, labels = connected_components(self._adjacency, directed=True, connection="weak")
        return labels.astype(np.int64)

    @cached_property
    def components(self) -> tuple[IntArray, ...]:
        """Obligor indices of each weakly connected component, ascending."""
        labels = self.component_labels
        order = np.argsort(labels, kind="stable")
        splits = np.flatnonzero(np.diff(labels[order])) + 1
        return tuple(np.sort(g) for g in np.split(order, splits))

    @cached_property
    def strong_components(self) -> tuple[IntArray, ...]:
        """Strongly connected components in topological order, debtors first.

        Every link whose endpoints lie in different components runs from an
        earlier component (debtor side) to a later one (creditor side).  A
        component of more than one obligor is a cycle of mutual lending and
        must be treated jointly.
        """
        n = self.n_obligors
        n_comp, labels = connected_components(self._adjacency, directed=True, connection="strong")
        # Kahn's algorithm on the condensation DAG, smallest label first for determinism.
        cross = labels[self.debtor] != labels[self.creditor]
        edges = set(zip(labels[self.debtor][cross].tolist(), labels[self.creditor][cross].tolist(),
                        strict=True))
        indegree = np.zeros(n_comp, dtype=np.int64)
        children: list[list[int]] = [[] for _ in range(n_comp)]
        for a, b in sorted(edges):
            children[a].append(b)
            indegree[b] += 1
        ready = [c for c in range(n_comp) if indegree[c] == 0]
        heapq.heapify(ready)
        order: list[int] = []
        while ready:
            c = heapq.heappop(ready)
            order.append(c)
            for b in children[c]:
                indegree[b] -= 1
                if indegree[b] == 0:
                    heapq.heappush(ready, b)
        by_label = np.argsort(labels, kind="stable")
        starts = np.searchsorted(labels[by_label], np.arange(n_comp + 1))
        del n
        return tuple(np.sort(by_label[starts[c] : starts[c + 1]]) for c in order)

    @cached_property
    def cycles(self) -> tuple[IntArray, ...]:
        """Strong components of two or more obligors (groups that lend to each other)."""
        return tuple(c for c in self.strong_components if c.size > 1)

    def incoming_links(self, obligor: int) -> IntArray:
        """Return the links whose creditor is ``obligor`` (its claims on debtors)."""
        return np.flatnonzero(self.creditor == obligor)
