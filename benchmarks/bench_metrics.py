"""Speed and accuracy of the figures of merit (a script, not a test).

Run from the repository root::

    python benchmarks/bench_metrics.py [--channels 10] [--seed 0]

For ``channels`` random one- and two-qubit channels (``random_channel`` with strengths
drawn in [0.02, 0.6]) prints the per-call CPU time (``time.process_time``, single process) of ``diamond_distance_details`` with SCS and
with Clarabel (median and maximum, the first call of each size excluded because it builds the
program), the largest difference between the two solvers' values, and the per-call time of
``rates_from_channel`` and of the fidelity functions.
"""

from __future__ import annotations

import argparse
import platform
import time

import numpy as np

from robusttomo.channels import random_channel
from robusttomo.generators import rates_from_channel
from robusttomo.metrics import average_gate_fidelity, diamond_distance_details, unitarity


def _timed(fn):
    # CPU time of this process: on a shared, loaded machine wall time overstates the cost
    t0 = time.process_time()
    out = fn()
    return out, time.process_time() - t0


def main() -> None:
    """Parse options, run the timings and print one line per measurement."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=10, help="random channels per size (default 10)")
    parser.add_argument("--seed", type=int, default=0, help="seed of numpy.random.default_rng")
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    print(f"python {platform.python_version()}, numpy {np.__version__}, {platform.machine()}")
    for n in (1, 2, 3):
        chans = [random_channel(n, rng.uniform(0.02, 0.6), rng) for _ in range(args.channels)]
        if n <= 2:
            times = {"SCS": [], "CLARABEL": []}
            diffs = []
            for solver in times:  # warm-up: builds and caches the program for this size
                diamond_distance_details(chans[0], solver=solver)
            for ch in chans:
                a, ta = _timed(lambda ch=ch: diamond_distance_details(ch, solver="SCS"))
                b, tb = _timed(lambda ch=ch: diamond_distance_details(ch, solver="CLARABEL"))
                times["SCS"].append(ta)
                times["CLARABEL"].append(tb)
                diffs.append(abs(a.value - b.value))
                if a.fell_back or b.fell_back:
                    print(f"  note: fell back: {a.message} / {b.message}")
            for solver, ts in times.items():
                print(f"n={n} diamond_distance {solver:8s}: median {np.median(ts) * 1e3:7.1f} ms, max {max(ts) * 1e3:7.1f} ms")
            print(f"n={n} diamond_distance |SCS - Clarabel| max {max(diffs):.1e}")
        _, tg = _timed(lambda: [rates_from_channel(ch) for ch in chans])
        _, tf = _timed(lambda: [(average_gate_fidelity(ch), unitarity(ch)) for ch in chans])
        print(f"n={n} rates_from_channel: {tg / len(chans) * 1e3:.2f} ms/call; fidelity+unitarity: {tf / len(chans) * 1e6:.1f} us/call")


if __name__ == "__main__":
    main()
