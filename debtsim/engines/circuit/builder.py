"""The model as a quantum circuit: one qubit per obligor, rotated under control.

A factor register of ``k`` qubits holds the ``2**k`` factor nodes, each with
its probability weight as squared amplitude (basis state ``j`` is node ``j``).
Every obligor is one qubit of the ``obligor`` register.  Obligors are visited
in the order of the strongly connected components of the link graph, debtors
first, so a creditor's debtors are prepared before the creditor:

* a lone obligor ``i`` gets ``RY(2 asin sqrt(p))`` multiplexed on the factor
  register and on its debtors' qubits, with
  ``p = 1 - (1 - p_i(z)) * prod_{defaulted debtors d} (1 - q_di)``;
* a group that lends in a cycle is loaded jointly from its exact conditional
  law (:func:`debtsim.model.linked_group_law.group_law`) by the chain rule: member ``j`` is
  rotated under control of the factor, the group's outside debtors and the
  members before it.

Each rotation is one uniformly controlled gate (Qiskit ``UCGate``, run
natively by Aer as its ``multiplexer`` instruction).  Controls on which the
rotation does not depend are left out.  Measuring the obligor register
samples final defaults of the model on the discretised factor.

This is the quantum Bayesian network construction of Low, Yoder & Chuang,
Phys. Rev. A 89 (2014), and the circuit credit model of Egger et al., IEEE
Trans. Computers 70 (2021), extended with contagion links.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from qiskit import ClassicalRegister, QuantumCircuit, QuantumRegister, qasm3, transpile
from qiskit.circuit.library import StatePreparation, UCGate, UCRYGate

from debtsim._typing import FloatArray
from debtsim.errors import EngineRefusedError
from debtsim.model.factor_grid import FactorGrid, gauss_hermite
from debtsim.model.linked_group_law import MAX_GROUP_SIZE, group_law, seed_probability
from debtsim.model.specification import LinkedFactorModel

__all__ = [
    "MAX_CONTROLS",
    "CircuitSize",
    "Rotation",
    "build_circuit",
    "circuit_problem",
    "circuit_size",
    "decompose_circuit",
    "factor_grid_for",
    "factor_qubits_of",
    "largest_control_count",
    "rotation_plan",
    "to_qasm3",
]


#: Most control qubits one multiplexed rotation may have before simplification.
#: A gate with ``c`` controls carries ``2**c`` 2x2 matrices; building one with
#: 16 controls takes about 1.6 s in Qiskit, and each extra control doubles it.
MAX_CONTROLS = 16

#: Rotations whose probability tables differ by less than this along a
#: control are taken not to depend on it.
_SAME = 1e-14


@dataclass(frozen=True)
class CircuitSize:
    """Size of the circuit after transpiling to ``u`` and ``cx`` gates.

    Attributes
    ----------
    qubits : int
        Factor plus obligor qubits.
    depth : int
        Circuit depth.
    two_qubit_gates : int
        Number of two-qubit gates (``cx``).

    """

    qubits: int
    depth: int
    two_qubit_gates: int


@dataclass(frozen=True, eq=False)
class Rotation:
    """One multiplexed default rotation.

    Attributes
    ----------
    target : int
        Obligor index (book order) of the rotated qubit.
    controls : tuple of int
        Circuit qubit indices of the controls: factor qubits are ``0..k-1``,
        obligor ``i`` is ``k + i``.
    probability : ndarray, shape (2**len(controls),)
        ``P(target defaults | controls)``; entry ``c`` is the control pattern
        whose bit ``b`` is the state of ``controls[b]`` (little-endian).

    """

    target: int
    controls: tuple[int, ...]
    probability: FloatArray


# ------------------------------------------------------------------ factor grid
def factor_qubits_of(grid: FactorGrid) -> int:
    """Count the qubits holding ``grid``; its size must be a power of two.

    Raises
    ------
    ValueError
        When the grid size is not a power of two.

    """
    m = len(grid)
    k = m.bit_length() - 1
    if m < 1 or (1 << k) != m:
        raise ValueError(f"a factor grid in a circuit needs 2**k nodes, got {m}")
    return k


def factor_grid_for(model: LinkedFactorModel, grid: FactorGrid | None = None) -> FactorGrid:
    """Return the circuit's grid: ``grid``, or Gauss–Hermite with ``2**factor_qubits`` nodes."""
    if grid is None:
        grid = gauss_hermite(2**model.factor_qubits)
    factor_qubits_of(grid)
    return grid


