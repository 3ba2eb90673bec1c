"""Tests for robusttomo.planner: predicted standard errors against repeated simulated experiments.

External references:
* Multinomial covariance of outcome frequencies, ``(diag p - p p^T) / N`` (common practice).
* The filtered correlation ``F_A(x; C) = kappa (<x| U_m A ... A U_1 |0><0| ... |x> - 1/d)``
  ("A general framework for randomized benchmarking", PRX Quantum 3, 020357 (2022); ../shared/
  THEORY.md), computed here from state vectors as a slow, obviously-correct reference.
* Variance factor ``(nu - 1)/(nu - p + k - 1)`` of least squares with an estimated covariance
  ("Least squares theory using an estimated dispersion matrix...", Proc. Fifth Berkeley Symp.
  1967; from memory), checked here by Monte Carlo.
* F_avg = (d F_e + 1)/(d + 1) ("A simple formula for the average gate fidelity of a quantum
  dynamical operation", Phys. Lett. A 303, 249 (2002)).

The statistical tests compare each predicted standard error with the spread of the same
estimate over independent simulated experiments (new random sequences and shots each time),
run as the product runs them (``estimate_decays(..., bootstrap=0)`` and the model fits).  With
``R`` repeats the observed standard deviation scatters by about ``1/sqrt(2 (R - 1))`` (8 % at 80,
11 % at 40), so the 25 % tolerance is 2.3 to 3.1 of those scatters; medians over probes or
parameters scatter less.
"""

from __future__ import annotations

import doctest
import json
import math

import h5py
import numpy as np
import pytest

import robusttomo as rt
from robusttomo import channels as ch
from robusttomo import planner as pl
from robusttomo.clifford import clifford_unitaries
from robusttomo.errors import DataError
from robusttomo.estimate import compute_correlations, default_probes, kappa
from robusttomo.fit import estimate_decays, fit_decays
from robusttomo.metrics import average_gate_fidelity
from robusttomo.models import fit_coherent_model, fit_generator_model, fit_pauli_model
from robusttomo.plan import SequenceKind, _check_interleave, load_plan, make_plan, save_plan
from robusttomo.reconstruct import linear_estimate
from robusttomo.simulate import Device

COSTS = {"seconds_per_shot": 2e-4, "seconds_per_sequence": 0.05}


def _agf_of_block(b: np.ndarray, d: int) -> float:
    # F_e = (1 + tr B) / d**2 for a trace-preserving channel, F_avg = (d F_e + 1) / (d + 1)
    return ((1 + np.trace(b)) / d + 1) / (d + 1)


def _sd(a: object) -> np.ndarray:
    return np.std(np.asarray(a), axis=0, ddof=1)


def _experiments(device: Device, kw: dict, reps: int, seed: int, *, interleave: str | None = None,
                 models: dict | None = None) -> dict[str, np.ndarray]:
    """Repeat whole simulated experiments; return every estimate the predictions cover."""
    n = device.n_qubits
    d = 2**n
    out: dict[str, list] = {"fid": [], "fid_nocv": [], "lam": [], "agf": [], "block": [], "classic": []}
    models = models or {}
    for name in models:
        out[name] = []
    for r in range(reps):
        plan = make_plan(n_qubits=n, seed=seed + r, interleave=interleave, **kw)
        counts = rt.simulate(plan, device, seed=seed + 10**6 + r)
        corr = compute_correlations(plan, counts)
        dec = fit_decays(corr, bootstrap=0)
        out["fid"].append(dec.average_gate_fidelity)
        out["fid_nocv"].append(fit_decays(corr, bootstrap=0, control_variate=False).average_gate_fidelity)
        out["lam"].append(dec.lambdas)
        obs = dec.observations()
        b_ref = linear_estimate(obs)
        if interleave is None:
            b = b_ref
        else:
            dint = estimate_decays(plan, counts, bootstrap=0, kind="interleaved")
            from robusttomo import _pauli

            bg = _pauli.ptm_of_unitary(plan.interleave.unitary)[1:, 1:]
            b = linear_estimate(dint.observations()) @ np.linalg.inv(bg @ b_ref @ bg.T)
            out["classic"].append((d - 1) * (1 - dint.identity_decay / dec.identity_decay) / d)
        out["agf"].append(_agf_of_block(b, d))
        out["block"].append(b.reshape(-1))
        for name, (fit, start) in models.items():
            res = fit(obs) if start is None else fit(obs, start=start)
            out[name].append(list(res.parameters.values()))
    return {k: np.array(v) for k, v in out.items() if v}


def _ratio(observed: float, predicted: float) -> float:
    return float(observed / predicted)


