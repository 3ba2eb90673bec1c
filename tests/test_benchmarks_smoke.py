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
    shots = [side[m]["shots"] for m in ("ours", "tomography", "benchmarking")]
    assert max(shots) - min(shots) <= 0.01 * max(shots)
    g = res["speed"]["grid"][0]
    assert g["correlations_s"] > 0 and g["floor_s"] > 0 and g["peak_traced_mb"] > 0
    cov = res["coverage"]["coverage"]["rows"][0]
    assert cov["agf"]["trials"] == 2 and 0 <= cov["agf"]["hits"] <= 2


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
