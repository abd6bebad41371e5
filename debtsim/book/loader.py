"""Load and validate a book file into a :class:`~debtsim.book.records.Book`.

A book is a YAML file (``.yaml`` or ``.yml``)::

    book: <free text>          # optional, defaults to the file's stem
    currency: <text>           # optional
    obligors: <list or CSV>    # required: a list of mappings, or a CSV path
    links: <list or CSV>       # optional: a list of mappings, or a CSV path
    model:                     # optional
      factor_qubits: <1..10>

A CSV path is relative to the book's folder (or absolute) and its header uses
the same field names.  Every problem found is collected as a
:class:`~debtsim.errors.Problem` naming the file, the 1-based line of the
offending value, the field path (``obligors[3].pd``, 0-based index) and the
value; then one :class:`~debtsim.errors.BookError` carries them all.  Nothing
else escapes :func:`load_book`: any unexpected failure while reading becomes a
``BookError`` too.
"""

from __future__ import annotations

import csv
import io
import math
import os
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from yaml.nodes import MappingNode, Node, SequenceNode

from debtsim.book.dependence_section import DEPENDENCE_FIELDS, read_dependence
from debtsim.book.records import (
    DEFAULT_FACTOR_QUBITS,
    MAX_ASSET_CORRELATION,
    Book,
    Link,
    Obligor,
)
from debtsim.book.yaml_reader import (
    ProblemSink,
    Raw,
    YamlReader,
    compose_yaml,
    is_absent,
    join_field,
    number,
    quote,
    read_text_file,
    shown,
    suggest,
    unknown_field_message,
)
from debtsim.errors import BookError

__all__ = [
    "BOOK_FIELDS",
    "FACTOR_QUBITS_RANGE",
    "LINK_FIELDS",
    "MODEL_FIELDS",
    "OBLIGOR_FIELDS",
    "REQUIRED_LINK_FIELDS",
    "REQUIRED_OBLIGOR_FIELDS",
    "load_book",
]

#: Top-level keys of a book file.
BOOK_FIELDS: tuple[str, ...] = ("book", "currency", "obligors", "links", "model")
#: Fields of one obligor (YAML keys or CSV columns), in output order.
OBLIGOR_FIELDS: tuple[str, ...] = (
    "id",
    "name",
    "sector",
    "ead",
    "pd",
    "lgd",
    "asset_correlation",
    "maturity",
)
#: Obligor fields that must be present.
REQUIRED_OBLIGOR_FIELDS: tuple[str, ...] = ("id", "ead", "pd", "lgd", "asset_correlation")
#: Fields of one link (YAML keys or CSV columns).
LINK_FIELDS: tuple[str, ...] = ("creditor", "debtor", "contagion", "amount")
#: Link fields that must be present.
REQUIRED_LINK_FIELDS: tuple[str, ...] = ("creditor", "debtor", "contagion")
#: Keys of the optional ``model`` mapping.
MODEL_FIELDS: tuple[str, ...] = ("factor_qubits", *DEPENDENCE_FIELDS)
#: Allowed ``model.factor_qubits`` values, inclusive.
FACTOR_QUBITS_RANGE: tuple[int, int] = (1, 10)

_BOOK_SUFFIXES = (".yaml", ".yml")
_SUGGEST_LIMIT = 5000  # suggest close ids only for books up to this size


def _read_id(raw: Raw) -> tuple[str | None, str | None]:
    """Return ``(id, None)`` or ``(None, message)``."""
    value = raw.value
    if value is None:
        return None, f"must be a non-empty string, got {shown(raw)}"
    if isinstance(value, str):
        if value.strip() == "":
            return None, f"must be a non-empty string, got {shown(raw)}"
        if not value.isprintable():
            return None, f"must not hold control characters, got {quote(value)}"
        return value, None
    if isinstance(value, bool) or isinstance(value, float):
        return None, f"must be a string, got {raw.text} (put it in quotes to use it as an id)"
    # ints, dates and other plain scalars: the text as written (keeps leading zeros)
    return raw.text, None


def _read_text(raw: Raw) -> tuple[str, str | None]:
    """Return optional free text as ``(text, None)`` or ``("", message)``."""
    if raw.kind not in ("scalar", "cell"):
        return "", f"must be text, got {shown(raw)}"
    if raw.value is None:
        return "", None
    if isinstance(raw.value, str):
        if "\x00" in raw.value:
            return "", f"must not hold a NUL byte, got {quote(raw.value)}"
        return raw.value, None
    return raw.text, None


