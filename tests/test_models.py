"""Tests for robusttomo.models: reduced models fitted to linear observations, and the criterion.

Synthetic observations are built here from known channels plus Gaussian noise of known
covariance.  The design mixes unit rows (entries of the m = 2 statistic) with probe-decay
rows ``vec(B_A) / D`` of random unitaries, as in :class:`robusttomo.fit.LinearObservations`.
The noise level ``sigma**2 = 74 / (N * D*D)`` per entry mirrors THEORY.md's measured cost
for two qubits (Frobenius-squared error about 12 + 6246/K per sequence, K = 100 shots) at
``N`` sequences.
"""

from __future__ import annotations

import doctest

import numpy as np
import pytest
import scipy.linalg
import scipy.stats

from robusttomo import _pauli, models
from robusttomo.channels import Channel, amplitude_damping, embed, rotation
from robusttomo.fit import LinearObservations
from robusttomo.generators import channel_from_rates, generator_matrix
from robusttomo.models import (
    COHERENT,
    COHERENT_STOCHASTIC,
    FULL,
    PAULI,
    IntervalMethod,
    ModelFit,
    ModelFitStatus,
    SelectionCriterion,
    TABLE_COLUMNS,
    compare_models,
    fit_coherent_model,
    fit_generator_model,
    fit_pauli_model,
    intervals_from_replicates,
)


# ---- synthetic observations -------------------------------------------------------------------
def _sigma(n: int, n_sequences: float) -> float:
    dd = (4**n - 1) ** 2
    return float(np.sqrt(74.0 / (n_sequences * dd)))


def _design(n: int, rng: np.random.Generator, *, n_probes: int = 6) -> np.ndarray:
    """Unit rows for every block entry plus probe-decay rows of random unitaries."""
    d = 2**n
    dim = d * d - 1
    rows = [np.eye(dim * dim)]
    for _ in range(n_probes):
        z = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
        u, _ = np.linalg.qr(z)
        rows.append(Channel.from_unitary(u).unital_block.reshape(1, -1) / dim)
    return np.vstack(rows)


def _covariance(k: int, sigma: float, rng: np.random.Generator) -> np.ndarray:
    """A correlated, full-rank covariance with per-entry scale ``sigma``."""
    g = rng.normal(size=(k, k)) / np.sqrt(k)
    return sigma**2 * (0.5 * np.eye(k) + 0.5 * g @ g.T)


def _observe(
    truth_block: np.ndarray,
    design: np.ndarray,
    cov: np.ndarray,
    rng: np.random.Generator,
    *,
    n_replicates: int = 0,
    exact: bool = False,
) -> LinearObservations:
    dim = truth_block.shape[0]
    n = {3: 1, 15: 2, 63: 3}[dim]
    chol = np.linalg.cholesky(cov)
    mean = design @ truth_block.reshape(-1)
    values = mean if exact else mean + chol @ rng.normal(size=mean.size)
    reps = None
    if n_replicates:
        # parametric stand-in for resampled sequences: fresh noise around the observed values
        reps = values + (chol @ rng.normal(size=(mean.size, n_replicates))).T
    labels = tuple(f"row{i}" for i in range(mean.size))
    return LinearObservations(n, design, values, cov, labels, reps)


def _linear_full_fit(obs: LinearObservations) -> ModelFit:
    """Stand-in for the full model: unconstrained weighted linear least squares of the block.

    (The CPTP reconstruction lives in robusttomo/reconstruct.py, not used here.)
    """
    winv = np.linalg.inv(obs.covariance)
    a = obs.design
    b = np.linalg.solve(a.T @ winv @ a, a.T @ winv @ obs.values)
    dim = int(round(np.sqrt(b.size)))
    ptm = np.eye(dim + 1)
    ptm[1:, 1:] = b.reshape(dim, dim)
    return ModelFit.from_channel(FULL, Channel.from_ptm(ptm), dim * dim, obs)


def _random_rates(n: int, rng: np.random.Generator, *, h_scale: float, s_range: tuple[float, float]):
    labs = _pauli.pauli_labels(n)[1:]
    h = {p: float(v) for p, v in zip(labs, rng.normal(size=len(labs)) * h_scale)}
    s = {p: float(v) for p, v in zip(labs, rng.uniform(*s_range, size=len(labs)))}
    return h, s


def _truth_parameters(h: dict, s: dict) -> dict:
    return {**{f"H:{p}": v for p, v in h.items()}, **{f"S:{p}": v for p, v in s.items()}}


def _superop_generator_from_kraus_like(terms) -> np.ndarray:
    """Superoperator (row-major vec) of ``rho -> sum c A rho B``: ``sum c A kron B^T``."""
    return sum(c * np.kron(a, b.T) for c, a, b in terms)


# ---- building blocks against slow references -------------------------------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_jacobian_matches_frechet_and_finite_differences(n):
    rng = np.random.default_rng(10 + n)
    basis, labels, _ = models._generator_parts(n, True)
    theta = rng.normal(size=len(labels)) * 0.05
    b, jac = models._expm_and_jacobian(basis, theta)
    g = np.tensordot(theta, basis, axes=1)
    assert np.allclose(b, scipy.linalg.expm(g), atol=1e-13)
    # reference 1: scipy's own Frechet derivative, one direction at a time
    ref = np.column_stack([scipy.linalg.expm_frechet(g, e, compute_expm=False).reshape(-1) for e in basis])
    assert np.allclose(jac, ref, atol=1e-12)
    # reference 2: central differences
    h = 1e-6
    fd = np.column_stack(
        [
            (scipy.linalg.expm(g + h * e) - scipy.linalg.expm(g - h * e)).reshape(-1) / (2 * h)
            for e in basis
        ]
    )
    assert np.allclose(jac, fd, atol=1e-8)


