"""Tests of the convex reconstruction stage (robusttomo.reconstruct)."""

from __future__ import annotations

import doctest

import cvxpy as cp
import numpy as np
import pytest

from robusttomo import _pauli
from robusttomo import reconstruct as rc
from robusttomo.channels import Channel, amplitude_damping, depolarizing, embed, random_channel, rotation
from robusttomo.fit import LinearObservations
from robusttomo.metrics import diamond_distance
from robusttomo.reconstruct import (
    ChannelFit,
    CptpFitter,
    FitStatus,
    MaximumRule,
    Region,
    fit_cptp,
    gate_error_observations,
    isolate_gate_error,
    linear_estimate,
)


# ---- helpers ---------------------------------------------------------------------------------
def _haar(d: int, rng: np.random.Generator) -> np.ndarray:
    # QR of a complex Gaussian matrix with the phases of R's diagonal fixed (common practice)
    z = (rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))) / np.sqrt(2)
    q, r = np.linalg.qr(z)
    return q * (np.diag(r) / np.abs(np.diag(r)))


def _observations(truth: Channel, rng: np.random.Generator, *, noise: float, probes: int | None = None,
                  unit_rows: bool = True) -> LinearObservations:
    """Unit rows (an m = 2 statistic) plus probe-decay rows ``B_A / D`` of Haar-random unitaries.

    Noise is drawn from a known full covariance ``noise**2 (G G^T / k + I)``; ``noise = 0`` gives
    exact observations with a zero covariance.
    """
    n = truth.n_qubits
    d = 2**n
    dd = d * d - 1
    rows = [np.eye(dd * dd)] if unit_rows else []
    n_probes = dd * dd if probes is None else probes
    if n_probes:
        blocks = _pauli.ptms_of_unitaries(np.array([_haar(d, rng) for _ in range(n_probes)]))[:, 1:, 1:]
        rows.append(blocks.reshape(n_probes, -1) / dd)
    design = np.vstack(rows)
    k = design.shape[0]
    values = design @ truth.unital_block.reshape(-1)
    if noise > 0:
        g = rng.normal(size=(k, k))
        cov = noise**2 * (g @ g.T / k + np.eye(k))
        values = values + np.linalg.cholesky(cov) @ rng.normal(size=k)
    else:
        cov = np.zeros((k, k))
    return LinearObservations(n, design, values, cov, tuple(f"row{i}" for i in range(k)))


def _slow_choi(ptm: np.ndarray) -> np.ndarray:
    """J = (1/d^2) sum_ij R_ij P_j^T (x) P_i, one explicit Kronecker product per term."""
    m = ptm.shape[0]
    n = (m.bit_length() - 1) // 2
    paulis = _pauli.pauli_stack(n)
    out = np.zeros((m, m), dtype=complex)
    for i in range(m):
        for j in range(m):
            out += ptm[i, j] * np.kron(paulis[j].T, paulis[i])
    return out / m


# ---- parameterization ------------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_choi_parameterization_matches_slow_reference(n):
    rng = np.random.default_rng(10 + n)
    m = 4**n
    dd = m - 1
    x = rng.normal(size=dd + dd * dd)
    ptm = rc._ptm_from_x(x, n)
    slow = _slow_choi(ptm)
    np.testing.assert_allclose(rc._choi_from_x(x, n), slow, atol=1e-14)
    zmat, z0, _, _ = rc._choi_basis(n)
    np.testing.assert_allclose((zmat @ x + z0).reshape(2 * m, 2 * m, order="F"), rc._embed(slow), atol=1e-14)
    # and the package's own Choi convention
    np.testing.assert_allclose(Channel.from_ptm(ptm).choi, slow, atol=1e-13)


def test_choi_parameterization_three_qubits():
    rng = np.random.default_rng(3)
    truth = random_channel(3, 0.3, rng)
    r = truth.ptm
    x = np.concatenate([r[1:, 0], r[1:, 1:].reshape(-1)])
    np.testing.assert_allclose(rc._choi_from_x(x, 3), truth.choi, atol=1e-13)