# ---------------------------------------------------------------- records
class _Entry:
    """One obligor or link before validation: its fields, line and path.

    A CSV row keeps its raw ``cells`` (column -> text) and builds ``fields``
    only when the fast path of a builder cannot accept the row as it stands.
    """

    __slots__ = ("_fields", "cells", "file", "ident", "index", "line", "section")

    def __init__(
        self,
        fields: dict[str, Raw] | None,
        line: int,
        section: str,
        index: int,
        file: str,
        cells: dict[str, str] | None = None,
    ) -> None:
        self._fields = fields
        self.cells = cells
        self.ident: str | None = None
        self.line = line
        self.section = section
        self.index = index
        self.file = file

    @property
    def path(self) -> str:
        """Field path of the record, e.g. ``obligors[3] (id 'H4')``, once its id is known."""
        if self.ident is None:
            return f"{self.section}[{self.index}]"
        return f"{self.section}[{self.index}] (id {quote(self.ident)})"

    @property
    def fields(self) -> dict[str, Raw]:
        """Field name -> raw value."""
        if self._fields is None:
            assert self.cells is not None
            line = self.line
            self._fields = {
                name: Raw("cell", cell.strip(), cell.strip(), line)
                for name, cell in self.cells.items()
            }
        return self._fields


def _check_range(
    entry: _Entry,
    name: str,
    sink: ProblemSink,
    test: Callable[[float], str | None],
) -> float | None:
    """Validate a required numeric field; report and return None on failure."""
    raw = entry.fields.get(name)
    if raw is None:
        sink.add(entry.file, entry.line, join_field(entry.path, name), "is required but missing")
        return None
    value = number(raw)
    if isinstance(value, str):
        sink.add(entry.file, raw.line, join_field(entry.path, name), value)
        return None
    message = test(value)
    if message is not None:
        sink.add(entry.file, raw.line, join_field(entry.path, name), f"{message}, got {shown(raw)}")
        return None
    return value


#: Largest exposure accepted: far above any single real exposure in any currency, and far
#: below where squares of losses overflow a float.
MAX_EAD = 1e18


def _ead_test(x: float) -> str | None:
    if x <= 0:
        return "must be greater than 0"
    if x > MAX_EAD:
        return f"must be at most {MAX_EAD:g} (check the units)"
    return None


def _pd_test(x: float) -> str | None:
    if x < 0 or x > 1:
        return "must be between 0 and 1"
    if x == 0:
        return "must be greater than 0"
    if x == 1:
        return "must be less than 1 (a certain default belongs in a stress scenario)"
    return None


def _unit_test(x: float) -> str | None:
    return "must be between 0 and 1" if x < 0 or x > 1 else None


def _correlation_test(x: float) -> str | None:
    if x < 0:
        return "must be at least 0"
    if x >= 1:
        return "must be less than 1"
    if x > MAX_ASSET_CORRELATION:
        return (
            f"must be at most {MAX_ASSET_CORRELATION:g} (closer to 1 the default is a step in "
            "the factor that no engine resolves)"
        )
    return None


#: Effective maturity (years) of an obligor that gives none: the Basel II foundation value.
DEFAULT_MATURITY = 2.5


def _maturity_test(x: float) -> str | None:
    # Basel II (June 2006) para. 320: M is floored at one year and capped at five
    return "must be between 1 and 5 (years)" if x < 1 or x > 5 else None


def _amount_test(x: float) -> str | None:
    return "must be at least 0" if x < 0 else None


def _required_id(entry: _Entry, name: str, sink: ProblemSink) -> str | None:
    raw = entry.fields.get(name)
    if raw is None:
        sink.add(entry.file, entry.line, join_field(entry.path, name), "is required but missing")
        return None
    value, message = _read_id(raw)
    if message is not None:
        sink.add(entry.file, raw.line, join_field(entry.path, name), message)
    return value


def _optional_text(entry: _Entry, name: str, sink: ProblemSink) -> str:
    raw = entry.fields.get(name)
    if raw is None:
        return ""
    text, message = _read_text(raw)
    if message is not None:
        sink.add(entry.file, raw.line, join_field(entry.path, name), message)
    return text


