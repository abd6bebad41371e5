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
