"""Fixtures shared by the test folders (they mirror the package: book/, model/, engines/...)."""

from __future__ import annotations

from pathlib import Path

import pytest

import debtsim

#: The repository root (tests/ is one level below it).
REPO_ROOT = Path(__file__).resolve().parents[1]
#: Demo books shipped in scenarios/.
DEMO_BOOKS = {
    "harbour_small": REPO_ROOT / "scenarios" / "harbour_small.yaml",
    "grain_coop": REPO_ROOT / "scenarios" / "grain_coop.yaml",
}
#: The small invalid and valid books of the loader tests.
TEST_BOOKS = REPO_ROOT / "tests" / "books"


@pytest.fixture(scope="session")
def repo_root() -> Path:
    """The repository root."""
    return REPO_ROOT


@pytest.fixture(scope="session")
def harbour_path() -> Path:
    """Path of the 8-obligor demo book."""
    return DEMO_BOOKS["harbour_small"]


@pytest.fixture(scope="session")
def harbour_book(harbour_path: Path) -> debtsim.Book:
    """The 8-obligor demo book, loaded once per test session (records are frozen)."""
    return debtsim.load_book(harbour_path)