def _fast_obligor(cells: dict[str, str], line: int) -> Obligor | None:
    """Build a CSV obligor whose every value is plainly valid, else return None."""
    try:
        ident = cells["id"].strip()
        ead = float(cells["ead"])
        pd = float(cells["pd"])
        lgd = float(cells["lgd"])
        rho = float(cells["asset_correlation"])
        text = cells.get("maturity", "").strip()
        maturity = float(text) if text else DEFAULT_MATURITY
    except ValueError:
        return None
    if (
        ident
        and 0 < ead <= MAX_EAD
        and 0 < pd < 1
        and 0 <= lgd <= 1
        and 0 <= rho <= MAX_ASSET_CORRELATION
        and 1 <= maturity <= 5
    ):
        name = cells.get("name", "").strip()
        sector = cells.get("sector", "").strip()
        if ident.isprintable() and "\x00" not in name + sector:
            return Obligor(ident, ead, pd, lgd, rho, name, sector, maturity, line)
    return None


def _fast_link(cells: dict[str, str], line: int) -> Link | None:
    """Build a CSV link whose every value is plainly valid, else return None."""
    try:
        creditor = cells["creditor"].strip()
        debtor = cells["debtor"].strip()
        contagion = float(cells["contagion"])
        text = cells.get("amount", "").strip()
        amount = float(text) if text else None
    except ValueError:
        return None
    plain = creditor.isprintable() and debtor.isprintable()
    if (
        creditor
        and debtor
        and plain
        and 0 <= contagion <= 1
        and (amount is None or 0 <= amount < math.inf)
    ):
        return Link(creditor, debtor, contagion, amount, line)
    return None


def _build_obligor(entry: _Entry, sink: ProblemSink) -> tuple[str | None, Obligor | None]:
    """Validate one obligor; return its id (if readable) and the record (if valid)."""
    if entry.cells is not None:
        fast = _fast_obligor(entry.cells, entry.line)
        if fast is not None:
            return fast.id, fast
    before = len(sink.problems)
    ident = _required_id(entry, "id", sink)
    entry.ident = ident
    name = _optional_text(entry, "name", sink)
    sector = _optional_text(entry, "sector", sink)
    ead = _check_range(entry, "ead", sink, _ead_test)
    pd = _check_range(entry, "pd", sink, _pd_test)
    lgd = _check_range(entry, "lgd", sink, _unit_test)
    rho = _check_range(entry, "asset_correlation", sink, _correlation_test)
    maturity: float | None = DEFAULT_MATURITY
    raw_maturity = entry.fields.get("maturity")
    if raw_maturity is not None and str(raw_maturity.value).strip() != "":
        maturity = _check_range(entry, "maturity", sink, _maturity_test)
    if len(sink.problems) != before:
        return ident, None
    assert maturity is not None
    assert ident is not None and ead is not None and pd is not None
    assert lgd is not None and rho is not None
    return ident, Obligor(
        id=ident,
        ead=ead,
        pd=pd,
        lgd=lgd,
        asset_correlation=rho,
        name=name,
        sector=sector,
        maturity=maturity,
        line=entry.line,
    )


