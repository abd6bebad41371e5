"""Read input files with line numbers: the one reader shared by books and scenario files.

Every YAML input (a book, a scenario file) is read here: the text is read
with the guards every input file needs (a regular file, a size the machine
can hold, UTF-8), composed into PyYAML's node tree, and its values are read
from the nodes, whose ``start_mark`` gives the line each value starts on.
Problems are collected in a :class:`ProblemSink` rather than raised, so that
a file's every problem is reported at once, each as ``file:line: field:
message``.

The node tree is read with the safe constructor only: a tag that would build
a Python object (``!!python/object``) is reported as a problem, never run.
"""

from __future__ import annotations

import difflib
import math
import os
import stat
from collections.abc import Iterable
from typing import Any, NamedTuple

import yaml
from yaml.constructor import SafeConstructor
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from debtsim.errors import Problem, describe_os_error
from debtsim.resources import available_memory

__all__ = [
    "MAX_CSV_BYTES",
    "MAX_YAML_BYTES",
    "ProblemSink",
    "Raw",
    "YamlReader",
    "compose_yaml",
    "is_absent",
    "join_field",
    "line_of",
    "node_value",
    "number",
    "quote",
    "read_text_file",
    "reads_as_number",
    "shown",
    "suggest",
    "unknown_field_message",
]

#: Largest YAML file read.  Reading a YAML book takes about 53 times the file's size in
#: memory (tracemalloc peak of ``load_book`` on an inline book of 20,000 obligors), so
#: 32 MB needs about 2 GB; larger tables belong in CSV files, which take far less.
MAX_YAML_BYTES = 32 * 2**20
#: Largest CSV table read: a million obligors take about 60 MB, so 2 GB is far beyond
#: any book.  Reading a CSV table takes about 22 times its size (same measurement on a
#: table of 200,000 obligors).
MAX_CSV_BYTES = 2 * 2**30
#: Bytes of memory one byte of a YAML (CSV) file takes while it is read, the measured
#: factor rounded up for the records built after reading.
_YAML_MEMORY_FACTOR = 60
_CSV_MEMORY_FACTOR = 30

_MAX_SHOWN = 60  # longest value text quoted in a message

try:  # libyaml is much faster on large inline books
    _YamlLoader: Any = yaml.CSafeLoader
except AttributeError:  # pragma: no cover - depends on the PyYAML build
    _YamlLoader = yaml.SafeLoader


# ---------------------------------------------------------------- values
class Raw(NamedTuple):
    """One value as read from YAML or CSV, before validation.

    ``kind`` is ``"scalar"`` (a YAML scalar; ``value`` is its Python value),
    ``"cell"`` (a CSV cell; ``value`` is the stripped text), ``"tagged"`` (a
    YAML scalar with a tag the safe loader refuses; ``text`` is the tag),
    ``"list"`` or ``"mapping"``.  ``text`` is the value as written; ``line``
    is 1-based.
    """

    kind: str
    value: Any
    text: str
    line: int


def quote(text: str) -> str:
    """Quote ``text`` for a message, shortened to 60 characters, escapes visible."""
    if len(text) > _MAX_SHOWN:
        text = text[: _MAX_SHOWN - 3] + "..."
    return repr(text)


def reads_as_number(text: str) -> bool:
    """Tell whether ``float(text)`` accepts ``text``."""
    if len(text) > 400 or not text.isprintable():  # a number's text, not a wall of digits
        return False
    try:
        float(text)
    except ValueError:
        return False
    return True


def shown(raw: Raw) -> str:
    """How a value appears after ``got`` in a message."""
    if raw.kind == "list":
        return "a list"
    if raw.kind == "mapping":
        return "a mapping"
    if raw.kind == "tagged":
        return f"a value tagged {raw.text.replace('tag:yaml.org,2002:', '!!')}"
    if raw.kind == "cell":
        if raw.text == "":
            return "an empty cell"
        return raw.text if reads_as_number(raw.text) else quote(raw.text)
    value = raw.value
    if value is None:
        return "nothing" if raw.text in ("", "~") else raw.text
    if isinstance(value, str):
        stripped = value.strip()
        if stripped and reads_as_number(stripped):
            return stripped
        return quote(value)
    text = raw.text
    return text if len(text) <= _MAX_SHOWN and text.isprintable() else quote(text)


