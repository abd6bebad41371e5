"""Loading and validating book files (debtsim.book.loader)."""

from __future__ import annotations

import csv
import json
import math
import os
import tempfile
import textwrap
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from debtsim.book import loader as schema
from debtsim.book import yaml_reader
from debtsim.book.loader import (
    BOOK_FIELDS,
    LINK_FIELDS,
    OBLIGOR_FIELDS,
    REQUIRED_LINK_FIELDS,
    REQUIRED_OBLIGOR_FIELDS,
    load_book,
)
from debtsim.book.records import DEFAULT_FACTOR_QUBITS, MAX_ASSET_CORRELATION, Book, Link, Obligor
from debtsim.errors import BookError, Problem

BOOKS = Path(__file__).resolve().parents[1] / "books"
EXPECTED = json.loads((BOOKS / "expected_errors.json").read_text(encoding="utf-8"))

HEADER = "id,name,sector,ead,pd,lgd,asset_correlation\n"


def problems(path: str | os.PathLike[str]) -> list[str]:
    """Return the problem lines ``load_book`` reports for a book that must fail."""
    with pytest.raises(BookError) as info:
        load_book(path)
    assert str(info.value) == "\n".join(str(p) for p in info.value.problems)
    return [str(p) for p in info.value.problems]


def write(folder: Path, name: str, text: str) -> Path:
    """Write a dedented text file and return its path."""
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def one_obligor_book(**fields: object) -> str:
    """A valid one-obligor book with some obligor fields replaced (YAML text)."""
    values: dict[str, object] = {
        "id": "A1",
        "ead": 1000,
        "pd": 0.01,
        "lgd": 0.4,
        "asset_correlation": 0.1,
    }
    values.update(fields)
    lines = ["book: test", "obligors:"]
    for k, (key, value) in enumerate(values.items()):
        lines.append(f"  {'- ' if k == 0 else '  '}{key}: {value}")
    return "\n".join(lines) + "\n"


@pytest.fixture
def in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Work inside an empty folder so messages show bare file names."""
    monkeypatch.chdir(tmp_path)
    return tmp_path


@pytest.fixture
def in_books(monkeypatch: pytest.MonkeyPatch) -> Path:
    """Work inside tests/books so messages show bare file names."""
    monkeypatch.chdir(BOOKS)
    return BOOKS


# ---------------------------------------------------------------- valid books
def test_inline_book_loads_records_with_lines(in_books: Path) -> None:
    """The small inline book gives the right records, lines and settings."""
    book = load_book("good_small.yaml")
    assert book.name == "Quillmoor Valley - farm supply desk"
    assert book.currency == "EUR"
    assert book.factor_qubits == 4
    assert book.source == "good_small.yaml"
    assert book.obligors[0] == Obligor(
        "QH1", 1_200_000.0, 0.015, 0.45, 0.18, "Quillmoor Haulage", "transport"
    )
    assert [o.id for o in book.obligors] == ["QH1", "OG2", "FF3", "LC4"]
    assert [o.line for o in book.obligors] == [5, 12, 19, 26]
    assert book.links == (
        Link("QH1", "OG2", 0.3, 250_000.0),
        Link("OG2", "QH1", 0.2, None),
        Link("FF3", "OG2", 0.25, 90_000.0),
    )
    assert [lk.line for lk in book.links] == [34, 38, 41]
    assert all(isinstance(o.ead, float) for o in book.obligors)


def test_csv_book_loads_records_with_lines(in_books: Path) -> None:
    """The CSV book reads both tables, with empty optional cells and CSV row lines."""
    book = load_book("good_csv.yaml")
    assert book.factor_qubits == DEFAULT_FACTOR_QUBITS
    assert len(book.obligors) == 5
    assert book.obligors[2] == Obligor("FF3", 450_000.0, 0.03, 0.5, 0.15, "Fennbrook Feed Supply")
    assert book.obligors[3] == Obligor("LC4", 650_000.0, 0.01, 0.35, 0.2, "", "warehousing")
    assert book.obligors[4].name == "Tarnby Rail Sidings, Ltd."
    assert [o.line for o in book.obligors] == [2, 3, 4, 5, 6]
    assert book.links[1] == Link("OG2", "QH1", 0.2, None)
    assert [lk.line for lk in book.links] == [2, 3, 4, 5]


def test_csv_and_inline_books_agree(in_books: Path) -> None:
    """The same four firms read inline and from CSV give equal records."""
    inline = load_book("good_small.yaml")
    table = load_book("good_csv.yaml")
    assert table.obligors[:2] == inline.obligors[:2]
    assert table.links[:3] == inline.links


def test_path_objects_and_yml_suffix(tmp_path: Path) -> None:
    """A pathlib path and the .yml suffix are accepted; the stem names an untitled book."""
    path = write(tmp_path, "desk.yml", one_obligor_book().replace("book: test\n", ""))
    book = load_book(path)
    assert book.name == "desk"
    assert book.source == str(path)
    assert book.links == ()


def test_yaml_conveniences(in_tmp: Path) -> None:
    """Merge keys, exponent floats without a dot, quoted numbers and integer ids all work."""
    write(
        in_tmp,
        "b.yaml",
        """\
        book: conveniences
        obligors:
          - &base
            id: 007
            ead: 1e6
            pd: "0.02"
            lgd: 0.4
            asset_correlation: 0.1
          - <<: *base
            id: 17
            name: 42
        links:
        model:
          factor_qubits: 6.0
        """,
    )
    book = load_book("b.yaml")
    assert [o.id for o in book.obligors] == ["007", "17"]
    assert book.obligors[0].ead == 1e6
    assert book.obligors[1].pd == 0.02
    assert book.obligors[1].name == "42"
    assert book.factor_qubits == 6


def test_csv_in_subfolder_messages_use_joined_path(in_tmp: Path) -> None:
    """A CSV problem names the CSV by the book's folder joined to the path written in the book."""
    write(in_tmp, "scenarios/book.yaml", "obligors: data/obligors.csv\n")
    rows = "".join(f"F{i},,,100,0.01,0.4,0.1\n" for i in range(15)) + "F15,,,100,1.5,0.4,0.1\n"
    write(in_tmp, "scenarios/data/obligors.csv", HEADER + rows)
    assert problems("scenarios/book.yaml") == [
        "scenarios/data/obligors.csv:17: obligors[15] (id 'F15').pd: "
        "must be between 0 and 1, got 1.5"
    ]