@pytest.mark.parametrize("n", [1, 2])
def test_anticommutation_matrix_matches_pauli_matrices(n):
    labs = _pauli.pauli_labels(n)[1:]
    slow = np.array(
        [
            [float(np.allclose(_pauli.pauli_matrix(a) @ _pauli.pauli_matrix(b), -_pauli.pauli_matrix(b) @ _pauli.pauli_matrix(a))) for b in labs]
            for a in labs
        ]
    )
    assert np.array_equal(models._anticommutation(n), slow)


def test_from_channel_chi2_matches_explicit_formula():
    rng = np.random.default_rng(3)
    truth = channel_from_rates(1, hamiltonian={"X": 0.03}, stochastic={"Z": 0.01})
    design = _design(1, rng)
    cov = _covariance(design.shape[0], 0.01, rng)
    obs = _observe(truth.unital_block, design, cov, rng)
    other = rotation("Y", 0.05)
    fit = ModelFit.from_channel("given", other, 9, obs)
    r = obs.values - design @ other.unital_block.reshape(-1)
    assert fit.chi2 == pytest.approx(float(r @ np.linalg.solve(cov, r)), rel=1e-10)
    assert fit.status is ModelFitStatus.GIVEN
    assert fit.n_observations == design.shape[0] and fit.dof == design.shape[0] - 9
    assert fit.aic == pytest.approx(fit.chi2 + 18)


def test_singular_covariance_uses_pseudo_inverse():
    # two copies of every observation, perfectly correlated: rank k, and chi2 is that of one copy
    rng = np.random.default_rng(4)
    truth = channel_from_rates(1, hamiltonian={"Z": 0.02}, stochastic={"X": 0.01})
    design = np.eye(9)
    cov = _covariance(9, 0.01, rng)
    obs1 = _observe(truth.unital_block, design, cov, rng)
    dbl = LinearObservations(
        1,
        np.vstack([design, design]),
        np.concatenate([obs1.values, obs1.values]),
        np.block([[cov, cov], [cov, cov]]),
        obs1.labels + obs1.labels,
    )
    f1 = fit_generator_model(obs1)
    f2 = fit_generator_model(dbl)
    assert f2.n_observations == 9
    # C^+ of [[C, C], [C, C]] is [[C^-1, C^-1], [C^-1, C^-1]] / 4, so chi2 equals the single copy's
    assert f2.chi2 == pytest.approx(f1.chi2, rel=1e-8)
    assert np.allclose(f2.unital_block, f1.unital_block, atol=1e-9)


# ---- (c) coherent model on exact data ---------------------------------------------------------
@pytest.mark.parametrize("theta", [0.07, -0.4])
def test_coherent_model_recovers_zz_overrotation_exactly(theta):
    rng = np.random.default_rng(5)
    # textbook: exp(-i theta/2 ZZ) = diag(e^{-i theta/2}, e^{i theta/2}, e^{i theta/2}, e^{-i theta/2})
    # (common practice)
    u = np.diag(np.exp(-0.5j * theta * np.array([1, -1, -1, 1])))
    truth = Channel.from_unitary(u)
    design = _design(2, rng)
    obs = _observe(truth.unital_block, design, _covariance(design.shape[0], 1e-3, rng), rng, exact=True)
    fit = fit_coherent_model(obs)
    assert fit.name == COHERENT and fit.n_parameters == 15
    assert fit.status is ModelFitStatus.CONVERGED
    assert fit.parameters["H:ZZ"] == pytest.approx(theta / 2, abs=1e-9)
    others = [abs(v) for k, v in fit.parameters.items() if k != "H:ZZ"]
    assert max(others) < 1e-9
    assert np.allclose(fit.channel.ptm, truth.ptm, atol=1e-9)
    assert fit.chi2 < 1e-12


def test_coherent_model_channel_is_the_unitary_exp_minus_i_h_dot_p():
    rng = np.random.default_rng(6)
    labs = _pauli.pauli_labels(2)[1:]
    h = rng.normal(size=15) * 0.05
    # independent reference: the unitary exp(-i sum h_P P) built from Pauli matrices
    ham = sum(c * _pauli.pauli_matrix(p) for c, p in zip(h, labs))
    truth = Channel.from_unitary(scipy.linalg.expm(-1j * ham))
    design = _design(2, rng)
    obs = _observe(truth.unital_block, design, _covariance(design.shape[0], 1e-3, rng), rng, exact=True)
    fit = fit_coherent_model(obs)
    est = np.array([fit.parameters[f"H:{p}"] for p in labs])
    assert np.allclose(est, h, atol=1e-8)
    assert np.allclose(fit.channel.ptm, truth.ptm, atol=1e-8)


# ---- (d) Pauli model on exact data ------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_pauli_model_recovers_probabilities_exactly(n):
    rng = np.random.default_rng(7 + n)
    labs = _pauli.pauli_labels(n)[1:]
    probs = rng.uniform(0, 0.02, size=len(labs))
    probs[1] = 0.0  # one probability at its bound
    # independent reference: Kraus operators sqrt(p_P) P
    kraus = [np.sqrt(1 - probs.sum()) * np.eye(2**n)] + [np.sqrt(p) * _pauli.pauli_matrix(lab) for p, lab in zip(probs, labs)]
    truth = Channel.from_kraus(kraus)
    design = _design(n, rng)
    obs = _observe(truth.unital_block, design, _covariance(design.shape[0], 1e-3, rng), rng, exact=True)
    fit = fit_pauli_model(obs)
    est = np.array([fit.parameters[f"p:{lab}"] for lab in labs])
    assert np.allclose(est, probs, atol=1e-10)
    assert np.allclose(fit.channel.ptm, truth.ptm, atol=1e-10)
    if n == 1:
        # one-qubit Pauli channel PTM diag(1, 1-2(py+pz), 1-2(px+pz), 1-2(px+py)) (common practice)
        px, py, pz = probs
        assert np.allclose(np.diag(fit.channel.ptm), [1, 1 - 2 * (py + pz), 1 - 2 * (px + pz), 1 - 2 * (px + py)])


