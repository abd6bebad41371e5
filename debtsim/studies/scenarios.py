"""Stress scenarios: reading a scenario file and applying a scenario to a book.

A scenario file is YAML: a list of named scenarios (or a mapping whose only
key, ``scenarios``, holds that list)::

    - name: shipping downturn
      pd_scale: 1.5                 # multiply every PD (capped at 1)
      asset_correlation_shift: 0.05 # add to every R (clipped to [0, 0.999])
      lgd_shift: 0.10               # add to every LGD (clipped to [0, 1])
      contagion_scale: 2.0          # multiply every link's contagion (capped at 1)
      sectors:                      # on top of the global change, per sector
        shipping: {pd_scale: 3.0, lgd_shift: 0.1}
      defaulted: [H3]               # these obligors default for certain: PD = 1

Sector changes combine with the global ones before capping: an obligor of a
shocked sector gets ``PD * pd_scale * sector.pd_scale`` (capped at 1),
``R + shift + sector.shift`` and ``LGD + shift + sector.shift`` (each clipped
once).  A field left at its neutral value (scale 1, shift 0) leaves the
book's number untouched, so the neutral scenario reproduces the book
exactly.  ``defaulted`` wins over every other PD change.

Errors are collected, one :class:`~debtsim.errors.Problem` per finding with
file and line, and raised together as :class:`~debtsim.errors.BookError`.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import yaml

from debtsim.book.records import Book, Link, Obligor
from debtsim.errors import BookError, Problem

__all__ = [
    "BASE_NAME",
    "GLOBAL_FIELDS",
    "MAX_ASSET_CORRELATION",
    "NEUTRAL",
    "SECTOR_FIELDS",
    "Scenario",
    "SectorShock",
    "apply_scenario",
    "check_field",
    "folder_name",
    "load_scenarios",
]

#: Name of the unstressed run; reserved, a scenario may not use it.
BASE_NAME = "base"

#: Stressed asset correlations are clipped to ``[0, MAX_ASSET_CORRELATION]``.
MAX_ASSET_CORRELATION = 0.999

#: Global numeric fields of a scenario, also the parameters a sweep may vary.
GLOBAL_FIELDS: tuple[str, ...] = (
    "pd_scale",
    "asset_correlation_shift",
    "lgd_shift",
    "contagion_scale",
)

#: Fields allowed in a sector's change.
SECTOR_FIELDS: tuple[str, ...] = ("pd_scale", "asset_correlation_shift", "lgd_shift")

#: Value of each numeric field that changes nothing.
NEUTRAL: Mapping[str, float] = {
    "pd_scale": 1.0,
    "asset_correlation_shift": 0.0,
    "lgd_shift": 0.0,
    "contagion_scale": 1.0,
}

_SCENARIO_KEYS = ("name", *GLOBAL_FIELDS, "sectors", "defaulted")


def check_field(name: str, value: object) -> str | None:
    """Say what is wrong with ``value`` for the numeric scenario field ``name``.

    Parameters
    ----------
    name : str
        One of :data:`GLOBAL_FIELDS`.
    value : object
        Candidate value.

    Returns
    -------
    str or None
        A message naming the accepted range and the value found, or None when
        the value is acceptable.

    Notes
    -----
    ``pd_scale`` must be > 0 and ``contagion_scale`` >= 0 (both finite); the
    shifts must lie in [-1, 1], since R and LGD live in [0, 1].

    """
    if name not in NEUTRAL:
        return f"unknown field; expected one of {', '.join(GLOBAL_FIELDS)}"
    if isinstance(value, bool) or not isinstance(value, int | float):
        return f"must be a number, got {value!r}"
    v = float(value)
    if not math.isfinite(v):
        return f"must be a finite number, got {value!r}"
    if name == "pd_scale" and not v > 0.0:
        return f"must be greater than 0, got {value!r}"
    if name == "contagion_scale" and v < 0.0:
        return f"must be at least 0, got {value!r}"
    if name.endswith("_shift") and not -1.0 <= v <= 1.0:
        return f"must be between -1 and 1, got {value!r}"
    return None


@dataclass(frozen=True)
class SectorShock:
    """Change applied, on top of the global one, to the obligors of one sector.

    Attributes
    ----------
    pd_scale : float
        Further multiplier of PD (> 0).
    asset_correlation_shift : float
        Further shift of R, in [-1, 1].
    lgd_shift : float
        Further shift of LGD, in [-1, 1].

    """

    pd_scale: float = 1.0
    asset_correlation_shift: float = 0.0
    lgd_shift: float = 0.0

    def __post_init__(self) -> None:
        for name in SECTOR_FIELDS:
            message = check_field(name, getattr(self, name))
            if message:
                raise ValueError(f"{name}: {message}")
            object.__setattr__(self, name, float(getattr(self, name)))


@dataclass(frozen=True)
class Scenario:
    """One named stress scenario.

    Attributes
    ----------
    name : str
        Unique, non-empty, not ``base``.
    pd_scale : float
        Multiplier of every PD (> 0); results capped at 1.
    asset_correlation_shift : float
        Added to every R, result clipped to ``[0, 0.999]``.
    lgd_shift : float
        Added to every LGD, result clipped to ``[0, 1]``.
    contagion_scale : float
        Multiplier of every link's contagion (>= 0); results capped at 1.
    sectors : tuple of (str, SectorShock)
        Per-sector changes on top of the global ones, in file order (a mapping
        is accepted and converted).
    defaulted : tuple of str
        Obligor ids that default for certain (PD = 1).
    line : int or None
        Line of the scenario in its file, for messages.

    """

    name: str
    pd_scale: float = 1.0
    asset_correlation_shift: float = 0.0
    lgd_shift: float = 0.0
    contagion_scale: float = 1.0
    sectors: tuple[tuple[str, SectorShock], ...] = ()
    defaulted: tuple[str, ...] = ()
    line: int | None = field(default=None, compare=False)

    def __post_init__(self) -> None:
        for name in GLOBAL_FIELDS:
            message = check_field(name, getattr(self, name))
            if message:
                raise ValueError(f"{name}: {message}")
            object.__setattr__(self, name, float(getattr(self, name)))
        sectors = self.sectors.items() if isinstance(self.sectors, Mapping) else self.sectors
        object.__setattr__(self, "sectors", tuple((str(k), v) for k, v in sectors))
        object.__setattr__(self, "defaulted", tuple(self.defaulted))

    @property
    def sector_shocks(self) -> dict[str, SectorShock]:
        """The per-sector changes as a dict."""
        return dict(self.sectors)

    @property
    def global_values(self) -> dict[str, float]:
        """The four global numeric fields by name."""
        return {name: getattr(self, name) for name in GLOBAL_FIELDS}

    def describe(self) -> str:
        """One line listing what the scenario changes, e.g. ``pd_scale 1.5; defaulted H3``."""
        parts = [
            f"{name} {value:g}"
            for name, value in self.global_values.items()
            if value != NEUTRAL[name]
        ]
        for sector, shock in self.sectors:
            changes = ", ".join(
                f"{name} {getattr(shock, name):g}"
                for name in SECTOR_FIELDS
                if getattr(shock, name) != NEUTRAL[name]
            )
            parts.append(f"sector {sector}: {changes or 'no change'}")
        if self.defaulted:
            parts.append("defaulted " + ", ".join(self.defaulted))
        return "; ".join(parts) or "no change"


# --------------------------------------------------------------------- applying
def _clip(value: float, low: float, high: float) -> float:
    return min(max(value, low), high)


def apply_scenario(book: Book, scenario: Scenario) -> Book:
    """Return ``book`` as ``scenario`` stresses it.

    Parameters
    ----------
    book : Book
        A validated book.
    scenario : Scenario
        The stress to apply; sector names and defaulted ids that the book
        does not have are ignored here (:func:`load_scenarios` rejects them).

    Returns
    -------
    Book
        A new book with changed obligors and links; the name gains the
        scenario's name in brackets.  PDs may be exactly 1.

    Notes
    -----
    For an obligor of sector ``s`` with change ``S`` (neutral when absent):
    ``PD' = 1`` if defaulted, else ``min(1, PD * pd_scale * S.pd_scale)``;
    ``R' = clip(R + shift + S.shift, 0, 0.999)``; ``LGD' = clip(LGD + shift +
    S.shift, 0, 1)``.  Each link: ``q' = min(1, q * contagion_scale)``.  A
    neutral total change (scale 1, shift 0) keeps the book's value as is.

    """
    shocks = scenario.sector_shocks
    dead = set(scenario.defaulted)
    neutral = SectorShock()
    obligors: list[Obligor] = []
    for o in book.obligors:
        s = shocks.get(o.sector, neutral) if o.sector else neutral
        pd_scale = scenario.pd_scale * s.pd_scale
        r_shift = scenario.asset_correlation_shift + s.asset_correlation_shift
        lgd_shift = scenario.lgd_shift + s.lgd_shift
        if o.id in dead:
            pd = 1.0
        elif pd_scale != 1.0:
            pd = min(1.0, o.pd * pd_scale)
        else:
            pd = o.pd
        r = o.asset_correlation
        if r_shift != 0.0:
            r = _clip(r + r_shift, 0.0, MAX_ASSET_CORRELATION)
        lgd = o.lgd if lgd_shift == 0.0 else _clip(o.lgd + lgd_shift, 0.0, 1.0)
        obligors.append(replace(o, pd=pd, asset_correlation=r, lgd=lgd))
    links: tuple[Link, ...] = book.links
    if scenario.contagion_scale != 1.0:
        links = tuple(
            replace(lk, contagion=min(1.0, lk.contagion * scenario.contagion_scale))
            for lk in book.links
        )
    return replace(
        book, name=f"{book.name} [{scenario.name}]", obligors=tuple(obligors), links=links
    )


def folder_name(name: str) -> str:
    """File-system-safe folder name of a scenario: lower case, ``[a-z0-9._-]`` only."""
    slug = re.sub(r"[^a-z0-9._-]+", "-", name.strip().lower()).strip("-.")
    return slug or "scenario"


# ---------------------------------------------------------------------- reading
class _Tracked(dict):  # type: ignore[type-arg]
    """A YAML mapping remembering its own line and the line of each key."""

    line: int
    key_lines: dict[Any, int]
    duplicates: list[tuple[int, str]]


class _TrackedList(list):  # type: ignore[type-arg]
    """A YAML sequence remembering its own line and the line of each item."""

    line: int
    item_lines: list[int]


class _Loader(yaml.SafeLoader):
    """Safe loader keeping line numbers and noting duplicate keys."""


# YAML 1.1 wants a dot in floats ("1.0e-3"); accept "1e-3" as a number too.
_Loader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(
        r"""^(?:[-+]?(?:[0-9][0-9_]*)\.[0-9_]*(?:[eE][-+]?[0-9]+)?
        |[-+]?(?:[0-9][0-9_]*)(?:[eE][-+]?[0-9]+)
        |\.[0-9_]+(?:[eE][-+][0-9]+)?
        |[-+]?\.(?:inf|Inf|INF)
        |\.(?:nan|NaN|NAN))$""",
        re.X,
    ),
    list("-+0123456789."),
)


def _construct_mapping(loader: _Loader, node: yaml.MappingNode) -> _Tracked:
    loader.flatten_mapping(node)
    out = _Tracked()
    out.line = node.start_mark.line + 1
    out.key_lines = {}
    out.duplicates = []
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        line = key_node.start_mark.line + 1
        try:
            seen = key in out
        except TypeError:
            key = str(key)
            seen = key in out
        if seen:
            out.duplicates.append((line, str(key)))
            continue
        out[key] = loader.construct_object(value_node, deep=True)
        out.key_lines[key] = line
    return out


def _construct_sequence(loader: _Loader, node: yaml.SequenceNode) -> _TrackedList:
    out = _TrackedList(loader.construct_object(item, deep=True) for item in node.value)
    out.line = node.start_mark.line + 1
    out.item_lines = [item.start_mark.line + 1 for item in node.value]
    return out


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)
_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_SEQUENCE_TAG, _construct_sequence)


def _parse(path: Path, label: str) -> tuple[Any, list[Problem]]:
    """Read the YAML document with line numbers; problems for I/O, syntax, duplicates."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None, [Problem(label, None, "", "file not found")]
    except (OSError, UnicodeDecodeError) as error:
        return None, [Problem(label, None, "", f"cannot read the file: {error}")]
    loader = _Loader(text)
    try:
        document = loader.get_single_data()
    except yaml.MarkedYAMLError as error:
        mark = error.problem_mark or error.context_mark
        line = mark.line + 1 if mark is not None else None
        return None, [Problem(label, line, "", f"not valid YAML: {error.problem or error}")]
    except yaml.YAMLError as error:
        return None, [Problem(label, None, "", f"not valid YAML: {error}")]
    finally:
        loader.dispose()
    problems: list[Problem] = []
    return document, problems


