"""Parameter sweeps: grid parsing, seeds, failures, resume, and a real Dask LocalCluster."""

from __future__ import annotations

import json
import logging
import os
import signal
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from typer.testing import CliRunner

import debtsim.studies.sweep as sweep_module
from debtsim.book.records import Book, Link, Obligor
from debtsim.cli import app
from debtsim.errors import OutputError
from debtsim.options import RunOptions
from debtsim.report.study_folders import write_sweep
from debtsim.risk import measure_columns
from debtsim.runner import run_book
from debtsim.studies.execution import Execution
from debtsim.studies.scenarios import Scenario, apply_scenario
from debtsim.studies.sweep import (
    GridAxis,
    GridError,
    grid_points,
    parse_grid,
    partial_dir,
    point_key,
    point_seed,
    run_sweep,
)

ROOT = Path(__file__).resolve().parents[2]
HARBOUR = ROOT / "scenarios" / "harbour_small.yaml"

BOOK = Book(
    name="sweep test",
    currency="EUR",
    obligors=(
        Obligor("A", 100.0, 0.02, 0.5, 0.20, sector="shipping"),
        Obligor("B", 200.0, 0.01, 0.4, 0.10),
        Obligor("C", 50.0, 0.05, 0.6, 0.15),
    ),
    links=(Link("A", "B", 0.3), Link("B", "A", 0.2), Link("C", "A", 0.4)),
    factor_qubits=3,
)

BOOK_YAML = """\
book: Sweep Book
currency: EUR
obligors:
  - {id: A, ead: 100, pd: 0.02, lgd: 0.5, asset_correlation: 0.2}
  - {id: B, ead: 200, pd: 0.01, lgd: 0.4, asset_correlation: 0.1}
  - {id: C, ead: 50, pd: 0.05, lgd: 0.6, asset_correlation: 0.15}
links:
  - {creditor: A, debtor: B, contagion: 0.3}
  - {creditor: B, debtor: A, contagion: 0.2}
  - {creditor: C, debtor: A, contagion: 0.4}
model:
  factor_qubits: 3
"""

AXES = (GridAxis("pd_scale", (0.5, 1.0, 2.0)), GridAxis("contagion_scale", (0.0, 1.5)))


def _exact_engine() -> str:
    try:
        import debtsim.engines.exact.engine  # noqa: F401
    except ImportError:
        return "circuit"
    return "exact"


def _random_options() -> RunOptions:
    """Options whose results depend on the seed, so seed handling is tested."""
    try:
        import debtsim.engines.sample.engine  # noqa: F401
    except ImportError:
        return RunOptions(engine="circuit", shots=3000, copula=False)
    return RunOptions(engine="sample", samples=20_000, copula=False)


@pytest.fixture
def book_file(tmp_path: Path) -> Path:
    path = tmp_path / "book.yaml"
    path.write_text(BOOK_YAML, encoding="utf-8")
    return path


# ------------------------------------------------------------------ the grid
def test_parse_grid_and_cartesian_order() -> None:
    """NAME=V1,V2 options become axes; the grid is their full product, first axis slowest."""
    axes = parse_grid(["pd_scale=1, 2,4", "lgd_shift=-0.1,0.1"])
    assert axes == (GridAxis("pd_scale", (1.0, 2.0, 4.0)), GridAxis("lgd_shift", (-0.1, 0.1)))
    points = grid_points(axes)
    assert len(points) == 6
    assert points[:3] == [
        {"pd_scale": 1.0, "lgd_shift": -0.1},
        {"pd_scale": 1.0, "lgd_shift": 0.1},
        {"pd_scale": 2.0, "lgd_shift": -0.1},
    ]


