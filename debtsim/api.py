"""The library's front door: load a book, run it, stress it, sweep it, write the reports.

Everything here is re-exported by :mod:`debtsim`; the command line uses
these functions and nothing below them.  A script::

    import debtsim

    book = debtsim.load_book("scenarios/harbour_small.yaml")
    result = debtsim.run(book, engine="exact", levels=(0.99, 0.999))
    print(result.measures.var[0.999])
    result.write("reports/harbour_small")

Results are model estimates, not investment or regulatory advice.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from debtsim.book.loader import load_book
from debtsim.book.records import Book
from debtsim.errors import DebtsimError
from debtsim.options import DEFAULT_LEVELS, DEFAULT_SEED, RunOptions, validate_levels
from debtsim.output_files import check_output_dir, check_output_file, write_text_atomic
from debtsim.runner import ProgressFactory, RunResult, run_book
from debtsim.studies.execution import Execution
from debtsim.studies.scenarios import Scenario, load_scenarios
from debtsim.studies.stress import StressResult, run_stress
from debtsim.studies.sweep import GridAxis, SweepResult, parse_grid, partial_dir, run_sweep

if TYPE_CHECKING:
    from qiskit import QuantumCircuit

    from debtsim.model.specification import LinkedFactorModel

__all__ = [
    "CircuitReport",
    "check_output_dir",
    "check_output_file",
    "circuit_report",
    "describe_book",
    "grid_from_options",
    "load_book",
    "load_scenarios",
    "partial_dir",
    "run",
    "stress",
    "sweep",
    "write_stress",
    "write_text_atomic",
]


def _options(
    engine: str,
    levels: Iterable[float],
    samples: int | None,
    seed: int,
    shots: int | None,
    copula: bool,
    contributions: bool = True,
) -> RunOptions:
    return RunOptions(
        engine=engine,
        samples=samples,
        seed=seed,
        shots=shots,
        levels=validate_levels(levels, name="levels"),
        copula=copula,
        contributions=contributions,
    )


def run(
    book: Book,
    *,
    engine: str = "auto",
    levels: Iterable[float] = DEFAULT_LEVELS,
    samples: int | None = None,
    seed: int = DEFAULT_SEED,
    shots: int | None = None,
    copula: bool = True,
    contributions: bool = True,
    progress: ProgressFactory | None = None,
) -> RunResult:
    """Compute the loss distribution of ``book`` and its risk measures.

    Parameters
    ----------
    book : Book
        From :func:`load_book`.
    engine : str
        ``auto`` (default: chosen from the book's size), ``exact``,
        ``circuit`` or ``sample``.
    levels : iterable of float
        Confidence levels of VaR, ES and economic capital.
    samples : int, optional
        Scenarios of the ``sample`` engine (default 200,000).
    seed : int
        Seed of every random draw; same book and seed give the same numbers.
    shots : int, optional
        ``circuit`` engine: measure this many shots instead of reading the
        exact statevector distribution.
    copula : bool
        Also compute the same book without links (Gaussian copula), so the
        difference is contagion alone.
    contributions : bool
        Also allocate the risk to the obligors (``RunResult.contributions``,
        ``contributions.csv``); not available for the circuit engine with shots.
    progress : callable, optional
        ``progress(stage)`` returns a ``hook(done, total)`` or None.

    Returns
    -------
    RunResult
        ``measures.var[0.999]``, ``loss_distribution.to_frame()``,
        ``obligors`` and ``contributions`` (DataFrames), ``write(out_dir)``.

    Raises
    ------
    DebtsimError
        For an option out of range, or an engine that cannot run the book
        (:class:`~debtsim.errors.EngineRefusedError`).
    """
    options = _options(engine, levels, samples, seed, shots, copula, contributions)
    return run_book(book, options, progress)


def stress(
    book: Book,
    scenarios: Sequence[Scenario],
    *,
    engine: str = "auto",
    levels: Iterable[float] = DEFAULT_LEVELS,
    samples: int | None = None,
    seed: int = DEFAULT_SEED,
    shots: int | None = None,
    copula: bool = True,
    contributions: bool = True,
    workers: int | None = None,
    scheduler: str | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> StressResult:
    """Run ``book`` and each scenario with the same options.

    Parameters
    ----------
    book : Book
        The unstressed book.
    scenarios : sequence of Scenario
        From :func:`load_scenarios`.
    engine, levels, samples, seed, shots, copula, contributions
        As for :func:`run`; shared by every scenario.
    workers : int, optional
        Run on a local Dask cluster of this many worker processes.
    scheduler : str, optional
        Run on an existing Dask cluster (its scheduler's address).
    progress : callable, optional
        ``progress(done, total)`` over scenarios.

    Returns
    -------
    StressResult
        ``table`` is the ``scenarios.csv`` frame; ``runs`` holds each run.

    Raises
    ------
    DebtsimError
        When an option is out of range or a scenario's run fails.
    """
    options = _options(engine, levels, samples, seed, shots, copula, contributions)
    execution = Execution(workers=workers, scheduler=scheduler)
    return run_stress(book, scenarios, options, execution=execution, progress=progress)


def write_stress(result: StressResult, out_dir: Path | str, *, source: str = "") -> Path:
    """Write a stress test's folder (tables, summary, page, one sub-folder per run).

    Raises
    ------
    OutputError
        When ``out_dir`` cannot be written; nothing there is changed then.
    """
    from debtsim.report.study_folders import write_stress as write

    return write(result, out_dir, source=source)


def grid_from_options(specs: Sequence[str]) -> dict[str, list[float]]:
    """Parse ``NAME=V1,V2,...`` strings (the ``--grid`` option) into a sweep grid.

    Raises
    ------
    BookError
        Listing every problem (unknown names, bad or repeated values...).
    """
    return {axis.name: list(axis.values) for axis in parse_grid(specs)}


def _axes(grid: Mapping[str, Sequence[float]]) -> tuple[GridAxis, ...]:
    if not isinstance(grid, Mapping):
        raise DebtsimError(f"grid: must map parameter names to lists of values, got {grid!r}")
    specs = []
    for name, values in grid.items():
        if isinstance(values, (str, bytes)) or not isinstance(values, Iterable):
            raise DebtsimError(f"grid: {name}: must be a list of numbers, got {values!r}")
        specs.append(f"{name}=" + ",".join(repr(v) for v in values))
    return parse_grid(specs)


def sweep(
    book: Book,
    grid: Mapping[str, Sequence[float]],
    *,
    engine: str = "auto",
    levels: Iterable[float] = DEFAULT_LEVELS,
    samples: int | None = None,
    seed: int = DEFAULT_SEED,
    shots: int | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    out: Path | str | None = None,
    resume: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> pd.DataFrame:
    """Run ``book`` over the full grid of scenario parameters.

    Parameters
    ----------
    book : Book
        The unstressed book.
    grid : mapping of str to list of float
        Parameter name (``pd_scale``, ``asset_correlation_shift``,
        ``lgd_shift``, ``contagion_scale``) to its values.
    engine, levels, samples, seed, shots
        As for :func:`run`; each point derives its own seed from ``seed``.
    workers, scheduler
        As for :func:`stress`.
    out : path-like, optional
        Also write the sweep's folder there (``sweep.csv``, ``sweep.parquet``,
        charts, page); finished points are kept in ``<out>.partial`` while
        it runs.  Without it the points are kept in a temporary folder.
    resume : bool
        With ``out``: reuse the points finished by an earlier, interrupted
        or smaller sweep of the same book and options.
    progress : callable, optional
        ``progress(done, total)`` over grid points.

    Returns
    -------
    pandas.DataFrame
        The ``sweep.csv`` frame: one row per point, the parameters, the
        measures, ``status`` and ``error``.  ``frame.attrs["sweep"]`` holds
        the counts (``computed``, ``reused``, ``failed``), ``execution``,
        ``seconds`` and ``folder`` (the folder written, or None).

    Raises
    ------
    DebtsimError
        For a bad grid or option, or an output folder that cannot be written.
    """
    axes = _axes(grid)
    options = _options(engine, levels, samples, seed, shots, False)
    execution = Execution(workers=workers, scheduler=scheduler)
    if out is None:
        import tempfile

        with tempfile.TemporaryDirectory(prefix="debtsim-sweep-") as work:
            result = run_sweep(
                book, axes, options, Path(work) / "sweep", execution=execution,
                progress=progress,
            )
        return _sweep_frame(result, None)
    from debtsim.output_files import exclusive_output
    from debtsim.report.study_folders import write_sweep

    with exclusive_output(out):  # a second sweep to the same folder is refused
        result = run_sweep(
            book, axes, options, out, execution=execution, resume=resume, progress=progress
        )
        return _sweep_frame(result, write_sweep(result, out))


def _sweep_frame(result: SweepResult, folder: Path | None) -> pd.DataFrame:
    frame = result.table.copy()
    frame.attrs["sweep"] = {
        "computed": result.computed,
        "reused": result.reused,
        "failed": result.failed,
        "execution": result.execution,
        "seconds": result.seconds,
        "folder": None if folder is None else str(folder),
    }
    return frame


def describe_book(book: Book) -> str:
    """Return the one-screen overview ``debtsim check`` prints (size, exposure, links).

    A book with sector factors also gets the sector table (obligors, exposure,
    mean PD and implied asset correlation inside and between sectors); one with
    Student-t dependence a line naming it.
    """
    from debtsim.report.book_overview import format_overview, overview
    from debtsim.report.sector_table import format_sector_table, sector_table

    text = format_overview(overview(book))
    table = sector_table(book)
    if table is not None:
        text += "\n\n" + format_sector_table(table, book.currency)
    elif book.dependence is not None:
        text += f"\nDependence: {book.dependence.family}"
        if book.dependence.degrees_of_freedom is not None:
            text += f", {book.dependence.degrees_of_freedom:g} degrees of freedom"
    return text


@dataclass(frozen=True, eq=False)
class CircuitReport:
    """The circuit of a book: its size, whether the circuit engine runs it, its OpenQASM 3.

    Attributes
    ----------
    circuit : qiskit.QuantumCircuit
        Factor register, one qubit per obligor, multiplexed rotations.
    qubits, factor_qubits, obligors : int
        Qubits in all, in the factor register, and obligor qubits.
    depth, two_qubit_gates : int
        Size after transpiling to u/cx.
    refusal : str or None
        Why ``run --engine circuit`` would refuse the book; None when it runs.
    model : LinkedFactorModel
        The model the circuit encodes.
    """

    circuit: QuantumCircuit
    qubits: int
    factor_qubits: int
    obligors: int
    depth: int
    two_qubit_gates: int
    refusal: str | None
    model: LinkedFactorModel

    def qasm(self) -> str:
        """Return the circuit as OpenQASM 3 text, with the obligor register measured.

        Run on any simulator or device, each shot is one scenario of final
        defaults (a bit per obligor, in book order).
        """
        from debtsim.engines.circuit.builder import to_qasm3
        from debtsim.engines.circuit.sector_circuit import model_circuit

        return to_qasm3(model_circuit(self.model, measure=True))


def circuit_report(book: Book) -> CircuitReport:
    """Build the circuit of ``book`` and say whether the circuit engine would run it.

    Raises
    ------
    DebtsimError
        When the circuit cannot be built (e.g. a linked group too large to load).
    """
    from debtsim.engines.circuit.builder import circuit_size
    from debtsim.engines.circuit.engine import CircuitEngine
    from debtsim.engines.circuit.sector_circuit import model_circuit
    from debtsim.model.specification import LinkedFactorModel

    model = LinkedFactorModel.from_book(book)
    refusal = CircuitEngine().refusal(model)
    qc = model_circuit(model)
    size = circuit_size(qc)
    return CircuitReport(
        circuit=qc,
        qubits=int(size.qubits),
        factor_qubits=int(size.qubits) - model.n_obligors,  # global (+ sector) registers
        obligors=model.n_obligors,
        depth=int(size.depth),
        two_qubit_gates=int(size.two_qubit_gates),
        refusal=refusal,
        model=model,
    )
