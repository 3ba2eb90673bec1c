"""Tests of robusttomo.batch: manifest, device summary, ranking, resume after a kill, Dask path."""

from __future__ import annotations

import csv
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import robusttomo as rt
from robusttomo import channels
from robusttomo.batch import JobStatus, load_manifest, run_batch
from robusttomo.cli import main
from robusttomo.errors import DataError

# models=True: a result analysed with models=False does not reload (empty tuple in _h5tree; reported)
OPTIONS = {"bootstrap": 10, "seed": 3, "models": True, "ranges": False, "diamond": True}


def _true_error(kind: str, r: float) -> tuple[object, float]:
    """An invented one-qubit error with average error ``r`` = 1 - F_avg, from closed forms.

    Depolarizing with PTM diag(1, p, p, p): r = (1 - p)(d - 1)/d, and a rotation by theta about
    Z: F_avg = (2 + cos theta)/3, from "A simple formula for the average gate fidelity of a
    quantum dynamical operation", Phys. Lett. A 303, 249 (2002) (F_avg = (d F_e + 1)/(d + 1)).
    """
    if kind == "depolarizing":
        return channels.depolarizing(1, 1 - 2 * r), r
    theta = math.acos(1 - 3 * r)
    return channels.rotation("Z", theta), r


def _write_batch(root: Path, errors: list[float], *, broken: bool) -> tuple[Path, dict[str, float]]:
    root.mkdir(parents=True, exist_ok=True)
    plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8, 16], sequences=20, shots=300, seed=11)
    rt.save_plan(plan, root / "plan.h5")
    jobs, truth = [], {}
    for q, r in enumerate(errors):
        kind = "depolarizing" if q % 2 == 0 else "rotation"
        err, r_true = _true_error(kind, r)
        dev = rt.Device.build(1, error=err, readout=[(0.02, 0.04)], prep_flip=[0.01])
        rt.save_device(dev, root / f"dev{q}.json")
        jobs.append({"label": f"q{q}", "plan": "plan.h5", "device": f"dev{q}.json", "simulate_seed": 100 + q})
        truth[f"q{q}"] = r_true
    if broken:
        (root / "broken.h5").write_bytes(b"this is not an HDF5 counts file")
        jobs.append({"label": f"q{len(errors)}", "plan": "plan.h5", "counts": "broken.h5"})
    manifest = root / "manifest.json"
    manifest.write_text(json.dumps({"schema_version": 1, "kind": "robusttomo-batch", "options": OPTIONS,
                                    "jobs": jobs}))
    return manifest, truth


# 12 invented gates whose average errors are spread over a factor 20 (shuffled order)
ERRORS = [0.004, 0.03, 0.008, 0.06, 0.0025, 0.015, 0.045, 0.006, 0.02, 0.011, 0.035, 0.003]


@pytest.fixture(scope="module")
def device_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("device")
    manifest, truth = _write_batch(root, ERRORS, broken=True)
    res = run_batch(manifest, root / "run", jobs=2)
    return root, manifest, truth, res


def test_batch_reports_broken_job_and_ranks_gates_in_true_order(device_run):
    root, manifest, truth, res = device_run
    broken = [o for o in res.outcomes if o.status is JobStatus.FAILED]
    assert [o.label for o in broken] == ["q12"]
    assert "broken.h5" in broken[0].error and "\n" not in broken[0].error
    done = [o for o in res.outcomes if o.status is JobStatus.DONE]
    assert len(done) == 12
    assert res.outcomes[0].label == "q12"  # failed jobs head the summary
    # worst first; a pair out of true order is allowed only when the fidelity intervals overlap
    for a, b in zip(done, done[1:]):
        assert a.figures["average_error"] >= b.figures["average_error"]
        if truth[a.label] < truth[b.label]:
            assert a.figures["average_gate_fidelity_high"] >= b.figures["average_gate_fidelity_low"], (a, b)
    # the estimates track the invented truth (closed forms above)
    for o in done:
        assert abs(o.figures["average_error"] - truth[o.label]) < 0.35 * truth[o.label] + 2e-3, o
    # CSV: one row per gate, same order, and the broken job with its error
    with open(res.csv, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["label"] for r in rows] == [o.label for o in res.outcomes]
    assert rows[0]["status"] == "failed" and "broken.h5" in rows[0]["error"]
    assert all(float(r["diamond_distance"]) >= float(r["average_error"]) for r in rows[1:])  # (1/2)||.|| >= 1-F
    page = res.html.read_text()
    assert "q12" in page and "broken.h5" in page
    assert res.figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    summary = json.loads(res.json.read_text())
    assert summary["kind"] == "robusttomo-batch-summary" and len(summary["rows"]) == 13


