"""Scenario files and scenario application, checked against independent computations."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate
from scipy.special import comb
from scipy.stats import norm

from debtsim.book.loader import load_book
from debtsim.book.records import Book, Link, Obligor
from debtsim.errors import BookError
from debtsim.model.factor_grid import gauss_hermite
from debtsim.options import RunOptions
from debtsim.runner import run_book
from debtsim.studies.scenarios import (
    MAX_ASSET_CORRELATION,
    Scenario,
    SectorShock,
    apply_scenario,
    folder_name,
    load_scenarios,
)
from tests.reference import enumerate_law

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "scenarios"

# A tiny linked book with a two-way pair (a cycle) and two sectors.
TINY = Book(
    name="tiny",
    currency="EUR",
    obligors=(
        Obligor("A", 100.0, 0.02, 0.5, 0.20, sector="shipping"),
        Obligor("B", 200.0, 0.01, 0.4, 0.10, sector="retail"),
        Obligor("C", 50.0, 0.05, 0.6, 0.15, sector="shipping"),
        Obligor("D", 80.0, 0.03, 0.45, 0.30),
    ),
    links=(
        Link("A", "B", 0.3),
        Link("B", "A", 0.2),
        Link("C", "A", 0.4),
        Link("D", "C", 0.25),
    ),
    factor_qubits=6,  # 64 Gauss-Hermite nodes: the factor integral converges far below 1e-9
)

EXACT_ENGINES = ("exact", "circuit")


def _engine_available(name: str) -> bool:
    try:
        __import__(f"debtsim.engines.{name}")
    except ImportError:
        return False
    return True


def _exact_law(book: Book, engine: str) -> tuple[dict[float, float], np.ndarray]:
    if not _engine_available(engine):
        pytest.skip(f"engine {engine} not available")
    a = run_book(book, RunOptions(engine=engine, copula=False))
    d = a.loss_distribution
    law = {round(float(x), 9): float(p) for x, p in zip(d.losses, d.probabilities, strict=True)}
    return law, np.asarray(d.default_probability)


def _reference(book: Book) -> tuple[dict[float, float], np.ndarray]:
    grid = gauss_hermite(2**book.factor_qubits)
    index = {o.id: i for i, o in enumerate(book.obligors)}
    return enumerate_law(
        [o.ead for o in book.obligors],
        [o.lgd for o in book.obligors],
        [o.pd for o in book.obligors],
        [o.asset_correlation for o in book.obligors],
        [(index[lk.creditor], index[lk.debtor], lk.contagion) for lk in book.links],
        grid.nodes,
        grid.weights,
    )


def _assert_same_law(got: dict[float, float], want: dict[float, float], atol: float) -> None:
    keys = set(got) | set(want)
    for k in keys:
        assert got.get(k, 0.0) == pytest.approx(want.get(k, 0.0), abs=atol), k


def _edit(book: Book, **per_id: dict[str, float]) -> Book:
    """The book with some obligors' fields set by hand (the independent reading)."""
    obligors = tuple(replace(o, **per_id.get(o.id, {})) for o in book.obligors)
    return replace(book, obligors=obligors)


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


# ------------------------------------------------------------------ the file
def test_load_list_and_mapping_forms(tmp_path: Path) -> None:
    """A top-level list and a mapping with 'scenarios' give the same scenarios."""
    body = """\
- name: downturn
  pd_scale: 1.5
  asset_correlation_shift: 0.05
  lgd_shift: -0.1
  contagion_scale: 2
  sectors:
    shipping: {pd_scale: 3, lgd_shift: 0.1}
  defaulted: [B]
- name: quiet
"""
    a = load_scenarios(write(tmp_path / "a.yaml", body), TINY)
    indented = "".join("  " + line + "\n" for line in body.splitlines())
    b = load_scenarios(write(tmp_path / "b.yaml", "scenarios:\n" + indented), TINY)
    assert a == b
    first = a[0]
    assert first == Scenario(
        name="downturn",
        pd_scale=1.5,
        asset_correlation_shift=0.05,
        lgd_shift=-0.1,
        contagion_scale=2.0,
        sectors=(("shipping", SectorShock(pd_scale=3.0, lgd_shift=0.1)),),
        defaulted=("B",),
    )
    assert first.line == 1
    assert a[1] == Scenario(name="quiet")


def test_demo_scenario_files_load_against_their_books() -> None:
    """Every demo scenario file is valid for its demo book."""
    for stem in ("harbour_small", "grain_coop", "regional_bank"):
        book = load_book(DEMO / f"{stem}.yaml")
        scenarios = load_scenarios(DEMO / f"{stem}_stress.yaml", book)
        assert len(scenarios) >= 3