# ---- the outcome-resolved values and the variance split ---------------------------------------
def _slow_outcome_values(plan, block, probes, gate_u):
    """F(x; s) from state vectors: U_1|0>, then (probe after G) and the next Clifford, final G."""
    n = plan.n_qubits
    d = 2**n
    pu = clifford_unitaries(n, probes.clifford_indices)
    g = np.eye(d) if gate_u is None else gate_u
    out = np.zeros((block.n_sequences, probes.n_probes, d))
    for k, row in enumerate(block.cliffords):
        cu = clifford_unitaries(n, row)
        for a in range(probes.n_probes):
            psi = np.zeros(d, dtype=complex)
            psi[0] = 1.0
            psi = cu[0] @ psi
            for t in range(1, len(row)):
                psi = cu[t] @ (pu[a] @ (g @ psi))
            psi = g @ psi
            out[k, a] = kappa(d) * (np.abs(psi) ** 2 - 1.0 / d)
    return out


@pytest.mark.parametrize("n, gate", [(1, None), (1, "h"), (2, None), (2, "cz")])
def test_outcome_values_match_state_vectors_and_the_estimator(n, gate):
    g = _check_interleave(gate, n)
    kind = "reference" if gate is None else "interleaved"
    plan = make_plan(n_qubits=n, lengths=[1, 2, 3], sequences=3, shots=1, seed=5, interleave=g,
                     include_reference=gate is None)
    dev = pl.assumed_device(n, average_error=0.02, readout_error=0.03, prep_error=0.01)
    counts = rt.simulate(plan, dev, exact=True)
    corr = compute_correlations(plan, counts, kind=kind)
    fx = pl._outcome_values(plan, corr)
    want = SequenceKind(kind)
    for s in corr.stats:
        block = next(b for b in plan.blocks if b.kind is want and b.length == s.length)
        p = counts.for_block(plan, block) / plan.shots
        # the estimator's per-sequence value is the outcome-weighted sum of the resolved values
        np.testing.assert_allclose(np.einsum("kqx,kx->kq", fx[s.length], p), s.values, atol=1e-10)
        slow = _slow_outcome_values(plan, block, corr.probes, None if g is None else g.unitary)
        expect = slow[:, :1] if s.length == 1 else slow[:, s.probes]
        np.testing.assert_allclose(fx[s.length], expect, atol=1e-10)


def test_shot_part_matches_multinomial_sampling():
    # multinomial frequencies w with Cov(w) = (diag p - p p^T)/N (common practice): the measured
    # per-sequence value sum_x w_x F(x) has variance (sum_x p F^2 - (sum_x p F)^2)/N
    n, shots = 1, 50
    dev = pl.assumed_device(n, average_error=0.02, readout_error=0.05)
    plan = make_plan(n_qubits=n, lengths=[1, 2], sequences=4, shots=shots, seed=3)
    counts = rt.simulate(plan, dev, exact=True)
    corr = compute_correlations(plan, counts)
    f = pl._outcome_values(plan, corr)[2]
    p = counts.for_block(plan, plan.block("reference", 2)) / shots
    rng = np.random.default_rng(11)
    for k in range(4):
        w = rng.multinomial(shots, p[k], size=40000) / shots
        vals = w @ f[k].T  # (draws, probes)
        expect = (np.einsum("qx,x,rx->qr", f[k], p[k], f[k]) - np.outer(f[k] @ p[k], f[k] @ p[k])) / shots
        np.testing.assert_allclose(np.cov(vals, rowvar=False), expect, rtol=0.05, atol=1e-4 * expect.max())


def test_rows_with_covariance_reproduce_it():
    rng = np.random.default_rng(2)
    a = rng.normal(size=(6, 6))
    cov = a @ a.T
    rows = pl._rows_with_covariance(cov)
    np.testing.assert_allclose(np.cov(rows, rowvar=False) / rows.shape[0], cov, atol=1e-12)
    np.testing.assert_allclose(rows.mean(axis=0), 0.0, atol=1e-12)


@pytest.mark.parametrize("n", [1, 2])
def test_sandwich_adapter_reproduces_the_fit_on_real_data(n, monkeypatch):
    """Fed a data set's own per-length spread, the prediction path gives the fit's covariance.

    (The fit's covariance without its shrinkage: the prediction is of the population covariance.)
    """
    from robusttomo import fit as _fit_mod

    monkeypatch.setattr(_fit_mod, "_shrinkage", lambda x: 0.0)
    dev = pl.assumed_device(n, average_error=0.03, readout_error=0.02)
    lengths = [1, 2, 3, 6]
    plan = make_plan(n_qubits=n, lengths=lengths, sequences=[40, 300, 60, 30], shots=50, seed=9)
    corr = compute_correlations(plan, rt.simulate(plan, dev, seed=1))
    dec = fit_decays(corr, bootstrap=0)
    stats = {}
    for s in corr.stats:
        from robusttomo import fit as _fit

        _, corrected, _ = _fit._cv_means(s.values, s.ideal, s.mu, True)
        cov = np.atleast_2d(np.cov(corrected, rowvar=False))
        stats[s.length] = pl._LengthStats(s.length, s.probes, cov, cov, np.zeros_like(cov))
    run = pl._Run(corr.kind, corr, dec.spam_constant, dec.lambdas, stats)
    alloc = {s.length: float(s.values.shape[0]) for s in corr.stats}
    cov = pl._lambda_covariance(run, alloc, 1.0, True)
    np.testing.assert_allclose(cov[1:, 1:], dec.lambda_covariance, rtol=1e-8, atol=1e-14)
    assert math.isclose(math.sqrt(cov[0, 0]), dec.spam_constant_stderr, rel_tol=1e-8)
    # the closed-form arrowhead version used by the search agrees with the fit's own algebra
    fast = pl._fast_lambda_covariance(run, alloc, 1.0, True)
    np.testing.assert_allclose(fast, cov, rtol=1e-7, atol=1e-14 * np.abs(cov).max())