# ------------------------------------------------------------------ structure
def _debtors_of(model: LinkedFactorModel) -> list[dict[int, float]]:
    """For each obligor, ``{debtor: survive}`` over its links with q > 0.

    ``survive`` is the product of ``1 - q`` over every link from that debtor
    to that creditor: the chance that the debtor's default does not travel.
    """
    out: list[dict[int, float]] = [{} for _ in range(model.n_obligors)]
    for c, d, q in zip(model.creditor.tolist(), model.debtor.tolist(), model.contagion.tolist(),
                       strict=True):
        if q > 0.0:
            out[c][d] = out[c].get(d, 1.0) * (1.0 - q)
    return out


def _outside_debtors(group: list[int], debtors: list[dict[int, float]]) -> list[int]:
    """Debtors of a group's members that are not members, ascending."""
    inside = set(group)
    return sorted({d for c in group for d in debtors[c] if d not in inside})


def _candidate_controls(model: LinkedFactorModel, k: int) -> Iterator[tuple[int, int]]:
    """``(obligor, control count before simplification)`` of every rotation."""
    debtors = _debtors_of(model)
    for group in model.strong_components:
        members = group.tolist()
        if len(members) == 1:
            yield members[0], k + len(debtors[members[0]])
            continue
        e = len(_outside_debtors(members, debtors))
        for j, member in enumerate(members):
            yield member, k + e + j


def largest_control_count(model: LinkedFactorModel, grid: FactorGrid | None = None) -> int:
    """Most controls any rotation of the circuit has before simplification."""
    k = factor_qubits_of(factor_grid_for(model, grid))
    return max((c for _, c in _candidate_controls(model, k)), default=0)


def circuit_problem(model: LinkedFactorModel, grid: FactorGrid | None = None) -> str | None:
    """Why the circuit of ``model`` cannot be built, or None when it can.

    The circuit cannot be built when a group of mutually lending obligors is
    larger than :data:`debtsim.model.linked_group_law.MAX_GROUP_SIZE` or a rotation would need
    more than :data:`MAX_CONTROLS` control qubits.
    """
    biggest = max((g.size for g in model.strong_components), default=0)
    if biggest > MAX_GROUP_SIZE:
        return (
            f"a group of {biggest} obligors lending to each other in a cycle is larger than "
            f"the {MAX_GROUP_SIZE} the circuit can load jointly"
        )
    k = factor_qubits_of(factor_grid_for(model, grid))
    worst = max(_candidate_controls(model, k), key=lambda t: t[1], default=None)
    if worst is not None and worst[1] > MAX_CONTROLS:
        who, count = worst
        return (
            f"obligor {model.ids[who]} would be rotated under {count} control qubits "
            f"({k} factor qubits plus the obligors it lends to); the multiplexer limit is "
            f"{MAX_CONTROLS}"
        )
    return None


# ------------------------------------------------------------------ rotation tables
def _survival_table(survive: list[float]) -> FloatArray:
    """``prod_{d in m} survive_d`` for every pattern ``m`` (little-endian)."""
    table = np.ones(1)
    for s in survive:
        table = np.concatenate((table, table * s))
    return table


def _simplify(target: int, controls: list[int], table: FloatArray) -> Rotation:
    """Drop the controls on which ``table`` does not depend."""
    arr = np.asarray(table, dtype=float).reshape((2,) * len(controls))  # axis a <-> controls[-1-a]
    for pos in range(len(controls) - 1, -1, -1):
        axis = len(controls) - 1 - pos
        low = np.take(arr, 0, axis=axis)
        high = np.take(arr, 1, axis=axis)
        if np.max(np.abs(low - high), initial=0.0) <= _SAME:
            arr = low
            del controls[pos]
    return Rotation(target=target, controls=tuple(controls),
                    probability=np.clip(arr.reshape(-1), 0.0, 1.0))


