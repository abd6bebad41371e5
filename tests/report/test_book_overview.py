"""The one-screen book overview printed by ``debtsim check`` (debtsim.report.book_overview)."""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from debtsim.book.loader import load_book
from debtsim.book.records import Book, Link, Obligor
from debtsim.model.specification import LinkedFactorModel
from debtsim.report.book_overview import BookOverview, format_overview, overview

BOOKS = Path(__file__).resolve().parents[1] / "books"


def firm(i: int, **kw: object) -> Obligor:
    """A plain obligor named F<i>."""
    values: dict[str, object] = {
        "ead": 100.0,
        "pd": 0.02,
        "lgd": 0.5,
        "asset_correlation": 0.1,
    }
    values.update(kw)
    return Obligor(id=f"F{i}", **values)  # type: ignore[arg-type]


def test_small_book_figures() -> None:
    """Sums, ranges and graph facts of good_small.yaml match a hand count."""
    ov = overview(load_book(BOOKS / "good_small.yaml"))
    assert (ov.obligors, ov.links, ov.sectors) == (4, 3, 4)
    assert ov.total_exposure == pytest.approx(3_100_000)
    # 1.2e6*.45 + 8e5*.4 + 4.5e5*.5 + 6.5e5*.35
    assert ov.loss_if_all_default == pytest.approx(1_312_500)
    # .015*540000 + .02*320000 + .03*225000 + .01*227500
    assert ov.expected_loss_without_contagion == pytest.approx(23_525)
    assert (ov.pd_min, ov.pd_max) == (0.01, 0.03)
    assert ov.mean_asset_correlation == pytest.approx(0.1625)
    assert (ov.cycles, ov.largest_cycle) == (1, 2)
    assert (ov.linked_groups, ov.largest_linked_group) == (1, 3)
    assert (ov.name, ov.currency, ov.factor_qubits) == (
        "Quillmoor Valley - farm supply desk",
        "EUR",
        4,
    )


def test_book_without_links() -> None:
    """With no links there are no cycles and no linked groups."""
    book = Book("plain", "", (firm(0), firm(1, sector="x"), firm(2, sector="x")))
    ov = overview(book)
    assert (ov.links, ov.cycles, ov.largest_cycle) == (0, 0, 0)
    assert (ov.linked_groups, ov.largest_linked_group) == (0, 1)
    assert ov.sectors == 1
    text = format_overview(ov)
    assert "Lending cycles               none" in text
    assert "Currency                     (not given)" in text
    assert "Total exposure (EAD)         300.00\n" in text


def test_format_is_aligned_plain_text() -> None:
    """Every line is label, padding, value, with all values starting in one column."""
    ov = overview(load_book(BOOKS / "good_csv.yaml"))
    text = format_overview(ov)
    lines = text.splitlines()
    assert not text.endswith("\n") and len(lines) <= 20
    assert all(len(line) < 100 for line in lines)
    value_columns = {re.match(r"^\S.*?\S {2,}(?=\S)", line).end() for line in lines}  # type: ignore[union-attr]
    assert len(value_columns) == 1
    assert "[" not in text  # no rich markup
    assert "Obligors                     5" in text
    assert "Total exposure (EAD)         3,400,000 EUR" in text
    assert "Lending cycles               1 (largest: 2 obligors)" in text
    assert "Linked groups                1 (largest: 4 obligors)" in text
    assert "PD range                     1.00% to 3.00%" in text
    assert "Factor resolution            5 qubits (32 nodes)" in text


def test_overview_is_frozen() -> None:
    """An overview cannot be changed after it is made."""
    ov = overview(load_book(BOOKS / "good_small.yaml"))
    with pytest.raises(dataclasses.FrozenInstanceError):
        ov.obligors = 5  # type: ignore[misc]
    assert isinstance(ov, BookOverview)


@st.composite
def linked_books(draw: st.DrawFn) -> Book:
    """Small books with random distinct non-self links."""
    n = draw(st.integers(1, 9))
    pairs = [(c, d) for c in range(n) for d in range(n) if c != d]
    chosen = draw(st.lists(st.sampled_from(pairs), unique=True, max_size=14)) if pairs else []
    return Book(
        "random",
        "EUR",
        tuple(firm(i) for i in range(n)),
        tuple(Link(f"F{c}", f"F{d}", 0.5) for c, d in chosen),
    )


@settings(max_examples=80, deadline=None)
@given(linked_books())
def test_graph_facts_agree_with_model(book: Book) -> None:
    """Cycle and group counts equal those of LinkedFactorModel's components."""
    model = LinkedFactorModel.from_book(book)
    ov = overview(book)
    cycles = sorted(c.size for c in model.cycles)
    groups = sorted(c.size for c in model.components)
    assert ov.cycles == len(cycles)
    assert ov.largest_cycle == (cycles[-1] if cycles else 0)
    assert ov.linked_groups == sum(1 for g in groups if g > 1)
    assert ov.largest_linked_group == groups[-1]
