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
]


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
        if self.field:
            return f"{where}: {self.field}: {self.message}"
        return f"{where}: {self.message}"


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
