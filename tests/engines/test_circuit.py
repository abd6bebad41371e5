"""The circuit form of the model and the ``circuit`` engine (Aer statevector)."""

from __future__ import annotations

import numpy as np
import pytest
from qiskit.quantum_info import Statevector
from qiskit_aer import AerSimulator
from scipy.special import comb

from debtsim.book.records import Book, Link, Obligor
from debtsim.engines import make_engine
from debtsim.engines.circuit import engine as circuit_engine
from debtsim.engines.circuit.builder import (
    MAX_CONTROLS,
    build_circuit,
    circuit_size,
    decompose_circuit,
    rotation_plan,
    to_qasm3,
)
from debtsim.engines.circuit.engine import CircuitEngine
from debtsim.errors import EngineRefusedError
from debtsim.model.factor_grid import gauss_hermite
from debtsim.model.specification import LinkedFactorModel, conditional_default_probability
from debtsim.options import RunOptions
from tests.reference import enumerate_law

# (ead, pd, lgd, R) per obligor; links as (creditor, debtor, q) on indices.
Spec = tuple[list[tuple[float, float, float, float]], list[tuple[int, int, float]]]

BOOKS: dict[str, Spec] = {
    "chain": (
        [(100, 0.05, 0.45, 0.2), (200, 0.1, 0.6, 0.3), (50, 0.02, 0.4, 0.15), (80, 0.04, 0.5, 0.1)],
        [(1, 0, 0.3), (2, 1, 0.5), (3, 2, 0.8)],
    ),
    "star": (
        [(300, 0.02, 0.45, 0.2), (100, 0.1, 0.6, 0.3), (70, 0.05, 0.4, 0.25), (90, 0.08, 0.5, 0.1)],
        [(0, 1, 0.3), (0, 2, 0.6), (0, 3, 0.2)],
    ),
    "two_way_pair": (
        [(100, 0.05, 0.45, 0.2), (150, 0.08, 0.55, 0.3), (60, 0.03, 0.45, 0.2)],
        [(0, 1, 0.4), (1, 0, 0.7)],
    ),
    "three_cycle": (
        [(100, 0.05, 0.45, 0.2), (150, 0.08, 0.55, 0.3), (60, 0.1, 0.35, 0.12)],
        [(1, 0, 0.4), (2, 1, 0.7), (0, 2, 0.5)],
    ),
    "cycle_with_tail": (
        [(100, 0.05, 0.45, 0.2), (200, 0.1, 0.6, 0.3), (50, 0.02, 0.4, 0.0), (80, 0.07, 0.5, 0.1),
         (120, 0.03, 0.45, 0.25)],
        # 3 -> {0,1} (a debtor feeding the pair), pair 0<->1, 2 lends to 1, 4 lends to 2 and 0
        [(0, 3, 0.6), (1, 0, 0.3), (0, 1, 0.5), (2, 1, 0.4), (4, 2, 0.7), (4, 0, 0.2)],
    ),
    "sure_default": (
        [(100, 0.05, 0.45, 0.2), (200, 1.0, 0.6, 0.3), (50, 0.02, 0.4, 0.15), (80, 1.0, 0.5, 0.0)],
        [(0, 1, 0.3), (2, 0, 0.5), (1, 2, 0.4)],
    ),
    "no_correlation": (
        [(100, 0.05, 0.45, 0.0), (200, 0.1, 0.6, 0.0), (50, 0.02, 0.4, 0.2), (80, 0.04, 0.5, 0.0)],
        [(1, 0, 0.3), (2, 1, 1.0), (3, 2, 0.0)],
    ),
    # every R = 0: no rotation uses the factor register, which Aer would truncate away
    "all_uncorrelated": (
        [(100, 0.05, 0.45, 0.0), (200, 0.1, 0.6, 0.0), (50, 0.02, 0.4, 0.0)],
        [(0, 1, 1.0), (2, 1, 0.4), (2, 0, 0.5)],
    ),
}


def make_model(spec: Spec, factor_qubits: int = 3) -> LinkedFactorModel:
    obligors, links = spec
    book = Book(
        name="test",
        currency="EUR",
        obligors=tuple(
            Obligor(id=f"O{i}", ead=e, pd=p, lgd=g, asset_correlation=r)
            for i, (e, p, g, r) in enumerate(obligors)
        ),
        links=tuple(Link(creditor=f"O{c}", debtor=f"O{d}", contagion=q) for c, d, q in links),
        factor_qubits=factor_qubits,
    )
    return LinkedFactorModel.from_book(book)


