"""One analysis of a book: choose an engine, compute the law, measure the risk.

Data flows one way: book -> model -> engine -> risk.  Reports are written
elsewhere (:mod:`debtsim.report`) from the :class:`Analysis` this returns.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

from debtsim.book.records import Book
from debtsim.distribution import LossDistribution
from debtsim.engines import DEFAULT_SEED, EngineSettings, ProgressHook, choose_engine
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import RiskMeasures, measures

__all__ = ["DEFAULT_LEVELS", "Analysis", "RunOptions", "analyse"]

DEFAULT_LEVELS: tuple[float, ...] = (0.99, 0.999)

#: Makes a progress hook for a named stage ("model", "copula"); may return None.
ProgressFactory = Callable[[str], ProgressHook | None]


@dataclass(frozen=True)
class RunOptions:
    """What the user asked of a run.

    Attributes
    ----------
    engine : str
        ``auto``, ``exact``, ``circuit`` or ``sample``.
    samples : int or None
        Scenario count for sampling engines.
    seed : int
        Seed for every random draw.
    shots : int or None
        Shots for the circuit engine; None gives its exact statevector law.
    levels : tuple of float
        Confidence levels for VaR, ES and economic capital.
    copula : bool
        Also compute the one-factor Gaussian copula (same book, links removed).
    """

    engine: str = "auto"
    samples: int | None = None
    seed: int = DEFAULT_SEED
    shots: int | None = None
    levels: tuple[float, ...] = DEFAULT_LEVELS
    copula: bool = True

    @property
    def engine_settings(self) -> EngineSettings:
        """The settings engines read."""
        return EngineSettings(
            samples=self.samples, seed=self.seed, shots=self.shots, levels=self.levels
        )


@dataclass(frozen=True, eq=False)
class Analysis:
    """Everything a report needs from one run.

    Attributes
    ----------
    book : Book
    model : LinkedFactorModel
    options : RunOptions
    engine : str
        Name of the engine that ran.
    engine_reason : str
        Why it was chosen.
    distribution : LossDistribution
        Loss law with contagion.
    measures : RiskMeasures
    copula_distribution : LossDistribution or None
        Loss law of the same book without links.
    copula_measures : RiskMeasures or None
    """

    book: Book
    model: LinkedFactorModel
    options: RunOptions
    engine: str
    engine_reason: str
    distribution: LossDistribution
    measures: RiskMeasures
    copula_distribution: LossDistribution | None = None
    copula_measures: RiskMeasures | None = None
    notes: tuple[str, ...] = field(default=())


def _copula_law(
    model: LinkedFactorModel, engine: str, options: RunOptions, progress: ProgressHook | None
) -> LossDistribution:
    """Loss law of the book read without links, computed like the main law.

    The copula uses the same discretisation as the engine that ran, so that
    the difference between the two laws is contagion and nothing else: the
    circuit's Gauss–Hermite nodes for ``circuit`` (computed exactly on those
    nodes), the same sampler and seed for ``sample`` (common random numbers),
    and the exact engine's own grid otherwise.
    """
    plain = model.without_links()
    if engine == "circuit":
        from debtsim.engines.exact.engine import ExactEngine
        from debtsim.model.factor_grid import gauss_hermite

        exact_on_nodes = ExactEngine(factor_grid=gauss_hermite(2**model.factor_qubits))
        return exact_on_nodes.run(plain, progress=progress)
    choice = choose_engine(engine, plain, options.engine_settings)
    return choice.engine.run(plain, progress=progress)


def analyse(
    book: Book,
    options: RunOptions | None = None,
    progress: ProgressFactory | None = None,
) -> Analysis:
    """Run the model of ``book`` and measure its risk.

    Parameters
    ----------
    book : Book
        A validated book.
    options : RunOptions, optional
        Engine, samples, seed, levels; defaults when omitted.
    progress : callable, optional
        ``progress(stage)`` returns a hook the engine reports progress to.

    Returns
    -------
    Analysis

    Raises
    ------
    EngineRefusedError
        When the requested engine cannot run the book.
    """
    options = options or RunOptions()
    model = LinkedFactorModel.from_book(book)
    choice = choose_engine(options.engine, model, options.engine_settings)
    hook = progress("model") if progress else None
    dist = choice.engine.run(model, progress=hook)
    result_measures = measures(dist, options.levels)
    copula_dist = copula_measures = None
    if options.copula:
        copula_dist = _copula_law(
            model, choice.engine.name, options, progress("copula") if progress else None
        )
        copula_measures = measures(copula_dist, options.levels)
    return Analysis(
        notes=_notes(dist),
        book=book,
        model=model,
        options=options,
        engine=choice.engine.name,
        engine_reason=choice.reason,
        distribution=dist,
        measures=result_measures,
        copula_distribution=copula_dist,
        copula_measures=copula_measures,
    )


#: Above this relative PD error of the circuit's factor nodes, the run carries a note.
NODE_ERROR_NOTE = 0.01


def _notes(dist: LossDistribution) -> tuple[str, ...]:
    """Warnings for the reader that the law's own diagnostics call for."""
    notes = []
    node_error = float(dist.diagnostics.get("factor_node_pd_error", 0.0))
    if node_error > NODE_ERROR_NOTE:
        nodes = dist.settings.get("factor_nodes", "its")
        notes.append(
            f"The circuit's {nodes} factor nodes reproduce an obligor's PD only to within "
            f"{node_error:.1%} (high asset correlation makes the conditional PD nearly a step); "
            "raise model.factor_qubits or use the exact engine, which places its nodes where "
            "the conditional law moves."
        )
    return tuple(notes)


def levels_from(values: Sequence[float] | None) -> tuple[float, ...]:
    """Sorted unique confidence levels, or the defaults when none are given."""
    if not values:
        return DEFAULT_LEVELS
    return tuple(sorted({float(v) for v in values}))
