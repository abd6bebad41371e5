"""Run an engine and allocate its risk to the obligors, whichever engine it is."""

from __future__ import annotations

from collections.abc import Sequence

from debtsim.contributions import Allocation, allocate
from debtsim.distribution import LossDistribution
from debtsim.engines.base import Engine, ProgressHook
from debtsim.model.specification import LinkedFactorModel

__all__ = ["run_with_contributions"]


def run_with_contributions(
    engine: Engine,
    model: LinkedFactorModel,
    levels: Sequence[float],
    *,
    progress: ProgressHook | None = None,
) -> tuple[LossDistribution, Allocation | None]:
    """Compute the loss law of ``model`` and every obligor's risk contributions.

    ``exact`` and shot-free ``circuit`` are exact on their factor nodes;
    ``sample`` estimates from its scenarios with batch-means standard errors.
    Models with sector factors or Student-t dependence get the law and no
    allocation (None): the moments condition on one Gaussian factor only.

    Raises
    ------
    ValueError
        For an engine without contributions (the circuit with shots).
    """
    from debtsim.engines.circuit.engine import CircuitEngine
    from debtsim.engines.exact.engine import ExactEngine
    from debtsim.engines.sample.engine import SampleEngine

    if model.dependence is not None:
        return engine.run(model, progress=progress), None
    if isinstance(engine, SampleEngine):
        from debtsim.engines.sample.contributions import sample_contributions

        return sample_contributions(engine, model, levels, progress=progress)
    if isinstance(engine, ExactEngine):
        from debtsim.engines.exact.contributions import NodeLawStore, exact_moments

        store = NodeLawStore()
        engine.node_law_sink = store
        try:
            dist = engine.run(model, progress=progress)
        finally:
            engine.node_law_sink = None
        return dist, allocate(exact_moments(engine, model, dist, levels, node_laws=store))
    dist = engine.run(model, progress=progress)
    if isinstance(engine, CircuitEngine) and engine.shots is None:
        from debtsim.engines.circuit.contributions import circuit_moments

        return dist, allocate(circuit_moments(engine, model, dist, levels))
    raise ValueError(f"the {engine.name} engine does not compute risk contributions")
