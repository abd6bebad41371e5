"""The ``debtsim`` command line: parse, call the library, report errors.

Only this module knows typer.  Every error debtsim raises on purpose is a
:class:`~debtsim.errors.DebtsimError`; it is printed one problem per line on
stderr and the process exits with status 2, with no traceback and nothing
written.
"""

from __future__ import annotations

import math
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer
from typer.core import TyperArgument, TyperCommand, TyperGroup, TyperOption

from debtsim import (
    CAUTION,
    DEFAULT_SAMPLES,
    DEFAULT_SEED,
    BookError,
    DebtsimError,
    OptionError,
    check_output_file,
    describe_os_error,
    visible,
    write_text_atomic,
)

if TYPE_CHECKING:
    from debtsim import RunResult

__all__ = ["app", "main"]

EXIT_INPUT = 2
EXIT_INTERRUPTED = 130
INTERRUPTED = "interrupted; nothing was written"


def _plain_params(params: list[Any]) -> list[Any]:
    """Show option types as the words of the help (N, DIR, FILE), flags with no type."""
    for param in params:
        if isinstance(param, TyperOption) and (param.is_flag or param.name == "help"):
            param.metavar = ""
        elif isinstance(param, TyperArgument):
            param.metavar = (param.name or "").upper()
            # the help's text says what the argument is; no "<path>" type beside it
            setattr(param, "display_type_rich", lambda ctx: None)  # noqa: B010
    return params


class _Command(TyperCommand):
    """A command whose help reads ``debtsim run [OPTIONS] BOOK``, types in plain words."""

    def get_params(self, ctx: Any) -> list[Any]:
        return _plain_params(super().get_params(ctx))

    def collect_usage_pieces(self, ctx: Any) -> list[str]:
        params = self.get_params(ctx)
        pieces = ["[OPTIONS]"] if any(isinstance(p, TyperOption) for p in params) else []
        for p in params:
            if isinstance(p, TyperArgument):
                name = str(p.metavar)
                pieces.append(name if p.required else f"[{name}]")
        return pieces


class _Group(TyperGroup):
    """The ``debtsim`` group: every error one line on stderr, Ctrl-C exits 130."""

    def get_params(self, ctx: Any) -> list[Any]:
        return _plain_params(super().get_params(ctx))

    def main(
        self,
        args: Sequence[str] | None = None,
        prog_name: str | None = None,
        complete_var: str | None = None,
        standalone_mode: bool = True,
        windows_expand_args: bool = True,
        **extra: Any,
    ) -> Any:
        try:
            code = super().main(
                args=args,
                prog_name=prog_name,
                complete_var=complete_var,
                standalone_mode=False,
                windows_expand_args=windows_expand_args,
                **extra,
            )
        except typer.TyperException as error:  # a usage error found by the parser
            if type(error).__name__ == "NoArgsIsHelpError":
                typer.echo(error.format_message())
                code = 0
            else:
                ctx = getattr(error, "ctx", None)
                hint = f" (see '{ctx.command_path} --help')" if ctx is not None else ""
                message = visible(str(error.format_message()))
                typer.echo(f"error: {message}{hint}", err=True)
                code = EXIT_INPUT
        except typer.Abort:
            typer.echo(INTERRUPTED, err=True)
            code = EXIT_INTERRUPTED
        except OSError as error:  # the last resort: an environment error is not a traceback
            where = f"{error.filename}: " if error.filename else ""
            typer.echo(f"error: {visible(where + describe_os_error(error))}", err=True)
            code = EXIT_INPUT
        except MemoryError:
            typer.echo("error: out of memory; try a smaller book or fewer samples", err=True)
            code = EXIT_INPUT
        if not standalone_mode:
            return code
        sys.exit(code if isinstance(code, int) else 0)


app = typer.Typer(
    cls=_Group,
    name="debtsim",
    help=(
        "Credit-portfolio loss with default contagion between obligors that lend to each "
        "other. " + CAUTION
    ),
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
)