def _build_link(
    entry: _Entry,
    sink: ProblemSink,
    known: dict[str, int] | None,
    index: dict[tuple[str, str], int],
) -> Link | None:
    """Validate one link against the known obligor ids (None: skip) and earlier links."""
    if entry.cells is not None:
        fast = _fast_link(entry.cells, entry.line)
        if (
            fast is not None
            and fast.creditor != fast.debtor
            and (known is None or (fast.creditor in known and fast.debtor in known))
            and (fast.creditor, fast.debtor) not in index
        ):
            index[(fast.creditor, fast.debtor)] = entry.line
            return fast
    before = len(sink.problems)
    ends: dict[str, str | None] = {}
    for side in ("creditor", "debtor"):
        ident = _required_id(entry, side, sink)
        ends[side] = ident
        if ident is not None and known is not None and ident not in known:
            raw = entry.fields[side]
            message = f"unknown obligor id {quote(ident)}"
            guess = suggest(ident, known) if len(known) <= _SUGGEST_LIMIT else None
            if guess is not None:
                message += f" (did you mean {quote(guess)}?)"
            sink.add(entry.file, raw.line, join_field(entry.path, side), message)
    creditor, debtor = ends["creditor"], ends["debtor"]
    if creditor is not None and creditor == debtor:
        sink.add(
            entry.file,
            entry.fields["debtor"].line,
            join_field(entry.path, "debtor"),
            f"self-link: creditor and debtor are both {quote(creditor)}",
        )
    contagion = _check_range(entry, "contagion", sink, _unit_test)
    amount: float | None = None
    raw_amount = entry.fields.get("amount")
    if raw_amount is not None and not is_absent(raw_amount):
        amount = _check_range(entry, "amount", sink, _amount_test)
    if creditor is not None and debtor is not None and creditor != debtor:
        key = (creditor, debtor)
        if key in index:
            sink.add(
                entry.file,
                entry.line,
                entry.path,
                f"duplicate link: creditor {quote(creditor)} already has a claim on debtor "
                f"{quote(debtor)} (first at line {index[key]})",
            )
        else:
            index[key] = entry.line
    if len(sink.problems) != before:
        return None
    assert creditor is not None and debtor is not None and contagion is not None
    return Link(
        creditor=creditor,
        debtor=debtor,
        contagion=contagion,
        amount=amount,
        line=entry.line,
    )


# ---------------------------------------------------------------- YAML
class _Yaml(YamlReader):
    """The book's reader: also turns list items into obligor or link entries."""

    def entries(
        self, node: SequenceNode, section: str, allowed: tuple[str, ...]
    ) -> Iterator[_Entry]:
        """One entry per list item that is a mapping; other items are reported."""
        for k, item in enumerate(node.value):
            path = f"{section}[{k}]"
            line = item.start_mark.line + 1
            if not isinstance(item, MappingNode):
                got = shown(self.raw(item))
                self.sink.add(self.file, line, path, f"must be a mapping of fields, got {got}")
                continue
            items = self.mapping(item, path)
            if items is None:
                continue
            fields = {
                key: self.raw(value_node)
                for key, (_key_node, value_node) in items.items()
                if key in allowed
            }
            entry = _Entry(fields, line, section, k, self.file)
            if section == "obligors" and "id" in fields:
                entry.ident = _read_id(fields["id"])[0]
            for key, (key_node, _value_node) in items.items():
                if key not in allowed:
                    self.sink.add(
                        self.file,
                        key_node.start_mark.line + 1,
                        join_field(entry.path, key),
                        unknown_field_message(key, allowed),
                    )
            yield entry


# ---------------------------------------------------------------- files
def _csv_entries(
    raw: Raw,
    section: str,
    book_file: str,
    sink: ProblemSink,
    allowed: tuple[str, ...],
    required: tuple[str, ...],
) -> tuple[list[_Entry] | None, bool]:
    """Read a CSV table named in the book.

    Return the entries (None when the table itself is unusable) and whether
    every data row could be read.
    """
    assert isinstance(raw.value, str)
    given = raw.value.strip()
    shown = given if os.path.isabs(given) else os.path.join(os.path.dirname(book_file), given)
    text = read_text_file(shown, sink, (book_file, raw.line, section), kind="csv")
    if text is None:
        return None, False
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        rows = list(_physical_rows(reader))
    except csv.Error as exc:
        sink.add(shown, reader.line_num, section, f"CSV syntax error: {exc}")
        return None, False
    if not rows:
        sink.add(
            shown,
            1,
            section,
            f"CSV file is empty (expected a header line: {','.join(required)}, ...)",
        )
        return None, False
    header_line, header = rows[0]
    columns = [c.strip() for c in header]
    if not set(columns) & set(allowed):
        # not a table of ours: say so without quoting a line of a file that may be private
        sink.add(
            shown,
            header_line,
            section,
            f"the first line is not a header of known columns (expected {','.join(required)}, "
            "...); is this the right file?",
        )
        return None, False
    problems_before = len(sink.problems)
    seen: set[str] = set()
    for name in columns:
        if name in seen:
            sink.add(shown, header_line, section, f"column {quote(name)} appears twice")
        elif name not in allowed:
            message = unknown_field_message(name, allowed, what=f"column {quote(name)}")
            sink.add(shown, header_line, section, message)
        seen.add(name)
    for name in required:
        if name not in seen:
            sink.add(shown, header_line, section, f"missing required column {quote(name)}")
    if len(sink.problems) != problems_before:
        return None, False
    width = len(columns)
    if len(rows) == 1 and section == "obligors":
        sink.add(
            shown,
            header_line,
            section,
            "CSV file has a header but no rows; at least one obligor is required",
        )
        return None, False
    entries: list[_Entry] = []
    complete = True
    for k, (line, cells) in enumerate(rows[1:]):
        if len(cells) != width:
            sink.add(
                shown,
                line,
                f"{section}[{k}]",
                f"row has {len(cells)} cells, the header has {width}",
            )
            complete = False
            continue
        entries.append(
            _Entry(None, line, section, k, shown, dict(zip(columns, cells, strict=True)))
        )
    return entries, complete