def _brute_force_simplex_lsq(a: np.ndarray, r: np.ndarray) -> tuple[np.ndarray, float]:
    """Slow, obviously correct: try every face of {p >= 0, sum p <= 1} and keep the best."""
    import itertools

    k = a.shape[1]
    best = (None, np.inf)
    for size in range(k + 1):
        for free in itertools.combinations(range(k), size):
            for on_sum in (False, True):
                p = np.zeros(k)
                if free:
                    af = a[:, free]
                    if on_sum:  # equality-constrained least squares through its KKT system
                        kkt = np.block([[af.T @ af, np.ones((size, 1))], [np.ones((1, size)), np.zeros((1, 1))]])
                        sol = np.linalg.lstsq(kkt, np.concatenate([af.T @ r, [1.0]]), rcond=None)[0]
                        p[list(free)] = sol[:size]
                    else:
                        p[list(free)] = np.linalg.lstsq(af, r, rcond=None)[0]
                elif on_sum:
                    continue
                if p.min() < -1e-12 or p.sum() > 1 + 1e-12:
                    continue
                cost = float(np.sum((a @ p - r) ** 2))
                if cost < best[1]:
                    best = (p, cost)
    return best


def test_pauli_model_with_active_sum_constraint_matches_brute_force():
    # the observed block implies probabilities summing above 1, so the sum constraint is active
    rng = np.random.default_rng(9)
    block = -0.9 * np.eye(3) + 0.05 * rng.normal(size=(3, 3))
    cov = _covariance(9, 0.01, rng)
    obs = LinearObservations(1, np.eye(9), block.reshape(-1), cov, tuple(f"r{i}" for i in range(9)))
    fit = fit_pauli_model(obs)
    p = np.array(list(fit.parameters.values()))
    assert p.min() >= 0 and p.sum() <= 1 + 1e-9
    # whitened problem in p: B(p) = I - 2 diag(M p) on the diagonal entries 0, 4, 8
    wh = np.linalg.cholesky(np.linalg.inv(cov)).T
    m = models._anticommutation(1)
    e = np.zeros((9, 3))
    e[[0, 4, 8], [0, 1, 2]] = 1.0
    a = wh @ (-2.0 * e @ m)
    r = wh @ (block.reshape(-1) - np.eye(3).reshape(-1))
    p_ref, cost_ref = _brute_force_simplex_lsq(a, r)
    assert p_ref.sum() == pytest.approx(1.0)
    assert fit.chi2 == pytest.approx(cost_ref, rel=1e-8)
    assert np.allclose(p, p_ref, atol=1e-6)


# ---- (a) the reduced model against the unconstrained linear estimate ---------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_reduced_model_error_follows_parameter_count(n):
    # isotropic noise, unit design, bounds inactive: projecting onto the model's 2D-dimensional
    # tangent space leaves E||error||^2 = sigma^2 * 2D against sigma^2 * D*D unconstrained
    # (least-squares projection, common practice), a Frobenius ratio of sqrt(D*D / (2 D)).
    rng = np.random.default_rng(20 + n)
    dim = 4**n - 1
    h, s = _random_rates(n, rng, h_scale=0.01, s_range=(0.01, 0.02))
    truth = channel_from_rates(n, hamiltonian=h, stochastic=s).unital_block
    sigma = 2e-4
    err_lin, err_red = [], []
    for _ in range(40 if n == 1 else 8):
        y = truth.reshape(-1) + sigma * rng.normal(size=dim * dim)
        obs = LinearObservations(n, np.eye(dim * dim), y, sigma**2 * np.eye(dim * dim), tuple(map(str, range(dim * dim))))
        fit = fit_generator_model(obs)
        err_lin.append(np.sum((y - truth.reshape(-1)) ** 2))
        err_red.append(np.sum((fit.unital_block - truth) ** 2))
    ratio = np.sqrt(np.mean(err_lin) / np.mean(err_red))
    expected = np.sqrt(dim * dim / (2 * dim))  # 1.22 for one qubit, 2.74 for two
    assert ratio == pytest.approx(expected, rel=0.15)


@pytest.mark.parametrize("n", [1, 2])
def test_reduced_model_beats_linear_estimate_at_1e4_sequences(n):
    rng = np.random.default_rng(30 + n)
    h, s = _random_rates(n, rng, h_scale=0.01, s_range=(1e-3, 4e-3))
    truth = channel_from_rates(n, hamiltonian=h, stochastic=s)
    tb = truth.unital_block
    design = _design(n, rng)
    cov = _covariance(design.shape[0], _sigma(n, 1e4), rng)
    err_lin, err_red, inside = [], [], []
    for _ in range(20 if n == 1 else 6):
        obs = _observe(tb, design, cov, rng)
        fit = fit_generator_model(obs)
        lin = _linear_full_fit(obs)
        err_lin.append(np.sum((lin.unital_block - tb) ** 2))
        err_red.append(np.sum((fit.unital_block - tb) ** 2))
        inside.extend(fit.intervals(level=0.95).contains(_truth_parameters(h, s)).values())
    ratio = np.sqrt(np.mean(err_lin) / np.mean(err_red))
    coverage = np.mean(inside)
    print(f"n={n}: Frobenius error ratio linear/reduced = {ratio:.2f}, Wald 95% coverage = {coverage:.3f}")
    if n == 2:
        assert ratio >= 2.0
    else:
        # only 6 of 9 directions are removed for one qubit: the expected gain is modest
        assert ratio >= 1.1
    # 95% intervals: coverage of 120 (n=1) or 180 (n=2) intervals, binomial sd about 2%
    assert 0.88 <= coverage <= 1.0


