"""Engines computing the loss law of a :class:`~debtsim.model.specification.LinkedFactorModel`.

``circuit``: the entangling circuit on Aer's statevector simulator (small books).
``exact``: semi-analytic, conditional on factor nodes, exact per link component.
``sample``: classical cascade sampler with importance sampling in the tail.
``auto``: picks one from the book's size; :func:`choose_engine` says why.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from debtsim.engines.base import Engine, ProgressHook
from debtsim.errors import EngineRefusedError
from debtsim.model.specification import LinkedFactorModel

__all__ = [
    "ENGINE_NAMES",
    "Engine",
    "EngineChoice",
    "EngineSettings",
    "ProgressHook",
    "choose_engine",
    "make_engine",
]

ENGINE_NAMES = ("auto", "exact", "circuit", "sample")

#: Default scenario count of the ``sample`` engine.
DEFAULT_SAMPLES = 200_000
#: Default seed: runs are reproducible unless the user asks for another seed.
DEFAULT_SEED = 20_261_202


@dataclass(frozen=True)
class EngineSettings:
    """Options from the command line that engines may use.

    Attributes
    ----------
    samples : int or None
        Scenario count for ``sample``; None means the engine's default.
    seed : int
        Seed for every random draw.
    shots : int or None
        Measurement shots for ``circuit``; None means the exact statevector law.
    levels : tuple of float
        Confidence levels the user asked for (tail sampling aims at them).
    """

    samples: int | None = None
    seed: int = DEFAULT_SEED
    shots: int | None = None
    levels: Sequence[float] = (0.99, 0.999)


@dataclass(frozen=True)
class EngineChoice:
    """The engine that will run and why it was chosen."""

    engine: Engine
    reason: str


def make_engine(name: str, settings: EngineSettings) -> Engine:
    """Construct the engine called ``name`` (not ``auto``) with ``settings``."""
    if name == "circuit":
        from debtsim.engines.circuit.engine import CircuitEngine

        return CircuitEngine(shots=settings.shots, seed=settings.seed)
    if name == "sample":
        from debtsim.engines.sample.engine import SampleEngine

        return SampleEngine(
            samples=settings.samples or DEFAULT_SAMPLES,
            seed=settings.seed,
            levels=tuple(settings.levels),
        )
    if name == "exact":
        from debtsim.engines.exact.engine import ExactEngine

        return ExactEngine()
    raise ValueError(f"unknown engine {name!r}; expected one of {', '.join(ENGINE_NAMES)}")


def choose_engine(name: str, model: LinkedFactorModel, settings: EngineSettings) -> EngineChoice:
    """Resolve ``name`` (possibly ``auto``) to an engine able to run ``model``.

    ``auto`` takes ``exact`` whenever it applies, then ``circuit`` for books
    whose statevector fits comfortably, else ``sample``.

    Raises
    ------
    EngineRefusedError
        When a named engine cannot run the model; the message says which can.
    """
    if name != "auto":
        engine = make_engine(name, settings)
        reason = engine.refusal(model)
        if reason is not None:
            raise EngineRefusedError(reason)
        return EngineChoice(engine, f"requested with --engine {name}")
    refusals: list[str] = []
    for candidate in ("exact", "circuit", "sample"):
        engine = make_engine(candidate, settings)
        reason = engine.refusal(model)
        if reason is None:
            why = {
                "exact": "auto: exact applies (every link component is small enough to "
                "enumerate), so the law is exact on the factor grid",
                "circuit": "auto: exact does not apply and the statevector fits in memory",
                "sample": "auto: neither exact nor circuit applies; sampling the cascade",
            }[candidate]
            if refusals:
                why += " (" + "; ".join(refusals) + ")"
            return EngineChoice(engine, why)
        refusals.append(f"{candidate}: {reason}")
    raise EngineRefusedError("no engine can run this book: " + "; ".join(refusals))