def rotation_plan(model: LinkedFactorModel, grid: FactorGrid | None = None) -> list[Rotation]:
    """List the multiplexed rotations of the circuit, in the order they are applied.

    Parameters
    ----------
    model : LinkedFactorModel
        The book's default model.
    grid : FactorGrid, optional
        Factor nodes (a power of two of them); Gauss–Hermite with
        ``2**model.factor_qubits`` nodes by default.

    Returns
    -------
    list of Rotation
        One per obligor, debtors before their creditors, members of a
        cycle group in index order.

    Raises
    ------
    EngineRefusedError
        When :func:`circuit_problem` finds the circuit too large to build.

    """
    grid = factor_grid_for(model, grid)
    problem = circuit_problem(model, grid)
    if problem is not None:
        raise EngineRefusedError(f"cannot build the circuit: {problem}")
    k = factor_qubits_of(grid)
    own = model.conditional_pd(grid.nodes)  # (2^k, n)
    factor = list(range(k))
    debtors = _debtors_of(model)
    plan: list[Rotation] = []
    for group in model.strong_components:
        if group.size == 1:
            i = int(group[0])
            mine = sorted(debtors[i])
            surv = _survival_table([debtors[i][d] for d in mine])  # (2^e,)
            table = 1.0 - (1.0 - own[None, :, i]) * surv[:, None]  # (2^e, 2^k): index j + 2^k m
            plan.append(_simplify(i, factor + [k + d for d in mine], table.reshape(-1)))
            continue
        plan.extend(_group_rotations(group.tolist(), debtors, own, k))
    return plan


def _group_rotations(
    members: list[int], debtors: list[dict[int, float]], own: FloatArray, k: int
) -> list[Rotation]:
    """Chain-rule rotations loading a cycle group's exact conditional joint law."""
    local = {m: j for j, m in enumerate(members)}
    s = len(members)
    outside = _outside_debtors(members, debtors)
    internal = [(local[d], local[c], 1.0 - surv) for c in members
                for d, surv in debtors[c].items() if d in local]
    # survive[m, j]: product of (1 - q) over links from defaulted outside debtors into member j
    survive = np.stack(
        [_survival_table([debtors[c].get(d, 1.0) for d in outside]) for c in members], axis=-1
    )  # (2^e, s)
    seeds = seed_probability(own[None, :, members], survive[:, None, :])  # (2^e, 2^k, s)
    law = group_law(seeds, internal)  # (2^e, 2^k, 2^s), bit j <-> member j
    e = len(outside)
    base = list(range(k)) + [k + d for d in outside]
    rotations: list[Rotation] = []
    for j, member in enumerate(members):
        split = law.reshape(2**e, 2**k, 2 ** (s - j - 1), 2, 2**j).sum(axis=2)
        joint1, total = split[:, :, 1, :], split.sum(axis=2)
        cond = np.divide(joint1, total, out=np.zeros_like(total), where=total > 0.0)
        # index must be factor bits + 2^k * outside + 2^(k+e) * earlier members
        table = np.transpose(cond, (2, 0, 1)).reshape(-1)
        controls = base + [k + m for m in members[:j]]
        rotations.append(_simplify(member, controls, table))
    return rotations


# ------------------------------------------------------------------ circuit
def _ry_matrices(probability: FloatArray) -> list[NDArray[np.float64]]:
    """``RY(2 asin sqrt(p))`` as 2x2 matrices, one per control pattern."""
    p = np.clip(probability, 0.0, 1.0)
    cos, sin = np.sqrt(1.0 - p), np.sqrt(p)
    mats = np.empty((p.size, 2, 2))
    mats[:, 0, 0], mats[:, 0, 1], mats[:, 1, 0], mats[:, 1, 1] = cos, -sin, sin, cos
    return list(mats)


