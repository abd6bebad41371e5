"""Stress and sweep fields of the dependence: sector_loading_shift, degrees_of_freedom."""

from __future__ import annotations

import textwrap
from dataclasses import replace
from pathlib import Path

import pytest

import debtsim
from debtsim.book.dependence import DependenceSpec
from debtsim.studies.scenarios import Scenario, SectorShock, apply_scenario, load_scenarios

ROOT = Path(__file__).resolve().parents[2]
SECTORS = ("agriculture", "construction", "energy", "retail")


def demo() -> debtsim.Book:
    return debtsim.load_book(ROOT / "scenarios" / "grain_coop_sectors.yaml")


def matrix_book(off: float) -> debtsim.Book:
    c = tuple(tuple(1.0 if i == j else off for j in range(4)) for i in range(4))
    return replace(demo(), dependence=DependenceSpec(sectors=SECTORS, correlation=c))


def test_loading_shift_global_and_per_sector_clipped() -> None:
    """a' = clip(a + shift + sector shift, 0, 1); other fields untouched."""
    scenario = Scenario(
        name="x",
        sector_loading_shift=0.3,
        sectors={"retail": SectorShock(sector_loading_shift=-0.9)},
    )
    spec = apply_scenario(demo(), scenario).dependence
    assert spec is not None and spec.loadings is not None
    assert spec.loadings == pytest.approx((1.0, 0.9, 0.85, 0.0))
    assert spec.family == "gaussian"


def test_degrees_of_freedom_switches_to_student_t() -> None:
    """degrees_of_freedom > 2 sets Student-t; 0 keeps the book's family."""
    spec = apply_scenario(demo(), Scenario(name="t", degrees_of_freedom=6)).dependence
    assert spec is not None and spec.student_t and spec.degrees_of_freedom == 6.0
    assert apply_scenario(demo(), Scenario(name="n")).dependence == demo().dependence
    with pytest.raises(ValueError, match="greater than 2"):
        Scenario(name="bad", degrees_of_freedom=1.5)


def test_matrix_shift_that_breaks_psd_fails_with_the_reason() -> None:
    """Off-diagonal 0.5 shifted by -0.9 (all -0.4 among 4 sectors) is not PSD: refused."""
    book = matrix_book(0.5)
    ok = apply_scenario(book, Scenario(name="z", sector_loading_shift=0.1)).dependence
    assert ok is not None and ok.correlation is not None
    assert ok.correlation[0] == pytest.approx((1.0, 0.6, 0.6, 0.6))
    with pytest.raises(ValueError, match="not positive semi-definite: smallest eigenvalue -0.2"):
        apply_scenario(book, Scenario(name="bad", sector_loading_shift=-0.9))


def test_loading_shift_without_sectors_is_an_error() -> None:
    """A one-factor book has no loading to shift."""
    book = debtsim.load_book(ROOT / "scenarios" / "grain_coop.yaml")
    with pytest.raises(ValueError, match="needs sector factors"):
        apply_scenario(book, Scenario(name="x", sector_loading_shift=0.1))


def test_scenario_file_reads_the_new_fields(tmp_path: Path) -> None:
    """Both fields read from a scenario file, the shift also inside sectors."""
    path = tmp_path / "s.yaml"
    path.write_text(
        textwrap.dedent(
            """\
            - name: heavy tails
              degrees_of_freedom: 4
              sector_loading_shift: 0.1
              sectors:
                retail: {sector_loading_shift: 0.2}
            """
        )
    )
    (scenario,) = load_scenarios(path, demo())
    assert scenario.degrees_of_freedom == 4.0
    assert scenario.sector_shocks["retail"].sector_loading_shift == 0.2


def test_sweep_point_breaking_psd_fails_and_others_finish() -> None:
    """--grid over sector_loading_shift: the PSD-breaking point is failed, the others run."""
    book = replace(matrix_book(0.5), obligors=demo().obligors[:12], links=())
    grid = debtsim.sweep(
        book, {"sector_loading_shift": [-0.9, 0.0, 0.2]}, engine="sample", samples=2000
    )
    status = dict(zip(grid["sector_loading_shift"], grid["status"], strict=True))
    assert status == {-0.9: "failed", 0.0: "ok", 0.2: "ok"}
    error = grid.loc[grid["sector_loading_shift"] == -0.9, "error"].iloc[0]
    assert "not positive semi-definite" in error


def test_grid_option_accepts_the_new_axes() -> None:
    """--grid degrees_of_freedom=4,8,30 and sector_loading_shift parse as sweep axes."""
    from debtsim.api import grid_from_options

    grid = grid_from_options(["degrees_of_freedom=4,8,30", "sector_loading_shift=-0.1,0.1"])
    assert grid == {"degrees_of_freedom": [4.0, 8.0, 30.0], "sector_loading_shift": [-0.1, 0.1]}


def test_stress_scenario_breaking_the_matrix_fails_alone(tmp_path: Path) -> None:
    """A PSD-breaking scenario is listed as failed with the reason; the others finish."""
    book = replace(matrix_book(0.5), obligors=demo().obligors[:12], links=())
    scenarios = [
        Scenario(name="fine", sector_loading_shift=0.1),
        Scenario(name="broken", sector_loading_shift=-0.9),
    ]
    result = debtsim.stress(book, scenarios, engine="sample", samples=2000, copula=False)
    assert list(result.table["scenario"]) == ["base", "fine"]
    assert [name for name, _ in result.failures] == ["broken"]
    assert "not positive semi-definite" in result.failures[0][1]
    out = debtsim.write_stress(result, tmp_path / "s")
    import json

    summary = json.loads((out / "summary.json").read_text())
    assert summary["failed_scenarios"][0]["name"] == "broken"
    page = (out / "report.html").read_text()
    assert "broken" in page and "failed" in page
    assert {p.name for p in out.iterdir()} >= {"base", "fine"}


def test_stress_fails_whole_when_every_scenario_fails() -> None:
    """With nothing left to compare, the stress run is an error naming the scenario."""
    from debtsim.errors import DebtsimError

    book = replace(matrix_book(0.5), obligors=demo().obligors[:12], links=())
    with pytest.raises(DebtsimError, match="scenario 'broken': .*not positive semi-definite"):
        debtsim.stress(book, [Scenario(name="broken", sector_loading_shift=-0.9)],
                       engine="sample", samples=2000)
