"""The command line as a new user meets it: help, errors, warnings, faults and hostile input.

Every check drives the real command through typer's test runner (or a subprocess
where the terminal itself matters) and looks at exit code, stdout, stderr and
the files left behind.
"""

from __future__ import annotations

import errno
import re
import socket
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest
from typer.testing import CliRunner

import debtsim
from debtsim.cli import app
from debtsim.options import DEFAULT_SAMPLES, DEFAULT_SEED
from debtsim.output_files import exclusive_output

ROOT = Path(__file__).resolve().parent.parent
HARBOUR = ROOT / "scenarios" / "harbour_small.yaml"
BANK = ROOT / "scenarios" / "regional_bank.yaml"
DEBTSIM = Path(sys.executable).parent / "debtsim"

MINI = """\
book: Mini
currency: EUR
obligors:
  - {id: A, ead: 100, pd: 0.02, lgd: 0.5, asset_correlation: 0.2}
  - {id: B, ead: 200, pd: 0.01, lgd: 0.4, asset_correlation: 0.1}
  - {id: C, ead: 50, pd: 0.05, lgd: 0.6, asset_correlation: 0.15}
links:
  - {creditor: A, debtor: B, contagion: 0.3}
model:
  factor_qubits: 3
"""


@pytest.fixture
def runner() -> CliRunner:
    return CliRunner()


@pytest.fixture
def mini(tmp_path: Path) -> Path:
    path = tmp_path / "mini.yaml"
    path.write_text(MINI, encoding="utf-8")
    return path


def one_error_line(stderr: str) -> str:
    """The single line a failing command prints on stderr."""
    lines = stderr.splitlines()
    assert len(lines) == 1, stderr
    return lines[0]


def hidden_or_partial(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".") or "partial" in p.name)


# ------------------------------------------------------------------ help
COMMANDS = ["run", "check", "circuit", "stress", "sweep"]


@pytest.mark.parametrize("command", [[], *[[c] for c in COMMANDS]])
def test_help_speaks_plain_words(runner: CliRunner, command: list[str]) -> None:
    """Usage shows BOOK, option types are words (N, DIR), no <bool>, <list[float]>, {book}."""
    result = runner.invoke(app, [*command, "--help"])
    assert result.exit_code == 0
    text = result.stdout
    for bad in ("{book}", "{scenarios}", "<bool>", "<list[", "<int", "<str>", "<path>", "<float"):
        assert bad not in text, (bad, text)
    if command and command[0] != "check":
        assert f"Usage: debtsim {command[0]} [OPTIONS] BOOK" in text


def test_run_help_lists_engines_and_defaults(runner: CliRunner) -> None:
    """--engine names every engine; the defaults of --samples and --seed are shown."""
    text = " ".join(runner.invoke(app, ["run", "--help"]).stdout.split())
    for name in ("auto", "exact", "circuit", "sample"):
        assert name in text
    assert f"(default: {DEFAULT_SAMPLES:,})" in text
    assert f"(default: {DEFAULT_SEED})" in text


def test_version(runner: CliRunner) -> None:
    """--version prints the program and its version."""
    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0
    assert result.stdout.strip() == f"debtsim {debtsim.__version__}"


# ------------------------------------------------------------------ errors, one line each
@pytest.mark.parametrize(
    ("args", "expected"),
    [
        (["--samples", "0"], "error: --samples: must be at least 1, got 0"),
        (["--shots", "0"], "error: --shots: must be at least 1, got 0"),
        (["--seed", "-1"], "error: --seed: must be between 0 and "),
        (["--level", "1.5"], "error: --level: must be between 0 and 1"),
        (["--engine", "magic"], "error: --engine: must be one of auto, exact, circuit, sample"),
        (["--samples", "many"], "error: Invalid value for '--samples'"),
        (["--colour"], "error: No such option: --colour"),
    ],
)
def test_every_error_is_one_line(
    runner: CliRunner, mini: Path, tmp_path: Path, args: list[str], expected: str
) -> None:
    """Bad options give one `error:` line on stderr, exit 2, and write nothing."""
    out = tmp_path / "out"
    result = runner.invoke(app, ["run", str(mini), "--out", str(out), *args])
    assert result.exit_code == 2
    assert one_error_line(result.stderr).startswith(expected)
    assert result.stdout == ""
    assert not out.exists()
    assert hidden_or_partial(tmp_path) == []