def test_weight_noise_factor_matches_monte_carlo():
    # least squares weighted by a covariance estimated with nu degrees of freedom (Wishart),
    # independent of the data: variance (nu - 1)/(nu - p + k - 1) times the known-weights one
    rng = np.random.default_rng(4)
    p, k, nu = 20, 4, 40
    a = rng.normal(size=(p, p))
    sigma = a @ a.T / p + 0.1 * np.eye(p)
    jac = rng.normal(size=(p, k))
    chol = np.linalg.cholesky(sigma)
    est = []
    for _ in range(6000):
        s = np.cov(chol @ rng.normal(size=(p, nu + 1)))
        y = chol @ rng.normal(size=p)
        si = np.linalg.inv(s)
        est.append(np.linalg.solve(jac.T @ si @ jac, jac.T @ si @ y))
    gls = np.linalg.inv(jac.T @ np.linalg.inv(sigma) @ jac)
    ratio = np.mean(np.diag(np.cov(np.array(est), rowvar=False)) / np.diag(gls))
    assert ratio == pytest.approx(pl._weight_noise_factor(nu, p, k), rel=0.06)
    assert pl._weight_noise_factor(nu, p, p) == 1.0
    assert pl._weight_noise_factor(10, 20, 2) == math.inf


def test_variance_split_is_reported_and_the_control_variate_removes_the_between_part():
    dev = pl.assumed_device(2, average_error=0.017, readout_error=0.03, prep_error=0.01)
    plan = make_plan(n_qubits=2, lengths=[1, 2, 4], sequences=100, shots=100, seed=2)
    pred = pl.predict(plan, dev, pilot_sequences=1000)
    rows = {(v.quantity, v.length): v for v in pred.variances}
    ident = rows[("identity probe", 2)]
    block = rows[("unital block", 2)]
    # THEORY.md ("Cost", measured for two qubits, readout 2-4 %, F_avg 0.983): identity probe
    # 1.30 between without / 0.003 with the control variate, 0.58 per shot; unital block
    # (Frobenius squared) about 1076 / 12, 6246 per shot.  Same orders of magnitude here.
    assert 0.8 < ident.between_without_cv < 2.0 and ident.between < 0.01 and 0.3 < ident.shot < 1.0
    assert 600 < block.between_without_cv < 1600 and block.between < 30 and 3000 < block.shot < 9000
    assert pred.figure("decay_fidelity").cost_factor_without_cv > 5


# ---- the assumed device ----------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_assumed_device_has_the_stated_errors(n):
    dev = pl.assumed_device(n, average_error=0.013, readout_error=0.02, prep_error=0.01,
                            coherent_fraction=0.25, gate_error=0.004)
    d = 2**n
    assert 1 - average_gate_fidelity(dev.error) == pytest.approx(0.013, abs=1e-12)
    assert 1 - average_gate_fidelity(dev.interleaved_error) == pytest.approx(0.004, abs=1e-12)
    # the coherent part: the channel's unitary factor alone has the stated share of the error
    # (B_L = p B_U with B_U orthogonal, so B_U is B_L over its largest eigenvalue modulus)
    ptm = dev.error.ptm
    rot = ptm[1:, 1:] / np.abs(np.linalg.eigvals(ptm[1:, 1:])).max()
    u_err = 1 - ((1 + np.trace(rot)) / d + 1) / (d + 1)
    assert u_err == pytest.approx(0.25 * 0.013, rel=1e-9)
    assert dev.readout[1, 0] == pytest.approx(0.02 * (1 - 0.02) ** (n - 1))
    assert dev.prep[0, 0].real == pytest.approx((1 - 0.01) ** n)
    assert pl.assumed_device(n, average_error=0.01, readout_error=0.0).interleaved_error is None


def test_gate_dependent_device_uses_the_pilot_decays():
    # with noise that depends on the compiled gates there is no single error channel: the
    # linearization point is the pilot's own fit, close to a large exact-probability run's
    dev = Device.build(1, error=ch.depolarizing(1, 0.99), gate_errors={"h": ch.rotation("X", 0.1)},
                       readout=[(0.02, 0.02)])
    plan = make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=50, shots=100, seed=1)
    pred = pl.predict(plan, dev, pilot_sequences=400)
    big = make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=2000, shots=100, seed=2)
    ref = estimate_decays(big, rt.simulate(big, dev, exact=True), bootstrap=0)
    np.testing.assert_allclose(pred.lambdas, ref.lambdas, atol=0.01)
    assert all(math.isfinite(f.stderr) for f in pred.figures)