def test_wald_coverage_and_chi2_distribution_one_qubit():
    # 150 independent simulated experiments; chi2 of the true model ~ chi-square(k_obs - 6),
    # mean k_obs - 6 (common practice), and 95% Wald intervals cover in about 95% of cases
    rng = np.random.default_rng(40)
    h, s = _random_rates(1, rng, h_scale=0.02, s_range=(0.01, 0.02))
    tb = channel_from_rates(1, hamiltonian=h, stochastic=s).unital_block
    design = _design(1, rng)
    cov = _covariance(design.shape[0], 2e-3, rng)
    truth = _truth_parameters(h, s)
    chi2s, inside = [], []
    for _ in range(150):
        fit = fit_generator_model(_observe(tb, design, cov, rng))
        chi2s.append(fit.chi2)
        inside.extend(fit.intervals().contains(truth).values())
    dof = design.shape[0] - 6
    assert np.mean(chi2s) == pytest.approx(dof, abs=4 * np.sqrt(2 * dof / 150))
    assert 0.92 <= np.mean(inside) <= 0.98


@pytest.mark.parametrize("n", [1, 2])
def test_bootstrap_intervals_from_replicates(n):
    rng = np.random.default_rng(50 + n)
    h, s = _random_rates(n, rng, h_scale=0.01, s_range=(0.01, 0.02))
    tb = channel_from_rates(n, hamiltonian=h, stochastic=s).unital_block
    design = _design(n, rng)
    cov = _covariance(design.shape[0], 1e-3, rng)
    obs = _observe(tb, design, cov, rng, n_replicates=200 if n == 1 else 60)
    fit = fit_generator_model(obs)
    boot = intervals_from_replicates(fit, obs, level=0.95)
    wald = fit.intervals(level=0.95)
    assert boot.method is IntervalMethod.BOOTSTRAP and boot.n_replicates == obs.replicates.shape[0]
    assert boot.labels == wald.labels
    # the replicates have the same covariance as the data, so widths agree with Gauss-Newton's
    ratio = (boot.upper - boot.lower) / (wald.upper - wald.lower)
    assert np.all((ratio > 0.6) & (ratio < 1.5)), ratio
    assert np.mean(list(boot.contains(_truth_parameters(h, s)).values())) >= 0.85
    pauli = fit_pauli_model(obs)
    pboot = intervals_from_replicates(pauli, obs)
    assert np.all(pboot.lower <= pboot.upper) and np.all(pboot.lower >= 0)


def test_unidentified_parameters_report_infinite_errors():
    # only the diagonal of the block is observed: a Hamiltonian term moves it at second order
    # only, and an X rotation (cos 2h on YY and ZZ) trades off against stochastic rates, so the
    # data leave directions of the parameters undetermined; their errors must not look finite
    rng = np.random.default_rng(60)
    truth = channel_from_rates(1, stochastic={"X": 0.01, "Z": 0.02})
    design = np.eye(9)[[0, 4, 8]]
    obs = _observe(truth.unital_block, design, 1e-6 * np.eye(3), rng, exact=True)
    fit = fit_generator_model(obs)
    assert fit.chi2 < 1e-12  # the observed diagonal is reproduced
    assert np.allclose(np.diag(fit.unital_block), np.diag(truth.unital_block), atol=1e-9)
    assert sum(np.isinf(v) for v in fit.standard_errors.values()) >= 3
    assert all(np.isinf(fit.standard_errors[f"H:{p}"]) for p in "XYZ")
    # with every entry observed, everything is determined
    full = _observe(truth.unital_block, np.eye(9), 1e-6 * np.eye(9), rng, exact=True)
    fit_full = fit_generator_model(full)
    assert all(np.isfinite(v) for v in fit_full.standard_errors.values())
    assert fit_full.parameters["S:Z"] == pytest.approx(0.02, abs=1e-9)


def test_restarts_never_worsen_the_fit():
    rng = np.random.default_rng(61)
    h, s = _random_rates(1, rng, h_scale=0.3, s_range=(0.01, 0.05))
    tb = channel_from_rates(1, hamiltonian=h, stochastic=s).unital_block
    design = _design(1, rng)
    obs = _observe(tb, design, _covariance(design.shape[0], 1e-2, rng), rng)
    f0 = fit_generator_model(obs)
    f1 = fit_generator_model(obs, restarts=4, rng=np.random.default_rng(0))
    assert f1.chi2 <= f0.chi2 + 1e-9
    assert f1.n_evaluations > f0.n_evaluations


# ---- (b) the criterion ------------------------------------------------------------------------
def _correlation_generator_1q(c: float) -> np.ndarray:
    """Superoperator of c * C_{X,Y}[rho] = c (X rho Y + Y rho X) (the anticommutator term vanishes
    since {X, Y} = 0), a Pauli-correlation term ("A taxonomy of small Markovian errors",
    PRX Quantum 3, 020335 (2022))."""
    x, y = _pauli.pauli_matrix("X"), _pauli.pauli_matrix("Y")
    return _superop_generator_from_kraus_like([(c, x, y), (c, y, x)])


def _h_s_superop(n: int, h: dict, s: dict) -> np.ndarray:
    d = 2**n
    eye = np.eye(d)
    terms = []
    for p, v in h.items():
        m = _pauli.pauli_matrix(p)
        terms += [(-1j * v, m, eye), (1j * v, eye, m)]
    for p, v in s.items():
        m = _pauli.pauli_matrix(p)
        terms += [(v, m, m), (-v, eye, eye)]
    return _superop_generator_from_kraus_like(terms)