def _version(value: bool) -> None:
    if value:
        import debtsim

        typer.echo(f"debtsim {debtsim.__version__}")
        raise typer.Exit()


@app.callback()
def _main_options(
    version: Annotated[
        bool,
        typer.Option(
            "--version", callback=_version, is_eager=True, help="Print the version and exit."
        ),
    ] = False,
) -> None:
    """Credit-portfolio loss with default contagion between obligors that lend to each other."""


#: Keyword option of the library -> the command-line flag that sets it.
FLAGS = {"levels": "--level", "samples": "--samples", "seed": "--seed", "shots": "--shots",
         "engine": "--engine", "workers": "--workers"}


def fail(error: DebtsimError) -> None:
    """Print a debtsim error on stderr, one problem per line, and exit with status 2."""
    if isinstance(error, OptionError):
        lines = [f"{FLAGS.get(error.option, error.option)}: {error.message}"]
    elif isinstance(error, BookError):
        lines = [str(p) for p in error.problems]
    else:
        lines = [str(error)]
    for line in lines:
        line = visible(line)  # book text may hold terminal control sequences
        typer.echo(f"error: {line}" if not isinstance(error, BookError) else line, err=True)
    raise typer.Exit(EXIT_INPUT)


@contextmanager
def progress_bars(enabled: bool) -> Iterator[Callable[[str], Callable[[int, int], None] | None]]:
    """Progress bars on stderr, shown once a stage has run for more than a second."""
    if not enabled:
        yield lambda stage: None
        return
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TaskID, TextColumn, TimeRemainingColumn

    console = Console(stderr=True)
    if not console.is_terminal:  # a redirected stderr gets no bars (and no stray line)
        yield lambda stage: None
        return
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
            task: list[TaskID] = []

            def hook(done: int, total: int) -> None:
                if not task:
                    if time.monotonic() - started < 1.0 and done < total:
                        return
                    task.append(bars.add_task(stage, total=max(total, 1)))
                bars.update(task[0], completed=done, total=max(total, 1))

            return hook

        yield factory