def test_triangular_path_matches_svd_path(monkeypatch):
    # the three-qubit path (triangular solves, Lanczos) against the SVD path on a two-qubit design
    rng = np.random.default_rng(5)
    truth = amplitude_damping(0.1).tensor(rotation("X", 0.2)) @ depolarizing(2, 0.98)
    obs = _observations(truth, rng, noise=2e-3)
    by_svd = rc._Whitened(obs.design, obs.covariance, 1e-9)
    by_tri = rc._Whitened(obs.design, obs.covariance, 1e-9, svd_max=0)
    assert by_tri.triangular and not by_svd.triangular
    assert by_tri.scale == pytest.approx(by_svd.scale, rel=1e-9)
    assert by_tri.sigma_min == pytest.approx(by_svd.sigma_min, rel=1e-7)
    y = by_svd.q.T @ (by_svd.w @ obs.values) / by_svd.scale
    np.testing.assert_allclose(by_tri.solve(y), by_svd.solve(y), atol=1e-9)
    c = rng.normal(size=225) * 1e-3
    assert by_tri.quadratic_minimum(y, c) == pytest.approx(by_svd.quadratic_minimum(y, c), abs=1e-10)
    fit_svd = CptpFitter(obs).fit()
    monkeypatch.setattr(rc, "_SVD_MAX", 0)
    fit_tri = CptpFitter(obs).fit()
    assert fit_tri.status is FitStatus.CERTIFIED
    tol = fit_svd.residuals.block_error_bound + fit_tri.residuals.block_error_bound
    assert np.linalg.norm(fit_tri.unital_block - fit_svd.unital_block) <= tol


# ---- exact data ------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "n, make",
    [
        (1, lambda rng: random_channel(1, 0.3, rng)),
        (1, lambda rng: amplitude_damping(0.1)),
        (1, lambda rng: rotation("X", 0.2) @ depolarizing(1, 0.97)),
        (2, lambda rng: random_channel(2, 0.15, rng)),
        (2, lambda rng: embed(amplitude_damping(0.05), [1], 2) @ rotation("ZZ", 0.1)),
    ],
)
def test_exact_data_returns_true_unital_block(n, make):
    rng = np.random.default_rng(20 + n)
    truth = make(rng)
    obs = _observations(truth, rng, noise=0.0)
    fit = CptpFitter(obs).fit()
    assert fit.status is FitStatus.CERTIFIED
    assert fit.channel.is_cptp(atol=1e-9)
    assert np.max(np.abs(fit.unital_block - truth.unital_block)) < 1e-5
    assert fit.residuals.block_error_bound < 1e-6
    assert fit.residuals.tp_violation < 1e-12
    assert fit.n_observations == obs.n_observations
    assert fit.n_parameters == (4**n - 1) ** 2 == fit.design_rank


@pytest.mark.parametrize("n", [1, 2])
def test_forced_scs_failure_falls_back_and_is_reported(n):
    rng = np.random.default_rng(40 + n)
    truth = random_channel(n, 0.2, rng)
    obs = _observations(truth, rng, noise=0.0)
    fit = CptpFitter(obs, scs_max_iters=1).fit()
    assert fit.fell_back
    assert fit.solver == "CLARABEL"
    assert "SCS" in fit.message and "fallback" in fit.message
    # the fallback's answer is certified and right, never a silent wrong number
    assert fit.status is FitStatus.CERTIFIED
    assert np.max(np.abs(fit.unital_block - truth.unital_block)) < 1e-5


def test_inaccurate_answer_is_flagged_not_hidden():
    # both solvers starved: Clarabel's iteration budget is fixed, so starve SCS and demand an
    # impossible accuracy; the status must say the certificate was missed
    rng = np.random.default_rng(44)
    truth = rotation("Y", 0.3)  # unitary: extremal, so the noisy linear estimate is not CP
    obs = _observations(truth, rng, noise=1e-3)
    fit = CptpFitter(obs, scs_max_iters=1, accuracy=1e-9, absolute_accuracy=1e-15).fit()
    assert fit.status is FitStatus.INACCURATE
    assert fit.residuals.mahalanobis_bound > 1e-9


