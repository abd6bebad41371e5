"""Atomic output folders and the plain files of a run (JSON, CSV).

A run writes into a temporary sibling folder that is renamed into place only
when every file is written, so an interrupted run leaves no half report.  An
existing folder is replaced only when it is a previous debtsim output (its
``summary.json`` carries ``"generator": "debtsim <version>"``) or empty;
anything else is refused, untouched.
"""

from __future__ import annotations

import contextlib
import csv
import json
import math
import os
import secrets
import shutil
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

from debtsim.errors import OutputError

__all__ = [
    "GENERATOR_KEY",
    "MARKER_FILE",
    "atomic_output_dir",
    "check_output_dir",
    "generator",
    "is_replaceable_output",
    "jsonable",
    "write_csv",
    "write_json",
    "write_loss_distribution",
]

#: File whose JSON object marks a folder as written by debtsim.
MARKER_FILE = "summary.json"
#: Key of that object naming the program that wrote it: ``"debtsim <version>"``.
GENERATOR_KEY = "generator"


def generator() -> str:
    """Return the marker value written under :data:`GENERATOR_KEY`: ``"debtsim <version>"``."""
    import debtsim

    version = getattr(debtsim, "__version__", None)
    if not version:
        try:
            version = metadata.version("debtsim")
        except metadata.PackageNotFoundError:
            version = "dev"
    return f"debtsim {version}"