# ---- predict: agreement with repeated experiments --------------------------------------------
def test_predict_one_qubit_agrees_with_repeated_experiments():
    dev = pl.assumed_device(1, average_error=0.02, readout_error=0.03, prep_error=0.01, coherent_fraction=0.2)
    kw = {"lengths": [1, 2, 3, 6, 12, 24], "sequences": [200, 400, 400, 100, 100, 100], "shots": 200}
    pred = pl.predict(make_plan(n_qubits=1, seed=0, **kw), dev)
    gen = pred.model("coherent+stochastic")
    assert not gen.near_bound.any() and gen.misfit_chi2 < 1e-6
    res = _experiments(dev, kw, 80, 1000, models={"gen": (fit_generator_model, dict(zip(gen.labels, gen.values)))})
    assert _ratio(_sd(res["fid"]), pred.stderr("decay_fidelity")) == pytest.approx(1, abs=0.25)
    assert _ratio(_sd(res["fid_nocv"]), pred.figure("decay_fidelity").stderr_without_cv) == pytest.approx(1, abs=0.25)
    lam = _sd(res["lam"]) / pred.lambda_stderr
    assert np.median(lam) == pytest.approx(1, abs=0.25) and lam[0] == pytest.approx(1, abs=0.25)
    assert _ratio(_sd(res["agf"]), pred.stderr("average_gate_fidelity")) == pytest.approx(1, abs=0.25)
    rms = math.sqrt(np.mean(np.sum((res["block"] - dev.error.unital_block.reshape(-1)) ** 2, axis=1)))
    assert _ratio(rms, pred.stderr("unital_block")) == pytest.approx(1, abs=0.25)
    r_gen = _sd(res["gen"]) / gen.stderr
    assert np.median(r_gen) == pytest.approx(1, abs=0.25) and np.all(np.abs(r_gen - 1) < 0.35)


@pytest.mark.parametrize("which", ["pauli", "coherent"])
def test_predict_one_qubit_models_on_devices_they_describe(which):
    if which == "pauli":  # a Pauli channel: the Pauli model is exact
        err = ch.pauli_channel({"X": 0.01, "Y": 0.006, "Z": 0.02})
        fit, start = fit_pauli_model, False
    else:  # a unitary error: the coherent model is exact
        err = ch.rotation("X", 0.05) @ ch.rotation("Z", 0.12)
        fit, start = fit_coherent_model, True
    dev = Device.build(1, error=err, readout=[(0.03, 0.02)], prep_flip=[0.01])
    kw = {"lengths": [1, 2, 3, 6, 12], "sequences": [150, 300, 300, 80, 80], "shots": 300}
    pred = pl.predict(make_plan(n_qubits=1, seed=0, **kw), dev)
    mp = pred.model(which)
    assert mp.misfit_chi2 < 1e-6 and not mp.near_bound.any()
    res = _experiments(dev, kw, 80, 3000, models={which: (fit, dict(zip(mp.labels, mp.values)) if start else None)})
    r = _sd(res[which]) / mp.stderr
    assert np.median(r) == pytest.approx(1, abs=0.25) and np.all(np.abs(r - 1) < 0.35)


def test_predict_interleaved_gate_fidelity_agrees_with_repeated_experiments():
    dev = pl.assumed_device(1, average_error=0.02, readout_error=0.03, prep_error=0.01, gate_error=0.01)
    kw = {"lengths": [1, 2, 3, 6, 12], "sequences": [200, 400, 400, 100, 100], "shots": 200}
    pred = pl.predict(make_plan(n_qubits=1, seed=0, interleave="h", **kw), dev)
    assert pred.mode == "interleaved" and pred.figure("average_gate_fidelity").value == pytest.approx(0.99)
    res = _experiments(dev, kw, 80, 5000, interleave="h")
    assert _ratio(_sd(res["agf"]), pred.stderr("average_gate_fidelity")) == pytest.approx(1, abs=0.25)
    assert _ratio(_sd(res["classic"]), pred.stderr("classic_interleaved_error")) == pytest.approx(1, abs=0.25)
    rms = math.sqrt(np.mean(np.sum((res["block"] - dev.interleaved_error.unital_block.reshape(-1)) ** 2, axis=1)))
    assert _ratio(rms, pred.stderr("unital_block")) == pytest.approx(1, abs=0.25)


