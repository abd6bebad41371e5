"""Everything a run writes: ``summary.json``, the CSV files and ``report.html``.

The report layer writes files and computes nothing: every number comes from
the :class:`~debtsim.runner.RunResult` (and the read-outs of
:mod:`debtsim.link_effects`).  Output folders are written atomically by
:func:`atomic_output_dir`, which other writers (stress, sweep) reuse.
"""

from __future__ import annotations

import datetime as _dt
from pathlib import Path

from debtsim.output_files import (
    GENERATOR_KEY,
    MARKER_FILE,
    atomic_output_dir,
    check_output_dir,
    is_replaceable_output,
    write_csv,
    write_json,
    write_loss_distribution,
)
from debtsim.report.run_view import RunView
from debtsim.report.summary import summary_dict
from debtsim.report.text import CAUTION

__all__ = [
    "CAUTION",
    "GENERATOR_KEY",
    "MARKER_FILE",
    "OUTPUT_FILES",
    "atomic_output_dir",
    "check_output_dir",
    "is_replaceable_output",
    "summary_dict",
    "write_run",
]

#: Files every run writes, in the order they are written.
OUTPUT_FILES = (
    "summary.json",
    "loss_distribution.csv",
    "obligors.csv",
    "contributions.csv",
    "sectors.csv",
    "report.html",
)


def write_run(
    analysis: RunView, out_dir: Path | str, *, created: _dt.datetime | None = None
) -> Path:
    """Write the outputs of a run into ``out_dir``, atomically.

    Parameters
    ----------
    analysis : RunView
        The finished run.
    out_dir : Path or str
        Output folder.  An existing folder is replaced only when it is a
        previous debtsim output (or empty).
    created : datetime, optional
        Time stamp shown in the page; now (UTC) when omitted.

    Returns
    -------
    Path
        ``out_dir``, now holding ``summary.json``, ``loss_distribution.csv``,
        ``obligors.csv``, ``contributions.csv`` and ``sectors.csv`` (when the
        run allocated its risk) and ``report.html``.

    Raises
    ------
    OutputError
        When ``out_dir`` exists and is not a debtsim output, or cannot be
        written.  Nothing at ``out_dir`` is changed then.

    """
    from debtsim.report.html import render_html  # matplotlib is only needed here

    out_dir = check_output_dir(out_dir)
    summary = summary_dict(analysis)
    page = render_html(analysis, created)
    dist = analysis.loss_distribution
    with atomic_output_dir(out_dir) as tmp:
        write_json(tmp / "summary.json", summary)
        write_loss_distribution(tmp / "loss_distribution.csv", dist.losses, dist.probabilities)
        table = analysis.obligors
        write_csv(tmp / "obligors.csv", list(table.columns), table.itertuples(index=False))
        for name, frame in (("contributions.csv", analysis.contributions),
                            ("sectors.csv", analysis.sector_contributions)):
            if frame is not None:
                write_csv(tmp / name, list(frame.columns), frame.itertuples(index=False))
        (tmp / "report.html").write_text(page, encoding="utf-8")
    return out_dir
