"""The library's front door: ``import debtsim`` and the README's "Use from Python"."""

from __future__ import annotations

import dataclasses
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

import debtsim
from debtsim.cli import app
from tests.conftest import DEMO_BOOKS, REPO_ROOT

ROOT = REPO_ROOT
HARBOUR = DEMO_BOOKS["harbour_small"]


@pytest.fixture(scope="module")
def result(harbour_book: debtsim.Book) -> debtsim.RunResult:
    return debtsim.run(harbour_book, engine="exact")


def test_readme_example_runs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The README's Python example runs as written, from a copy of the repository's demos."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Use from Python", 1)[1]
    code = re.search(r"```python\n(.*?)```", section, re.S)
    assert code is not None
    shutil.copytree(ROOT / "scenarios", tmp_path / "scenarios")
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, object] = {}
    exec(compile(code.group(1), "README.md", "exec"), namespace)  # noqa: S102
    written = tmp_path / "reports" / "harbour_small-from-python"
    assert {p.name for p in written.iterdir()} >= {"summary.json", "report.html"}
    assert isinstance(namespace["grid"], pd.DataFrame) and len(namespace["grid"]) == 4


def test_done_means_one_liner_prints_the_cli_figure(tmp_path: Path) -> None:
    """The issue's one-liner prints the VaR 99.9% that ``debtsim run`` writes."""
    code = ("import debtsim; r = debtsim.run(debtsim.load_book('scenarios/harbour_small.yaml')); "
            "print(r.measures.var[0.999])")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                         text=True, check=True).stdout
    cli = CliRunner().invoke(app, ["run", str(HARBOUR), "--out", str(tmp_path / "o"), "-q"])
    assert cli.exit_code == 0, cli.output
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert float(out) == summary["measures"]["var"]["0.999"]


def test_measures_keyed_by_float_and_frozen(result: debtsim.RunResult) -> None:
    """``var[0.999]`` works, the mappings are read-only, the result is frozen."""
    m = result.measures
    assert set(m.var) == {0.99, 0.999}
    assert m.economic_capital[0.999] == pytest.approx(m.var[0.999] - m.expected_loss)
    with pytest.raises(TypeError):
        m.var[0.5] = 1.0  # type: ignore[index]
    with pytest.raises(dataclasses.FrozenInstanceError):
        result.engine = "other"  # type: ignore[misc]
    assert result.copula_measures is not None and 0.999 in result.copula_measures.var


def test_result_write_equals_cli_files(result: debtsim.RunResult, tmp_path: Path) -> None:
    """``RunResult.write`` writes exactly the files (and figures) of ``debtsim run``."""
    lib = result.write(tmp_path / "lib")
    cli = CliRunner().invoke(app, ["run", str(HARBOUR), "--engine", "exact",
                                   "--out", str(tmp_path / "cli"), "-q"])
    assert cli.exit_code == 0, cli.output
    names = sorted(p.name for p in lib.iterdir())
    assert names == sorted(p.name for p in (tmp_path / "cli").iterdir())
    for name in ("loss_distribution.csv", "obligors.csv"):
        assert (lib / name).read_text() == (tmp_path / "cli" / name).read_text()
    a = json.loads((lib / "summary.json").read_text())
    b = json.loads((tmp_path / "cli" / "summary.json").read_text())
    assert a["measures"] == b["measures"] and a["copula"] == b["copula"]


def test_frames(result: debtsim.RunResult) -> None:
    """Loss distribution and obligors come as DataFrames with the CSV columns."""
    frame = result.loss_distribution.to_frame()
    assert list(frame.columns) == ["loss", "probability"]
    assert frame["probability"].sum() == pytest.approx(1.0, abs=1e-12)
    assert frame["loss"].is_monotonic_increasing
    obligors = result.obligors
    assert list(obligors.columns[:10]) == ["id", "name", "sector", "ead", "pd", "lgd",
                                           "asset_correlation", "maturity",
                                           "default_probability", "expected_loss"]
    assert "own_default_probability" not in obligors.columns
    assert obligors["expected_loss"].sum() == pytest.approx(result.measures.expected_loss)
    assert isinstance(result.diagnostics, dict) or hasattr(result.diagnostics, "get")