@pytest.mark.slow
def test_predict_two_qubits_agrees_with_repeated_experiments():
    dev = pl.assumed_device(2, average_error=0.08, readout_error=0.03, prep_error=0.01)
    kw = {"lengths": [1, 2, 3, 4, 8], "sequences": [400, 1000, 1000, 150, 150], "shots": 1000}
    pred = pl.predict(make_plan(n_qubits=2, seed=0, **kw), dev)
    gen = pred.model("coherent+stochastic")
    assert not gen.near_bound.any()
    # 1000 length-2 sequences for 225 probes: the fit's estimated weights add variance
    # (999 / 804 for 30 parameters), which the prediction includes
    assert any("raises their parameter variances" in w for w in pred.warnings)
    res = _experiments(dev, kw, 40, 7000, models={"gen": (fit_generator_model, dict(zip(gen.labels, gen.values)))})
    assert _ratio(_sd(res["fid"]), pred.stderr("decay_fidelity")) == pytest.approx(1, abs=0.25)
    lam = _sd(res["lam"]) / pred.lambda_stderr
    assert np.median(lam) == pytest.approx(1, abs=0.25) and lam[0] == pytest.approx(1, abs=0.25)
    rms = math.sqrt(np.mean(np.sum((res["block"] - dev.error.unital_block.reshape(-1)) ** 2, axis=1)))
    assert _ratio(rms, pred.stderr("unital_block")) == pytest.approx(1, abs=0.25)
    assert np.median(_sd(res["gen"]) / gen.stderr) == pytest.approx(1, abs=0.25)


# ---- choose_plan ------------------------------------------------------------------------------
@pytest.mark.slow
def test_proposed_plan_reaches_its_target_and_thirty_percent_fewer_sequences_do_not():
    """The error a run reports is its standard error; the proposal must keep it at or below
    the target in at least 80 % of 30 repeats, and the same plan with 30 % fewer sequences
    must not.  (A per-repeat |estimate - truth| <= target criterion could not tell the two
    apart: the chance of a normal draw within a bound moves by under 9 points when its
    spread grows by 20 %.)  The target is chosen so that the plan has hundreds of sequences
    at its long lengths: the reported error then scatters by about 5 % between runs, well
    below the 20 % step in the standard error from 30 % fewer sequences."""
    dev = pl.assumed_device(1, average_error=0.01, readout_error=0.03, prep_error=0.01)
    target = 1e-4
    prop = pl.choose_plan(n_qubits=1, device=dev, targets={"decay_fidelity": target}, costs=COSTS,
                          lengths=[1, 2, 3, 4, 8, 16, 32, 64], seed=1)
    assert prop.prediction.stderr("decay_fidelity") <= target / prop.safety * 1.001

    def reported(sequences, seed):
        out = []
        for r in range(30):
            plan = make_plan(n_qubits=1, lengths=list(prop.lengths), sequences=list(sequences),
                             shots=prop.shots, seed=seed + r)
            dec = estimate_decays(plan, rt.simulate(plan, dev, seed=seed + 1000 + r), bootstrap=0)
            out.append(dec.average_gate_fidelity_stderr)
        return np.array(out)

    ok = reported(prop.sequences, 100)
    fewer = reported([math.ceil(0.7 * k) for k in prop.sequences], 500)
    assert np.mean(ok <= target) >= 0.8
    assert np.mean(fewer <= target) < 0.8


@pytest.fixture(scope="module")
def proposal():
    dev = pl.assumed_device(1, average_error=0.01, readout_error=0.02)
    prop = pl.choose_plan(n_qubits=1, device=dev, targets={"decay_fidelity": 2e-4, "coherent+stochastic": 2e-3},
                          costs=COSTS, lengths=[1, 2, 3, 4, 8, 16, 32], pilot_sequences=300, seed=4)
    return dev, prop


def test_proposal_is_consistent(proposal):
    dev, prop = proposal
    plan = prop.make()
    assert plan.fingerprint == prop.prediction.plan_fingerprint
    assert [b.length for b in plan.blocks] == list(prop.lengths)
    assert [b.n_sequences for b in plan.blocks] == list(prop.sequences) and plan.shots == prop.shots
    assert prop.device_seconds == pytest.approx(pl.device_seconds(plan, COSTS))
    assert prop.prediction.device_seconds == pytest.approx(prop.device_seconds)
    for name, t in prop.target_stderr.items():
        assert prop.prediction.stderr(name) <= t / prop.safety * 1.001
    assert prop.binding in prop.targets
    assert prop.device_seconds_without_cv > prop.device_seconds
    assert "\n" not in prop.explanation and prop.binding in prop.explanation and str(prop.shots) in prop.explanation
    assert min(prop.sequences) >= 50
    # a fresh prediction of the proposed plan (same pilot seed and size) gives the same numbers
    again = pl.predict(plan, dev, seed=prop.seed, pilot_sequences=300)
    for f in prop.prediction.figures:
        assert again.stderr(f.name) == pytest.approx(f.stderr, rel=1e-3)


@pytest.mark.parametrize("n, gate, overcomplete", [(1, None, False), (1, "x", False), (1, "x", True),
                                                   (2, None, False), (2, "cz", False)])
def test_fast_evaluator_matches_the_prediction(n, gate, overcomplete):
    """The search's evaluator (precomputed quadratic forms for a square probe design, general
    weighted least squares otherwise) against the prediction path built on the package's fits."""
    g = _check_interleave(gate, n)
    dev = pl.assumed_device(n, average_error=0.03, readout_error=0.02, gate_error=0.01 if g else None)
    lengths = [1, 2, 3, 4, 8]
    probes = default_probes(n, overcomplete=overcomplete)
    pil = pl._make_pilots(n, dev, probes, g, lengths, lengths, 300 if n == 1 else 500, 0)
    lay = {1: 200, 2: 1500, 3: 700, 4: 90, 8: 120}
    names = [k for k in pl.FIGURE_NAMES if g is not None or k not in pl._INTERLEAVED_ONLY]
    fast = pl._make_fast(pil, names, lay, 150)
    assert (fast.maps is None) == overcomplete
    pred = pl._prediction(pil, lay, lay if g else {}, 150, "0" * 64, float("nan"))
    se = fast.stderrs({m: float(k) for m, k in lay.items()}, 150, True)
    for k in names:
        assert se[k] == pytest.approx(pred.stderr(k), rel=1e-6), (n, gate, k)


