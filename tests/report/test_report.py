"""Tests of what a run writes: summary.json, the CSV files, report.html, atomic folders."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import numpy as np
import pytest

from debtsim import risk
from debtsim.book.records import Book, Link, Obligor
from debtsim.distribution import LossDistribution
from debtsim.engines.allocation import run_with_contributions
from debtsim.engines.exact.engine import ExactEngine
from debtsim.errors import DebtsimError, OutputError
from debtsim.link_effects import contagion_effect, link_transmission, obligor_contagion, rank_links
from debtsim.model.factor_grid import gauss_hermite
from debtsim.model.specification import LinkedFactorModel
from debtsim.options import RunOptions
from debtsim.output_files import jsonable
from debtsim.report import (
    CAUTION,
    OUTPUT_FILES,
    atomic_output_dir,
    check_output_dir,
    summary_dict,
    write_run,
)
from debtsim.runner import OBLIGOR_COLUMNS, RunResult
from tests.reference import enumerate_law

LEVELS = (0.99, 0.999)
CONTRACT_KEYS = [
    "book", "currency", "engine", "obligors", "links", "seed", "samples",
    "total_exposure", "measures", "copula",
]
MEASURE_KEYS = {"expected_loss", "loss_std", "var", "expected_shortfall", "economic_capital"}

OBLIGORS = (
    Obligor("A1", 1_200_000, 0.015, 0.45, 0.18, name="Example Freight", sector="transport"),
    Obligor("B7", 800_000, 0.03, 0.6, 0.2, name="Bolt & Nut", sector="manufacturing"),
    Obligor("C3", 2_000_000, 0.01, 0.4, 0.15, name="Coastline Retail", sector="retail"),
)
LINKS = (Link("A1", "B7", 0.3, 250_000), Link("B7", "A1", 0.2), Link("C3", "A1", 0.5))


def _law(book: Book, links: bool, nodes: int = 8) -> LossDistribution:
    """Exact law of a tiny book by brute-force enumeration (tests/reference.py)."""
    idx = {o.id: i for i, o in enumerate(book.obligors)}
    grid = gauss_hermite(nodes)
    law, dp = enumerate_law(
        [o.ead for o in book.obligors], [o.lgd for o in book.obligors],
        [o.pd for o in book.obligors], [o.asset_correlation for o in book.obligors],
        [(idx[lk.creditor], idx[lk.debtor], lk.contagion) for lk in book.links] if links else [],
        grid.nodes, grid.weights,
    )
    return LossDistribution.from_atoms(
        np.array(list(law)), np.array(list(law.values())), default_probability=dp,
        engine="exact", settings={"factor_nodes": nodes, "factor_grid": grid.method},
    )


def make_analysis(
    book: Book | None = None,
    dist: LossDistribution | None = None,
    copula: bool = True,
    engine: str = "exact",
) -> RunResult:
    """A hand-built RunResult (no engine needed)."""
    book = book or Book("Example Mutual - trade desk", "EUR", OBLIGORS, LINKS, source="b.yaml")
    dist = dist or _law(book, links=True)
    cd = _law(book, links=False) if copula else None
    model = LinkedFactorModel.from_book(book)
    # contributions of the exact engine on the same 8 nodes (equal to enumeration to 1e-10)
    _, allocation = run_with_contributions(ExactEngine(factor_grid=gauss_hermite(8)), model,
                                           LEVELS)
    return RunResult(
        allocation=allocation,
        book=book,
        model=model,
        options=RunOptions(levels=LEVELS, copula=copula),
        engine=engine,
        engine_reason="chosen for the test",
        loss_distribution=dist,
        measures=risk.measures(dist, LEVELS),
        copula_distribution=cd,
        copula_measures=risk.measures(cd, LEVELS) if cd is not None else None,
    )


@pytest.fixture(scope="module")
def analysis() -> RunResult:
    return make_analysis()


@pytest.fixture(scope="module")
def written(analysis: RunResult, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_run(analysis, tmp_path_factory.mktemp("run") / "out")


# --------------------------------------------------------------- summary.json
def test_summary_has_contract_keys_in_order(written: Path) -> None:
    """summary.json starts with the contract keys in DESIGN.md order, levels as str(float)."""
    data = json.loads((written / "summary.json").read_text(encoding="utf-8"))
    assert list(data)[: len(CONTRACT_KEYS)] == CONTRACT_KEYS
    assert set(data["measures"]) == MEASURE_KEYS
    for key in ("var", "expected_shortfall", "economic_capital"):
        assert list(data["measures"][key]) == ["0.99", "0.999"]
    assert set(data["copula"]) >= {"samples", "measures"}
    assert set(data["copula"]["measures"]) == MEASURE_KEYS
    assert data["copula"]["samples"] is None
    assert data["samples"] is None and data["seed"] is None
    assert data["generator"].startswith("debtsim ")
    assert data["obligors"] == 3 and data["links"] == 3
    assert data["total_exposure"] == pytest.approx(4_000_000)


def test_summary_values_match_analysis(written: Path, analysis: RunResult) -> None:
    """The measures written are the analysis' measures; economic capital is VaR - EL."""
    data = json.loads((written / "summary.json").read_text(encoding="utf-8"))
    m = data["measures"]
    assert m["expected_loss"] == analysis.measures.expected_loss
    assert m["var"]["0.999"] == analysis.measures.var[0.999]
    assert m["economic_capital"]["0.99"] == pytest.approx(
        m["var"]["0.99"] - m["expected_loss"], rel=1e-12
    )
    effect = data["contagion"]
    assert effect["expected_loss_from_contagion"] == pytest.approx(
        m["expected_loss"] - data["copula"]["measures"]["expected_loss"], rel=1e-12
    )
    assert set(effect["var_from_contagion"]) == {"0.99", "0.999"}


