"""The validation study at its smallest configuration, so that the benchmark code cannot rot.

Not a timing: ``benchmarks/run_all.py --size smoke`` runs every study on tiny plans into a
temporary docs directory; the checks are on what it writes and on the study's own helpers
against independent references.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

BENCH = Path(__file__).resolve().parent.parent / "benchmarks"
sys.path.insert(0, str(BENCH))

import study_accuracy  # noqa: E402
import study_common  # noqa: E402
import study_coverage  # noqa: E402
import run_all  # noqa: E402


@pytest.fixture(scope="module")
def smoke_run(tmp_path_factory):
    docs = tmp_path_factory.mktemp("docs")
    (docs / "benchmarks.md").write_text("# Benchmarks\n\n## Someone else's section\n\nkept as is\n", encoding="utf-8")
    assert run_all.main(["--size", "smoke", "--jobs", "1", "--docs", str(docs)]) == 0
    return docs


def test_smoke_run_writes_results_figures_and_section(smoke_run):
    docs = smoke_run
    store = json.loads((docs / "benchmarks-results.json").read_text())
    entry = store["smoke"]
    assert set(entry["parts"]) == {"accuracy", "coverage", "speed"} and entry["complete_run"]["wall_s"] > 0
    for name in ("accuracy", "crossover", "coverage", "speed"):
        png = docs / "figures" / f"study_{name}_smoke.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    text = (docs / "benchmarks.md").read_text()
    assert text.startswith("# Benchmarks\n\n## Someone else's section\n\nkept as is\n")
    assert text.count(run_all.BEGIN) == 1 and text.count(run_all.END) == 1
    assert "figures/study_accuracy_smoke.png" in text
    assert "#### Accuracy per shot, side by side" in text and "#### Speed and scaling" in text


def test_partial_rerun_replaces_the_block_and_keeps_other_parts(smoke_run, tmp_path):
    for name in ("benchmarks.md", "benchmarks-results.json"):
        (tmp_path / name).write_bytes((smoke_run / name).read_bytes())
    before = json.loads((tmp_path / "benchmarks-results.json").read_text())["smoke"]["parts"]
    assert run_all.main(["--size", "smoke", "--jobs", "1", "--docs", str(tmp_path), "--only", "speed"]) == 0
    after = json.loads((tmp_path / "benchmarks-results.json").read_text())["smoke"]["parts"]
    assert after["accuracy"] == before["accuracy"] and after["coverage"] == before["coverage"]
    assert after["speed"]["finished"] >= before["speed"]["finished"]
    text = (tmp_path / "benchmarks.md").read_text()
    assert text.count(run_all.BEGIN) == 1 and text.count(run_all.END) == 1 and "kept as is" in text
    assert "#### Accuracy per shot, side by side" in text


def test_smoke_numbers_are_measurements(smoke_run):
    parts = json.loads((smoke_run / "benchmarks-results.json").read_text())["smoke"]["parts"]
    res = {k: v["results"] for k, v in parts.items()}
    side = res["accuracy"]["side"]["settings"][0]
    # Tomography assumes ideal readout; with a symmetric flip e per qubit its one-qubit average
    # infidelity is off by about e near the identity (docs/baselines.md, "SPAM sensitivity",
    # checked in tests/test_baselines.py).  Here e = 3% and 12,000 shots (noise ~1e-3).
    assert side["readout"] == 0.03
    assert 0.02 < side["tomography"]["mean_infidelity_error"] < 0.04
    # every method got the same budget (to the rounding of each method's split)
    shots = [side[m]["shots"] for m in ("ours", "ours_fid", "tomography", "benchmarking")]
    assert max(shots) - min(shots) <= 0.01 * max(shots)
    g = res["speed"]["grid"][0]
    assert g["correlations_s"] > 0 and g["floor_s"] > 0 and g["peak_traced_mb"] > 0
    cov = res["coverage"]["coverage"]["rows"][0]
    assert cov["agf"]["trials"] == 3 and 0 <= cov["agf"]["hits"] <= 3
    assert res["coverage"]["weights"]["rows"][0]["experiments"] == 3
    rem = res["coverage"]["remedy"]["rows"][0]
    assert rem["experiments"] == 3 and all(0 <= rem[k]["hits"] <= 3 for k in study_coverage.REMEDIES)


def test_per_clifford_errors_reproduce_the_simulator():
    """Sequences composed from the study's per-Clifford errors match robusttomo.simulate (exact).

    Two independent paths: the study rebuilds each noisy Clifford from its compiled circuit and
    the per-Clifford error ``E_C = N(C) C^dagger``; the simulator composes native gates itself.
    """
    import robusttomo as rt
    from robusttomo import _pauli
    from robusttomo.clifford import clifford_ptms

    n = 2
    errors = study_coverage.gate_errors(n, 3.0)
    dev = rt.Device.build(n, gate_errors=errors, readout=[(0.02, 0.04)] * n)
    plan = rt.make_plan(n_qubits=n, lengths=[1, 2, 3], sequences=4, shots=1000, seed=11)
    counts = rt.simulate(plan, dev, exact=True)
    d = 2**n
    z = np.real(np.einsum("ixx->xi", _pauli.pauli_stack(n))) / np.sqrt(d)
    r0 = _pauli.pauli_vector(dev.prep) / np.sqrt(d)
    for block in plan.blocks:
        got = counts.for_block(plan, block) / plan.shots
        for row, seq in enumerate(block.cliffords):
            e = study_coverage.per_clifford_errors(n, errors, seq)
            ideal = clifford_ptms(n, seq)
            r = r0
            for ek, ck in zip(e, ideal):
                r = ek @ ck @ r
            p = dev.readout @ (z @ r)
            np.testing.assert_allclose(got[row], p, atol=1e-12)


def test_per_clifford_errors_of_gate_independent_noise():
    # A gate error of the identity everywhere: every per-Clifford error is the identity.
    from robusttomo.channels import identity

    e = study_coverage.per_clifford_errors(1, {"h": identity(1), "s": identity(1)})
    assert e.shape == (24, 4, 4)
    np.testing.assert_allclose(e, np.broadcast_to(np.eye(4), e.shape), atol=1e-12)


def test_crossover_rule():
    # tomography bias^2 = 0.1, v_tomo = 100; ours v = 1000: N* = (1000 - 100) / 0.1 = 9000 exactly
    # for the 1/N law, which the log-log interpolation between 1e3 and 1e4 approximates.
    per = [{"shots": n, "mse": 1000.0 / n, "v": 1000.0} for n in (1e3, 1e4)]
    c, where = study_accuracy._crossover(per, 0.1, 100.0)
    assert where == "between" and abs(c - 9000) / 9000 < 0.05
    per = [{"shots": n, "mse": 1000.0 / n, "v": 1000.0} for n in (1e5, 1e6)]
    assert study_accuracy._crossover(per, 0.1, 100.0) == (pytest.approx(9000.0), "below")
    per = [{"shots": n, "mse": 1000.0 / n, "v": 1000.0} for n in (1e2, 1e3)]
    assert study_accuracy._crossover(per, 0.1, 100.0) == (pytest.approx(9000.0), "above")
    per = [{"shots": 1e3, "mse": 0.05, "v": 50.0}]
    assert study_accuracy._crossover(per, 0.1, 100.0) == (0.0, "below")


def test_clopper_pearson_closed_forms():
    # With 0 or all successes the exact interval has a closed form (common practice):
    # upper = 1 - (alpha/2)**(1/n) for 0/n, lower = (alpha/2)**(1/n) for n/n.
    lo, hi = study_common.clopper_pearson(0, 10)
    assert lo == 0.0 and hi == pytest.approx(1 - 0.025 ** 0.1, rel=1e-10)
    lo, hi = study_common.clopper_pearson(10, 10)
    assert hi == 1.0 and lo == pytest.approx(0.025 ** 0.1, rel=1e-10)
    lo, hi = study_common.clopper_pearson(95, 100)
    assert lo < 0.95 < hi


@pytest.mark.parametrize("total", [100, 1800, 10_000])
def test_split_sequences(total):
    lengths = (1, 2, 3, 4, 8, 16)
    s = study_common.split_sequences(total, lengths)
    assert sum(s) == total
    assert abs(s[0] - 5 * s[-1]) <= 5  # five times as many sequences at m <= 3


def test_bad_size_names_the_value():
    with pytest.raises(ValueError, match=r"'size' must be one of .*got 'huge'"):
        study_common.check_size("huge")
    with pytest.raises(ValueError, match=r"'jobs' must be a positive integer; got 0"):
        study_common.run_tasks(math.sqrt, [], jobs=0)


def _square(t: dict) -> dict:
    return {"x": t["x"], "y": t["x"] ** 2, "nan": float("nan")}


def test_checkpoint_resumes_merges_and_summarizes(tmp_path):
    # Reference: the plain list comprehension run_tasks stands for.
    tasks = [{"x": i, "tag": "a"} for i in range(6)]
    reference = [_square(t) for t in tasks]
    ck = tmp_path / "ck.jsonl"
    calls = []

    def counted(t):
        calls.append(t["x"])
        return _square(t)

    first = study_common.run_tasks(counted, tasks[:4], checkpoint=ck)
    assert [r["y"] for r in first] == [r["y"] for r in reference[:4]] and calls == [0, 1, 2, 3]
    # an interrupted writer leaves a cut-off last line: it is ignored and its task runs again
    with open(ck, "a", encoding="utf-8") as fh:
        fh.write('{"key": "cut')
    partial = study_common.run_tasks(counted, tasks, checkpoint=ck, run_missing=False)
    assert [r["x"] for r in partial] == [0, 1, 2, 3] and calls == [0, 1, 2, 3]
    ck.write_text(ck.read_text().rsplit("\n", 1)[0] + "\n")  # drop the cut line before appending
    calls.clear()
    full = study_common.run_tasks(counted, tasks, checkpoint=ck)
    assert calls == [4, 5]
    assert [(r["x"], r["y"]) for r in full] == [(r["x"], r["y"]) for r in reference]
    assert all(math.isnan(r["nan"]) for r in full)  # nan survives the checkpoint
    # a changed task (another configuration) is not taken for a saved one
    assert study_common.run_tasks(counted, [{"x": 1, "tag": "b"}], checkpoint=ck, run_missing=False) == []


def test_checkpoint_rejects_a_corrupt_middle_line(tmp_path):
    ck = tmp_path / "ck.jsonl"
    ck.write_text('not json\n{"key": "k", "task": {}, "result": {}, "finished": ""}\n')
    with pytest.raises(ValueError, match=r"line 1 is not JSON"):
        study_common.load_checkpoint(ck)


def test_allocate_is_largest_remainder():
    # Largest-remainder (Hamilton) apportionment, worked by hand (common practice):
    # 100 * (1, 2, 3.5) / 6.5 = 15.38, 30.77, 53.85 -> floors 15, 30, 53 (98); the two largest
    # remainders (0.85, 0.77) get one each -> 15, 31, 54.
    assert study_common.allocate(100, [1, 2, 3.5]) == [15, 31, 54]
    # a floor lifts an entry and the rest is re-split: 10 - 2 = 8 for the other
    assert study_common.allocate(10, [0, 1]) == [2, 8]
    # 100 with floor 20 over weights (1, 1, 8): 10, 10, 80 -> the first two lifted to 20, 60 left
    assert study_common.allocate(100, [1, 1, 8], floor=20) == [20, 20, 60]
    assert study_common.allocate(100, [1, 1, 8], floor=40) == [40, 40, 40]  # floor x entries > total
    with pytest.raises(ValueError, match=r"'weights' must be non-negative"):
        study_common.allocate(10, [-1, 2])


def test_revive_undoes_the_json_nan_mapping(tmp_path):
    obj = {"a": float("nan"), "b": [1.0, float("inf")], "covered": None, "c": {"met": None, "v": 2}}
    study_common.write_json(tmp_path / "x.json", obj)
    back = study_common.revive(json.loads((tmp_path / "x.json").read_text()))
    assert math.isnan(back["a"]) and back["b"][0] == 1.0 and math.isnan(back["b"][1])
    assert back["covered"] is None and back["c"] == {"met": None, "v": 2}


def test_only_parses_studies_and_sub_studies():
    assert run_all._parse_only(("coverage.gate", "accuracy", "coverage.coverage")) == {
        "coverage": ("coverage", "gate"), "accuracy": ("side", "cross")}
    assert run_all._parse_only(("coverage",)) == {"coverage": ("coverage", "weights", "remedy", "gate")}
    assert run_all._parse_only(("speed", "accuracy.cross")) == {"speed": (), "accuracy": ("cross",)}
    with pytest.raises(ValueError, match=r"got \['coverage.nothing'\]"):
        run_all._parse_only(("coverage.nothing",))


def test_summarize_regenerates_from_saved_repeats(smoke_run, tmp_path):
    raw, a, b = tmp_path / "raw", tmp_path / "a", tmp_path / "b"
    for d in (a, b):
        d.mkdir()
        for name in ("benchmarks.md", "benchmarks-results.json"):
            (d / name).write_bytes((smoke_run / name).read_bytes())
    assert run_all.main(["--size", "smoke", "--jobs", "1", "--docs", str(a), "--only", "coverage",
                         "--raw", str(raw)]) == 0
    assert run_all.main(["--size", "smoke", "--jobs", "1", "--docs", str(b), "--only", "coverage",
                         "--raw", str(raw), "--summarize"]) == 0
    ra = json.loads((a / "benchmarks-results.json").read_text())["smoke"]["parts"]["coverage"]
    rb = json.loads((b / "benchmarks-results.json").read_text())["smoke"]["parts"]["coverage"]
    assert ra["results"]["coverage"]["rows"] == rb["results"]["coverage"]["rows"]
    assert ra["results"]["gate"]["rows"] == rb["results"]["gate"]["rows"]
    assert rb["summarized"] and not ra["summarized"]
    assert "regenerated" in (b / "benchmarks.md").read_text()
    # a stored partial study can be put back into a checkpoint and resumed from it
    raw2 = tmp_path / "raw2"
    raw2.mkdir()
    store = json.loads((a / "benchmarks-results.json").read_text())
    assert study_coverage.import_stored("smoke", store, raw2, label="test") == 3
    assert study_coverage.import_stored("smoke", store, raw2, label="test") == 0  # already there
    again = study_coverage.run_coverage("smoke", raw=raw2, run_missing=False)
    assert again["rows"][0]["agf"] == ra["results"]["coverage"]["rows"][0]["agf"]
    # the accuracy part, not named, is kept as stored
    before = json.loads((smoke_run / "benchmarks-results.json").read_text())["smoke"]["parts"]["accuracy"]
    assert json.loads((b / "benchmarks-results.json").read_text())["smoke"]["parts"]["accuracy"] == before


def test_fidelity_plan_keeps_the_planners_proportions(smoke_run):
    from robusttomo import metrics
    from robusttomo.planner import assumed_device, choose_plan

    side = json.loads((smoke_run / "benchmarks-results.json").read_text())["smoke"]["parts"]["accuracy"]
    fp = side["results"]["side"]["settings"][0]["fidelity_plan"]
    total = sum(fp["sequences"])
    assert total >= 120  # the smoke plan's 120 sequences (more only where the floor of 2 lifted one)
    # the same planner call, made here independently from the true average infidelity
    r = 1 - metrics.average_gate_fidelity(study_common.general_error(1))
    assert fp["average_error"] == pytest.approx(r, rel=1e-12)
    prop = choose_plan(n_qubits=1, device=assumed_device(1, average_error=r, readout_error=0.0),
                       targets={"average_gate_fidelity": 1e-5},
                       costs={"seconds_per_shot": 1.0, "seconds_per_sequence": 0.0}, shots=100, seed=0)
    assert tuple(fp["lengths"]) == tuple(prop.lengths) and 1 in fp["lengths"] and 2 in fp["lengths"]
    w = np.array(prop.sequences, dtype=float)
    # scaled to the default plan's total (smoke: 120 sequences over 10 lengths), with the
    # planner's floor of sequences per length (its min_sequences, capped at total / lengths)
    floor = min(50, total // len(fp["lengths"]))
    assert fp["floor"] == floor
    assert fp["sequences"] == study_common.allocate(total, prop.sequences, floor=floor)


def test_identity_fit_and_control_variate_by_hand():
    # Exact data y_m = c lambda**(m-1) are fitted exactly, whatever the weights.
    m = np.array([1.0, 2, 3, 6, 12, 24])
    y = 0.9 * 0.98 ** (m - 1)
    assert study_coverage._identity_fit(m, y, np.linspace(1, 3, 6) * 1e-3) == pytest.approx(0.98, abs=1e-9)
    lam, se = study_coverage._fit_with_se(m, y, np.full(6, 1e-3))
    assert lam == pytest.approx(0.98, abs=1e-9) and 0 < se < 1e-3
    # Least-squares control variate (common practice): F = (1, 2, 4), G = (0, 1, 2), mu = 1 gives
    # beta = cov(F, G) / var(G) = 1.5, corrected F - 1.5 (G - 1) = (2.5, 2, 2.5): mean 7/3,
    # sample sd sqrt(1/12), standard error sqrt(1/12) / sqrt(3) = 1/6.
    mean, se = study_coverage._cv_stats(np.array([1.0, 2, 4]), np.array([0.0, 1, 2]), 1.0)
    assert mean == pytest.approx(7 / 3) and se == pytest.approx(1 / 6)


def test_decay_only_fidelity_interval_matches_analyze():
    # Slow, obviously-correct reference: the whole analysis, whose figures.decay_fidelity is the
    # interval the decay-only shortcut of the fidelity plan claims to reproduce.
    import robusttomo as rt
    from robusttomo import metrics

    n, e, seed = 1, 0.03, 4242
    fp = {"lengths": [1, 2, 3, 8, 16], "sequences": [40, 40, 40, 30, 30]}
    t = {"n": n, "readout": e, "seed": seed, "bootstrap": 30, "fidelity_plan": fp, "decay_only": True}
    got = study_accuracy._fid_task(t)["ours_fid"]
    err = study_common.general_error(n)
    dev = study_common.device(n, err, e)
    plan = rt.make_plan(n_qubits=n, lengths=fp["lengths"], sequences=fp["sequences"], seed=seed + 10)
    rec = rt.analyze(plan, rt.simulate(plan, dev, seed=seed + 11), bootstrap=30, seed=seed + 12, models=False,
                     ranges=False, diamond=False)
    ref = rec.figures.decay_fidelity
    assert got["low"] == pytest.approx(ref.low, abs=1e-12) and got["high"] == pytest.approx(ref.high, abs=1e-12)
    r_true = 1 - metrics.average_gate_fidelity(err)
    assert got["infidelity_error"] == pytest.approx((1 - ref.value) - r_true, abs=1e-12)


def test_reduced_model_study_runs_at_its_smallest_size(tmp_path):
    # benchmarks/study_models.py at a tiny size: one seed per truth, no sweep; checks the rows
    # it writes, not its conclusions (those need 10^4 sequences, docs/benchmarks.md)
    import study_models

    out = tmp_path / "rows.json"
    assert study_models.main(["--repeats", "1", "--bootstrap", "5", "--sequences", "600", "--plentiful", "600",
                              "--sweep-repeats", "0", "--json", str(out)]) == 0
    rows = json.loads(out.read_text())
    assert len(rows) == 3 and {r["truth"] for r in rows} == {"inside", "outside"}
    names = {"full", "coherent+stochastic", "pauli", "coherent"}
    for r in rows:
        errs = [r["err_linear"], r["err_cptp"], r["err_reduced"]]
        assert all(math.isfinite(e) and e > 0 for e in errs)
        assert r["chosen_analyze"] in names and r["chosen_aic"] in names