def test_shots_follow_the_cost_of_switching():
    dev = pl.assumed_device(1, average_error=0.01, readout_error=0.02)
    kw = {"n_qubits": 1, "device": dev, "targets": {"decay_fidelity": 3e-4}, "lengths": [1, 2, 4, 8, 16],
          "pilot_sequences": 200}
    cheap = pl.choose_plan(costs={"seconds_per_shot": 1e-4, "seconds_per_sequence": 0.001}, **kw)
    dear = pl.choose_plan(costs={"seconds_per_shot": 1e-4, "seconds_per_sequence": 1.0}, **kw)
    assert dear.shots > 3 * cheap.shots
    fixed = pl.choose_plan(costs={"seconds_per_shot": 1e-4, "seconds_per_sequence": 1.0}, shots=10, **kw)
    assert fixed.shots == 10 and fixed.device_seconds >= dear.device_seconds
    half = pl.choose_plan(costs={"seconds_per_shot": 1e-4, "seconds_per_sequence": 1.0}, level=0.95,
                          targets={"decay_fidelity": 1.96 * 3e-4}, **{k: v for k, v in kw.items() if k != "targets"})
    assert half.target_stderr["decay_fidelity"] == pytest.approx(3e-4, rel=1e-3)
    assert half.sequences == pytest.approx(dear.sequences, rel=0.05)


# ---- table, JSON, plan file ---------------------------------------------------------------------
@pytest.fixture(scope="module")
def small_prediction():
    dev = pl.assumed_device(1, average_error=0.02, readout_error=0.02)
    plan = make_plan(n_qubits=1, lengths=[1, 2, 4], sequences=[30, 60, 30], shots=100, seed=3)
    return plan, pl.predict(plan, dev, pilot_sequences=200, costs=COSTS)


def test_format_and_as_dict(small_prediction):
    plan, pred = small_prediction
    text = pl.format_prediction(pred)
    for f in pred.figures:
        assert f.name in text
    assert "simulated" in text and "analytic" in text and "device time" in text
    doc = json.loads(json.dumps(pred.as_dict(covariances=True), allow_nan=False))
    assert doc["plan_fingerprint"] == plan.fingerprint
    assert len(doc["lambda_covariance"]) == len(pred.probe_labels)
    assert "lambda_covariance" not in pred.as_dict()
    assert pred.device_seconds == pytest.approx(pl.device_seconds(plan, COSTS))


def test_attach_and_load_prediction(tmp_path, small_prediction):
    plan, pred = small_prediction
    path = save_plan(plan, tmp_path / "plan.h5")
    with h5py.File(path, "r") as f:
        fp_before = f.attrs["fingerprint"]
    pl.attach_prediction(path, pred)
    assert load_plan(path).fingerprint == plan.fingerprint  # the plan still loads, unchanged
    with h5py.File(path, "r") as f:
        assert f.attrs["fingerprint"] == fp_before and "prediction" in f
    back = pl.load_prediction(path)
    assert back.as_dict(covariances=True) == pred.as_dict(covariances=True)
    with pytest.raises(FileExistsError, match="already holds a prediction"):
        pl.attach_prediction(path, pred)
    pl.attach_prediction(path, pred, force=True)
    assert [p.name for p in tmp_path.iterdir()] == ["plan.h5"]  # no temporary file left behind
    other = save_plan(make_plan(n_qubits=1, lengths=[1, 2], sequences=5, seed=8), tmp_path / "other.h5")
    with pytest.raises(ValueError, match="was made for plan"):
        pl.attach_prediction(other, pred)
    with pytest.raises(DataError, match="holds no group 'prediction'"):
        pl.load_prediction(other)


