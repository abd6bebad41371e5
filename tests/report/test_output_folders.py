"""Output folders: never delete what debtsim did not write, survive a kill, plain errors."""

from __future__ import annotations

import csv
import errno
import io
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from debtsim import output_files
from debtsim.book.records import Book, Link, Obligor
from debtsim.errors import OutputError
from debtsim.output_files import (
    atomic_output_dir,
    check_output_dir,
    clean_leftovers,
    exchange_paths,
    neutralise_text_cell,
    write_csv,
)
from debtsim.report import OUTPUT_FILES, write_run
from tests.report.test_report import make_analysis

ROOT = Path(__file__).resolve().parents[2]


def hidden(folder: Path) -> list[str]:
    """Hidden entries of ``folder``."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def book_name(out: Path) -> str:
    """The book name a report folder's summary records."""
    return str(json.loads((out / "summary.json").read_text(encoding="utf-8"))["book"])


# ------------------------------------------------------------ user files are kept
@pytest.mark.parametrize("intruder", ["notes.txt", "book.yaml", "charts/mine.svg", "extra/"])
def test_folder_with_user_files_is_refused_and_kept(tmp_path: Path, intruder: str) -> None:
    """A report folder that also holds a user's file is not replaced; the file survives."""
    out = tmp_path / "out"
    write_run(make_analysis(), out)
    target = out / intruder.rstrip("/")
    target.parent.mkdir(exist_ok=True)
    if intruder.endswith("/"):
        target.mkdir()
    else:
        target.write_text("mine", encoding="utf-8")
    with pytest.raises(OutputError) as info:
        check_output_dir(out)
    assert "holds files debtsim did not write (" + intruder in str(info.value)
    assert "move them or choose another --out" in str(info.value)
    with pytest.raises(OutputError):
        write_run(make_analysis(book=Book("Second", "EUR", (Obligor("A", 1, 0.1, 0.5, 0.1),))), out)
    assert target.exists()
    assert book_name(out) != "Second"
    assert hidden(tmp_path) == []


def test_pure_report_folder_is_replaced(tmp_path: Path) -> None:
    """A folder holding only a previous report is replaced, and nothing is left beside it."""
    out = tmp_path / "out"
    write_run(make_analysis(), out)
    second = make_analysis(book=Book("Second", "EUR", (Obligor("A", 1, 0.1, 0.5, 0.1),)))
    write_run(second, out)
    assert book_name(out) == "Second"
    assert sorted(p.name for p in out.iterdir()) == sorted(OUTPUT_FILES)
    assert hidden(tmp_path) == []


# ------------------------------------------------------------ killed at any instant
KILLER = textwrap.dedent(
    """
    import os, signal, sys
    from pathlib import Path
    sys.path.insert(0, {root!r})
    from debtsim import output_files
    from debtsim.book.records import Book, Obligor
    from debtsim.report import write_run
    from tests.report.test_report import make_analysis

    mode = sys.argv[1]
    real_exchange = output_files.exchange_paths
    real_rename = os.rename

    def exchange_then_die(a, b):
        assert real_exchange(a, b)
        os.kill(os.getpid(), signal.SIGKILL)

    renames = []
    def rename_then_die(a, b):
        real_rename(a, b)
        renames.append(a)
        if len(renames) == 1:  # the previous report moved aside, the new one not yet in
            os.kill(os.getpid(), signal.SIGKILL)

    if mode == "exchange":
        output_files.exchange_paths = exchange_then_die
    else:
        output_files.exchange_paths = lambda a, b: False
        output_files.os.rename = rename_then_die
    write_run(make_analysis(book=Book("Second", "EUR", (Obligor("A", 1, 0.1, 0.5, 0.1),))),
              Path(sys.argv[2]))
    """
)


def _kill_during_replace(tmp_path: Path, mode: str) -> Path:
    out = tmp_path / "out"
    write_run(make_analysis(), out)
    script = tmp_path / "killer.py"
    script.write_text(KILLER.format(root=str(ROOT)), encoding="utf-8")
    done = subprocess.run(
        [sys.executable, str(script), mode, str(out)], cwd=ROOT, capture_output=True, text=True
    )
    assert done.returncode == -9, done.stderr
    return out


