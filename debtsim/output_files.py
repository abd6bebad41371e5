"""Atomic output folders and the plain files of a run (JSON, CSV).

A run writes into a temporary sibling folder that is renamed into place only
when every file is written, so an interrupted run leaves no half report.  An
existing folder is replaced only when it is a previous debtsim output (its
``summary.json`` carries ``"generator": "debtsim <version>"``) or empty;
anything else is refused, untouched.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import json
import math
import os
import re
import secrets
import shutil
import sys
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

from debtsim.errors import OutputError, describe_os_error, visible

__all__ = [
    "CHARTS_FOLDER",
    "FORMULA_STARTS",
    "GENERATOR_KEY",
    "MARKER_FILE",
    "OWN_FILES",
    "atomic_output_dir",
    "check_output_dir",
    "check_output_file",
    "clean_leftovers",
    "exchange_paths",
    "exclusive_output",
    "foreign_entries",
    "generator",
    "is_replaceable_output",
    "jsonable",
    "neutralise_text_cell",
    "write_csv",
    "write_json",
    "write_loss_distribution",
    "write_text_atomic",
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
#: Every file name a debtsim writer puts in an output folder (run, stress, sweep).  A writer
#: that adds a file adds its name here (tests/report/test_output_folders.py checks it).
OWN_FILES = frozenset(
    {
        "summary.json",
        "loss_distribution.csv",
        "obligors.csv",
        "contributions.csv",
        "sectors.csv",
        "report.html",
        "scenarios.csv",
        "default_probabilities.csv",
        "sweep.csv",
        "sweep.parquet",
    }
)
#: Sub-folder of charts a sweep writes (``*.png`` only).
CHARTS_FOLDER = "charts"


def _is_marked(path: Path) -> bool:
    """Whether ``path`` holds a :data:`MARKER_FILE` naming debtsim as its writer."""
    try:
        with open(path / MARKER_FILE, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return False
    marker = data.get(GENERATOR_KEY) if isinstance(data, dict) else None
    return isinstance(marker, str) and (marker == "debtsim" or marker.startswith("debtsim "))


def foreign_entries(path: Path, *, depth: int = 1) -> list[str]:
    """Names in an output folder that no debtsim writer puts there.

    A folder debtsim wrote holds only :data:`OWN_FILES`, a ``charts/``
    folder of PNG files, and (a stress test) one sub-folder per run that is
    itself a marked debtsim folder.  Anything else, a user's notes or the
    book itself, is foreign: a new run must not delete it.

    Parameters
    ----------
    path : Path
        An existing folder.
    depth : int
        How many levels of run sub-folders to accept.

    Returns
    -------
    list of str
        Foreign paths relative to ``path``, sorted; empty for a pure output.

    """
    foreign: list[str] = []
    for entry in sorted(path.iterdir()):
        name = entry.name
        if entry.is_symlink():
            foreign.append(name)
        elif entry.is_file() and name in OWN_FILES:
            continue
        elif entry.is_dir() and name == CHARTS_FOLDER:
            foreign.extend(
                f"{name}/{p.name}"
                for p in sorted(entry.iterdir())
                if p.is_symlink() or not p.is_file() or p.suffix != ".png"
            )
        elif entry.is_dir() and depth > 0 and _is_marked(entry):
            foreign.extend(f"{name}/{p}" for p in foreign_entries(entry, depth=depth - 1))
        else:
            foreign.append(name + ("/" if entry.is_dir() else ""))
    return foreign


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
        JSON object with a :data:`GENERATOR_KEY` starting with ``"debtsim"``
        and which holds nothing but what debtsim writes
        (:func:`foreign_entries` is empty).

    """
    if not path.is_dir() or path.is_symlink():
        return False
    try:
        if not any(path.iterdir()):
            return True
        return _is_marked(path) and not foreign_entries(path)
    except OSError:
        return False


def _nearest_existing(path: Path) -> Path:
    for candidate in [path, *path.parents]:
        if candidate.exists():
            return candidate
    return Path(".")  # pragma: no cover - the root exists