def is_absent(raw: Raw) -> bool:
    """Tell whether a value is a YAML null or an empty CSV cell (a field left out)."""
    if raw.kind == "cell":
        return raw.text == ""
    return raw.kind == "scalar" and raw.value is None


def number(raw: Raw) -> float | str:
    """Return the value as a finite float, or an error message.

    A YAML number, or text that reads as one (``"1e-3"``, a CSV cell), is
    accepted; ``"5%"`` is refused with a hint to write the fraction.
    """
    value = raw.value
    if value is None or isinstance(value, bool):
        return f"must be a number, got {shown(raw)}"
    if isinstance(value, int | float):
        try:
            result = float(value)
        except OverflowError:
            result = math.inf
    elif isinstance(value, str):
        text = value.strip()
        try:
            result = float(text)
        except ValueError:
            hint = ""
            if text.endswith("%") and reads_as_number(text[:-1]):
                hint = f" (write fractions, e.g. {float(text[:-1]) / 100:g})"
            return f"must be a number, got {shown(raw)}{hint}"
    else:
        return f"must be a number, got {shown(raw)}"
    if not math.isfinite(result):
        return f"must be a finite number, got {shown(raw)}"
    return result


# ---------------------------------------------------------------- problems
class ProblemSink:
    """Collects problems, remembering the order in which files were first seen."""

    def __init__(self) -> None:
        self.problems: list[Problem] = []
        self._rank: dict[str, int] = {}

    def add(self, file: str, line: int | None, field: str, message: str) -> None:
        """Record one problem at ``file:line`` about ``field``."""
        self._rank.setdefault(file, len(self._rank))
        # one problem, one line: a key may hold a line break
        field = field.replace("\r", "\\r").replace("\n", "\\n")
        self.problems.append(Problem(file, line, field, message))

    def sorted(self) -> list[Problem]:
        """Return the problems by file (in the order first seen), then by line."""
        return sorted(
            self.problems,
            key=lambda p: (self._rank.get(p.file, 0), p.line if p.line is not None else 0),
        )


def suggest(name: str, choices: Iterable[str]) -> str | None:
    """Return the choice closest to a misspelt ``name``, or None when none is close."""
    options = list(choices)
    lowered = {c.lower(): c for c in options}
    match = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=0.6)
    return lowered[match[0]] if match else None


def unknown_field_message(name: str, allowed: tuple[str, ...], what: str = "field") -> str:
    """``unknown field (did you mean 'x'?)``, or the allowed names when none is close."""
    guess = suggest(name, allowed)
    if guess is not None:
        return f"unknown {what} (did you mean '{guess}'?)"
    return f"unknown {what} (allowed: {', '.join(allowed)})"


def join_field(prefix: str, name: str) -> str:
    """Dotted field path: ``join_field("model", "factor_qubits")``."""
    return f"{prefix}.{name}" if prefix else name


# ---------------------------------------------------------------- files
def _size_problem(path: str, size: int, kind: str) -> str | None:
    """Why a file of ``size`` bytes is too large to read, or None."""
    if kind == "yaml":
        cap, factor = MAX_YAML_BYTES, _YAML_MEMORY_FACTOR
    else:
        cap, factor = MAX_CSV_BYTES, _CSV_MEMORY_FACTOR
    mib = size / 2**20
    if size > cap:
        hint = "; put large tables of obligors and links in CSV files" if kind == "yaml" else ""
        limit = f"{cap / 2**20:,.0f} MB"
        return f"is {mib:,.0f} MB, more than the {limit} a {kind.upper()} file may have{hint}"
    available = available_memory()
    if available is not None and size * factor > available:
        return (
            f"is {mib:,.0f} MB; reading it needs about {size * factor / 2**30:,.1f} GB of "
            f"memory and {available / 2**30:,.1f} GB is free"
        )
    return None