def test_csv_absolute_path(tmp_path: Path) -> None:
    """An absolute CSV path is used as written."""
    table = write(tmp_path, "elsewhere/o.csv", HEADER + "A,,,100,0.01,0.4,0.1\n")
    book_path = write(tmp_path, "book.yaml", f"obligors: {table}\n")
    assert load_book(book_path).obligors[0].id == "A"


def test_csv_blank_lines_bom_quotes_and_spaces(in_tmp: Path) -> None:
    """Blank lines are skipped, a BOM ignored, cells trimmed; quoted newlines keep line counts."""
    text = (
        "\ufeffid, name ,sector,ead,pd,lgd,asset_correlation\n"
        "\n"
        'A,"Two\nlines",x, 100 ,0.01,0.4,0.1\n'
        "B,,,100,0.5,0.4,0.1\n"
        "\n"
        "C,,,100,2,0.4,0.1\n"
    )
    (in_tmp / "o.csv").write_text(text, encoding="utf-8")
    write(in_tmp, "b.yaml", "obligors: o.csv\n")
    assert problems("b.yaml") == [
        "o.csv:7: obligors[2] (id 'C').pd: must be between 0 and 1, got 2"
    ]
    (in_tmp / "o.csv").write_text(text.replace("C,,,100,2,", "C,,,100,0.2,"), encoding="utf-8")
    book = load_book("b.yaml")
    assert [o.line for o in book.obligors] == [3, 5, 7]
    assert book.obligors[0].name == "Two\nlines"
    assert book.obligors[0].ead == 100.0


def test_links_csv_header_only_is_no_links(in_tmp: Path) -> None:
    """A links CSV with only its header means the book has no links."""
    write(in_tmp, "l.csv", "creditor,debtor,contagion\n")
    write(in_tmp, "b.yaml", one_obligor_book() + "links: l.csv\n")
    assert load_book("b.yaml").links == ()


# ---------------------------------------------------------------- fixture books
@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_bad_fixture_books(name: str, in_books: Path) -> None:
    """Every bad fixture book reports exactly the listed problems, in file order."""
    assert problems(name) == EXPECTED[name]


def test_every_bad_fixture_is_listed() -> None:
    """expected_errors.json covers every bad_*.yaml in tests/books."""
    assert sorted(p.name for p in BOOKS.glob("bad_*.yaml")) == sorted(EXPECTED)


def test_message_format_matches_design_example(in_books: Path) -> None:
    """A range problem reads exactly like the example in DESIGN.md."""
    with pytest.raises(BookError) as info:
        load_book("bad_pd_range.yaml")
    (problem,) = info.value.problems
    assert problem == Problem(
        "bad_pd_range.yaml", 14, "obligors[1] (id 'OG2').pd", "must be between 0 and 1, got 1.5"
    )


