"""Benchmark: correlations + decay fit for two qubits, 225 probes, 2,000 sequences.

Measures, in one run (ratios are what to compare; the machine is shared and noisy):
* the vectorized correlations (``compute_correlations``) and the joint fit (``fit_decays``),
* a 200-replicate bootstrap,
* the straightforward per-probe, per-sequence loop (ideal propagation of every probe through
  every sequence with plain matrix products), timed on a subset and scaled to the full size.

Run: ``python benchmarks/bench_estimate.py [--sequences 2000] [--loop-sequences 100]``
"""

from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

import robusttomo as rt  # noqa: E402
from robusttomo.channels import amplitude_damping, depolarizing, embed, rotation  # noqa: E402
from robusttomo.clifford import clifford_ptms  # noqa: E402
from robusttomo.estimate import compute_correlations, default_probes, kappa  # noqa: E402
from robusttomo.fit import fit_decays  # noqa: E402


def naive_values(plan, counts, probes, n_seq: int) -> tuple[float, int]:
    """Per probe, per sequence: propagate the probe-inserted ideal circuit, weight by counts."""
    d = 4
    z = np.array([[1, 1, 1, 1], [1, -1, 1, -1], [1, 1, -1, -1], [1, -1, -1, 1]], dtype=float)
    zfull = np.zeros((d, d * d))
    for i in range(d * d):  # Z[x, i] = <x|P_i|x>, nonzero only for I/Z-type Paulis
        a, b = divmod(i, 4)
        if a in (0, 3) and b in (0, 3):
            zfull[:, i] = z[:, (a // 3) * 2 + (b // 3)]
    t0 = time.perf_counter()
    done = 0
    for bi, block in enumerate(plan.blocks):
        cnt = counts.for_block(plan, bi)
        for s in range(min(n_seq, block.cliffords.shape[0])):
            steps = clifford_ptms(2, block.cliffords[s])
            w = cnt[s] / cnt[s].sum()
            for a in range(probes.n_probes):
                r = steps[0] @ zfull[0]
                for t in range(1, block.length):
                    r = steps[t] @ (probes.ptms[a] @ r)
                q = zfull @ r / d
                _ = kappa(d) * (w @ q - 1 / d)
                done += 1
    return time.perf_counter() - t0, done


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sequences", type=int, default=2000)
    ap.add_argument("--loop-sequences", type=int, default=20, help="sequences per length timed in the naive loop")
    ap.add_argument("--bootstrap", type=int, default=200)
    args = ap.parse_args()
    k = args.sequences
    lengths = [1, 2, 3, 4, 8, 16]
    per = [int(round(k * f)) for f in (0.15, 0.5, 0.1, 0.1, 0.075, 0.075)]
    plan = rt.make_plan(n_qubits=2, lengths=lengths, sequences=per, shots=100, seed=1)
    err = rotation("ZZ", 0.06) @ embed(amplitude_damping(0.02), [1], 2) @ depolarizing(2, 0.985)
    dev = rt.Device.build(2, error=err, readout=[(0.03, 0.03)] * 2, prep_flip=[0.01, 0.01])
    counts = rt.simulate(plan, dev, seed=2)
    probes = default_probes(2)
    compute_correlations(plan, counts, probes=probes)  # warm the Clifford tables
    t = time.perf_counter()
    corr = compute_correlations(plan, counts, probes=probes)
    t_corr = time.perf_counter() - t
    t = time.perf_counter()
    fit_decays(corr, bootstrap=0)
    t_fit = time.perf_counter() - t
    t = time.perf_counter()
    fit_decays(corr, bootstrap=args.bootstrap, seed=3)
    t_boot = time.perf_counter() - t - t_fit
    t_loop, n_done = naive_values(plan, counts, probes, args.loop_sequences)
    # the loop evaluates every probe at every length; scale to the full plan
    full_pairs = sum(per) * probes.n_probes
    t_loop_full = t_loop / n_done * full_pairs
    print(f"plan: 2 qubits, {sum(per)} sequences over lengths {lengths} ({per}), 225 probes")
    print(f"correlations: {t_corr:.2f} s   fit: {t_fit:.2f} s   correlations + fit: {t_corr + t_fit:.2f} s")
    print(f"bootstrap ({args.bootstrap} replicates): {t_boot:.2f} s")
    print(f"straightforward per-probe, per-sequence loop: {t_loop:.2f} s for {n_done} (probe, sequence) pairs; "
          f"scaled to the full plan {t_loop_full:.0f} s")
    print(f"ratio loop / vectorized correlations: {t_loop_full / t_corr:.0f}x")


if __name__ == "__main__":
    main()