# ---- noisy data: certificate against an independent formulation -----------------------------
def _reference_fit(obs: LinearObservations, ridge: float = 1e-9) -> tuple[np.ndarray, float]:
    """The fit in the textbook form: Hermitian Choi variable, PSD, partial trace = I/d, Clarabel."""
    n = obs.n_qubits
    d = 2**n
    m = d * d
    paulis = _pauli.pauli_stack(n)
    j = cp.Variable((m, m), hermitian=True)
    # R_ij = tr((P_j^T (x) P_i) J) for i, j >= 1
    rows = []
    for i in range(1, m):
        for k in range(1, m):
            rows.append(cp.real(cp.trace(np.kron(paulis[k].T, paulis[i]) @ j)))
    b = cp.hstack(rows)
    cov = obs.covariance + max(ridge * np.trace(obs.covariance) / obs.n_observations, 1e-16) * np.eye(obs.n_observations)
    w = np.linalg.cholesky(np.linalg.inv(cov)).T
    objective = cp.sum_squares(w @ (obs.design @ b - obs.values))
    cons = [j >> 0, cp.partial_trace(j, (d, d), axis=1) == np.eye(d) / d]
    prob = cp.Problem(cp.Minimize(objective), cons)
    prob.solve(solver="CLARABEL")
    return np.asarray(b.value), float(prob.value)


@pytest.mark.parametrize("solver", ["SCS", "CLARABEL"])
def test_noisy_fit_agrees_with_textbook_formulation(solver):
    rng = np.random.default_rng(50)
    truth = amplitude_damping(0.15) @ rotation("Z", 0.1)  # on the CPTP boundary: constraints active
    obs = _observations(truth, rng, noise=3e-3)
    fit = CptpFitter(obs, solver=solver).fit()
    ref_b, ref_chi2 = _reference_fit(obs)
    assert fit.status is FitStatus.CERTIFIED
    res = fit.residuals
    # the certified lower bound is below the true minimum, the attained value above it
    assert res.chi2_lower_bound <= ref_chi2 + 1e-4
    assert fit.chi2 >= ref_chi2 - 1e-4
    assert fit.chi2 - ref_chi2 <= res.duality_gap + 1e-4
    assert np.linalg.norm(fit.unital_block.reshape(-1) - ref_b) <= res.block_error_bound + 1e-4
    assert fit.chi2 > fit.chi2_linear  # the constraints were active


def test_linear_estimate_matches_normal_equations():
    rng = np.random.default_rng(60)
    truth = random_channel(1, 0.3, rng)
    obs = _observations(truth, rng, noise=1e-2)
    lin = linear_estimate(obs)
    # slow reference: (X^T C^-1 X) b = X^T C^-1 y with the same ridge
    k = obs.n_observations
    cov = obs.covariance + 1e-9 * np.trace(obs.covariance) / k * np.eye(k)
    ci = np.linalg.inv(cov)
    ref = np.linalg.solve(obs.design.T @ ci @ obs.design, obs.design.T @ ci @ obs.values)
    np.testing.assert_allclose(lin.reshape(-1), ref, atol=1e-10)
    fit = CptpFitter(obs).fit()
    np.testing.assert_allclose(fit.linear_block, lin, atol=1e-10)
    assert fit.linear_distance == pytest.approx(np.linalg.norm(lin - fit.unital_block))


