"""Reports of a book with sector factors: the method in summary.json, the note in report.html."""

from __future__ import annotations

import json
from pathlib import Path

import debtsim

ROOT = Path(__file__).resolve().parents[2]


def test_summary_and_report_name_the_dependence(tmp_path: Path) -> None:
    """summary.json says which method ran; report.html describes the dependence."""
    book = debtsim.load_book(ROOT / "scenarios" / "grain_coop_sectors.yaml")
    result = debtsim.run(book, engine="sample", samples=5000)
    out = result.write(tmp_path / "out")
    summary = json.loads((Path(out) / "summary.json").read_text())
    assert "mean-shift importance sampling" in summary["diagnostics"]["method"]
    assert summary["engine_settings"]["dependence"] == "4 sectors (loadings), Gaussian"
    assert summary["copula"]["engine_settings"]["dependence"] == "4 sectors (loadings), Gaussian"
    html = (Path(out) / "report.html").read_text()
    assert "Dependence: 4 sectors (loadings), Gaussian." in html


def test_check_prints_the_sector_table(tmp_path: Path) -> None:
    """debtsim check: per-sector obligors, exposure, mean PD; implied correlation matrix."""
    book = debtsim.load_book(ROOT / "scenarios" / "grain_coop_sectors.yaml")
    text = debtsim.describe_book(book)
    assert "Dependence: 4 sectors (loadings), Gaussian" in text
    rows = [line.split() for line in text.splitlines() if line.startswith("agriculture")]
    row = rows[0]  # the sector table; rows[1] is its row of the correlation matrix
    obligors = [o for o in book.obligors if o.sector == "agriculture"]
    assert row[1] == "0.85" and int(row[2]) == len(obligors)
    assert row[3] == f"{sum(o.ead for o in obligors):,.2f}"
    # implied correlation of two farms: mean of sqrt(R_i R_j) over distinct pairs
    import itertools
    import math

    pairs = [math.sqrt(a.asset_correlation * b.asset_correlation)
             for a, b in itertools.combinations(obligors, 2)]
    assert row[5] == f"{sum(pairs) / len(pairs):.4f}"