def build_circuit(
    model: LinkedFactorModel, grid: FactorGrid | None = None, *, measure: bool = False
) -> QuantumCircuit:
    """Build the circuit whose obligor register, measured, samples final defaults.

    Parameters
    ----------
    model : LinkedFactorModel
        The book's default model.
    grid : FactorGrid, optional
        Factor nodes and weights (a power of two of them); Gauss–Hermite with
        ``2**model.factor_qubits`` nodes by default.
    measure : bool
        Add a classical register ``defaults`` and measure obligor ``i`` into
        bit ``i``.

    Returns
    -------
    QuantumCircuit
        Registers ``factor`` (``k`` qubits, loaded with ``initialize``) and
        ``obligor`` (one qubit per obligor, book order); one ``UCGate``
        (instruction ``multiplexer``) per obligor, or a plain ``ry`` (``x`` for
        a sure default) when a rotation needs no control.

    Raises
    ------
    EngineRefusedError
        When the circuit is too large to build (see :func:`circuit_problem`).

    """
    grid = factor_grid_for(model, grid)
    k = factor_qubits_of(grid)
    plan = rotation_plan(model, grid)
    factor = QuantumRegister(k, "factor")
    obligor = QuantumRegister(model.n_obligors, "obligor")
    qc = QuantumCircuit(factor, obligor, name="debtsim")
    qubits = list(factor) + list(obligor)
    if k > 0:
        qc.initialize(np.sqrt(grid.weights), factor, normalize=True)
    for rot in plan:
        target = obligor[rot.target]
        if not rot.controls:
            p = float(rot.probability[0])
            if p >= 1.0:
                qc.x(target)  # exact, where ry(pi) leaves a 1e-33 remainder
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


# ------------------------------------------------------------------ size and export
def _portable(qc: QuantumCircuit) -> QuantumCircuit:
    """``qc`` with the simulator-specific instructions replaced by standard ones.

    ``initialize`` becomes the reset-free ``StatePreparation`` (qubits start in
    ``|0>``, so both prepare the same state), and every multiplexed ``RY``
    becomes a ``UCRYGate`` with the same angles, whose decomposition (one
    ``cx`` and one ``ry`` per control pattern) is exact and numerically
    stable, where the general ``UCGate`` synthesis fails on near-0/1
    probabilities.
    """
    out = qc.copy_empty_like()
    for inst in qc.data:
        op = inst.operation
        if op.name == "initialize":
            op = StatePreparation(list(op.params), normalize=True)
        elif op.name == "multiplexer":
            mats = np.asarray(op.params)
            op = UCRYGate((2.0 * np.arctan2(mats[:, 1, 0].real, mats[:, 0, 0].real)).tolist())
        out.append(op, inst.qubits, inst.clbits)
    return out


def decompose_circuit(qc: QuantumCircuit) -> QuantumCircuit:
    """``qc`` transpiled to the generic basis ``u``, ``cx``: what is counted and exported.

    Parameters
    ----------
    qc : QuantumCircuit
        A circuit from :func:`build_circuit`; measurements are kept.

    Returns
    -------
    QuantumCircuit
        The same state preparation without resets or multiplexers: each
        multiplexed rotation is a uniformly controlled ``RY`` (Mottonen et
        al., 2004), then ``transpile(..., basis_gates=["u", "cx"],
        optimization_level=1)``.

    """
    return transpile(_portable(qc), basis_gates=["u", "cx"], optimization_level=1)


def circuit_size(qc: QuantumCircuit) -> CircuitSize:
    """Qubits, depth and two-qubit gate count of ``qc`` in the ``u``/``cx`` basis.

    Parameters
    ----------
    qc : QuantumCircuit
        A circuit from :func:`build_circuit`.

    Returns
    -------
    CircuitSize

    """
    t = decompose_circuit(qc)
    two = sum(1 for inst in t.data if inst.operation.num_qubits == 2)
    return CircuitSize(qubits=qc.num_qubits, depth=int(t.depth()), two_qubit_gates=two)


def to_qasm3(qc: QuantumCircuit) -> str:
    """OpenQASM 3 text of ``qc`` transpiled to ``u`` and ``cx`` gates.

    Parameters
    ----------
    qc : QuantumCircuit
        A circuit from :func:`build_circuit`.

    Returns
    -------
    str
        Program text starting with ``OPENQASM 3.0;``.

    """
    return qasm3.dumps(decompose_circuit(qc))
