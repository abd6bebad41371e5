"""Timings and pictures in the README come from somewhere a reader can re-run.

Wall-clock figures are not asserted (they depend on the machine and its
load); what is checked is that every figure names the benchmark script that
prints it, that the script exists, that the machine is stated, and that every
image the README shows is in the repository.
"""

from __future__ import annotations

import re

from tests.conftest import REPO_ROOT

README = (REPO_ROOT / "README.md").read_text(encoding="utf-8")
#: A duration as the README writes it: "0.68 s", "197.8 s", "about 1 minute".
TIMING = re.compile(r"\b\d[\d,.]*\s?s\b|\bminutes?\b")
SCRIPT = re.compile(r"bench_\w+\.py")


def _pieces(text: str) -> list[str]:
    """Paragraphs, with each table row a piece of its own (code blocks dropped)."""
    text = re.sub(r"```.*?```", "", text, flags=re.S)
    pieces: list[str] = []
    for block in re.split(r"\n\s*\n", text):
        lines = block.strip().splitlines()
        if lines and lines[0].startswith("|"):
            pieces += lines[2:]  # rows after the header and its rule
        elif lines:
            pieces.append(" ".join(lines))
    return pieces


def test_every_timing_names_the_benchmark_that_prints_it() -> None:
    """A paragraph or table row quoting a duration names an existing benchmarks/ script."""
    timed = [p for p in _pieces(README) if TIMING.search(p)]
    assert len(timed) >= 5
    for piece in timed:
        scripts = SCRIPT.findall(piece)
        assert scripts, f"timing without its benchmark: {piece[:120]}"
        for name in scripts:
            assert (REPO_ROOT / "benchmarks" / name).is_file(), name


def test_performance_section_states_the_machine() -> None:
    """The performance section says on what machine, and under what load, it was measured."""
    section = README[README.index("## Performance"):]
    section = section[: section.index("\n## ", 5)]
    assert "2-core" in section or "2 cores" in section
    assert "load" in section


def test_every_image_shown_exists() -> None:
    """Each picture the README shows is a file of the repository."""
    images = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", README)
    assert images
    for path in images:
        assert (REPO_ROOT / path).is_file(), path