def read_text_file(
    path: str,
    sink: ProblemSink,
    at: tuple[str, int | None, str],
    *,
    kind: str = "yaml",
    what: str | None = None,
) -> str | None:
    """Read a UTF-8 text file, or report why not and return None.

    Only a regular file is opened (a pipe or a device such as ``/dev/zero``
    would block or never end), and only when its size fits the limits above
    and the memory free.  A message never quotes the file's content.

    Parameters
    ----------
    path : str
        The file to read.
    sink : ProblemSink
        Where problems go.
    at : tuple of (str, int or None, str)
        ``(file, line, field)`` of the reference to ``path``: the file itself
        (field ``""``) or the field of a book that names a CSV table.
    kind : {"yaml", "csv"}
        Which size limit applies.
    what : str, optional
        How messages name the file (default: ``book file``, or ``CSV file``
        for a table a book names).

    Returns
    -------
    str or None
        The text (a leading byte-order mark removed), or None after reporting.

    """
    file, line, field = at
    own = field == ""  # the file itself: its name already starts the message
    if what is None:
        what = ("book file" if kind == "yaml" else "file") if own else "CSV file"
    named = "" if own else f" {path}"
    try:
        info = os.stat(path)
    except FileNotFoundError:
        sink.add(file, line, field, f"{what} not found" + (f":{named}" if named else ""))
        return None
    except OSError as exc:
        sink.add(file, line, field, f"cannot read {what}{named}: {describe_os_error(exc)}")
        return None
    if stat.S_ISDIR(info.st_mode):
        sink.add(file, line, field, f"{what}{named} is a directory")
        return None
    if not stat.S_ISREG(info.st_mode):
        sink.add(
            file, line, field, f"{what}{named} is not a regular file (a device, pipe or socket)"
        )
        return None
    too_big = _size_problem(path, info.st_size, kind)
    if too_big is not None:
        sink.add(file, line, field, f"{what}{named} {too_big}")
        return None
    try:
        with open(path, "rb") as fh:
            data = fh.read(info.st_size + 1)
    except OSError as exc:
        sink.add(file, line, field, f"cannot read {what}{named}: {describe_os_error(exc)}")
        return None
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        bad_line = data[: exc.start].count(b"\n") + 1
        sink.add(path, bad_line, "", f"{what} is not UTF-8 text (byte 0x{data[exc.start]:02x})")
        return None


# ---------------------------------------------------------------- YAML
def _field_on_line(text: str, line: int) -> str:
    """Return the key written on ``line`` of ``text`` (``"  pd: 0.1"`` -> ``pd``), or ``""``."""
    lines = text.splitlines()
    if not 1 <= line <= len(lines):
        return ""
    head = lines[line - 1].lstrip(" -").split(":", 1)
    key = head[0].strip()
    return key if len(head) == 2 and key.isidentifier() else ""


def compose_yaml(text: str, file: str, sink: ProblemSink) -> Node | None:
    """Compose ``text`` into a node tree; report a syntax problem and return None.

    An empty document also returns None (with nothing reported).
    """
    try:
        node: Node | None = yaml.compose(text, Loader=_YamlLoader)
        return node
    except yaml.reader.ReaderError as exc:
        # a character YAML does not allow (a NUL byte, a control character)
        position = int(exc.position)
        line = text.count("\n", 0, position) + 1
        code = exc.character if isinstance(exc.character, int) else ord(str(exc.character))
        sink.add(
            file,
            line,
            _field_on_line(text, line),
            f"contains the control character U+{code:04X}, which a YAML file may not hold "
            f"(column {position - text.rfind(chr(10), 0, position)})",
        )
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        message = (exc.problem or exc.context or "invalid YAML").removeprefix("but ")
        at: int | None = mark.line + 1 if mark is not None else None
        if mark is not None:
            message += f" (column {mark.column + 1})"
        context = exc.context_mark
        if exc.problem and exc.context and context is not None:
            message += f"; {exc.context} at line {context.line + 1}"
        sink.add(file, at, "", f"YAML syntax error: {message}")
    except yaml.YAMLError as exc:
        sink.add(file, None, "", f"YAML syntax error: {exc}")
    return None