@pytest.mark.parametrize(
    ("specs", "message"),
    [
        (["pd_scale"], "--grid pd_scale: expected NAME=V1,V2,..."),
        (["pd=1,2"], "--grid pd=1,2: pd: unknown parameter; expected one of pd_scale"),
        (["pd_scale=1,x"], "--grid pd_scale=1,x: pd_scale: the 2nd value is not a number, got 'x'"),
        (["pd_scale=1,,2"], "--grid pd_scale=1,,2: pd_scale: the 2nd value is empty"),
        (["pd_scale=0,1"], "--grid pd_scale=0,1: pd_scale: must be greater than 0, got 0"),
        (["lgd_shift=2"], "--grid lgd_shift=2: lgd_shift: must be between -1 and 1, got 2"),
        (
            ["contagion_scale=1,1.0"],
            "--grid contagion_scale=1,1.0: contagion_scale: the 2nd value 1.0 repeats the 1st value 1",
        ),
        (["pd_scale=,1"], "--grid pd_scale=,1: pd_scale: the 1st value is empty"),
        (
            ["pd_scale=0.5,1,2,1e0"],
            "--grid pd_scale=0.5,1,2,1e0: pd_scale: the 4th value 1e0 repeats the 2nd value 1",
        ),
        (["pd_scale=1", "pd_scale=2"], "--grid pd_scale=2: pd_scale: given twice"),
        (["pd_scale=nan"], "--grid pd_scale=nan: pd_scale: must be a finite number"),
        ([], "--grid: give at least one --grid NAME=V1,V2,..."),
    ],
)
def test_bad_grids(specs: list[str], message: str) -> None:
    """Each bad --grid value is named with the option and the reason."""
    with pytest.raises(GridError) as info:
        parse_grid(specs)
    lines = [str(p) for p in info.value.problems]
    assert any(line.startswith(message) for line in lines), lines


def test_grid_too_large() -> None:
    """A grid over the point limit is refused before anything runs."""
    many = ",".join(str(1 + i / 1000) for i in range(400))
    with pytest.raises(GridError, match="grid points; at most"):
        parse_grid([f"pd_scale={many}", f"contagion_scale={many}"])


def test_point_seed_depends_on_values_not_order() -> None:
    """A point's seed depends on the base seed and its values, neutral fields included."""
    a = point_seed(7, {"pd_scale": 2.0})
    assert a == point_seed(7, {"pd_scale": 2.0, "lgd_shift": 0.0})
    assert a != point_seed(8, {"pd_scale": 2.0})
    assert a != point_seed(7, {"pd_scale": 2.5})
    assert point_key({"contagion_scale": 2.0, "pd_scale": 1.5}) == point_key(
        {"pd_scale": 1.5, "contagion_scale": 2.0}
    )


# ------------------------------------------------------------ running sweeps
def test_sweep_rows_match_single_runs(tmp_path: Path) -> None:
    """Each row holds the measures of that scenario run on its own with the point's seed."""
    options = RunOptions(engine=_exact_engine(), copula=False)
    ticks: list[tuple[int, int]] = []
    result = run_sweep(
        BOOK, AXES, options, tmp_path / "out", progress=lambda d, t: ticks.append((d, t))
    )
    assert ticks == [(i, 6) for i in range(7)]  # the progress bar counts grid points
    table = result.table
    assert list(table.columns) == [
        "pd_scale",
        "contagion_scale",
        *measure_columns(options.levels),
        "status",
        "error",
    ]
    assert len(table) == 6 and (table["status"] == "ok").all()
    row = table.iloc[5]
    values = {"pd_scale": 2.0, "contagion_scale": 1.5}
    alone = run_book(
        apply_scenario(BOOK, Scenario(name="x", **values)),
        replace(options, seed=point_seed(options.seed, values)),
    )
    assert row["expected_loss"] == alone.measures.expected_loss
    assert row["var_0.999"] == alone.measures.var[0.999]