def test_singular_covariance_and_rank_deficient_design():
    rng = np.random.default_rng(61)
    truth = depolarizing(1, 0.9) @ rotation("X", 0.1)
    obs = _observations(truth, rng, noise=1e-3)
    # rank-one covariance: the ridge must make the fit well posed
    g = rng.normal(size=(obs.n_observations, 1))
    singular = LinearObservations(1, obs.design, obs.values, 1e-6 * g @ g.T, obs.labels)
    fit = CptpFitter(singular).fit()
    assert fit.status is FitStatus.CERTIFIED and fit.channel.is_cptp(atol=1e-9)
    # only 5 unit rows: the design identifies 5 of 9 entries
    few = LinearObservations(1, np.eye(9)[:5], truth.unital_block.reshape(-1)[:5], np.eye(5) * 1e-6,
                             tuple("abcde"))
    fit = CptpFitter(few).fit()
    assert fit.design_rank == 5
    assert fit.residuals.block_error_bound == np.inf
    assert fit.status is FitStatus.CERTIFIED
    np.testing.assert_allclose(fit.unital_block.reshape(-1)[:5], truth.unital_block.reshape(-1)[:5], atol=5e-3)


def test_replicates_reuse_the_problem_and_match_fresh_fits():
    rng = np.random.default_rng(62)
    truth = amplitude_damping(0.1) @ rotation("X", 0.05)
    obs = _observations(truth, rng, noise=3e-3)
    reps = obs.values + 3e-3 * rng.normal(size=(3, obs.n_observations))
    fitter = CptpFitter(obs)
    fits = fitter.fit_replicates(reps)
    assert len(fits) == 3 and all(isinstance(f, ChannelFit) for f in fits)
    for rep, f in zip(reps, fits):
        fresh = CptpFitter(LinearObservations(1, obs.design, rep, obs.covariance, obs.labels)).fit()
        tol = f.residuals.block_error_bound + fresh.residuals.block_error_bound + 1e-9
        assert np.linalg.norm(f.unital_block - fresh.unital_block) <= tol


# ---- non-unital rule and ranges ---------------------------------------------------------------
def test_nonunital_rule_picks_closest_to_target():
    gamma = 0.05
    truth = amplitude_damping(gamma)
    obs = _observations(truth, np.random.default_rng(70), noise=0.0)
    # For T = diag(l1, l2, l3) and t = (0, 0, t3) a qubit map is CP iff
    # (l1 + l2)^2 <= (1 + l3)^2 - t3^2 and (l1 - l2)^2 <= (1 - l3)^2 - t3^2
    # ("An analysis of completely-positive trace-preserving maps on M2", Linear Algebra Appl. 347,
    # 159 (2002); from memory): at the damping block, t3 ranges over [-gamma, gamma].
    default = CptpFitter(obs).fit()
    np.testing.assert_allclose(default.nonunital_vector, 0.0, atol=1e-7)  # the most unital best fit
    far = CptpFitter(obs, target_nonunital=np.array([0.0, 0.0, 1.0])).fit()
    assert far.rule_applied
    np.testing.assert_allclose(far.nonunital_vector, [0.0, 0.0, gamma], atol=1e-5)


@pytest.mark.parametrize(
    "truth, entry, expected",
    [
        # depolarizing decay p: each entry ranges over +-(1 - p) (same reference as above)
        (depolarizing(1, 0.95), 0, 0.05),
        (depolarizing(1, 0.95), 2, 0.05),
        (amplitude_damping(0.05), 2, 0.05),
    ],
)
def test_nonunital_range_exact_one_qubit(truth, entry, expected):
    obs = _observations(truth, np.random.default_rng(71), noise=0.0)
    fitter = CptpFitter(obs)
    fit = fitter.fit()
    rng_ = fitter.nonunital_range(fit)
    assert rng_.block_held_fixed
    assert rng_.minimum[entry] == pytest.approx(-expected, abs=1e-5)
    assert rng_.maximum[entry] == pytest.approx(expected, abs=1e-5)
    assert np.all(rng_.minimum <= truth.nonunital_vector + 1e-7)
    assert np.all(truth.nonunital_vector <= rng_.maximum + 1e-7)
    assert not rng_.max_is_bound
    assert rng_.labels == ("X", "Y", "Z")
    for ch in rng_.argmin + rng_.argmax:
        assert ch.is_cptp(atol=1e-8)