def test_kill_right_after_the_exchange_leaves_the_new_report(tmp_path: Path) -> None:
    """Killed once the folders are swapped: the new report is in place; the next run tidies."""
    if not exchange_paths_supported(tmp_path):
        pytest.skip("this file system cannot exchange two folders")
    out = _kill_during_replace(tmp_path, "exchange")
    assert book_name(out) == "Second"
    (leftover,) = hidden(tmp_path)  # the previous report, not yet deleted
    assert leftover.startswith(".out.tmp-")
    write_run(make_analysis(), out)
    assert hidden(tmp_path) == []


def test_kill_between_two_renames_is_repaired_by_the_next_run(tmp_path: Path) -> None:
    """Where folders cannot be exchanged, a kill between the renames is undone next time."""
    out = _kill_during_replace(tmp_path, "renames")
    assert not out.exists()
    assert any(name.startswith(".out.old-") for name in hidden(tmp_path))
    assert clean_leftovers(out)  # the half-written new report is removed ...
    assert book_name(out) != "Second"  # ... and the previous report is back
    assert hidden(tmp_path) == []


def exchange_paths_supported(tmp_path: Path) -> bool:
    """Whether this system swaps two folders in one step (Linux renameat2)."""
    a, b = tmp_path / "xa", tmp_path / "xb"
    a.mkdir()
    b.mkdir()
    (a / "f").write_text("a", encoding="utf-8")
    swapped = exchange_paths(a, b)
    if swapped:
        assert (b / "f").exists() and not (a / "f").exists()
    for folder in (a, b):
        for f in folder.iterdir():
            f.unlink()
        folder.rmdir()
    return swapped


def test_exchange_is_used_on_linux(tmp_path: Path) -> None:
    """On Linux the atomic exchange is available (so a kill leaves old or new, never neither)."""
    if not sys.platform.startswith("linux"):  # pragma: no cover
        pytest.skip("Linux only")
    assert exchange_paths_supported(tmp_path)


def test_leftovers_of_live_processes_are_kept(tmp_path: Path) -> None:
    """Hidden folders of a run still going (this process) are not cleaned away."""
    out = tmp_path / "out"
    mine = tmp_path / f".out.tmp-{os.getpid()}-0123abcd"
    mine.mkdir()
    dead = tmp_path / ".out.tmp-999999999-0123abcd"
    dead.mkdir()
    other = tmp_path / ".elsewhere.tmp-999999999-0123abcd"
    other.mkdir()
    assert clean_leftovers(out) == [dead]
    assert mine.exists() and other.exists()


# ------------------------------------------------------------ plain errors, checked early
def _fail_mkdir(code: int) -> object:
    def mkdir(self: Path, *args: object, **kwargs: object) -> None:
        raise OSError(code, os.strerror(code), str(self))

    return mkdir


@pytest.mark.parametrize(
    ("code", "reason"),
    [
        (errno.EROFS, "read-only file system"),
        (errno.EACCES, "permission denied"),
        (errno.ENOSPC, "no space left on the device"),
    ],
)
def test_unwritable_place_is_refused_in_plain_words(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, code: int, reason: str
) -> None:
    """check_output_dir tries the place and names the reason, never an errno."""
    monkeypatch.setattr(Path, "mkdir", _fail_mkdir(code))
    out = tmp_path / "reports" / "x"
    with pytest.raises(OutputError) as info:
        check_output_dir(out)
    assert str(info.value) == f"cannot write to {out}: {reason}"
    assert "Errno" not in str(info.value)