def test_load_prediction_rejects_damaged_groups(tmp_path, small_prediction):
    plan, pred = small_prediction
    path = save_plan(plan, tmp_path / "plan.h5")
    pl.attach_prediction(path, pred)
    with h5py.File(path, "r+") as f:
        f["prediction"].attrs["schema_version"] = 99
    with pytest.raises(DataError, match="schema_version 99"):
        pl.load_prediction(path)
    pl.attach_prediction(path, pred, force=True)
    with h5py.File(path, "r+") as f:
        del f["prediction/summary"]
        f["prediction"].create_dataset("summary", data="{not json", dtype=h5py.string_dtype())
    with pytest.raises(DataError, match="damaged"):
        pl.load_prediction(path)
    pl.attach_prediction(path, pred, force=True)
    with h5py.File(path, "r+") as f:
        doc = json.loads(f["prediction/summary"].asstr()[()])
        doc["lambdas"] = doc["lambdas"][:2]
        del f["prediction/summary"]
        f["prediction"].create_dataset("summary", data=json.dumps(doc), dtype=h5py.string_dtype())
    with pytest.raises(DataError, match="field 'lambdas'"):
        pl.load_prediction(path)
    pl.attach_prediction(path, pred, force=True)
    with h5py.File(path, "r+") as f:
        f["prediction"].attrs["plan_fingerprint"] = "0" * 64
    with pytest.raises(DataError, match="belongs to another plan"):
        pl.load_prediction(path)
    with pytest.raises(DataError, match="does not exist"):
        pl.load_prediction(tmp_path / "missing.h5")
    (tmp_path / "text.h5").write_text("x")
    with pytest.raises(DataError, match="not an HDF5 file"):
        pl.load_prediction(tmp_path / "text.h5")


# ---- validation ---------------------------------------------------------------------------------
_DEV1 = pl.assumed_device(1, average_error=0.01, readout_error=0.02)
_PLAN1 = make_plan(n_qubits=1, lengths=[1, 2, 4], sequences=20, seed=1)
_GOOD = {"n_qubits": 1, "device": _DEV1, "targets": {"decay_fidelity": 1e-3}, "costs": COSTS}


@pytest.mark.parametrize("kwargs, exc, match", [
    ({"average_error": 0.0, "readout_error": 0.01}, ValueError, "'average_error' must be a number in \\(0, 0.5\\]"),
    ({"average_error": 0.6, "readout_error": 0.01}, ValueError, "'average_error'"),
    ({"average_error": "0.1", "readout_error": 0.01}, TypeError, "'average_error' must be a number"),
    ({"average_error": 0.01, "readout_error": 0.5}, ValueError, "'readout_error' must be a number in \\[0, 0.5\\)"),
    ({"average_error": 0.01, "readout_error": 0.01, "prep_error": -0.1}, ValueError, "'prep_error'"),
    ({"average_error": 0.01, "readout_error": 0.01, "coherent_fraction": 1.0}, ValueError, "'coherent_fraction'"),
    ({"average_error": 0.01, "readout_error": 0.01, "gate_error": 0.0}, ValueError, "'gate_error'"),
])
def test_assumed_device_validation(kwargs, exc, match):
    with pytest.raises(exc, match=match):
        pl.assumed_device(1, **kwargs)
    with pytest.raises(ValueError, match="'n_qubits' must be 1, 2 or 3"):
        pl.assumed_device(4, average_error=0.01, readout_error=0.0)


@pytest.mark.parametrize("args, kwargs, exc, match", [
    (("plan", _DEV1), {}, TypeError, "'plan' must be a robusttomo Plan"),
    ((_PLAN1, "dev"), {}, TypeError, "'device' must be a robusttomo Device"),
    ((_PLAN1, pl.assumed_device(2, average_error=0.01, readout_error=0.0)), {}, ValueError, "has 2 qubit"),
    ((_PLAN1, _DEV1), {"seed": -1}, ValueError, "'seed' must be a non-negative integer"),
    ((_PLAN1, _DEV1), {"pilot_sequences": 10}, ValueError, "'pilot_sequences' must be at least 100"),
    ((_PLAN1, _DEV1), {"pilot_sequences": 200.0}, TypeError, "'pilot_sequences' must be an integer"),
    ((_PLAN1, _DEV1), {"probes": "all"}, TypeError, "'probes' must be a ProbeSet"),
    ((_PLAN1, _DEV1), {"probes": default_probes(2)}, ValueError, "'probes' are for 2 qubit"),
    ((_PLAN1, _DEV1), {"costs": {"seconds_per_shot": 1.0}}, ValueError, "missing \\['seconds_per_sequence'\\]"),
    ((_PLAN1, _DEV1), {"costs": {**COSTS, "x": 1}}, ValueError, "unknown \\['x'\\]"),
    ((_PLAN1, _DEV1), {"costs": {"seconds_per_shot": -1, "seconds_per_sequence": 1}}, ValueError,
     "'costs\\['seconds_per_shot'\\]' must be a finite non-negative"),
    ((_PLAN1, _DEV1), {"costs": {"seconds_per_shot": 0, "seconds_per_sequence": 0}}, ValueError, "both 0"),
    ((_PLAN1, _DEV1), {"costs": [1, 2]}, TypeError, "'costs' must be a mapping"),
    ((make_plan(n_qubits=1, lengths=[1, 2], sequences=5, seed=1, interleave="x", include_reference=False), _DEV1),
     {}, ValueError, "has no reference sequences"),
])
def test_predict_validation(args, kwargs, exc, match):
    with pytest.raises(exc, match=match):
        pl.predict(*args, **kwargs)


