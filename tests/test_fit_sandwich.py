"""The structured sandwich covariance of the decay fit against the dense reference.

Reference: the sandwich covariance with dense Jacobian, bread and meat and a pseudo-inverse
(common practice: the robust "sandwich" estimator of a weighted least-squares fit), kept in
``robusttomo.fit._sandwich_dense``.
"""

from __future__ import annotations

import numpy as np
import pytest

from robusttomo import fit
from robusttomo.estimate import compute_correlations
from common_data import random_counts, random_plan  # shared test builders


def _fit_inputs(corr, cv=True):
    design = fit._make_design(corr)
    lm = fit._length_means(corr, cv)
    means = [x[0] for x in lm]
    corrected = [x[1] for x in lm]
    sig = [np.maximum(np.std(x[1], axis=0, ddof=1) / np.sqrt(x[1].shape[0]), 1e-15) for x in lm]
    c, lam = fit._joint_fit(design, corr, means, sig)
    return design, c, lam, means, sig, corrected


@pytest.mark.parametrize("n, lengths", [(1, [1, 2, 3, 6]), (2, [1, 2, 3, 4, 8]), (2, [1, 3, 4])])
def test_structured_sandwich_equals_dense_sandwich(n, lengths):
    rng = np.random.default_rng(7 + n)
    plan = random_plan(n, lengths, 60, rng)
    corr = compute_correlations(plan, random_counts(plan, rng))
    for cv in (True, False):
        design, c, lam, means, sig, corrected = _fit_inputs(corr, cv)
        fast = fit._sandwich(design, corr, c, lam, means, sig, corrected)
        slow = fit._sandwich_dense(design, corr, c, lam, means, sig, corrected)
        np.testing.assert_allclose(fast[0], slow[0], rtol=1e-9, atol=1e-12 * np.abs(slow[0]).max())
        assert fast[1] == pytest.approx(slow[1], rel=1e-12) and fast[2] == slow[2]
        np.testing.assert_allclose(fast[3], slow[3], rtol=1e-12)


def test_sandwich_falls_back_to_pseudo_inverse_when_ill_conditioned():
    rng = np.random.default_rng(9)
    plan = random_plan(1, [1, 2, 4], 50, rng)
    corr = compute_correlations(plan, random_counts(plan, rng))
    design, c, lam, means, sig, corrected = _fit_inputs(corr)
    sig = [s.copy() for s in sig]
    sig[1][3] = 1e-12  # one probe 1e10 times more precise: the bread is too ill-conditioned
    fast = fit._sandwich(design, corr, c, lam, means, sig, corrected)
    slow = fit._sandwich_dense(design, corr, c, lam, means, sig, corrected)
    np.testing.assert_array_equal(fast[0], slow[0])
