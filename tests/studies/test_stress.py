"""`debtsim stress`: files written, the scenarios table, errors, and agreement with `run`."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from debtsim.book.loader import load_book
from debtsim.cli import app
from debtsim.options import RunOptions
from debtsim.runner import run_book
from debtsim.studies.execution import Execution
from debtsim.studies.scenarios import Scenario, apply_scenario
from debtsim.studies.stress import run_stress

ROOT = Path(__file__).resolve().parents[2]
HARBOUR = ROOT / "scenarios" / "harbour_small.yaml"
HARBOUR_STRESS = ROOT / "scenarios" / "harbour_small_stress.yaml"

BOOK_YAML = """\
book: Stress Book
currency: EUR
obligors:
  - {id: A, ead: 100, pd: 0.02, lgd: 0.5, asset_correlation: 0.2, sector: shipping}
  - {id: B, ead: 200, pd: 0.01, lgd: 0.4, asset_correlation: 0.1, sector: retail}
  - {id: C, ead: 50, pd: 0.05, lgd: 0.6, asset_correlation: 0.15, sector: shipping}
links:
  - {creditor: A, debtor: B, contagion: 0.3}
  - {creditor: B, debtor: A, contagion: 0.2}
  - {creditor: C, debtor: A, contagion: 0.4}
model:
  factor_qubits: 3
"""

SCENARIOS_YAML = """\
scenarios:
  - name: Downturn
    pd_scale: 2
    asset_correlation_shift: 0.05
  - name: shipping hit
    sectors:
      shipping: {pd_scale: 3, lgd_shift: 0.1}
  - name: B fails
    defaulted: [B]
  - name: unchanged