def test_missing_argument_is_one_line(runner: CliRunner) -> None:
    """A forgotten BOOK is one line naming it and where the help is."""
    result = runner.invoke(app, ["run"])
    assert result.exit_code == 2
    assert one_error_line(result.stderr) == (
        "error: Missing argument 'BOOK'. (see 'debtsim run --help')"
    )


# ------------------------------------------------------------------ the terminal
def test_model_warning_reaches_stderr(runner: CliRunner, tmp_path: Path) -> None:
    """The circuit's node-error warning is printed as a warning line, not only filed."""
    book = tmp_path / "steep.yaml"
    text = re.sub(
        r"asset_correlation: [0-9.]+",
        "asset_correlation: 0.99",
        HARBOUR.read_text(encoding="utf-8"),
    )
    book.write_text(text, encoding="utf-8")
    result = runner.invoke(
        app, ["run", str(book), "--engine", "circuit", "--out", str(tmp_path / "o"), "-q"]
    )
    assert result.exit_code == 0, result.stderr
    warning = one_error_line(result.stderr)
    assert warning.startswith("warning: The circuit's 32 factor nodes reproduce an obligor's PD")


def test_sampled_figures_carry_standard_errors(runner: CliRunner, tmp_path: Path) -> None:
    """sample and --shots runs print figure ± standard error; exact runs print plain figures."""
    sampled = runner.invoke(
        app,
        [
            "run",
            str(HARBOUR),
            "--engine",
            "sample",
            "--samples",
            "4000",
            "--out",
            str(tmp_path / "s"),
        ],
    )
    lines = sampled.stdout.splitlines()
    el = next(line for line in lines if line.strip().startswith("expected loss"))
    var = [line for line in lines if line.strip().startswith("VaR")]
    assert "±" in el and var and all(line.count("±") == 2 for line in var[:2])
    shots = runner.invoke(
        app,
        [
            "run",
            str(HARBOUR),
            "--engine",
            "circuit",
            "--shots",
            "4000",
            "--out",
            str(tmp_path / "c"),
        ],
    )
    assert shots.exit_code == 0, shots.stderr
    shot_lines = [line for line in shots.stdout.splitlines() if "VaR" in line or "expected" in line]
    assert all("±" in line for line in shot_lines[:3])
    exact = runner.invoke(app, ["run", str(HARBOUR), "--out", str(tmp_path / "e")])
    assert "±" not in exact.stdout


def test_no_stray_output_on_stderr(tmp_path: Path) -> None:
    """A successful run writes nothing at all to a redirected stderr."""
    done = subprocess.run(
        [str(DEBTSIM), "run", str(HARBOUR), "--out", str(tmp_path / "o")],
        capture_output=True,
        text=True,
        cwd=tmp_path,
    )
    assert done.returncode == 0, done.stderr
    assert done.stderr == ""


def test_control_characters_are_escaped_on_screen(runner: CliRunner, tmp_path: Path) -> None:
    """Terminal escapes in book text are shown escaped, in output and in errors."""
    book = tmp_path / "evil.yaml"
    book.write_text(
        MINI.replace("book: Mini", 'book: "Evil\\e[2J\\e]0;owned\\a"').replace(
            "model:", '"x\\e[31m": 1\nmodel:'
        ),
        encoding="utf-8",
    )
    result = runner.invoke(app, ["check", str(book)])
    assert result.exit_code == 2
    assert "\x1b" not in result.stderr and "\\x1b[31m" in result.stderr
    book.write_text(MINI.replace("book: Mini", 'book: "Evil\\e[2J"'), encoding="utf-8")
    for args in (["check", str(book)], ["run", str(book), "--out", str(tmp_path / "o")]):
        shown = runner.invoke(app, args)
        assert shown.exit_code == 0, shown.stderr
        assert "\x1b" not in shown.stdout and "Evil\\x1b[2J" in shown.stdout


# ------------------------------------------------------------------ circuit
def test_circuit_says_whether_the_engine_would_run(runner: CliRunner) -> None:
    """`debtsim circuit BOOK` says whether `run --engine circuit` accepts the book, and why not."""
    small = runner.invoke(app, ["circuit", str(HARBOUR)])
    assert small.exit_code == 0 and "runs on --engine circuit" in small.stdout
    big = runner.invoke(app, ["circuit", str(BANK)])
    assert big.exit_code == 0
    assert "--engine circuit would refuse this book: the circuit needs 3005 qubits" in big.stdout


