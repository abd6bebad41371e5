"""Exceptions and warnings raised by debtsim.

Hierarchy::

    DebtsimError                 root: the CLI catches this and exits with status 2
    ├── BookError                the book (or a scenario file) is invalid; carries every problem
    ├── EngineRefusedError       an engine cannot run this book (too large, wrong shape)
    ├── OptionError              an option of a run is out of range (also a ValueError)
    └── OutputError              an output folder cannot be written (exists, not ours)

    DebtsimWarning               root of the domain warnings
    └── DiscretisationWarning    a grid or node set is coarse for the book
"""

from __future__ import annotations

import errno
from dataclasses import dataclass

__all__ = [
    "BookError",
    "DebtsimError",
    "DebtsimWarning",
    "DiscretisationWarning",
    "EngineRefusedError",
    "OptionError",
    "OutputError",
    "Problem",
    "describe_os_error",
    "visible",
]

_ESCAPES = {"\t": "\\t", "\n": "\\n", "\r": "\\r"}


def visible(text: str) -> str:
    r"""Return ``text`` with every control or invisible character written as an escape.

    Text from a book (names, ids, field keys) may hold terminal control
    sequences; everything debtsim prints passes through here, so that what a
    file holds is shown, never obeyed.  ESC becomes ``\x1b``, a line break
    ``\n``; printable text (any script) is left as it is.
    """
    if text.isprintable():
        return text
    out = []
    for ch in text:
        if ch.isprintable():
            out.append(ch)
        elif ch in _ESCAPES:
            out.append(_ESCAPES[ch])
        else:
            code = ord(ch)
            out.append(f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}")
    return "".join(out)


#: Plain-English reasons for the operating-system errors a user can meet.
_OS_REASONS = {
    "EROFS": "read-only file system",
    "EACCES": "permission denied",
    "EPERM": "permission denied",
    "ENOSPC": "no space left on the device",
    "EDQUOT": "disk quota exceeded",
    "EBUSY": "the folder is in use (a mount point?)",
    "ENOTDIR": "a part of the path is not a folder",
    "EISDIR": "it is a folder",
    "ENOENT": "no such file or folder",
    "EEXIST": "it already exists",
    "ENAMETOOLONG": "the name is too long",
    "ELOOP": "too many symbolic links",
    "EXDEV": "it is on another file system",
    "EIO": "input/output error",
    "EFBIG": "the file is too large",
    "EMFILE": "too many open files",
}


def describe_os_error(exc: OSError) -> str:
    """Say in plain English why an operating-system call failed.

    Parameters
    ----------
    exc : OSError
        The error.

    Returns
    -------
    str
        E.g. ``"read-only file system"`` or ``"no space left on the device"``;
        never an errno number.

    """
    name = errno.errorcode.get(exc.errno or 0, "")
    if name in _OS_REASONS:
        return _OS_REASONS[name]
    return (exc.strerror or type(exc).__name__).lower()


class DebtsimError(Exception):
    """Root of every error debtsim raises on purpose."""


class OptionError(DebtsimError, ValueError):
    """An option of a run (engine, samples, seed, shots, levels...) is out of range.

    Parameters
    ----------
    option : str
        The option's name as a keyword argument (``levels``); the command
        line shows it as ``--level`` style flags.
    message : str
        What was expected and what was received.
    """

    def __init__(self, option: str, message: str) -> None:
        super().__init__(f"{option}: {message}")
        self.option = option
        self.message = message


@dataclass(frozen=True)
class Problem:
    """One problem found in an input file.

    Parameters
    ----------
    file : str
        The file the problem is in, as the user named it.
    line : int or None
        1-based line number, or None when the problem has no single line.
    field : str
        Dotted path of the offending field, e.g. ``obligors[3].pd``.
    message : str
        What was expected and what was found.
    """

    file: str
    line: int | None
    field: str
    message: str

    def __str__(self) -> str:
        where = f"{self.file}:{self.line}" if self.line is not None else self.file
        text = (
            f"{where}: {self.field}: {self.message}" if self.field else f"{where}: {self.message}"
        )
        return visible(text)  # one problem, one line, no control sequence from the file


class BookError(DebtsimError):
    """An input file is invalid.

    Parameters
    ----------
    problems : list of Problem
        Every problem found, in file order.
    """

    def __init__(self, problems: list[Problem]) -> None:
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


class EngineRefusedError(DebtsimError):
    """An engine declines a book it cannot compute (e.g. too many qubits)."""


class OutputError(DebtsimError):
    """An output folder cannot be written, e.g. it exists and is not a debtsim output."""


class DebtsimWarning(UserWarning):
    """Root of debtsim's domain warnings."""


class DiscretisationWarning(DebtsimWarning):
    """A factor or loss grid is coarse for the book."""
