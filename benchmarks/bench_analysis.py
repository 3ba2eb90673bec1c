"""Full two-qubit analysis: wall and CPU time with one and with two worker processes.

Run from the repository root::

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_analysis.py [--jobs 1 2] [--bootstrap 200]
        [--json OUT.json]

The configuration is the headline of the speed study (``benchmarks/study_speed.py``): two qubits,
the default lengths, 2000 sequences, the 225-probe basis, a random near-identity error with 2%
readout flips, ``robusttomo.analyze(plan, counts, bootstrap=200, seed=5)`` with every other option
at its default (models, ranges, diamond distance).  For each ``jobs`` value it prints the wall
time, the CPU time of this process and of its worker processes, the load average before and
after, and the stage split from the ``progress`` callback:

* ``jobs=1``: the stages run one after the other, so each is the time between its ticks
  (``ranges: joint`` / ``ranges: profile`` are the two range families; ``bootstrap: CPTP re-fits``
  runs from the end of the ranges to the first replicate's tick and includes the point
  estimate's figures; ``bootstrap: figures`` the rest of the replicates' figures);
* ``jobs>1``: the parts overlap, so the table gives when each stage *finished*.

The runs are compared: the largest absolute difference between any two runs' figures, intervals,
ranges and channel is printed (0 expected: the result does not depend on ``jobs``).
"""

from __future__ import annotations

import os
import sys

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import resource  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))


def experiment():
    """The headline data set of the speed study (same seeds)."""
    import study_common as sc

    import robusttomo as rt
    from robusttomo.plan import default_lengths

    lengths = default_lengths(2)
    seed = 77_000
    plan = rt.make_plan(n_qubits=2, lengths=lengths, sequences=sc.split_sequences(2000, lengths), seed=seed)
    counts = rt.simulate(plan, sc.device(2, sc.general_error(2), 0.02), seed=seed + 1)
    return plan, counts


def numbers(rec) -> np.ndarray:
    """Every reported number of a result, flattened (for the before/after comparison)."""
    f = rec.figures
    vals = []
    for iv in (f.average_gate_fidelity, f.entanglement_fidelity, f.diamond_distance, f.unitarity,
               f.coherent_share, f.decay_fidelity, *f.pauli_error_rates.values(), *f.hamiltonian.values(),
               *f.stochastic.values()):
        vals += [iv.value, iv.low, iv.high]
    s = f.diamond_distance_range
    vals += [s.low, s.high, s.attained_max, s.certified_max, rec.unital_block_error, rec.anchor_weight]
    vals += [x for m in rec.models for x in (m.chi2, m.criterion, m.heldout_chi2, m.average_gate_fidelity,
                                             m.diamond_distance)]
    return np.concatenate([np.array(vals, dtype=float), rec.nonunital_ranges.ravel(), rec.error_channel.ptm.ravel()])


def _children_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def run(plan, counts, jobs: int, bootstrap: int) -> dict:
    import robusttomo as rt

    marks: list[tuple[str, int, int, float]] = []
    load0 = os.getloadavg()
    ch0 = _children_cpu()
    t0, c0 = time.perf_counter(), time.process_time()

    def progress(stage: str, done: int, total: int) -> None:
        marks.append((stage, done, total, time.perf_counter() - t0))

    rec = rt.analyze(plan, counts, bootstrap=bootstrap, seed=5, jobs=jobs, progress=progress)
    wall = time.perf_counter() - t0
    cpu_self, cpu_children = time.process_time() - c0, _children_cpu() - ch0
    load1 = os.getloadavg()

    def at(stage: str, done: int | None = None, first: bool = False) -> float:
        ts = [t for s, d, _, t in marks if s == stage and (done is None or d == done)]
        return ts[0] if first else ts[-1]

    stages: dict[str, float] = {}
    if jobs == 1:
        stages["correlations"] = at("correlations", 1)
        stages["decay fit"] = at("decay fit", 1) - at("correlations", 1)
        stages["convex fit (point)"] = at("convex fit", 1) - at("decay fit", 1)
        prev = at("convex fit", 1)
        if any(s == "ranges" for s, *_ in marks):
            stages["ranges: joint"] = at("ranges", 2) - prev
            stages["ranges: profile"] = at("ranges") - at("ranges", 2)
            prev = at("ranges")
        if bootstrap:
            stages["bootstrap: CPTP re-fits (and point figures)"] = at("bootstrap", first=True) - prev
            stages["bootstrap: figures"] = at("bootstrap") - at("bootstrap", first=True)
            prev = at("bootstrap")
        stages["models"] = at("models", 1) - prev
        stages["rest (assembly)"] = wall - at("models", 1)
    else:
        for name, stage in (("correlations", "correlations"), ("decay fit", "decay fit"),
                            ("convex fit (point)", "convex fit"), ("ranges (both families)", "ranges"),
                            ("bootstrap (all groups)", "bootstrap"), ("models", "models")):
            if any(s == stage for s, *_ in marks):
                stages[f"{name} finished at"] = at(stage)
    return {"jobs": jobs, "wall_s": wall, "cpu_self_s": cpu_self, "cpu_children_s": cpu_children,
            "cpu_total_s": cpu_self + cpu_children, "load_before": load0, "load_after": load1, "stages_s": stages,
            "solver": rec.solver, "warnings": list(rec.warnings), "numbers": numbers(rec)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--jobs", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--bootstrap", type=int, default=200)
    ap.add_argument("--json", type=Path, default=None, help="also write the measurements here")
    args = ap.parse_args()
    plan, counts = experiment()
    # warm-up: Clifford tables and the probe set, as in the speed study
    import robusttomo as rt

    rt.analyze(plan, counts, bootstrap=0, models=False, ranges=False, diamond=False)
    out = []
    for jobs in args.jobs:
        r = run(plan, counts, jobs, args.bootstrap)
        out.append(r)
        print(f"jobs={jobs}: wall {r['wall_s']:.1f} s, CPU {r['cpu_total_s']:.1f} s "
              f"(this process {r['cpu_self_s']:.1f} s, workers {r['cpu_children_s']:.1f} s), "
              f"load {r['load_before'][0]:.2f} -> {r['load_after'][0]:.2f}")
        for k, v in r["stages_s"].items():
            print(f"    {k:48s} {v:8.2f} s")
    for i in range(len(out)):
        for j in range(i + 1, len(out)):
            a, b = out[i]["numbers"], out[j]["numbers"]
            diff = float(np.nanmax(np.abs(a - b))) if a.shape == b.shape else float("nan")
            print(f"largest difference jobs={out[i]['jobs']} vs jobs={out[j]['jobs']}: {diff:.3g}")
    if args.json is not None:
        doc = [{k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in r.items()} for r in out]
        args.json.write_text(json.dumps(doc, indent=1))


if __name__ == "__main__":
    main()
