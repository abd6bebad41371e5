"""debtsim: credit-portfolio loss with default contagion between obligors.

Use from Python::

    import debtsim

    book = debtsim.load_book("scenarios/harbour_small.yaml")
    result = debtsim.run(book)
    result.measures.var[0.999]          # VaR at 99.9%, in the book's currency
    result.loss_distribution.to_frame()  # loss, probability
    result.obligors                      # obligors.csv as a DataFrame
    result.write("reports/harbour_small")

Every error raised on purpose is a :class:`DebtsimError`.  Results are model
estimates: see :data:`CAUTION`, the one caution text every report carries.

The names are loaded on first use, so ``import debtsim`` stays quick.
"""

from __future__ import annotations

import importlib
from importlib.metadata import PackageNotFoundError, version
from typing import TYPE_CHECKING, Any

try:
    __version__ = version("debtsim")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.1.0"

#: Public name -> module that defines it.
_EXPORTS: dict[str, str] = {
    # the front door
    "load_book": "debtsim.api",
    "load_scenarios": "debtsim.api",
    "run": "debtsim.api",
    "stress": "debtsim.api",
    "sweep": "debtsim.api",
    "write_stress": "debtsim.api",
    "describe_book": "debtsim.api",
    "circuit_report": "debtsim.api",
    "CircuitReport": "debtsim.api",
    "grid_from_options": "debtsim.api",
    "check_output_dir": "debtsim.api",
    "check_output_file": "debtsim.api",
    "write_text_atomic": "debtsim.api",
    "partial_dir": "debtsim.api",
    # records and results
    "Book": "debtsim.book.records",
    "Obligor": "debtsim.book.records",
    "Link": "debtsim.book.records",
    "Scenario": "debtsim.studies.scenarios",
    "RunOptions": "debtsim.options",
    "RunResult": "debtsim.runner",
    "StressResult": "debtsim.studies.stress",
    "RiskMeasures": "debtsim.risk",
    "LossDistribution": "debtsim.distribution",
    # constants
    "ENGINE_NAMES": "debtsim.options",
    "DEFAULT_LEVELS": "debtsim.options",
    "DEFAULT_SAMPLES": "debtsim.options",
    "DEFAULT_SEED": "debtsim.options",
    "CAUTION": "debtsim.report.text",
    # errors and warnings
    "DebtsimError": "debtsim.errors",
    "BookError": "debtsim.errors",
    "EngineRefusedError": "debtsim.errors",
    "OptionError": "debtsim.errors",
    "OutputError": "debtsim.errors",
    "Problem": "debtsim.errors",
    "DebtsimWarning": "debtsim.errors",
    "DiscretisationWarning": "debtsim.errors",
    "describe_os_error": "debtsim.errors",
    "visible": "debtsim.errors",
}

__all__ = [
    "__version__",
    "CAUTION",
    "Book",
    "BookError",
    "CircuitReport",
    "DEFAULT_LEVELS",
    "DEFAULT_SAMPLES",
    "DEFAULT_SEED",
    "DebtsimError",
    "DebtsimWarning",
    "DiscretisationWarning",
    "ENGINE_NAMES",
    "EngineRefusedError",
    "Link",
    "LossDistribution",
    "Obligor",
    "OptionError",
    "OutputError",
    "Problem",
    "RiskMeasures",
    "RunOptions",
    "RunResult",
    "Scenario",
    "StressResult",
    "check_output_dir",
    "check_output_file",
    "circuit_report",
    "describe_book",
    "describe_os_error",
    "grid_from_options",
    "load_book",
    "load_scenarios",
    "partial_dir",
    "run",
    "stress",
    "sweep",
    "visible",
    "write_stress",
    "write_text_atomic",
]


def __getattr__(name: str) -> Any:
    """Load a public name from its module on first use (PEP 562)."""
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'debtsim' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_EXPORTS))


if TYPE_CHECKING:  # the names as static checkers see them
    from debtsim.api import (
        CircuitReport,
        check_output_dir,
        check_output_file,
        circuit_report,
        describe_book,
        grid_from_options,
        load_book,
        load_scenarios,
        partial_dir,
        run,
        stress,
        sweep,
        write_stress,
        write_text_atomic,
    )
    from debtsim.book.records import Book, Link, Obligor
    from debtsim.distribution import LossDistribution
    from debtsim.errors import (
        BookError,
        DebtsimError,
        DebtsimWarning,
        DiscretisationWarning,
        EngineRefusedError,
        OptionError,
        OutputError,
        Problem,
        describe_os_error,
        visible,
    )
    from debtsim.options import (
        DEFAULT_LEVELS,
        DEFAULT_SAMPLES,
        DEFAULT_SEED,
        ENGINE_NAMES,
        RunOptions,
    )
    from debtsim.report.text import CAUTION
    from debtsim.risk import RiskMeasures
    from debtsim.runner import RunResult
    from debtsim.studies.scenarios import Scenario
    from debtsim.studies.stress import StressResult
