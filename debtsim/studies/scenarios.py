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
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from yaml.nodes import MappingNode, Node, SequenceNode

from debtsim.book.records import MAX_ASSET_CORRELATION, Book, Link, Obligor
from debtsim.book.yaml_reader import (
    ProblemSink,
    YamlReader,
    compose_yaml,
    line_of,
    number,
    quote,
    read_text_file,
    shown,
    suggest,
)
from debtsim.errors import BookError
from debtsim.studies.dependence_stress import stress_dependence

__all__ = [
    "BASE_NAME",
    "GLOBAL_FIELDS",
    "MAX_ASSET_CORRELATION",
    "MAX_NAME_LENGTH",
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

# Stressed asset correlations are clipped to ``[0, MAX_ASSET_CORRELATION]`` (the book's limit).

#: Global numeric fields of a scenario, also the parameters a sweep may vary.
GLOBAL_FIELDS: tuple[str, ...] = (
    "pd_scale",
    "asset_correlation_shift",
    "lgd_shift",
    "contagion_scale",
    "sector_loading_shift",
    "degrees_of_freedom",
)

#: Fields allowed in a sector's change.
SECTOR_FIELDS: tuple[str, ...] = (
    "pd_scale",
    "asset_correlation_shift",
    "lgd_shift",
    "sector_loading_shift",
)

#: Value of each numeric field that changes nothing.
NEUTRAL: Mapping[str, float] = {
    "pd_scale": 1.0,
    "asset_correlation_shift": 0.0,
    "lgd_shift": 0.0,
    "contagion_scale": 1.0,
    "sector_loading_shift": 0.0,
    "degrees_of_freedom": 0.0,  # 0: keep the book's dependence family
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
    if name == "degrees_of_freedom" and v != 0.0 and not v > 2.0:
        return f"must be greater than 2 (or 0 to keep the book's family), got {value!r}"
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
    sector_loading_shift : float
        Further shift of this sector's loading, in [-1, 1].

    """

    pd_scale: float = 1.0
    asset_correlation_shift: float = 0.0
    lgd_shift: float = 0.0
    sector_loading_shift: float = 0.0

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
    sector_loading_shift : float
        Added to every sector loading (clipped to [0, 1]); see
        :mod:`debtsim.studies.dependence_stress`.
    degrees_of_freedom : float
        Student-t dependence with this ``nu`` (> 2); 0 keeps the book's family.
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
    sector_loading_shift: float = 0.0
    degrees_of_freedom: float = 0.0
    sectors: tuple[tuple[str, SectorShock], ...] = ()
    defaulted: tuple[str, ...] = ()
    line: int | None = field(default=None, compare=False)

    @classmethod
    def from_values(cls, name: str, values: Mapping[str, float]) -> Scenario:
        """Build a scenario named ``name`` setting global fields to ``values``.

        Raises
        ------
        ValueError
            For a name outside :data:`GLOBAL_FIELDS` or a value out of range.
        """
        unknown = sorted(set(values) - set(GLOBAL_FIELDS))
        if unknown:
            raise ValueError(f"not a global scenario field: {', '.join(unknown)}")
        changes: dict[str, Any] = {k: float(v) for k, v in values.items()}
        return replace(cls(name=name), **changes)

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
        """The global numeric fields by name."""
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
    Sector loadings and the dependence family change as
    :func:`debtsim.studies.dependence_stress.stress_dependence` says; it
    raises ValueError when the change is impossible (that scenario fails).

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
    dependence = stress_dependence(
        book.dependence,
        scenario.sector_loading_shift,
        {name: shock.sector_loading_shift for name, shock in scenario.sectors},
        scenario.degrees_of_freedom,
    )
    return replace(
        book,
        name=f"{book.name} [{scenario.name}]",
        obligors=tuple(obligors),
        links=links,
        dependence=dependence,
    )


def folder_name(name: str) -> str:
    """File-system-safe folder name of a scenario: lower case, ``[a-z0-9._-]`` only."""
    slug = re.sub(r"[^a-z0-9._-]+", "-", name.strip().lower()).strip("-.")
    return slug or "scenario"


# ---------------------------------------------------------------------- reading
#: Longest scenario name: each names a folder, and file systems allow 255 bytes.
MAX_NAME_LENGTH = 80
_SUGGEST_LIMIT = 5000  # suggest close ids only for books up to this size


def _range_message(name: str, value: float) -> str | None:
    """Say which range a finite ``value`` of field ``name`` misses, without the value."""
    message = check_field(name, value)
    return None if message is None else message.rsplit(", got ", 1)[0]


def _unknown_top_key(key: str) -> str:
    if suggest(key, ("scenarios",)) is not None:
        return "unknown field (did you mean 'scenarios'?)"
    return (
        "unknown field; a scenario file is a list of scenarios, or a mapping with the one "
        "key 'scenarios'"
    )


class _Reader:
    """Turns the composed document into scenarios, collecting every problem."""

    def __init__(self, label: str, book: Book | None, sink: ProblemSink) -> None:
        self.label = label
        self.book = book
        self.sink = sink
        self.yaml = YamlReader(label, sink)
        self.sectors = sorted({o.sector for o in book.obligors if o.sector}) if book else []
        self.ids = {o.id for o in book.obligors} if book else set()
        self.names: dict[str, str] = {}

    def problem(self, line: int | None, where: str, message: str) -> None:
        self.sink.add(self.label, line, where, message)

    def numbers(
        self, items: dict[str, tuple[Node, Node]], names: tuple[str, ...], where: str
    ) -> dict[str, float]:
        out: dict[str, float] = {}
        for name in names:
            if name not in items:
                continue
            raw = self.yaml.raw(items[name][1])
            value = number(raw)
            here = f"{where}.{name}"
            if isinstance(value, str):
                self.problem(raw.line, here, value)
                continue
            message = _range_message(name, value)
            if message is not None:
                self.problem(raw.line, here, f"{message}, got {shown(raw)}")
                continue
            out[name] = value
        return out

    def sector_block(self, node: Node, where: str) -> dict[str, SectorShock]:
        if not isinstance(node, MappingNode):
            got = shown(self.yaml.raw(node))
            self.problem(
                line_of(node), where, f"must be a mapping of sector name to changes, got {got}"
            )
            return {}
        items = self.yaml.mapping(node, where)
        out: dict[str, SectorShock] = {}
        for sector, (key_node, changes) in (items or {}).items():
            key_line = line_of(key_node)
            here = f"{where}.{sector}"
            if not sector.strip():
                self.problem(key_line, where, "sector names must be non-empty text")
                continue
            if self.book is not None and sector not in self.sectors:
                guess = suggest(sector, self.sectors)
                if guess is not None:
                    message = f"no obligor of the book has this sector (did you mean {guess!r}?)"
                else:
                    known = ", ".join(self.sectors) or "none (no obligor has a sector)"
                    message = f"no obligor of the book has this sector; sectors: {known}"
                self.problem(key_line, here, message)
            fields = self.yaml.mapping(changes, here) if isinstance(changes, MappingNode) else None
            if not fields:
                if fields is None and isinstance(changes, MappingNode):
                    continue  # a broken merge, already reported
                got = shown(self.yaml.raw(changes))
                self.problem(
                    key_line,
                    here,
                    f"must be a mapping with any of {', '.join(SECTOR_FIELDS)}, got {got}",
                )
                continue
            self.yaml.check_keys(fields, SECTOR_FIELDS, here)
            out[sector] = SectorShock(**self.numbers(fields, SECTOR_FIELDS, here))
        return out

    def defaulted(self, node: Node, where: str) -> tuple[str, ...]:
        if not isinstance(node, SequenceNode):
            got = shown(self.yaml.raw(node))
            self.problem(line_of(node), where, f"must be a list of obligor ids, got {got}")
            return ()
        out: list[str] = []
        for i, item in enumerate(node.value):
            raw = self.yaml.raw(item)
            here = f"{where}[{i}]"
            value = raw.value
            if (
                raw.kind != "scalar"
                or isinstance(value, bool | float)
                or not isinstance(value, str | int)
                or not str(value).strip()
            ):
                self.problem(raw.line, here, f"must be an obligor id, got {shown(raw)}")
                continue
            oid = value if isinstance(value, str) else raw.text
            if oid in out:
                self.problem(raw.line, here, f"{oid!r} is listed twice")
            elif self.book is not None and oid not in self.ids:
                message = f"no obligor with id {quote(oid)} in the book"
                guess = suggest(oid, self.ids) if len(self.ids) <= _SUGGEST_LIMIT else None
                if guess is not None:
                    message += f" (did you mean {quote(guess)}?)"
                self.problem(raw.line, here, message)
            out.append(oid)
        return tuple(dict.fromkeys(out))

    def name(self, items: dict[str, tuple[Node, Node]], line: int, where: str) -> str | None:
        here = f"{where}.name"
        if "name" not in items:
            self.problem(line, here, "missing; every scenario needs a name")
            return None
        raw = self.yaml.raw(items["name"][1])
        value = raw.value
        if raw.kind != "scalar" or value is None or isinstance(value, bool):
            self.problem(raw.line, here, f"must be non-empty text, got {shown(raw)}")
            return None
        text = (value if isinstance(value, str) else raw.text).strip()
        if not text:
            self.problem(raw.line, here, f"must be non-empty text, got {shown(raw)}")
            return None
        if not text.isprintable():
            self.problem(raw.line, here, f"must not hold control characters, got {quote(text)}")
            return None
        if len(text) > MAX_NAME_LENGTH:
            self.problem(
                raw.line,
                here,
                f"must be at most {MAX_NAME_LENGTH} characters (it names a folder), "
                f"got {len(text)}",
            )
            return None
        key = folder_name(text)
        if key == BASE_NAME:
            self.problem(raw.line, here, f"{BASE_NAME!r} is reserved for the unstressed book")
            return None
        if key in self.names:
            self.problem(
                raw.line,
                here,
                f"{text!r} clashes with {self.names[key]} (names must differ after "
                "lower-casing and replacing characters other than a-z, 0-9, . _ - by a dash, "
                "since each names a folder)",
            )
            return None
        self.names[key] = where
        return text

    def scenario(self, node: Node, where: str) -> Scenario | None:
        if not isinstance(node, MappingNode):
            got = shown(self.yaml.raw(node))
            self.problem(line_of(node), where, f"must be a mapping with a name, got {got}")
            return None
        before = len(self.sink.problems)
        items = self.yaml.mapping(node, where)
        if items is None:
            return None
        self.yaml.check_keys(items, _SCENARIO_KEYS, where)
        name = self.name(items, line_of(node), where)
        values = self.numbers(items, GLOBAL_FIELDS, where)
        sectors: dict[str, SectorShock] = {}
        if "sectors" in items:
            sectors = self.sector_block(items["sectors"][1], f"{where}.sectors")
        dead: tuple[str, ...] = ()
        if "defaulted" in items:
            dead = self.defaulted(items["defaulted"][1], f"{where}.defaulted")
        if len(self.sink.problems) > before or name is None:
            return None
        return Scenario(
            name=name,
            sectors=tuple(sectors.items()),
            defaulted=dead,
            line=line_of(node),
            **values,
        )

    def document(self, root: Node | None) -> list[Scenario]:
        where = "scenarios"
        if root is None:
            self.problem(None, where, "must be a list of scenarios, got an empty file")
            return []
        items: Node = root
        if isinstance(root, MappingNode):
            top = self.yaml.mapping(root, "")
            if top is None:
                return []
            for key, (key_node, _value) in top.items():
                if key != "scenarios":
                    self.problem(line_of(key_node), key, _unknown_top_key(key))
            if "scenarios" not in top:
                self.problem(line_of(root), where, "missing; expected a list of scenarios")
                return []
            items = top["scenarios"][1]
        if not isinstance(items, SequenceNode):
            raw = self.yaml.raw(items)
            got = "nothing" if raw.kind == "scalar" and raw.value is None else shown(raw)
            self.problem(raw.line, where, f"must be a list of scenarios, got {got}")
            return []
        if not items.value:
            self.problem(line_of(items), where, "is empty; give at least one scenario")
            return []
        scenarios: list[Scenario] = []
        for i, item in enumerate(items.value):
            scenario = self.scenario(item, f"{where}[{i}]")
            if scenario is not None:
                scenarios.append(scenario)
        return scenarios


def load_scenarios(path: Path | str, book: Book | None = None) -> list[Scenario]:
    """Read and validate a scenario file.

    The file is read by the same line-tracking reader as books
    (:mod:`debtsim.book.yaml_reader`), with the same guards and messages.

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
    label = os.fspath(path)
    sink = ProblemSink()
    text = read_text_file(label, sink, (label, None, ""), what="scenario file")
    if text is None:
        raise BookError(sink.sorted())
    try:
        root = compose_yaml(text, label, sink)
        scenarios = [] if sink.problems else _Reader(label, book, sink).document(root)
    except RecursionError:
        sink.add(label, None, "", "cannot read the file: it is nested too deeply")
    if sink.problems:
        raise BookError(sink.sorted())
    return scenarios