def law_error(losses: np.ndarray, probs: np.ndarray, reference: dict[float, float]) -> float:
    mine = {round(float(x), 6): float(p) for x, p in zip(losses, probs, strict=True)}
    ref = {round(float(x), 6): float(p) for x, p in reference.items()}
    return max(abs(mine.get(x, 0.0) - ref.get(x, 0.0)) for x in set(mine) | set(ref))


@pytest.mark.parametrize("name", sorted(BOOKS))
def test_exact_law_matches_enumeration(name: str) -> None:
    """The statevector law equals brute-force enumeration on the same Gauss–Hermite nodes."""
    spec = BOOKS[name]
    model = make_model(spec)
    grid = gauss_hermite(8)
    dist = CircuitEngine().run(model)
    obligors, links = spec
    ead, pd, lgd, rho = (list(col) for col in zip(*obligors, strict=True))
    # independent reference: enumeration of own defaults and live links (tests/reference.py)
    law, dp = enumerate_law(ead, lgd, pd, rho, links, grid.nodes, grid.weights)
    assert law_error(dist.losses, dist.probabilities, law) < 1e-10
    np.testing.assert_allclose(dist.default_probability, dp, rtol=0, atol=1e-10)
    assert dist.engine == "circuit"
    assert dist.samples is None and dist.seed is None
    assert dist.settings["factor_nodes"] == 8
    assert dist.settings["qubits"] == model.n_obligors + 3


def test_law_the_same_when_aggregated_in_chunks(monkeypatch: pytest.MonkeyPatch) -> None:
    """Merging pattern losses chunk by chunk gives the same law as in one chunk."""
    model = make_model(BOOKS["cycle_with_tail"])
    whole = CircuitEngine().run(model)
    monkeypatch.setattr(circuit_engine, "_CHUNK_BITS", 2)
    chunked = CircuitEngine().run(model)
    np.testing.assert_allclose(chunked.losses, whole.losses, rtol=1e-12)
    np.testing.assert_allclose(chunked.probabilities, whole.probabilities, rtol=0, atol=1e-14)


def test_unlinked_book_is_binomial_mixture() -> None:
    """Without links the law is the finite homogeneous binomial mixture on the factor nodes."""
    n, pd, rho, k = 6, 0.05, 0.2, 4
    model = make_model(([(100.0, pd, 0.5, rho)] * n, []), factor_qubits=k)
    grid = gauss_hermite(2**k)
    p = conditional_default_probability(np.array([pd]), np.array([rho]), grid.nodes)[:, 0]
    counts = np.arange(n + 1)
    # finite homogeneous book (REFERENCES.md): sum_j w_j C(n,k) p_j^k (1-p_j)^(n-k)
    expected = (
        grid.weights[:, None] * comb(n, counts)[None, :]
        * p[:, None] ** counts[None, :] * (1.0 - p[:, None]) ** (n - counts)[None, :]
    ).sum(axis=0)
    dist = CircuitEngine().run(model)
    np.testing.assert_allclose(dist.losses, 50.0 * counts)
    np.testing.assert_allclose(dist.probabilities, expected, rtol=0, atol=1e-12)
    np.testing.assert_allclose(dist.default_probability, np.full(n, (grid.weights * p).sum()),
                               rtol=0, atol=1e-12)


def test_published_homogeneous_values() -> None:
    """A 16-loan homogeneous book with 32 factor nodes hits the published quadrature values."""
    model = make_model(([(1.0, 0.01, 1.0, 0.2)] * 16, []), factor_qubits=5)
    cdf = CircuitEngine().run(model).cdf
    # REFERENCES.md, finite homogeneous book (scipy quad): n=16, PD=1%, R=0.2
    # (values given to 7 decimals; 32 Gauss-Hermite nodes are within 5e-8 of the integral)
    np.testing.assert_allclose(cdf[:3], [0.8708165, 0.9764032, 0.9946722], rtol=0, atol=1e-7)