def test_summary_copula_null_when_skipped() -> None:
    """Without the copula run, ``copula`` is null and the contagion differences are null."""
    data = summary_dict(make_analysis(copula=False))
    assert data["copula"] is None
    assert data["contagion"]["expected_loss_from_contagion"] is None
    json.dumps(data, allow_nan=False)


def test_summary_is_plain_json_with_numpy_inputs() -> None:
    """Numpy scalars and arrays in settings/diagnostics become plain JSON; NaN becomes null."""
    assert jsonable({"a": np.float64(1.5), "b": np.arange(3), "c": np.int32(2),
                     "d": float("nan"), 4: (np.bool_(True),)}) == {
        "a": 1.5, "b": [0, 1, 2], "c": 2, "d": None, "4": [True]}


# ------------------------------------------------------------------ the CSVs
def test_loss_distribution_csv_ascending_sums_to_one(written: Path, analysis: RunResult) -> None:
    """loss_distribution.csv has the contract header, ascending losses and total mass 1."""
    with open(written / "loss_distribution.csv", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["loss", "probability"]
    losses = np.array([float(r[0]) for r in rows[1:]])
    probs = np.array([float(r[1]) for r in rows[1:]])
    assert np.all(np.diff(losses) > 0)
    assert probs.sum() == pytest.approx(1.0, abs=1e-12)
    # written at round-trip precision
    np.testing.assert_array_equal(losses, analysis.loss_distribution.losses)
    np.testing.assert_array_equal(probs, analysis.loss_distribution.probabilities)


def test_loss_distribution_csv_drops_zero_atoms(tmp_path: Path) -> None:
    """Atoms of probability exactly zero are not written."""
    dist = LossDistribution(
        losses=np.array([0.0, 1.0, 2.0]), probabilities=np.array([0.5, 0.0, 0.5]),
        default_probability=np.array([0.5, 0.5, 0.01]), engine="exact",
    )
    book = Book("t", "", OBLIGORS)
    out = write_run(make_analysis(book=book, dist=dist, copula=False), tmp_path / "o")
    lines = (out / "loss_distribution.csv").read_text(encoding="utf-8").splitlines()
    assert lines == ["loss,probability", "0.0,0.5", "2.0,0.5"]


def test_obligors_csv_rows_and_columns(written: Path, analysis: RunResult) -> None:
    """obligors.csv has one row per obligor in book order, inputs then final PD and EL."""
    with open(written / "obligors.csv", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    with open(written / "obligors.csv", encoding="utf-8") as fh:
        header = next(csv.reader(fh))
    assert tuple(header) == OBLIGOR_COLUMNS
    assert header[:10] == ["id", "name", "sector", "ead", "pd", "lgd", "asset_correlation",
                           "maturity", "default_probability", "expected_loss"]
    assert [r["id"] for r in rows] == ["A1", "B7", "C3"]
    dp = analysis.loss_distribution.default_probability
    for i, (r, o) in enumerate(zip(rows, OBLIGORS, strict=True)):
        assert float(r["default_probability"]) == dp[i]
        assert float(r["expected_loss"]) == pytest.approx(dp[i] * o.ead * o.lgd, rel=1e-15)
        assert float(r["contagion_uplift"]) == pytest.approx(dp[i] - o.pd, abs=1e-15)
        assert r["name"] == o.name and float(r["ead"]) == o.ead
    # sum of obligor ELs is the portfolio EL (linearity of expectation)
    total = sum(float(r["expected_loss"]) for r in rows)
    assert total == pytest.approx(analysis.measures.expected_loss, rel=1e-9)


# ------------------------------------------------------------------ the page
def test_html_is_self_contained_with_caution(written: Path) -> None:
    """report.html loads nothing from outside, embeds its charts and carries the caution."""
    page = (written / "report.html").read_text(encoding="utf-8")
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page, re.I)
    assert "<script" not in page.lower() and "<link" not in page.lower()
    assert "http://" not in page and "https://" not in page
    assert page.count("data:image/png;base64,") == 6  # 4 run charts, 2 contribution charts
    assert CAUTION in page.replace("&#x27;", "'")
    assert "Acerbi" in page and "Most contagious links" in page


def test_html_escapes_user_text(tmp_path: Path) -> None:
    """A book name, obligor name or currency with markup is escaped, never injected."""
    evil = "<script>alert('x')</script>"
    obl = (Obligor("<i>X</i>", 100.0, 0.05, 0.5, 0.1, name=evil, sector="<b>s</b>"),
           Obligor("Y", 200.0, 0.1, 0.5, 0.1, name="$a$ & b"))
    book = Book(evil, "<u>EUR</u>", obl, (Link("Y", "<i>X</i>", 0.5),))
    out = write_run(make_analysis(book=book), tmp_path / "o")
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "<script" not in page and "<i>X</i>" not in page and "<u>" not in page
    assert "&lt;script&gt;" in page and "&lt;i&gt;X&lt;/i&gt;" in page
    data = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert data["book"] == evil


def test_html_handles_no_links_single_atom_and_skipped_copula(tmp_path: Path) -> None:
    """A book without links and a law with one atom render, saying there are no links."""
    book = Book("Flat", "USD", (Obligor("A", 10.0, 0.1, 0.0, 0.2),))
    dist = LossDistribution(losses=np.array([0.0]), probabilities=np.array([1.0]),
                            default_probability=np.array([0.1]), engine="exact")
    out = write_run(make_analysis(book=book, dist=dist, copula=False), tmp_path / "o")
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "no links" in page and "not computed" in page
    assert "Most contagious links" not in page


def test_html_large_sampled_law(tmp_path: Path) -> None:
    """A sampled law of 100,000 atoms and 200 obligors gives a page under 3 MB with errors shown."""
    rng = np.random.default_rng(1)
    n = 200
    obl = tuple(Obligor(f"O{i}", float(rng.uniform(1e3, 1e6)), 0.02, 0.45, 0.2)
                for i in range(n))
    links = tuple(Link(f"O{i}", f"O{(i * 7 + 3) % n}", 0.2) for i in range(0, n, 2))
    book = Book("Big book", "EUR", obl, links)
    losses = np.arange(100_000) * 25.0
    probs = np.exp(-losses / 2e5)
    dp = np.full(n, 0.02) + rng.uniform(0, 0.01, n)
    kw = dict(default_probability=dp, engine="sample", samples=200_000, seed=7)
    diag = {"expected_loss_standard_error": 123.4, "var_standard_error": {"0.99": 456.0}}
    dist = LossDistribution(losses=losses, probabilities=probs / probs.sum(), diagnostics=diag,
                            **kw)
    analysis = make_analysis(book=book, dist=dist, copula=False, engine="sample")
    out = write_run(analysis, tmp_path / "o")
    page = (out / "report.html").read_text(encoding="utf-8")
    assert len(page.encode()) < 3_000_000
    assert "± 123" in page and "200,000 sampled scenarios, seed 7" in page
    assert "50 largest exposures of 200" in page
    data = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert data["samples"] == 200_000 and data["seed"] == 7
    assert data["diagnostics"]["var_standard_error"] == {"0.99": 456.0}
    assert len((out / "loss_distribution.csv").read_text().splitlines()) == 100_001


# ------------------------------------------------------------ atomic folders
def test_exception_leaves_nothing(tmp_path: Path) -> None:
    """An exception inside the block leaves no output folder, no temp folder, no new parents."""
    out = tmp_path / "a" / "b" / "out"
    with pytest.raises(RuntimeError), atomic_output_dir(out) as tmp:
        (tmp / "summary.json").write_text("{}")
        assert tmp.parent == out.parent and tmp.name.startswith(".out.tmp-")
        raise RuntimeError("boom")
    assert list(tmp_path.iterdir()) == []


def test_exception_keeps_previous_report(tmp_path: Path, analysis: RunResult) -> None:
    """A failing rewrite of an existing report leaves the old report as it was."""
    out = write_run(analysis, tmp_path / "out")
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    with pytest.raises(KeyboardInterrupt), atomic_output_dir(out) as tmp:
        (tmp / "x").write_text("half")
        raise KeyboardInterrupt
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_foreign_folder_refused_untouched(tmp_path: Path, analysis: RunResult) -> None:
    """An existing folder that is not a debtsim output is refused and left exactly as it was."""
    out = tmp_path / "mine"
    out.mkdir()
    (out / "thesis.txt").write_text("precious")
    (out / "summary.json").write_text(json.dumps({"book": "not ours"}))
    with pytest.raises(OutputError, match="exists and is not a debtsim report"):
        write_run(analysis, out)
    assert sorted(p.name for p in out.iterdir()) == ["summary.json", "thesis.txt"]
    assert (out / "thesis.txt").read_text() == "precious"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine"]
    assert issubclass(OutputError, DebtsimError)


def test_file_in_the_way_refused(tmp_path: Path) -> None:
    """A plain file at the output path is refused."""
    (tmp_path / "out").write_text("x")
    with pytest.raises(OutputError, match="not a folder"):
        check_output_dir(tmp_path / "out")


def test_previous_report_replaced(tmp_path: Path, analysis: RunResult) -> None:
    """A previous debtsim report (or an empty folder) is replaced, leaving no backup behind."""
    out = tmp_path / "out"
    write_run(analysis, out)
    other = make_analysis(book=Book("Second run", "EUR", OBLIGORS, LINKS))
    assert write_run(other, out) == out
    assert sorted(p.name for p in out.iterdir()) == sorted(OUTPUT_FILES)
    assert json.loads((out / "summary.json").read_text())["book"] == "Second run"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]
    empty = tmp_path / "empty"
    empty.mkdir()
    write_run(analysis, empty)
    assert (empty / "report.html").exists()