def test_predict_rejects_plans_without_lengths_one_and_two():
    from robusttomo.plan import Plan, SequenceBlock

    blk = SequenceBlock(SequenceKind.REFERENCE, 1, np.zeros((3, 1), dtype=np.int64), 0)
    blk3 = SequenceBlock(SequenceKind.REFERENCE, 3, np.zeros((3, 3), dtype=np.int64), 3)
    plan = Plan(n_qubits=1, shots=10, seed=0, blocks=(blk, blk3))
    with pytest.raises(ValueError, match="must include 1 and 2"):
        pl.predict(plan, _DEV1)


@pytest.mark.parametrize("change, exc, match", [
    ({"targets": {}}, TypeError, "'targets' must be a non-empty mapping"),
    ({"targets": {"fidelity": 1e-3}}, ValueError, "'targets' key 'fidelity' is not a figure"),
    ({"targets": {"gate_fidelity": 1e-3}}, ValueError, "choose from"),
    ({"targets": {"classic_interleaved_error": 1e-3}}, ValueError, "not a figure of this reference plan"),
    ({"targets": {"decay_fidelity": 0}}, ValueError, "'targets\\['decay_fidelity'\\]' must be a positive"),
    ({"level": 1.5}, ValueError, "'level' must be a number in \\(0, 1\\)"),
    ({"lengths": [1, 3]}, ValueError, "'lengths' must include 1 and 2"),
    ({"lengths": [1, 2, 0]}, ValueError, "'lengths' must be positive integers"),
    ({"lengths": "1,2"}, TypeError, "'lengths' must be a sequence"),
    ({"shots": 0}, ValueError, "'shots' must be an integer in 1"),
    ({"shots": 2.5}, TypeError, "'shots' must be an integer"),
    ({"safety": 0.9}, ValueError, "'safety' must be a number in \\[1, 10\\]"),
    ({"min_sequences": 1}, ValueError, "'min_sequences' must be an integer in 2"),
    ({"max_shots": 0}, ValueError, "'max_shots'"),
    ({"n_qubits": 3, "device": pl.assumed_device(3, average_error=0.01, readout_error=0.0)}, ValueError,
     "must be 1 or 2 for the planner"),
    ({"interleave": "cz"}, ValueError, "'interleave' gate 'cz' acts on 2 qubit"),
    ({"costs": {"seconds_per_shot": 1}}, ValueError, "'costs' must have exactly the keys"),
    ({"device": _PLAN1}, TypeError, "'device' must be a robusttomo Device"),
    ({"pilot_sequences": 50}, ValueError, "'pilot_sequences' must be at least 100"),
    ({"probes": [0, 1]}, TypeError, "'probes' must be a ProbeSet"),
    ({"seed": 1.5}, ValueError, "'seed' must be a non-negative integer"),
])
def test_choose_plan_validation(change, exc, match):
    with pytest.raises(exc, match=match):
        pl.choose_plan(**{**_GOOD, **change})


def test_probe_sets_without_identity_or_span_are_rejected():
    from robusttomo.estimate import probes_from_cliffords

    with pytest.raises(ValueError, match="must include the identity probe"):
        pl.predict(_PLAN1, _DEV1, probes=probes_from_cliffords(1, list(range(1, 24))))
    with pytest.raises(ValueError, match="must span the unital block"):
        pl.predict(_PLAN1, _DEV1, probes=probes_from_cliffords(1, [0, 1, 2]))


def test_a_model_that_cannot_be_fitted_is_reported_not_raised(monkeypatch):
    def failing(obs):
        raise RuntimeError("solver failed")

    monkeypatch.setitem(pl._MODEL_FITS, "pauli", failing)
    pred = pl.predict(_PLAN1, _DEV1, pilot_sequences=200)
    assert math.isnan(pred.stderr("pauli")) and pred.model("pauli").labels == ("p:X", "p:Y", "p:Z")
    assert any("could not be fitted" in w for w in pred.warnings)
    assert math.isfinite(pred.stderr("coherent+stochastic"))
    json.dumps(pred.as_dict(), allow_nan=False)  # NaN becomes null


def test_other_validation(tmp_path, small_prediction):
    with pytest.raises(TypeError, match="'prediction' must be a Prediction"):
        pl.format_prediction("table")
    with pytest.raises(TypeError, match="'plan' must be a robusttomo Plan"):
        pl.device_seconds("plan", COSTS)
    with pytest.raises(TypeError, match="'prediction' must be a Prediction"):
        pl.attach_prediction(tmp_path / "p.h5", None)
    with pytest.raises(TypeError, match="'plan_path' must be a path"):
        pl.attach_prediction(3, small_prediction[1])
    with pytest.raises(DataError, match="plan file does not exist"):
        pl.attach_prediction(tmp_path / "missing.h5", small_prediction[1])
    with pytest.raises(ValueError, match="prediction has no figure 'x'"):
        small_prediction[1].stderr("x")
    with pytest.raises(ValueError, match="prediction has no model 'x'"):
        small_prediction[1].model("x")
    with pytest.raises(TypeError, match="'plan_path' must be a path"):
        pl.load_prediction(3)


def test_docstring_examples():
    result = doctest.testmod(pl, optionflags=doctest.ELLIPSIS)
    assert result.attempted >= 3 and result.failed == 0