def node_value(node: Node, constructor: SafeConstructor | None = None) -> Raw:
    """Return the value of ``node`` with its line; scalars built by the safe constructor.

    A tag the safe constructor refuses (``!!python/object``) gives kind
    ``"tagged"``, never an object; an integer of more digits than Python
    converts keeps its text (it then fails a number's check as not finite).
    """
    line = node.start_mark.line + 1
    if isinstance(node, MappingNode):
        return Raw("mapping", None, "", line)
    if isinstance(node, SequenceNode):
        return Raw("list", None, "", line)
    if not isinstance(node, ScalarNode):  # pragma: no cover - PyYAML has three node kinds
        return Raw("tagged", None, str(node.tag), line)
    try:
        value = (constructor or SafeConstructor()).construct_object(node, deep=True)
    except yaml.YAMLError:  # an unknown tag such as !!python/object
        return Raw("tagged", None, str(node.tag), line)
    except (ValueError, OverflowError):
        # an integer of more digits than Python converts, an impossible date: keep the
        # text, which then fails (or passes) the field's own check
        return Raw("scalar", str(node.value), str(node.value), line)
    return Raw("scalar", value, str(node.value), line)


class YamlReader:
    """Reads values and mappings from a composed node tree, reporting problems.

    Parameters
    ----------
    file : str
        The file the nodes come from, for messages.
    sink : ProblemSink
        Where problems go.

    """

    def __init__(self, file: str, sink: ProblemSink) -> None:
        self.file = file
        self.sink = sink
        self.constructor = SafeConstructor()

    def raw(self, node: Node) -> Raw:
        """Return the value of ``node`` with its line (scalars by the safe constructor)."""
        return node_value(node, self.constructor)

    def mapping(self, node: MappingNode, path: str) -> dict[str, tuple[Node, Node]] | None:
        """Key -> (key node, value node), reporting repeated and non-text keys.

        ``<<`` merge keys are resolved as the safe loader does: a key written
        in the mapping itself overrides a merged one without complaint.  None
        (after reporting) when a merge is impossible.
        """
        explicit = {id(k) for k, _ in node.value if k.tag != "tag:yaml.org,2002:merge"}
        try:
            self.constructor.flatten_mapping(node)
        except yaml.MarkedYAMLError as exc:
            mark = exc.problem_mark or node.start_mark
            self.sink.add(self.file, mark.line + 1, path, f"cannot merge: {exc.problem}")
            return None
        out: dict[str, tuple[Node, Node]] = {}
        for key_node, value_node in node.value:
            line = key_node.start_mark.line + 1
            if not isinstance(key_node, ScalarNode):
                self.sink.add(self.file, line, path, "field names must be plain text")
                continue
            key = str(key_node.value)
            if key in out and id(out[key][0]) in explicit and id(key_node) in explicit:
                first = out[key][0].start_mark.line + 1
                self.sink.add(
                    self.file, line, join_field(path, key), f"given twice (first at line {first})"
                )
                continue
            out[key] = (key_node, value_node)
        return out

    def check_keys(
        self, items: dict[str, tuple[Node, Node]], allowed: tuple[str, ...], path: str
    ) -> None:
        """Report each key of ``items`` not in ``allowed``, suggesting a close one."""
        for key, (key_node, _value) in items.items():
            if key not in allowed:
                self.sink.add(
                    self.file,
                    key_node.start_mark.line + 1,
                    join_field(path, key),
                    unknown_field_message(key, allowed),
                )


def line_of(node: Node) -> int:
    """1-based line on which ``node`` starts."""
    return int(node.start_mark.line) + 1
