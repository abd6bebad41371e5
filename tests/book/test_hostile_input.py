"""Hostile input to the readers of books and scenario files: clear problems, no hang, no leak."""

from __future__ import annotations

import os
import threading
from pathlib import Path

import pytest

from debtsim.book import yaml_reader
from debtsim.book.loader import load_book
from debtsim.errors import BookError
from debtsim.studies.scenarios import MAX_NAME_LENGTH, load_scenarios

HEADER = "id,name,sector,ead,pd,lgd,asset_correlation\n"


def problems(path: Path) -> list[str]:
    """Return the problem lines for a book that must fail, with the folder stripped."""
    with pytest.raises(BookError) as info:
        load_book(path)
    return [str(p).replace(str(path.parent) + os.sep, "") for p in info.value.problems]


def scenario_problems(path: Path, book: object = None) -> list[str]:
    """Return the problem lines for a scenario file that must fail."""
    with pytest.raises(BookError) as info:
        load_scenarios(path, book)  # type: ignore[arg-type]
    return [str(p).replace(str(path.parent) + os.sep, "") for p in info.value.problems]


def finishes(fn: object, seconds: float = 20.0) -> list[object]:
    """Run ``fn`` in a daemon thread; fail (rather than hang the suite) if it blocks."""
    box: list[object] = []

    def target() -> None:
        try:
            box.append(fn())  # type: ignore[operator]
        except BaseException as exc:  # noqa: BLE001 - handed back to the test
            box.append(exc)

    thread = threading.Thread(target=target, daemon=True)
    thread.start()
    thread.join(seconds)
    assert box, "the reader blocked"
    return box


# ------------------------------------------------------------- numbers and bytes
def test_hundred_thousand_digit_number_in_yaml(tmp_path: Path) -> None:
    """An integer longer than Python converts is a field problem at its line, not a crash."""
    book = tmp_path / "b.yaml"
    book.write_text(
        "obligors:\n  - id: A\n    ead: " + "9" * 100_000 + "\n    pd: 0.01\n    lgd: 0.4\n"
        "    asset_correlation: 0.1\n",
        encoding="utf-8",
    )
    (line,) = problems(book)
    assert line.startswith("b.yaml:3: obligors[0] (id 'A').ead: must be a finite number, got '999")
    assert len(line) < 200  # the value is shortened, not echoed in full


def test_hundred_thousand_digit_number_in_csv(tmp_path: Path) -> None:
    """The same in a CSV cell."""
    (tmp_path / "p.csv").write_text(HEADER + "A,,," + "1" * 100_000 + ",0.01,0.4,0.1\n")
    (tmp_path / "b.yaml").write_text("obligors: p.csv\n", encoding="utf-8")
    (line,) = problems(tmp_path / "b.yaml")
    assert line.startswith("p.csv:2: obligors[0] (id 'A').ead: must be a finite number, got '111")
    assert len(line) < 200


def test_long_but_valid_number_in_csv_loads(tmp_path: Path) -> None:
    """A PD written with 100,000 digits is still a PD (only its size is unusual)."""
    (tmp_path / "b.yaml").write_text("obligors: o.csv\n", encoding="utf-8")
    (tmp_path / "o.csv").write_text(HEADER + "A,,,1,0." + "1" * 100_000 + ",0.4,0.1\n")
    assert load_book(tmp_path / "b.yaml").obligors[0].pd == pytest.approx(1 / 9)


def test_nul_byte_in_yaml_names_line_and_field(tmp_path: Path) -> None:
    """A raw NUL byte in a YAML book is refused at its line, with the field it is in."""
    book = tmp_path / "b.yaml"
    book.write_bytes(
        b"obligors:\n  - id: A\n    name: Ac\x00me\n    ead: 1\n    pd: 0.01\n    lgd: 0.4\n"
        b"    asset_correlation: 0.1\n"
    )
    (line,) = problems(book)
    assert line.startswith("b.yaml:3: name: contains the control character U+0000")


def test_nul_byte_in_csv_cells(tmp_path: Path) -> None:
    """A NUL byte in a CSV id or name is a field problem; in a number, not a number."""
    (tmp_path / "b.yaml").write_text("obligors: o.csv\n", encoding="utf-8")
    (tmp_path / "o.csv").write_text(
        HEADER + "A\x00,,,1,0.01,0.4,0.1\nB,Ac\x00me,,1,0.01,0.4,0.1\nC,,,1,0.0\x001,0.4,0.1\n"
    )
    assert problems(tmp_path / "b.yaml") == [
        "o.csv:2: obligors[0].id: must not hold control characters, got 'A\\x00'",
        "o.csv:3: obligors[1] (id 'B').name: must not hold a NUL byte, got 'Ac\\x00me'",
        "o.csv:4: obligors[2] (id 'C').pd: must be a number, got '0.0\\x001'",
    ]