def test_failed_point_is_recorded_and_others_finish(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A point that raises gets status failed and its error; the others are computed."""
    real = sweep_module.run_book

    def flaky(book: Book, options: RunOptions, progress: Any = None) -> Any:
        if any(o.pd == pytest.approx(0.04) for o in book.obligors):  # pd_scale 2 on A
            raise RuntimeError("engine fell over")
        return real(book, options, progress)

    monkeypatch.setattr(sweep_module, "run_book", flaky)
    options = RunOptions(engine=_exact_engine(), copula=False)
    result = run_sweep(BOOK, AXES, options, tmp_path / "out")
    table = result.table
    failed = table[table["status"] == "failed"]
    assert list(failed["pd_scale"]) == [2.0, 2.0]
    assert failed["error"].str.contains("RuntimeError: engine fell over").all()
    assert failed["expected_loss"].isna().all()
    assert (table[table["status"] == "ok"]["expected_loss"] > 0).all()
    assert result.failed == 2


def test_written_files_and_resume_from_output(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A finished sweep's folder is complete; --resume reruns only its failed points."""
    out = tmp_path / "out"
    options = RunOptions(engine=_exact_engine(), copula=False)
    real = sweep_module.run_book
    fail_at = {"pd": 0.04}

    def flaky(book: Book, options: RunOptions, progress: Any = None) -> Any:
        if any(o.pd == pytest.approx(fail_at["pd"]) for o in book.obligors):
            raise RuntimeError("transient")
        return real(book, options, progress)

    monkeypatch.setattr(sweep_module, "run_book", flaky)
    first = run_sweep(BOOK, AXES, options, out)
    write_sweep(first, out)
    for name in ("sweep.csv", "sweep.parquet", "summary.json", "report.html"):
        assert (out / name).is_file(), name
    assert sorted(p.name for p in (out / "charts").iterdir()) == [
        "heatmap_expected_loss.png",
        "heatmap_expected_shortfall_0.999.png",
        "heatmap_var_0.999.png",
    ]
    assert not partial_dir(out).exists()
    csv = pd.read_csv(out / "sweep.csv")
    csv["error"] = csv["error"].fillna("")
    parquet = pd.read_parquet(out / "sweep.parquet")
    pd.testing.assert_frame_equal(csv, parquet, check_dtype=False)
    assert json.loads((out / "summary.json").read_text())["generator"].startswith("debtsim")

    fail_at["pd"] = -1.0  # the failure is gone
    second = run_sweep(BOOK, AXES, options, out, resume=True)
    assert (second.computed, second.reused) == (2, 4)
    assert (second.table["status"] == "ok").all()
    fresh = run_sweep(BOOK, AXES, options, tmp_path / "fresh")
    pd.testing.assert_frame_equal(second.table, fresh.table, check_exact=True)


def test_resume_after_interruption_runs_only_missing_points(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A sweep stopped after 2 points resumes with the other 4 and equals a full run."""
    out = tmp_path / "out"
    options = RunOptions(engine=_exact_engine(), copula=False)
    calls: list[str] = []
    real = sweep_module.evaluate_point

    def counting(book: Book, task: Any) -> Any:
        calls.append(task.key)
        return real(book, task)

    monkeypatch.setattr(sweep_module, "evaluate_point", counting)

    def stop_after_two(record: dict[str, Any]) -> None:
        if len(calls) == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_sweep(BOOK, AXES, options, out, on_point=stop_after_two)
    assert not out.exists()
    assert len(list((partial_dir(out) / "points").glob("*.json"))) == 2
    finished = set(calls)
    calls.clear()
    resumed = run_sweep(BOOK, AXES, options, out, resume=True)
    assert len(calls) == 4 and not finished & set(calls)
    assert (resumed.computed, resumed.reused) == (4, 2)
    fresh = run_sweep(BOOK, AXES, options, tmp_path / "fresh")
    pd.testing.assert_frame_equal(resumed.table, fresh.table, check_exact=True)


def test_resume_refuses_work_of_other_options(tmp_path: Path) -> None:
    """Partial work from another seed or engine is not mixed into a resumed sweep."""
    out = tmp_path / "out"
    options = RunOptions(engine=_exact_engine(), copula=False)

    def stop(record: dict[str, Any]) -> None:
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_sweep(BOOK, AXES, options, out, on_point=stop)
    with pytest.raises(OutputError, match="another book or other engine options"):
        run_sweep(BOOK, AXES, replace(options, seed=options.seed + 1), out, resume=True)
    # without --resume the old work is discarded
    result = run_sweep(BOOK, AXES, replace(options, seed=options.seed + 1), out)
    assert (result.computed, result.reused) == (6, 0)


def test_sweep_refuses_a_foreign_partial_folder(tmp_path: Path) -> None:
    """A folder named like the work folder but not written by debtsim is left alone."""
    out = tmp_path / "out"
    partial_dir(out).mkdir()
    (partial_dir(out) / "notes.txt").write_text("mine")
    with pytest.raises(OutputError, match="not a debtsim sweep"):
        run_sweep(BOOK, AXES, RunOptions(engine=_exact_engine()), out)
    assert (partial_dir(out) / "notes.txt").read_text() == "mine"


def test_local_cluster_gives_the_same_table(tmp_path: Path) -> None:
    """A sweep on a real dask.distributed LocalCluster of 2 workers equals the in-process run."""
    # a mid-size demo book and a seeded sampler: large enough for BLAS sums to be split by
    # thread, and random, so both the seeds and the workers' threading are checked
    book = _load(ROOT / "scenarios" / "grain_coop.yaml")
    axes = (GridAxis("pd_scale", (1.0, 2.0)), GridAxis("contagion_scale", (1.0, 1.5)))
    options = _random_options()
    here = run_sweep(book, axes, options, tmp_path / "here")
    there = run_sweep(book, axes, options, tmp_path / "there", execution=Execution(workers=2))
    assert there.execution == "local Dask cluster of 2 worker processes"
    assert (there.table["status"] == "ok").all(), there.table["error"].tolist()
    pd.testing.assert_frame_equal(here.table, there.table, check_exact=True)


def test_existing_scheduler_gives_the_same_table(tmp_path: Path) -> None:
    """A sweep sent to an existing scheduler by address equals the in-process run."""
    from distributed import LocalCluster

    options = _random_options()
    here = run_sweep(BOOK, AXES, options, tmp_path / "here")
    with LocalCluster(
        n_workers=1,
        processes=False,
        protocol="tcp",
        dashboard_address=None,
        silence_logs=logging.ERROR,
    ) as cluster:
        execution = Execution(scheduler=cluster.scheduler_address)
        there = run_sweep(BOOK, AXES, options, tmp_path / "there", execution=execution)
    assert there.execution.startswith("Dask scheduler at tcp://")
    pd.testing.assert_frame_equal(here.table, there.table, check_exact=True)


# ------------------------------------------------------------------ the CLI
def test_cli_sweep_writes_tables_and_charts(tmp_path: Path, book_file: Path) -> None:
    """`debtsim sweep` with one parameter writes sweep.csv, sweep.parquet and a line chart."""
    out = tmp_path / "out"
    result = CliRunner().invoke(
        app,
        [
            "sweep",
            str(book_file),
            "--grid",
            "lgd_shift=-0.1,0,0.1",
            "--out",
            str(out),
            "--engine",
            _exact_engine(),
            "--level",
            "0.95",
            "-q",
        ],
    )
    assert result.exit_code == 0, result.output
    table = pd.read_csv(out / "sweep.csv")
    assert list(table.columns) == [
        "lgd_shift",
        "expected_loss",
        "loss_std",
        "var_0.95",
        "expected_shortfall_0.95",
        "economic_capital_0.95",
        "status",
        "error",
    ]
    assert list(table["lgd_shift"]) == [-0.1, 0.0, 0.1]
    assert table["expected_loss"].is_monotonic_increasing
    assert (out / "charts" / "measures_vs_lgd_shift.png").is_file()
    assert len(pd.read_parquet(out / "sweep.parquet")) == 3


@pytest.mark.parametrize(
    "args",
    [
        ["--grid", "pd_scale=0,1"],
        ["--grid", "speed=1,2"],
        ["--grid", "pd_scale=1", "--engine", "magic"],
        ["--grid", "pd_scale=1", "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"],
    ],
)
def test_cli_sweep_bad_input_exits_2_and_writes_nothing(
    tmp_path: Path, book_file: Path, args: list[str]
) -> None:
    """Bad --grid values and options exit with status 2, a message, and no folder."""
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["sweep", str(book_file), "--out", str(out), *args])
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output
    assert not out.exists() and not partial_dir(out).exists()


def test_cli_grid_message_format(tmp_path: Path, book_file: Path) -> None:
    """A bad grid value is reported on stderr as '--grid SPEC: NAME: message'."""
    result = CliRunner().invoke(
        app, ["sweep", str(book_file), "--grid", "pd_scale=1,-3", "--out", str(tmp_path / "o")]
    )
    assert result.exit_code == 2
    assert "--grid pd_scale=1,-3: pd_scale: must be greater than 0, got -3" in result.stderr


def test_cli_interrupted_sweep_resumes(
    tmp_path: Path, book_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """An interrupted `debtsim sweep` keeps its points; --resume computes only the rest."""
    out = tmp_path / "out"
    real = sweep_module.evaluate_point
    calls: list[str] = []

    def interrupted_after_three(book: Book, task: Any) -> Any:
        if len(calls) == 3:
            raise KeyboardInterrupt
        calls.append(task.key)
        return real(book, task)

    monkeypatch.setattr(sweep_module, "evaluate_point", interrupted_after_three)
    args = [
        "sweep",
        str(book_file),
        "--grid",
        "pd_scale=1,2,3",
        "--grid",
        "asset_correlation_shift=0,0.1",
        "--out",
        str(out),
        "--engine",
        _exact_engine(),
    ]
    first = CliRunner().invoke(app, args)
    assert first.exit_code == 130
    assert "--resume" in first.stderr
    assert not out.exists()

    def counting(book: Book, task: Any) -> Any:
        calls.append(task.key)
        return real(book, task)

    monkeypatch.setattr(sweep_module, "evaluate_point", counting)
    calls.clear()
    second = CliRunner().invoke(app, [*args, "--resume"])
    assert second.exit_code == 0, second.output
    assert len(calls) == 3
    assert "3 computed" in second.stdout and "3 reused" in second.stdout
    assert len(pd.read_csv(out / "sweep.csv")) == 6
    assert not partial_dir(out).exists()


def test_resume_after_killed_process(tmp_path: Path, book_file: Path) -> None:
    """A sweep process killed with SIGKILL resumes from the points it had saved."""
    out = tmp_path / "out"
    args = [
        sys.executable,
        "-m",
        "debtsim",
        "sweep",
        str(book_file),
        "--grid",
        "pd_scale=" + ",".join(str(1 + i / 10) for i in range(12)),
        "--grid",
        "contagion_scale=0.5,1,1.5",
        "--out",
        str(out),
        "--engine",
        "circuit",
        "-q",
    ]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen(args, env=env, cwd=tmp_path)
    points = partial_dir(out) / "points"
    while proc.poll() is None and len(list(points.glob("*.json"))) < 3:
        time.sleep(0.05)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    kept = len(list(points.glob("*.json")))
    assert 3 <= kept < 36
    resumed = run_sweep(
        _load(book_file),
        parse_grid([args[6], args[8]]),
        RunOptions(engine="circuit", copula=False),
        out,
        resume=True,
    )
    assert (resumed.reused, resumed.computed) == (kept, 36 - kept)


def _load(path: Path) -> Book:
    from debtsim.book.loader import load_book

    return load_book(path)
