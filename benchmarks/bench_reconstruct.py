"""Benchmark of the convex reconstruction stage (robusttomo.reconstruct).

Two qubits, 450 observations (225 unit rows of the m = 2 statistic and 225 probe-decay rows of
Haar-random unitaries), noise from a known full covariance, truth a ZZ over-rotation with
amplitude damping on qubit 0 and depolarizing noise.  Measures

* one CPTP fit (build and solve),
* 200 bootstrap re-solves with the parameterized problem (``CptpFitter.fit_replicates``), with
  and without the non-unital rule,
* rebuilding the fitter (whitening and cvxpy problem) for every replicate, alternated with the
  parameterized re-solve of the same replicate so that load from other jobs affects both alike,
* the non-unital ranges (30 SDPs) and the diamond-distance range,

and, with ``--three-qubits``, one three-qubit fit of exact data (unit rows only).  With
``--coverage TRIALS`` it instead runs the coverage study of the two regions: how often the range
of the damped non-unital entry contains its true value, for amplitude damping on the CPTP
boundary (one and two qubits) and for damping with depolarizing noise (interior).

Run:  python benchmarks/bench_reconstruct.py [--replicates 200] [--rebuild 200] [--three-qubits]
      python benchmarks/bench_reconstruct.py --coverage 25
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

from robusttomo import _pauli
from robusttomo.channels import amplitude_damping, depolarizing, embed, random_channel, rotation
from robusttomo.fit import LinearObservations
from robusttomo.reconstruct import CptpFitter, Region


def _haar(d: int, rng: np.random.Generator) -> np.ndarray:
    z = (rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))) / np.sqrt(2)
    q, r = np.linalg.qr(z)
    return q * (np.diag(r) / np.abs(np.diag(r)))


def _synthetic_rows(n: int, truth, noise: float, rng: np.random.Generator):
    """Unit rows plus one Haar-random unitary probe per block entry, with a dense covariance.

    Returns ``(design, cov, chol, mean)``: the design, its covariance (noise^2 times a random
    well-conditioned matrix), the Cholesky factor, and the exact values of ``truth``.
    """
    d, dd = 2**n, 4**n - 1
    blocks = _pauli.ptms_of_unitaries(np.array([_haar(d, rng) for _ in range(dd * dd)]))[:, 1:, 1:]
    design = np.vstack([np.eye(dd * dd), blocks.reshape(dd * dd, -1) / dd])
    k = design.shape[0]
    g = rng.normal(size=(k, k))
    cov = noise**2 * (g @ g.T / k + np.eye(k))
    return design, cov, np.linalg.cholesky(cov), design @ truth.unital_block.reshape(-1)


def _problem(rng: np.random.Generator, noise: float, n_reps: int) -> tuple[LinearObservations, object]:
    truth = rotation("ZZ", 0.08) @ embed(amplitude_damping(0.03), [0], 2) @ depolarizing(2, 0.99)
    design, cov, chol, mean = _synthetic_rows(2, truth, noise, rng)
    k = design.shape[0]
    values = mean + chol @ rng.normal(size=k)
    reps = mean + (chol @ rng.normal(size=(k, n_reps))).T
    return LinearObservations(2, design, values, cov, tuple(f"row{i}" for i in range(k)), reps), truth


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=200)
    parser.add_argument("--rebuild", type=int, default=200, help="replicates fitted by rebuilding")
    parser.add_argument("--noise", type=float, default=1e-3)
    parser.add_argument("--three-qubits", action="store_true")
    parser.add_argument("--skip-two-qubits", action="store_true")
    parser.add_argument("--coverage", type=int, default=0, help="trials of the region coverage study")
    parser.add_argument("--seed", type=int, default=2024)
    args = parser.parse_args()
    print(f"cores: {os.cpu_count()}, load average at start: {os.getloadavg()[0]:.1f}")
    if args.coverage:
        for n, noise, interior, trials in ((1, 1e-2, False, 8 * args.coverage), (2, 1e-3, False, args.coverage),
                                           (2, 1e-3, True, args.coverage)):
            _coverage(n, noise, interior, trials)
        return
    if not args.skip_two_qubits:
        _two_qubits(args)
    if args.three_qubits:
        _three_qubits(args)


def _two_qubits(args: argparse.Namespace) -> None:
    rng = np.random.default_rng(args.seed)
    obs, truth = _problem(rng, args.noise, args.replicates)

    t0 = time.perf_counter()
    fitter = CptpFitter(obs)
    t_build = time.perf_counter() - t0
    t0 = time.perf_counter()
    fit = fitter.fit()
    t_fit = time.perf_counter() - t0
    err = np.linalg.norm(fit.unital_block - truth.unital_block)
    print(f"build {t_build:.2f} s, first fit {t_fit:.2f} s, status {fit.status.value}, solver {fit.solver}, "
          f"fell_back {fit.fell_back}, certified distance {fit.residuals.mahalanobis_bound:.3f} s.e., "
          f"block error vs truth {err:.4f}, linear-to-CPTP distance {fit.linear_distance:.4f}")

    for rule in (True, False):
        t0 = time.perf_counter()
        fits = fitter.fit_replicates(obs.replicates, nonunital_rule=rule)
        t_rep = time.perf_counter() - t0
        n_fb = sum(f.fell_back for f in fits)
        n_cert = sum(f.status.value == "certified" for f in fits)
        print(f"parameterized, rule={rule}: {len(fits)} replicates in {t_rep:.1f} s "
              f"({t_rep / len(fits):.3f} s each); certified {n_cert}, fell back {n_fb}")

    # rebuilt and parameterized fits of the same replicates, alternated so that the load of other
    # jobs on the shared machine affects both alike
    n_rb = min(args.rebuild, args.replicates)
    t_param_sum = t_rb_sum = 0.0
    for row in obs.replicates[:n_rb]:
        t0 = time.perf_counter()
        fitter.fit(row)
        t1 = time.perf_counter()
        CptpFitter(LinearObservations(2, obs.design, row, obs.covariance, obs.labels)).fit()
        t2 = time.perf_counter()
        t_param_sum += t1 - t0
        t_rb_sum += t2 - t1
    print(f"alternated on {n_rb} replicates: parameterized {t_param_sum / n_rb:.3f} s each, rebuilt "
          f"{t_rb_sum / n_rb:.3f} s each; ratio rebuild / parameterized = {t_rb_sum / t_param_sum:.1f}; "
          f"projected for {args.replicates} replicates: {t_param_sum / n_rb * args.replicates:.0f} s "
          f"against {t_rb_sum / n_rb * args.replicates:.0f} s")

    t0 = time.perf_counter()
    ranges = fitter.nonunital_range(fit)
    t_rng = time.perf_counter() - t0
    inside = np.all((ranges.minimum <= truth.nonunital_vector) & (truth.nonunital_vector <= ranges.maximum))
    t0 = time.perf_counter()
    dr = fitter.diamond_range(fit, nonunital=ranges)
    t_dd = time.perf_counter() - t0
    print(f"non-unital ranges (30 SDPs, {ranges.region.value} region): {t_rng:.1f} s, truth inside: {inside}; "
          f"{ranges.notes[:80]}")
    print(f"diamond range: {t_dd:.1f} s: min {dr.minimum:.4f}, estimate {dr.estimate:.4f}, "
          f"attained max {dr.maximum_attained:.4f}, certified max {dr.maximum_certified:.4f}")



def _coverage(n: int, noise: float, interior: bool, trials: int) -> None:
    """Coverage of the damped entry's range (``t_Z`` or ``t_ZI``) by each region."""
    rng = np.random.default_rng(7)
    dd = 4**n - 1
    damping = embed(amplitude_damping(0.05), [0], n) if n > 1 else amplitude_damping(0.05)
    truth = damping @ depolarizing(n, 0.98) if interior else damping
    idx = 2 if n == 1 else 11  # Pauli "Z" / "ZI", row index minus one
    design, cov, chol, mean = _synthetic_rows(n, truth, noise, rng)
    k = design.shape[0]
    fitter = CptpFitter(LinearObservations(n, design, mean, cov, tuple(map(str, range(k)))))
    hits = {region: 0 for region in Region}
    t0 = time.perf_counter()
    for _ in range(trials):
        v = mean + chol @ rng.normal(size=k)
        fit = fitter.fit(v)
        for region in Region:
            # only the one entry's two programs (the private pieces of nonunital_range)
            _, delta, _ = fitter._delta(0.95, region)
            bound, _ = fitter._set_region(v, fit, delta)
            direction, problems = fitter._region_problem("linear")
            ends = []
            for sign in (1.0, -1.0):
                c = np.zeros(dd + dd * dd)
                c[idx] = sign
                direction.value = fitter._direction(c)
                x, _ = fitter._solve_region(problems, v, bound, 1e-8, "coverage", [])
                ends.append(x[idx])
            lo = min(ends[0], fit.nonunital_vector[idx])
            hi = max(ends[1], fit.nonunital_vector[idx])
            hits[region] += int(lo - 1e-7 <= truth.nonunital_vector[idx] <= hi + 1e-7)
    kind = "damping + depolarizing 0.98 (interior)" if interior else "amplitude damping 0.05 (boundary)"
    print(f"coverage, {n} qubit(s), {kind}, noise {noise:g}, {trials} trials: "
          + ", ".join(f"{r.value} {hits[r]}/{trials}" for r in Region) + f" ({time.perf_counter() - t0:.0f} s)")


