"""The ``summary.json`` object of a run, and the rows of ``obligors.csv``."""

from __future__ import annotations

from typing import Any

from debtsim.contributions import contribution_summary
from debtsim.link_effects import contagion_effect, rank_links
from debtsim.output_files import GENERATOR_KEY, generator
from debtsim.report.run_view import RunView
from debtsim.report.text import CAUTION
from debtsim.risk import level_key

__all__ = [
    "CAUTION",
    "SUMMARY_LINKS",
    "summary_dict",
]

#: Links listed in ``summary.json`` under ``contagion.most_contagious_links``.
SUMMARY_LINKS = 10

#: Per-obligor diagnostics: written as a column of ``obligors.csv``, not into ``summary.json``.
PER_OBLIGOR_DIAGNOSTICS = ("default_probability_standard_error",)


def _book_level(diagnostics: Any) -> dict[str, Any]:
    """Diagnostics without the per-obligor arrays (those go to ``obligors.csv``)."""
    return {k: v for k, v in dict(diagnostics).items() if k not in PER_OBLIGOR_DIAGNOSTICS}


def summary_dict(analysis: RunView) -> dict[str, Any]:
    """Build the ``summary.json`` object of a run.

    Parameters
    ----------
    analysis : RunView
        The finished run.

    Returns
    -------
    dict
        The contract keys of ``shared/DESIGN.md`` in its order (``book``,
        ``currency``, ``engine``, ``obligors``, ``links``, ``seed``,
        ``samples``, ``total_exposure``, ``measures``, ``copula``) followed by
        extras: ``generator`` (``"debtsim <version>"``, marks the folder as
        replaceable), ``levels``, ``engine_reason``, ``engine_settings``,
        ``diagnostics``, ``contagion`` and ``caution``.  ``copula`` is None
        when the copula was not computed.  Values are plain Python (no numpy).

    Notes
    -----
    ``seed`` is the seed the engine used, None when its law involves no
    randomness; ``samples`` is None for exact laws.

    """
    book = analysis.book
    dist = analysis.loss_distribution
    copula: dict[str, Any] | None = None
    if analysis.copula_distribution is not None and analysis.copula_measures is not None:
        cd = analysis.copula_distribution
        copula = {
            "samples": cd.samples,
            "measures": analysis.copula_measures.to_dict(),
            "engine": cd.engine,
            "seed": cd.seed,
            "engine_settings": dict(cd.settings),
            "diagnostics": _book_level(cd.diagnostics),
        }
    effect = contagion_effect(analysis.measures, analysis.copula_measures)
    links = [
        {
            "creditor": t.creditor,
            "debtor": t.debtor,
            "contagion": t.contagion,
            "amount": t.amount,
            "debtor_default_probability": t.debtor_default_probability,
            "transmitted_loss": t.transmitted_loss,
        }
        for t in rank_links(book, dist.default_probability, top=SUMMARY_LINKS)
    ]
    return {
        "book": book.name,
        "currency": book.currency,
        "engine": analysis.engine,
        "obligors": len(book.obligors),
        "links": len(book.links),
        "seed": dist.seed,
        "samples": dist.samples,
        "total_exposure": book.total_exposure,
        "measures": analysis.measures.to_dict(),
        "copula": copula,
        GENERATOR_KEY: generator(),
        "levels": [level_key(a) for a in analysis.options.levels],
        "engine_reason": analysis.engine_reason,
        "engine_settings": dict(dist.settings),
        "diagnostics": _book_level(dist.diagnostics),
        "notes": list(analysis.notes),
        "contagion": {
            **effect,
            "most_contagious_links": links,
            "link_indicator": "contagion * debtor PD with contagion * (1 - creditor PD) "
            "* creditor EAD * creditor LGD (first-order expected loss carried by the link)",
        },
        "contributions": _contributions_block(analysis),
        "book_source": book.source,
        "caution": CAUTION,
    }


def _contributions_block(analysis: RunView) -> dict[str, Any] | None:
    """Totals, contagion share, HHI and IRB total of the run's risk contributions."""
    allocation = analysis.allocation
    if allocation is None:
        return None
    groups = [c.tolist() for c in analysis.model.components if c.size > 1]
    return contribution_summary(analysis.book, allocation, groups)
