"""Covariance shrinkage of a length's probe values (few sequences, or as many as values).

Reference: "A shrinkage approach to large-scale covariance matrix estimation and implications
for functional genomics", Statistical Applications in Genetics and Molecular Biology 4, 32
(2005), target D (diagonal, unequal variances): the optimal intensity is
``sum_(i!=j) Var(r_ij) / sum_(i!=j) r_ij**2`` with ``w_kij = z_ki z_kj`` on standardized values,
``Var(r_ij) = n / (n - 1)**3 sum_k (w_kij - mean_k w_kij)**2`` and ``r_ij = n/(n-1) mean_k
w_kij``.  The reference below is that formula written out entry by entry; the package computes
the same sums without forming any Q x Q array.
"""

from __future__ import annotations

import numpy as np
import pytest

import robusttomo as rt
from robusttomo import fit
from robusttomo.channels import depolarizing, rotation
from robusttomo.estimate import compute_correlations
from common_data import random_plan  # shared test builders


def _paper_intensity(x: np.ndarray) -> float:
    k, q = x.shape
    x = x - x.mean(axis=0)
    z = x / x.std(axis=0, ddof=1)
    w = z[:, :, None] * z[:, None, :]
    wbar = w.mean(axis=0)
    var = k / (k - 1) ** 3 * ((w - wbar) ** 2).sum(axis=0)
    r = k / (k - 1) * wbar
    off = ~np.eye(q, dtype=bool)
    return float(np.clip(var[off].sum() / (r[off] ** 2).sum(), 0.0, 1.0))


@pytest.mark.parametrize("k, q, seed", [(5, 12, 0), (20, 40, 1), (30, 31, 2), (4, 60, 3), (50, 9, 9), (120, 30, 10)])
def test_intensity_matches_the_published_formula(k, q, seed):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(k, q)) @ rng.normal(size=(q, q))
    x -= x.mean(axis=0)
    assert fit._shrinkage(x) == pytest.approx(_paper_intensity(x), rel=1e-10, abs=1e-12)


def test_many_sequences_per_value_shrink_little():
    # correlated values (one shared factor) with 2000 sequences against 9 values: the sample
    # correlations are accurate, so the estimated intensity is small
    rng = np.random.default_rng(4)
    x = rng.normal(size=(2000, 1)) + 0.5 * rng.normal(size=(2000, 9))
    assert fit._shrinkage(x - x.mean(axis=0)) < 0.02


def test_independent_values_shrink_strongly_correlated_values_little():
    rng = np.random.default_rng(5)
    iid = rng.normal(size=(10, 80))
    factor = rng.normal(size=(10, 1)) * np.ones((1, 80)) + 0.05 * rng.normal(size=(10, 80))
    lam_iid = fit._shrinkage(iid - iid.mean(axis=0))
    lam_factor = fit._shrinkage(factor - factor.mean(axis=0))
    # (the estimator of Var(r_ij) is the spread of the products z_i z_j, about 2/n for
    # r near 1, so even near-perfect correlations are shrunk by about 0.2 at n = 10)
    assert lam_iid > 0.8 and lam_factor < 0.3


def _corr(n_at_two: int, seed: int):
    rng = np.random.default_rng(seed)
    plan = random_plan(2, [1, 2, 3], n_at_two, rng)
    dev = rt.Device.build(2, error=rotation("ZZ", 0.05) @ depolarizing(2, 0.97), readout=[(0.02, 0.03)] * 2)
    return compute_correlations(plan, rt.simulate(plan, dev, seed=seed + 1))


def test_few_sequences_give_a_full_rank_decay_covariance():
    # 60 sequences at length 2 against 225 probe values: the sample covariance has rank <= 59
    corr = _corr(60, 6)
    s2 = corr.stats_for(2)
    x = fit._cv_means(s2.values, s2.ideal, s2.mu, True)[1]
    assert np.linalg.matrix_rank(np.cov(x, rowvar=False)) < 225
    dec = fit.fit_decays(corr, bootstrap=0)
    ev = np.linalg.eigvalsh(dec.lambda_covariance)
    assert ev[0] > 1e-6 * ev[-1]
    assert np.all(np.isfinite(dec.lambda_covariance))


def test_chi_square_of_the_true_block_has_its_expected_size():
    # 500 sequences against the 225 length-2 values: the chi-square of the TRUE unital block
    # under the observations' covariance is chi-square with 225 degrees of freedom if that
    # covariance is right (mean 225, sd 21; common practice).  The inverse of the raw sample
    # covariance overstates the precision by about (K - 1)/(K - Q - 2) = 1.83 (mean of the inverse
    # Wishart, common practice): without the shrinkage this chi-square is 394 on these data.
    rng = np.random.default_rng(11)
    plan = random_plan(2, [1, 2, 3], 500, rng)
    err = rotation("ZZ", 0.05) @ depolarizing(2, 0.97)
    dev = rt.Device.build(2, error=err, readout=[(0.02, 0.03)] * 2)
    obs = fit.fit_decays(compute_correlations(plan, rt.simulate(plan, dev, seed=12)), bootstrap=0).observations()
    r = obs.values - obs.design @ err.ptm[1:, 1:].reshape(-1)
    chi2 = float(r @ np.linalg.solve(obs.covariance, r))
    assert obs.values.size == 225
    assert 225 - 4 * 21 < chi2 < 225 + 4 * 21


def test_shrunk_meat_equals_the_dense_reference(monkeypatch):
    # the structured sandwich and the dense reference apply the same shrunk covariance
    corr = _corr(60, 8)
    lm = fit._length_means(corr, True)
    means = [x[0] for x in lm]
    corrected = [x[1] for x in lm]
    sig = fit._stderr_of(corrected)
    design = fit._make_design(corr)
    c, lam = fit._joint_fit(design, corr, means, sig)
    fast = fit._sandwich(design, corr, c, lam, means, sig, corrected)[0]
    dense = fit._sandwich_dense(design, corr, c, lam, means, sig, corrected)[0]
    np.testing.assert_allclose(fast, dense, rtol=1e-7, atol=1e-12 * np.abs(dense).max())
