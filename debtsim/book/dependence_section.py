"""Validate the dependence settings of a book's ``model:`` section.

Keys handled here (the loader keeps ``factor_qubits``)::

    model:
      sectors:                       # loadings form
        agriculture: {loading: 0.6}  # 0 <= loading <= 1
      sector_correlation: file.csv   # or an inline mapping; matrix form
      sector_qubits: 2               # 1..4, circuit resolution per sector
      dependence: student_t          # gaussian (default) or student_t
      degrees_of_freedom: 6          # > 2, only with student_t

Every problem is reported through the loader's ``add(file, line, field,
message)`` callback, so it reads ``file:line: field: message`` like the rest
of the book.  A correlation matrix is checked as given and never repaired:
symmetric and unit diagonal to ``MATRIX_TOLERANCE``, entries in [-1, 1], and
positive semi-definite up to a rounding tolerance on its smallest eigenvalue
(``PSD_TOLERANCE`` times the matrix size).  A singular matrix is valid.
"""

from __future__ import annotations

import csv
import io
import math
import os
from collections.abc import Callable, Sequence
from typing import Any, Protocol

import numpy as np
from yaml.constructor import SafeConstructor
from yaml.nodes import MappingNode, Node, ScalarNode

from debtsim.book.dependence import DEFAULT_SECTOR_QUBITS, DEPENDENCE_FAMILIES, DependenceSpec
from debtsim.book.yaml_reader import (
    ProblemSink,
    line_of,
    node_value,
    quote,
    read_text_file,
    shown,
)

__all__ = [
    "DEPENDENCE_FIELDS",
    "MATRIX_TOLERANCE",
    "PSD_TOLERANCE",
    "SECTOR_QUBITS_RANGE",
    "check_correlation_matrix",
    "read_dependence",
]

#: Keys of ``model:`` handled by this module.
DEPENDENCE_FIELDS: tuple[str, ...] = (
    "sectors",
    "sector_correlation",
    "sector_qubits",
    "dependence",
    "degrees_of_freedom",
)
#: Allowed ``model.sector_qubits`` values, inclusive.
SECTOR_QUBITS_RANGE: tuple[int, int] = (1, 4)
#: Largest asymmetry ``|C_st - C_ts|`` and diagonal deviation ``|C_ss - 1|`` accepted.
MATRIX_TOLERANCE = 1e-9
#: A matrix is positive semi-definite when its smallest eigenvalue is at least
#: ``-PSD_TOLERANCE * size`` (rounding of entries written to about ten digits).
PSD_TOLERANCE = 1e-9
_SECTOR_FIELDS = ("loading",)
_MAX_SHOWN = 60

Report = Callable[[str, int | None, str, str], None]


class _HasSector(Protocol):
    @property
    def sector(self) -> str: ...

    @property
    def line(self) -> int | None: ...


# ---------------------------------------------------------------- scalars
_constructor = SafeConstructor()


def _value(node: Node) -> tuple[str, Any]:
    """Return ``(kind, value)``: kind ``scalar``, ``tagged``, ``list`` or ``mapping``."""
    raw = node_value(node, _constructor)
    return raw.kind, raw.value


def _shown_node(node: Node) -> str:
    return shown(node_value(node, _constructor))


_line = line_of


def _number_text(text: str) -> float | None:
    try:
        number = float(text.strip())
    except ValueError:
        return None
    return number if math.isfinite(number) else None


def _node_number(node: Node) -> float | None:
    """Return a finite number from a YAML scalar (a quoted number counts), else None."""
    kind, value = _value(node)
    if kind != "scalar" or value is None or isinstance(value, bool):
        return None
    if isinstance(value, int | float):
        try:
            number = float(value)
        except OverflowError:
            return None
        return number if math.isfinite(number) else None
    if isinstance(value, str):
        return _number_text(value)
    return None


def _pairs(node: MappingNode) -> list[tuple[str, Node, Node]]:
    """(key text, key node, value node) of a mapping, later duplicates winning."""
    out: dict[str, tuple[str, Node, Node]] = {}
    for key_node, value_node in node.value:
        if isinstance(key_node, ScalarNode):
            out[str(key_node.value)] = (str(key_node.value), key_node, value_node)
    return list(out.values())