def test_control_characters_in_ids_are_refused(tmp_path: Path) -> None:
    """An id holding an escape sequence is refused; messages show it escaped."""
    book = tmp_path / "b.yaml"
    book.write_text(
        'obligors:\n  - {id: "A\\e[31m", ead: 1, pd: 0.01, lgd: 0.4, asset_correlation: 0.1}\n',
        encoding="utf-8",
    )
    (line,) = problems(book)
    assert line == "b.yaml:2: obligors[0].id: must not hold control characters, got 'A\\x1b[31m'"
    assert "\x1b" not in line


# ------------------------------------------------------------- files that are not files
def test_fifo_as_csv_is_refused_without_blocking(tmp_path: Path) -> None:
    """A CSV path that is a named pipe is refused at once (opening it would block)."""
    os.mkfifo(tmp_path / "o.csv")
    (tmp_path / "b.yaml").write_text("obligors: o.csv\n", encoding="utf-8")
    (outcome,) = finishes(lambda: problems(tmp_path / "b.yaml"))
    assert outcome == [
        "b.yaml:1: obligors: CSV file o.csv is not a regular file (a device, pipe or socket)"
    ]


@pytest.mark.parametrize("device", ["/dev/zero", "/dev/urandom"])
def test_device_as_csv_or_book_is_refused(tmp_path: Path, device: str) -> None:
    """A device (endless data) is refused as a CSV table and as a book."""
    (tmp_path / "b.yaml").write_text(f"obligors: {device}\n", encoding="utf-8")
    (outcome,) = finishes(lambda: problems(tmp_path / "b.yaml"))
    assert outcome == [
        f"b.yaml:1: obligors: CSV file {device} is not a regular file (a device, pipe or socket)"
    ]
    with pytest.raises(BookError, match="is not a regular file"):
        load_book(device)


def test_fifo_as_scenario_file_is_refused(tmp_path: Path) -> None:
    """The scenario reader has the same guard."""
    os.mkfifo(tmp_path / "s.yaml")
    (outcome,) = finishes(lambda: scenario_problems(tmp_path / "s.yaml"))
    assert outcome == ["s.yaml: scenario file is not a regular file (a device, pipe or socket)"]


# ------------------------------------------------------------- memory
def test_book_larger_than_the_yaml_limit_is_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A YAML file beyond the size limit is refused before it is read, with a way out."""
    monkeypatch.setattr(yaml_reader, "MAX_YAML_BYTES", 1000)
    book = tmp_path / "b.yaml"
    book.write_text("book: x\n" + "# padding\n" * 200, encoding="utf-8")
    (line,) = problems(book)
    assert line == (
        "b.yaml: book file is 0 MB, more than the 0 MB a YAML file may have; put large "
        "tables of obligors and links in CSV files"
    )


def test_book_that_would_exceed_memory_is_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A file whose reading needs more memory than is free is refused, naming both sizes."""
    monkeypatch.setattr(yaml_reader, "available_memory", lambda: 2**20)
    book = tmp_path / "b.yaml"
    book.write_text("book: x\n" + "#" * 100_000 + "\n", encoding="utf-8")
    (line,) = problems(book)
    assert "reading it needs about 0.0 GB of memory and 0.0 GB is free" in line
    (tmp_path / "c.yaml").write_text("obligors: o.csv\n", encoding="utf-8")
    (tmp_path / "o.csv").write_text(HEADER + "A,,,1,0.01,0.4,0.1\n" * 2000)
    (line,) = problems(tmp_path / "c.yaml")
    assert line.startswith("c.yaml:1: obligors: CSV file ") and "of memory" in line


def test_available_memory_is_read() -> None:
    """On Linux the free memory is known (the guard is not silently off)."""
    if not Path("/proc/meminfo").exists():  # pragma: no cover - not Linux
        pytest.skip("no /proc/meminfo")
    free = yaml_reader.available_memory()
    assert free is not None and free > 0


# ------------------------------------------------------------- no echo of private files
def test_csv_that_is_not_a_table_is_not_echoed(tmp_path: Path) -> None:
    """A book pointing at a private file never prints the file's content."""
    secret = "root:$6$s3cr3tHash:19000:0:99999:7:::\nkey=hunter2\n"
    (tmp_path / "shadow").write_text(secret, encoding="utf-8")
    (tmp_path / "b.yaml").write_text("obligors: shadow\nlinks: shadow\n", encoding="utf-8")
    lines = problems(tmp_path / "b.yaml")
    assert lines == [
        "shadow:1: obligors: the first line is not a header of known columns "
        "(expected id,ead,pd,lgd,asset_correlation, ...); is this the right file?",
        "shadow:1: links: the first line is not a header of known columns "
        "(expected creditor,debtor,contagion, ...); is this the right file?",
    ]
    for word in ("s3cr3t", "hunter2", "root"):
        assert all(word not in line for line in lines)


def test_binary_private_file_is_not_echoed(tmp_path: Path) -> None:
    """A binary file named as a table is refused by its first bad byte only."""
    (tmp_path / "key.bin").write_bytes(b"PRIVATE\xff\xfeKEY")
    (tmp_path / "b.yaml").write_text("obligors: key.bin\n", encoding="utf-8")
    (line,) = problems(tmp_path / "b.yaml")
    assert line == "key.bin:1: CSV file is not UTF-8 text (byte 0xff)"