def test_nonunital_range_contains_truth_on_noisy_data_two_qubits():
    rng = np.random.default_rng(72)
    truth = embed(amplitude_damping(0.04), [0], 2) @ rotation("ZZ", 0.05) @ depolarizing(2, 0.98)
    obs = _observations(truth, rng, noise=1e-3)
    fitter = CptpFitter(obs)
    fit = fitter.fit()
    ranges = fitter.nonunital_range(fit)
    assert np.all(ranges.minimum <= truth.nonunital_vector)
    assert np.all(truth.nonunital_vector <= ranges.maximum)
    assert np.all(ranges.minimum <= ranges.estimate) and np.all(ranges.estimate <= ranges.maximum)
    for ch in (ranges.argmin[12], ranges.argmax[12]):
        assert ch.is_cptp(atol=1e-8)
        assert fitter._chi2(ch.unital_block.reshape(-1), obs.values) <= fit.chi2 + ranges.delta_chi2 + 0.02


def test_joint_region_is_wider_than_profile():
    rng = np.random.default_rng(73)
    truth = amplitude_damping(0.1) @ depolarizing(1, 0.97)
    obs = _observations(truth, rng, noise=2e-3)
    fitter = CptpFitter(obs)
    fit = fitter.fit()
    prof = fitter.nonunital_range(fit, region=Region.PROFILE)
    joint = fitter.nonunital_range(fit, region=Region.JOINT)
    assert joint.delta_chi2 > prof.delta_chi2
    assert np.all(joint.minimum <= prof.minimum + 1e-7) and np.all(prof.maximum <= joint.maximum + 1e-7)
    assert np.all(joint.minimum <= truth.nonunital_vector) and np.all(truth.nonunital_vector <= joint.maximum)


# ---- diamond distance ------------------------------------------------------------------------
def test_diamond_range_exact_rotation():
    theta = 0.3
    truth = rotation("Y", theta)
    obs = _observations(truth, np.random.default_rng(80), noise=0.0)
    fitter = CptpFitter(obs)
    fit = fitter.fit()
    dr = fitter.diamond_range(fit)
    # unitary error exp(-i theta/2 P): (1/2)||U - I||_diamond = |sin(theta/2)| (from memory; the
    # eigenvalues e^{-+i theta/2} span a chord at distance cos(theta/2) from the origin)
    expected = abs(np.sin(theta / 2))
    assert dr.minimum == pytest.approx(expected, abs=1e-5)
    assert dr.maximum_attained == pytest.approx(expected, abs=1e-5)
    assert dr.maximum_certified >= dr.maximum_attained
    assert dr.max_is_bound and dr.maximum == dr.maximum_certified
    attained = fitter.diamond_range(fit, maximum_rule=MaximumRule.ATTAINED)
    assert not attained.max_is_bound and attained.maximum == attained.maximum_attained
    # against its own target the error is zero
    u = np.cos(theta / 2) * np.eye(2) - 1j * np.sin(theta / 2) * _pauli.pauli_matrix("Y")
    assert fitter.diamond_range(fit, target_unitary=u).minimum == pytest.approx(0.0, abs=1e-5)


def test_diamond_minimum_of_depolarizing_block():
    # the block of depolarizing(p) admits non-unital completions; the twirl maps each to the
    # Pauli channel, and the diamond distance is convex and unitarily invariant, so the minimum is
    # that of the Pauli channel, 1 - p_I = 3 (1 - p) / 4 (Pauli-channel formula, from memory:
    # "Characterizing quantum gates via randomized benchmarking", PRA 85, 042311 (2012))
    p = 0.95
    obs = _observations(depolarizing(1, p), np.random.default_rng(81), noise=0.0)
    fitter = CptpFitter(obs)
    fit = fitter.fit()
    dr = fitter.diamond_range(fit)
    assert dr.minimum == pytest.approx(3 * (1 - p) / 4, abs=1e-5)
    assert dr.maximum_attained > dr.minimum + 1e-3  # a non-unital completion is worse
    assert dr.argmax.is_cptp(atol=1e-8)
    assert diamond_distance(dr.argmax) == pytest.approx(dr.maximum_attained, abs=1e-6)


