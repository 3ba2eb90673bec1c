"""The whole analysis: reconstruction accuracy, interval coverage, interleaved gate error, files.

External references:
* F_avg = (d F_e + 1)/(d + 1): "A simple formula for the average gate fidelity of a quantum
  dynamical operation", Phys. Lett. A 303, 249 (2002); evaluated on the TRUE channel.
* Diamond distance of the TRUE channel by the SDP of "Simpler semidefinite programs for
  completely bounded norms", Chicago J. Theor. Comput. Sci. 2013 (robusttomo.metrics, itself
  checked against closed forms in tests/test_metrics.py).
* Classic interleaved estimate and its bounds: "Efficient measurement of quantum gate error by
  interleaved randomized benchmarking", PRL 109, 080505 (2012).
* A 95% interval should cover the truth in about 95% of experiments (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

import robusttomo as rt
from robusttomo import _io, metrics
from robusttomo.channels import Channel, amplitude_damping, depolarizing, embed, random_channel, rotation
from robusttomo.errors import DataError


def _two_qubit_truth() -> Channel:
    return rotation("ZZ", 0.08) @ embed(amplitude_damping(0.03), [1], 2) @ depolarizing(2, 0.985)


@pytest.fixture(scope="module")
def two_qubit_result():
    err = _two_qubit_truth()
    plan = rt.make_plan(n_qubits=2, lengths=[1, 2, 3, 4, 8, 16], sequences=[300, 1500, 200, 200, 150, 150],
                        shots=100, seed=11)
    dev = rt.Device.build(2, error=err, readout=[(0.03, 0.03), (0.03, 0.03)], prep_flip=[0.01, 0.01])
    counts = rt.simulate(plan, dev, seed=12)
    rec = rt.analyze(plan, counts, bootstrap=40, seed=13)
    return err, plan, counts, rec


@pytest.mark.slow
def test_two_qubit_reconstruction_within_predicted_error(two_qubit_result):
    err, _, _, rec = two_qubit_result
    block_error = np.linalg.norm(rec.error_channel.unital_block - err.unital_block)
    assert block_error <= 2 * rec.unital_block_error, (block_error, rec.unital_block_error)
    assert rec.error_channel.is_cp(atol=1e-7) and rec.error_channel.is_tp(atol=1e-9)
    f = rec.figures
    assert f.average_gate_fidelity.contains(metrics.average_gate_fidelity(err))
    assert f.diamond_distance.contains(metrics.diamond_distance(err))
    # the true non-unital entries lie inside the reported ranges (the data do not fix them)
    t = err.nonunital_vector
    assert np.all(rec.nonunital_ranges[:, 0] <= t + 1e-9) and np.all(t <= rec.nonunital_ranges[:, 1] + 1e-9)
    # the reconstructed fidelity agrees with the identity-probe decay within its interval
    assert f.decay_fidelity.low - 1e-4 <= f.average_gate_fidelity.value <= f.decay_fidelity.high + 1e-4
    assert f.diamond_distance_range.low <= f.diamond_distance.value + 1e-6
    assert {m.name for m in rec.models} == {"full", "coherent+stochastic", "pauli", "coherent"}


def test_result_file_round_trip(two_qubit_result, tmp_path):
    *_, rec = two_qubit_result
    path = tmp_path / "result.h5"
    rt.save_reconstruction(rec, path)
    back = rt.load_reconstruction(path)
    assert back.figures == rec.figures
    np.testing.assert_array_equal(back.error_channel.ptm, rec.error_channel.ptm)
    np.testing.assert_array_equal(back.decays.lambdas, rec.decays.lambdas)
    assert back.decays.probes.labels == rec.decays.probes.labels
    assert back.warnings == rec.warnings and back.options == dict(rec.options)
    with pytest.raises(FileExistsError):
        rt.save_reconstruction(rec, path)
    rt.save_reconstruction(rec, path, force=True)


@pytest.mark.parametrize("mutate, match", [
    (lambda f: f.attrs.__setitem__("schema_version", 99), "schema_version 99"),
    (lambda f: f.attrs.__setitem__("kind", _io.fixed_text("other")), "field 'kind'"),
    # variable-length text is refused unread (a corrupt heap can hang the HDF5 library)
    (lambda f: f.attrs.__setitem__("kind", "robusttomo-result"), "unsupported type"),
    (lambda f: f["reconstruction"].attrs.__delitem__("n_qubits"), "n_qubits"),
    (lambda f: f["reconstruction"].attrs.__setitem__("mode", _io.fixed_text("sideways")), "reconstruction"),
])
def test_result_file_validation(two_qubit_result, tmp_path, mutate, match):
    import h5py

    *_, rec = two_qubit_result
    path = tmp_path / "bad.h5"
    rt.save_reconstruction(rec, path)
    with h5py.File(path, "r+") as f:
        mutate(f)
    with pytest.raises(DataError, match=match):
        rt.load_reconstruction(path)


def test_result_file_not_hdf5(tmp_path):
    p = tmp_path / "junk.h5"
    p.write_bytes(b"not an hdf5 file")
    with pytest.raises(DataError, match="not an HDF5 file"):
        rt.load_reconstruction(p)


@pytest.mark.slow
def test_interval_coverage_one_qubit():
    """95% interval of the average gate fidelity covers the truth in 90-99% of 100 experiments."""
    rng = np.random.default_rng(2025)
    err = rotation("X", 0.06) @ amplitude_damping(0.02) @ depolarizing(1, 0.99)
    truth = metrics.average_gate_fidelity(err)
    dev = rt.Device.build(1, error=err, readout=[(0.03, 0.05)], prep_flip=[0.01])
    hits = 0
    for i in range(100):
        # 120+ sequences per length: below ~50 the between-sequence spread (and so every
        # standard error) is itself too uncertain for nominal coverage (seen: 87% at 40)
        plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=[120, 240, 120, 120], shots=100,
                            seed=int(rng.integers(1 << 31)))
        counts = rt.simulate(plan, dev, seed=int(rng.integers(1 << 31)))
        rec = rt.analyze(plan, counts, bootstrap=60, seed=i, models=False, ranges=False, diamond=False)
        hits += rec.figures.average_gate_fidelity.contains(truth)
    assert 90 <= hits <= 99, hits


@pytest.mark.slow
def test_interleaved_cz_error_and_classic_bounds():
    rng = np.random.default_rng(3)
    err = depolarizing(2, 0.99) @ random_channel(2, 0.05, rng)
    err_cz = rotation("ZZ", 0.05) @ embed(amplitude_damping(0.02), [0], 2) @ depolarizing(2, 0.99)
    plan = rt.make_plan(n_qubits=2, lengths=[1, 2, 3, 6, 12], sequences=[200, 1200, 150, 150, 150], shots=100,
                        seed=5, interleave="cz")
    dev = rt.Device.build(2, error=err, interleaved_error=err_cz, readout=[(0.02, 0.03)] * 2, prep_flip=[0.01] * 2)
    counts = rt.simulate(plan, dev, seed=6)
    rec = rt.analyze(plan, counts, bootstrap=40, seed=7, models=False)
    assert rec.mode is rt.assess.AnalysisMode.INTERLEAVED and rec.target_label == "cz"
    f = rec.figures
    assert f.average_gate_fidelity.contains(metrics.average_gate_fidelity(err_cz))
    block_error = np.linalg.norm(rec.error_channel.unital_block - err_cz.unital_block)
    assert block_error <= 2 * rec.unital_block_error, (block_error, rec.unital_block_error)
    ci = rec.classic_interleaved
    true_error = 1 - metrics.average_gate_fidelity(err_cz)
    assert ci.low_bound <= true_error <= ci.high_bound


def test_analyze_rejects_foreign_counts():
    plan = rt.make_plan(n_qubits=1, lengths=[1, 2], sequences=30, shots=10, seed=1)
    other = rt.make_plan(n_qubits=1, lengths=[1, 2], sequences=30, shots=10, seed=2)
    counts = rt.simulate(other, rt.Device.build(1), seed=1)
    with pytest.raises(DataError, match="plan_fingerprint"):
        rt.analyze(plan, counts, bootstrap=0)
    with pytest.raises(ValueError, match="'bootstrap' must be a non-negative integer"):
        rt.analyze(other, counts, bootstrap=-3)


def test_result_without_models_round_trips(tmp_path):
    """Regression: empty tuples (no models) must save and load."""
    plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4], sequences=40, shots=50, seed=1)
    counts = rt.simulate(plan, rt.Device.build(1, readout=[(0.02, 0.02)]), seed=2)
    rec = rt.analyze(plan, counts, bootstrap=4, seed=3, models=False, ranges=False)
    rt.save_reconstruction(rec, tmp_path / "r.h5")
    back = rt.load_reconstruction(tmp_path / "r.h5")
    assert back.models == () and back.figures.average_gate_fidelity == rec.figures.average_gate_fidelity


def test_too_few_sequences_degrade_to_reported_gaps_not_a_crash():
    # three sequences at each long length: their control-variate-corrected values do not vary,
    # the decays' covariance is singular and the range programs cannot be solved; the analysis
    # must still return, say why, and leave the ranges empty rather than wrong
    lengths = (1, 2, 3, 6, 12, 24)
    plan = rt.make_plan(n_qubits=1, lengths=lengths, sequences=[17, 17, 17, 3, 3, 3], seed=0)
    dev = rt.Device.build(1, error=random_channel(1, 0.1, np.random.default_rng(7001)), readout=[(0.02, 0.04)])
    rec = rt.analyze(plan, rt.simulate(plan, dev, seed=1), bootstrap=4, seed=3, models=False)
    assert any("do not vary over its sequences" in w and "length 6" in w for w in rec.warnings)
    span = rec.figures.diamond_distance_range
    if any("not computed" in w for w in rec.warnings):
        assert np.isnan(span.low) and np.isnan(span.high)
        assert "not computed" in span.method
    assert np.isfinite(rec.figures.average_gate_fidelity.value)


def test_range_solver_failure_is_reported(monkeypatch):
    from robusttomo import reconstruct as rc

    def fail(self, *a, **k):
        raise rc.SolverError("min t[0]: forced failure")

    monkeypatch.setattr(rc.CptpFitter, "nonunital_range", fail)
    plan = rt.make_plan(n_qubits=1, lengths=(1, 2, 3, 6), sequences=60, seed=2)
    dev = rt.Device.build(1, error=rotation("X", 0.1) @ depolarizing(1, 0.99), readout=[(0.02, 0.03)])
    rec = rt.analyze(plan, rt.simulate(plan, dev, seed=3), bootstrap=20, seed=4, models=False)
    joint = [w for w in rec.warnings if w.startswith("ranges over the joint region not computed")]
    prof = [w for w in rec.warnings if w.startswith("diamond-distance profile interval") and "not computed" in w]
    assert len(joint) == 1 and "forced failure" in joint[0] and len(prof) == 1
    assert np.all(np.isnan(rec.nonunital_ranges))
    span = rec.figures.diamond_distance_range
    assert np.isnan(span.low) and "not computed" in span.method
    # the point value stays; its interval (the profile interval) is left empty, not guessed
    dd = rec.figures.diamond_distance
    assert np.isfinite(dd.value) and np.isnan(dd.low) and np.isnan(dd.high)
    assert np.isfinite(rec.figures.average_gate_fidelity.low)


def test_decay_bootstrap_only_keeps_the_fidelity_intervals():
    # refits=False skips the CPTP re-fits; the reference-mode fidelity intervals come from the
    # identity decay's bootstrap alone, so they equal those of the full analysis (same seed)
    plan = rt.make_plan(n_qubits=1, lengths=(1, 2, 3, 6, 12), sequences=60, seed=5)
    dev = rt.Device.build(1, error=rotation("X", 0.08) @ depolarizing(1, 0.99), readout=[(0.02, 0.03)])
    counts = rt.simulate(plan, dev, seed=6)
    full = rt.analyze(plan, counts, bootstrap=30, seed=7, models=False, ranges=False)
    fast = rt.analyze(plan, counts, bootstrap=30, seed=7, models=False, ranges=False, refits=False)
    for name in ("average_gate_fidelity", "entanglement_fidelity", "decay_fidelity"):
        a, b = getattr(full.figures, name), getattr(fast.figures, name)
        assert np.isfinite(b.low) and (a.value, a.low, a.high) == (b.value, b.low, b.high)
    assert np.isnan(fast.figures.unitarity.low) and np.isnan(fast.figures.diamond_distance.low)
    assert np.isfinite(full.figures.unitarity.low)
    assert np.isnan(fast.unital_block_error) and fast.options["refits"] is False
    with pytest.raises(TypeError, match="'refits' must be True or False"):
        rt.analyze(plan, counts, bootstrap=0, refits="no")