# ----------------------------------------------------------------- the folder
def is_replaceable_output(path: Path) -> bool:
    """Whether an existing folder may be replaced by a new run.

    Parameters
    ----------
    path : Path
        An existing path.

    Returns
    -------
    bool
        True for an empty directory, or one whose :data:`MARKER_FILE` is a
        JSON object with a :data:`GENERATOR_KEY` starting with ``"debtsim"``.

    """
    if not path.is_dir():
        return False
    try:
        if not any(path.iterdir()):
            return True
        with open(path / MARKER_FILE, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return False
    marker = data.get(GENERATOR_KEY) if isinstance(data, dict) else None
    return isinstance(marker, str) and (marker == "debtsim" or marker.startswith("debtsim "))


def check_output_dir(
    out_dir: Path | str, *, replaceable: Callable[[Path], bool] = is_replaceable_output
) -> Path:
    """Refuse an output folder a run must not overwrite.

    Call before a long computation to fail early; :func:`atomic_output_dir`
    checks again before it replaces anything.

    Parameters
    ----------
    out_dir : Path or str
        Where the run will write.
    replaceable : callable, optional
        ``replaceable(path) -> bool`` for an existing path; defaults to
        :func:`is_replaceable_output`.

    Returns
    -------
    Path
        ``out_dir`` as a Path.

    Raises
    ------
    OutputError
        When ``out_dir`` exists and is not a folder debtsim may replace.

    """
    out_dir = Path(out_dir)
    if out_dir.exists() or out_dir.is_symlink():
        if not out_dir.is_dir():
            raise OutputError(f"{out_dir}: exists and is not a folder; choose another --out")
        if not replaceable(out_dir):
            raise OutputError(
                f"{out_dir}: folder exists and is not a debtsim report "
                f"(no {MARKER_FILE} with a {GENERATOR_KEY!r} of debtsim); "
                "refusing to overwrite it, choose another --out"
            )
    return out_dir


def _fresh_sibling(parent: Path, name: str, tag: str) -> Path:
    """Create and return a new, uniquely named hidden folder in ``parent``."""
    for _ in range(100):
        candidate = parent / f".{name}.{tag}-{secrets.token_hex(4)}"
        try:
            candidate.mkdir()  # honours the umask, unlike tempfile.mkdtemp
        except FileExistsError:
            continue
        return candidate
    raise OutputError(f"{parent}: cannot create a temporary folder")  # pragma: no cover


def _unused_sibling(parent: Path, name: str, tag: str) -> Path:
    """Return an unused hidden path in ``parent`` (not created)."""
    while True:
        candidate = parent / f".{name}.{tag}-{secrets.token_hex(4)}"
        if not candidate.exists() and not candidate.is_symlink():
            return candidate


@contextlib.contextmanager
def atomic_output_dir(
    out_dir: Path | str, *, replaceable: Callable[[Path], bool] = is_replaceable_output
) -> Iterator[Path]:
    """Write a folder atomically: yield a temporary folder, rename it into place.

    Files are written into ``.<name>.tmp-<random>`` next to ``out_dir``.  When
    the block ends normally the temporary folder becomes ``out_dir``; an
    existing ``out_dir`` is first renamed to a backup, and the backup deleted
    only after the new folder is in place.  When the block raises, the
    temporary folder (and any parent folders this call created) is removed,
    nothing at ``out_dir`` is touched, and the exception propagates.

    Parameters
    ----------
    out_dir : Path or str
        Final folder.
    replaceable : callable, optional
        ``replaceable(path) -> bool`` decides whether an existing folder may
        be replaced; defaults to :func:`is_replaceable_output` (previous
        debtsim outputs and empty folders).  Other writers (stress, sweep)
        should write :data:`MARKER_FILE` with :data:`GENERATOR_KEY` too.

    Yields
    ------
    Path
        The temporary folder to write into.

    Raises
    ------
    OutputError
        When ``out_dir`` exists and may not be replaced (checked on entry and
        again before the rename), or a rename fails.

    """
    out_dir = check_output_dir(out_dir, replaceable=replaceable)
    parent = out_dir.parent
    created: list[Path] = []
    for ancestor in [parent, *parent.parents]:
        if ancestor.exists():
            break
        created.append(ancestor)
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{parent}: cannot create output folder: {exc.strerror}") from exc

    def remove_created_parents() -> None:
        for folder in created:  # deepest first
            with contextlib.suppress(OSError):
                folder.rmdir()

    try:
        tmp = _fresh_sibling(parent, out_dir.name, "tmp")
    except OSError as exc:
        remove_created_parents()
        raise OutputError(f"{parent}: cannot write there: {exc.strerror}") from exc
    try:
        yield tmp
        _commit(tmp, out_dir, replaceable)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        remove_created_parents()
        raise


def _commit(tmp: Path, out_dir: Path, replaceable: Callable[[Path], bool]) -> None:
    """Move ``tmp`` to ``out_dir``, replacing a replaceable previous folder safely."""
    check_output_dir(out_dir, replaceable=replaceable)
    backup: Path | None = None
    if out_dir.exists() or out_dir.is_symlink():
        backup = _unused_sibling(out_dir.parent, out_dir.name, "old")
        try:
            os.rename(out_dir, backup)
        except OSError as exc:
            raise OutputError(f"{out_dir}: cannot move the previous report aside: {exc}") from exc
    try:
        os.rename(tmp, out_dir)
    except OSError as exc:
        if backup is not None:
            with contextlib.suppress(OSError):
                os.rename(backup, out_dir)
        raise OutputError(f"{out_dir}: cannot move the new report into place: {exc}") from exc
    if backup is not None:
        if backup.is_dir() and not backup.is_symlink():
            shutil.rmtree(backup, ignore_errors=True)
        else:
            with contextlib.suppress(OSError):
                backup.unlink()


# ------------------------------------------------------------------ the files
def jsonable(value: Any) -> Any:
    """Plain-JSON form of ``value``: numpy scalars and arrays to Python, non-finite floats to None.

    Mappings become dicts with string keys, sequences lists; other objects
    their ``str``.
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (int, np.integer)) and not isinstance(value, np.bool_):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, Mapping):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [jsonable(v) for v in value]
    if isinstance(value, Path):
        return str(value)
    return str(value)


def write_json(path: Path, data: Mapping[str, Any]) -> None:
    """Write ``data`` as strict JSON (indent 2, key order kept, UTF-8, final newline)."""
    text = json.dumps(jsonable(data), indent=2, ensure_ascii=False, allow_nan=False)
    path.write_text(text + "\n", encoding="utf-8")


def _number(x: float) -> str:
    """Shortest text that reads back as the same float."""
    return repr(float(x))


def write_loss_distribution(path: Path, losses: np.ndarray, probabilities: np.ndarray) -> None:
    """Write ``loss,probability`` rows, ascending, dropping atoms of probability exactly 0.

    Parameters
    ----------
    path : Path
        File to write.
    losses, probabilities : ndarray, shape (k,)
        Ascending support and its probabilities (summing to 1).

    """
    losses = np.asarray(losses, dtype=float)
    probabilities = np.asarray(probabilities, dtype=float)
    keep = probabilities != 0.0
    lines = ["loss,probability"]
    lines.extend(
        f"{_number(a)},{_number(p)}"
        for a, p in zip(losses[keep].tolist(), probabilities[keep].tolist(), strict=True)
    )
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def write_csv(path: Path, header: Sequence[str], rows: Iterable[Sequence[Any]]) -> None:
    """Write a CSV with ``header``; floats in round-trip precision, None and NaN as empty."""

    def cell(v: Any) -> Any:
        if v is None:
            return ""
        if isinstance(v, (float, np.floating)):
            return "" if math.isnan(v) else _number(float(v))
        if isinstance(v, np.integer):
            return int(v)
        return v

    with open(path, "w", encoding="utf-8", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for row in rows:
            writer.writerow([cell(v) for v in row])
