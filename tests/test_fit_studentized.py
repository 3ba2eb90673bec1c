"""The studentized (bootstrap-t) interval of the identity decay and what it rests on.

References: the Gauss-Newton standard error is checked against ``scipy.optimize.curve_fit``
with ``absolute_sigma=True`` (a general-purpose least-squares library: its ``pcov`` is
``(J^T W J)^-1`` at the solution); the interval is the bootstrap-t interval of "Bootstrap
confidence intervals", Statistical Science 11, 189 (1996), section 3.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize

import robusttomo as rt
from robusttomo import fit
from robusttomo.channels import amplitude_damping, depolarizing, rotation
from robusttomo.estimate import compute_correlations
from common_data import random_plan  # shared test builders


def _simulated_corr(n, lengths, k, seed):
    rng = np.random.default_rng(seed)
    plan = random_plan(n, lengths, k, rng)
    err = rotation("X", 0.05) @ depolarizing(1, 0.98) if n == 1 else depolarizing(2, 0.97)
    dev = rt.Device.build(n, error=err, readout=[(0.02, 0.04)] * n)
    return compute_correlations(plan, rt.simulate(plan, dev, seed=seed + 1))


def _joint_inputs(corr):
    design = fit._make_design(corr)
    lm = fit._length_means(corr, True)
    means = [x[0] for x in lm]
    sig = fit._stderr_of([x[1] for x in lm])
    c, lam = fit._joint_fit(design, corr, means, sig)
    return design, means, sig, c, lam


@pytest.mark.parametrize("n, lengths", [(1, [1, 2, 3, 6, 12]), (2, [1, 2, 3, 4, 8])])
def test_gauss_newton_stderr_matches_curve_fit(n, lengths):
    corr = _simulated_corr(n, lengths, 40, 11 + n)
    design, means, sig, c, lam = _joint_inputs(corr)
    # every (probe, length) datum of the joint fit as one curve_fit observation
    probes_with_data = np.unique(np.concatenate([design.probe_rows[i] for i, m in enumerate(corr.lengths) if m > 1]))
    col = {int(a): 1 + j for j, a in enumerate(probes_with_data)}
    xs, ys, ss = [], [], []
    for li, m in enumerate(corr.lengths):
        if m == 1:
            xs.append((1, 0))
            ys.append(means[0][0])
            ss.append(sig[0][0])
            continue
        for j, a in enumerate(design.probe_rows[li]):
            xs.append((m, col[int(a)]))
            ys.append(means[li][j])
            ss.append(sig[li][j])
    xs = np.array(xs)

    def model(x, *theta):
        t = np.asarray(theta)
        ms, cols = x[:, 0], x[:, 1].astype(int)
        return np.where(ms == 1, t[0], t[0] * t[cols] ** (ms - 1))

    p0 = np.concatenate([[c], lam[probes_with_data]])
    popt, pcov = scipy.optimize.curve_fit(model, xs, np.array(ys), p0=p0, sigma=np.array(ss), absolute_sigma=True)
    np.testing.assert_allclose(popt, p0, rtol=1e-6, atol=1e-9)  # the same optimum
    for a in (corr.probes.identity_index, int(probes_with_data[-1])):
        assert fit._gn_stderr(design, corr, c, lam, sig, a) == pytest.approx(np.sqrt(pcov[col[a], col[a]]), rel=1e-6)


def test_bootstrap_replicates_reestimate_their_weights():
    corr = _simulated_corr(1, [1, 2, 3, 6], 30, 5)
    dec = fit.fit_decays(corr, bootstrap=3, seed=9)
    design, means, sig, c, lam = _joint_inputs(corr)
    ss = np.random.SeedSequence(9)
    seed0 = int(ss.spawn(3)[0].generate_state(1)[0])
    rng = np.random.default_rng(seed0)
    picks = [rng.integers(0, s.values.shape[0], size=s.values.shape[0]) for s in corr.stats]
    lm = fit._length_means(corr, True, picks)
    own = fit._stderr_of([x[1] for x in lm])
    start = np.concatenate([[c], lam[design.slow]])
    c_own, lam_own = fit._joint_fit(design, corr, [x[0] for x in lm], own, start=start)
    c_fixed, lam_fixed = fit._joint_fit(design, corr, [x[0] for x in lm], sig, start=start)
    np.testing.assert_allclose(dec.bootstrap_lambdas[0], lam_own, rtol=0, atol=1e-12)
    assert not np.allclose(lam_own, lam_fixed, rtol=0, atol=1e-12)  # the weights do matter here
    ident = corr.probes.identity_index
    assert dec.bootstrap_identity_gn_stderr[0] == pytest.approx(fit._gn_stderr(design, corr, c_own, lam_own, own, ident))


def test_identity_interval_is_the_bootstrap_t_interval():
    corr = _simulated_corr(1, [1, 2, 3, 6, 12], 40, 21)
    dec = fit.fit_decays(corr, bootstrap=80, seed=4)
    ident = corr.probes.identity_index
    p, se = dec.identity_decay, dec.identity_gn_stderr
    t = (dec.bootstrap_lambdas[:, ident] - p) / dec.bootstrap_identity_gn_stderr
    lo, hi = dec.identity_decay_interval()
    assert lo == pytest.approx(p - np.quantile(t, 0.975) * se, abs=1e-15)
    assert hi == pytest.approx(p - np.quantile(t, 0.025) * se, abs=1e-15)
    assert lo < p < hi
    # the scale is the data's own model-based error, close to the sandwich error at this size
    assert se == pytest.approx(dec.identity_decay_stderr, rel=0.5)
    assert fit.fit_decays(corr, bootstrap=0).identity_decay_interval() == (pytest.approx(np.nan, nan_ok=True),) * 2
    with pytest.raises(ValueError, match="level"):
        dec.identity_decay_interval(1.5)


def test_analysis_fidelity_interval_is_the_mapped_decay_interval():
    corr_plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=60, shots=100, seed=3)
    err = rotation("X", 0.04) @ amplitude_damping(0.02)
    counts = rt.simulate(corr_plan, rt.Device.build(1, error=err, readout=[(0.02, 0.03)]), seed=4)
    rec = rt.analyze(corr_plan, counts, bootstrap=40, seed=5, models=False, ranges=False, diamond=False)
    lo, hi = rec.decays.identity_decay_interval()
    d = 2
    f = rec.figures
    assert f.decay_fidelity.low == pytest.approx(1 - (d - 1) * (1 - lo) / d, abs=1e-14)
    assert f.decay_fidelity.high == pytest.approx(1 - (d - 1) * (1 - hi) / d, abs=1e-14)
    # the anchored estimate's fidelity is the decay's, so the intervals coincide
    assert f.average_gate_fidelity.value == pytest.approx(f.decay_fidelity.value, abs=1e-12)
    assert f.average_gate_fidelity.low == pytest.approx(f.decay_fidelity.low, abs=1e-12)
    assert f.average_gate_fidelity.high == pytest.approx(f.decay_fidelity.high, abs=1e-12)
    assert f.entanglement_fidelity.low < f.entanglement_fidelity.value < f.entanglement_fidelity.high


def test_result_files_without_the_new_fields_still_load(tmp_path):
    import h5py

    plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4], sequences=30, shots=50, seed=1)
    counts = rt.simulate(plan, rt.Device.build(1, error=depolarizing(1, 0.98)), seed=2)
    rec = rt.analyze(plan, counts, bootstrap=5, seed=3, models=False, ranges=False, diamond=False)
    path = tmp_path / "r.h5"
    rt.save_reconstruction(rec, path)
    with h5py.File(path, "a") as f:  # a file written before these fields existed
        g = f["reconstruction/decays"]
        del g["bootstrap_identity_gn_stderr"]
        del g.attrs["identity_gn_stderr"]
    back = rt.load_reconstruction(path)
    assert np.isnan(back.decays.identity_gn_stderr) and back.decays.bootstrap_identity_gn_stderr is None
    np.testing.assert_array_equal(back.decays.lambdas, rec.decays.lambdas)