def _physical_rows(reader: Any) -> Iterator[tuple[int, list[str]]]:
    """Non-blank CSV records with the physical line each starts on."""
    start = 1
    for row in reader:
        if "".join(row).strip():
            yield start, row
        start = reader.line_num + 1


# ---------------------------------------------------------------- book
def _section_entries(
    key: str,
    node: Node,
    walker: _Yaml,
    sink: ProblemSink,
    allowed: tuple[str, ...],
    required: tuple[str, ...],
) -> tuple[list[_Entry] | None, bool]:
    """Entries of ``obligors`` or ``links``: an inline list or a CSV path.

    Return the entries (None when the section is unusable) and whether every
    item could be read as a record.
    """
    raw = walker.raw(node)
    if isinstance(node, SequenceNode):
        if not node.value and key == "obligors":
            message = "must list at least one obligor, got an empty list"
            sink.add(walker.file, raw.line, key, message)
        entries = list(walker.entries(node, key, allowed))
        return entries, len(entries) == len(node.value)
    if raw.kind == "scalar" and raw.value is None:
        if key == "obligors":
            sink.add(walker.file, raw.line, key, "must list at least one obligor, got nothing")
            return None, False
        return [], True
    if raw.kind == "scalar" and isinstance(raw.value, str) and raw.value.strip():
        return _csv_entries(raw, key, walker.file, sink, allowed, required)
    sink.add(
        walker.file,
        raw.line,
        key,
        f"must be a list of {key} or the path of a CSV file, got {shown(raw)}",
    )
    return None, False


def _factor_qubits(walker: _Yaml, node: Node, sink: ProblemSink) -> int:
    raw = walker.raw(node)
    if raw.kind != "mapping":
        if raw.kind == "scalar" and raw.value is None:
            return DEFAULT_FACTOR_QUBITS
        sink.add(walker.file, raw.line, "model", f"must be a mapping, got {shown(raw)}")
        return DEFAULT_FACTOR_QUBITS
    assert isinstance(node, MappingNode)
    result = DEFAULT_FACTOR_QUBITS
    for key, (key_node, value_node) in (walker.mapping(node, "model") or {}).items():
        if key in DEPENDENCE_FIELDS:  # checked by dependence_section.read_dependence
            continue
        if key not in MODEL_FIELDS:
            sink.add(
                walker.file,
                key_node.start_mark.line + 1,
                f"model.{key}",
                unknown_field_message(key, MODEL_FIELDS),
            )
            continue
        value = walker.raw(value_node)
        low, high = FACTOR_QUBITS_RANGE
        count = number(value)
        if isinstance(count, str) or not float(count).is_integer() or not low <= count <= high:
            sink.add(
                walker.file,
                value.line,
                "model.factor_qubits",
                f"must be an integer between {low} and {high}, got {shown(value)}",
            )
            continue
        result = int(count)
    return result