_quote = quote


# ---------------------------------------------------------------- matrix
def check_correlation_matrix(
    names: Sequence[str], matrix: np.ndarray[Any, np.dtype[np.float64]]
) -> list[tuple[str, str]]:
    """Problems of a sector correlation matrix, as ``(entry, message)`` pairs.

    Parameters
    ----------
    names : sequence of str
        Sector names, one per row/column.
    matrix : ndarray, shape (s, s)

    Returns
    -------
    list of (str, str)
        ``entry`` is ``"row,column"`` (sector names) or ``""`` for the whole
        matrix; empty when the matrix is a valid correlation matrix: entries
        in [-1, 1], unit diagonal and symmetric (to ``MATRIX_TOLERANCE``) and
        smallest eigenvalue at least ``-PSD_TOLERANCE * s``.

    """
    problems: list[tuple[str, str]] = []
    s = len(names)
    for i in range(s):
        for j in range(s):
            v = float(matrix[i, j])
            at = f"{names[i]},{names[j]}"
            if i == j:
                if abs(v - 1.0) > MATRIX_TOLERANCE:
                    problems.append((at, f"the diagonal must be 1, got {v:g}"))
            elif not abs(v) <= 1.0 + MATRIX_TOLERANCE:
                if not (j < i and v == float(matrix[j, i])):  # a symmetric pair: report once
                    problems.append((at, f"must be between -1 and 1, got {v:g}"))
            elif j > i and abs(v - float(matrix[j, i])) > MATRIX_TOLERANCE:
                problems.append(
                    (
                        at,
                        f"the matrix must be symmetric: {v:g} here but "
                        f"{float(matrix[j, i]):g} at {names[j]},{names[i]}",
                    )
                )
    if problems:
        return problems
    eigenvalues, vectors = np.linalg.eigh(0.5 * (matrix + matrix.T))
    smallest = float(eigenvalues[0])
    if smallest < -PSD_TOLERANCE * s:
        weights = np.abs(vectors[:, 0])
        top = [names[k] for k in np.argsort(-weights)[:3] if weights[k] > 0.1]
        problems.append(
            (
                "",
                f"is not positive semi-definite: smallest eigenvalue {smallest:.6g} "
                f"(its eigenvector loads mostly on {', '.join(top)}); "
                "the matrix is never repaired, please correct it",
            )
        )
    return problems


def _matrix_from_csv(
    path: str, report: Report, field: str, named_at: tuple[str, int]
) -> tuple[list[str], np.ndarray[Any, np.dtype[np.float64]]] | None:
    """Read a square CSV: header and first column are sector names.

    ``named_at`` is the (book file, line) naming the CSV, where a missing or
    unreadable file is reported.
    """
    # the one reader's guards: a regular file of a size that fits, UTF-8 text
    sink = ProblemSink()
    text = read_text_file(path, sink, (named_at[0], named_at[1], field), kind="csv")
    for problem in sink.problems:
        report(problem.file, problem.line, problem.field, problem.message)
    if text is None:
        return None
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    rows: list[tuple[int, list[str]]] = []
    try:
        start = 1
        for row in reader:
            if "".join(row).strip():
                rows.append((start, [c.strip() for c in row]))
            start = reader.line_num + 1
    except csv.Error as exc:
        report(path, reader.line_num, field, f"CSV syntax error: {exc}")
        return None
    if not rows:
        report(path, 1, field, "CSV file is empty (expected a header of sector names)")
        return None
    header_line, header = rows[0]
    names = header[1:]
    ok = True
    if not names or any(not n for n in names):
        report(
            path,
            header_line,
            field,
            "the header must name a sector in every column after the first",
        )
        return None
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        report(path, header_line, field, f"sector {_quote(dup)} appears twice in the header")
        return None
    matrix = np.full((len(names), len(names)), np.nan)
    seen: dict[str, int] = {}
    for line, cells in rows[1:]:
        if len(cells) != len(names) + 1:
            report(
                path, line, field, f"row has {len(cells)} cells, the header has {len(names) + 1}"
            )
            ok = False
            continue
        name = cells[0]
        if name not in names:
            report(
                path, line, field, f"row names sector {_quote(name)}, which is not in the header"
            )
            ok = False
            continue
        if name in seen:
            report(
                path,
                line,
                field,
                f"sector {_quote(name)} has two rows (first at line {seen[name]})",
            )
            ok = False
            continue
        seen[name] = line
        i = names.index(name)
        for j, cell in enumerate(cells[1:]):
            number = _number_text(cell)
            if number is None:
                shown = "an empty cell" if cell == "" else _quote(cell)
                report(path, line, f"{field}[{name},{names[j]}]", f"must be a number, got {shown}")
                ok = False
            else:
                matrix[i, j] = number
    missing = [n for n in names if n not in seen]
    if ok and missing:
        report(path, header_line, field, "no row for sector(s) " + ", ".join(map(_quote, missing)))
        ok = False
    return (names, matrix) if ok else None


