"""An engine's limit is a refusal that auto routes around, never a traceback."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

import debtsim
from debtsim.book.records import Book, Link, Obligor
from debtsim.cli import app
from debtsim.engines import choose_engine
from debtsim.engines.exact.engine import ExactEngine
from debtsim.errors import EngineRefusedError
from debtsim.model.specification import LinkedFactorModel
from debtsim.options import RunOptions

SHARP = Book(
    "sharp",
    "EUR",
    (Obligor("A", 100.0, 0.02, 0.5, 0.99999), Obligor("B", 200.0, 0.01, 0.4, 0.999995)),
    (Link("A", "B", 0.3),),
)


def test_exact_refuses_a_grid_it_cannot_build() -> None:
    """A correlation next to 1 (built in code, past the loader) is a refusal naming the way out."""
    reason = ExactEngine().refusal(LinkedFactorModel.from_book(SHARP))
    assert reason is not None and "factor grid would need" in reason
    assert reason.endswith("use --engine sample")
    with pytest.raises(EngineRefusedError, match="use --engine sample"):
        choose_engine("exact", LinkedFactorModel.from_book(SHARP), RunOptions())


def test_auto_routes_around_the_refusal() -> None:
    """auto picks another engine and says why exact was passed over."""
    choice = choose_engine("auto", LinkedFactorModel.from_book(SHARP), RunOptions())
    assert choice.engine.name != "exact"
    assert "exact: the factor grid would need" in choice.reason
    result = debtsim.run(SHARP, samples=2_000)
    assert result.measures.expected_loss > 0


def test_grid_is_built_once_for_refusal_and_run(monkeypatch: pytest.MonkeyPatch) -> None:
    """Checking the refusal does not double the cost of building the grid."""
    engine = ExactEngine()
    model = LinkedFactorModel.from_book(debtsim.load_book("scenarios/harbour_small.yaml"))
    calls = []
    real = engine.default_factor_grid
    monkeypatch.setattr(engine, "default_factor_grid", lambda m: calls.append(1) or real(m))
    assert engine.refusal(model) is None
    engine.run(model)
    assert calls == [1]


GOOD_EDGE = """\
obligors:
  - {id: A, ead: 100, pd: 0.02, lgd: 0.5, asset_correlation: 0.999}
  - {id: B, ead: 200, pd: 0.01, lgd: 0.4, asset_correlation: 0.999}
  - {id: C, ead: 50, pd: 0.05, lgd: 0.6, asset_correlation: 0.0}
links:
  - {creditor: A, debtor: B, contagion: 0.3}
"""


@pytest.mark.parametrize("engine", ["auto", "exact", "circuit", "sample"])
def test_a_book_that_passes_check_runs(tmp_path: Path, engine: str) -> None:
    """The largest correlation check accepts runs on every engine, exit 0."""
    book = tmp_path / "edge.yaml"
    book.write_text(GOOD_EDGE, encoding="utf-8")
    runner = CliRunner()
    assert runner.invoke(app, ["check", str(book)]).exit_code == 0
    done = runner.invoke(
        app, ["run", str(book), "--engine", engine, "--out", str(tmp_path / "out"), "-q"]
    )
    assert done.exit_code == 0, done.output