@pytest.mark.parametrize(
    ("target", "message"),
    [
        ("{tmp}", "error: --qasm: {tmp} is a folder; give the name of a file to write"),
        (
            "{tmp}/missing/c.qasm",
            "error: --qasm: cannot write to {tmp}/missing/c.qasm: the folder {tmp}/missing "
            "does not exist",
        ),
    ],
)
def test_qasm_to_a_folder_or_missing_folder(
    runner: CliRunner, tmp_path: Path, target: str, message: str
) -> None:
    """--qasm to a folder or into a missing folder is one line, before any circuit is built."""
    result = runner.invoke(app, ["circuit", str(HARBOUR), "--qasm", target.format(tmp=tmp_path)])
    assert result.exit_code == 2
    assert one_error_line(result.stderr) == message.format(tmp=tmp_path)
    assert result.stdout == ""


def test_qasm_on_a_read_only_place_leaves_no_temporary_file(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A write refused by the file system is one plain line; no temporary file is left."""
    import debtsim.output_files as output_files

    def read_only(*args: object, **kwargs: object) -> None:
        raise OSError(errno.EROFS, "Read-only file system")

    monkeypatch.setattr(output_files.os, "replace", read_only)
    target = tmp_path / "c.qasm"
    result = runner.invoke(app, ["circuit", str(HARBOUR), "--qasm", str(target)])
    assert result.exit_code == 2
    assert one_error_line(result.stderr) == (
        f"error: --qasm: cannot write to {target}: read-only file system"
    )
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------------ the output folder, early
def test_read_only_out_is_refused_before_computing(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """--out on a read-only place fails at once in plain English; no engine runs."""

    def no_run(*args: object, **kwargs: object) -> None:
        raise AssertionError("computed before checking the output folder")

    def read_only(self: Path, *args: object, **kwargs: object) -> None:
        raise OSError(errno.EROFS, "Read-only file system", str(self))

    monkeypatch.setattr(debtsim, "run", no_run)
    monkeypatch.setattr(debtsim, "sweep", no_run)
    monkeypatch.setattr(Path, "mkdir", read_only)
    out = tmp_path / "ro" / "out"
    for args in (
        ["run", str(HARBOUR), "--out", str(out)],
        ["sweep", str(HARBOUR), "--grid", "pd_scale=1,2", "--out", str(out)],
    ):
        result = runner.invoke(app, args)
        assert result.exit_code == 2, result.stderr
        assert one_error_line(result.stderr) == (
            f"error: cannot write to {out}: read-only file system"
        )


def test_sweep_out_read_only_runs_nothing(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The real sweep path refuses a read-only --out before any point and leaves no .partial."""

    def read_only(self: Path, *args: object, **kwargs: object) -> None:
        raise OSError(errno.EROFS, "Read-only file system", str(self))

    monkeypatch.setattr(Path, "mkdir", read_only)
    result = runner.invoke(
        app, ["sweep", str(HARBOUR), "--grid", "pd_scale=1,2", "--out", str(tmp_path / "o")]
    )
    assert result.exit_code == 2
    assert "read-only file system" in one_error_line(result.stderr)
    assert list(tmp_path.iterdir()) == []


def test_user_files_in_out_are_kept(runner: CliRunner, tmp_path: Path, mini: Path) -> None:
    """Rerunning into a report folder that also holds the user's notes refuses and keeps them."""
    out = tmp_path / "out"
    assert runner.invoke(app, ["run", str(mini), "--out", str(out), "-q"]).exit_code == 0
    (out / "notes.txt").write_text("my notes", encoding="utf-8")
    result = runner.invoke(app, ["run", str(mini), "--out", str(out), "-q"])
    assert result.exit_code == 2
    assert "holds files debtsim did not write (notes.txt)" in one_error_line(result.stderr)
    assert (out / "notes.txt").read_text(encoding="utf-8") == "my notes"


# ------------------------------------------------------------------ environment
def test_long_scenario_name_refused_before_computing(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A 300-character scenario name is a file:line error; nothing is computed."""

    def no_stress(*args: object, **kwargs: object) -> None:
        raise AssertionError("computed before reading the scenario file")

    monkeypatch.setattr(debtsim, "stress", no_stress)
    scenarios = tmp_path / "s.yaml"
    scenarios.write_text("- name: " + "n" * 300 + "\n  pd_scale: 2\n", encoding="utf-8")
    result = runner.invoke(
        app, ["stress", str(HARBOUR), str(scenarios), "--out", str(tmp_path / "o")]
    )
    assert result.exit_code == 2
    assert one_error_line(result.stderr).endswith(
        "s.yaml:1: scenarios[0].name: must be at most 80 characters (it names a folder), got 300"
    )


@pytest.mark.parametrize("address", ["tls://127.0.0.1:8786", "ucx://127.0.0.1:8786", "nowhere"])
def test_scheduler_addresses_debtsim_cannot_use(
    runner: CliRunner, tmp_path: Path, address: str
) -> None:
    """tls://, ucx:// and malformed addresses are one line each, before anything runs."""
    out = tmp_path / "o"
    result = runner.invoke(
        app,
        [
            "sweep",
            str(HARBOUR),
            "--grid",
            "pd_scale=1,2",
            "--scheduler",
            address,
            "--out",
            str(out),
        ],
    )
    assert result.exit_code == 2
    assert one_error_line(result.stderr).startswith("error: --scheduler: ")
    assert list(tmp_path.iterdir()) == []


@pytest.fixture
def silent_scheduler() -> Iterator[str]:
    """A TCP server that accepts connections and never says a word."""
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(16)
    held: list[socket.socket] = []
    stop = threading.Event()

    def serve() -> None:
        server.settimeout(0.2)
        while not stop.is_set():
            try:
                conn, _ = server.accept()
            except OSError:
                continue
            held.append(conn)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    yield f"tcp://127.0.0.1:{server.getsockname()[1]}"
    stop.set()
    thread.join()
    for conn in held:
        conn.close()
    server.close()


def test_silent_scheduler_times_out_and_leaves_nothing(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, silent_scheduler: str
) -> None:
    """A scheduler that accepts and never answers gives a clear timeout and no OUT.partial/."""
    from debtsim.studies import execution

    monkeypatch.setattr(execution, "SCHEDULER_TIMEOUT", 1.0)
    out = tmp_path / "o"
    result = runner.invoke(
        app,
        [
            "sweep",
            str(HARBOUR),
            "--grid",
            "pd_scale=1,2",
            "--scheduler",
            silent_scheduler,
            "--out",
            str(out),
        ],
    )
    assert result.exit_code == 2, result.stderr
    assert one_error_line(result.stderr) == (
        f"error: --scheduler: {silent_scheduler} accepted the connection but did not answer "
        "within 1 s; is a Dask scheduler listening there?"
    )
    assert list(tmp_path.iterdir()) == []


def test_second_sweep_to_one_out_is_refused(runner: CliRunner, tmp_path: Path) -> None:
    """While one sweep holds OUT, a second is refused clearly; afterwards OUT is free."""
    out = tmp_path / "o"
    args = ["sweep", str(HARBOUR), "--grid", "pd_scale=1,2", "--out", str(out), "-q"]
    with exclusive_output(out):
        second = runner.invoke(app, args)
    assert second.exit_code == 2
    assert one_error_line(second.stderr) == (
        f"error: {out}: another debtsim process is writing this folder; wait for it to "
        "finish or choose another --out"
    )
    assert not out.exists() and hidden_or_partial(tmp_path) == []
    assert runner.invoke(app, args).exit_code == 0
    assert hidden_or_partial(tmp_path) == []


def test_lock_is_held_across_processes(tmp_path: Path) -> None:
    """The folder lock is the operating system's: another process sees it held."""
    out = tmp_path / "o"
    probe = (
        "import sys; from debtsim.output_files import exclusive_output\n"
        "from debtsim.errors import OutputError\n"
        "try:\n    with exclusive_output(sys.argv[1]): pass\n"
        "except OutputError: sys.exit(3)\n"
    )
    with exclusive_output(out):
        held = subprocess.run([sys.executable, "-c", probe, str(out)], cwd=ROOT)
    free = subprocess.run([sys.executable, "-c", probe, str(out)], cwd=ROOT)
    assert (held.returncode, free.returncode) == (3, 0)


def test_shots_bounded_by_free_memory(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """--shots beyond what the free memory holds is refused with the limit named."""
    from debtsim.engines.circuit import engine as circuit_engine

    monkeypatch.setattr(circuit_engine, "available_memory", lambda: 64 * 2**20)
    result = runner.invoke(
        app,
        [
            "run",
            str(HARBOUR),
            "--engine",
            "circuit",
            "--shots",
            "1000000000",
            "--out",
            str(tmp_path / "o"),
        ],
    )
    assert result.exit_code == 2
    line = one_error_line(result.stderr)
    assert line.startswith("error: 1,000,000,000 shots would need about 149.0 GB of memory")
    assert "64 MB is free; at most 209,715 shots fit" in line
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------------ Ctrl-C
@pytest.mark.parametrize("command", ["run", "check"])
def test_ctrl_c_says_nothing_was_written(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, mini: Path, command: str
) -> None:
    """Ctrl-C during run or check prints one line and exits 130; nothing is left behind."""
    import debtsim.report as report

    def interrupted(*args: object, **kwargs: object) -> None:
        raise KeyboardInterrupt

    # run: interrupted while writing the report; check: while reading the book
    if command == "run":
        monkeypatch.setattr(report, "write_loss_distribution", interrupted)
    else:
        monkeypatch.setattr(debtsim, "load_book", interrupted)
    out = tmp_path / "out"
    args = [command, str(mini)] + (["--out", str(out)] if command == "run" else [])
    result = runner.invoke(app, args)
    assert result.exit_code == 130
    assert one_error_line(result.stderr) == "interrupted; nothing was written"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mini.yaml"]


def test_ctrl_c_in_a_real_process(tmp_path: Path) -> None:
    """SIGINT to a running `debtsim run` ends it with 130 and the one line."""
    import signal
    import time

    book = tmp_path / "big.yaml"
    book.write_text(
        "obligors: " + str(ROOT / "scenarios" / "regional_bank" / "obligors.csv") + "\n"
    )
    if not (ROOT / "scenarios" / "regional_bank" / "obligors.csv").exists():
        pytest.skip("demo CSV not present")
    proc = subprocess.Popen(
        [
            str(DEBTSIM),
            "run",
            str(book),
            "--engine",
            "sample",
            "--samples",
            "5000000",
            "--out",
            str(tmp_path / "o"),
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=tmp_path,
    )
    time.sleep(8)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert err.strip().splitlines()[-1] == "interrupted; nothing was written"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["big.yaml"]


def test_disk_full_during_a_sweep_is_one_line(
    runner: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A full disk while a sweep saves its points is an error line, not a traceback."""
    from debtsim.studies import sweep as sweep_module

    real = sweep_module._write_json_atomic

    def full(path: Path, data: object) -> None:
        if "points" in str(path):
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        real(path, data)  # type: ignore[arg-type]

    monkeypatch.setattr(sweep_module, "_write_json_atomic", full)
    result = runner.invoke(
        app, ["sweep", str(HARBOUR), "--grid", "pd_scale=1,2", "--out", str(tmp_path / "o")]
    )
    assert result.exit_code == 2
    line = one_error_line(result.stderr)
    assert line.startswith("error: ") and line.endswith(": no space left on the device")
    assert "Traceback" not in result.stderr
    assert list(tmp_path.iterdir()) == []


def test_stress_warnings_name_their_scenario(runner: CliRunner, tmp_path: Path) -> None:
    """A scenario whose run carries a model warning gets a warning line naming it."""
    scenarios = tmp_path / "s.yaml"
    scenarios.write_text("- name: steep\n  asset_correlation_shift: 0.9\n", encoding="utf-8")
    result = runner.invoke(
        app,
        [
            "stress",
            str(HARBOUR),
            str(scenarios),
            "--engine",
            "circuit",
            "-q",
            "--out",
            str(tmp_path / "o"),
        ],
    )
    assert result.exit_code == 0, result.stderr
    assert one_error_line(result.stderr).startswith("warning: steep: The circuit's 32 factor")


def test_stress_table_shows_sampling_errors(runner: CliRunner, tmp_path: Path) -> None:
    """A sampled stress prints each scenario's EL and VaR with ±; an exact one without."""
    scenarios = ROOT / "scenarios" / "harbour_small_stress.yaml"
    sampled = runner.invoke(
        app,
        [
            "stress",
            str(HARBOUR),
            str(scenarios),
            "--engine",
            "sample",
            "--samples",
            "3000",
            "--out",
            str(tmp_path / "s"),
        ],
    )
    assert sampled.exit_code == 0, sampled.stderr
    rows = [line for line in sampled.stdout.splitlines() if line.startswith("  base")]
    assert rows and rows[0].count("±") == 2
    exact = runner.invoke(
        app, ["stress", str(HARBOUR), str(scenarios), "--out", str(tmp_path / "e")]
    )
    assert exact.exit_code == 0 and "±" not in exact.stdout