# ------------------------------------------------------------- scenario files
TINY_BOOK = """\
obligors:
  - {id: ALPHA, ead: 1, pd: 0.01, lgd: 0.4, asset_correlation: 0.1, sector: shipping}
  - {id: BETA, ead: 1, pd: 0.01, lgd: 0.4, asset_correlation: 0.1, sector: retail}
"""


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        (
            "- name: x\n  pd_scal: 2\n",
            "s.yaml:2: scenarios[0].pd_scal: unknown field (did you mean 'pd_scale'?)",
        ),
        (
            "- name: x\n  sectors:\n    shipping: {lgd_shfit: 0.1}\n",
            "s.yaml:3: scenarios[0].sectors.shipping.lgd_shfit: unknown field "
            "(did you mean 'lgd_shift'?)",
        ),
        (
            "- name: x\n  sectors:\n    shiping: {pd_scale: 2}\n",
            "s.yaml:3: scenarios[0].sectors.shiping: no obligor of the book has this sector "
            "(did you mean 'shipping'?)",
        ),
        (
            "- name: x\n  defaulted: [ALFA]\n",
            "s.yaml:2: scenarios[0].defaulted[0]: no obligor with id 'ALFA' in the book "
            "(did you mean 'ALPHA'?)",
        ),
        (
            "scenario:\n  - name: x\n",
            "s.yaml:1: scenario: unknown field (did you mean 'scenarios'?)",
        ),
    ],
)
def test_scenario_files_suggest_the_field_meant(tmp_path: Path, text: str, expected: str) -> None:
    """Misspelt scenario fields, sectors and ids get the same suggestions books get."""
    (tmp_path / "b.yaml").write_text(TINY_BOOK, encoding="utf-8")
    book = load_book(tmp_path / "b.yaml")
    (tmp_path / "s.yaml").write_text(text, encoding="utf-8")
    assert expected in scenario_problems(tmp_path / "s.yaml", book)


def test_long_scenario_name_is_refused(tmp_path: Path) -> None:
    """A 300-character name (it names a folder) is refused when the file is read."""
    (tmp_path / "s.yaml").write_text("- name: " + "x" * 300 + "\n", encoding="utf-8")
    assert scenario_problems(tmp_path / "s.yaml") == [
        f"s.yaml:1: scenarios[0].name: must be at most {MAX_NAME_LENGTH} characters "
        "(it names a folder), got 300"
    ]


def test_scenario_hostile_yaml(tmp_path: Path) -> None:
    """Python tags, alias bombs and NUL bytes in scenario files are problems, not effects."""
    path = tmp_path / "s.yaml"
    path.write_text("- name: !!python/name:os.system x\n", encoding="utf-8")
    assert scenario_problems(path) == [
        "s.yaml:1: scenarios[0].name: must be non-empty text, got a value tagged "
        "!!python/name:os.system"
    ]
    path.write_bytes(b"- name: a\x00b\n")
    assert scenario_problems(path) == [
        "s.yaml:1: name: contains the control character U+0000, which a YAML file may not "
        "hold (column 10)"
    ]
    bomb = 'a: &a ["x","x"]\n' + "".join(
        f"{chr(98 + i)}: &{chr(98 + i)} [*{chr(97 + i)},*{chr(97 + i)}]\n" for i in range(20)
    )
    path.write_text(bomb, encoding="utf-8")
    (outcome,) = finishes(lambda: scenario_problems(path))
    assert isinstance(outcome, list) and outcome[0].startswith("s.yaml:1: a: unknown field")


# ------------------------------------------------------------- a book that passes check runs
@pytest.mark.parametrize("rho", ["0.9995", "0.99999", "0.999999999"])
def test_asset_correlation_next_to_one_is_refused_by_check(tmp_path: Path, rho: str) -> None:
    """Correlations between 0.999 and 1, which no engine resolves, are a validation problem."""
    book = tmp_path / "b.yaml"
    book.write_text(
        f"obligors:\n  - {{id: A, ead: 1, pd: 0.01, lgd: 0.4, asset_correlation: {rho}}}\n",
        encoding="utf-8",
    )
    assert problems(book) == [
        "b.yaml:2: obligors[0] (id 'A').asset_correlation: must be at most 0.999 (closer to 1 "
        f"the default is a step in the factor that no engine resolves), got {rho}"
    ]


def test_sector_correlation_csv_is_read_by_the_same_guarded_reader(tmp_path: Path) -> None:
    """A sector-correlation table that is a pipe is refused at once, like an obligor table."""
    os.mkfifo(tmp_path / "corr.csv")
    (tmp_path / "b.yaml").write_text(
        "obligors:\n"
        "  - {id: A, ead: 1, pd: 0.01, lgd: 0.4, asset_correlation: 0.1, sector: farming}\n"
        "model:\n  sector_correlation: corr.csv\n",
        encoding="utf-8",
    )
    (outcome,) = finishes(lambda: problems(tmp_path / "b.yaml"))
    assert outcome == [
        "b.yaml:4: model.sector_correlation: CSV file corr.csv is not a regular file "
        "(a device, pipe or socket)"
    ]