# ------------------------------------------------ options shared by run, stress and sweep
BookArg = Annotated[Path, typer.Argument(help="Book file (YAML).", show_default=False)]
EngineOpt = Annotated[
    str,
    typer.Option(
        "--engine", metavar="NAME", show_default=False,
        help="auto (default: the first that applies of exact, circuit, sample), exact "
        "(semi-analytic on a factor grid), circuit (quantum-circuit statevector) or sample "
        "(Monte Carlo of the cascade).",
    ),
]
SamplesOpt = Annotated[
    int | None,
    typer.Option(
        "--samples", metavar="N",
        help=f"Scenarios for the sample engine (default: {DEFAULT_SAMPLES:,}).",
    ),
]
SeedOpt = Annotated[
    int | None,
    typer.Option(
        "--seed", metavar="N",
        help=f"Seed for random draws, 0 or more (default: {DEFAULT_SEED}).",
    ),
]
LevelOpt = Annotated[
    list[float] | None,
    typer.Option(
        "--level", metavar="P",
        help="Confidence level, between 0 and 1; repeat for several (default: 0.99 and "
        "0.999).",
    ),
]
ShotsOpt = Annotated[
    int | None,
    typer.Option(
        "--shots", metavar="N",
        help="Circuit engine: sample N measurements instead of the exact statevector law "
        "(at most what the free memory holds).",
    ),
]
CompareOpt = Annotated[
    bool,
    typer.Option(
        "--compare-without-links/--no-compare-without-links", show_default=False,
        help="Also run the same book without links (Gaussian copula), so the difference "
        "is contagion alone (default: on).",
    ),
]
ContributionsOpt = Annotated[
    bool,
    typer.Option(
        "--contributions/--no-contributions", show_default=False,
        help="Allocate EL, std, VaR, ES and capital to the obligors (contributions.csv, "
        "sectors.csv); on books with many linked groups this can take many times the run "
        "itself (default: on).",
    ),
]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress, no summary.")]
WorkersOpt = Annotated[
    int | None,
    typer.Option(
        "--workers", metavar="N",
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


def _out_option(default: str) -> Any:
    return typer.Option("--out", metavar="DIR", help=f"Output folder (default: {default}).")


@app.command(cls=_Command)
def run(
    book: BookArg,
    out: Annotated[Path | None, _out_option("reports/<book stem>/")] = None,
    engine: EngineOpt = "auto",
    samples: SamplesOpt = None,
    seed: SeedOpt = None,
    level: LevelOpt = None,
    shots: ShotsOpt = None,
    compare_without_links: CompareOpt = True,
    contributions: ContributionsOpt = True,
    quiet: QuietOpt = False,
) -> None:
    """Compute the loss distribution of BOOK and write the report folder."""
    import debtsim

    try:
        loaded = debtsim.load_book(book)
        out_dir = out if out is not None else Path("reports") / book.stem
        debtsim.check_output_dir(out_dir)
        with progress_bars(not quiet) as progress:
            result = debtsim.run(
                loaded, engine=engine, levels=level or debtsim.DEFAULT_LEVELS,
                samples=samples, seed=debtsim.DEFAULT_SEED if seed is None else seed,
                shots=shots, copula=compare_without_links, contributions=contributions,
                progress=progress,
            )
        final = result.write(out_dir)
    except debtsim.DebtsimError as error:
        fail(error)
        return
    except KeyboardInterrupt:
        typer.echo(INTERRUPTED, err=True)
        raise typer.Exit(EXIT_INTERRUPTED) from None
    _warn(result.notes)
    if not quiet:
        _print_run(result, final)


def _warn(notes: Sequence[str]) -> None:
    """Print each model warning on stderr as one ``warning:`` line."""
    for note in notes:
        typer.echo(f"warning: {visible(note)}", err=True)


def _standard_error(diagnostics: Mapping[str, Any], name: str, level: float | None) -> float | None:
    """Return a figure's standard error from an engine's diagnostics, or None (exact)."""
    value: Any = diagnostics.get(name)
    if level is not None and isinstance(value, Mapping):
        value = value.get(level, value.get(str(float(level))))
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    return float(value) if math.isfinite(value) else None


def _figure(value: float, error: float | None, currency: str) -> str:
    """``1,234.56 EUR`` for an exact figure, ``1,235 ± 12 EUR`` for an estimated one."""
    unit = f" {currency}" if currency else ""
    if error is None:
        return f"{value:,.2f}{unit}"
    # as many decimals as the error's first two significant digits need
    digits = max(0, 1 - math.floor(math.log10(error))) if error > 0 else 2
    return f"{value:,.{digits}f} ± {error:,.{digits}f}{unit}"


def _print_run(result: RunResult, folder: Path) -> None:
    m = result.measures
    cur = visible(result.book.currency)
    diag = result.diagnostics
    sampled = result.loss_distribution.samples is not None

    def se(name: str, level: float | None = None) -> float | None:
        return _standard_error(diag, name, level) if sampled else None

    lines = [
        f"{visible(result.book.name)}: {result.model.n_obligors} obligors, "
        f"{result.model.n_links} links, engine {result.engine} ({result.engine_reason})",
        f"  expected loss      {_figure(m.expected_loss, se('expected_loss_standard_error'), cur)}",
        f"  loss std           {_figure(m.loss_std, None, cur)}",
    ]
    for a in m.levels:
        var = _figure(m.var[a], se("var_standard_error", a), cur)
        es = _figure(m.expected_shortfall[a], se("expected_shortfall_standard_error", a), "")
        lines.append(f"  VaR {a!s:<7}        {var}   ES {es}")
    if result.copula_measures is not None and result.copula_distribution is not None:
        c = result.copula_measures
        cdiag = result.copula_distribution.diagnostics
        csampled = result.copula_distribution.samples is not None

        def cse(name: str, level: float | None = None) -> float | None:
            return _standard_error(cdiag, name, level) if csampled else None

        el = _figure(c.expected_loss, cse("expected_loss_standard_error"), cur)
        lines.append(f"  without links (Gaussian copula): EL {el}")
        for a in c.levels:
            cvar = _figure(c.var[a], cse("var_standard_error", a), cur)
            lines.append(f"    VaR {a!s:<7}        {cvar}")
    if sampled:
        lines.append("  (± one standard error of the sampling)")
    lines.append(f"report: {folder / 'report.html'}")
    lines.append(CAUTION)
    typer.echo("\n".join(lines))


@app.command(cls=_Command)
def check(book: BookArg) -> None:
    """Validate BOOK and print a one-screen overview; writes nothing."""
    import debtsim

    try:
        text = debtsim.describe_book(debtsim.load_book(book))
    except DebtsimError as error:
        fail(error)
        return
    except KeyboardInterrupt:
        typer.echo(INTERRUPTED, err=True)
        raise typer.Exit(EXIT_INTERRUPTED) from None
    typer.echo("\n".join(visible(line) for line in text.splitlines()))


@app.command(cls=_Command)
def circuit(
    book: BookArg,
    qasm: Annotated[
        Path | None,
        typer.Option("--qasm", metavar="FILE", help="Write the circuit as OpenQASM 3 to FILE."),
    ] = None,
    force: Annotated[
        bool, typer.Option("--force", help="Overwrite an existing --qasm file.")
    ] = False,
) -> None:
    """Print the size of BOOK's circuit (qubits, depth, two-qubit gates)."""
    import debtsim

    try:
        loaded = debtsim.load_book(book)
        if qasm is not None:
            check_output_file(qasm, overwrite=force, option="--qasm")
        report = debtsim.circuit_report(loaded)
        text = report.qasm() if qasm is not None else None
    except DebtsimError as error:
        fail(error)
        return
    verdict = (
        "runs on --engine circuit"
        if report.refusal is None
        else f"--engine circuit would refuse this book: {report.refusal}"
    )
    typer.echo(
        f"qubits            {report.qubits} ({report.factor_qubits} factor + "
        f"{report.obligors} obligor)\n"
        f"depth             {report.depth}\n"
        f"two-qubit gates   {report.two_qubit_gates}\n"
        f"(after transpiling to u/cx)\n"
        f"{verdict}"
    )
    if qasm is not None and text is not None:
        try:
            write_text_atomic(qasm, text, option="--qasm")
        except DebtsimError as error:
            fail(error)
        typer.echo(f"OpenQASM 3 written to {qasm}")


# --------------------------------------------------------- stress and sweep
@app.command(cls=_Command)
def stress(
    book: BookArg,
    scenarios: Annotated[Path, typer.Argument(help="Scenario file (YAML).")],
    out: Annotated[Path | None, _out_option("reports/<book stem>-stress/")] = None,
    engine: EngineOpt = "auto",
    samples: SamplesOpt = None,
    seed: SeedOpt = None,
    level: LevelOpt = None,
    shots: ShotsOpt = None,
    compare_without_links: CompareOpt = True,
    contributions: ContributionsOpt = True,
    workers: WorkersOpt = None,
    scheduler: SchedulerOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Run BOOK and each scenario of SCENARIOS; write a side-by-side comparison."""
    import debtsim

    try:
        loaded = debtsim.load_book(book)
        scenario_list = debtsim.load_scenarios(scenarios, loaded)
        out_dir = out if out is not None else Path("reports") / f"{book.stem}-stress"
        debtsim.check_output_dir(out_dir)
        with progress_bars(not quiet) as progress:
            result = debtsim.stress(
                loaded, scenario_list, engine=engine, levels=level or debtsim.DEFAULT_LEVELS,
                samples=samples, seed=debtsim.DEFAULT_SEED if seed is None else seed,
                shots=shots, copula=compare_without_links, contributions=contributions,
                workers=workers,
                scheduler=scheduler, progress=progress("scenarios"),
            )
        final = debtsim.write_stress(result, out_dir, source=str(scenarios))
    except DebtsimError as error:
        fail(error)
        return
    _warn([f"scenario {name!r} failed and is left out: {why}" for name, why in result.failures])
    for name, run_result in zip(result.table["scenario"], result.runs, strict=True):
        _warn([f"{name}: {note}" for note in run_result.notes])
    if quiet:
        return
    table = result.table
    cur = loaded.currency
    top = table.columns[-3]
    top_level = float(top.removeprefix("var_"))
    sampled = any(r.loss_distribution.samples is not None for r in result.runs)
    width = 24 if sampled else 16
    lines = [
        f"{loaded.name}: base and {len(scenario_list)} scenarios, {result.execution}, "
        f"{result.seconds:.1f} s",
        f"  {'scenario':<24} {'expected loss':>{width}} {top.replace('var_', 'VaR '):>{width}}",
    ]
    for (_, row), run_result in zip(table.iterrows(), result.runs, strict=True):
        estimated = run_result.loss_distribution.samples is not None
        diag = run_result.diagnostics
        el_se = _standard_error(diag, "expected_loss_standard_error", None) if estimated else None
        var_se = _standard_error(diag, "var_standard_error", top_level) if estimated else None
        el = _figure(float(row["expected_loss"]), el_se, "")
        var = _figure(float(row[top]), var_se, "")
        lines.append(f"  {str(row['scenario'])[:24]:<24} {el:>{width}} {var:>{width}}")
    if sampled:
        lines.append("  (± one standard error of the sampling)")
    lines.append(f"amounts in {cur}" if cur else "")
    lines.append(f"report: {final / 'report.html'}   table: {final / 'scenarios.csv'}")
    lines.append(CAUTION)
    typer.echo("\n".join(visible(line) for line in lines if line))


@app.command(cls=_Command)
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
        typer.Option(
            "--seed", metavar="N",
            help=f"Base seed; each grid point derives its own from it (default: {DEFAULT_SEED}).",
        ),
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
    continues with --resume. The comparison without links is not computed.
    """
    import debtsim

    out_dir = out if out is not None else Path("reports") / f"{book.stem}-sweep"
    done = [0]
    try:
        axes = debtsim.grid_from_options(grid or [])
        loaded = debtsim.load_book(book)
        debtsim.check_output_dir(out_dir)
        with progress_bars(not quiet) as progress:
            hook = progress("grid points")

            def count(finished: int, total: int) -> None:
                done[0] = finished
                if hook is not None:
                    hook(finished, total)

            table = debtsim.sweep(
                loaded, axes, engine=engine, levels=level or debtsim.DEFAULT_LEVELS,
                samples=samples, seed=debtsim.DEFAULT_SEED if seed is None else seed,
                shots=shots, workers=workers, scheduler=scheduler, out=out_dir,
                resume=resume, progress=count,
            )
        info = table.attrs["sweep"]
        final = Path(info["folder"])
    except DebtsimError as error:
        fail(error)
        return
    except KeyboardInterrupt:
        typer.echo(
            f"interrupted: the points finished so far ({done[0]} of the grid) are kept in "
            f"{debtsim.partial_dir(out_dir)}; "
            "run the same command with --resume to finish the rest",
            err=True,
        )
        raise typer.Exit(130) from None
    if quiet:
        return
    lines = [
        f"{loaded.name}: {len(table)} grid points, {info['computed']} computed "
        f"({info['execution']}), {info['reused']} reused, {info['failed']} failed, "
        f"{info['seconds']:.1f} s",
    ]
    if info["failed"]:
        first = table.loc[table["status"] != "ok", "error"].iloc[0]
        lines.append(f"  first failure: {first}")
    lines.append(f"table: {final / 'sweep.csv'}   report: {final / 'report.html'}")
    lines.append(CAUTION)
    typer.echo("\n".join(visible(line) for line in lines))


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        typer.echo("interrupted; nothing was written", err=True)
        sys.exit(130)


if __name__ == "__main__":
    main()
