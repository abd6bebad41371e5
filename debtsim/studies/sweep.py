"""Sensitivity sweeps over scenario parameters, in-process or on a Dask cluster.

A sweep varies the global scenario fields (``pd_scale``,
``asset_correlation_shift``, ``lgd_shift``, ``contagion_scale``) over the full
Cartesian grid of the values given, runs the book at each grid point and
collects one row of risk measures per point.

Execution
    In-process, on a local Dask cluster or on an existing one
    (:mod:`debtsim.studies.execution`).  The book is sent to the workers
    once; each point is one task.

Seeds
    Each point runs with its own seed, derived from the run's seed and the
    point's parameter values (:func:`point_seed`), never from the order in
    which points run or where, and a point keeps its seed when the grid
    around it grows.

Threads
    Each point runs with BLAS held at one thread
    (:func:`debtsim.studies.execution.single_blas_thread`).  With the seeds,
    this makes results identical bit for bit in-process, on a local cluster
    or on a remote one.

Failures
    A point that raises is recorded in its row (``status`` ``failed``, the
    error in ``error``, measures empty); the other points go on.

Resuming
    Every finished point is written at once to ``<DIR>.partial/points/``
    (one small JSON file per point, written atomically), next to the output
    folder ``DIR``; the finished folder replaces ``DIR`` atomically at the end
    and the ``.partial`` folder is then removed.  With ``resume=True`` the
    sweep takes the points already finished with status ``ok`` from
    ``<DIR>.partial/`` and from a previous sweep in ``DIR`` itself (its
    ``sweep.parquet``), and runs only the others (missing or failed ones).
    Points are matched by parameter values, so a resumed grid may also add
    values.  Both sources must come from the same book and engine options
    (engine, samples, seed, shots, levels); otherwise the resume is refused.
    Without ``resume`` an existing ``.partial`` folder is discarded.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
import os
import shutil
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import pandas as pd

from debtsim.book.records import Book
from debtsim.errors import BookError, OutputError, Problem
from debtsim.options import RunOptions
from debtsim.output_files import check_output_dir, generator, jsonable
from debtsim.risk import level_key, measure_columns
from debtsim.runner import run_book
from debtsim.studies.execution import Execution, run_tasks
from debtsim.studies.scenarios import GLOBAL_FIELDS, NEUTRAL, Scenario, apply_scenario, check_field

__all__ = [
    "MAX_POINTS",
    "STATUS_FAILED",
    "STATUS_OK",
    "GridAxis",
    "GridError",
    "PointTask",
    "SweepResult",
    "book_fingerprint",
    "evaluate_point",
    "grid_points",
    "parse_grid",
    "partial_dir",
    "point_key",
    "point_seed",
    "run_sweep",
]

#: Largest grid accepted (a larger one is almost surely a typo).
MAX_POINTS = 100_000
STATUS_OK = "ok"
STATUS_FAILED = "failed"
#: ``kind`` of the marker written in a sweep's work and output folders.
PARTIAL_KIND = "sweep-partial"
SWEEP_KIND = "sweep"

class GridError(BookError):
    """A ``--grid`` option is invalid; one problem per line, like a bad book."""


# --------------------------------------------------------------------- the grid
@dataclass(frozen=True)
class GridAxis:
    """One swept parameter and its values, in the order given.

    Attributes
    ----------
    name : str
        One of :data:`debtsim.studies.scenarios.GLOBAL_FIELDS`.
    values : tuple of float
        Distinct values.

    """

    name: str
    values: tuple[float, ...]


def parse_grid(specs: Sequence[str]) -> tuple[GridAxis, ...]:
    """Parse ``NAME=V1,V2,...`` options into grid axes.

    Parameters
    ----------
    specs : sequence of str
        One string per ``--grid`` option.

    Returns
    -------
    tuple of GridAxis
        In the order given.

    Raises
    ------
    GridError
        Listing every problem: missing ``=``, unknown or repeated names, empty
        or non-numeric values, values out of the field's range (as in a
        scenario file), repeated values, or a grid of more than
        :data:`MAX_POINTS` points.

    """
    problems: list[Problem] = []
    axes: list[GridAxis] = []
    seen: set[str] = set()

    def bad(spec: str, name: str, message: str) -> None:
        problems.append(Problem(f"--grid {spec}", None, name, message))

    if not specs:
        problems.append(
            Problem(
                "--grid",
                None,
                "",
                "give at least one --grid NAME=V1,V2,... with NAME one of "
                + ", ".join(GLOBAL_FIELDS),
            )
        )
    for spec in specs:
        name, sep, rest = spec.partition("=")
        name = name.strip()
        if not sep:
            bad(spec, "", "expected NAME=V1,V2,...")
            continue
        if name not in GLOBAL_FIELDS:
            bad(spec, name, f"unknown parameter; expected one of {', '.join(GLOBAL_FIELDS)}")
            continue
        if name in seen:
            bad(spec, name, "given twice; list all its values in one --grid")
            continue
        seen.add(name)
        values: list[float] = []
        texts: list[str] = []
        ok = True
        for i, text in enumerate(rest.split(",")):
            text = text.strip()
            if not text:
                bad(spec, name, f"the {_ordinal(i + 1)} value is empty")
                ok = False
                continue
            try:
                value = float(text)
            except ValueError:
                bad(spec, name, f"the {_ordinal(i + 1)} value is not a number, got {text!r}")
                ok = False
                continue
            message = check_field(name, value)
            if message:
                bad(spec, name, message.replace(f"got {value!r}", f"got {text}"))
                ok = False
            elif value in values:
                first = values.index(value)
                bad(
                    spec,
                    name,
                    f"the {_ordinal(i + 1)} value {text} repeats the "
                    f"{_ordinal(first + 1)} value {texts[first]}",
                )
                ok = False
            else:
                values.append(value)
                texts.append(text)
        if ok:
            axes.append(GridAxis(name, tuple(values)))
    if not problems:
        size = math.prod(len(a.values) for a in axes)
        if size > MAX_POINTS:
            problems.append(
                Problem("--grid", None, "", f"{size} grid points; at most {MAX_POINTS} accepted")
            )
    if problems:
        raise GridError(problems)
    return tuple(axes)


def grid_points(axes: Sequence[GridAxis]) -> list[dict[str, float]]:
    """Return the full Cartesian grid, first axis varying slowest.

    Parameters
    ----------
    axes : sequence of GridAxis
        The swept parameters.

    Returns
    -------
    list of dict
        One mapping ``{axis name: value}`` per point.

    """
    names = [a.name for a in axes]
    return [
        dict(zip(names, combo, strict=True))
        for combo in itertools.product(*(a.values for a in axes))
    ]


def _full(values: Mapping[str, float]) -> dict[str, float]:
    """Every global field of a point, neutral where the grid does not set it."""
    return {name: float(values.get(name, NEUTRAL[name])) for name in GLOBAL_FIELDS}


def point_key(values: Mapping[str, float]) -> str:
    """Canonical text of a point: every global field, neutral when not given.

    Two grids that reach the same parameter values give the same key.
    """
    full = _full(values)
    return ";".join(f"{name}={full[name]!r}" for name in GLOBAL_FIELDS)


def point_seed(seed: int, values: Mapping[str, float]) -> int:
    """Seed of one grid point, from the run's seed and the point's values.

    Parameters
    ----------
    seed : int
        The run's ``--seed``.
    values : mapping
        The point's parameter values.

    Returns
    -------
    int
        A seed in ``[0, 2**31 - 1)``: the first eight bytes of
        ``sha256("debtsim-sweep|<seed>|<point_key>")`` reduced modulo
        ``2**31 - 1``.  Independent of run order, worker and grid shape.

    """
    digest = hashlib.sha256(f"debtsim-sweep|{seed}|{point_key(values)}".encode()).digest()
    return int.from_bytes(digest[:8], "big") % (2**31 - 1)


# --------------------------------------------------------------------- a point
@dataclass(frozen=True)
class PointTask:
    """One grid point to run.

    Attributes
    ----------
    key : str
        :func:`point_key` of the values.
    values : dict
        Every global field's value.
    options : RunOptions
        With the point's own seed and no copula.

    """

    key: str
    values: dict[str, float]
    options: RunOptions


def evaluate_point(book: Book, task: PointTask) -> dict[str, Any]:
    """Run one grid point; never raises for a failure of the model or engine.

    Parameters
    ----------
    book : Book
        The unstressed book.
    task : PointTask
        The point's values and options.

    Returns
    -------
    dict
        ``status`` (``ok`` or ``failed``), ``error`` (empty when ok),
        ``engine``, ``seed``, ``measures`` (mapping, empty when failed),
        ``warnings`` (distinct warning messages) and ``seconds``.

    """
    started = time.perf_counter()
    out: dict[str, Any] = {
        "key": task.key,
        "values": dict(task.values),
        "seed": task.options.seed,
        "status": STATUS_OK,
        "error": "",
        "engine": "",
        "measures": {},
        "warnings": [],
    }
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            scenario = Scenario.from_values(task.key, task.values)
            analysis = run_book(apply_scenario(book, scenario), task.options)
            out["engine"] = analysis.engine
            out["measures"] = analysis.measures.as_row()
        except Exception as error:  # recorded in the point's row
            out["status"] = STATUS_FAILED
            out["error"] = f"{type(error).__name__}: {error}".strip()
    out["warnings"] = sorted({str(w.message) for w in caught})
    out["seconds"] = time.perf_counter() - started
    return out


# ----------------------------------------------------------- checkpoint files
def partial_dir(out_dir: Path | str) -> Path:
    """Return the work folder of a sweep writing ``out_dir``: ``<out_dir>.partial``."""
    out_dir = Path(out_dir)
    return out_dir.with_name(out_dir.name + ".partial")


def book_fingerprint(book: Book, options: RunOptions) -> str:
    """Hash of what a point's result depends on besides its values.

    The obligors' and links' numbers and ids, the factor resolution, the
    dependence settings (sector factors, Student-t) when the book has any, and the
    engine options (engine, samples, seed, shots, levels).
    """
    data = {
        "obligors": [
            [
                o.id,
                repr(float(o.ead)),
                repr(float(o.pd)),
                repr(float(o.lgd)),
                repr(float(o.asset_correlation)),
                o.sector,
            ]
            for o in book.obligors
        ],
        "links": [[lk.creditor, lk.debtor, repr(float(lk.contagion))] for lk in book.links],
        "factor_qubits": book.factor_qubits,
        "engine": options.engine,
        "samples": options.samples,
        "seed": options.seed,
        "shots": options.shots,
        "levels": [level_key(a) for a in options.levels],
    }
    if book.dependence is not None:  # sector factors, Student-t (absent: hash as before)
        data["dependence"] = repr(book.dependence)
    return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()


def _read_json(path: Path) -> Any:
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except (OSError, ValueError):
        return None


def _write_json_atomic(path: Path, data: Mapping[str, Any]) -> None:
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(jsonable(data), fh, allow_nan=False)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def _point_file(work: Path, key: str) -> Path:
    return work / "points" / f"{hashlib.sha1(key.encode()).hexdigest()[:20]}.json"


def _is_partial(work: Path) -> bool:
    marker = _read_json(work / "sweep.json")
    return isinstance(marker, dict) and marker.get("kind") == PARTIAL_KIND


def _from_partial(work: Path, fingerprint: str) -> dict[str, dict[str, Any]]:
    """Finished points kept in a ``.partial`` work folder."""
    marker = _read_json(work / "sweep.json")
    if marker.get("fingerprint") != fingerprint:
        raise OutputError(
            f"--resume: {work} holds a sweep of another book or other engine options "
            "(engine, samples, seed, shots, levels); run without --resume to start afresh"
        )
    done: dict[str, dict[str, Any]] = {}
    for path in sorted((work / "points").glob("*.json")):
        point = _read_json(path)
        if isinstance(point, dict) and isinstance(point.get("key"), str):
            done[point["key"]] = point
    return done


def _from_output(out_dir: Path, fingerprint: str, options: RunOptions) -> dict[str, Any]:
    """Finished points of a previous sweep written to ``out_dir``."""
    marker = _read_json(out_dir / "summary.json")
    if not (isinstance(marker, dict) and marker.get("kind") == SWEEP_KIND):
        return {}
    if marker.get("fingerprint") != fingerprint:
        raise OutputError(
            f"--resume: {out_dir} holds a sweep of another book or other engine options "
            "(engine, samples, seed, shots, levels); run without --resume to start afresh"
        )
    try:
        table = pd.read_parquet(out_dir / "sweep.parquet")
    except (OSError, ValueError, ImportError):
        return {}
    columns = measure_columns(options.levels)
    engines = marker.get("point_engines", {})
    done: dict[str, Any] = {}
    for row in table.to_dict("records"):
        if row.get("status") != STATUS_OK:
            continue
        values = {name: float(row[name]) for name in GLOBAL_FIELDS if name in row}
        key = point_key(values)
        done[key] = {
            "key": key,
            "values": _full(values),
            "seed": point_seed(options.seed, values),
            "status": STATUS_OK,
            "error": "",
            "engine": engines.get(key, ""),
            "measures": {c: float(row[c]) for c in columns},
            "warnings": [],
        }
    return done


# ------------------------------------------------------------------- the sweep
@dataclass(frozen=True, eq=False)
class SweepResult:
    """A finished sweep.

    Attributes
    ----------
    book : Book
    axes : tuple of GridAxis
    options : RunOptions
        The run's options (its ``seed`` is the base of the point seeds).
    table : pandas.DataFrame
        One row per grid point in grid order: the axis values, the measure
        columns, ``status`` and ``error``.
    points : tuple of dict
        Each point's full record (values, seed, engine, warnings, seconds).
    computed, reused : int
        Points run now, and points taken from earlier work.
    execution : str
        Where the points ran.
    seconds : float
        Wall time of this call.
    fingerprint : str
        :func:`book_fingerprint` of book and options.

    """

    book: Book
    axes: tuple[GridAxis, ...]
    options: RunOptions
    table: pd.DataFrame
    points: tuple[dict[str, Any], ...]
    computed: int
    reused: int
    execution: str
    seconds: float
    fingerprint: str = ""
    notes: tuple[str, ...] = field(default=())

    @property
    def failed(self) -> int:
        """Number of points whose row says ``failed``."""
        return int((self.table["status"] == STATUS_FAILED).sum())


def _failure(task: PointTask, error: BaseException) -> dict[str, Any]:
    return {
        "key": task.key,
        "values": dict(task.values),
        "seed": task.options.seed,
        "status": STATUS_FAILED,
        "error": f"{type(error).__name__}: {error}".strip(),
        "engine": "",
        "measures": {},
        "warnings": [],
        "seconds": None,
    }


def run_sweep(
    book: Book,
    axes: Sequence[GridAxis],
    options: RunOptions,
    out_dir: Path | str,
    *,
    execution: Execution | None = None,
    resume: bool = False,
    progress: Callable[[int, int], None] | None = None,
    on_point: Callable[[dict[str, Any]], None] | None = None,
) -> SweepResult:
    """Run every grid point, keeping each finished point in ``<out_dir>.partial``.

    Parameters
    ----------
    book : Book
        The unstressed book.
    axes : sequence of GridAxis
        From :func:`parse_grid`.
    options : RunOptions
        Engine options; ``seed`` is the base of the per-point seeds, and the
        copula is never computed.
    out_dir : path-like
        The sweep's output folder; its work folder is :func:`partial_dir`.
    execution : Execution, optional
        In-process when omitted.
    resume : bool
        Reuse points finished earlier (see the module notes).
    progress : callable, optional
        ``progress(done, total)`` over grid points.
    on_point : callable, optional
        Called with each point's record after it is saved.

    Returns
    -------
    SweepResult

    Raises
    ------
    OutputError
        When ``out_dir`` or its work folder may not be written, or earlier
        work to resume is from another book or other options.

    """
    started = time.perf_counter()
    execution = execution or Execution()
    axes = tuple(axes)
    out_dir = Path(out_dir)
    check_output_dir(out_dir)
    work = partial_dir(out_dir)
    if work.exists() and not _is_partial(work):
        raise OutputError(
            f"{work}: exists and is not a debtsim sweep's work folder; move it away or "
            "choose another --out"
        )
    fingerprint = book_fingerprint(book, options)
    points = grid_points(axes)
    keys = [point_key(p) for p in points]
    done: dict[str, dict[str, Any]] = {}
    if resume:
        if out_dir.is_dir():
            done.update(_from_output(out_dir, fingerprint, options))
        if work.exists():
            done.update(_from_partial(work, fingerprint))
    elif work.exists():
        shutil.rmtree(work)
    (work / "points").mkdir(parents=True, exist_ok=True)
    _write_json_atomic(
        work / "sweep.json",
        {
            "kind": PARTIAL_KIND,
            "generator": generator(),
            "fingerprint": fingerprint,
            "book": book.name,
        },
    )
    reused = {k: done[k] for k in keys if k in done and done[k].get("status") == STATUS_OK}
    todo = [
        PointTask(key, _full(p), replace(options, seed=point_seed(options.seed, p), copula=False,
                                         contributions=False))
        for key, p in zip(keys, points, strict=True)
        if key not in reused
    ]
    todo = list({t.key: t for t in todo}.values())
    results: dict[str, dict[str, Any]] = dict(reused)
    total = len(set(keys))
    if progress is not None:
        progress(len(reused), total)

    def on_result(index: int, outcome: dict[str, Any] | BaseException) -> None:
        task = todo[index]
        record = outcome if isinstance(outcome, dict) else _failure(task, outcome)
        _write_json_atomic(_point_file(work, task.key), record)
        results[task.key] = record
        if progress is not None:
            progress(len(results), total)
        if on_point is not None:
            on_point(record)

    try:
        run_tasks(evaluate_point, book, todo, execution, on_result)
    except BaseException:
        # nothing finished (e.g. the scheduler never answered): leave no work folder behind
        if not any((work / "points").iterdir()):
            shutil.rmtree(work, ignore_errors=True)
        raise
    table = _table(axes, points, keys, results, options.levels)
    return SweepResult(
        book=book,
        axes=axes,
        options=options,
        table=table,
        points=tuple(results[k] for k in dict.fromkeys(keys)),
        computed=len(todo),
        reused=len(reused),
        execution=execution.label,
        seconds=time.perf_counter() - started,
        fingerprint=fingerprint,
    )


def _table(
    axes: Sequence[GridAxis],
    points: Sequence[Mapping[str, float]],
    keys: Sequence[str],
    results: Mapping[str, Mapping[str, Any]],
    levels: Sequence[float],
) -> pd.DataFrame:
    columns = measure_columns(levels)
    rows = []
    for p, key in zip(points, keys, strict=True):
        record = results[key]
        measures = record.get("measures") or {}
        row: dict[str, Any] = {a.name: float(p[a.name]) for a in axes}
        row.update({c: float(measures.get(c, math.nan)) for c in columns})
        row["status"] = record["status"]
        row["error"] = record.get("error", "")
        rows.append(row)
    frame = pd.DataFrame(rows, columns=[a.name for a in axes] + columns + ["status", "error"])
    for c in columns:
        frame[c] = frame[c].astype(float)
    return frame


def _ordinal(n: int) -> str:
    """``1st``, ``2nd``, ``3rd``, ``4th``, ... ``11th``, ``12th``, ``13th``, ``21st``."""
    if 10 <= n % 100 <= 20:
        return f"{n}th"
    suffix = {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"
