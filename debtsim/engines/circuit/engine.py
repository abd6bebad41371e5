"""The ``circuit`` engine: the model's circuit on Aer's statevector simulator.

Without shots the law is exact for the discretised factor: the simulator's
probabilities of the obligor register (factor register summed out) give the
probability of every default pattern, and each pattern's loss is the sum of
``EAD * LGD`` over its defaulted obligors.  With shots, the obligor register is
measured that many times with the given seed.
"""

from __future__ import annotations

import math
import secrets
from typing import Any

import numpy as np
import pandas as pd
from qiskit_aer import AerSimulator

from debtsim._typing import FloatArray
from debtsim.distribution import LossDistribution
from debtsim.engines.base import Engine, ProgressHook
from debtsim.engines.circuit.builder import (
    build_circuit,
    circuit_problem,
    factor_grid_for,
    factor_qubits_of,
)
from debtsim.errors import DebtsimError, EngineRefusedError
from debtsim.model.factor_grid import FactorGrid
from debtsim.model.specification import LinkedFactorModel
from debtsim.resources import available_memory, bytes_text
from debtsim.risk import level_key, weighted_sample_measures

__all__ = ["DEFAULT_MAX_QUBITS", "MAX_OBLIGORS", "CircuitEngine", "statevector_bytes"]


#: Largest circuit (factor plus obligor qubits) the engine accepts.  Measured on
#: a 2-core machine shared with other jobs (benchmarks/bench_circuit.py): 28
#: qubits (23 obligors, 5 factor qubits) in 52-73 s, 4.5 GiB peak memory
#: (4 GiB statevector); 29 qubits took 152 s and 8.7 GiB.
DEFAULT_MAX_QUBITS = 28

#: Most obligors the engine accepts, whatever the qubit budget: the exact law is
#: read from ``2**n`` default patterns.  Measured: 27 obligors with 1 factor
#: qubit (28 qubits) took 190 s with few distinct losses and 440 s with 114
#: million distinct ones (12 GiB peak) on a busy 2-core machine.
MAX_OBLIGORS = 24


def statevector_bytes(qubits: int) -> int:
    """Memory of a double-precision statevector: 16 bytes per amplitude."""
    return 16 * 2**qubits


def _bytes_text(n: int) -> str:
    """``n`` bytes in binary units, e.g. ``2.0 GiB``; past 1024 EiB as a power of two."""
    if n >= 1024**7:  # thousands of qubits: float(n) would overflow
        return f"2^{math.log2(n):.0f} B"
    value = float(n)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB", "PiB", "EiB"):
        if value < 1024.0 or unit == "EiB":
            return f"{value:.1f} {unit}" if unit != "B" else f"{int(value)} B"
        value /= 1024.0
    raise AssertionError("unreachable")


def _pattern_losses(loss_each: FloatArray) -> FloatArray:
    """Loss of every default pattern; pattern bit ``i`` is obligor ``i``."""
    out = np.zeros(1)
    for x in loss_each.tolist():
        out = np.concatenate((out, out + x))
    return out


#: Patterns aggregated at a time when turning the statevector law into a loss law.
_CHUNK_BITS = 22