BAD_CASES = [
    (
        "- name: x\n  pd_scale: 0\n",
        "f.yaml:2: scenarios[0].pd_scale: must be greater than 0, got 0",
    ),
    (
        "- name: x\n  pd_scale: -2\n",
        "f.yaml:2: scenarios[0].pd_scale: must be greater than 0, got -2",
    ),
    ("- name: x\n  pd_scale: .inf\n", "f.yaml:2: scenarios[0].pd_scale: must be a finite number"),
    (
        "- name: x\n  pd_scale: high\n",
        "f.yaml:2: scenarios[0].pd_scale: must be a number, got 'high'",
    ),
    (
        "- name: x\n  lgd_shift: yes\n",
        "f.yaml:2: scenarios[0].lgd_shift: must be a number, got yes",
    ),
    (
        "- name: x\n  asset_correlation_shift: 1.5\n",
        "f.yaml:2: scenarios[0].asset_correlation_shift: must be between -1 and 1, got 1.5",
    ),
    (
        "- name: x\n  lgd_shift: -1.01\n",
        "f.yaml:2: scenarios[0].lgd_shift: must be between -1 and 1, got -1.01",
    ),
    (
        "- name: x\n  contagion_scale: -0.5\n",
        "f.yaml:2: scenarios[0].contagion_scale: must be at least 0, got -0.5",
    ),
    ("- name: x\n  colour: red\n", "f.yaml:2: scenarios[0].colour: unknown field"),
    ("- pd_scale: 2\n", "f.yaml:1: scenarios[0].name: missing"),
    ("- name: ''\n", "f.yaml:1: scenarios[0].name: must be non-empty text"),
    ("- name: Base\n", "f.yaml:1: scenarios[0].name: 'base' is reserved"),
    ("- name: Dry Year\n- name: dry-year\n", "f.yaml:2: scenarios[1].name: 'dry-year' clashes"),
    (
        "- name: x\n  pd_scale: 2\n  pd_scale: 3\n",
        "f.yaml:3: scenarios[0].pd_scale: given twice (first at line 2)",
    ),
    (
        "- name: x\n  sectors:\n    farming: {pd_scale: 2}\n",
        "f.yaml:3: scenarios[0].sectors.farming: no obligor of the book has this sector",
    ),
    (
        "- name: x\n  sectors:\n    shipping: {contagion_scale: 2}\n",
        "f.yaml:3: scenarios[0].sectors.shipping.contagion_scale: unknown field",
    ),
    (
        "- name: x\n  sectors:\n    shipping: {pd_scale: 0}\n",
        "f.yaml:3: scenarios[0].sectors.shipping.pd_scale: must be greater than 0",
    ),
    ("- name: x\n  sectors: [shipping]\n", "f.yaml:2: scenarios[0].sectors: must be a mapping"),
    (
        "- name: x\n  defaulted: [A, Z]\n",
        "f.yaml:2: scenarios[0].defaulted[1]: no obligor with id 'Z' in the book",
    ),
    (
        "- name: x\n  defaulted:\n    - A\n    - A\n",
        "f.yaml:4: scenarios[0].defaulted[1]: 'A' is listed twice",
    ),
    ("- name: x\n  defaulted: A\n", "f.yaml:2: scenarios[0].defaulted: must be a list"),
    ("- 5\n", "f.yaml:1: scenarios[0]: must be a mapping with a name"),
    ("", "f.yaml: scenarios: must be a list of scenarios, got an empty file"),
    ("[]\n", "f.yaml:1: scenarios: is empty"),
    ("name: x\n", "f.yaml:1: name: unknown field; a scenario file is a list"),
    ("- name: x\n  pd_scale: [1\n", "f.yaml:3: YAML syntax error"),
]


@pytest.mark.parametrize(("text", "message"), BAD_CASES)
def test_bad_scenario_files(tmp_path: Path, text: str, message: str) -> None:
    """Each kind of bad scenario file gives a file:line: field: message problem."""
    path = write(tmp_path / "f.yaml", text)
    with pytest.raises(BookError) as info:
        load_scenarios(path, TINY)
    lines = [str(p).replace(str(tmp_path) + "/", "") for p in info.value.problems]
    assert any(line.startswith(message) for line in lines), lines


def test_every_problem_is_reported_at_once(tmp_path: Path) -> None:
    """All problems of a file come back together, in line order."""
    path = write(
        tmp_path / "f.yaml",
        "- name: a\n  pd_scale: 0\n- name: b\n  lgd_shift: 3\n  defaulted: [Q]\n",
    )
    with pytest.raises(BookError) as info:
        load_scenarios(path, TINY)
    assert [p.line for p in info.value.problems] == [2, 4, 5]


def test_missing_file_is_a_book_error(tmp_path: Path) -> None:
    """A missing scenario file is reported, not raised as an OSError."""
    with pytest.raises(BookError, match="file not found"):
        load_scenarios(tmp_path / "nope.yaml")