def _matrix_inline(
    file: str, node: MappingNode, report: Report, field: str
) -> tuple[list[str], np.ndarray[Any, np.dtype[np.float64]]] | None:
    """Read ``{row: {column: value}}``; every row must give every column."""
    rows = _pairs(node)
    if not rows:
        report(file, _line(node), field, "must name at least one sector")
        return None
    names = [name for name, _, _ in rows]
    matrix = np.full((len(names), len(names)), np.nan)
    ok = True
    for i, (name, _key, value) in enumerate(rows):
        if not isinstance(value, MappingNode):
            report(
                file,
                _line(value),
                f"{field}.{name}",
                f"must be a mapping of sector -> correlation, got {_shown_node(value)}",
            )
            ok = False
            continue
        given = {k: (kn, vn) for k, kn, vn in _pairs(value)}
        for col in given:
            if col not in names:
                report(
                    file,
                    _line(given[col][0]),
                    f"{field}.{name}.{col}",
                    f"unknown sector (the matrix's sectors are {', '.join(names)})",
                )
                ok = False
        lacking = [c for c in names if c not in given]
        if lacking:
            report(
                file,
                _line(value),
                f"{field}.{name}",
                "lacks column(s) " + ", ".join(lacking) + " (give the full square matrix)",
            )
            ok = False
        for j, col in enumerate(names):
            if col not in given:
                continue
            number = _node_number(given[col][1])
            if number is None:
                report(
                    file,
                    _line(given[col][1]),
                    f"{field}.{name}.{col}",
                    f"must be a number, got {_shown_node(given[col][1])}",
                )
                ok = False
            else:
                matrix[i, j] = number
    return (names, matrix) if ok else None


# ---------------------------------------------------------------- section
def _obligor_file(book_file: str, obligors_node: Node | None) -> str:
    """Return the file obligor lines refer to: the book, or the CSV it names."""
    if isinstance(obligors_node, ScalarNode):
        kind, value = _value(obligors_node)
        if kind == "scalar" and isinstance(value, str) and value.strip():
            given = value.strip()
            return (
                given if os.path.isabs(given) else os.path.join(os.path.dirname(book_file), given)
            )
    return book_file


