"""Batch on Dask with groups of bootstrap replicates as work units.

Reference: the same manifest run locally in one process per job (robusttomo.batch without a
cluster, i.e. analyze() with every replicate in one group), the slow, obviously correct path.
The split run must agree to the last digit: same seeds, same solver starting points.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from common_data import result_numbers  # shared test builders

import robusttomo as rt
from robusttomo import batch
from robusttomo.batch import JobStatus, run_batch
from robusttomo.channels import amplitude_damping, depolarizing, rotation

OPTIONS = {"bootstrap": 9, "seed": 3, "models": True, "ranges": True, "diamond": True}


def _manifest(root: Path) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=40, shots=200, seed=11)
    rt.save_plan(plan, root / "plan.h5")
    errors = [rotation("Z", 0.06) @ depolarizing(1, 0.99), amplitude_damping(0.03) @ depolarizing(1, 0.985)]
    jobs = []
    for q, err in enumerate(errors):
        rt.save_device(rt.Device.build(1, error=err, readout=[(0.02, 0.04)], prep_flip=[0.01]), root / f"dev{q}.json")
        jobs.append({"label": f"q{q}", "plan": "plan.h5", "device": f"dev{q}.json", "simulate_seed": 50 + q})
    m = root / "manifest.json"
    m.write_text(json.dumps({"schema_version": 1, "options": OPTIONS, "jobs": jobs}))
    return m


def test_auto_groups():
    assert batch._auto_groups(2, 3) == 1  # more jobs than worker threads: whole jobs
    assert batch._auto_groups(3, 3) == 1
    assert batch._auto_groups(8, 3) == 3  # ceil(8 / 3)
    assert batch._auto_groups(16, 1) == 16
    assert batch._auto_groups(4, 0) == 1


def test_replicate_groups_need_a_cluster(tmp_path):
    m = _manifest(tmp_path / "in")
    with pytest.raises(ValueError, match="cluster path only"):
        run_batch(m, tmp_path / "run", replicate_groups=2)
    for bad in (0, -2, 1.5, True):
        with pytest.raises(ValueError, match="'replicate_groups' must be a positive integer"):
            run_batch(m, tmp_path / "run", cluster="tcp://127.0.0.1:1", replicate_groups=bad)


def test_dask_replicate_groups_equal_local_single_process_run(tmp_path):
    distributed = pytest.importorskip("distributed", reason="Dask distributed not installed (extra 'cluster')")
    m = _manifest(tmp_path / "in")
    local = run_batch(m, tmp_path / "local", jobs=1)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        split = run_batch(m, tmp_path / "split", cluster=cluster.scheduler_address, replicate_groups=3)
        # automatic: 2 worker threads, 1 job left to run -> 2 groups
        (tmp_path / "auto" / "results").mkdir(parents=True)
        auto = run_batch(m, tmp_path / "auto", cluster=cluster.scheduler_address, force=True)
        prefixes = set(cluster.scheduler.task_prefixes)
    # the jobs really were split: prepare, part (ranges, point, models, replicate groups) units
    assert {"robusttomo-prepare", "robusttomo-part"} <= prefixes, prefixes
    for res in (split, auto):
        assert [o.label for o in res.outcomes] == [o.label for o in local.outcomes]
        for a, b in zip(local.outcomes, res.outcomes):
            assert a.status is JobStatus.DONE and b.status is JobStatus.DONE, (a.error, b.error)
            ra, rb = rt.load_reconstruction(a.result), rt.load_reconstruction(b.result)
            (va, rate_a), (vb, rate_b) = result_numbers(ra), result_numbers(rb)
            assert np.isfinite(va).sum() > 80 and np.isfinite(rate_a).sum() > 15
            assert np.array_equal(va, vb, equal_nan=True)  # to the last digit
            np.testing.assert_allclose(rate_b, rate_a, rtol=0, atol=1e-15)
            assert ra.warnings == rb.warnings and ra.chosen_model == rb.chosen_model
        assert local.csv.read_text() == res.csv.read_text()
