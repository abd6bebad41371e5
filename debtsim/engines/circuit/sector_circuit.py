"""The sector-factor model (loadings form, Gaussian) as a quantum circuit.

Registers: ``factor`` (``k`` qubits) holds the Gauss–Hermite nodes ``g_j`` of
the global factor; one register ``sector_<s>`` per sector (``m`` qubits,
``model.sector_qubits``) holds the nodes ``x_l`` of that sector's own factor
``eta_s``, each loaded with its weights as squared amplitudes, independently.
Obligor *i* of sector *s* is rotated by ``RY(2 asin sqrt(p))`` multiplexed on
the global register, its sector's register and its debtors' qubits, with the
own-default probability at ``y = a_s g_j + sqrt(1 - a_s^2) x_l``.  A group
lending in a cycle is loaded jointly, conditioned on the global register and
on the registers of every sector its members belong to.  Controls a rotation
does not depend on are dropped, so a sector of loading 1 needs no control on
its register and every loading 1 is the one-factor circuit.

On the same nodes this is exactly the tensor (global x sector) rule of the
exact engine (:mod:`debtsim.engines.exact.sector_law`, ``sector_grid``).
"""

from __future__ import annotations

import numpy as np
from qiskit import ClassicalRegister, QuantumCircuit, QuantumRegister
from qiskit.circuit.library import UCGate

from debtsim._typing import FloatArray
from debtsim.engines.circuit.builder import (
    MAX_CONTROLS,
    Rotation,
    _debtors_of,
    _outside_debtors,
    _ry_matrices,
    _simplify,
    _survival_table,
    factor_qubits_of,
)
from debtsim.model.dependence import default_threshold, sector_conditional_pd
from debtsim.model.factor_grid import FactorGrid, gauss_hermite
from debtsim.model.linked_group_law import MAX_GROUP_SIZE, group_law, seed_probability
from debtsim.model.specification import LinkedFactorModel

__all__ = [
    "SectorLayout",
    "build_sector_circuit",
    "model_circuit",
    "sector_circuit_problem",
    "sector_grids",
    "sector_rotation_plan",
]


def sector_grids(
    model: LinkedFactorModel,
    factor_grid: FactorGrid | None = None,
    sector_grid: FactorGrid | None = None,
) -> tuple[FactorGrid, FactorGrid]:
    """Global and per-sector Gauss–Hermite grids (``2**factor_qubits``, ``2**sector_qubits``)."""
    structure = model.dependence
    assert structure is not None
    g = factor_grid if factor_grid is not None else gauss_hermite(2**model.factor_qubits)
    x = sector_grid if sector_grid is not None else gauss_hermite(2**structure.sector_qubits)
    factor_qubits_of(g)
    factor_qubits_of(x)
    return g, x


class SectorLayout:
    """Qubit positions: global register, one register per sector, then the obligors."""

    def __init__(self, k: int, m: int, sectors: int) -> None:
        self.k = k
        self.m = m
        self.sectors = sectors
        self.offset = k + m * sectors  # qubit of obligor 0

    def sector_qubits(self, s: int) -> list[int]:
        """Qubits of sector ``s``'s register."""
        start = self.k + self.m * s
        return list(range(start, start + self.m))

    @property
    def qubits(self) -> int:
        """Factor qubits (global plus all sector registers)."""
        return self.offset


def _own_table(
    model: LinkedFactorModel,
    members: list[int],
    sectors: list[int],
    g: FactorGrid,
    x: FactorGrid,
    layout: SectorLayout,
) -> FloatArray:
    """Own-default probabilities ``(2**(k + m len(sectors)), len(members))``.

    Pattern index: global node bits first, then the register of ``sectors[u]``
    at bits ``k + m u`` (little-endian, as the control list is ordered).
    """
    structure = model.dependence
    assert structure is not None and structure.loading is not None
    k, m = layout.k, layout.m
    size = 1 << (k + m * len(sectors))
    pattern = np.arange(size)
    jg = pattern & ((1 << k) - 1)
    thr = default_threshold(model.pd, None)
    r = np.asarray(model.asset_correlation, dtype=float)
    out = np.empty((size, len(members)))
    for col, i in enumerate(members):
        s = int(structure.sector_of[i])
        u = sectors.index(s)
        jx = (pattern >> (k + m * u)) & ((1 << m) - 1)
        a = float(structure.loading[s])
        y = a * g.nodes[jg] + np.sqrt(max(1.0 - a * a, 0.0)) * x.nodes[jx]
        out[:, col] = sector_conditional_pd(thr[i : i + 1], r[i : i + 1], y)[:, 0]
    return out


def _factor_controls(layout: SectorLayout, sectors: list[int]) -> list[int]:
    out = list(range(layout.k))
    for s in sectors:
        out += layout.sector_qubits(s)
    return out


def sector_circuit_problem(model: LinkedFactorModel, layout: SectorLayout) -> str | None:
    """Why the sector circuit cannot be built (group too large, too many controls), or None."""
    structure = model.dependence
    assert structure is not None
    debtors = _debtors_of(model)
    for group in model.strong_components:
        members = group.tolist()
        if len(members) > MAX_GROUP_SIZE:
            return (
                f"a group of {len(members)} obligors lending to each other in a cycle is larger "
                f"than the {MAX_GROUP_SIZE} the circuit can load jointly"
            )
        sectors = sorted({int(structure.sector_of[i]) for i in members})
        base = layout.k + layout.m * len(sectors)
        count = base + len(_outside_debtors(members, debtors)) + len(members) - 1
        if len(members) == 1:
            count = base + len(debtors[members[0]])
        if count > MAX_CONTROLS:
            return (
                f"obligor {model.ids[members[-1]]} would be rotated under {count} control qubits "
                f"(global and sector registers plus the obligors it lends to); the multiplexer "
                f"limit is {MAX_CONTROLS}"
            )
    return None