def _three_qubits(args: argparse.Namespace) -> None:
    rng3 = np.random.default_rng(args.seed + 3)
    truth3 = random_channel(3, 0.1, rng3)
    dd = 63
    obs3 = LinearObservations(3, np.eye(dd * dd), truth3.unital_block.reshape(-1),
                              np.zeros((dd * dd, dd * dd)), tuple(f"M{i}" for i in range(dd * dd)))
    t0 = time.perf_counter()
    f3 = CptpFitter(obs3)
    t_b3 = time.perf_counter() - t0
    t0 = time.perf_counter()
    r3 = f3.fit(nonunital_rule=False)
    t_f3 = time.perf_counter() - t0
    print(f"three qubits, exact data, 3969 unit rows: build {t_b3:.1f} s, fit without the non-unital "
          f"rule {t_f3:.1f} s, status {r3.status.value}, solver {r3.solver}, "
          f"max block error {np.max(np.abs(r3.unital_block - truth3.unital_block)):.2e}")
    t0 = time.perf_counter()
    r3 = f3.fit()
    t_r3 = time.perf_counter() - t0
    print(f"three qubits, fit with the non-unital rule: {t_r3:.1f} s, status {r3.status.value}, "
          f"rule applied {r3.rule_applied}, solver {r3.solver}, "
          f"max block error {np.max(np.abs(r3.unital_block - truth3.unital_block)):.2e}")


if __name__ == "__main__":
    main()
