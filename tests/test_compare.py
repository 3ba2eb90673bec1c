"""Tests of robusttomo.compare: per-gate changes, flags, channel distance, files and CLI."""

from __future__ import annotations

import json
import math

import pytest

import robusttomo as rt
from robusttomo import channels
from robusttomo.batch import run_batch
from robusttomo.cli import main
from robusttomo.compare import compare, write_comparison
from robusttomo.errors import DataError


def _batch(root, errors, seed):
    root.mkdir(parents=True)
    plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8, 16], sequences=20, shots=300, seed=11)
    rt.save_plan(plan, root / "plan.h5")
    jobs = []
    for label, r in errors.items():
        rt.save_device(rt.Device.build(1, error=channels.depolarizing(1, 1 - 2 * r)), root / f"{label}.json")
        jobs.append({"label": label, "plan": "plan.h5", "device": f"{label}.json", "simulate_seed": seed})
    (root / "m.json").write_text(json.dumps({"schema_version": 1, "jobs": jobs, "options": {
        "bootstrap": 10, "seed": 1, "models": True, "ranges": False, "diamond": True}}))
    return run_batch(root / "m.json", root / "run", jobs=2)


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    root = tmp_path_factory.mktemp("cmp")
    # q0 unchanged, q1 degraded by a factor 10 after an invented "recalibration"
    old = _batch(root / "old", {"q0": 0.005, "q1": 0.003}, seed=1)
    new = _batch(root / "new", {"q0": 0.005, "q1": 0.03, "q2": 0.01}, seed=2)
    return root, old, new


def test_compare_batch_directories_flags_the_changed_gate(two_runs):
    root, old, new = two_runs
    comp = compare(old.directory, new.directory)
    by = {g.label: g for g in comp.gates}
    assert set(by) == {"q0", "q1"} and comp.only_new == ("q2",) and comp.only_old == ()
    assert by["q1"].flagged and by["q1"].fidelity.significant and by["q1"].fidelity.delta < 0
    assert comp.gates[0].label == "q1"  # largest change first
    for g in comp.gates:
        # |F_A - F_B| <= (1/2)||A - B||_diamond, since the fidelity is an average of
        # <psi|(A - B)(psi)|psi> over pure states, each bounded by the trace norm (common practice)
        assert g.channel_distance >= abs(g.fidelity.delta) - 1e-6
        assert g.fidelity.low <= g.fidelity.delta <= g.fidelity.high
    # true change of q1: 0.03 - 0.003 in average error (closed form r = (1 - p)/2, see test_batch)
    assert abs(-by["q1"].fidelity.delta - 0.027) < 0.01


def test_compare_a_result_with_itself_is_no_change(two_runs, tmp_path):
    root, old, new = two_runs
    path = old.directory / "results" / "q0.h5"
    comp = compare(path, path)
    (g,) = comp.gates
    assert g.fidelity.delta == 0.0 and g.diamond.delta == 0.0 and not g.flagged
    assert g.channel_distance < 1e-6
    pj, ph = write_comparison(comp, tmp_path / "out")
    assert json.loads(pj.read_text())["gates"][0]["flagged"] is False
    assert "q0" in ph.read_text()
    with pytest.raises(FileExistsError, match="output exists"):
        write_comparison(comp, tmp_path / "out")


def test_compare_bad_inputs(two_runs, tmp_path):
    root, old, new = two_runs
    with pytest.raises(DataError, match="no such result file or batch directory"):
        compare(tmp_path / "nothing", old.directory)
    with pytest.raises(DataError, match="not a batch directory"):
        compare(tmp_path, old.directory)
    with pytest.raises(DataError, match="give two result files or two batch directories"):
        compare(old.directory / "results" / "q0.h5", new.directory)


def test_cli_compare(two_runs, tmp_path, capsys):
    root, old, new = two_runs
    assert main(["compare", str(old.directory), str(new.directory), "-o", str(tmp_path / "c"), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["kind"] == "robusttomo-comparison"
    assert [g["label"] for g in doc["gates"] if g["flagged"]] == ["q1"]
    assert all(math.isfinite(g["channel_distance"]) for g in doc["gates"])
    assert main(["compare", str(tmp_path / "nope"), str(new.directory), "-o", str(tmp_path / "d")]) == 2
    assert "no such result file" in capsys.readouterr().err
