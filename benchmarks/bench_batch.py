"""Batch wall time: 1 and 2 local worker processes, and the Dask path against the local pool.

Run: python benchmarks/bench_batch.py [--gates 8] [--groups 4]
Writes nothing outside a temporary directory; prints one line per configuration.  On the Dask
cluster the batch runs with whole jobs as work units and again with every job's bootstrap
replicates split into ``--groups`` groups (plus its range programs, point figures and models as
units of their own), which pays off when there are fewer jobs than worker threads (try
``--gates 1``).
"""

from __future__ import annotations

import argparse
import json
import math
import tempfile
import time
from pathlib import Path

import robusttomo as rt
from robusttomo import channels
from robusttomo.batch import run_batch


def _manifest(root: Path, n_gates: int) -> Path:
    plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8, 16], sequences=20, shots=300, seed=11)
    rt.save_plan(plan, root / "plan.h5")
    jobs = []
    for q in range(n_gates):
        r = 0.003 * (1.4**q)
        err = channels.depolarizing(1, 1 - 2 * r) if q % 2 == 0 else channels.rotation("Z", math.acos(1 - 3 * r))
        rt.save_device(rt.Device.build(1, error=err, readout=[(0.02, 0.04)]), root / f"dev{q}.json")
        jobs.append({"label": f"q{q}", "plan": "plan.h5", "device": f"dev{q}.json", "simulate_seed": q})
    m = root / "manifest.json"
    m.write_text(json.dumps({"schema_version": 1, "options": {"bootstrap": 20, "seed": 1, "models": True,
                                                              "ranges": False, "diamond": True}, "jobs": jobs}))
    return m


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--gates", type=int, default=8)
    ap.add_argument("--groups", type=int, default=4, help="replicate groups per job for the split Dask run")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        m = _manifest(root, args.gates)
        times = {}
        for jobs in (1, 2):
            t = time.perf_counter()
            run_batch(m, root / f"local{jobs}", jobs=jobs)
            times[f"local, {jobs} worker(s)"] = time.perf_counter() - t
        try:
            from distributed import LocalCluster
        except ImportError:
            print("Dask distributed not installed: skipping the cluster path")
        else:
            with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                              dashboard_address=None) as cluster:
                t = time.perf_counter()
                run_batch(m, root / "dask", cluster=cluster.scheduler_address, replicate_groups=1)
                times["dask LocalCluster, 2 workers (cluster running), whole jobs"] = time.perf_counter() - t
                t = time.perf_counter()
                run_batch(m, root / "dask-groups", cluster=cluster.scheduler_address, replicate_groups=args.groups)
                times[f"dask LocalCluster, 2 workers, {args.groups} replicate groups per job"] = (
                    time.perf_counter() - t)
        for k, v in times.items():
            print(f"{args.gates} one-qubit gates, bootstrap 20: {k}: {v:.1f} s")


if __name__ == "__main__":
    main()
