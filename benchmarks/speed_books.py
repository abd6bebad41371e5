"""Seeded books of the speed table (issue 11), built in memory.

Every generator returns a :class:`debtsim.model.specification.LinkedFactorModel`
built through :meth:`LinkedFactorModel.from_book`, so the books pass the same
path as a loaded file.  Parameters are invented; the shapes follow common
practice for retail and SME books (log-normal exposures, PDs between 0.03%
and 20%, the Basel II corporate correlation curve of PD).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from debtsim.book.records import Book, Link, Obligor
from debtsim.model.specification import LinkedFactorModel

FloatArray = NDArray[np.float64]

#: Twenty rating grades, PD in 0.03% .. 20% (geometric).
GRADES = np.geomspace(3e-4, 0.2, 20)


def basel_correlation(pd: FloatArray) -> FloatArray:
    """Basel II corporate asset correlation as a function of PD (0.12 .. 0.24)."""
    w = (1.0 - np.exp(-50.0 * pd)) / (1.0 - np.exp(-50.0))
    return 0.12 * w + 0.24 * (1.0 - w)


def _model(name: str, ead: FloatArray, pd: FloatArray, lgd: FloatArray, r: FloatArray,
           links: tuple[Link, ...] = ()) -> LinkedFactorModel:
    obligors = tuple(
        Obligor(id=f"F{i:07d}", ead=e, pd=p, lgd=g, asset_correlation=c)
        for i, (e, p, g, c) in enumerate(
            zip(ead.tolist(), pd.tolist(), lgd.tolist(), r.tolist(), strict=True))
    )
    return LinkedFactorModel.from_book(
        Book(name=name, currency="EUR", obligors=obligors, links=links))


def all_different(n: int, seed: int = 11) -> LinkedFactorModel:
    """Every PD, R, LGD and EAD different: log-normal PD, Basel R plus noise, log-normal EAD."""
    rng = np.random.default_rng(seed)
    pd = np.clip(np.exp(rng.normal(np.log(0.01), 1.0, n)), 3e-4, 0.2)
    r = np.clip(basel_correlation(pd) + rng.uniform(-0.01, 0.01, n), 0.05, 0.3)
    lgd = rng.uniform(0.25, 0.65, n)
    ead = np.round(np.exp(rng.normal(np.log(50_000.0), 1.0, n)), 2)
    return _model(f"all different {n}", ead, pd, lgd, r)


def rating_grades(n: int, seed: int = 12) -> LinkedFactorModel:
    """PD from 20 rating grades (Basel R of the grade), every EAD different, LGD 45%."""
    rng = np.random.default_rng(seed)
    grade = np.clip(np.round(rng.normal(9.0, 3.5, n)), 0, GRADES.size - 1).astype(int)
    pd = GRADES[grade]
    ead = np.round(np.exp(rng.normal(np.log(50_000.0), 1.0, n)), 2)
    return _model(f"rating grades {n}", ead, pd, np.full(n, 0.45), basel_correlation(pd))


def linked(n: int = 1000, links: int = 3000, seed: int = 13) -> LinkedFactorModel:
    """``n`` obligors and ``links`` random creditor-debtor links (contagion 5%-40%)."""
    rng = np.random.default_rng(seed)
    pd = np.clip(np.exp(rng.normal(np.log(0.01), 1.0, n)), 3e-4, 0.2)
    ead = np.round(np.exp(rng.normal(np.log(1e6), 1.0, n)), 2)
    pairs: set[tuple[int, int]] = set()
    while len(pairs) < links:
        c, d = rng.integers(0, n, 2).tolist()
        if c != d:
            pairs.add((c, d))
    q = rng.uniform(0.05, 0.4, links)
    link_list = tuple(
        Link(creditor=f"F{c:07d}", debtor=f"F{d:07d}", contagion=float(qq))
        for (c, d), qq in zip(sorted(pairs), q.tolist(), strict=True)
    )
    return _model(f"linked {n}/{links}", ead, pd, rng.uniform(0.3, 0.6, n),
                  basel_correlation(pd), link_list)


def lending_cycle(size: int, seed: int = 14) -> LinkedFactorModel:
    """``size`` obligors lending to each other in one ring (contagion 10%-60%)."""
    rng = np.random.default_rng(seed)
    pd = rng.uniform(0.005, 0.05, size)
    ead = np.round(rng.uniform(1e5, 1e6, size), 2)
    link_list = tuple(
        Link(creditor=f"F{(i + 1) % size:07d}", debtor=f"F{i:07d}",
             contagion=float(rng.uniform(0.1, 0.6)))
        for i in range(size)
    )
    return _model(f"cycle {size}", ead, pd, np.full(size, 0.45), np.full(size, 0.2),
                  link_list)