@pytest.mark.parametrize("seed", [82, 83])
def test_diamond_range_contains_truth_on_noisy_data(seed):
    rng = np.random.default_rng(seed)
    truth = amplitude_damping(0.08) @ rotation("X", 0.1) @ depolarizing(1, 0.98)
    obs = _observations(truth, rng, noise=3e-3)
    fitter = CptpFitter(obs)
    fit = fitter.fit()
    ranges = fitter.nonunital_range(fit)
    dr = fitter.diamond_range(fit, nonunital=ranges)
    true_dd = diamond_distance(truth)
    assert dr.minimum <= true_dd <= dr.maximum_certified
    assert dr.minimum <= dr.estimate + 1e-7
    assert dr.estimate <= dr.maximum_attained + 1e-7 <= dr.maximum_certified + 2e-7
    assert "bound" in dr.method and "attained" in dr.method


# ---- interleaved: one gate's error -------------------------------------------------------------
def _cz() -> np.ndarray:
    return np.diag([1, 1, 1, -1]).astype(complex)


def test_gate_error_design_composes_blocks():
    rng = np.random.default_rng(90)
    ref = random_channel(2, 0.1, rng)
    lg = random_channel(2, 0.1, rng)
    g = Channel.from_unitary(_cz())
    composite = lg @ g @ ref @ g.adjoint()
    # PTM of G L G^dagger is R_G R_L R_G^T, and unital blocks of TP channels compose exactly
    k_block = (g.ptm @ ref.ptm @ g.ptm.T)[1:, 1:]
    np.testing.assert_allclose(composite.unital_block, lg.unital_block @ k_block, atol=1e-12)
    obs = LinearObservations(2, np.eye(225), composite.unital_block.reshape(-1), np.zeros((225, 225)),
                             tuple(map(str, range(225))))
    derived = gate_error_observations(obs, ref, _cz())
    np.testing.assert_allclose(derived.design @ lg.unital_block.reshape(-1), obs.values, atol=1e-12)


def test_isolate_gate_error_exact_two_qubits():
    rng = np.random.default_rng(91)
    ref = random_channel(2, 0.1, rng)
    lg = rotation("ZZ", 0.06) @ depolarizing(2, 0.985)  # a small CZ error
    g = Channel.from_unitary(_cz())
    composite = lg @ g @ ref @ g.adjoint()
    obs = _observations(composite, rng, noise=0.0, probes=0)
    fit = isolate_gate_error(obs, ref, _cz())
    assert fit.status is FitStatus.CERTIFIED
    assert np.max(np.abs(fit.unital_block - lg.unital_block)) < 1e-5


def test_isolate_gate_error_noisy_one_qubit():
    rng = np.random.default_rng(92)
    ref = random_channel(1, 0.2, rng)
    lg = rotation("Z", 0.1) @ depolarizing(1, 0.97)
    gate = _haar(2, rng)
    g = Channel.from_unitary(gate)
    composite = lg @ g @ ref @ g.adjoint()
    obs = _observations(composite, rng, noise=2e-3)
    fit = isolate_gate_error(obs, ref, gate)
    derived = gate_error_observations(obs, ref, gate)
    # the truth's chi-square lies well inside the 95% joint region of the 9 parameters
    wh = rc._whiten(derived.design, derived.covariance, 1e-9)
    r = wh.w @ (derived.design @ lg.unital_block.reshape(-1) - derived.values)
    assert r @ r - fit.chi2 < 16.92  # chi2.ppf(0.95, 9) = 16.919 (statistical tables)
    assert np.linalg.norm(fit.unital_block - lg.unital_block) < 0.02