def test_controls_left_out_where_they_do_not_matter() -> None:
    """An unlinked R=0 obligor is a plain rotation; one without debtors sees only the factor."""
    model = make_model(BOOKS["no_correlation"])
    plan = {rot.target: rot for rot in rotation_plan(model)}
    k = 3
    assert plan[0].controls == ()  # R = 0, no debtors
    assert plan[1].controls == (k + 0,)  # R = 0, one debtor
    assert plan[2].controls == (0, 1, 2, k + 1)  # R > 0 and one debtor
    assert plan[3].controls == ()  # R = 0, its only link has q = 0
    qc = build_circuit(model)
    names = [inst.operation.name for inst in qc.data]
    assert names.count("multiplexer") == 2 and names.count("ry") == 2
    assert "multiplexer" in AerSimulator().target.operation_names
    sure = {rot.target: rot for rot in rotation_plan(make_model(BOOKS["sure_default"]))}
    assert sure[1].controls == () and sure[1].probability[0] == 1.0


def test_circuit_registers_and_measurement() -> None:
    """The circuit has a factor and an obligor register and measures into ``defaults``."""
    model = make_model(BOOKS["cycle_with_tail"])
    qc = build_circuit(model, measure=True)
    assert [(r.name, r.size) for r in qc.qregs] == [("factor", 3), ("obligor", 5)]
    assert [(r.name, r.size) for r in qc.cregs] == [("defaults", 5)]
    assert qc.count_ops()["measure"] == 5


def test_shots_reproducible_and_close_to_exact() -> None:
    """Shots with one seed repeat exactly, and every atom lies within 5 sigma of the exact law."""
    model = make_model(BOOKS["cycle_with_tail"])
    shots = 20_000
    exact = CircuitEngine().run(model)
    first = CircuitEngine(shots=shots, seed=11).run(model)
    again = CircuitEngine(shots=shots, seed=11).run(model)
    other = CircuitEngine(shots=shots, seed=12).run(model)
    np.testing.assert_array_equal(first.losses, again.losses)
    np.testing.assert_array_equal(first.probabilities, again.probabilities)
    assert not np.array_equal(first.probabilities, other.probabilities) or not np.array_equal(
        first.losses, other.losses
    )
    assert first.samples == shots and first.seed == 11 and first.settings["shots"] == shots
    freq = dict(zip(np.round(first.losses, 6), first.probabilities, strict=True))
    for x, p in zip(np.round(exact.losses, 6), exact.probabilities, strict=True):
        sigma = np.sqrt(p * (1.0 - p) / shots)
        assert abs(freq.get(x, 0.0) - p) <= 5.0 * sigma + 1.0 / shots
    sig = np.sqrt(exact.default_probability * (1 - exact.default_probability) / shots)
    assert np.all(np.abs(first.default_probability - exact.default_probability) <= 5 * sig + 1e-12)
    se = first.diagnostics["expected_loss_standard_error"]
    assert abs(first.mean - exact.mean) <= 5.0 * se


def test_refusal_when_statevector_too_large() -> None:
    """Too many qubits gives a message with the memory and the other engines; run raises."""
    model = make_model(BOOKS["chain"])  # 4 obligors + 3 factor qubits
    engine = CircuitEngine(max_qubits=6)
    reason = engine.refusal(model)
    assert reason is not None
    assert "7 qubits" in reason and "2.0 KiB" in reason
    assert "'sample'" in reason and "'exact'" in reason
    with pytest.raises(EngineRefusedError, match="7 qubits"):
        engine.run(model)
    assert CircuitEngine(max_qubits=7).refusal(model) is None


def test_refusal_of_too_many_obligors(monkeypatch: pytest.MonkeyPatch) -> None:
    """A book with more obligors than the pattern limit is refused, naming the other engines."""
    monkeypatch.setattr(circuit_engine, "MAX_OBLIGORS", 3)
    reason = CircuitEngine().refusal(make_model(BOOKS["chain"]))
    assert reason is not None and "4 obligors" in reason and "'exact'" in reason