def test_without_book_sectors_and_ids_are_not_checked(tmp_path: Path) -> None:
    """Without a book, unknown sectors and ids pass (they are checked against a book)."""
    path = write(
        tmp_path / "f.yaml", "- name: x\n  sectors: {farming: {pd_scale: 2}}\n  defaulted: [Q]\n"
    )
    assert load_scenarios(path)[0].defaulted == ("Q",)


def test_folder_names() -> None:
    """Scenario names map to safe folder names."""
    assert folder_name("Severe Recession 2026!") == "severe-recession-2026"
    assert folder_name("../etc") == "etc"
    assert folder_name("***") == "scenario"


# ----------------------------------------------------------- applying fields
def test_neutral_scenario_returns_the_same_numbers() -> None:
    """The neutral scenario changes no obligor or link."""
    out = apply_scenario(TINY, Scenario(name="none"))
    assert out.obligors == TINY.obligors
    assert out.links == TINY.links


def test_field_rules_by_hand() -> None:
    """Each field follows its stated rule: scale and cap, shift and clip."""
    book = replace(
        TINY,
        obligors=(
            Obligor("A", 1.0, 0.4, 0.95, 0.99, sector="shipping"),
            Obligor("B", 1.0, 0.01, 0.05, 0.02, sector="retail"),
        ),
        links=(Link("A", "B", 0.6),),
    )
    s = Scenario(
        name="s", pd_scale=3.0, asset_correlation_shift=0.05, lgd_shift=0.1, contagion_scale=2.0
    )
    a, b = apply_scenario(book, s).obligors
    assert a.pd == 1.0 and b.pd == pytest.approx(0.03)
    assert a.asset_correlation == MAX_ASSET_CORRELATION and b.asset_correlation == 0.07
    assert a.lgd == 1.0 and b.lgd == pytest.approx(0.15)
    assert apply_scenario(book, s).links[0].contagion == 1.0
    down = Scenario(name="d", asset_correlation_shift=-0.5, lgd_shift=-0.5, contagion_scale=0.5)
    a, b = apply_scenario(book, down).obligors
    assert b.asset_correlation == 0.0 and b.lgd == 0.0
    assert a.lgd == pytest.approx(0.45) and a.asset_correlation == pytest.approx(0.49)
    assert apply_scenario(book, down).links[0].contagion == pytest.approx(0.3)


def test_sector_changes_add_to_global_ones() -> None:
    """A sector's change is combined with the global change, others get the global only."""
    s = Scenario(
        name="s",
        pd_scale=2.0,
        lgd_shift=0.1,
        sectors={
            "shipping": SectorShock(pd_scale=1.5, asset_correlation_shift=0.1, lgd_shift=0.05)
        },
    )
    out = {o.id: o for o in apply_scenario(TINY, s).obligors}
    assert out["A"].pd == pytest.approx(0.02 * 3.0)
    assert out["A"].asset_correlation == pytest.approx(0.30)
    assert out["A"].lgd == pytest.approx(0.65)
    assert out["B"].pd == pytest.approx(0.02) and out["B"].asset_correlation == 0.10
    assert out["D"].lgd == pytest.approx(0.55)


def test_defaulted_wins_over_scales() -> None:
    """A defaulted obligor has PD exactly 1 whatever the scales say."""
    out = apply_scenario(TINY, Scenario(name="s", pd_scale=0.1, defaulted=("C",)))
    assert {o.id: o.pd for o in out.obligors}["C"] == 1.0


def test_scenario_rejects_bad_values_when_built_in_code() -> None:
    """Building a Scenario in code checks the same ranges as the file."""
    with pytest.raises(ValueError, match="pd_scale"):
        Scenario(name="x", pd_scale=0.0)
    with pytest.raises(ValueError, match="lgd_shift"):
        SectorShock(lgd_shift=2.0)


# ------------------------------------------- engines against independent laws
@pytest.mark.parametrize("engine", EXACT_ENGINES)
@pytest.mark.parametrize(
    ("scenario", "by_hand"),
    [
        # defaulted equals setting PD = 1 by hand
        (Scenario(name="d", defaulted=("B",)), {"B": {"pd": 1.0}}),
        (
            Scenario(name="p", pd_scale=2.5),
            {i: {"pd": p * 2.5} for i, p in (("A", 0.02), ("B", 0.01), ("C", 0.05), ("D", 0.03))},
        ),
        (
            Scenario(name="r", asset_correlation_shift=0.1),
            {
                i: {"asset_correlation": r + 0.1}
                for i, r in (("A", 0.2), ("B", 0.1), ("C", 0.15), ("D", 0.3))
            },
        ),
        (
            Scenario(name="l", lgd_shift=-0.2),
            {i: {"lgd": g - 0.2} for i, g in (("A", 0.5), ("B", 0.4), ("C", 0.6), ("D", 0.45))},
        ),
        (
            Scenario(name="s", sectors={"shipping": SectorShock(pd_scale=4.0, lgd_shift=0.2)}),
            {"A": {"pd": 0.08, "lgd": 0.7}, "C": {"pd": 0.2, "lgd": 0.8}},
        ),
    ],
    ids=["defaulted", "pd_scale", "asset_correlation_shift", "lgd_shift", "sectors"],
)
def test_obligor_fields_against_enumeration(
    engine: str, scenario: Scenario, by_hand: dict[str, dict[str, float]]
) -> None:
    """Each obligor field gives the loss law of the book edited by hand (brute force)."""
    law, dp = _exact_law(apply_scenario(TINY, scenario), engine)
    want_law, want_dp = _reference(_edit(TINY, **by_hand))  # tests/reference.py enumeration
    _assert_same_law(law, want_law, 1e-9)
    np.testing.assert_allclose(dp, want_dp, atol=1e-9)


