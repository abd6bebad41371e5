"""The ``circuit`` engine: the model as an entangling circuit, run on Aer's statevector."""

from debtsim.engines.circuit.engine import CircuitEngine

__all__ = ["CircuitEngine"]