def test_one_qubit_amplitude_damping_block_lies_inside_the_reduced_model():
    # amplitude damping's unital block is diag(sqrt(1-g), sqrt(1-g), 1-g) (common practice), and
    # exp(s_X S_X + s_Y S_Y) has diagonal (e^{-2 s_Y}, e^{-2 s_X}, e^{-2(s_X + s_Y)}): equal for
    # s_X = s_Y = -ln(1-g)/4.  So for one qubit the data cannot tell damping from X/Y noise.
    rng = np.random.default_rng(71)
    g = 0.05
    truth = amplitude_damping(g)
    assert np.allclose(truth.unital_block, np.diag([np.sqrt(1 - g), np.sqrt(1 - g), 1 - g]))
    obs = _observe(truth.unital_block, np.eye(9), 1e-6 * np.eye(9), rng, exact=True)
    fit = fit_generator_model(obs)
    assert fit.chi2 < 1e-14
    assert fit.parameters["S:X"] == pytest.approx(-np.log(1 - g) / 4, abs=1e-9)
    assert fit.parameters["S:Y"] == pytest.approx(-np.log(1 - g) / 4, abs=1e-9)
    assert abs(fit.parameters["S:Z"]) < 1e-9


def _all_fits(obs):
    return [_linear_full_fit(obs), fit_generator_model(obs), fit_pauli_model(obs), fit_coherent_model(obs)]


@pytest.mark.parametrize("case", ["1q-correlation", "2q-amplitude-damping"])
def test_criterion_prefers_full_model_when_truth_is_outside_and_data_plentiful(case):
    rng = np.random.default_rng(70)
    if case == "1q-correlation":
        n = 1
        h, s = {"Z": 0.01}, {"X": 0.01, "Y": 0.02}
        gen = _h_s_superop(1, h, s) + _correlation_generator_1q(0.5 * np.sqrt(0.01 * 0.02))
        truth = Channel.from_superop(scipy.linalg.expm(gen))
    else:
        # amplitude damping on qubit 1 reaches the two-qubit unital block through entries like
        # (XZ, XI) = gamma, which no H or S term produces
        n = 2
        h, s = _random_rates(2, rng, h_scale=0.005, s_range=(5e-4, 2e-3))
        truth = embed(amplitude_damping(0.02), [1], 2) @ channel_from_rates(2, hamiltonian=h, stochastic=s)
    design = _design(n, rng)
    cov = _covariance(design.shape[0], _sigma(n, 1e7), rng)  # plentiful data
    obs = _observe(truth.unital_block, design, cov, rng)
    held = _observe(truth.unital_block, design, cov, rng)
    fits = _all_fits(obs)
    by_aic = compare_models(fits)
    by_held = compare_models(fits, heldout=held)
    assert by_aic.criterion is SelectionCriterion.AIC and by_held.criterion is SelectionCriterion.HELDOUT
    assert by_aic.chosen == FULL and by_held.chosen == FULL
    assert by_aic.score(COHERENT_STOCHASTIC).p_value < 1e-6  # the reduced model visibly misfits
    assert "full" in by_aic.reason and "lowest AIC" in by_aic.reason
    print(case, by_aic.reason)


def _inside_truth(n: int) -> Channel:
    if n == 1:
        # rates well away from their bound 0 (standard errors about 0.003 at 10^5 sequences),
        # so the reduced model is locally unconstrained and the chi-square law below applies
        return channel_from_rates(1, hamiltonian={"Z": 0.05}, stochastic={"X": 0.03, "Y": 0.02, "Z": 0.02})
    s = {p: 3e-3 for p in _pauli.pauli_labels(n)[1:]}
    s["ZI"] = 0.02
    return channel_from_rates(n, hamiltonian={"ZZ": 0.02, "XI": 0.01}, stochastic=s)


def test_criterion_prefers_reduced_model_when_truth_is_inside_and_data_scarce_two_qubits():
    # 10^4 sequences; the full model's 195 extra parameters lower chi2 by about chi-square(195),
    # far below their AIC penalty of 390
    rng = np.random.default_rng(82)
    truth = _inside_truth(2)
    design = _design(2, rng)
    cov = _covariance(design.shape[0], _sigma(2, 1e4), rng)
    obs = _observe(truth.unital_block, design, cov, rng)
    held = _observe(truth.unital_block, design, cov, rng)
    fits = _all_fits(obs)
    by_aic = compare_models(fits)
    by_held = compare_models(fits, heldout=held)
    print(by_aic.reason, "|", by_held.reason)
    assert by_aic.chosen == COHERENT_STOCHASTIC and by_held.chosen == COHERENT_STOCHASTIC
    assert by_aic.score(FULL).aic > by_aic.score(COHERENT_STOCHASTIC).aic + 100
    assert by_aic.score(COHERENT_STOCHASTIC).delta_aic == 0.0
    assert by_held.score(FULL).heldout_gap > by_held.score(FULL).heldout_gap_se


def test_criterion_prefers_reduced_model_when_truth_is_inside_and_data_scarce_one_qubit():
    # one qubit: the full model has only 3 extra parameters, so the choice is statistical.
    # With the truth inside the reduced model, chi2_reduced - chi2_full ~ chi-square(3)
    # (Wilks' theorem, common practice), and the rule "full only if its AIC is lower by more
    # than 2" picks it with probability P(chi-square(3) > 8) = 0.046.
    rng = np.random.default_rng(81)
    truth = _inside_truth(1)
    design = _design(1, rng)
    cov = _covariance(design.shape[0], _sigma(1, 1e5), rng)
    picks_aic, picks_held, dchi2 = [], [], []
    n_exp = 200
    for _ in range(n_exp):
        obs = _observe(truth.unital_block, design, cov, rng)
        fits = _all_fits(obs)
        dchi2.append(fits[1].chi2 - fits[0].chi2)
        picks_aic.append(compare_models(fits).chosen)
        picks_held.append(compare_models(fits, heldout=_observe(truth.unital_block, design, cov, rng)).chosen)
    p_full = scipy.stats.chi2.sf(8.0, 3)
    frac_full = picks_aic.count(FULL) / n_exp
    print(f"one qubit, truth inside: AIC picks full {frac_full:.3f} (expected {p_full:.3f});"
          f" held-out picks {picks_held.count(COHERENT_STOCHASTIC) / n_exp:.3f} reduced")
    assert np.mean(dchi2) == pytest.approx(3.0, abs=4 * np.sqrt(6 / n_exp))  # chi-square(3) mean 3, var 6
    assert abs(frac_full - p_full) <= 3 * np.sqrt(p_full * (1 - p_full) / n_exp)
    assert picks_aic.count(COHERENT_STOCHASTIC) / n_exp >= 0.9
    assert picks_held.count(COHERENT_STOCHASTIC) / n_exp >= 0.9