def test_refusal_of_large_cycle_and_wide_multiplexer() -> None:
    """A cycle beyond the joint-load limit or a rotation with too many controls is refused."""
    ring = make_model(([(1.0, 0.01, 0.5, 0.1)] * 15, [(i, (i + 1) % 15, 0.1) for i in range(15)]))
    reason = CircuitEngine().refusal(ring)
    assert reason is not None and "cycle" in reason and "'sample'" in reason
    debtors = MAX_CONTROLS - 3 + 1
    star = make_model(([(1.0, 0.01, 0.5, 0.1)] * (debtors + 1),
                       [(0, i, 0.1) for i in range(1, debtors + 1)]))
    reason = CircuitEngine().refusal(star)
    assert reason is not None and "O0" in reason and str(MAX_CONTROLS) in reason
    with pytest.raises(EngineRefusedError):
        build_circuit(star)


def test_size_and_qasm_export() -> None:
    """The size is counted after transpiling to u/cx and the export is OpenQASM 3 without resets."""
    model = make_model(BOOKS["cycle_with_tail"])
    qc = build_circuit(model)
    size = circuit_size(qc)
    assert size.qubits == 8
    assert size.two_qubit_gates > 0 and size.depth > size.two_qubit_gates // 8
    text = to_qasm3(qc)
    assert "OPENQASM 3" in text and "reset" not in text
    assert "qubit[8]" in text or "qubit[3] factor" in text
    measured = to_qasm3(build_circuit(model, measure=True))
    assert "measure" in measured


@pytest.mark.parametrize("name", ["cycle_with_tail", "sure_default", "no_correlation"])
def test_decomposed_circuit_prepares_the_same_state(name: str) -> None:
    """The exported u/cx circuit gives the same pattern probabilities as Aer's native run."""
    model = make_model(BOOKS[name])
    qc = build_circuit(model)
    plain = decompose_circuit(qc)
    assert set(plain.count_ops()) <= {"u", "cx"}
    native = qc.copy()
    native.save_probabilities()
    expected = AerSimulator(method="statevector").run(native, shots=1).result().data()
    probs = Statevector(plain).probabilities()
    np.testing.assert_allclose(probs, expected["probabilities"], rtol=0, atol=1e-10)


def test_wide_multiplexer_with_extreme_probabilities_exports() -> None:
    """A creditor of many low-PD debtors (conditional PDs near 0 and 1) still decomposes."""
    obligors = [(100.0 + i, 0.02, 0.45, 0.2) for i in range(8)]
    model = make_model((obligors, [(0, i, 0.2) for i in range(1, 8)]), factor_qubits=5)
    size = circuit_size(build_circuit(model))
    # the multiplexed RY of obligor 0 has 5 + 7 controls: 2^12 cx (Mottonen et al., 2004)
    assert size.qubits == 13 and size.two_qubit_gates >= 2**12


def test_made_by_registry_with_settings() -> None:
    """make_engine builds the circuit engine; the exact law reports no seed."""
    model = make_model(BOOKS["star"])
    engine = make_engine("circuit", RunOptions())
    assert isinstance(engine, CircuitEngine)
    dist = engine.run(model, progress=lambda done, total: None)
    assert dist.seed is None and abs(dist.probabilities.sum() - 1.0) < 1e-12


def test_all_uncorrelated_linked_book_with_shots_matches_exact() -> None:
    """With every R = 0 (idle factor register) measured shots agree with the exact law."""
    model = make_model(BOOKS["all_uncorrelated"])
    exact = CircuitEngine().run(model)
    shots = 20_000
    sampled = CircuitEngine(shots=shots, seed=3).run(model)
    sig = np.sqrt(exact.default_probability * (1 - exact.default_probability) / shots)
    assert np.all(np.abs(sampled.default_probability - exact.default_probability) <= 5 * sig)
    # independent defaults: P(D_0) = p0 + q (1 - p0) p1 by hand
    assert exact.default_probability[0] == pytest.approx(0.05 + 1.0 * 0.95 * 0.1, abs=1e-12)


def test_refusal_of_a_book_of_thousands_of_obligors_names_its_size() -> None:
    """A 2,000-obligor book is refused with a message, not an OverflowError from its size."""
    n = 2000
    spec: Spec = ([(100.0, 0.01, 0.45, 0.2)] * n, [(i, i + 1, 0.3) for i in range(n - 1)])
    reason = CircuitEngine().refusal(make_model(spec))
    assert reason is not None and "2^2007 B" in reason  # 16 bytes * 2^(2000 + 3)