def read_dependence(
    book_file: str,
    model_node: Node | None,
    obligors_node: Node | None,
    obligors: Sequence[_HasSector],
    report: Report,
    *,
    obligors_complete: bool = True,
) -> DependenceSpec | None:
    """Validate the dependence keys of ``model:`` against the book's obligors.

    Parameters
    ----------
    book_file : str
        The book's path as the user gave it (messages and relative CSV paths).
    model_node : yaml Node or None
        The ``model`` value; anything but a mapping is left to the loader.
    obligors_node : yaml Node or None
        The ``obligors`` value (tells whether obligor lines are in a CSV).
    obligors : sequence of records with ``sector`` and ``line``
        The obligors that validated.
    report : callable
        ``report(file, line, field, message)`` records one problem.
    obligors_complete : bool
        False when some obligors failed validation: sector membership is then
        checked only for the ones given.

    Returns
    -------
    DependenceSpec or None
        None when the section states none of these keys (the one-factor
        Gaussian model) or when a problem was reported.

    """
    if not isinstance(model_node, MappingNode):
        return None
    items = {k: (kn, vn) for k, kn, vn in _pairs(model_node) if k in DEPENDENCE_FIELDS}
    if not items:
        return None
    problems = 0

    def add(file: str, line: int | None, field: str, message: str) -> None:
        nonlocal problems
        problems += 1
        report(file, line, field, message)

    sectors: list[str] = []
    loadings: list[float] | None = None
    correlation: np.ndarray[Any, np.dtype[np.float64]] | None = None
    source = ""
    sectors_line: int | None = None

    before_sectors = problems
    if "sectors" in items and "sector_correlation" in items:
        key_node = items["sector_correlation"][0]
        add(
            book_file,
            _line(key_node),
            "model.sector_correlation",
            "give either model.sectors (loadings) or model.sector_correlation (matrix), not both",
        )
    elif "sectors" in items:
        key_node, node = items["sectors"]
        sectors_line = _line(key_node)
        loadings = []
        if not isinstance(node, MappingNode) or not node.value:
            shown = "an empty mapping" if isinstance(node, MappingNode) else _shown_node(node)
            add(
                book_file,
                _line(node),
                "model.sectors",
                f"must map each sector name to {{loading: a}}, got {shown}",
            )
        else:
            for name, name_node, value in _pairs(node):
                path = f"model.sectors.{name}"
                if not name.strip():
                    add(book_file, _line(name_node), path, "a sector name must not be empty")
                    continue
                if not isinstance(value, MappingNode):
                    add(
                        book_file,
                        _line(value),
                        path,
                        f"must be a mapping like {{loading: 0.6}}, got {_shown_node(value)}",
                    )
                    continue
                fields = {k: (kn, vn) for k, kn, vn in _pairs(value)}
                for k, (kn, _vn) in fields.items():
                    if k not in _SECTOR_FIELDS:
                        add(book_file, _line(kn), f"{path}.{k}", "unknown field (allowed: loading)")
                if "loading" not in fields:
                    add(book_file, _line(value), f"{path}.loading", "is required but missing")
                    continue
                raw = fields["loading"][1]
                number = _node_number(raw)
                if number is None:
                    add(
                        book_file,
                        _line(raw),
                        f"{path}.loading",
                        f"must be a number, got {_shown_node(raw)}",
                    )
                    continue
                if not 0.0 <= number <= 1.0:
                    add(
                        book_file,
                        _line(raw),
                        f"{path}.loading",
                        f"must be between 0 and 1, got {_shown_node(raw)}",
                    )
                    continue
                sectors.append(name)
                loadings.append(number)
    elif "sector_correlation" in items:
        key_node, node = items["sector_correlation"]
        sectors_line = _line(key_node)
        field = "model.sector_correlation"
        read: tuple[list[str], np.ndarray[Any, np.dtype[np.float64]]] | None = None
        kind, value = _value(node)
        if isinstance(node, MappingNode):
            read = _matrix_inline(book_file, node, add, field)
            source = "inline"
            at_file, at_line = book_file, sectors_line
        elif kind == "scalar" and isinstance(value, str) and value.strip():
            given = value.strip()
            path = (
                given if os.path.isabs(given) else os.path.join(os.path.dirname(book_file), given)
            )
            read = _matrix_from_csv(path, add, field, (book_file, _line(node)))
            source = given
            at_file, at_line = path, 1
        else:
            add(
                book_file,
                _line(node),
                field,
                "must be the path of a CSV file or a mapping of sector -> "
                f"{{sector: correlation}}, got {_shown_node(node)}",
            )
        if read is not None:
            names, matrix = read
            found = check_correlation_matrix(names, matrix)
            for entry, message in found:
                add(at_file, at_line, f"{field}[{entry}]" if entry else field, message)
            if not found:
                sectors = names
                correlation = matrix

    sectors_ok = problems == before_sectors
    qubits = DEFAULT_SECTOR_QUBITS
    if "sector_qubits" in items:
        key_node, node = items["sector_qubits"]
        number = _node_number(node)
        low, high = SECTOR_QUBITS_RANGE
        if number is None or not float(number).is_integer() or not low <= number <= high:
            add(
                book_file,
                _line(node),
                "model.sector_qubits",
                f"must be an integer between {low} and {high}, got {_shown_node(node)}",
            )
        elif "sectors" not in items and "sector_correlation" not in items:
            add(
                book_file,
                _line(key_node),
                "model.sector_qubits",
                "has no effect without model.sectors; remove it or add sector loadings",
            )
        else:
            qubits = int(number)

    family = "gaussian"
    if "dependence" in items:
        node = items["dependence"][1]
        kind, value = _value(node)
        if kind == "scalar" and isinstance(value, str) and value.strip() in DEPENDENCE_FAMILIES:
            family = value.strip()
        else:
            add(
                book_file,
                _line(node),
                "model.dependence",
                f"must be one of {', '.join(DEPENDENCE_FAMILIES)}, got {_shown_node(node)}",
            )
            family = ""
    dof: float | None = None
    if "degrees_of_freedom" in items:
        key_node, node = items["degrees_of_freedom"]
        number = _node_number(node)
        if number is None:
            add(
                book_file,
                _line(node),
                "model.degrees_of_freedom",
                f"must be a number, got {_shown_node(node)}",
            )
        elif not number > 2.0:
            add(
                book_file,
                _line(node),
                "model.degrees_of_freedom",
                f"must be greater than 2 (the variance must be finite), got {_shown_node(node)}",
            )
        elif family == "gaussian":
            add(
                book_file,
                _line(key_node),
                "model.degrees_of_freedom",
                "applies only with model.dependence: student_t",
            )
        else:
            dof = number
    elif family == "student_t":
        add(
            book_file,
            _line(items["dependence"][1]),
            "model.degrees_of_freedom",
            "is required when model.dependence is student_t (a number > 2)",
        )

    if sectors_line is not None and sectors and obligors_complete and sectors_ok:
        section = "model.sectors" if loadings is not None else "model.sector_correlation"
        _check_membership(book_file, sectors, (sectors_line, section), obligors, obligors_node, add)
    if problems:
        return None
    return DependenceSpec(
        sectors=tuple(sectors),
        loadings=tuple(loadings) if loadings is not None and sectors else None,
        correlation=tuple(tuple(float(x) for x in row) for row in correlation)
        if correlation is not None
        else None,
        family=family or "gaussian",
        degrees_of_freedom=dof,
        sector_qubits=qubits,
        correlation_source=source,
    )


def _check_membership(
    book_file: str,
    sectors: Sequence[str],
    at: tuple[int, str],
    obligors: Sequence[_HasSector],
    obligors_node: Node | None,
    add: Report,
) -> None:
    """Every obligor must name a listed sector."""
    listed = set(sectors)
    file = _obligor_file(book_file, obligors_node)
    where = "" if file == book_file else f" of {file}"
    first_unlisted: dict[str, int | None] = {}
    blank: list[int] = []
    for k, o in enumerate(obligors):
        name = o.sector.strip()
        if not name:
            blank.append(k)
        elif name not in listed and name not in first_unlisted:
            first_unlisted[name] = o.line
    if first_unlisted:
        shown = ", ".join(
            f"{_quote(n)} (first at line {line}{where})" for n, line in first_unlisted.items()
        )
        add(book_file, at[0], at[1], f"obligors name sectors that are not listed: {shown}")
    if blank:
        first = obligors[blank[0]]
        add(
            file,
            first.line,
            f"obligors[{blank[0]}].sector",
            "is required when sector factors are given ("
            + ("1 obligor names" if len(blank) == 1 else f"{len(blank)} obligors name")
            + " no sector)",
        )