def test_criterion_picks_the_smallest_sufficient_model():
    rng = np.random.default_rng(90)
    design = _design(2, rng)
    cov = _covariance(design.shape[0], _sigma(2, 1e5), rng)
    pauli_truth = channel_from_rates(2, stochastic={"ZZ": 0.01, "XI": 0.005, "IY": 0.003})
    coh_truth = rotation("ZZ", 0.08)
    for truth, expect in ((pauli_truth, PAULI), (coh_truth, COHERENT)):
        obs = _observe(truth.unital_block, design, cov, rng)
        cmp = compare_models(_all_fits(obs), heldout=_observe(truth.unital_block, design, cov, rng))
        assert cmp.chosen == expect, cmp.reason
        assert cmp.reason.startswith(f"'{expect}'")
        assert compare_models(_all_fits(obs)).chosen == expect
        print(cmp.reason)


def test_comparison_table_shows_every_model_side_by_side():
    rng = np.random.default_rng(91)
    truth = channel_from_rates(1, hamiltonian={"X": 0.02}, stochastic={"Z": 0.01})
    design = _design(1, rng)
    cov = _covariance(design.shape[0], 1e-3, rng)
    obs = _observe(truth.unital_block, design, cov, rng)
    fits = _all_fits(obs)
    cmp = compare_models(fits, heldout=_observe(truth.unital_block, design, cov, rng))
    rows = cmp.table()
    assert [r[0] for r in rows] == [f.name for f in fits]
    assert all(len(r) == len(TABLE_COLUMNS) for r in rows)
    assert sum(r[-1] for r in rows) == 1
    assert [r[1] for r in rows] == [9, 6, 3, 3]
    weights = [s.aic_weight for s in cmp.scores]
    assert sum(weights) == pytest.approx(1.0) and min(s.delta_aic for s in cmp.scores) == 0.0
    for sc, f in zip(cmp.scores, fits):
        assert sc.aic == pytest.approx(f.chi2 + 2 * f.n_parameters)
        assert sc.heldout_n == design.shape[0] and sc.heldout_chi2 is not None
        assert sc.p_value == pytest.approx(scipy.stats.chi2.sf(f.chi2, f.dof))


# ---- (e) fidelity intervals and the held-out guard ---------------------------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_fidelity_intervals_follow_the_delta_method(n):
    from robusttomo import metrics

    rng = np.random.default_rng(100 + n)
    h, s = _random_rates(n, rng, h_scale=0.01, s_range=(2e-3, 5e-3))
    truth = channel_from_rates(n, hamiltonian=h, stochastic=s)
    design = _design(n, rng)
    obs = _observe(truth.unital_block, design, _covariance(design.shape[0], _sigma(n, 1e4), rng), rng)
    d = 2**n
    zq = scipy.stats.norm.ppf(0.975)
    for fit in (fit_generator_model(obs), fit_coherent_model(obs), fit_pauli_model(obs)):
        fi = fit.fidelity_intervals()
        assert fi.labels == models.FIGURE_LABELS and fi.method is IntervalMethod.WALD
        # F_e = tr(R)/d^2 and F_avg = (d F_e + 1)/(d + 1) (Phys. Lett. A 303, 249 (2002))
        fe = np.trace(fit.channel.ptm) / d**2
        assert fi.estimate[1] == pytest.approx(fe, abs=1e-14)
        assert fi.estimate[0] == pytest.approx((d * fe + 1) / (d + 1), abs=1e-14)
        assert fi.estimate[0] == pytest.approx(metrics.average_gate_fidelity(fit.channel), abs=1e-14)
        # slow reference for the gradient: central differences of tr(R(theta)) through the
        # package's channel constructors
        labels = list(fit.parameters)
        theta = np.array([fit.parameters[k] for k in labels])

        def trace_of(t):
            if fit.name == PAULI:
                probs = {lab[2:]: v for lab, v in zip(labels, t)}
                kraus = [np.sqrt(max(1 - sum(probs.values()), 0.0)) * np.eye(d)]
                kraus += [np.sqrt(max(v, 0.0)) * _pauli.pauli_matrix(p) for p, v in probs.items()]
                return np.trace(Channel.from_kraus(kraus).ptm)
            hh = {lab[2:]: v for lab, v in zip(labels, t) if lab.startswith("H:")}
            ss = {lab[2:]: v for lab, v in zip(labels, t) if lab.startswith("S:")}
            return np.trace(scipy.linalg.expm(generator_matrix(n, hh, ss)))

        step = 1e-6
        if fit.name == PAULI:  # tr(R) is linear in p: forward differences are exact and stay in bounds
            grad = np.array([(trace_of(theta + step * e) - trace_of(theta)) / step for e in np.eye(len(theta))])
        else:
            grad = np.array([(trace_of(theta + step * e) - trace_of(theta - step * e)) / (2 * step)
                             for e in np.eye(len(theta))])
        se_ref = np.sqrt(grad @ fit.parameter_covariance @ grad) / d**2
        half = (fi.estimate[1] - fi.lower[1]) / zq
        assert half == pytest.approx(se_ref, rel=1e-4), fit.name
        assert np.all(fi.upper <= 1.0) and np.all(fi.lower < fi.estimate)