def _load(path: str, sink: ProblemSink) -> Book | None:
    if Path(path).suffix.lower() not in _BOOK_SUFFIXES and Path(path).is_file():
        sink.add(path, None, "", "a book file must end in .yaml or .yml")
        return None
    text = read_text_file(path, sink, (path, None, ""))
    if text is None:
        return None
    root = compose_yaml(text, path, sink)
    if root is None:
        if not sink.problems:
            sink.add(
                path,
                None,
                "",
                "file is empty (expected a mapping with keys: " + ", ".join(BOOK_FIELDS) + ")",
            )
        return None
    walker = _Yaml(path, sink)
    if not isinstance(root, MappingNode):
        sink.add(
            path,
            root.start_mark.line + 1,
            "",
            "must be a mapping with keys "
            + ", ".join(BOOK_FIELDS)
            + f"; got {shown(walker.raw(root))}",
        )
        return None
    top = walker.mapping(root, "")
    if top is None:
        return None
    for key, (key_node, _value) in top.items():
        if key not in BOOK_FIELDS:
            sink.add(
                path, key_node.start_mark.line + 1, key, unknown_field_message(key, BOOK_FIELDS)
            )

    name = Path(path).stem
    if "book" in top:
        raw = walker.raw(top["book"][1])
        text_value, message = _read_text(raw)
        if message is not None:
            sink.add(path, raw.line, "book", message)
        elif text_value.strip():
            name = text_value
    currency = ""
    if "currency" in top:
        raw = walker.raw(top["currency"][1])
        currency, message = _read_text(raw)
        if message is not None:
            sink.add(path, raw.line, "currency", message)
    factor_qubits = (
        _factor_qubits(walker, top["model"][1], sink) if "model" in top else DEFAULT_FACTOR_QUBITS
    )

    obligors: list[Obligor] = []
    known: dict[str, int] = {}
    # Links are checked against the ids only when every obligor's id could be read:
    # otherwise one broken obligor would also be reported once per link to it.
    ids_complete = False
    if "obligors" not in top:
        sink.add(path, None, "obligors", "is required but missing")
    else:
        entries, ids_complete = _section_entries(
            "obligors", top["obligors"][1], walker, sink, OBLIGOR_FIELDS, REQUIRED_OBLIGOR_FIELDS
        )
        for entry in entries or []:
            ident, obligor = _build_obligor(entry, sink)
            if ident is None:
                ids_complete = False
                continue
            if ident in known:
                id_line = entry.fields["id"].line  # a CSV cell's line is its row's
                sink.add(
                    entry.file,
                    id_line,
                    f"{entry.path}.id",
                    f"duplicate id {quote(ident)} (first at line {known[ident]})",
                )
                continue
            known[ident] = entry.line if entry.cells is not None else entry.fields["id"].line
            if obligor is not None:
                obligors.append(obligor)

    links: list[Link] = []
    if "links" in top:
        link_entries, _ = _section_entries(
            "links", top["links"][1], walker, sink, LINK_FIELDS, REQUIRED_LINK_FIELDS
        )
        seen_links: dict[tuple[str, str], int] = {}
        for entry in link_entries or []:
            link = _build_link(entry, sink, known if ids_complete else None, seen_links)
            if link is not None:
                links.append(link)

    dependence = read_dependence(
        path,
        top["model"][1] if "model" in top else None,
        top["obligors"][1] if "obligors" in top else None,
        obligors,
        sink.add,
        obligors_complete=ids_complete and not sink.problems,
    )

    if sink.problems:
        return None
    return Book(
        name=name,
        currency=currency,
        obligors=tuple(obligors),
        links=tuple(links),
        factor_qubits=factor_qubits,
        source=path,
        dependence=dependence,
    )


def load_book(path: str | os.PathLike[str]) -> Book:
    """Read and validate a book file.

    Parameters
    ----------
    path : str or os.PathLike
        The YAML book (``.yaml`` or ``.yml``).  CSV tables it names are
        resolved relative to its folder.

    Returns
    -------
    Book
        The validated book; each obligor and link records the line it starts
        on in its source file.

    Raises
    ------
    BookError
        With every problem found, in file order, each rendered as
        ``file:line: field: message`` (e.g.
        ``book.yaml:14: obligors[3].pd: must be between 0 and 1, got 1.5``).
        No other exception escapes.

    """
    shown = os.fspath(path)
    sink = ProblemSink()
    try:
        book = _load(shown, sink)
    except RecursionError:
        sink.add(shown, None, "", "cannot read the book: it is nested too deeply")
        book = None
    except Exception as exc:  # noqa: BLE001 - the contract: no traceback reaches users
        sink.add(shown, None, "", f"cannot read the book: {type(exc).__name__}: {exc}")
        book = None
    if book is None or sink.problems:
        if not sink.problems:  # pragma: no cover - defensive
            sink.add(shown, None, "", "cannot read the book")
        raise BookError(sink.sorted())
    return book
