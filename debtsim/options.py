"""What a user asks of a run: engine, scenario count, seed, shots, levels.

One frozen :class:`RunOptions` travels from the CLI or a script through the
run step into the engines; it is checked once, when it is built.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field

from debtsim.errors import OptionError

__all__ = [
    "DEFAULT_LEVELS",
    "DEFAULT_SAMPLES",
    "DEFAULT_SEED",
    "ENGINE_NAMES",
    "RunOptions",
    "validate_level",
    "validate_levels",
]

#: Engine names accepted by ``--engine`` and :func:`debtsim.run`.
ENGINE_NAMES: tuple[str, ...] = ("auto", "exact", "circuit", "sample")
#: Confidence levels of VaR, ES and economic capital when none are given.
DEFAULT_LEVELS: tuple[float, ...] = (0.99, 0.999)
#: Default scenario count of the ``sample`` engine.
DEFAULT_SAMPLES = 200_000
#: Default seed: runs are reproducible unless the user asks for another seed.
DEFAULT_SEED = 20_261_202
#: Largest seed accepted (numpy's SeedSequence takes any non-negative int; this
#: keeps seeds printable and portable).
MAX_SEED = 2**63 - 1


def validate_level(level: float, *, name: str = "level") -> float:
    """Return ``level`` as a float after checking ``0 < level < 1``.

    Raises
    ------
    OptionError
        When the level is not a finite number strictly between 0 and 1.
    """
    try:
        value = float(level)
    except (TypeError, ValueError):
        raise OptionError(name, f"must be a number between 0 and 1, got {level!r}") from None
    if not (math.isfinite(value) and 0.0 < value < 1.0):
        raise OptionError(name, f"must be between 0 and 1 (exclusive), got {level}")
    return value


def validate_levels(levels: Iterable[float] | None, *, name: str = "level") -> tuple[float, ...]:
    """Sorted distinct confidence levels; :data:`DEFAULT_LEVELS` when ``levels`` is None.

    Raises
    ------
    OptionError
        When ``levels`` is not a collection of numbers, is empty, or holds a
        level not strictly between 0 and 1.
    """
    if levels is None:
        return DEFAULT_LEVELS
    if isinstance(levels, (str, bytes)) or not isinstance(levels, Iterable):
        raise OptionError(name, f"must be a list of levels such as (0.99, 0.999), got {levels!r}")
    values = [validate_level(a, name=name) for a in levels]
    if not values:
        raise OptionError(name, "give at least one confidence level, e.g. (0.99, 0.999)")
    return tuple(sorted(set(values)))


def _positive(name: str, value: int | None) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int):
        raise OptionError(name, f"must be a whole number, got {value!r}")
    if value < 1:
        raise OptionError(name, f"must be at least 1, got {value}")
    return value


@dataclass(frozen=True)
class RunOptions:
    """What the user asked of a run; checked when built.

    Attributes
    ----------
    engine : str
        ``auto``, ``exact``, ``circuit`` or ``sample``.
    samples : int or None
        Scenario count of the ``sample`` engine; None means
        :data:`DEFAULT_SAMPLES`.
    seed : int
        Seed of every random draw (non-negative).
    shots : int or None
        Measurement shots of the ``circuit`` engine; None gives its exact
        statevector distribution.
    levels : tuple of float
        Confidence levels of VaR, ES and economic capital, sorted.
    copula : bool
        Also compute the same book without links (Gaussian copula).
    contributions : bool
        Also allocate the risk to the obligors (Euler contributions); not
        available for the circuit engine with shots.

    Raises
    ------
    OptionError
        When a value is out of range; the message names the option.
    """

    engine: str = "auto"
    samples: int | None = None
    seed: int = DEFAULT_SEED
    shots: int | None = None
    levels: tuple[float, ...] = field(default=DEFAULT_LEVELS)
    copula: bool = True
    contributions: bool = True

    def __post_init__(self) -> None:
        if self.engine not in ENGINE_NAMES:
            raise OptionError(
                "engine", f"must be one of {', '.join(ENGINE_NAMES)}, got {self.engine!r}"
            )
        _positive("samples", self.samples)
        _positive("shots", self.shots)
        if isinstance(self.seed, bool) or not isinstance(self.seed, int):
            raise OptionError("seed", f"must be a whole number, got {self.seed!r}")
        if not 0 <= self.seed <= MAX_SEED:
            raise OptionError("seed", f"must be between 0 and {MAX_SEED}, got {self.seed}")
        object.__setattr__(self, "levels", validate_levels(self.levels, name="levels"))

    @property
    def sample_count(self) -> int:
        """Scenario count the ``sample`` engine draws."""
        return self.samples if self.samples is not None else DEFAULT_SAMPLES