"""

COLUMNS = [
    "scenario",
    "expected_loss",
    "loss_std",
    "var_0.99",
    "expected_shortfall_0.99",
    "economic_capital_0.99",
    "var_0.999",
    "expected_shortfall_0.999",
    "economic_capital_0.999",
]


def _engine() -> str:
    try:
        import debtsim.engines.exact.engine  # noqa: F401
    except ImportError:
        return "circuit"
    return "exact"


@pytest.fixture
def files(tmp_path: Path) -> tuple[Path, Path]:
    book = tmp_path / "book.yaml"
    book.write_text(BOOK_YAML, encoding="utf-8")
    scenarios = tmp_path / "stress.yaml"
    scenarios.write_text(SCENARIOS_YAML, encoding="utf-8")
    return book, scenarios


def test_stress_writes_table_folders_and_report(tmp_path: Path, files: tuple[Path, Path]) -> None:
    """scenarios.csv has exactly the specified columns, base first; one folder per run."""
    book, scenarios = files
    out = tmp_path / "out"
    result = CliRunner().invoke(
        app, ["stress", str(book), str(scenarios), "--out", str(out), "--engine", _engine()]
    )
    assert result.exit_code == 0, result.output
    table = pd.read_csv(out / "scenarios.csv")
    assert list(table.columns) == COLUMNS
    assert list(table["scenario"]) == ["base", "Downturn", "shipping hit", "B fails", "unchanged"]
    for folder in ("base", "downturn", "shipping-hit", "b-fails", "unchanged"):
        for name in ("summary.json", "loss_distribution.csv", "obligors.csv", "report.html"):
            assert (out / folder / name).is_file(), (folder, name)
    page = (out / "report.html").read_text(encoding="utf-8")
    assert page.count("data:image/png;base64,") == 3
    assert 'href="b-fails/report.html"' in page
    summary = json.loads((out / "summary.json").read_text())
    assert summary["kind"] == "stress" and summary["generator"].startswith("debtsim")
    # the neutral scenario reproduces the base; stresses raise the expected loss
    measures = table.drop(columns="scenario").to_numpy()
    np.testing.assert_array_equal(measures[4], measures[0])
    assert (table["expected_loss"][1:4] > table["expected_loss"][0]).all()
    movers = pd.read_csv(out / "default_probabilities.csv")
    assert movers.loc[0, "id"] == "B" and movers.loc[0, "B fails"] == pytest.approx(1.0)


def test_stress_base_row_equals_plain_run(tmp_path: Path, files: tuple[Path, Path]) -> None:
    """The base row and base folder hold what `debtsim run` writes for the same options."""
    book, scenarios = files
    runner = CliRunner()
    common = ["--engine", _engine(), "--seed", "11", "--level", "0.95", "-q"]
    assert (
        runner.invoke(app, ["run", str(book), "--out", str(tmp_path / "run"), *common]).exit_code
        == 0
    )
    result = runner.invoke(
        app, ["stress", str(book), str(scenarios), "--out", str(tmp_path / "st"), *common]
    )
    assert result.exit_code == 0, result.output
    run_summary = json.loads((tmp_path / "run" / "summary.json").read_text())
    base_summary = json.loads((tmp_path / "st" / "base" / "summary.json").read_text())
    assert base_summary["measures"] == run_summary["measures"]
    assert base_summary["copula"]["measures"] == run_summary["copula"]["measures"]
    row = pd.read_csv(tmp_path / "st" / "scenarios.csv").iloc[0]
    m = run_summary["measures"]
    assert row["expected_loss"] == m["expected_loss"]
    assert row["var_0.95"] == m["var"]["0.95"]
    assert row["expected_shortfall_0.95"] == m["expected_shortfall"]["0.95"]
    assert row["economic_capital_0.95"] == m["economic_capital"]["0.95"]


def test_scenario_rows_equal_runs_of_stressed_books(files: tuple[Path, Path]) -> None:
    """Each row equals an analysis of the book stressed by hand with the same options."""
    book_path, scenarios_path = files
    from debtsim.studies.scenarios import load_scenarios

    book = load_book(book_path)
    scenarios = load_scenarios(scenarios_path, book)
    options = RunOptions(engine=_engine(), copula=False)
    result = run_stress(book, scenarios, options)
    for scenario, (_, row) in zip(scenarios, result.table.iloc[1:].iterrows(), strict=True):
        alone = run_book(apply_scenario(book, scenario), options).measures
        assert row["expected_loss"] == alone.expected_loss
        assert row["var_0.999"] == alone.var[0.999]
    assert result.scenarios[0] == Scenario(name="base")


def test_bad_scenario_file_exits_2_writes_nothing(tmp_path: Path, files: tuple[Path, Path]) -> None:
    """A bad scenario file gives file:line messages on stderr, exit 2 and no folder."""
    book, _ = files
    bad = tmp_path / "bad.yaml"
    bad.write_text("- name: x\n  pd_scale: -1\n- name: y\n  defaulted: [Z]\n", encoding="utf-8")
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["stress", str(book), str(bad), "--out", str(out)])
    assert result.exit_code == 2
    assert f"{bad}:2: scenarios[0].pd_scale: must be greater than 0, got -1" in result.stderr
    assert f"{bad}:4: scenarios[1].defaulted[0]: no obligor with id 'Z' in the book" in (
        result.stderr
    )
    assert "Traceback" not in result.output
    assert not out.exists()


def test_stress_refuses_foreign_folder(tmp_path: Path, files: tuple[Path, Path]) -> None:
    """An existing folder that is not a debtsim output is refused before any run."""
    book, scenarios = files
    out = tmp_path / "mine"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    result = CliRunner().invoke(app, ["stress", str(book), str(scenarios), "--out", str(out)])
    assert result.exit_code == 2
    assert (out / "keep.txt").read_text() == "x"


def test_stress_on_demo_book(tmp_path: Path) -> None:
    """The bundled demo book and its scenario file run end to end."""
    out = tmp_path / "hs"
    result = CliRunner().invoke(
        app,
        ["stress", str(HARBOUR), str(HARBOUR_STRESS), "--out", str(out),
         "--no-compare-without-links"],
    )
    assert result.exit_code == 0, result.output
    table = pd.read_csv(out / "scenarios.csv")
    assert list(table.columns) == COLUMNS and len(table) == 5
    assert "tug operator fails" in result.stdout


def test_stress_on_local_cluster_matches_in_process(files: tuple[Path, Path]) -> None:
    """Stress runs on a 2-worker LocalCluster give the same table as in-process."""
    from debtsim.studies.scenarios import load_scenarios

    book = load_book(files[0])
    scenarios = load_scenarios(files[1], book)
    options = RunOptions(engine="circuit", shots=2000, copula=False)
    here = run_stress(book, scenarios, options)
    there = run_stress(book, scenarios, options, execution=Execution(workers=2))
    pd.testing.assert_frame_equal(here.table, there.table, check_exact=True)
    pd.testing.assert_frame_equal(
        here.default_probabilities, there.default_probabilities, check_exact=True
    )


def test_stress_writes_each_runs_contributions_and_the_movers(tmp_path) -> None:
    """Every scenario sub-folder holds contributions.csv; movers compare ES parts to the base."""
    import pandas as pd

    import debtsim
    from debtsim.book.records import Book, Link, Obligor
    from debtsim.studies.scenarios import Scenario, load_scenarios

    book = Book(name="s", currency="EUR", obligors=tuple(
        Obligor(id=f"M{i}", ead=1000.0 + 100 * i, pd=0.02, lgd=0.5, asset_correlation=0.2,
                sector="a" if i < 2 else "b") for i in range(4)),
        links=(Link(creditor="M1", debtor="M0", contagion=0.5),))
    scen_file = tmp_path / "s.yaml"
    scen_file.write_text("scenarios:\n  - name: worse\n    pd_scale: 3\n", encoding="utf-8")
    scenarios = load_scenarios(scen_file, book)
    assert all(isinstance(s, Scenario) for s in scenarios)
    result = debtsim.stress(book, scenarios, engine="exact")
    movers = result.contribution_movers
    assert list(movers.columns) == ["scenario", "id", "sector", "base", "stressed", "change",
                                    "contagion_change"]
    base = result.runs[0].contributions.set_index("id")["expected_shortfall_0.999"]
    worse = result.runs[1].contributions.set_index("id")["expected_shortfall_0.999"]
    for _, row in movers.iterrows():
        assert row["change"] == pytest.approx(worse[row["id"]] - base[row["id"]])
    out = debtsim.write_stress(result, tmp_path / "out")
    for folder in result.folders:
        assert (out / folder / "contributions.csv").exists()
    assert len(pd.read_csv(out / "contribution_movers.csv")) == len(movers)
