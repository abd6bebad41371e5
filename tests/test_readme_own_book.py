"""The README's "Your own book" section, followed to the letter.

The example files are taken from the README itself, written to a folder and
run through the command line; the spreadsheet rules it states are checked
one by one against the loader; the contagion values of the example follow
the rule it gives.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

import debtsim
from debtsim.cli import app
from debtsim.model.factor_grid import gauss_hermite
from tests.conftest import REPO_ROOT
from tests.reference import enumerate_law

SECTION = "## Your own book"


def _section() -> str:
    text = (REPO_ROOT / "README.md").read_text(encoding="utf-8")
    start = text.index(SECTION)
    end = text.index("\n## ", start + len(SECTION))
    return text[start:end]


def _files() -> dict[str, str]:
    """Each code block of the section that follows a line naming its file (`name`:)."""
    blocks = re.findall(r"^`([\w.]+)`:\n\n```[a-z]*\n(.*?)```", _section(), re.S | re.M)
    return {name: body for name, body in blocks}


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    for name, body in _files().items():
        (tmp_path / name).write_text(body, encoding="utf-8")
    return tmp_path


def test_readme_names_the_three_files() -> None:
    """The section gives the YAML file and both CSV tables in full."""
    assert set(_files()) == {"mybook.yaml", "obligors.csv", "links.csv"}


def test_book_from_readme_checks_and_runs(folder: Path) -> None:
    """`check` then `run` on the README's files, as the README says; EL against brute force."""
    runner = CliRunner()
    checked = runner.invoke(app, ["check", str(folder / "mybook.yaml")])
    assert checked.exit_code == 0, checked.output
    out = folder / "reports" / "mybook"
    ran = runner.invoke(app, ["run", str(folder / "mybook.yaml"), "--out", str(out),
                              "--engine", "exact"])
    assert ran.exit_code == 0, ran.output
    assert (out / "report.html").is_file() and (out / "obligors.csv").is_file()

    book = debtsim.load_book(folder / "mybook.yaml")
    assert [o.id for o in book.obligors] == ["F01", "F02", "F03"]
    assert book.currency == "EUR" and len(book.links) == 2
    result = debtsim.run(book, engine="exact")
    # independent check: brute-force enumeration of own defaults and live links
    # (tests/reference.py) integrated on 96 Gauss-Hermite nodes
    grid = gauss_hermite(96)
    idx = {o.id: i for i, o in enumerate(book.obligors)}
    law, _dp = enumerate_law(
        [o.ead for o in book.obligors], [o.lgd for o in book.obligors],
        [o.pd for o in book.obligors], [o.asset_correlation for o in book.obligors],
        [(idx[lk.creditor], idx[lk.debtor], lk.contagion) for lk in book.links],
        grid.nodes, grid.weights,
    )
    el = sum(loss * p for loss, p in law.items())
    assert result.measures.expected_loss == pytest.approx(el, rel=1e-9)


def test_example_contagion_follows_the_stated_rule(folder: Path) -> None:
    """Each worked q in the README is min(1, claim / creditor's capital) and is in links.csv."""
    book = debtsim.load_book(folder / "mybook.yaml")
    worked = re.findall(r"(Example \w+) has ([\d,]+)(?: of equity)? and is owed ([\d,]+) by"
                        r"\s+(Example \w+)", re.sub(r"\s+", " ", _section()))
    assert len(worked) == 2
    names = {o.name: o.id for o in book.obligors}
    links = {(lk.creditor, lk.debtor): lk for lk in book.links}
    for creditor, capital, claim, debtor in worked:
        link = links[(names[creditor], names[debtor])]
        q = min(1.0, float(claim.replace(",", "")) / float(capital.replace(",", "")))
        assert link.contagion == pytest.approx(q)
        assert link.amount == float(claim.replace(",", ""))


OBLIGORS_HEAD = "id,name,sector,ead,pd,lgd,asset_correlation\n"


def _load(tmp_path: Path, obligors: str, *, bom: bool = False) -> debtsim.Book:
    (tmp_path / "o.csv").write_bytes(("\ufeff" if bom else "").encode() + obligors.encode())
    (tmp_path / "b.yaml").write_text("book: t\ncurrency: EUR\nobligors: o.csv\n")
    return debtsim.load_book(tmp_path / "b.yaml")


def test_byte_order_mark_and_empty_optional_cells_are_accepted(tmp_path: Path) -> None:
    """An Excel "CSV UTF-8" file starts with a BOM; name and sector may be empty."""
    book = _load(tmp_path, OBLIGORS_HEAD + "A,,,1000,0.02,0.45,0.15\n", bom=True)
    assert book.obligors[0].id == "A" and book.obligors[0].name == ""


@pytest.mark.parametrize(
    ("row", "field"),
    [
        ('A,n,s,"1,250,000",0.02,0.45,0.15\n', "ead"),   # thousands separator
        ("A,n,s,1000,1.50%,0.45,0.15\n", "pd"),           # a percentage cell
        ('A,n,s,1000,"0,015",0.45,0.15\n', "pd"),         # decimal comma
        ("A,n,s,,0.02,0.45,0.15\n", "ead"),               # a required cell left empty
    ],
)
def test_spreadsheet_formats_the_readme_forbids_are_refused(
    tmp_path: Path, row: str, field: str
) -> None:
    """Numbers with separators, percent signs or decimal commas are refused, naming the field."""
    with pytest.raises(debtsim.BookError) as err:
        _load(tmp_path, OBLIGORS_HEAD + row)
    assert f".{field}:" in str(err.value)


def test_semicolon_file_and_extra_columns_are_refused(tmp_path: Path) -> None:
    """A semicolon-separated export, or a column the README does not list, is refused."""
    with pytest.raises(debtsim.BookError, match="not a header of known columns"):
        _load(tmp_path, OBLIGORS_HEAD.replace(",", ";") + "A;n;s;1000;0,02;0,45;0,15\n")
    with pytest.raises(debtsim.BookError, match="rating"):
        _load(tmp_path, OBLIGORS_HEAD.strip() + ",rating\nA,n,s,1000,0.02,0.45,0.15,BB\n")


def test_unquoted_thousands_separator_breaks_the_row(tmp_path: Path) -> None:
    """`1,250,000` without quotes splits into cells; the row's width is reported."""
    with pytest.raises(debtsim.BookError, match="cells, the header has 7"):
        _load(tmp_path, OBLIGORS_HEAD + "A,n,s,1,250,000,0.02,0.45,0.15\n")


def test_cycles_are_allowed_and_pairs_unique(tmp_path: Path) -> None:
    """Lending both ways is allowed; the same (creditor, debtor) twice is refused."""
    head = OBLIGORS_HEAD + "A,,,1000,0.02,0.45,0.15\nB,,,2000,0.01,0.45,0.15\n"
    (tmp_path / "o.csv").write_text(head)
    (tmp_path / "l.csv").write_text("creditor,debtor,contagion,amount\nA,B,0.2,\nB,A,0.1,5\n")
    (tmp_path / "b.yaml").write_text("book: t\nobligors: o.csv\nlinks: l.csv\n")
    book = debtsim.load_book(tmp_path / "b.yaml")
    assert len(book.links) == 2 and book.links[0].amount is None
    assert np.isclose(book.links[1].amount or 0.0, 5.0)
    (tmp_path / "l.csv").write_text("creditor,debtor,contagion,amount\nA,B,0.2,\nA,B,0.1,\n")
    with pytest.raises(debtsim.BookError):
        debtsim.load_book(tmp_path / "b.yaml")
