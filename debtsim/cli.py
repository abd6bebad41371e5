"""The ``debtsim`` command line: parse, call the library, report errors.

Only this module knows typer.  Every error debtsim raises on purpose is a
:class:`~debtsim.errors.DebtsimError`; it is printed one problem per line on
stderr and the process exits with status 2, with no traceback and nothing
written.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from debtsim.errors import BookError, DebtsimError

if TYPE_CHECKING:
    from debtsim.runner import RunOptions

__all__ = ["app", "main"]

app = typer.Typer(
    name="debtsim",
    help=(
        "Credit-portfolio loss with default contagion between obligors that lend to each "
        "other. Results are model estimates, not investment or regulatory advice."
    ),
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
)

EXIT_INPUT = 2


def fail(error: DebtsimError) -> None:
    """Print a debtsim error on stderr, one problem per line, and exit with status 2."""
    lines = [str(p) for p in error.problems] if isinstance(error, BookError) else [str(error)]
    for line in lines:
        typer.echo(f"error: {line}" if not isinstance(error, BookError) else line, err=True)
    raise typer.Exit(EXIT_INPUT)


@contextmanager
def progress_bars(enabled: bool) -> Iterator[Callable[[str], Callable[[int, int], None] | None]]:
    """Progress bars on stderr, shown once a stage has run for more than a second."""
    if not enabled:
        yield lambda stage: None
        return
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    console = Console(stderr=True)
    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        TextColumn("{task.percentage:>3.0f}%"),
        TimeRemainingColumn(),
        console=console,
        transient=True,
    ) as bars:

        def factory(stage: str) -> Callable[[int, int], None]:
            started = time.monotonic()
            task: list[int] = []

            def hook(done: int, total: int) -> None:
                if not task:
                    if time.monotonic() - started < 1.0 and done < total:
                        return
                    task.append(bars.add_task(stage, total=max(total, 1)))
                bars.update(task[0], completed=done, total=max(total, 1))

            return hook

        yield factory


def _check_levels(levels: list[float] | None) -> tuple[float, ...]:
    from debtsim.runner import levels_from

    for a in levels or []:
        if not 0.0 < a < 1.0:
            raise DebtsimError(f"--level: must be between 0 and 1 (exclusive), got {a}")
    return levels_from(levels)


# ------------------------------------------------ options shared by run, stress and sweep
BookArg = Annotated[Path, typer.Argument(help="Book file (YAML).")]
EngineOpt = Annotated[str, typer.Option("--engine", help="auto, exact, circuit or sample.")]
SamplesOpt = Annotated[
    int | None, typer.Option("--samples", min=1, help="Scenarios for the sample engine.")
]
LevelOpt = Annotated[
    list[float] | None,
    typer.Option("--level", help="Confidence level (repeatable) (default: 0.99 0.999)."),
]
ShotsOpt = Annotated[
    int | None,
    typer.Option(
        "--shots", min=1,
        help="Circuit engine: sample N measurements instead of the exact statevector law.",
    ),
]
CopulaOpt = Annotated[
    bool, typer.Option("--copula/--no-copula", help="Also run the Gaussian copula.")
]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress, no summary.")]
WorkersOpt = Annotated[
    int | None,
    typer.Option(
        "--workers", min=1,
        help="Run on a local Dask cluster of N worker processes (default: in-process).",
    ),
]
SchedulerOpt = Annotated[
    str | None,
    typer.Option(
        "--scheduler", metavar="ADDRESS",
        help="Run on an existing Dask cluster (scheduler ADDRESS, e.g. tcp://host:8786).",
    ),
]


def _out_option(default: str) -> object:
    return typer.Option("--out", help=f"Output folder (default: {default}).")


@app.command()
def run(
    book: BookArg,
    out: Annotated[Path | None, _out_option("reports/<book stem>/")] = None,
    engine: EngineOpt = "auto",
    samples: SamplesOpt = None,
    seed: Annotated[int | None, typer.Option("--seed", help="Seed for random draws.")] = None,
    level: LevelOpt = None,
    shots: ShotsOpt = None,
    copula: CopulaOpt = True,
    quiet: QuietOpt = False,
) -> None:
    """Compute the loss law of BOOK and write the report folder."""
    from debtsim.book.loader import load_book
    from debtsim.report import check_output_dir, write_run
    from debtsim.runner import analyse

    try:
        options = _run_options(engine, samples, seed, level, shots, copula)
        loaded = load_book(book)
        out_dir = out if out is not None else Path("reports") / book.stem
        check_output_dir(out_dir)
        with progress_bars(not quiet) as progress:
            analysis = analyse(loaded, options, progress=progress)
        final = write_run(analysis, out_dir)
    except DebtsimError as error:
        fail(error)
        return
    if not quiet:
        _print_run(analysis, final)


def _print_run(analysis: object, folder: Path) -> None:
    from debtsim.runner import Analysis

    assert isinstance(analysis, Analysis)
    m = analysis.measures
    cur = analysis.book.currency
    lines = [
        f"{analysis.book.name}: {analysis.model.n_obligors} obligors, "
        f"{analysis.model.n_links} links, engine {analysis.engine} ({analysis.engine_reason})",
        f"  expected loss      {m.expected_loss:,.2f} {cur}",
        f"  loss std           {m.loss_std:,.2f} {cur}",
    ]
    for key in m.var:
        lines.append(
            f"  VaR {key:<7}        {m.var[key]:,.2f} {cur}   ES {m.expected_shortfall[key]:,.2f}"
        )
    if analysis.copula_measures is not None:
        c = analysis.copula_measures
        lines.append(f"  copula EL          {c.expected_loss:,.2f} {cur}")
        for key in c.var:
            lines.append(f"  copula VaR {key:<7} {c.var[key]:,.2f} {cur}")
    lines.append(f"report: {folder / 'report.html'}")
    lines.append("Model estimates only: not investment or regulatory advice.")
    typer.echo("\n".join(lines))


@app.command()
def check(book: BookArg) -> None:
    """Validate BOOK and print a one-screen overview; writes nothing."""
    from debtsim.book.loader import load_book
    from debtsim.report.book_overview import format_overview, overview

    try:
        loaded = load_book(book)
        text = format_overview(overview(loaded))
    except DebtsimError as error:
        fail(error)
        return
    typer.echo(text)


@app.command()
def circuit(
    book: BookArg,
    qasm: Annotated[
        Path | None, typer.Option("--qasm", help="Write the circuit as OpenQASM 3 to FILE.")
    ] = None,
    force: Annotated[
        bool, typer.Option("--force", help="Overwrite an existing --qasm file.")
    ] = False,
) -> None:
    """Print the size of BOOK's circuit (qubits, depth, two-qubit gates)."""
    from debtsim.book.loader import load_book
    from debtsim.engines.circuit.builder import build_circuit, circuit_size, to_qasm3
    from debtsim.model.specification import LinkedFactorModel

    try:
        loaded = load_book(book)
        if qasm is not None and qasm.exists() and not force:
            raise DebtsimError(f"--qasm: {qasm} exists; pass --force to overwrite it")
        model = LinkedFactorModel.from_book(loaded)
        qc = build_circuit(model)
        size = circuit_size(qc)
        text = to_qasm3(qc) if qasm is not None else None
    except DebtsimError as error:
        fail(error)
        return
    typer.echo(
        f"qubits            {size.qubits} ({model.factor_qubits} factor + "
        f"{model.n_obligors} obligor)\n"
        f"depth             {size.depth}\n"
        f"two-qubit gates   {size.two_qubit_gates}\n"
        f"(after transpiling to u/cx)"
    )
    if qasm is not None and text is not None:
        tmp = qasm.with_name(f".{qasm.name}.tmp")
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(qasm)
        typer.echo(f"OpenQASM 3 written to {qasm}")