# ---------------------------------------------------------------- rules, one by one
@pytest.mark.parametrize(
    ("fields", "expected"),
    [
        ({"ead": 0}, "obligors[0] (id 'A1').ead: must be greater than 0, got 0"),
        ({"ead": "-1.5e3"}, "obligors[0] (id 'A1').ead: must be greater than 0, got -1.5e3"),
        ({"ead": "1e400"}, "obligors[0] (id 'A1').ead: must be a finite number, got 1e400"),
        ({"ead": "-.inf"}, "obligors[0] (id 'A1').ead: must be a finite number, got -.inf"),
        ({"pd": 1.5}, "obligors[0] (id 'A1').pd: must be between 0 and 1, got 1.5"),
        ({"pd": -0.1}, "obligors[0] (id 'A1').pd: must be between 0 and 1, got -0.1"),
        ({"pd": 0.0}, "obligors[0] (id 'A1').pd: must be greater than 0, got 0.0"),
        (
            {"pd": 1},
            "obligors[0] (id 'A1').pd: must be less than 1 (a certain default belongs in a stress "
            "scenario), got 1",
        ),
        ({"pd": "NaN"}, "obligors[0] (id 'A1').pd: must be a finite number, got NaN"),
        ({"pd": ".NaN"}, "obligors[0] (id 'A1').pd: must be a finite number, got .NaN"),
        ({"pd": "yes"}, "obligors[0] (id 'A1').pd: must be a number, got yes"),
        ({"pd": "null"}, "obligors[0] (id 'A1').pd: must be a number, got null"),
        ({"pd": "[0.1]"}, "obligors[0] (id 'A1').pd: must be a number, got a list"),
        ({"pd": "{p: 1}"}, "obligors[0] (id 'A1').pd: must be a number, got a mapping"),
        ({"pd": "'1,5'"}, "obligors[0] (id 'A1').pd: must be a number, got '1,5'"),
        (
            {"pd": "1.5%"},
            "obligors[0] (id 'A1').pd: must be a number, got '1.5%' (write fractions, e.g. 0.015)",
        ),
        ({"pd": "2024-01-01"}, "obligors[0] (id 'A1').pd: must be a number, got 2024-01-01"),
        ({"lgd": 1.01}, "obligors[0] (id 'A1').lgd: must be between 0 and 1, got 1.01"),
        ({"lgd": -0.01}, "obligors[0] (id 'A1').lgd: must be between 0 and 1, got -0.01"),
        (
            {"asset_correlation": 1.0},
            "obligors[0] (id 'A1').asset_correlation: must be less than 1, got 1.0",
        ),
        (
            {"asset_correlation": -1},
            "obligors[0] (id 'A1').asset_correlation: must be at least 0, got -1",
        ),
        ({"id": "''"}, "obligors[0].id: must be a non-empty string, got ''"),
        ({"id": "'  '"}, "obligors[0].id: must be a non-empty string, got '  '"),
        ({"id": "~"}, "obligors[0].id: must be a non-empty string, got nothing"),
        ({"id": ""}, "obligors[0].id: must be a non-empty string, got nothing"),
        (
            {"id": "true"},
            "obligors[0].id: must be a string, got true (put it in quotes to use it as an id)",
        ),
        ({"id": "[A, B]"}, "obligors[0].id: must be a non-empty string, got a list"),
        ({"name": "{a: 1}"}, "obligors[0] (id 'A1').name: must be text, got a mapping"),
        ({"sector": "[x]"}, "obligors[0] (id 'A1').sector: must be text, got a list"),
        (
            {"rating": "BB"},
            "obligors[0] (id 'A1').rating: unknown field "
            "(allowed: id, name, sector, ead, pd, lgd, asset_correlation, maturity)",
        ),
        ({"Sector": "x"}, "obligors[0] (id 'A1').Sector: unknown field (did you mean 'sector'?)"),
    ],
)
def test_obligor_value_rules(in_tmp: Path, fields: dict[str, object], expected: str) -> None:
    """Each obligor rule names the file, the value's line, the field and the value."""
    write(in_tmp, "b.yaml", one_obligor_book(**fields))
    keys = list({"id": 0, "ead": 0, "pd": 0, "lgd": 0, "asset_correlation": 0} | fields)
    line = 3 + keys.index(next(iter(fields)))
    assert problems("b.yaml") == [f"b.yaml:{line}: {expected}"]


def test_unknown_yaml_tag_is_reported_not_run(in_tmp: Path) -> None:
    """A Python-object tag is refused as a value, never constructed."""
    write(in_tmp, "b.yaml", one_obligor_book(name="!!python/name:os.system"))
    assert problems("b.yaml") == [
        "b.yaml:8: obligors[0] (id 'A1').name: must be text, got a value tagged "
        "!!python/name:os.system"
    ]


def test_every_missing_required_field_reported(in_tmp: Path) -> None:
    """An obligor with only an id reports each missing field at the obligor's line."""
    write(in_tmp, "b.yaml", "obligors:\n  - name: nothing else\n")
    assert problems("b.yaml") == [
        f"b.yaml:2: obligors[0].{name}: is required but missing" for name in REQUIRED_OBLIGOR_FIELDS
    ]


def test_duplicate_ids_name_both_lines(in_tmp: Path) -> None:
    """A repeated id is reported on the later line and names the first."""
    text = (
        one_obligor_book()
        + "  - id: A1\n    ead: 5\n    pd: 0.1\n    lgd: 0\n    asset_correlation: 0\n"
    )
    write(in_tmp, "b.yaml", text)
    assert problems("b.yaml") == [
        "b.yaml:8: obligors[1] (id 'A1').id: duplicate id 'A1' (first at line 3)"
    ]


def test_integer_and_text_ids_collide(in_tmp: Path) -> None:
    """An id written as a number equals the same id written as text."""
    text = (
        one_obligor_book(id=17)
        + "  - id: '17'\n    ead: 5\n    pd: 0.1\n    lgd: 0\n    asset_correlation: 0\n"
    )
    write(in_tmp, "b.yaml", text)
    assert problems("b.yaml") == [
        "b.yaml:8: obligors[1] (id '17').id: duplicate id '17' (first at line 3)"
    ]


def test_repeated_key_in_one_mapping(in_tmp: Path) -> None:
    """A key given twice in one mapping is an error naming the first line."""
    write(in_tmp, "b.yaml", "book: a\nbook: b\n" + one_obligor_book().replace("book: test\n", ""))
    assert problems("b.yaml") == ["b.yaml:2: book: given twice (first at line 1)"]


LINKED = (
    one_obligor_book()
    + "  - id: B2\n    ead: 5\n    pd: 0.1\n    lgd: 0\n    asset_correlation: 0\nlinks:\n"
)