def _probe_writable(folder: Path, out_dir: Path) -> None:
    """Create and remove a hidden folder in ``folder``, or raise a plain OutputError."""
    probe = folder / f".{out_dir.name[:100]}.probe-{os.getpid()}-{secrets.token_hex(4)}"
    try:
        probe.mkdir()
    except OSError as exc:
        raise OutputError(f"cannot write to {out_dir}: {describe_os_error(exc)}") from exc
    with contextlib.suppress(OSError):
        probe.rmdir()


def check_output_dir(
    out_dir: Path | str, *, replaceable: Callable[[Path], bool] = is_replaceable_output
) -> Path:
    """Refuse, before any computing, an output folder a run must not or cannot write.

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
        When ``out_dir`` exists and is not a folder debtsim may replace (not
        a folder, not a debtsim report, holding files debtsim did not write,
        a mount point), or when its folder cannot be written (read-only file
        system, no permission), in plain words.

    """
    out_dir = Path(out_dir)
    if len(os.fsencode(out_dir.name)) > 200:
        raise OutputError(f"cannot write to {out_dir}: the name is too long")
    if out_dir.exists() or out_dir.is_symlink():
        if out_dir.is_symlink() or not out_dir.is_dir():
            kind = "a symbolic link" if out_dir.is_symlink() else "not a folder"
            raise OutputError(f"{out_dir}: exists and is {kind}; choose another --out")
        if os.path.ismount(out_dir):
            raise OutputError(
                f"{out_dir}: is a mount point, which debtsim cannot replace as a whole; "
                "choose a folder inside it"
            )
        if not replaceable(out_dir):
            try:
                foreign = foreign_entries(out_dir) if _is_marked(out_dir) else []
            except OSError as exc:
                raise OutputError(f"cannot read {out_dir}: {describe_os_error(exc)}") from exc
            if foreign:
                shown = ", ".join(visible(f) for f in foreign[:5])
                more = f" and {len(foreign) - 5} more" if len(foreign) > 5 else ""
                raise OutputError(
                    f"{out_dir}: holds files debtsim did not write ({shown}{more}); "
                    "refusing to replace the folder, which would delete them: move them "
                    "or choose another --out"
                )
            raise OutputError(
                f"{out_dir}: folder exists and is not a debtsim report "
                f"(no {MARKER_FILE} with a {GENERATOR_KEY!r} of debtsim); "
                "refusing to overwrite it, choose another --out"
            )
    parent = _nearest_existing(out_dir.parent)
    if not parent.is_dir():
        raise OutputError(f"cannot write to {out_dir}: {parent} is not a folder")
    _probe_writable(parent, out_dir)
    return out_dir


# Hidden siblings: ".<name>.<tag>-<pid>-<random>", tag "tmp" (a report being written, or
# after an exchange the previous report being deleted) or "old" (a previous report moved
# aside where the file system cannot exchange two folders).
_LEFTOVER = re.compile(r"^\.(?P<name>.+)\.(?P<tag>tmp|old)-(?P<pid>\d+)-[0-9a-f]{8}$")


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # alive, owned by someone else
        return True
    return True


def clean_leftovers(out_dir: Path | str) -> list[Path]:
    """Remove hidden folders that a killed run left beside ``out_dir``.

    A run that is killed may leave ``.<name>.tmp-<pid>-<random>`` (a half
    written report, or a previous report not yet deleted) or, where folders
    cannot be exchanged in one step, ``.<name>.old-<pid>-<random>`` (the
    previous report moved aside).  Folders of a process still running are
    left alone.  When ``out_dir`` itself is missing, the newest ``old``
    folder is first moved back: a run killed between its two renames leaves
    the previous report in place again.

    Parameters
    ----------
    out_dir : Path or str
        The output folder whose siblings are cleaned.

    Returns
    -------
    list of Path
        The folders removed.

    """
    out_dir = Path(out_dir)
    parent = out_dir.parent
    try:
        siblings = list(parent.iterdir())
    except OSError:
        return []
    stale: list[tuple[str, Path]] = []
    for path in siblings:
        match = _LEFTOVER.match(path.name)
        if match is None or match["name"] != out_dir.name or path.is_symlink():
            continue
        if not path.is_dir() or _pid_alive(int(match["pid"])):
            continue
        stale.append((match["tag"], path))
    if not (out_dir.exists() or out_dir.is_symlink()):
        olds = sorted(
            (p for tag, p in stale if tag == "old" and _is_marked(p)),
            key=lambda p: p.stat().st_mtime,
        )
        if olds:
            with contextlib.suppress(OSError):
                os.rename(olds[-1], out_dir)
                stale = [(t, p) for t, p in stale if p != olds[-1]]
    removed = []
    for _tag, path in stale:
        shutil.rmtree(path, ignore_errors=True)
        removed.append(path)
    return removed