def test_rerun_skips_finished_jobs_without_rewriting(device_run):
    root, manifest, truth, res = device_run
    results = sorted((root / "run" / "results").glob("*.h5"))
    before = {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in results}
    again = run_batch(manifest, root / "run", jobs=2)
    assert {o.label: o.status for o in again.outcomes if o.status is not JobStatus.FAILED} == {
        f"q{i}": JobStatus.SKIPPED for i in range(12)}
    assert {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in results} == before
    assert [o.label for o in again.outcomes] == [o.label for o in res.outcomes]


def test_resume_after_kill_recomputes_nothing_finished(tmp_path):
    manifest, _ = _write_batch(tmp_path / "in", [0.004, 0.03, 0.008, 0.06], broken=False)
    out = tmp_path / "run"
    proc = subprocess.Popen([sys.executable, "-m", "robusttomo.cli", "batch", str(manifest), "-o", str(out),
                             "--jobs", "1", "--quiet"], start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    keys: list[Path] = []
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        keys = sorted((out / "results").glob("*.json")) if (out / "results").is_dir() else []
        if len(keys) >= 2:
            break
        time.sleep(0.02)
    os.killpg(proc.pid, signal.SIGKILL)  # the process group we started: no cleanup runs
    proc.wait()
    assert 2 <= len(keys) < 4, "the batch should have been killed half-way"
    finished = sorted(k.with_suffix(".h5") for k in (out / "results").glob("*.json"))
    stamps = {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in finished}
    assert not (out / "summary.csv").exists()
    res = run_batch(manifest, out, jobs=2)
    status = {o.label: o.status for o in res.outcomes}
    assert {p.stem for p in finished} == {k for k, s in status.items() if s is JobStatus.SKIPPED}
    assert all(s in (JobStatus.SKIPPED, JobStatus.DONE) for s in status.values()) and len(status) == 4
    assert {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in finished} == stamps
    assert not list((out / "results").glob(".*.tmp"))  # no half-written file left behind


def test_changed_options_recompute(tmp_path):
    manifest, _ = _write_batch(tmp_path / "in", [0.01], broken=False)
    run_batch(manifest, tmp_path / "run")
    doc = json.loads(manifest.read_text())
    doc["options"]["seed"] = 4
    manifest.write_text(json.dumps(doc))
    res = run_batch(manifest, tmp_path / "run")
    assert [o.status for o in res.outcomes] == [JobStatus.DONE]


def test_dask_cluster_equals_local_run(tmp_path):
    distributed = pytest.importorskip("distributed", reason="Dask distributed not installed (extra 'cluster')")
    manifest, _ = _write_batch(tmp_path / "in", [0.004, 0.03, 0.012], broken=False)
    local = run_batch(manifest, tmp_path / "local", jobs=2)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        remote = run_batch(manifest, tmp_path / "dask", cluster=cluster.scheduler_address)
    assert [o.label for o in remote.outcomes] == [o.label for o in local.outcomes]
    for a, b in zip(local.outcomes, remote.outcomes):
        assert b.status is JobStatus.DONE
        assert sorted(a.figures) == sorted(b.figures)
        va, vb = (np.array([f[k] for k in sorted(a.figures)]) for f in (a.figures, b.figures))
        assert np.array_equal(va, vb, equal_nan=True)  # to the last digit (same seeds); nan: ranges off
        assert np.isfinite(va).sum() >= 13
        ra, rb = rt.load_reconstruction(a.result), rt.load_reconstruction(b.result)
        assert np.array_equal(ra.error_channel.ptm, rb.error_channel.ptm)
        assert ra.counts_fingerprint == rb.counts_fingerprint
    assert local.csv.read_text() == remote.csv.read_text()


def test_cli_batch_exit_status_and_json(device_run, capsys):
    root, manifest, truth, res = device_run
    code = main(["batch", str(manifest), "-o", str(root / "run"), "--json", "--quiet"])
    captured = capsys.readouterr()
    assert code == 2  # one job failed
    doc = json.loads(captured.out)
    assert {j["status"] for j in doc["jobs"]} == {"skipped", "failed"}
    assert "job q12 failed" in captured.err and "broken.h5" in captured.err
    assert main(["batch", str(root / "missing.json"), "-o", str(root / "x")]) == 2
    assert "no such manifest file" in capsys.readouterr().err
    # replicate groups are work units of the cluster path only: a one-line refusal, nothing written
    assert main(["batch", str(manifest), "-o", str(root / "groups"), "--replicate-groups", "2"]) == 2
    err = capsys.readouterr().err
    assert "replicate_groups" in err and "cluster" in err and len(err.strip().splitlines()) == 1
    assert not (root / "groups").exists()


# ---- manifest validation --------------------------------------------------------------------
@pytest.mark.parametrize("change, message", [
    ({"schema_version": 7}, "schema_version 7"),
    ({"colour": 1}, "unknown field 'colour'"),
    ({"jobs": []}, "field 'jobs' must be a non-empty list"),
    ({"options": {"bootstrap": -1}}, "'options.bootstrap' must be a non-negative integer; got -1"),
    ({"options": {"models": "no"}}, "'options.models' must be true or false"),
    ({"jobs": [{"label": "a b", "plan": "p.h5", "counts": "c.h5"}]}, "field 'label' must be"),
    ({"jobs": [{"label": "q1", "counts": "c.h5"}]}, "field 'plan' is missing"),
    ({"jobs": [{"label": "q1", "plan": "p.h5"}]}, "exactly one of field 'counts'"),
    ({"jobs": [{"label": "q1", "plan": "p.h5", "device": "d.json"}]}, "'simulate_seed' must be a non-negative"),
    ({"jobs": [{"label": "q1", "plan": "p.h5", "counts": "c.h5", "simulate_seed": 1}]}, "applies only with"),
    ({"jobs": [{"label": "q1", "plan": "p.h5", "counts": "c.h5", "qubits": [-1]}]}, "field 'qubits' must be"),
    ({"jobs": [{"label": "q1", "plan": "p.h5", "counts": "c.h5"},
               {"label": "Q1", "plan": "p.h5", "counts": "c.h5"}]}, "appears twice"),
])
def test_manifest_validation(tmp_path, change, message):
    doc = {"schema_version": 1, "kind": "robusttomo-batch",
           "jobs": [{"label": "q1", "plan": "p.h5", "counts": "c.h5"}]}
    doc.update(change)
    path = tmp_path / "m.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(DataError, match=message.replace("(", r"\(").replace(".", r"\.")):
        load_manifest(path)


def test_manifest_defaults_and_qubits_from_label(tmp_path):
    path = tmp_path / "m.json"
    path.write_text(json.dumps({"schema_version": 1, "jobs": [
        {"label": "q3-q4", "plan": "p.h5", "counts": "sub/c.h5"}]}))
    m = load_manifest(path)
    assert m.jobs[0].qubits == (3, 4) and m.jobs[0].counts == tmp_path.resolve() / "sub" / "c.h5"
    assert (m.bootstrap, m.models, m.ranges, m.diamond) == (200, True, True, True)
    (tmp_path / "bad.json").write_text("{not json")
    with pytest.raises(DataError, match="not valid JSON"):
        load_manifest(tmp_path / "bad.json")


def test_target_mismatch_fails_only_that_job(tmp_path):
    manifest, _ = _write_batch(tmp_path / "in", [0.01, 0.02], broken=False)
    doc = json.loads(manifest.read_text())
    doc["jobs"][0]["target"] = "cz"
    manifest.write_text(json.dumps(doc))
    res = run_batch(manifest, tmp_path / "run")
    by = {o.label: o for o in res.outcomes}
    assert by["q0"].status is JobStatus.FAILED and "field 'target' is 'cz'" in by["q0"].error
    assert by["q1"].status is JobStatus.DONE and by["q1"].target == "identity"


def test_bad_jobs_and_cluster_options(tmp_path):
    with pytest.raises(ValueError, match="'jobs' must be a positive integer; got 0"):
        run_batch(tmp_path / "never-read.json", tmp_path, jobs=0)
    with pytest.raises(ValueError, match="'cluster' must be a scheduler address"):
        run_batch(tmp_path / "never-read.json", tmp_path, cluster="")
