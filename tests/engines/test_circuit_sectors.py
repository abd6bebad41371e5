"""The circuit engine with sector loadings: same nodes as exact, same law."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from debtsim.book.dependence import DependenceSpec
from debtsim.engines.circuit.engine import CircuitEngine
from debtsim.errors import EngineRefusedError
from debtsim.model.factor_grid import gauss_hermite
from debtsim.model.specification import LinkedFactorModel
from tests.engines.test_exact_sectors import run, sector_book, with_sectors
from tests.reference import enumerate_sector_law

LINKED = sector_book(6, "ab", [(0, 1, 0.5), (1, 0, 0.3), (3, 2, 0.7), (4, 3, 0.2)], seed=11)


def as_dict(dist):  # type: ignore[no-untyped-def]
    return {
        round(float(x), 9): float(p) for x, p in zip(dist.losses, dist.probabilities, strict=True)
    }


def worst(a: dict[float, float], b: dict[float, float]) -> float:
    return max(abs(a.get(k, 0.0) - b.get(k, 0.0)) for k in set(a) | set(b))


@pytest.mark.parametrize("loadings", [{"a": 0.8, "b": 0.4}, {"a": 0.0, "b": 1.0}])
def test_circuit_exact_and_enumeration_agree_on_same_nodes(loadings: dict[str, float]) -> None:
    """Linked groups spanning two sectors: circuit = exact = brute force to 1e-10."""
    book = with_sectors(LINKED, loadings)
    model = LinkedFactorModel.from_book(book)
    g, x = gauss_hermite(8), gauss_hermite(4)
    circuit = CircuitEngine(factor_grid=g, sector_grid=x).run(model)
    exact = run(book, factor_grid=g, sector_grid=x)
    assert model.dependence is not None
    law, dp = enumerate_sector_law(
        model.ead,
        model.lgd,
        model.pd,
        model.asset_correlation,
        model.dependence.sector_of.tolist(),
        list(loadings.values()),
        list(
            zip(
                model.creditor.tolist(),
                model.debtor.tolist(),
                model.contagion.tolist(),
                strict=True,
            )
        ),
        g.nodes,
        g.weights,
        x.nodes,
        x.weights,
    )
    assert worst(as_dict(circuit), as_dict(exact)) < 1e-10
    assert worst(as_dict(circuit), law) < 1e-10
    np.testing.assert_allclose(circuit.default_probability, dp, atol=1e-10)
    assert circuit.settings["sector_nodes"] == 4


def test_default_sector_registers_and_loading_one_is_the_one_factor_circuit() -> None:
    """sector_qubits 2 by default; every loading 1 drops the sector controls entirely."""
    ones = with_sectors(LINKED, {"a": 1.0, "b": 1.0})
    one = CircuitEngine().run(LinkedFactorModel.from_book(replace(LINKED, dependence=None)))
    sec = CircuitEngine().run(LinkedFactorModel.from_book(ones))
    assert worst(as_dict(one), as_dict(sec)) < 1e-12
    assert sec.settings["qubits"] == 6 + 5 + 2 * 2


@pytest.mark.parametrize(
    "spec",
    [
        DependenceSpec(sectors=("a", "b"), correlation=((1.0, 0.3), (0.3, 1.0))),
        DependenceSpec(
            sectors=("a", "b"), loadings=(0.5, 0.5), family="student_t", degrees_of_freedom=5.0
        ),
    ],
)
def test_matrix_form_and_student_t_are_refused_naming_exact(spec: DependenceSpec) -> None:
    """The circuit refuses what it cannot load, naming the exact engine."""
    model = LinkedFactorModel.from_book(replace(LINKED, dependence=spec))
    reason = CircuitEngine().refusal(model)
    assert reason is not None and "'exact'" in reason
    with pytest.raises(EngineRefusedError):
        CircuitEngine().run(model)


def test_qubit_limit_is_refused_naming_exact() -> None:
    """Past the qubit limit: refused with the count, naming exact."""
    spec = DependenceSpec(sectors=("a", "b"), loadings=(0.5, 0.5), sector_qubits=4)
    model = LinkedFactorModel.from_book(replace(LINKED, dependence=spec))
    reason = CircuitEngine(max_qubits=12).refusal(model)
    assert reason is not None and "19 qubits" in reason and "'exact'" in reason


def test_circuit_report_of_a_sector_book_counts_the_sector_registers() -> None:
    """debtsim circuit: global + sector registers counted; QASM has the sector registers."""
    import debtsim

    report = debtsim.circuit_report(with_sectors(LINKED, {"a": 0.8, "b": 0.4}))
    assert report.qubits == 6 + 5 + 2 * 2 and report.factor_qubits == 9
    assert report.refusal is None
    assert "sector_1" in report.qasm()