def _sibling_name(parent: Path, name: str, tag: str) -> Path:
    return parent / f".{name}.{tag}-{os.getpid()}-{secrets.token_hex(4)}"


def _fresh_sibling(parent: Path, name: str, tag: str) -> Path:
    """Create and return a new, uniquely named hidden folder in ``parent``."""
    for _ in range(100):
        candidate = _sibling_name(parent, name, tag)
        try:
            candidate.mkdir()  # honours the umask, unlike tempfile.mkdtemp
        except FileExistsError:
            continue
        return candidate
    raise OutputError(f"{parent}: cannot create a temporary folder")  # pragma: no cover


def _unused_sibling(parent: Path, name: str, tag: str) -> Path:
    """Return an unused hidden path in ``parent`` (not created)."""
    while True:
        candidate = _sibling_name(parent, name, tag)
        if not candidate.exists() and not candidate.is_symlink():
            return candidate


_RENAME_EXCHANGE = 2  # linux/fs.h
_AT_FDCWD = -100


def _renameat2() -> Any:
    """Return the C library's ``renameat2`` (Linux, glibc 2.28 or later), or None."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        function = libc.renameat2
    except (OSError, AttributeError):
        return None
    function.argtypes = [
        ctypes.c_int,
        ctypes.c_char_p,
        ctypes.c_int,
        ctypes.c_char_p,
        ctypes.c_uint,
    ]
    function.restype = ctypes.c_int
    return function


def exchange_paths(a: Path, b: Path) -> bool:
    """Swap two existing paths in one atomic step; False where the system cannot.

    Linux's ``renameat2(..., RENAME_EXCHANGE)``: at every instant each name
    holds either its old or its new folder.  Python's ``os`` module has no
    binding for it (only ``rename``/``replace``, which cannot replace a
    non-empty folder), hence the direct call into the C library.

    Parameters
    ----------
    a, b : Path
        Two existing paths on the same file system.

    Returns
    -------
    bool
        True when swapped; False when the system, C library or file system
        does not offer the exchange (the caller then falls back).

    Raises
    ------
    OSError
        For any other failure (permission, read-only file system).

    """
    function = _renameat2()
    if function is None:
        return False
    result = function(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
    if result == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(code, os.strerror(code), str(a))


@contextlib.contextmanager
def atomic_output_dir(
    out_dir: Path | str, *, replaceable: Callable[[Path], bool] = is_replaceable_output
) -> Iterator[Path]:
    """Write a folder atomically: yield a temporary folder, then put it in place.

    Files are written into ``.<name>.tmp-<pid>-<random>`` next to
    ``out_dir``.  When the block ends normally the temporary folder becomes
    ``out_dir``.  An existing ``out_dir`` (a previous report) is exchanged
    with the new one in one atomic step where the system offers it (Linux),
    so that a kill at any instant leaves either the old or the new report
    at ``out_dir``; elsewhere it is renamed aside first, and a run killed
    between the two renames has the old report moved back by the next run
    (:func:`clean_leftovers`, called on entry, which also removes hidden
    folders earlier killed runs left).  When the block raises, the temporary
    folder (and any parent folders this call created) is removed, nothing
    at ``out_dir`` is touched, and the exception propagates; an
    operating-system error (disk full) becomes an :class:`OutputError`.

    Parameters
    ----------
    out_dir : Path or str
        Final folder.
    replaceable : callable, optional
        ``replaceable(path) -> bool`` decides whether an existing folder may
        be replaced; defaults to :func:`is_replaceable_output` (previous
        debtsim outputs holding nothing else, and empty folders).

    Yields
    ------
    Path
        The temporary folder to write into.

    Raises
    ------
    OutputError
        When ``out_dir`` exists and may not be replaced (checked on entry and
        again before the exchange), or cannot be written.

    """
    out_dir = Path(out_dir)
    clean_leftovers(out_dir)
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
        raise OutputError(f"cannot write to {out_dir}: {describe_os_error(exc)}") from exc

    def remove_created_parents() -> None:
        for folder in created:  # deepest first
            with contextlib.suppress(OSError):
                folder.rmdir()

    try:
        tmp = _fresh_sibling(parent, out_dir.name, "tmp")
    except OSError as exc:
        remove_created_parents()
        raise OutputError(f"cannot write to {out_dir}: {describe_os_error(exc)}") from exc
    try:
        try:
            yield tmp
        except OSError as exc:
            raise OutputError(f"cannot write to {out_dir}: {describe_os_error(exc)}") from exc
        _commit(tmp, out_dir, replaceable)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        remove_created_parents()
        raise


def _commit(tmp: Path, out_dir: Path, replaceable: Callable[[Path], bool]) -> None:
    """Move ``tmp`` to ``out_dir``, replacing a replaceable previous folder safely."""
    check_output_dir(out_dir, replaceable=replaceable)
    if out_dir.exists():
        try:
            swapped = exchange_paths(tmp, out_dir)
        except OSError as exc:
            raise OutputError(f"cannot replace {out_dir}: {describe_os_error(exc)}") from exc
        if swapped:  # tmp now holds the previous report
            shutil.rmtree(tmp, ignore_errors=True)
            return
    backup: Path | None = None
    if out_dir.exists() or out_dir.is_symlink():
        backup = _unused_sibling(out_dir.parent, out_dir.name, "old")
        try:
            os.rename(out_dir, backup)
        except OSError as exc:
            raise OutputError(
                f"cannot move the previous report {out_dir} aside: {describe_os_error(exc)}"
            ) from exc
    try:
        os.rename(tmp, out_dir)
    except OSError as exc:
        if backup is not None:
            with contextlib.suppress(OSError):
                os.rename(backup, out_dir)
        raise OutputError(
            f"cannot move the new report into {out_dir}: {describe_os_error(exc)}"
        ) from exc
    if backup is not None:
        if backup.is_dir() and not backup.is_symlink():
            shutil.rmtree(backup, ignore_errors=True)
        else:
            with contextlib.suppress(OSError):
                backup.unlink()


@contextlib.contextmanager
def exclusive_output(out_dir: Path | str) -> Iterator[None]:
    """Hold ``out_dir`` for this process: a second writer of the same folder is refused.

    A lock on the hidden file ``.<name>.lock`` beside the folder
    (``fcntl.flock``: released by the system when the process ends, even when
    killed).  The lock file is removed on exit; a writer that opened it just
    before the removal notices the file it locked is no longer the one at the
    path and tries again.  Where ``fcntl`` is missing (Windows) nothing is
    locked.

    Raises
    ------
    OutputError
        When another process holds the folder, or the lock file cannot be made.

    """
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        yield
        return
    out_dir = Path(out_dir)
    parent = out_dir.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot write to {out_dir}: {describe_os_error(exc)}") from exc
    lock = parent / f".{out_dir.name[:200]}.lock"
    while True:
        try:
            fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise OutputError(f"cannot write to {out_dir}: {describe_os_error(exc)}") from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise OutputError(
                f"{out_dir}: another debtsim process is writing this folder; wait for it to "
                "finish or choose another --out"
            ) from None
        try:
            same = os.fstat(fd).st_ino == os.stat(lock).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)  # locked a file just removed by the previous holder: try again
    try:
        yield
    finally:
        with contextlib.suppress(OSError):
            os.unlink(lock)
        os.close(fd)


# ------------------------------------------------------------------ one file
def check_output_file(path: Path | str, *, overwrite: bool = False, option: str = "") -> Path:
    """Refuse, before any computing, a file path a command cannot or must not write.

    Parameters
    ----------
    path : Path or str
        The file to be written.
    overwrite : bool
        Whether an existing file may be replaced.
    option : str
        The command-line option naming the path (``--qasm``), for messages.

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        When the path is a folder, its folder is missing or not writable, or
        the file exists and ``overwrite`` is false; in plain words.

    """
    path = Path(path)
    label = f"{option}: " if option else ""
    if path.is_dir():
        raise OutputError(f"{label}{path} is a folder; give the name of a file to write")
    if (path.exists() or path.is_symlink()) and not overwrite:
        raise OutputError(f"{label}{path} exists; pass --force to overwrite it")
    parent = path.parent
    if not parent.is_dir():
        missing = "is not a folder" if parent.exists() else "does not exist"
        raise OutputError(f"{label}cannot write to {path}: the folder {parent} {missing}")
    _probe_writable(parent, path)
    return path


def write_text_atomic(path: Path | str, text: str, *, option: str = "") -> Path:
    """Write a text file atomically: a hidden temporary file renamed into place.

    A failure (read-only file system, disk full) leaves no temporary file and
    the previous file, if any, unchanged.

    Raises
    ------
    OutputError
        With the reason in plain words.

    """
    path = Path(path)
    label = f"{option}: " if option else ""
    tmp = path.with_name(f".{path.name[:100]}.tmp-{os.getpid()}-{secrets.token_hex(4)}")
    try:
        with open(tmp, "x", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise OutputError(f"{label}cannot write to {path}: {describe_os_error(exc)}") from exc
    return path


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


#: First characters that make a spreadsheet read a text cell as a formula.
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def neutralise_text_cell(text: str) -> str:
    """Keep a spreadsheet from reading a text cell as a formula.

    A text cell whose first character is ``=``, ``+``, ``-``, ``@``, a tab or a
    carriage return gets a leading apostrophe, the common practice of
    spreadsheet-bound CSV writers (OWASP, "CSV Injection"): the spreadsheet
    shows the text and runs nothing.  Text that reads as a plain number
    (``-5``, ``+1e3``) is left alone, since a spreadsheet reads it as that
    number and nothing else.

    Parameters
    ----------
    text : str
        The cell's text.

    Returns
    -------
    str
        ``text``, or ``"'" + text`` when it could start a formula.

    """
    if not text.startswith(FORMULA_STARTS):
        return text
    try:
        float(text)
    except ValueError:
        return "'" + text
    return text if text.strip() == text else "'" + text


def _csv_field(text: str) -> str:
    """Quote a field the RFC 4180 way when it holds a comma, a quote or any line break."""
    if any(ch in text for ch in ',"\r\n') or text != text.strip():
        return '"' + text.replace('"', '""') + '"'
    return text


def write_csv(path: Path, header: Sequence[str], rows: Iterable[Sequence[Any]]) -> None:
    """Write a CSV with ``header``; floats in round-trip precision, None and NaN as empty.

    Text cells are neutralised for spreadsheets (:func:`neutralise_text_cell`)
    and quoted when they hold a comma, a quote, a carriage return or a line
    feed (the standard library's writer leaves a lone carriage return bare,
    which splits the row in most readers), so every row keeps its width.
    """

    def cell(v: Any) -> str:
        if v is None:
            return ""
        if isinstance(v, (bool, np.bool_)):
            return str(bool(v))
        if isinstance(v, (float, np.floating)):
            return "" if math.isnan(v) else _number(float(v))
        if isinstance(v, (int, np.integer)):
            return str(int(v))
        return _csv_field(neutralise_text_cell(str(v)))

    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(",".join(_csv_field(str(h)) for h in header) + "\n")
        for row in rows:
            fh.write(",".join(cell(v) for v in row) + "\n")