def _line_of(container: Any, key: Any, default: int | None) -> int | None:
    if isinstance(container, _Tracked):
        return container.key_lines.get(key, default)
    if isinstance(container, _TrackedList) and isinstance(key, int):
        return container.item_lines[key]
    return default


def _own_line(value: Any, default: int | None) -> int | None:
    return getattr(value, "line", default)


class _Reader:
    """Turns the parsed document into scenarios, collecting every problem."""

    def __init__(self, label: str, book: Book | None) -> None:
        self.label = label
        self.book = book
        self.problems: list[Problem] = []
        self.sectors = sorted({o.sector for o in book.obligors if o.sector}) if book else []
        self.ids = {o.id for o in book.obligors} if book else set()
        self.names: dict[str, str] = {}

    def problem(self, line: int | None, where: str, message: str) -> None:
        self.problems.append(Problem(self.label, line, where, message))

    def numbers(self, mapping: _Tracked, names: tuple[str, ...], where: str) -> dict[str, float]:
        out: dict[str, float] = {}
        for name in names:
            if name in mapping:
                value = mapping[name]
                message = check_field(name, value)
                if message:
                    self.problem(_line_of(mapping, name, mapping.line), f"{where}.{name}", message)
                else:
                    out[name] = float(value)
        return out

    def repeated_keys(self, mapping: _Tracked, where: str) -> None:
        for line, key in mapping.duplicates:
            self.problem(line, f"{where}.{key}", "appears twice; give each field once")

    def unknown_keys(self, mapping: _Tracked, allowed: tuple[str, ...], where: str) -> None:
        self.repeated_keys(mapping, where)
        for key in mapping:
            if key not in allowed:
                self.problem(
                    _line_of(mapping, key, mapping.line),
                    f"{where}.{key}",
                    f"unknown field; expected one of {', '.join(allowed)}",
                )

    def sector_block(self, value: Any, line: int | None, where: str) -> dict[str, SectorShock]:
        if not isinstance(value, _Tracked):
            self.problem(line, where, f"must be a mapping of sector name to changes, got {value!r}")
            return {}
        self.repeated_keys(value, where)
        out: dict[str, SectorShock] = {}
        for sector, changes in value.items():
            key_line = _line_of(value, sector, line)
            here = f"{where}.{sector}"
            if not isinstance(sector, str) or not sector.strip():
                self.problem(
                    key_line, where, f"sector names must be non-empty text, got {sector!r}"
                )
                continue
            if self.book is not None and sector not in self.sectors:
                known = (
                    ", ".join(self.sectors) if self.sectors else "none (no obligor has a sector)"
                )
                self.problem(
                    key_line, here, f"no obligor of the book has this sector; sectors: {known}"
                )
            if not isinstance(changes, _Tracked) or not changes:
                self.problem(
                    key_line,
                    here,
                    f"must be a mapping with any of {', '.join(SECTOR_FIELDS)}, got {changes!r}",
                )
                continue
            self.unknown_keys(changes, SECTOR_FIELDS, here)
            values = self.numbers(changes, SECTOR_FIELDS, here)
            out[sector] = SectorShock(**values)
        return out

    def defaulted(self, value: Any, line: int | None, where: str) -> tuple[str, ...]:
        if not isinstance(value, _TrackedList):
            self.problem(line, where, f"must be a list of obligor ids, got {value!r}")
            return ()
        out: list[str] = []
        for i, item in enumerate(value):
            item_line = _line_of(value, i, line)
            if isinstance(item, bool) or not isinstance(item, str | int):
                self.problem(item_line, f"{where}[{i}]", f"must be an obligor id, got {item!r}")
                continue
            oid = str(item)
            if oid in out:
                self.problem(item_line, f"{where}[{i}]", f"{oid!r} is listed twice")
            elif self.book is not None and oid not in self.ids:
                self.problem(item_line, f"{where}[{i}]", f"no obligor with id {oid!r} in the book")
            out.append(oid)
        return tuple(dict.fromkeys(out))

    def scenario(self, item: Any, line: int | None, where: str) -> Scenario | None:
        if not isinstance(item, _Tracked):
            self.problem(line, where, f"must be a mapping with a name, got {item!r}")
            return None
        before = len(self.problems)
        self.unknown_keys(item, _SCENARIO_KEYS, where)
        name = item.get("name")
        if "name" not in item:
            self.problem(item.line, f"{where}.name", "missing; every scenario needs a name")
        elif (
            not isinstance(name, str | int | float)
            or isinstance(name, bool)
            or not str(name).strip()
        ):
            self.problem(
                _line_of(item, "name", item.line),
                f"{where}.name",
                f"must be non-empty text, got {name!r}",
            )
        elif folder_name(str(name)) == BASE_NAME:
            self.problem(
                _line_of(item, "name", item.line),
                f"{where}.name",
                f"{BASE_NAME!r} is reserved for the unstressed book",
            )
        else:
            key = folder_name(str(name))
            if key in self.names:
                self.problem(
                    _line_of(item, "name", item.line),
                    f"{where}.name",
                    f"{str(name).strip()!r} clashes with {self.names[key]} (names must "
                    "differ after lower-casing and replacing characters other than a-z, 0-9, "
                    ". _ - by a dash, since each names a folder)",
                )
            else:
                self.names[key] = where
        values = self.numbers(item, GLOBAL_FIELDS, where)
        sectors: dict[str, SectorShock] = {}
        if "sectors" in item:
            sectors = self.sector_block(
                item["sectors"], _line_of(item, "sectors", item.line), f"{where}.sectors"
            )
        dead: tuple[str, ...] = ()
        if "defaulted" in item:
            dead = self.defaulted(
                item["defaulted"], _line_of(item, "defaulted", item.line), f"{where}.defaulted"
            )
        if len(self.problems) > before:
            return None
        return Scenario(
            name=str(name).strip(),
            sectors=tuple(sectors.items()),
            defaulted=dead,
            line=item.line,
            **values,
        )

    def document(self, doc: Any) -> list[Scenario]:
        items: Any = doc
        where = "scenarios"
        if isinstance(doc, _Tracked):
            self.repeated_keys(doc, "file")
            extra = [k for k in doc if k != "scenarios"]
            for key in extra:
                self.problem(
                    _line_of(doc, key, doc.line),
                    str(key),
                    "unknown field; a scenario file is a list of scenarios, or a mapping "
                    "with the one key 'scenarios'",
                )
            if "scenarios" not in doc:
                self.problem(doc.line, "scenarios", "missing; expected a list of scenarios")
                return []
            items = doc["scenarios"]
        if not isinstance(items, _TrackedList):
            line = _own_line(items, None)
            found = "an empty file" if items is None else repr(items)
            self.problem(line, where, f"must be a list of scenarios, got {found}")
            return []
        if not items:
            self.problem(items.line, where, "is empty; give at least one scenario")
            return []
        scenarios: list[Scenario] = []
        for i, item in enumerate(items):
            scenario = self.scenario(item, _line_of(items, i, items.line), f"{where}[{i}]")
            if scenario is not None:
                scenarios.append(scenario)
        return scenarios


def load_scenarios(path: Path | str, book: Book | None = None) -> list[Scenario]:
    """Read and validate a scenario file.

    Parameters
    ----------
    path : path-like
        The YAML scenario file.
    book : Book, optional
        When given, sector names must be sectors of its obligors and
        ``defaulted`` ids must be its obligors.

    Returns
    -------
    list of Scenario
        In file order.

    Raises
    ------
    BookError
        With every problem found, each as ``file:line: field: message``.

    """
    label = str(path)
    document, problems = _parse(Path(path), label)
    if document is None and problems:
        raise BookError(problems)
    reader = _Reader(label, book)
    scenarios = reader.document(document)
    problems.extend(reader.problems)
    if problems:
        problems.sort(key=lambda p: (p.line is None, p.line or 0))
        raise BookError(problems)
    return scenarios