# --------------------------------------------------------- stress and sweep
def _run_options(
    engine: str,
    samples: int | None,
    seed: int | None,
    level: list[float] | None,
    shots: int | None,
    copula: bool,
) -> RunOptions:
    from debtsim.engines import DEFAULT_SEED, ENGINE_NAMES
    from debtsim.runner import RunOptions

    if engine not in ENGINE_NAMES:
        raise DebtsimError(f"--engine: must be one of {', '.join(ENGINE_NAMES)}, got {engine!r}")
    return RunOptions(
        engine=engine,
        samples=samples,
        seed=DEFAULT_SEED if seed is None else seed,
        shots=shots,
        levels=_check_levels(level),
        copula=copula,
    )




@app.command()
def stress(
    book: BookArg,
    scenarios: Annotated[Path, typer.Argument(help="Scenario file (YAML).")],
    out: Annotated[Path | None, _out_option("reports/<book stem>-stress/")] = None,
    engine: EngineOpt = "auto",
    samples: SamplesOpt = None,
    seed: Annotated[int | None, typer.Option("--seed", help="Seed for random draws.")] = None,
    level: LevelOpt = None,
    shots: ShotsOpt = None,
    copula: CopulaOpt = True,
    workers: WorkersOpt = None,
    scheduler: SchedulerOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Run BOOK and each scenario of SCENARIOS; write a side-by-side comparison."""
    from debtsim.book.loader import load_book
    from debtsim.report.files import check_output_dir
    from debtsim.studies.scenarios import load_scenarios
    from debtsim.studies.stress import run_stress, write_stress
    from debtsim.studies.sweep import Execution

    try:
        options = _run_options(engine, samples, seed, level, shots, copula)
        execution = Execution(workers=workers, scheduler=scheduler)
        loaded = load_book(book)
        scenario_list = load_scenarios(scenarios, loaded)
        out_dir = out if out is not None else Path("reports") / f"{book.stem}-stress"
        check_output_dir(out_dir)
        with progress_bars(not quiet) as progress:
            result = run_stress(
                loaded, scenario_list, options, execution=execution,
                progress=progress("scenarios"),
            )
        final = write_stress(result, out_dir, source=str(scenarios))
    except DebtsimError as error:
        fail(error)
        return
    if quiet:
        return
    table = result.table
    cur = loaded.currency
    top = table.columns[-3]
    lines = [
        f"{loaded.name}: base and {len(scenario_list)} scenarios, {result.execution}, "
        f"{result.seconds:.1f} s",
        f"  {'scenario':<24} {'expected loss':>16} {top.replace('var_', 'VaR '):>16}",
    ]
    for _, row in table.iterrows():
        lines.append(f"  {str(row['scenario'])[:24]:<24} {row['expected_loss']:>16,.2f} "
                     f"{row[top]:>16,.2f}")
    lines.append(f"amounts in {cur}" if cur else "")
    lines.append(f"report: {final / 'report.html'}   table: {final / 'scenarios.csv'}")
    lines.append("Model estimates only: not investment or regulatory advice.")
    typer.echo("\n".join(line for line in lines if line))


@app.command()
def sweep(
    book: BookArg,
    grid: Annotated[
        list[str] | None,
        typer.Option(
            "--grid", metavar="NAME=V1,V2,...",
            help="Parameter and its values (repeatable): pd_scale, asset_correlation_shift, "
            "lgd_shift or contagion_scale. The sweep runs the full Cartesian grid.",
        ),
    ] = None,
    out: Annotated[Path | None, _out_option("reports/<book stem>-sweep/")] = None,
    engine: EngineOpt = "auto",
    samples: SamplesOpt = None,
    seed: Annotated[
        int | None,
        typer.Option("--seed", help="Base seed; each grid point derives its own from it."),
    ] = None,
    level: LevelOpt = None,
    shots: ShotsOpt = None,
    workers: WorkersOpt = None,
    scheduler: SchedulerOpt = None,
    resume: Annotated[
        bool,
        typer.Option(
            "--resume",
            help="Keep the points already finished (in OUT.partial/ or a previous OUT/) and "
            "run only the missing or failed ones.",
        ),
    ] = False,
    quiet: QuietOpt = False,
) -> None:
    """Run BOOK over a grid of scenario parameters; write sweep.csv, sweep.parquet and charts.

    Every finished point is saved at once in OUT.partial/; an interrupted sweep
    continues with --resume. The copula is not computed.
    """
    from debtsim.book.loader import load_book
    from debtsim.studies.sweep import Execution, parse_grid, partial_dir, run_sweep, write_sweep

    out_dir = out if out is not None else Path("reports") / f"{book.stem}-sweep"
    done = [0]
    try:
        options = _run_options(engine, samples, seed, level, shots, False)
        execution = Execution(workers=workers, scheduler=scheduler)
        axes = parse_grid(grid or [])
        loaded = load_book(book)
        with progress_bars(not quiet) as progress:
            result = run_sweep(
                loaded, axes, options, out_dir,
                execution=execution, resume=resume, progress=progress("grid points"),
                on_point=lambda _record: done.__setitem__(0, done[0] + 1),
            )
        final = write_sweep(result, out_dir)
    except DebtsimError as error:
        fail(error)
        return
    except KeyboardInterrupt:
        typer.echo(
            f"interrupted: the points finished so far ({done[0]} this run) are kept in "
            f"{partial_dir(out_dir)}; "
            "run the same command with --resume to finish the rest",
            err=True,
        )
        raise typer.Exit(130) from None
    if quiet:
        return
    lines = [
        f"{loaded.name}: {len(result.table)} grid points, {result.computed} computed "
        f"({result.execution}), {result.reused} reused, {result.failed} failed, "
        f"{result.seconds:.1f} s",
    ]
    if result.failed:
        first = result.table.loc[result.table["status"] != "ok", "error"].iloc[0]
        lines.append(f"  first failure: {first}")
    lines.append(f"table: {final / 'sweep.csv'}   report: {final / 'report.html'}")
    lines.append("Model estimates only: not investment or regulatory advice.")
    typer.echo("\n".join(lines))


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        typer.echo("interrupted; nothing was written", err=True)
        sys.exit(130)


if __name__ == "__main__":
    main()
