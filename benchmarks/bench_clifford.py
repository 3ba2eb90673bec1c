"""Speed of uniform Clifford sampling with unitaries (a script, not a test).

Run from the repository root::

    python benchmarks/bench_clifford.py [--size 100000] [--seed 0] [--repeats 3]

Prints, for a fresh process: the one-off cost of the two-qubit tables (unitaries, PTMs,
circuits), the time to sample ``size`` two-qubit Cliffords with their unitaries, and the
three-qubit sampling rate (elements per second, unitaries included, cold per-index cache),
plus the three-qubit PTM and circuit-synthesis rates.  Times are the best of ``repeats``.
"""

from __future__ import annotations

import argparse
import platform
import time

import numpy as np

from robusttomo import clifford


def _best(fn, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    """Parse options, run the timings and print one line per measurement."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=100_000, help="elements per sample (default 1e5)")
    parser.add_argument("--seed", type=int, default=0, help="seed of numpy.random.default_rng")
    parser.add_argument("--repeats", type=int, default=3, help="best of this many runs")
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    size = args.size
    print(f"python {platform.python_version()}, numpy {np.__version__}, {platform.machine()}")

    t0 = time.perf_counter()
    clifford.clifford_unitaries(2, np.zeros(1, dtype=np.int64))
    t_u = time.perf_counter() - t0
    t0 = time.perf_counter()
    clifford.clifford_ptms(2, np.zeros(1, dtype=np.int64))
    t_p = time.perf_counter() - t0
    t0 = time.perf_counter()
    clifford.clifford_circuits(2, np.zeros(1, dtype=np.int64))
    t_c = time.perf_counter() - t0
    print(f"n=2 table build (once per process): unitaries {t_u:.3f} s, PTMs {t_p:.3f} s, circuits {t_c:.3f} s")

    def sample2() -> None:
        idx = clifford.random_clifford_indices(2, size, rng)
        clifford.clifford_unitaries(2, idx)

    t2 = _best(sample2, args.repeats)
    print(f"n=2: {size} elements with unitaries in {t2:.4f} s ({size / t2:.3g} elements/s)")

    def sample3() -> None:
        idx = clifford.random_clifford_indices(3, size, rng)
        clifford.clifford_unitaries(3, idx)

    t3 = _best(sample3, args.repeats)
    print(f"n=3: {size} elements with unitaries in {t3:.3f} s ({size / t3:.3g} elements/s)")

    k = min(size, 10_000)

    def ptms3() -> None:
        clifford.clifford_ptms(3, clifford.random_clifford_indices(3, k, rng))

    tp3 = _best(ptms3, args.repeats)
    print(f"n=3: {k} elements with PTMs in {tp3:.3f} s ({k / tp3:.3g} elements/s)")

    kc = min(size, 2_000)
    idx = clifford.random_clifford_indices(3, kc, rng)
    t0 = time.perf_counter()
    circuits = clifford.clifford_circuits(3, idx)
    tc3 = time.perf_counter() - t0
    ncx = np.array([sum(len(q) == 2 for _, q in c) for c in circuits])
    print(
        f"n=3: {kc} circuits in {tc3:.3f} s ({kc / tc3:.3g} circuits/s); "
        f"cx per circuit mean {ncx.mean():.2f}, max {ncx.max()}"
    )


if __name__ == "__main__":
    main()