# ------------------------------------------------------------ contagion.py
def test_link_ranking_hand_computed() -> None:
    """Transmitted loss q * P(D_d) * (1 - PD_c) * EAD_c * LGD_c, ranked largest first."""
    obl = (Obligor("A", 1000.0, 0.1, 0.5, 0.2), Obligor("B", 2000.0, 0.2, 0.25, 0.2),
           Obligor("C", 400.0, 0.05, 1.0, 0.2))
    links = (Link("A", "B", 0.5, 300.0), Link("B", "C", 1.0), Link("C", "A", 0.25))
    book = Book("t", "", obl, links)
    final = [0.15, 0.3, 0.06]
    by_hand = [
        0.5 * 0.3 * (1 - 0.1) * 1000 * 0.5,    # A <- B: 67.5
        1.0 * 0.06 * (1 - 0.2) * 2000 * 0.25,  # B <- C: 24.0
        0.25 * 0.15 * (1 - 0.05) * 400 * 1.0,  # C <- A: 14.25
    ]
    got = link_transmission(book, final)
    assert [t.transmitted_loss for t in got] == pytest.approx(by_hand, rel=1e-14)
    assert got[0].amount == 300.0 and got[1].amount is None
    ranked = rank_links(book, final)
    assert [(t.creditor, t.debtor) for t in ranked] == [("A", "B"), ("B", "C"), ("C", "A")]
    assert [t.index for t in rank_links(book, [0.15, 0.01, 0.9], top=2)] == [1, 2]
    oc = obligor_contagion(book, final)
    np.testing.assert_allclose(oc.contagion_uplift, [0.05, 0.1, 0.01], atol=1e-15)
    np.testing.assert_allclose(oc.expected_loss, [75.0, 150.0, 24.0], rtol=1e-14)
    with pytest.raises(ValueError, match="one entry per obligor"):
        link_transmission(book, [0.1])


def test_contagion_effect_differences(analysis: RunResult) -> None:
    """Measure differences are model minus copula per level, None without a copula."""
    m, c = analysis.measures, analysis.copula_measures
    assert c is not None
    eff = contagion_effect(m, c)
    assert eff["expected_loss_from_contagion"] == m.expected_loss - c.expected_loss
    assert eff["var_from_contagion"] == {k: m.var[k] - c.var[k] for k in m.var}
    # contagion only adds defaults, so it cannot lower the expected loss
    assert eff["expected_loss_from_contagion"] > 0
    none = contagion_effect(m, None)
    assert none["expected_loss_from_contagion"] is None
    assert none["var_from_contagion"] == {0.99: None, 0.999: None}