@pytest.mark.parametrize(
    ("link", "expected"),
    [
        (
            "creditor: A1, debtor: B2X, contagion: 0.1",
            "links[0].debtor: unknown obligor id 'B2X' (did you mean 'B2'?)",
        ),
        (
            "creditor: XYZ, debtor: B2, contagion: 0.1",
            "links[0].creditor: unknown obligor id 'XYZ'",
        ),
        (
            "creditor: A1, debtor: A1, contagion: 0.1",
            "links[0].debtor: self-link: creditor and debtor are both 'A1'",
        ),
        (
            "creditor: A1, debtor: B2, contagion: 1.01",
            "links[0].contagion: must be between 0 and 1, got 1.01",
        ),
        (
            "creditor: A1, debtor: B2, contagion: -0.5",
            "links[0].contagion: must be between 0 and 1, got -0.5",
        ),
        (
            "creditor: A1, debtor: B2, contagion: high",
            "links[0].contagion: must be a number, got 'high'",
        ),
        ("creditor: A1, debtor: B2", "links[0].contagion: is required but missing"),
        ("debtor: B2, contagion: 0.1", "links[0].creditor: is required but missing"),
        (
            "creditor: A1, debtor: B2, contagion: 0.1, amount: -1",
            "links[0].amount: must be at least 0, got -1",
        ),
        (
            "creditor: A1, debtor: B2, contagion: 0.1, amount: .inf",
            "links[0].amount: must be a finite number, got .inf",
        ),
        (
            "creditor: A1, debtor: B2, contagion: 0.1, weight: 1",
            "links[0].weight: unknown field (allowed: creditor, debtor, contagion, amount)",
        ),
        (
            "creditor: A1, debtor: 1.5, contagion: 0.1",
            "links[0].debtor: must be a string, got 1.5 (put it in quotes to use it as an id)",
        ),
    ],
)
def test_link_rules(in_tmp: Path, link: str, expected: str) -> None:
    """Each link rule names the file, the line, the field and the value."""
    write(in_tmp, "b.yaml", LINKED + f"  - {{{link}}}\n")
    assert problems("b.yaml") == [f"b.yaml:14: {expected}"]


def test_link_amount_may_be_null_or_zero(in_tmp: Path) -> None:
    """An empty amount means no amount; zero is allowed."""
    write(
        in_tmp,
        "b.yaml",
        LINKED + "  - {creditor: A1, debtor: B2, contagion: 0, amount: }\n"
        "  - {creditor: B2, debtor: A1, contagion: 1, amount: 0}\n",
    )
    assert load_book("b.yaml").links == (Link("A1", "B2", 0.0, None), Link("B2", "A1", 1.0, 0.0))


def test_duplicate_link_names_first_line(in_tmp: Path) -> None:
    """The same creditor and debtor twice is an error; the reverse direction is not."""
    write(
        in_tmp,
        "b.yaml",
        LINKED + "  - {creditor: A1, debtor: B2, contagion: 0.1}\n"
        "  - {creditor: B2, debtor: A1, contagion: 0.1}\n"
        "  - {creditor: A1, debtor: B2, contagion: 0.2}\n",
    )
    assert problems("b.yaml") == [
        "b.yaml:16: links[2]: duplicate link: creditor 'A1' already has a claim on debtor 'B2' "
        "(first at line 14)"
    ]


@pytest.mark.parametrize(
    ("section", "expected"),
    [
        ("links: 5\n", "b.yaml:8: links: must be a list of links or the path of a CSV file, got 5"),
        (
            "links: {a: 1}\n",
            "b.yaml:8: links: must be a list of links or the path of a CSV file, got a mapping",
        ),
        ("links:\n  - A1\n", "b.yaml:9: links[0]: must be a mapping of fields, got 'A1'"),
        ("model: 5\n", "b.yaml:8: model: must be a mapping, got 5"),
        (
            "model:\n  factor_qubits: 0\n",
            "b.yaml:9: model.factor_qubits: must be an integer between 1 and 10, got 0",
        ),
        (
            "model:\n  factor_qubits: 4.5\n",
            "b.yaml:9: model.factor_qubits: must be an integer between 1 and 10, got 4.5",
        ),
        (
            "model:\n  factor_qubits: true\n",
            "b.yaml:9: model.factor_qubits: must be an integer between 1 and 10, got true",
        ),
        (
            "model:\n  factor_qubit: 4\n",
            "b.yaml:9: model.factor_qubit: unknown field (did you mean 'factor_qubits'?)",
        ),
        ("currency: [EUR]\n", "b.yaml:8: currency: must be text, got a list"),
        ("book2: x\n", "b.yaml:8: book2: unknown field (did you mean 'book'?)"),
        ("obligors2: x\n", "b.yaml:8: obligors2: unknown field (did you mean 'obligors'?)"),
    ],
)
def test_top_level_rules(in_tmp: Path, section: str, expected: str) -> None:
    """Top-level keys, links, model and currency are checked with their lines."""
    write(in_tmp, "b.yaml", one_obligor_book() + section)
    assert problems("b.yaml") == [expected]


def test_odd_key_stays_on_one_line(in_tmp: Path) -> None:
    """A key holding a line break is shown escaped, so each problem is one line."""
    write(in_tmp, "b.yaml", one_obligor_book() + '"a\\nb": 1\n')
    assert problems("b.yaml") == [
        "b.yaml:8: a\\nb: unknown field (allowed: book, currency, obligors, links, model)"
    ]


def test_model_null_and_links_null_take_defaults(in_tmp: Path) -> None:
    """An empty model or links section means the defaults."""
    write(in_tmp, "b.yaml", one_obligor_book() + "links:\nmodel:\ncurrency:\n")
    book = load_book("b.yaml")
    assert (book.links, book.factor_qubits, book.currency) == ((), DEFAULT_FACTOR_QUBITS, "")


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        (
            "",
            "b.yaml: file is empty "
            "(expected a mapping with keys: book, currency, obligors, links, model)",
        ),
        (
            "# only a comment\n",
            "b.yaml: file is empty "
            "(expected a mapping with keys: book, currency, obligors, links, model)",
        ),
        (
            "just text\n",
            "b.yaml:1: must be a mapping with keys book, currency, obligors, links, model; "
            "got 'just text'",
        ),
        ("book: x\n", "b.yaml: obligors: is required but missing"),
        ("obligors:\n", "b.yaml:1: obligors: must list at least one obligor, got nothing"),
        ("obligors: []\n", "b.yaml:1: obligors: must list at least one obligor, got an empty list"),
        (
            "obligors: ''\n",
            "b.yaml:1: obligors: must be a list of obligors or the path of a CSV file, got ''",
        ),
    ],
)
def test_file_level_rules(in_tmp: Path, text: str, expected: str) -> None:
    """Empty files, wrong shapes and YAML syntax errors are single clear problems."""
    (in_tmp / "b.yaml").write_text(text, encoding="utf-8")
    assert problems("b.yaml") == [expected]