# ---- validation --------------------------------------------------------------------------------
def _tiny_obs() -> LinearObservations:
    return LinearObservations(1, np.eye(9), np.eye(3).reshape(-1), np.eye(9) * 1e-6, tuple("abcdefghi"))


def test_validation_messages():
    obs = _tiny_obs()
    with pytest.raises(TypeError, match="'obs' must be a robusttomo.fit.LinearObservations"):
        CptpFitter("data")
    with pytest.raises(ValueError, match=r"'obs.design' must have shape \(k, 9\)"):
        CptpFitter(LinearObservations(1, np.eye(4), np.zeros(4), np.eye(4), tuple("abcd")))
    with pytest.raises(ValueError, match="'obs.values' must be finite"):
        CptpFitter(LinearObservations(1, np.eye(9), np.full(9, np.nan), np.eye(9), obs.labels))
    asym = np.eye(9)
    asym[0, 1] = 1.0
    with pytest.raises(ValueError, match="'obs.covariance' must be symmetric"):
        CptpFitter(LinearObservations(1, np.eye(9), np.zeros(9), asym, obs.labels))
    with pytest.raises(ValueError, match="'solver' must be 'SCS' or 'CLARABEL'; got 'MOSEK'"):
        CptpFitter(obs, solver="MOSEK")
    with pytest.raises(ValueError, match=r"'accuracy' must lie in \(0, 1.0\); got 2"):
        CptpFitter(obs, accuracy=2)
    with pytest.raises(ValueError, match=r"'target_nonunital' must have shape \(3,\); got \(2,\)"):
        CptpFitter(obs, target_nonunital=np.zeros(2))
    with pytest.raises(ValueError, match="'scs_max_iters' must be an integer >= 1; got 0"):
        CptpFitter(obs, scs_max_iters=0)
    fitter = CptpFitter(obs)
    with pytest.raises(ValueError, match=r"'values' must have shape \(9,\)"):
        fitter.fit(np.zeros(3))
    with pytest.raises(ValueError, match=r"'replicates' must be a finite array of shape \(B, 9\)"):
        fitter.fit_replicates(np.zeros((2, 3)))
    with pytest.raises(ValueError, match="'replicates' is None and the observations carry none"):
        fitter.fit_replicates()
    with pytest.raises(TypeError, match="'nonunital_rule' must be True or False"):
        fitter.fit(nonunital_rule="yes")
    fit = fitter.fit()
    with pytest.raises(ValueError, match="'fit' does not belong to these values"):
        fitter.nonunital_range(fit, values=np.zeros(9))
    with pytest.raises(ValueError, match=r"'level' must lie in \(0, 1.0\); got 1.5"):
        fitter.nonunital_range(fit, level=1.5)
    with pytest.raises(TypeError, match="'region' must be a robusttomo.reconstruct.Region"):
        fitter.nonunital_range(fit, region="profile")
    with pytest.raises(ValueError, match="'target_unitary' must be unitary"):
        fitter.diamond_range(fit, target_unitary=np.ones((2, 2)))
    with pytest.raises(ValueError, match="'reference' acts on 2 qubit"):
        gate_error_observations(obs, depolarizing(2, 0.9), np.eye(2))
    with pytest.raises(ValueError, match=r"'gate_unitary' must have shape \(2, 2\)"):
        gate_error_observations(obs, depolarizing(1, 0.9), np.eye(4))
    with pytest.raises(ValueError, match=r"'ridge' must lie in \(0, 1.0\)"):
        linear_estimate(obs, ridge=-1.0)


def test_fit_cptp_one_shot_and_docstring_examples():
    obs = _tiny_obs()
    fit = fit_cptp(obs)
    assert fit.status is FitStatus.CERTIFIED
    np.testing.assert_allclose(fit.unital_block, np.eye(3), atol=1e-6)
    failures, _ = doctest.testmod(rc, optionflags=doctest.ELLIPSIS)
    assert failures == 0
