"""Engines computing the loss law of a :class:`~debtsim.model.specification.LinkedFactorModel`.

``circuit``: the entangling circuit on Aer's statevector simulator (small books).
``exact``: semi-analytic, conditional on factor nodes, exact per linked group.
``sample``: classical cascade sampler with importance sampling in the tail.
``auto``: picks one from the book's size; :func:`choose_engine` says why.
"""

from __future__ import annotations

from dataclasses import dataclass

from debtsim.engines.base import Engine, ProgressHook
from debtsim.errors import EngineRefusedError
from debtsim.model.specification import LinkedFactorModel
from debtsim.options import DEFAULT_SAMPLES, DEFAULT_SEED, ENGINE_NAMES, RunOptions

__all__ = [
    "DEFAULT_SAMPLES",
    "DEFAULT_SEED",
    "ENGINE_NAMES",
    "Engine",
    "EngineChoice",
    "ProgressHook",
    "choose_engine",
    "make_engine",
]

@dataclass(frozen=True)
class EngineChoice:
    """The engine that will run and why it was chosen."""

    engine: Engine
    reason: str


def make_engine(name: str, options: RunOptions) -> Engine:
    """Construct the engine called ``name`` (not ``auto``) with the run's ``options``."""
    if name == "circuit":
        from debtsim.engines.circuit.engine import CircuitEngine

        return CircuitEngine(shots=options.shots, seed=options.seed, levels=tuple(options.levels))
    if name == "sample":
        from debtsim.engines.sample.engine import SampleEngine

        return SampleEngine(
            samples=options.sample_count,
            seed=options.seed,
            levels=tuple(options.levels),
        )
    if name == "exact":
        from debtsim.engines.exact.engine import ExactEngine

        return ExactEngine()
    raise ValueError(f"unknown engine {name!r}; expected one of {', '.join(ENGINE_NAMES)}")


def choose_engine(name: str, model: LinkedFactorModel, options: RunOptions) -> EngineChoice:
    """Resolve ``name`` (possibly ``auto``) to an engine able to run ``model``.

    ``auto`` takes ``exact`` whenever it applies, then ``circuit`` for books
    whose statevector fits comfortably, else ``sample``.

    Raises
    ------
    EngineRefusedError
        When a named engine cannot run the model; the message says which can.
    """
    if name != "auto":
        engine = make_engine(name, options)
        reason = engine.refusal(model)
        if reason is not None:
            raise EngineRefusedError(reason)
        return EngineChoice(engine, "requested by name")
    refusals: list[str] = []
    for candidate in ("exact", "circuit", "sample"):
        engine = make_engine(candidate, options)
        reason = engine.refusal(model)
        if reason is None:
            why = {
                "exact": "auto: exact applies (every linked group is small enough to "
                "enumerate), so the law is exact on the factor grid",
                "circuit": "auto: exact does not apply and the statevector fits in memory",
                "sample": "auto: neither exact nor circuit applies; sampling the cascade",
            }[candidate]
            if refusals:
                why += " (" + "; ".join(refusals) + ")"
            return EngineChoice(engine, why)
        refusals.append(f"{candidate}: {reason}")
    raise EngineRefusedError("no engine can run this book: " + "; ".join(refusals))
