"""Sector factors and dependence family in the book's ``model:`` section."""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import pytest

from debtsim.book.dependence_section import check_correlation_matrix
from debtsim.book.loader import load_book
from debtsim.errors import BookError
from debtsim.model.specification import LinkedFactorModel

OBLIGORS = """\
book: sector test
obligors:
  - {id: A1, sector: farming, ead: 100, pd: 0.02, lgd: 0.5, asset_correlation: 0.2}
  - {id: B2, sector: shipping, ead: 200, pd: 0.01, lgd: 0.4, asset_correlation: 0.3}
  - {id: C3, sector: energy, ead: 150, pd: 0.03, lgd: 0.45, asset_correlation: 0.1}
"""


def book(tmp_path: Path, model: str, extra: dict[str, str] | None = None) -> Path:
    """Write the three-sector book with the given ``model:`` text."""
    for name, text in (extra or {}).items():
        (tmp_path / name).write_text(textwrap.dedent(text), encoding="utf-8")
    path = tmp_path / "book.yaml"
    path.write_text(OBLIGORS + "model:\n" + textwrap.indent(textwrap.dedent(model), "  "))
    return path


def test_no_dependence_keys_keep_the_one_factor_model(tmp_path: Path) -> None:
    """Without the new keys the book and model carry no dependence structure."""
    loaded = load_book(book(tmp_path, "factor_qubits: 4\n"))
    assert loaded.dependence is None
    assert LinkedFactorModel.from_book(loaded).dependence is None


def test_loadings_form(tmp_path: Path) -> None:
    """Loadings are read in book order; obligors are mapped to their sector index."""
    loaded = load_book(
        book(
            tmp_path,
            """\
            sectors:
              shipping: {loading: 0.8}
              farming: {loading: 0.6}
              energy: {loading: 0}
            sector_qubits: 3
            """,
        )
    )
    spec = loaded.dependence
    assert spec is not None and spec.form == "loadings" and spec.sector_qubits == 3
    assert spec.sectors == ("shipping", "farming", "energy")
    model = LinkedFactorModel.from_book(loaded)
    assert model.dependence is not None
    assert model.dependence.sector_of.tolist() == [1, 0, 2]
    c = model.dependence.sector_correlation_matrix
    assert c[0, 1] == pytest.approx(0.48) and c[2, 0] == 0.0 and c[1, 1] == 1.0


def test_matrix_csv_and_singular_matrix_accepted(tmp_path: Path) -> None:
    """A singular (rank-one) matrix is valid and factors with fewer columns."""
    path = book(
        tmp_path,
        "sector_correlation: corr.csv\n",
        {
            "corr.csv": """\
            sector,farming,shipping,energy
            farming,1,1,-1
            shipping,1,1,-1
            energy,-1,-1,1
            """
        },
    )
    model = LinkedFactorModel.from_book(load_book(path))
    structure = model.dependence
    assert structure is not None and structure.form == "matrix"
    b = structure.sector_factor_matrix
    assert b.shape == (3, 1)
    np.testing.assert_allclose(b @ b.T, structure.sector_correlation_matrix, atol=1e-12)


def test_student_t(tmp_path: Path) -> None:
    """Student-t without sectors is a one-factor t-copula model."""
    loaded = load_book(book(tmp_path, "dependence: student_t\ndegrees_of_freedom: 6\n"))
    spec = loaded.dependence
    assert spec is not None and spec.student_t and spec.degrees_of_freedom == 6.0
    assert spec.form == "one-factor"


def test_unlisted_sector_in_csv_obligors_names_the_csv_line(tmp_path: Path) -> None:
    """An unlisted sector is reported with the line of its first obligor in the CSV."""
    (tmp_path / "ob.csv").write_text(
        "id,sector,ead,pd,lgd,asset_correlation\n"
        "A,farming,1,0.01,0.5,0.1\nB,mining,1,0.01,0.5,0.1\nC,mining,1,0.01,0.5,0.1\n"
    )
    path = tmp_path / "b.yaml"
    path.write_text("obligors: ob.csv\nmodel:\n  sectors:\n    farming: {loading: 0.5}\n")
    with pytest.raises(BookError) as info:
        load_book(path)
    (problem,) = info.value.problems
    assert problem.line == 3 and problem.field == "model.sectors"
    assert problem.message == (
        "obligors name sectors that are not listed: "
        f"'mining' (first at line 3 of {tmp_path}/ob.csv)"
    )


@pytest.mark.parametrize(
    ("matrix", "expected"),
    [
        ([[1, 0.5], [0.5, 1]], []),
        ([[1, 1], [1, 1]], []),  # singular: valid
        ([[1, 1 + 1e-13], [1 + 1e-13, 1]], []),  # rounding: not an error
    ],
)
def test_check_matrix_accepts(matrix: list[list[float]], expected: list[object]) -> None:
    """Valid and rounding-level matrices pass unchanged."""
    assert check_correlation_matrix(["a", "b"], np.array(matrix, dtype=float)) == expected


def test_check_matrix_psd_tolerance_is_tight() -> None:
    """Singular with rounding passes; an eigenvalue of -4e-5 is refused, never repaired."""
    singular = np.array([[1.0, 0.9, 0.9], [0.9, 1.0, 0.62], [0.9, 0.62, 1.0]])
    assert abs(float(np.linalg.eigvalsh(singular)[0])) < 1e-12
    assert check_correlation_matrix(["a", "b", "c"], singular) == []
    m = np.array([[1.0, 0.9, 0.9], [0.9, 1.0, 0.6199], [0.9, 0.6199, 1.0]])
    assert float(np.linalg.eigvalsh(m)[0]) < -1e-5
    (problem,) = check_correlation_matrix(["a", "b", "c"], m)
    assert problem[0] == "" and "smallest eigenvalue" in problem[1]
