"""Time the circuit engine by qubit count, and native vs decomposed multiplexers.

Run: ``PYTHONPATH=. .venv/bin/python benchmarks/bench_circuit.py [--max-qubits N]
[--compare-qubits N] [--repeat R]``

Books: ``qubits - 5`` obligors (5 factor qubits, 32 Gauss-Hermite nodes), each
obligor lending to the one before it (q = 0.3), obligors 0 and 1 lending to each
other (a 2-cycle) and every fourth obligor also lending to the one three places
back (q = 0.2).  Baseline of the ratio column: the smallest size.
"""

from __future__ import annotations

import argparse
import os
import resource
import time

import numpy as np
from qiskit_aer import AerSimulator

from debtsim.book.records import Book, Link, Obligor
from debtsim.engines.circuit.builder import build_circuit, decompose_circuit
from debtsim.engines.circuit.engine import DEFAULT_MAX_QUBITS, CircuitEngine
from debtsim.model.specification import LinkedFactorModel

FACTOR_QUBITS = 5


def bench_book(n: int) -> LinkedFactorModel:
    rng = np.random.default_rng(n)
    obligors = tuple(
        Obligor(
            id=f"B{i:03d}",
            ead=float(rng.integers(50, 500)) * 1000.0,
            pd=float(rng.choice([0.005, 0.01, 0.02, 0.05])),
            lgd=0.45,
            asset_correlation=float(rng.choice([0.12, 0.18, 0.24])),
        )
        for i in range(n)
    )
    links = [Link(creditor=f"B{i:03d}", debtor=f"B{i - 1:03d}", contagion=0.3) for i in range(1, n)]
    if n >= 2:
        links.append(Link(creditor="B000", debtor="B001", contagion=0.3))
    links += [
        Link(creditor=f"B{i:03d}", debtor=f"B{i - 3:03d}", contagion=0.2) for i in range(4, n, 4)
    ]
    book = Book("bench", "EUR", obligors, tuple(links), factor_qubits=FACTOR_QUBITS)
    return LinkedFactorModel.from_book(book)


def time_engine(qubits: int, repeat: int) -> tuple[float, float, float]:
    """Best wall time, its CPU time, and the peak RSS (GiB) so far."""
    model = bench_book(qubits - FACTOR_QUBITS)
    engine = CircuitEngine(max_qubits=max(qubits, DEFAULT_MAX_QUBITS))
    best, cpu = float("inf"), 0.0
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        engine.run(model)
        wall = time.perf_counter() - t0
        if wall < best:
            best, cpu = wall, time.process_time() - c0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    return best, cpu, peak


def native_vs_decomposed(qubits: int, repeat: int) -> tuple[float, float]:
    """Aer run time of the same circuit with native multiplexers and in u/cx."""
    model = bench_book(qubits - FACTOR_QUBITS)
    qc = build_circuit(model)
    decomposed = decompose_circuit(qc)  # what circuit_size counts and to_qasm3 exports
    sim = AerSimulator(method="statevector")
    times = []
    for circ in (qc, decomposed):
        circ = circ.copy()
        circ.save_probabilities(range(FACTOR_QUBITS, circ.num_qubits))
        best = float("inf")
        for _ in range(repeat):
            t0 = time.perf_counter()
            sim.run(circ, shots=1).result()
            best = min(best, time.perf_counter() - t0)
        times.append(best)
    return times[0], times[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--min-qubits", type=int, default=12)
    parser.add_argument("--max-qubits", type=int, default=DEFAULT_MAX_QUBITS)
    parser.add_argument("--step", type=int, default=2)
    parser.add_argument("--compare-qubits", type=int, default=18)
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()

    print(f"circuit engine, exact statevector law, {os.cpu_count()} cores, "
          f"{FACTOR_QUBITS} factor qubits")
    sizes = list(range(args.min_qubits, args.max_qubits + 1, args.step))
    if sizes[-1] != args.max_qubits:
        sizes.append(args.max_qubits)
    print(f"{'qubits':>6} {'obligors':>8} {'wall s':>9} {'cpu s':>9} {'x baseline':>11} "
          f"{'statevector':>12} {'peak RSS GiB':>13}")
    base = None
    for q in sizes:
        wall, cpu, peak = time_engine(q, args.repeat)
        base = base or wall
        print(f"{q:>6} {q - FACTOR_QUBITS:>8} {wall:>9.3f} {cpu:>9.3f} {wall / base:>11.1f} "
              f"{16 * 2**q / 2**30:>10.3f}Gi {peak:>13.2f}", flush=True)
    print(f"baseline: {sizes[0]} qubits")

    native, decomposed = native_vs_decomposed(args.compare_qubits, max(args.repeat, 3))
    print(f"\nAer run at {args.compare_qubits} qubits: native multiplexer {native:.3f} s, "
          f"decomposed to u/cx {decomposed:.3f} s, ratio {decomposed / native:.1f}x "
          f"(baseline: native)")


if __name__ == "__main__":
    main()