@pytest.mark.parametrize(
    ("text", "start", "end"),
    [
        # The wording comes from PyYAML (libyaml when present); the place is ours.
        (
            "book: [a\n",
            "b.yaml:2: YAML syntax error: did not find expected ',' or ']'",
            "(column 1); while parsing a flow sequence at line 1",
        ),
        (
            "a: 1\n b: 2\n",
            "b.yaml:2: YAML syntax error: mapping values are not allowed",
            "(column 3)",
        ),
        (
            "book: 'x\n",
            "b.yaml:2: YAML syntax error: found unexpected end of stream",
            "(column 1); while scanning a quoted scalar at line 1",
        ),
        (
            "a: 1\n---\nb: 2\n",
            "b.yaml:2: YAML syntax error: found another document",
            "(column 1); expected a single document in the stream at line 1",
        ),
        ("a: *nowhere\n", "b.yaml:1: YAML syntax error: found undefined alias", "(column 4)"),
    ],
)
def test_yaml_syntax_errors(in_tmp: Path, text: str, start: str, end: str) -> None:
    """A YAML syntax error is one problem naming its line and column."""
    (in_tmp / "b.yaml").write_text(text, encoding="utf-8")
    (found,) = problems("b.yaml")
    assert found.startswith(start) and found.endswith(end)


def test_merge_of_a_non_mapping(in_tmp: Path) -> None:
    """A merge key pointing at a scalar is reported at its line."""
    write(in_tmp, "b.yaml", one_obligor_book() + "  - <<: 5\n")
    assert problems("b.yaml") == [
        "b.yaml:8: obligors[1]: cannot merge: expected a mapping or list of mappings for merging, "
        "but found scalar"
    ]


def test_utf8_text_is_kept(in_tmp: Path) -> None:
    """Non-ASCII names in a UTF-8 book are read as written."""
    write(in_tmp, "b.yaml", one_obligor_book(name="Société Fennbrook — 東") + "book: Coöp\n")
    with pytest.raises(BookError):  # the book key is given twice
        load_book("b.yaml")
    write(in_tmp, "b.yaml", one_obligor_book(name="Société Fennbrook — 東"))
    assert load_book("b.yaml").obligors[0].name == "Société Fennbrook — 東"


def test_missing_file_directory_and_suffix(in_tmp: Path) -> None:
    """A missing path, a folder and a non-YAML file name are reported without a traceback."""
    assert problems("absent.yaml") == ["absent.yaml: book file not found"]
    (in_tmp / "folder.yaml").mkdir()
    assert problems("folder.yaml") == ["folder.yaml: book file is a directory"]
    (in_tmp / "book.txt").write_text(one_obligor_book(), encoding="utf-8")
    assert problems("book.txt") == ["book.txt: a book file must end in .yaml or .yml"]