@pytest.mark.parametrize("engine", EXACT_ENGINES)
@pytest.mark.parametrize("scale", [0.0, 0.5, 3.0])
def test_contagion_scale_against_enumeration(engine: str, scale: float) -> None:
    """contagion_scale gives the law of the book with every q scaled and capped by hand."""
    law, dp = _exact_law(apply_scenario(TINY, Scenario(name="c", contagion_scale=scale)), engine)
    edited = replace(
        TINY,
        links=tuple(replace(lk, contagion=min(1.0, lk.contagion * scale)) for lk in TINY.links),
    )
    want_law, want_dp = _reference(edited)  # tests/reference.py enumeration
    _assert_same_law(law, want_law, 1e-9)
    np.testing.assert_allclose(dp, want_dp, atol=1e-9)


def _binomial_mixture(n: int, pd: float, rho: float, k: int) -> float:
    """P(k of n default) = integral C(n,k) p(z)^k (1-p(z))^(n-k) phi(z) dz by quadrature."""

    def f(z: float) -> float:
        p = norm.cdf((norm.ppf(pd) - math.sqrt(rho) * z) / math.sqrt(1 - rho))
        return comb(n, k) * p**k * (1 - p) ** (n - k) * norm.pdf(z)

    return integrate.quad(f, -10, 10, limit=200)[0]


@pytest.mark.parametrize("engine", EXACT_ENGINES)
def test_pd_scale_on_homogeneous_book_against_binomial_mixture(engine: str) -> None:
    """pd_scale 2 on 16 loans of PD 0.5% matches the binomial-mixture law at PD 1%."""
    n = 16
    book = Book(
        name="homogeneous",
        currency="",
        obligors=tuple(Obligor(f"L{i}", 1.0, 0.005, 1.0, 0.2) for i in range(n)),
        factor_qubits=6,
    )
    law, _ = _exact_law(apply_scenario(book, Scenario(name="x2", pd_scale=2.0)), engine)
    cdf = np.cumsum([law.get(float(k), 0.0) for k in range(n + 1)])
    # Finite homogeneous book, scipy quad (shared/REFERENCES.md, check values for n=16, PD=1%)
    assert cdf[0] == pytest.approx(0.8708165, abs=2e-6)
    assert cdf[1] == pytest.approx(0.9764032, abs=2e-6)
    assert cdf[2] == pytest.approx(0.9946722, abs=2e-6)
    for k in range(6):
        assert law.get(float(k), 0.0) == pytest.approx(_binomial_mixture(n, 0.01, 0.2, k), abs=2e-6)


@pytest.mark.parametrize("engine", ["exact", "circuit", "sample"])
def test_every_engine_handles_certain_default(engine: str) -> None:
    """A defaulted obligor (PD = 1) defaults in every scenario in every engine."""
    if not _engine_available(engine):
        pytest.skip(f"engine {engine} not available")
    stressed = apply_scenario(TINY, Scenario(name="d", defaulted=("A",)))
    options = RunOptions(engine=engine, samples=20_000, copula=False)
    dist = run_book(stressed, options).loss_distribution
    assert dist.default_probability[0] == pytest.approx(1.0, abs=1e-12)
    # A's loss (EAD 100, LGD 0.5) is always there: no mass below 50
    assert float(dist.probabilities[dist.losses < 50.0 - 1e-9].sum()) == pytest.approx(
        0.0, abs=1e-12
    )
    assert float(dist.probabilities.sum()) == pytest.approx(1.0)
    want_law, want_dp = _reference(_edit(TINY, A={"pd": 1.0}))  # tests/reference.py
    want_el = sum(k * p for k, p in want_law.items())
    tol = (
        1e-9
        if engine != "sample"
        else 5 * float(dist.diagnostics.get("expected_loss_standard_error", 1.0))
    )
    assert dist.mean == pytest.approx(want_el, abs=max(tol, 1e-9))