def test_no_links_comparison_reuses_the_law(harbour_book: debtsim.Book) -> None:
    """A book without links is its own comparison: the same figures, computed once."""
    plain = dataclasses.replace(harbour_book, links=())
    r = debtsim.run(plain, engine="exact")
    assert r.copula_distribution is r.loss_distribution
    assert r.copula_measures == r.measures


def test_options_checked_with_the_root_error() -> None:
    """Bad options raise OptionError, a DebtsimError and a ValueError, naming the option."""
    book = debtsim.load_book(HARBOUR)
    for kwargs, option in (({"levels": (1.5,)}, "levels"), ({"samples": 0}, "samples"),
                           ({"levels": 0.99}, "levels"), ({"levels": []}, "levels"),
                           ({"seed": -1}, "seed"), ({"engine": "quantum"}, "engine")):
        with pytest.raises(debtsim.OptionError) as caught:
            debtsim.run(book, **kwargs)  # type: ignore[arg-type]
        assert caught.value.option == option
        assert isinstance(caught.value, debtsim.DebtsimError)
        assert isinstance(caught.value, ValueError)


def test_stress_and_sweep_return_tables() -> None:
    """``stress`` gives the scenarios.csv frame; ``sweep`` the sweep.csv frame."""
    book = debtsim.load_book(HARBOUR)
    scenarios = debtsim.load_scenarios(ROOT / "scenarios" / "harbour_small_stress.yaml", book)
    s = debtsim.stress(book, scenarios, engine="exact", copula=False)
    assert list(s.table["scenario"])[0] == "base" and len(s.table) == len(scenarios) + 1
    assert s.table.loc[0, "var_0.999"] == debtsim.run(book, engine="exact").measures.var[0.999]
    g = debtsim.sweep(book, {"pd_scale": [1.0, 2.0]}, engine="exact")
    assert list(g["pd_scale"]) == [1.0, 2.0] and list(g["status"]) == ["ok", "ok"]
    assert g.loc[1, "expected_loss"] > g.loc[0, "expected_loss"]
    assert g.attrs["sweep"]["computed"] == 2 and g.attrs["sweep"]["folder"] is None
    with pytest.raises(debtsim.BookError):
        debtsim.sweep(book, {"pd_scal": [1.0]})


def test_circuit_report_exports_measured_obligors(harbour_book: debtsim.Book) -> None:
    """The OpenQASM 3 export measures every obligor qubit, so each shot is a scenario."""
    report = debtsim.circuit_report(harbour_book)
    text = report.qasm()
    assert text.startswith("OPENQASM 3")
    assert text.count("measure") == len(harbour_book.obligors)
    assert report.refusal is None and report.qubits == report.factor_qubits + report.obligors


def test_contributions_can_be_switched_off(tmp_path: Path, harbour_path: Path) -> None:
    """``--no-contributions`` writes the contract files without the allocation tables."""
    out = tmp_path / "nc"
    cli = CliRunner().invoke(app, ["run", str(harbour_path), "--no-contributions",
                                   "--out", str(out), "-q"])
    assert cli.exit_code == 0, cli.output
    names = {p.name for p in out.iterdir()}
    assert {"summary.json", "loss_distribution.csv", "obligors.csv", "report.html"} <= names
    assert "contributions.csv" not in names
    cli = CliRunner().invoke(app, ["run", str(harbour_path), "--out", str(out), "-q"])
    assert cli.exit_code == 0, cli.output
    assert (out / "contributions.csv").exists()


def test_options_the_engine_does_not_use_are_named(harbour_book: debtsim.Book) -> None:
    """--shots or --samples given to an engine that does not use them gives a note."""
    r = debtsim.run(harbour_book, engine="exact", shots=100, samples=5000, copula=False,
                    contributions=False)
    assert any("shots (100)" in n and "exact" in n for n in r.notes)
    assert any("samples (5,000)" in n for n in r.notes)
    plain = debtsim.run(harbour_book, engine="exact", copula=False, contributions=False)
    assert not any("apply to" in n for n in plain.notes)
