"""The command line through typer's test runner: exit codes, messages, files written."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from typer.testing import CliRunner

from debtsim.cli import app

ROOT = Path(__file__).resolve().parent.parent
HARBOUR = ROOT / "scenarios" / "harbour_small.yaml"

GOOD = """\
book: Test Book
currency: EUR
obligors:
  - {id: A, ead: 100, pd: 0.02, lgd: 0.5, asset_correlation: 0.2}
  - {id: B, ead: 200, pd: 0.01, lgd: 0.4, asset_correlation: 0.1}
  - {id: C, ead: 50, pd: 0.05, lgd: 0.6, asset_correlation: 0.15}
links:
  - {creditor: A, debtor: B, contagion: 0.3}
  - {creditor: B, debtor: A, contagion: 0.2}
model:
  factor_qubits: 3
"""


@pytest.fixture
def runner() -> CliRunner:
    return CliRunner()


@pytest.fixture
def in_tmp(tmp_path: Path):
    old = os.getcwd()
    os.chdir(tmp_path)
    try:
        yield tmp_path
    finally:
        os.chdir(old)


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def test_run_writes_contract_files(runner: CliRunner, in_tmp: Path) -> None:
    """`debtsim run` writes summary.json, both CSVs and report.html under reports/<stem>/."""
    book = write(in_tmp / "mini.yaml", GOOD)
    result = runner.invoke(app, ["run", str(book), "--quiet"])
    assert result.exit_code == 0, result.output
    out = in_tmp / "reports" / "mini"
    for name in ("summary.json", "loss_distribution.csv", "obligors.csv", "report.html"):
        assert (out / name).is_file(), name
    summary = json.loads((out / "summary.json").read_text())
    for key in ("book", "currency", "engine", "obligors", "links", "seed", "samples",
                "total_exposure", "measures", "copula"):
        assert key in summary
    assert summary["obligors"] == 3 and summary["links"] == 2
    assert summary["total_exposure"] == pytest.approx(350.0)
    assert set(summary["measures"]["var"]) == {"0.99", "0.999"}
    assert set(summary["copula"]["measures"]["expected_shortfall"]) == {"0.99", "0.999"}


def test_same_seed_same_numbers(runner: CliRunner, in_tmp: Path) -> None:
    """The sample engine with the same seed writes identical summaries."""
    book = write(in_tmp / "mini.yaml", GOOD)
    outs = []
    for k in range(2):
        out = in_tmp / f"o{k}"
        r = runner.invoke(app, ["run", str(book), "--engine", "sample", "--samples", "20000",
                                "--seed", "11", "--out", str(out), "--quiet"])
        assert r.exit_code == 0, r.output
        outs.append(json.loads((out / "summary.json").read_text())["measures"])
    assert outs[0] == outs[1]


def test_levels_option(runner: CliRunner, in_tmp: Path) -> None:
    """Repeated --level gives exactly those keys, written as str(float)."""
    book = write(in_tmp / "mini.yaml", GOOD)
    r = runner.invoke(app, ["run", str(book), "--level", "0.95", "--level", "0.9995",
                            "--out", "o", "--quiet"])
    assert r.exit_code == 0, r.output
    summary = json.loads((in_tmp / "o" / "summary.json").read_text())
    assert set(summary["measures"]["var"]) == {"0.95", "0.9995"}


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        (GOOD.replace("pd: 0.02", "pd: 1.5"), "mini.yaml:4: obligors[0] (id 'A').pd:"),
        (GOOD.replace("id: C", "id: A"), "obligors[2] (id 'A').id"),
        (GOOD.replace("debtor: B", "debtor: Z"), "links[0].debtor"),
        (GOOD.replace("debtor: B", "debtor: A"), "links[0]"),
        (GOOD.replace("asset_correlation: 0.1}", "asset_correlation: 0.1, rating: AA}"),
         "rating"),
    ],
)
def test_bad_book_exit_2_names_place_and_writes_nothing(
    runner: CliRunner, in_tmp: Path, text: str, expected: str
) -> None:
    """Bad input: exit status 2, a file:line message, no traceback, no output folder."""
    book = write(in_tmp / "mini.yaml", text)
    r = runner.invoke(app, ["run", str(book)])
    assert r.exit_code == 2
    assert expected in r.output
    assert "Traceback" not in r.output
    assert not (in_tmp / "reports").exists()


def test_bad_level_exit_2(runner: CliRunner, in_tmp: Path) -> None:
    """A level outside (0, 1) is refused before anything runs."""
    book = write(in_tmp / "mini.yaml", GOOD)
    r = runner.invoke(app, ["run", str(book), "--level", "1.2"])
    assert r.exit_code == 2
    assert "--level" in r.output and "1.2" in r.output
    assert not (in_tmp / "reports").exists()


def test_unknown_engine_exit_2(runner: CliRunner, in_tmp: Path) -> None:
    """An unknown engine name is refused with the list of names."""
    book = write(in_tmp / "mini.yaml", GOOD)
    r = runner.invoke(app, ["run", str(book), "--engine", "quantum"])
    assert r.exit_code == 2 and "circuit" in r.output


def test_missing_book_exit_2(runner: CliRunner, in_tmp: Path) -> None:
    """A book that does not exist is a clear error, not a traceback."""
    r = runner.invoke(app, ["run", "nope.yaml"])
    assert r.exit_code == 2
    assert "nope.yaml" in r.output and "Traceback" not in r.output


def test_existing_foreign_folder_is_not_overwritten(runner: CliRunner, in_tmp: Path) -> None:
    """An existing folder that is not a debtsim report is left alone."""
    book = write(in_tmp / "mini.yaml", GOOD)
    precious = in_tmp / "mine"
    precious.mkdir()
    (precious / "notes.txt").write_text("keep me")
    r = runner.invoke(app, ["run", str(book), "--out", str(precious), "--quiet"])
    assert r.exit_code == 2
    assert (precious / "notes.txt").read_text() == "keep me"
    assert sorted(p.name for p in precious.iterdir()) == ["notes.txt"]


def test_check_prints_overview_and_writes_nothing(runner: CliRunner, in_tmp: Path) -> None:
    """`debtsim check` validates and summarises without writing."""
    book = write(in_tmp / "mini.yaml", GOOD)
    r = runner.invoke(app, ["check", str(book)])
    assert r.exit_code == 0, r.output
    assert "3" in r.output
    assert sorted(p.name for p in in_tmp.iterdir()) == ["mini.yaml"]


def test_circuit_command_reports_size_and_writes_qasm(runner: CliRunner, in_tmp: Path) -> None:
    """`debtsim circuit` prints qubits, depth and two-qubit gates; --qasm writes OpenQASM 3."""
    book = write(in_tmp / "mini.yaml", GOOD)
    r = runner.invoke(app, ["circuit", str(book), "--qasm", "c.qasm"])
    assert r.exit_code == 0, r.output
    assert "qubits" in r.output and "6" in r.output  # 3 factor + 3 obligor qubits
    assert "two-qubit gates" in r.output
    assert (in_tmp / "c.qasm").read_text().startswith("OPENQASM 3")


def test_circuit_engine_on_demo_book(runner: CliRunner, in_tmp: Path) -> None:
    """The small demo book runs on the circuit engine and says so in the summary."""
    r = runner.invoke(app, ["run", str(HARBOUR), "--engine", "circuit", "--out", "h", "--quiet"])
    assert r.exit_code == 0, r.output
    summary = json.loads((in_tmp / "h" / "summary.json").read_text())
    assert summary["engine"] == "circuit" and summary["samples"] is None