def test_fidelity_intervals_cover_and_bootstrap_agrees_one_qubit():
    rng = np.random.default_rng(110)
    h, s = _random_rates(1, rng, h_scale=0.02, s_range=(0.01, 0.02))
    truth = channel_from_rates(1, hamiltonian=h, stochastic=s)
    f_true = (2 * np.trace(truth.ptm) / 4 + 1) / 3
    design = _design(1, rng)
    cov = _covariance(design.shape[0], 2e-3, rng)
    inside = []
    for _ in range(150):
        inside.append(bool(fit_generator_model(_observe(truth.unital_block, design, cov, rng))
                           .fidelity_intervals().contains({"average_gate_fidelity": f_true})["average_gate_fidelity"]))
    assert 0.91 <= np.mean(inside) <= 0.99  # binomial sd 0.018 about 0.95
    obs = _observe(truth.unital_block, design, cov, rng, n_replicates=200)
    fit = fit_generator_model(obs)
    boot = intervals_from_replicates(fit, obs, figures=True)
    wald = fit.fidelity_intervals()
    assert boot.labels == wald.labels and np.allclose(boot.estimate, wald.estimate)
    ratio = (boot.upper - boot.lower) / (wald.upper - wald.lower)
    assert np.all((ratio > 0.75) & (ratio < 1.3)), ratio
    with pytest.raises(ValueError, match="carries no parameter covariance"):
        ModelFit.from_channel("full", truth, 9, obs).fidelity_intervals()
    with pytest.raises(TypeError, match="'figures' must be True or False"):
        intervals_from_replicates(fit, obs, figures="yes")


def test_rates_at_their_bound_are_exactly_zero_so_intervals_contain_zero():
    # the trust-region solver keeps iterates strictly inside the bounds; a rate at 0 must come
    # back as 0.0, or the bootstrap interval [1e-30, ...] would exclude a true rate of 0
    rng = np.random.default_rng(120)
    truth = channel_from_rates(2, hamiltonian={"ZZ": 0.02}, stochastic={"XI": 0.004})
    design = _design(2, rng)
    obs = _observe(truth.unital_block, design, _covariance(design.shape[0], _sigma(2, 1e4), rng), rng, n_replicates=20)
    fit = fit_generator_model(obs)
    rates = np.array([v for k, v in fit.parameters.items() if k.startswith("S:")])
    assert np.all(rates >= 0) and np.sum(rates == 0.0) >= 3
    assert not np.any((rates > 0) & (rates < 1e-10))
    boot = intervals_from_replicates(fit, obs)
    zero_truth = {f"S:{p}": 0.0 for p in _pauli.pauli_labels(2)[1:] if p != "XI"}
    assert np.mean(list(boot.contains(zero_truth).values())) >= 0.9


def _given(name: str, block: np.ndarray, k: int, obs: LinearObservations) -> ModelFit:
    ptm = np.eye(block.shape[0] + 1)
    ptm[1:, 1:] = block
    return ModelFit.from_channel(name, Channel.from_ptm(ptm), k, obs)


def test_heldout_choice_never_keeps_a_model_the_fitted_data_reject():
    # two "models" wrapped as given fits: 'big' (5 parameters) reproduces the truth, 'small'
    # (3 parameters) misses it by a chi2 of t on the fitted observations.  Held-out data so
    # noisy that both predict them within the noise: the one-standard-error rule alone would
    # keep 'small'.  With t = 30 the likelihood-ratio p-value for 2 extra parameters is
    # exp(-t/2) = 3.1e-7 (chi-square with 2 degrees of freedom is exponential, common
    # practice), below 1e-3: 'small' is rejected and 'big' chosen.  With t = 6 (p = 0.05) the
    # simpler model is kept.
    truth = channel_from_rates(1, hamiltonian={"Z": 0.02}, stochastic={"X": 0.01}).unital_block
    sigma = 1e-3
    fitted = LinearObservations(1, np.eye(9), truth.reshape(-1), sigma**2 * np.eye(9), tuple(map(str, range(9))))
    rng = np.random.default_rng(130)
    held = LinearObservations(1, np.eye(9), truth.reshape(-1) + 0.05 * rng.normal(size=9), 0.05**2 * np.eye(9),
                              tuple(map(str, range(9))))
    for t, expect in ((30.0, "big"), (6.0, "small")):
        off = truth.copy()
        off[0, 0] += np.sqrt(t) * sigma  # chi2 of 'small' on the fitted data is exactly t
        fits = [_given("big", truth, 5, fitted), _given("small", off, 3, fitted)]
        cmp = compare_models(fits, heldout=held)
        assert cmp.score("small").chi2 == pytest.approx(t, rel=1e-9)
        # both predict the held-out data within one standard error of each other
        assert abs(cmp.score("small").heldout_chi2 - cmp.score("big").heldout_chi2) <= cmp.heldout_threshold
        assert cmp.chosen == expect, cmp.reason
        if expect == "big":
            assert cmp.score("small").rejected_by == "big"
            assert cmp.score("small").rejected_p == pytest.approx(np.exp(-t / 2), rel=1e-9)
            assert "reject it against 'big'" in cmp.reason
        else:
            assert cmp.score("small").rejected_by is None
        assert cmp.score("big").rejected_by is None
        # AIC alone is unchanged by the guard: chi2 + 2k = 10 (big) against t + 6
        assert compare_models(fits).chosen == ("big" if t + 6 > 10 + models.AIC_TIE else "small")