def test_mount_point_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A mount point cannot be replaced as a whole: say so instead of 'resource busy'."""
    out = tmp_path / "mnt"
    out.mkdir()
    monkeypatch.setattr(output_files.os.path, "ismount", lambda p: Path(p) == out)
    with pytest.raises(OutputError, match="is a mount point.*choose a folder inside it"):
        check_output_dir(out)


def test_disk_full_while_writing_is_an_output_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A full disk while writing leaves the previous report and no temporary folder."""
    out = tmp_path / "out"
    write_run(make_analysis(), out)
    before = book_name(out)

    def full(*args: object, **kwargs: object) -> None:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr("debtsim.report.write_loss_distribution", full)
    with pytest.raises(OutputError) as info:
        write_run(make_analysis(book=Book("Second", "EUR", (Obligor("A", 1, 0.1, 0.5, 0.1),))), out)
    assert str(info.value) == f"cannot write to {out}: no space left on the device"
    assert book_name(out) == before
    assert hidden(tmp_path) == []


def test_block_errors_other_than_os_errors_propagate(tmp_path: Path) -> None:
    """Only operating-system errors are translated; nothing is left behind either way."""
    with pytest.raises(KeyError), atomic_output_dir(tmp_path / "out") as tmp:
        (tmp / "summary.json").write_text("{}")
        raise KeyError("x")
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------ spreadsheet-safe CSV
@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ('=HYPERLINK("http://x")', '\'=HYPERLINK("http://x")'),
        ("+SUM(A1)", "'+SUM(A1)"),
        ("-2+3+cmd|' /C calc'!A0", "'-2+3+cmd|' /C calc'!A0"),
        ("@SUM(A1)", "'@SUM(A1)"),
        ("\tx", "'\tx"),
        ("\rx", "'\rx"),
        ("-5", "-5"),
        ("+1e3", "+1e3"),
        ("Harbour Tugs", "Harbour Tugs"),
        ("", ""),
    ],
)
def test_formula_cells_are_neutralised(text: str, expected: str) -> None:
    """Cells that would start a formula get an apostrophe; plain numbers and text do not."""
    assert neutralise_text_cell(text) == expected


def test_csv_rows_keep_their_width(tmp_path: Path) -> None:
    """Carriage returns, line feeds, quotes and commas in text are quoted; rows stay whole."""
    names = ["plain", "two\nlines", "carriage\rreturn", 'say "hi", then', "=1+1", " padded "]
    path = tmp_path / "t.csv"
    write_csv(path, ["id", "name", "value"], [[f"o{i}", n, 1.5] for i, n in enumerate(names)])
    with open(path, encoding="utf-8", newline="") as fh:
        rows = list(csv.reader(fh))
    assert [len(r) for r in rows] == [3] * (len(names) + 1)
    assert [r[1] for r in rows[1:]] == [
        "plain",
        "two\nlines",
        "carriage\rreturn",
        'say "hi", then',
        "'=1+1",
        " padded ",
    ]
    # a reader that splits on any line break first (a spreadsheet's import) sees whole rows too
    import pandas as pd

    frame = pd.read_csv(io.StringIO(path.read_text(encoding="utf-8")))
    assert len(frame) == len(names)


def test_obligors_csv_neutralises_book_text(tmp_path: Path) -> None:
    """Book text reaching obligors.csv is neutralised and quoted."""
    book = Book(
        "Hostile",
        "EUR",
        (
            Obligor("A", 100.0, 0.02, 0.5, 0.2, name="=cmd|' /C calc'!A0"),
            Obligor("B", 200.0, 0.01, 0.4, 0.1, name="line\rbreak", sector="@risk"),
        ),
        (Link("A", "B", 0.3),),
    )
    out = tmp_path / "out"
    write_run(make_analysis(book=book), out)
    with open(out / "obligors.csv", encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["name"] for r in rows] == ["'=cmd|' /C calc'!A0", "line\rbreak"]
    assert rows[1]["sector"] == "'@risk"


def test_every_file_a_run_writes_is_known_as_ours() -> None:
    """The files of a run are all in OWN_FILES, so a rerun replaces its own report."""
    from debtsim.output_files import OWN_FILES

    assert set(OUTPUT_FILES) <= OWN_FILES