def test_unreadable_files(in_tmp: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """An OS error while reading the book or a CSV becomes a problem with its reason."""
    write(in_tmp, "b.yaml", "obligors: o.csv\n")
    write(in_tmp, "o.csv", HEADER)
    real = open

    def refuse(name: str, *args: Any, **kwargs: Any) -> Any:
        if Path(name).name in denied:
            raise PermissionError(13, "Permission denied")
        return real(name, *args, **kwargs)

    monkeypatch.setattr(yaml_reader, "open", refuse, raising=False)
    denied = {"b.yaml"}
    assert problems("b.yaml") == ["b.yaml: cannot read book file: permission denied"]
    denied = {"o.csv"}
    assert problems("b.yaml") == [
        "b.yaml:1: obligors: cannot read CSV file o.csv: permission denied"
    ]


def test_not_utf8(in_tmp: Path) -> None:
    """Bytes that are not UTF-8 are reported with the line they are on."""
    (in_tmp / "b.yaml").write_bytes(b"book: caf\xe9\n")
    assert problems("b.yaml") == ["b.yaml:1: book file is not UTF-8 text (byte 0xe9)"]
    (in_tmp / "b.yaml").write_text("obligors: o.csv\n", encoding="utf-8")
    (in_tmp / "o.csv").write_bytes(HEADER.encode() + b"A,Caf\xe9,,1,0.1,0.1,0.1\n")
    assert problems("b.yaml") == ["o.csv:2: CSV file is not UTF-8 text (byte 0xe9)"]


def test_unexpected_failure_becomes_book_error(
    in_tmp: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Any exception inside the loader reaches the caller as a BookError, never raw."""
    write(in_tmp, "b.yaml", one_obligor_book())

    def boom(*args: object) -> None:
        raise ValueError("surprise")

    monkeypatch.setattr(schema, "compose_yaml", boom)
    assert problems("b.yaml") == ["b.yaml: cannot read the book: ValueError: surprise"]


def test_deep_nesting_is_a_problem(in_tmp: Path) -> None:
    """Pathologically nested YAML is refused with a message, not a crash."""
    (in_tmp / "b.yaml").write_text("book: " + "[" * 50_000 + "\n", encoding="utf-8")
    (found,) = problems("b.yaml")
    assert found.startswith("b.yaml:1: YAML syntax error:")


# ---------------------------------------------------------------- CSV rules
def csv_book(folder: Path, obligors: str, links: str | None = None) -> None:
    """Write b.yaml naming o.csv (and l.csv when links are given)."""
    write(folder, "o.csv", obligors)
    text = "obligors: o.csv\n"
    if links is not None:
        write(folder, "l.csv", links)
        text += "links: l.csv\n"
    write(folder, "b.yaml", text)


@pytest.mark.parametrize(
    ("obligors", "expected"),
    [
        (
            "",
            [
                "o.csv:1: obligors: CSV file is empty "
                "(expected a header line: id,ead,pd,lgd,asset_correlation, ...)"
            ],
        ),
        (
            HEADER,
            [
                "o.csv:1: obligors: CSV file has a header but no rows; "
                "at least one obligor is required"
            ],
        ),
        (
            "id,ead,lgd\nA,1,0.1\n",
            [
                "o.csv:1: obligors: missing required column 'pd'",
                "o.csv:1: obligors: missing required column 'asset_correlation'",
            ],
        ),
        (
            "id,ead,pd,lgd,asset_correlation,PD\nA,1,0.1,0.1,0.1,0.2\n",
            ["o.csv:1: obligors: unknown column 'PD' (did you mean 'pd'?)"],
        ),
        (
            "id,ead,pd,pd,lgd,asset_correlation\nA,1,0.1,0.1,0.1,0.1\n",
            ["o.csv:1: obligors: column 'pd' appears twice"],
        ),
        (HEADER + "A,,,1,0.1,0.1\n", ["o.csv:2: obligors[0]: row has 6 cells, the header has 7"]),
        (
            HEADER + 'A,"x"y,,1,0.1,0.1,0.1\n',
            ["o.csv:2: obligors: CSV syntax error: ',' expected after '\"'"],
        ),
        (
            HEADER + "A,,,,0.1,0.1,0.1\n",
            ["o.csv:2: obligors[0] (id 'A').ead: must be a number, got an empty cell"],
        ),
        (
            HEADER + ",,,1,0.1,0.1,0.1\n",
            ["o.csv:2: obligors[0].id: must be a non-empty string, got an empty cell"],
        ),
        (
            HEADER + "A,,,1,abc,0.1,0.1\n",
            ["o.csv:2: obligors[0] (id 'A').pd: must be a number, got 'abc'"],
        ),
        (
            HEADER + "A,,,1,nan,0.1,0.1\n",
            ["o.csv:2: obligors[0] (id 'A').pd: must be a finite number, got nan"],
        ),
        (
            HEADER + "A,,,inf,0.1,0.1,0.1\n",
            ["o.csv:2: obligors[0] (id 'A').ead: must be a finite number, got inf"],
        ),
        (
            HEADER + "A,,,1,0.1,0.1,True\n",
            ["o.csv:2: obligors[0] (id 'A').asset_correlation: must be a number, got 'True'"],
        ),
        (
            HEADER + "A,,,1,0.1,0.1,0.1\nB,,,1,0.1,0.1,0.1\nA,,,1,0.1,0.1,0.1\n",
            ["o.csv:4: obligors[2].id: duplicate id 'A' (first at line 2)"],
        ),
    ],
)
def test_obligor_csv_rules(in_tmp: Path, obligors: str, expected: list[str]) -> None:
    """Obligor CSV problems name the CSV file, the row's physical line and the column."""
    csv_book(in_tmp, obligors)
    assert problems("b.yaml") == expected


@pytest.mark.parametrize(
    ("links", "expected"),
    [
        ("creditor,debtor\nA,B\n", ["l.csv:1: links: missing required column 'contagion'"]),
        (
            "creditor,debtor,contagion\nA,B,0.1\nA,A,0.1\n",
            ["l.csv:3: links[1].debtor: self-link: creditor and debtor are both 'A'"],
        ),
        (
            "creditor,debtor,contagion\nA,C,0.1\n",
            ["l.csv:2: links[0].debtor: unknown obligor id 'C'"],
        ),
        (
            "creditor,debtor,contagion,amount\nA,B,0.1,-3\n",
            ["l.csv:2: links[0].amount: must be at least 0, got -3"],
        ),
        (
            "creditor,debtor,contagion\nA,B,0.1\nA,B,0.3\n",
            [
                "l.csv:3: links[1]: duplicate link: creditor 'A' already has a claim on debtor 'B' "
                "(first at line 2)"
            ],
        ),
        (
            "creditor,debtor,contagion\nA,B,\n",
            ["l.csv:2: links[0].contagion: must be a number, got an empty cell"],
        ),
    ],
)
def test_link_csv_rules(in_tmp: Path, links: str, expected: list[str]) -> None:
    """Link CSV problems name the CSV file, the row's line and the column."""
    csv_book(in_tmp, HEADER + "A,,,1,0.1,0.1,0.1\nB,,,1,0.1,0.1,0.1\n", links)
    assert problems("b.yaml") == expected


def test_missing_csv_is_reported_at_the_book_line(in_tmp: Path) -> None:
    """A CSV that does not exist is reported where the book names it."""
    write(in_tmp, "b.yaml", "book: x\nobligors: data/o.csv\n")
    assert problems("b.yaml") == ["b.yaml:2: obligors: CSV file not found: data/o.csv"]
    (in_tmp / "data" / "o.csv").mkdir(parents=True)
    assert problems("b.yaml") == ["b.yaml:2: obligors: CSV file data/o.csv is a directory"]


def test_all_problems_are_collected_in_file_order(in_tmp: Path) -> None:
    """Problems across the book and its CSV are all reported, book first, by line."""
    write(
        in_tmp,
        "b.yaml",
        "currency: [x]\nobligors: o.csv\n"
        "links:\n  - {creditor: A, debtor: Z, contagion: 2}\nextra: 1\n",
    )
    write(in_tmp, "o.csv", HEADER + "A,,,0,0.1,0.1,0.1\nB,,,1,1.1,0.1,0.1\n")
    assert problems("b.yaml") == [
        "b.yaml:1: currency: must be text, got a list",
        "b.yaml:4: links[0].debtor: unknown obligor id 'Z'",
        "b.yaml:4: links[0].contagion: must be between 0 and 1, got 2",
        "b.yaml:5: extra: unknown field (allowed: book, currency, obligors, links, model)",
        "o.csv:2: obligors[0] (id 'A').ead: must be greater than 0, got 0",
        "o.csv:3: obligors[1] (id 'B').pd: must be between 0 and 1, got 1.1",
    ]


def test_unknown_ids_not_reported_when_obligors_unreadable(in_tmp: Path) -> None:
    """When an obligor's id cannot be read, links are not also reported as unknown ids."""
    write(
        in_tmp,
        "b.yaml",
        LINKED.replace("id: B2", "id: 2.5") + "  - {creditor: A1, debtor: B2, contagion: 0.1}\n",
    )
    assert problems("b.yaml") == [
        "b.yaml:8: obligors[1].id: must be a string, got 2.5 (put it in quotes to use it as an id)"
    ]


def test_field_constants() -> None:
    """The public field lists match the book format in DESIGN.md."""
    assert BOOK_FIELDS == ("book", "currency", "obligors", "links", "model")
    assert set(REQUIRED_OBLIGOR_FIELDS) <= set(OBLIGOR_FIELDS)
    assert set(OBLIGOR_FIELDS) - set(REQUIRED_OBLIGOR_FIELDS) == {"name", "sector", "maturity"}
    assert set(LINK_FIELDS) - set(REQUIRED_LINK_FIELDS) == {"amount"}


def test_large_csv_book_loads(in_tmp: Path) -> None:
    """A 20,000-obligor CSV book with links loads completely, keeping row lines."""
    n = 20_000
    with open(in_tmp / "o.csv", "w", encoding="utf-8") as f:
        f.write(HEADER)
        f.writelines(f"F{i},Firm {i},s{i % 7},{1000 + i},0.01,0.4,0.12\n" for i in range(n))
    with open(in_tmp / "l.csv", "w", encoding="utf-8") as f:
        f.write("creditor,debtor,contagion,amount\n")
        f.writelines(f"F{i},F{i + 1},0.1,\n" for i in range(n - 1))
    write(in_tmp, "b.yaml", "obligors: o.csv\nlinks: l.csv\n")
    book = load_book("b.yaml")
    assert len(book.obligors) == n and len(book.links) == n - 1
    assert book.obligors[-1].line == n + 1
    assert book.obligors[123] == Obligor("F123", 1123.0, 0.01, 0.4, 0.12, "Firm 123", "s4")


# ---------------------------------------------------------------- round trips
# free text holds anything but a NUL byte (refused, see test_nul_and_huge_numbers)
TEXT = st.text(st.characters(exclude_categories=("Cs",), exclude_characters="\x00"), max_size=12)
# ids are printable text: control characters in an id are refused (see test_control_characters)
IDS = st.text(st.characters(exclude_categories=("Cs",)), min_size=1, max_size=8).filter(
    lambda s: bool(s.strip()) and s.isprintable()
)


@st.composite
def books(
    draw: st.DrawFn, text: st.SearchStrategy[str] = TEXT, ids: st.SearchStrategy[str] = IDS
) -> Book:
    """Random valid books: unique ids, in-range values, distinct non-self links."""
    names = draw(st.lists(ids, min_size=1, max_size=6, unique=True))
    unit = st.floats(0, 1)
    obligors = tuple(
        Obligor(
            id=i,
            ead=draw(st.floats(0, 1e15, exclude_min=True)),
            pd=draw(st.floats(0, 1, exclude_min=True, exclude_max=True)),
            lgd=draw(unit),
            asset_correlation=draw(st.floats(0, MAX_ASSET_CORRELATION)),
            name=draw(text),
            sector=draw(text),
            maturity=draw(st.floats(1, 5)),
        )
        for i in names
    )
    pairs = [(c, d) for c in names for d in names if c != d]
    chosen = draw(st.lists(st.sampled_from(pairs), unique=True, max_size=8)) if pairs else []
    links = tuple(Link(c, d, draw(unit), draw(st.none() | st.floats(0, 1e12))) for c, d in chosen)
    return Book(
        name=draw(text.filter(str.strip)),
        currency=draw(text),
        obligors=obligors,
        links=links,
        factor_qubits=draw(st.integers(1, 10)),
    )


def same_records(a: Book, b: Book) -> bool:
    """Books agree on everything but their source file."""
    return (a.name, a.currency, a.obligors, a.links, a.factor_qubits) == (
        b.name,
        b.currency,
        b.obligors,
        b.links,
        b.factor_qubits,
    )


@settings(max_examples=60, deadline=None)
@given(books())
def test_yaml_round_trip(book: Book) -> None:
    """A valid book dumped to YAML and loaded back gives equal records."""
    data = {
        "book": book.name,
        "currency": book.currency,
        "obligors": [{k: getattr(o, k) for k in OBLIGOR_FIELDS} for o in book.obligors],
        "links": [{k: getattr(lk, k) for k in LINK_FIELDS} for lk in book.links],
        "model": {"factor_qubits": book.factor_qubits},
    }
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "book.yaml"
        path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
        loaded = load_book(path)
    assert same_records(loaded, book)


CSV_TEXT = TEXT.map(str.strip)
CSV_IDS = IDS.map(str.strip)


@settings(max_examples=60, deadline=None)
@given(books(text=CSV_TEXT, ids=CSV_IDS))
def test_csv_round_trip(book: Book) -> None:
    """A valid book written as CSV tables and loaded back gives equal records."""
    with tempfile.TemporaryDirectory() as folder:
        base = Path(folder)
        with open(base / "o.csv", "w", encoding="utf-8", newline="") as f:
            writer = csv.writer(f)
            writer.writerow(OBLIGOR_FIELDS)
            writer.writerows(
                [
                    [
                        repr(getattr(o, k)) if isinstance(getattr(o, k), float) else getattr(o, k)
                        for k in OBLIGOR_FIELDS
                    ]
                    for o in book.obligors
                ]
            )
        with open(base / "l.csv", "w", encoding="utf-8", newline="") as f:
            writer = csv.writer(f)
            writer.writerow(LINK_FIELDS)
            writer.writerows(
                [
                    lk.creditor,
                    lk.debtor,
                    repr(lk.contagion),
                    "" if lk.amount is None else repr(lk.amount),
                ]
                for lk in book.links
            )
        text = yaml.safe_dump(
            {
                "book": book.name,
                "currency": book.currency,
                "obligors": "o.csv",
                "links": "l.csv",
                "model": {"factor_qubits": book.factor_qubits},
            },
        )
        (base / "b.yaml").write_text(text, encoding="utf-8")
        loaded = load_book(base / "b.yaml")
    assert same_records(loaded, book)
    assert not any(math.isnan(o.ead) for o in loaded.obligors)


# ---------------------------------------------------------------- robustness
TOKENS = st.sampled_from(
    [
        "",
        "~",
        "[",
        "]",
        "{",
        "}",
        ":",
        "- ",
        "&a",
        "*a",
        "<<: *a",
        "!!str",
        "!!python/none",
        "'",
        '"',
        "#",
        "\n",
        "\n  ",
        "1e9",
        "-1",
        ".nan",
        "yes",
        "0x1F",
        "é",
        "\t",
        "obligors: x.csv",
    ]
)


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=200) | st.lists(TOKENS | st.text(max_size=5)).map("".join))
def test_arbitrary_input_gives_book_error_only(data: bytes | str) -> None:
    """Whatever the file holds, loading either succeeds or raises BookError."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "book.yaml"
        if isinstance(data, str):
            path.write_text(data, encoding="utf-8")
        else:
            path.write_bytes(data)
        try:
            load_book(path)
        except BookError as error:
            assert error.problems
            assert all(
                p.file.startswith(str(path)) or p.file.endswith(".csv") for p in error.problems
            )


@settings(max_examples=150, deadline=None)
@given(st.data())
def test_mutated_fixture_gives_book_error_only(data: st.DataObject) -> None:
    """Replacing any one value of a valid book by odd YAML never escapes as another error."""
    lines = (BOOKS / "good_small.yaml").read_text(encoding="utf-8").splitlines()
    k = data.draw(st.sampled_from([i for i, line in enumerate(lines) if ": " in line]))
    key = lines[k].split(": ")[0]
    lines[k] = f"{key}: {data.draw(st.lists(TOKENS, max_size=4).map(''.join))}"
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "book.yaml"
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        try:
            load_book(path)
        except BookError as error:
            assert error.problems


def test_absurd_exposure_is_refused(tmp_path) -> None:
    """An EAD beyond 1e18 is refused with the value, before any float can overflow."""
    import pytest as _pytest

    from debtsim.book.loader import load_book
    from debtsim.errors import BookError

    book = tmp_path / "huge.yaml"
    book.write_text(
        "book: huge\nobligors:\n"
        "  - {id: A, ead: 1.0e+200, pd: 0.01, lgd: 0.4, asset_correlation: 0.1}\n"
    )
    with _pytest.raises(BookError) as info:
        load_book(book)
    assert "huge.yaml:3: obligors[0] (id 'A').ead: must be at most 1e+18" in str(info.value)
    assert "1e+200" in str(info.value) or "1.0e+200" in str(info.value)


def test_maturity_is_optional_and_checked(tmp_path: Path) -> None:
    """Obligor maturity defaults to 2.5 years; outside 1..5 it is a file:line field error."""
    assert load_book(write(tmp_path, "a.yaml", one_obligor_book())).obligors[0].maturity == 2.5
    book = load_book(write(tmp_path, "b.yaml", one_obligor_book(maturity=4)))
    assert book.obligors[0].maturity == 4.0
    found = problems(write(tmp_path, "c.yaml", one_obligor_book(maturity=7)))
    assert len(found) == 1
    assert "c.yaml:8: obligors[0] (id 'A1').maturity:" in found[0]
    assert "must be between 1 and 5 (years), got 7" in found[0]
    csv_book = write(tmp_path, "d.yaml", "book: t\nobligors: o.csv\n")
    write(tmp_path, "o.csv", HEADER.strip() + ",maturity\nA,,,10,0.01,0.4,0.1,\n"
          "B,,,10,0.01,0.4,0.1,0.5\n")
    found = problems(csv_book)
    assert len(found) == 1 and "o.csv:3:" in found[0] and "maturity" in found[0]