def sector_rotation_plan(
    model: LinkedFactorModel, g: FactorGrid, x: FactorGrid, layout: SectorLayout
) -> list[Rotation]:
    """Multiplexed rotations of the sector circuit, debtors before creditors."""
    structure = model.dependence
    assert structure is not None
    debtors = _debtors_of(model)
    plan: list[Rotation] = []
    off = layout.offset
    for group in model.strong_components:
        members = group.tolist()
        sectors = sorted({int(structure.sector_of[i]) for i in members})
        controls_f = _factor_controls(layout, sectors)
        own = _own_table(model, members, sectors, g, x, layout)  # (2^F, s)
        if len(members) == 1:
            i = members[0]
            mine = sorted(debtors[i])
            surv = _survival_table([debtors[i][d] for d in mine])
            table = 1.0 - (1.0 - own[None, :, 0]) * surv[:, None]
            plan.append(_simplify(i, controls_f + [off + d for d in mine], table.reshape(-1)))
            continue
        local = {mm: j for j, mm in enumerate(members)}
        s = len(members)
        outside = _outside_debtors(members, debtors)
        internal = [
            (local[d], local[c], 1.0 - sv)
            for c in members
            for d, sv in debtors[c].items()
            if d in local
        ]
        survive = np.stack(
            [_survival_table([debtors[c].get(d, 1.0) for d in outside]) for c in members],
            axis=-1,
        )
        seeds = seed_probability(own[None, :, :], survive[:, None, :])  # (2^e, 2^F, s)
        law = group_law(seeds, internal)
        e = len(outside)
        f = own.shape[0]
        base = controls_f + [off + d for d in outside]
        for j, member in enumerate(members):
            split = law.reshape(2**e, f, 2 ** (s - j - 1), 2, 2**j).sum(axis=2)
            joint1, total = split[:, :, 1, :], split.sum(axis=2)
            cond = np.divide(joint1, total, out=np.zeros_like(total), where=total > 0.0)
            table = np.transpose(cond, (2, 0, 1)).reshape(-1)
            plan.append(_simplify(member, base + [off + mm for mm in members[:j]], table))
    return plan


def build_sector_circuit(
    model: LinkedFactorModel,
    factor_grid: FactorGrid | None = None,
    sector_grid: FactorGrid | None = None,
    *,
    measure: bool = False,
) -> QuantumCircuit:
    """Build the circuit of a sector-loadings model (see the module notes).

    Registers ``factor``, ``sector_0`` ... ``sector_<S-1>`` (book sector
    order) and ``obligor``; measured into ``defaults`` when ``measure``.
    """
    structure = model.dependence
    assert structure is not None
    g, x = sector_grids(model, factor_grid, sector_grid)
    k, m = factor_qubits_of(g), factor_qubits_of(x)
    n_sec = len(structure.sector_names)
    layout = SectorLayout(k, m, n_sec)
    plan = sector_rotation_plan(model, g, x, layout)
    factor = QuantumRegister(k, "factor")
    regs = [QuantumRegister(m, f"sector_{s}") for s in range(n_sec)]
    obligor = QuantumRegister(model.n_obligors, "obligor")
    qc = QuantumCircuit(factor, *regs, obligor, name="debtsim")
    qubits = list(factor) + [q for reg in regs for q in reg] + list(obligor)
    qc.initialize(np.sqrt(g.weights), factor, normalize=True)
    for reg in regs:
        qc.initialize(np.sqrt(x.weights), reg, normalize=True)
    for rot in plan:
        target = obligor[rot.target]
        if not rot.controls:
            p = float(rot.probability[0])
            if p >= 1.0:
                qc.x(target)
            else:
                qc.ry(2.0 * float(np.arcsin(np.sqrt(p))), target)
            continue
        gate = UCGate(_ry_matrices(rot.probability), mux_simp=False)
        qc.append(gate, [target] + [qubits[c] for c in rot.controls])
    if measure:
        defaults = ClassicalRegister(model.n_obligors, "defaults")
        qc.add_register(defaults)
        qc.measure(obligor, defaults)
    return qc


def model_circuit(model: LinkedFactorModel, *, measure: bool = False) -> QuantumCircuit:
    """Build the circuit of any model the circuit engine can encode, with default nodes.

    One factor: :func:`debtsim.engines.circuit.builder.build_circuit`; sector
    loadings (Gaussian): :func:`build_sector_circuit`.

    Raises
    ------
    EngineRefusedError
        For a sector correlation matrix or Student-t dependence, which have no
        circuit here.
    """
    from debtsim.engines.circuit.builder import build_circuit
    from debtsim.errors import EngineRefusedError

    structure = model.dependence
    if structure is None:
        return build_circuit(model, measure=measure)
    if structure.form != "loadings" or structure.student_t:
        raise EngineRefusedError(
            f"no circuit for {structure.describe()}: the circuit encodes sector loadings with "
            "Gaussian dependence only; use the 'exact' engine"
        )
    return build_sector_circuit(model, measure=measure)
