"""The ``exact`` engine: the loss distribution conditional on a tail-dense factor grid."""

from debtsim.engines.exact.engine import ExactEngine

__all__ = ["ExactEngine"]