def test_heldout_threshold_is_the_standard_error_of_the_best_heldout_chi2():
    # the held-out chi2 of a model with misfit is noncentral chi-square with n degrees of
    # freedom and noncentrality lam, variance 2 (n + 2 lam) (common practice); checked here
    # by simulation: the spread of the best predictor's held-out chi2 over fresh held-out
    # data against the reported threshold
    rng = np.random.default_rng(140)
    n = 1
    truth = channel_from_rates(n, hamiltonian={"Z": 0.02}, stochastic={"X": 0.004, "Y": 0.003})
    design = _design(n, rng, n_probes=40)
    cov = _covariance(design.shape[0], 2e-3, rng)
    obs = _observe(truth.unital_block, design, cov, rng)
    fits = _all_fits(obs)
    ref = compare_models(fits, heldout=_observe(truth.unital_block, design, cov, rng))
    best = min((s for s in ref.scores if s.rejected_by is None), key=lambda s: s.heldout_chi2).name
    chi = [compare_models(fits, heldout=_observe(truth.unital_block, design, cov, rng)).score(best).heldout_chi2
           for _ in range(300)]
    k = design.shape[0]
    lam = max(np.mean(chi) - k, 0.0)
    assert np.std(chi, ddof=1) == pytest.approx(np.sqrt(2 * (k + 2 * lam)), rel=0.15)
    assert ref.heldout_threshold == pytest.approx(np.sqrt(2 * k + 4 * max(ref.score(best).heldout_chi2 - k, 0)))
    assert compare_models(fits).heldout_threshold is None


# ---- input validation -------------------------------------------------------------------------
def _good_obs():
    return LinearObservations(1, np.eye(9), np.eye(3).reshape(-1), 1e-4 * np.eye(9), tuple(map(str, range(9))))


def _replace(obs, **kw):
    fields = dict(
        n_qubits=obs.n_qubits,
        design=obs.design,
        values=obs.values,
        covariance=obs.covariance,
        labels=obs.labels,
        replicates=obs.replicates,
    )
    fields.update(kw)
    return LinearObservations(**fields)


@pytest.mark.parametrize(
    "kw, err, match",
    [
        (dict(design=np.eye(9)[:, :8]), ValueError, r"'obs.design' must have shape \(k, 9\)"),
        (dict(values=np.zeros(8)), ValueError, r"'obs.values' must have shape \(9,\)"),
        (dict(covariance=np.eye(8)), ValueError, r"'obs.covariance' must have shape \(9, 9\)"),
        (dict(covariance=-np.eye(9)), ValueError, "positive semidefinite"),
        (dict(covariance=np.zeros((9, 9))), ValueError, "all zero"),
        (dict(covariance=np.triu(np.ones((9, 9)))), ValueError, "symmetric"),
        (dict(values=np.full(9, np.nan)), ValueError, "'obs.values' must be finite"),
        (dict(n_qubits=4), ValueError, "'obs.n_qubits' must be 1, 2 or 3"),
        (dict(replicates=np.zeros((3, 8))), ValueError, r"'obs.replicates' must have shape \(B, 9\)"),
    ],
)
def test_bad_observations_are_rejected(kw, err, match):
    obs = _replace(_good_obs(), **kw)
    for fitter in (fit_generator_model, fit_coherent_model, fit_pauli_model):
        with pytest.raises(err, match=match):
            fitter(obs)


def test_bad_options_are_rejected():
    obs = _good_obs()
    with pytest.raises(TypeError, match="'obs' must be a robusttomo.fit.LinearObservations"):
        fit_pauli_model({"values": 1})
    with pytest.raises(ValueError, match="'restarts' = 2 needs random starting points"):
        fit_generator_model(obs, restarts=2)
    with pytest.raises(ValueError, match="'max_evaluations' must be a positive integer; got 0"):
        fit_generator_model(obs, max_evaluations=0)
    with pytest.raises(ValueError, match="'start' has unknown labels"):
        fit_coherent_model(obs, start={"S:X": 0.1})
    with pytest.raises(ValueError, match=r"'level' must be a number in \(0, 1\)"):
        fit_generator_model(obs).intervals(level=95)
    with pytest.raises(ValueError, match="must hold at least 2 bootstrap replicates"):
        intervals_from_replicates(fit_pauli_model(obs), obs)
    given = ModelFit.from_channel("full", Channel.from_ptm(np.eye(4)), 9, obs)
    with pytest.raises(ValueError, match="cannot refit model 'full'"):
        intervals_from_replicates(given, _replace(obs, replicates=np.zeros((3, 9))))
    with pytest.raises(ValueError, match="'channel' acts on 2 qubit"):
        ModelFit.from_channel("full", Channel.from_ptm(np.eye(16)), 225, obs)
    with pytest.raises(ValueError, match="'n_parameters' must be a non-negative integer"):
        ModelFit.from_channel("full", Channel.from_ptm(np.eye(4)), -1, obs)


def test_bad_comparisons_are_rejected():
    obs = _good_obs()
    f = fit_pauli_model(obs)
    with pytest.raises(ValueError, match="'fits' is empty"):
        compare_models([])
    with pytest.raises(TypeError, match="'fits' must be a sequence of ModelFit"):
        compare_models(f)
    with pytest.raises(ValueError, match="model names in 'fits' must be distinct"):
        compare_models([f, f])
    two = LinearObservations(2, np.eye(225), np.eye(15).reshape(-1), 1e-4 * np.eye(225), tuple(map(str, range(225))))
    with pytest.raises(ValueError, match="same number of qubits"):
        compare_models([f, fit_coherent_model(two)])
    with pytest.raises(ValueError, match="'heldout' is for 2 qubit"):
        compare_models([f], heldout=two)
    with pytest.raises(ValueError, match="no model named 'x'"):
        compare_models([f]).score("x")


def test_docstring_examples_run():
    result = doctest.testmod(models, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted >= 1 and result.failed == 0
