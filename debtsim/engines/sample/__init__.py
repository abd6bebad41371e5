"""The ``sample`` engine: cascade Monte Carlo with importance sampling in the tail."""

from debtsim.engines.sample.engine import SampleEngine

__all__ = ["SampleEngine"]
