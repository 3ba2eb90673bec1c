"""Benchmark: the three-qubit analysis with the 3969-probe default basis.

Times, one stage at a time in one process (CPU seconds and wall seconds; the machine is shared,
so CPU time is the figure to compare), with the peak resident size of the process after each:

* ``default_probes(3)`` on first use (table look-up, PTMs and circuit labels of 3969 Cliffords);
* ``compute_correlations`` and ``fit_decays(bootstrap=0)`` at 100 and 1000 sequences split
  evenly over the default lengths 1, 2, 3, 4, 8, 16, and (size ``0``) at the default plan of
  :func:`robusttomo.make_plan` (1000 sequences at each length up to 3, 200 above: 3600);
* with ``--analyze``, the whole ``robusttomo.analyze(plan, counts, bootstrap=0, models=False,
  ranges=False)`` at the smaller size (CPTP fit of a 64 x 64 Choi matrix), in a child process
  with a time limit, so that a convex step that cannot finish here is reported, not waited for.

Device: ``random_channel(3, 0.1)`` after every Clifford, 2% readout error per qubit, 100 shots.

Run from the repository root::

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_three_qubit.py [--sequences 100 1000 0] [--analyze]
        [--analyze-timeout 900]
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import time
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _timed(fn):
    c0, w0 = time.process_time(), time.perf_counter()
    out = fn()
    return out, time.process_time() - c0, time.perf_counter() - w0


def experiment(sequences: int, seed: int = 3):
    """Plan and simulated counts; ``sequences <= 0`` means the default plan of ``make_plan``."""
    import robusttomo as rt
    from robusttomo.channels import random_channel
    from robusttomo.plan import default_lengths
    from robusttomo.simulate import Device, simulate

    lengths = default_lengths(3)
    per = max(1, sequences // len(lengths)) if sequences > 0 else None
    plan = rt.make_plan(n_qubits=3, lengths=lengths, sequences=per, shots=100, seed=seed)
    dev = Device.build(3, error=random_channel(3, 0.1, np.random.default_rng(seed)), readout=[(0.02, 0.02)] * 3)
    return plan, simulate(plan, dev, seed=seed + 1)


def stages(sizes: list[int]) -> list[str]:
    from robusttomo.estimate import compute_correlations, default_probes
    from robusttomo.fit import fit_decays

    lines = []
    probes, cpu, wall = _timed(lambda: default_probes(3))
    lines.append(f"default_probes(3), first use: {cpu:.2f} s CPU ({wall:.2f} s wall); "
                 f"{probes.n_probes} probes, condition number {probes.condition_number:.1f}; "
                 f"peak RSS {_rss_mb():.0f} MB")
    for k in sizes:
        plan, counts = experiment(k)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            corr, cpu_c, wall_c = _timed(lambda: compute_correlations(plan, counts, probes=probes))
            rss_c = _rss_mb()
            res, cpu_f, wall_f = _timed(lambda: fit_decays(corr, bootstrap=0))
        kept = {s.length: int(s.probes.size) for s in corr.stats}
        lines.append(f"{sum(b.n_sequences for b in plan.blocks)} sequences: compute_correlations {cpu_c:.2f} s CPU "
                     f"({wall_c:.2f} s wall, peak RSS {rss_c:.0f} MB); fit_decays {cpu_f:.2f} s CPU "
                     f"({wall_f:.2f} s wall, peak RSS {_rss_mb():.0f} MB); probes kept per length {kept}; "
                     f"identity decay {res.identity_decay:.4f} +- {res.identity_decay_stderr:.4f}")
    return lines


def analyze_child(sequences: int) -> None:
    import robusttomo as rt

    plan, counts = experiment(sequences)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        rec, cpu, wall = _timed(lambda: rt.analyze(plan, counts, bootstrap=0, models=False, ranges=False))
    from robusttomo.channels import random_channel

    truth = random_channel(3, 0.1, np.random.default_rng(3))  # experiment()'s device error (seed 3)
    err = float(np.linalg.norm(rec.error_channel.unital_block - truth.unital_block))
    lin = float(np.linalg.norm(rec.linear_unital_block - truth.unital_block))
    print(f"analyze(3 qubits, {sum(b.n_sequences for b in plan.blocks)} sequences, bootstrap=0, models=False, "
          f"ranges=False): {cpu:.1f} s CPU ({wall:.1f} s wall), peak RSS {_rss_mb():.0f} MB, solver {rec.solver} "
          f"({rec.solver_status}); unital-block error {err:.3f} (linear estimate {lin:.3f}); average gate "
          f"fidelity {rec.figures.average_gate_fidelity.value:.5f} (true "
          f"{rt.average_gate_fidelity(truth):.5f})", flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sequences", type=int, nargs="+", default=[100, 1000, 0],
                    help="total sequences per run; 0 = the default plan (default %(default)s)")
    ap.add_argument("--analyze", action="store_true", help="also time robusttomo.analyze in a child process")
    ap.add_argument("--analyze-timeout", type=float, default=900.0, help="seconds before the child is stopped")
    ap.add_argument("--child", type=int, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child is not None:
        analyze_child(args.child)
        return 0
    for line in stages(args.sequences):
        print(line, flush=True)
    if args.analyze:
        k = min((x for x in args.sequences if x > 0), default=0)  # 0 alone: the default plan
        cmd = [sys.executable, __file__, "--child", str(k)]
        t0 = time.perf_counter()
        try:
            out = subprocess.run(cmd, capture_output=True, text=True, timeout=args.analyze_timeout)
            print(out.stdout.strip() or f"analyze failed (exit {out.returncode}): {out.stderr.strip()[-2000:]}")
        except subprocess.TimeoutExpired:
            print(f"analyze(3 qubits, {k} sequences) did not finish within {args.analyze_timeout:.0f} s "
                  f"({time.perf_counter() - t0:.0f} s wall)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