def _loss_atoms(probs: FloatArray, loss_each: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Loss atoms of a law over default patterns, equal losses summed.

    Patterns are taken ``2**_CHUNK_BITS`` at a time (low bits vary inside a
    chunk); inside a chunk equal losses are merged by hashing, which is far
    cheaper than sorting when many patterns share a loss.
    """
    n = loss_each.size
    low_bits = min(n, _CHUNK_BITS)
    low = _pattern_losses(loss_each[:low_bits])
    high = _pattern_losses(loss_each[low_bits:])
    blocks = probs.reshape(high.size, low.size)
    losses: list[FloatArray] = []
    weights: list[FloatArray] = []
    for j in range(high.size):
        p = blocks[j]
        keep = p > 0.0
        codes, uniq = pd.factorize(low[keep] + high[j])
        losses.append(np.asarray(uniq, dtype=float))
        weights.append(np.bincount(codes, weights=p[keep], minlength=len(uniq)).astype(float))
    return np.concatenate(losses), np.concatenate(weights)


def _bit_marginals(probs: FloatArray, n: int) -> FloatArray:
    """``P(bit i = 1)`` of a law over ``2**n`` little-endian patterns."""
    return np.array([probs.reshape(-1, 2, 2**i)[:, 1, :].sum() for i in range(n)])


def _checked(result: Any) -> Any:
    """Return an Aer run's result, or raise a DebtsimError with the simulator's status."""
    if not result.success:
        raise DebtsimError(f"circuit engine: the Aer simulator failed: {result.status}")
    return result


def factor_node_pd_error(model: LinkedFactorModel, grid: FactorGrid) -> float:
    """Largest relative error of the factor nodes in reproducing an obligor's PD.

    Parameters
    ----------
    model : LinkedFactorModel
    grid : FactorGrid
        The nodes the circuit loads.

    Returns
    -------
    float
        ``max_i |sum_j w_j p_i(z_j) - PD_i| / PD_i``: zero for exact integration; large when
        a high asset correlation makes ``p_i(z)`` nearly a step the nodes cannot resolve.
    """
    if model.n_obligors == 0:
        return 0.0
    integrated = grid.weights @ model.conditional_pd(grid.nodes)
    return float(np.max(np.abs(integrated - model.pd) / model.pd))


def _sector_node_pd_error(
    model: LinkedFactorModel, grid: FactorGrid, sector_nodes: FactorGrid
) -> float:
    """Largest relative PD error of the (global x sector) nodes over the obligors."""
    from debtsim.model.dependence import default_threshold, sector_conditional_pd

    structure = model.dependence
    assert structure is not None and structure.loading is not None
    a = np.asarray(structure.loading)[structure.sector_of]
    thr = default_threshold(model.pd, None)
    worst = 0.0
    for i in range(model.n_obligors):
        y = (a[i] * grid.nodes[:, None]
             + np.sqrt(max(1.0 - a[i] ** 2, 0.0)) * sector_nodes.nodes[None, :]).ravel()
        w = (grid.weights[:, None] * sector_nodes.weights[None, :]).ravel()
        p = sector_conditional_pd(
            thr[i : i + 1], np.asarray(model.asset_correlation)[i : i + 1], y
        )[:, 0]
        if 0.0 < model.pd[i] < 1.0:
            worst = max(worst, abs(float(w @ p) / float(model.pd[i]) - 1.0))
    return worst


#: Peak memory per measurement shot of the Aer simulator and our read-out, rounded up
#: (measured: peak RSS grows by 128-151 bytes per shot for 2-8 million shots of the
#: 12-obligor demo book).
BYTES_PER_SHOT = 160
#: Share of the free memory a shot count may take.
MEMORY_SHARE = 0.5


#: Bootstrap replicates behind the standard errors of a shot-sampled VaR and ES.
BOOTSTRAP_REPLICATES = 100


def _bootstrap_errors(
    losses: FloatArray, counts: FloatArray, levels: tuple[float, ...], seed: int
) -> tuple[dict[str, float], dict[str, float]]:
    """Return standard errors of VaR and ES of measured shots by the nonparametric bootstrap.

    The shots are resampled with replacement (a multinomial draw of the same
    total over the observed patterns) :data:`BOOTSTRAP_REPLICATES` times;
    each figure's standard error is the standard deviation of its replicates
    (Efron and Tibshirani, *An Introduction to the Bootstrap*, 1993, ch. 6).
    The replicates use their own stream, derived from the measurement seed.
    """
    total = int(round(float(counts.sum())))
    rng = np.random.default_rng([seed, 0xB007])
    share = counts / counts.sum()
    var_rep = np.empty((BOOTSTRAP_REPLICATES, len(levels)))
    es_rep = np.empty_like(var_rep)
    for b in range(BOOTSTRAP_REPLICATES):
        resampled = rng.multinomial(total, share).astype(float)
        var_rep[b], es_rep[b] = weighted_sample_measures(losses, resampled, levels)
    var_se = var_rep.std(axis=0, ddof=1)
    es_se = es_rep.std(axis=0, ddof=1)
    return (
        {level_key(a): float(v) for a, v in zip(levels, var_se, strict=True)},
        {level_key(a): float(v) for a, v in zip(levels, es_se, strict=True)},
    )


class CircuitEngine(Engine):
    """Run the model's circuit on Aer's statevector simulator (CPU).

    Parameters
    ----------
    shots : int or None
        None (default) reads the exact law from the statevector; a positive
        number samples that many measurements instead.
    seed : int or None
        Seed of the measurement sampling; unused when exact.  Without a seed a
        random one is drawn and recorded.
    max_qubits : int
        Largest number of qubits (obligors plus factor qubits) accepted.
    factor_grid : FactorGrid, optional
        Factor nodes (``2**k`` of them); Gauss–Hermite with
        ``2**model.factor_qubits`` nodes by default.
    levels : sequence of float
        Confidence levels whose VaR and ES get a standard error when shots
        are sampled.

    """

    name = "circuit"

    def __init__(
        self,
        *,
        shots: int | None = None,
        seed: int | None = None,
        max_qubits: int = DEFAULT_MAX_QUBITS,
        factor_grid: FactorGrid | None = None,
        sector_grid: FactorGrid | None = None,
        levels: tuple[float, ...] = (0.99, 0.999),
    ) -> None:
        if shots is not None and shots < 1:
            raise ValueError(f"shots must be a positive integer or None, got {shots}")
        if max_qubits < 1:
            raise ValueError(f"max_qubits must be positive, got {max_qubits}")
        if factor_grid is not None:
            factor_qubits_of(factor_grid)  # a power of two of nodes, else ValueError
        self.shots = shots
        self.seed = seed
        self.levels = tuple(levels)
        self.max_qubits = max_qubits
        self.factor_grid = factor_grid
        self.sector_grid = sector_grid
        #: Probabilities of the ``2**n`` final-default patterns of the last exact run
        #: (bit ``i`` is obligor ``i``), kept for risk contributions.
        self.last_pattern_law: FloatArray | None = None

    def refusal(self, model: LinkedFactorModel) -> str | None:
        """Why the circuit engine cannot run ``model``, or None when it can."""
        if model.dependence is not None:
            return self._sector_refusal(model)
        grid = factor_grid_for(model, self.factor_grid)
        k = factor_qubits_of(grid)
        qubits = model.n_obligors + k
        if qubits > self.max_qubits:
            return (
                f"the circuit needs {qubits} qubits ({model.n_obligors} obligors + {k} factor "
                f"qubit{'s' if k != 1 else ''}); its statevector would take "
                f"{_bytes_text(statevector_bytes(qubits))} "
                f"and the circuit engine accepts at most {self.max_qubits} qubits "
                f"({_bytes_text(statevector_bytes(self.max_qubits))}); use the 'sample' or "
                f"'exact' engine"
            )
        if model.n_obligors > MAX_OBLIGORS:
            return (
                f"the book has {model.n_obligors} obligors and the circuit engine reads its law "
                f"from 2^{model.n_obligors} default patterns; it accepts at most {MAX_OBLIGORS} "
                f"obligors; use the 'sample' or 'exact' engine"
            )
        problem = circuit_problem(model, grid)
        if problem is not None:
            return f"{problem}; use the 'sample' or 'exact' engine"
        return self._shots_refusal()

    def _shots_refusal(self) -> str | None:
        """Refuse a shot count whose records would not fit in the memory free."""
        if self.shots is None:
            return None
        free = available_memory()
        if free is None:
            return None
        limit = int(free * MEMORY_SHARE // BYTES_PER_SHOT)
        if self.shots <= limit:
            return None
        return (
            f"{self.shots:,} shots would need about {bytes_text(self.shots * BYTES_PER_SHOT)} "
            f"of memory for the simulator's shot records and {bytes_text(free)} is free; "
            f"at most {limit:,} shots fit (the statevector law without shots is exact)"
        )

    def _sector_refusal(self, model: LinkedFactorModel) -> str | None:
        """Refusal for sector factors / Student-t (see :mod:`.sector_circuit`)."""
        from debtsim.engines.circuit.sector_circuit import (
            SectorLayout,
            sector_circuit_problem,
            sector_grids,
        )

        structure = model.dependence
        assert structure is not None
        if structure.form != "loadings" or structure.student_t:
            return (
                f"the circuit engine runs sector loadings with Gaussian dependence only, not "
                f"{structure.describe()}; use the 'exact' engine"
                + (" (or 'sample' for a sector correlation matrix)"
                   if structure.form == "matrix" else "")
            )
        g, x = sector_grids(model, self.factor_grid, self.sector_grid)
        layout = SectorLayout(
            factor_qubits_of(g), factor_qubits_of(x), len(structure.sector_names)
        )
        qubits = model.n_obligors + layout.qubits
        if qubits > self.max_qubits or model.n_obligors > MAX_OBLIGORS:
            return (
                f"the circuit needs {qubits} qubits ({model.n_obligors} obligors + "
                f"{layout.k} global + {layout.sectors} x {layout.m} sector qubits); the circuit "
                f"engine accepts at most {self.max_qubits} qubits and {MAX_OBLIGORS} obligors; "
                "use the 'exact' engine"
            )
        problem = sector_circuit_problem(model, layout)
        if problem is not None:
            return f"{problem}; use the 'exact' engine"
        return None

    def run_without_links(
        self, model: LinkedFactorModel, *, progress: ProgressHook | None = None
    ) -> LossDistribution:
        """Compute the book without links exactly on the circuit's own factor nodes.

        Without links the obligors are independent given the factor, so the
        exact engine on the same Gauss–Hermite nodes gives the distribution
        the circuit would, without a statevector (and without shot noise).
        """
        from debtsim.engines.exact.engine import ExactEngine

        if model.dependence is not None:
            from debtsim.engines.circuit.sector_circuit import sector_grids

            g, x = sector_grids(model, self.factor_grid, self.sector_grid)
            return ExactEngine(factor_grid=g, sector_grid=x).run(
                model.without_links(), progress=progress
            )
        on_nodes = ExactEngine(factor_grid=factor_grid_for(model, self.factor_grid))
        return on_nodes.run(model.without_links(), progress=progress)

    def run(
        self, model: LinkedFactorModel, *, progress: ProgressHook | None = None
    ) -> LossDistribution:
        """Compute the loss law of ``model`` from the circuit.

        Raises
        ------
        EngineRefusedError
            When :meth:`refusal` gives a reason.
        DebtsimError
            When the simulator fails (e.g. out of memory).

        """
        reason = self.refusal(model)
        if reason is not None:
            raise EngineRefusedError(f"circuit engine: {reason}")
        steps = 3
        if progress is not None:
            progress(0, steps)
        n = model.n_obligors
        measure = self.shots is not None
        if model.dependence is not None:
            from debtsim.engines.circuit.sector_circuit import build_sector_circuit, sector_grids

            grid, sector_nodes = sector_grids(model, self.factor_grid, self.sector_grid)
            qc = build_sector_circuit(model, grid, sector_nodes, measure=measure)
            k = qc.num_qubits - n
            node_error = _sector_node_pd_error(model, grid, sector_nodes)
        else:
            grid = factor_grid_for(model, self.factor_grid)
            k = factor_qubits_of(grid)
            qc = build_circuit(model, grid, measure=measure)
            node_error = factor_node_pd_error(model, grid)
        if not measure:
            obligor = next(r for r in qc.qregs if r.name == "obligor")
            qc.save_probabilities(obligor, label="obligors")
        if progress is not None:
            progress(1, steps)
        settings: dict[str, Any] = {
            "factor_nodes": len(grid),
            "factor_method": grid.method,
            "qubits": n + k,
            "shots": self.shots,
        }
        if model.dependence is not None:
            settings["dependence"] = model.dependence.describe()
            settings["sector_nodes"] = len(sector_nodes)
            settings["sector_method"] = (
                "global register plus one register per sector; rotations multiplexed on the "
                "global register, the obligor's sector register and its debtors"
            )
        # Aer's qubit truncation drops idle factor qubits (every R = 0) and then remaps the
        # native multiplexer wrongly: wrong probabilities or heap corruption (qiskit-aer 0.18)
        simulator = AerSimulator(
            method="statevector", precision="double", enable_truncation=False
        )
        loss_each = np.asarray(model.loss_given_default, dtype=float)
        if not measure:
            result = _checked(simulator.run(qc, shots=1).result())
            probs = np.asarray(result.data(0)["obligors"], dtype=float)
            self.last_pattern_law = probs
            if progress is not None:
                progress(2, steps)
            mass = float(probs.sum())
            dp = _bit_marginals(probs, n) / mass
            losses, weights = _loss_atoms(probs, loss_each)
            dist = LossDistribution.from_atoms(
                losses, weights, engine=self.name, default_probability=dp,
                samples=None, seed=None, settings=settings,
                diagnostics={
                    "probability_mass_error": abs(1.0 - mass),
                    "factor_node_pd_error": node_error,
                },
            )
        else:
            seed = self.seed if self.seed is not None else secrets.randbits(31)
            result = _checked(simulator.run(qc, shots=self.shots, seed_simulator=seed).result())
            counts = result.data(0)["counts"]
            if progress is not None:
                progress(2, steps)
            patterns = np.array([int(key, 16) for key in counts], dtype=np.int64)
            weights = np.array(list(counts.values()), dtype=float)
            bits = ((patterns[:, None] >> np.arange(n, dtype=np.int64)[None, :]) & 1).astype(float)
            losses = bits @ loss_each
            total = float(weights.sum())
            mean = float(weights @ losses) / total
            var = float(weights @ (losses - mean) ** 2) / total
            var_se, es_se = _bootstrap_errors(losses, weights, self.levels, seed)
            dist = LossDistribution.from_samples(
                losses, weights, engine=self.name, default_probability=weights @ bits / total,
                samples=self.shots, seed=seed, settings=settings,
                diagnostics={
                    "expected_loss_standard_error": float(np.sqrt(var / total)),
                    "var_standard_error": var_se,
                    "expected_shortfall_standard_error": es_se,
                    "bootstrap_replicates": BOOTSTRAP_REPLICATES,
                    "factor_node_pd_error": node_error,
                },
            )
        if progress is not None:
            progress(steps, steps)
        return dist
