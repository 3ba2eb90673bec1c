"""Fast paths of the correlations against slow, obviously-correct references.

Reference: dense ``einsum`` propagation of Pauli vectors through the PTMs (the definition in
../shared/THEORY.md, "The identity").
"""

from __future__ import annotations

import numpy as np
import pytest

import robusttomo.estimate as est
from robusttomo.channels import random_channel, rotation
from robusttomo.clifford import clifford_ptms
from robusttomo.estimate import compute_correlations, default_probes, probes_from_unitaries
from common_data import random_counts, random_plan  # shared test builders


def _dense_reference(steps, probe_ptms, final, e0):
    r = np.einsum("kij,j->ki", steps[:, 0], e0)
    r = np.broadcast_to(r[:, None, :], (r.shape[0], probe_ptms.shape[0], r.shape[1]))
    for t in range(1, steps.shape[1]):
        r = np.einsum("qij,kqj->kqi", probe_ptms, r)
        r = np.einsum("kij,kqj->kqi", steps[:, t], r)
    if final is not None:
        r = np.einsum("ij,kqj->kqi", final, r)
    return r


@pytest.mark.parametrize("n", [1, 2])
def test_signed_permutation_propagation_equals_dense_products(n):
    rng = np.random.default_rng(n)
    d2 = 4**n
    order = 24 if n == 1 else 11520
    steps = clifford_ptms(n, rng.integers(0, order, size=40 * 4)).reshape(40, 4, d2, d2)
    e0 = est._z_matrix(n)[0]
    probes = default_probes(n).ptms
    final = random_channel(n, 0.2, rng).ptm  # a dense final map, as in interleaved mode
    np.testing.assert_allclose(est._propagate(steps, probes, final, e0), _dense_reference(steps, probes, final, e0),
                               atol=1e-13)
    # the identity probe alone (long lengths) skips the probe step
    ident = np.eye(d2)[None]
    np.testing.assert_allclose(est._propagate(steps, ident, None, e0), _dense_reference(steps, ident, None, e0),
                               atol=1e-13)
    # dense (non-Clifford) probes take the matrix-product path
    dense = np.stack([rotation("X" * n, 0.3).ptm, rotation("Z" * n, 0.2).ptm])
    np.testing.assert_allclose(est._propagate(steps, dense, None, e0), _dense_reference(steps, dense, None, e0),
                               atol=1e-13)
    # dense steps (not signed permutations) are accepted too
    noisy = np.einsum("ij,kmjl->kmil", random_channel(n, 0.1, rng).ptm, steps)
    np.testing.assert_allclose(est._propagate(noisy, probes, None, e0), _dense_reference(noisy, probes, None, e0),
                               atol=1e-13)


def test_chunked_correlations_equal_unchunked(monkeypatch):
    rng = np.random.default_rng(5)
    plan = random_plan(2, [1, 2, 3, 4], 37, rng)
    counts = random_counts(plan, rng)
    probes = default_probes(2)
    whole = compute_correlations(plan, counts, probes=probes)
    monkeypatch.setattr(est, "_CHUNK_ELEMENTS", 97)  # many chunks over probes and sequences
    parts = compute_correlations(plan, counts, probes=probes)
    for a, b in zip(whole.stats, parts.stats):
        np.testing.assert_array_equal(a.probes, b.probes)
        np.testing.assert_allclose(a.values, b.values, atol=1e-13)
        np.testing.assert_allclose(a.ideal, b.ideal, atol=1e-13)


def test_unitary_probes_at_length_three_equal_direct_values():
    rng = np.random.default_rng(6)
    plan = random_plan(1, [1, 2, 3], 30, rng)
    counts = random_counts(plan, rng)
    us = np.stack([np.eye(2), np.array([[np.cos(0.2), -np.sin(0.2)], [np.sin(0.2), np.cos(0.2)]])]).astype(complex)
    probes = probes_from_unitaries(us, ["I", "ry"])
    corr = compute_correlations(plan, counts, probes=probes)
    block = plan.blocks[2]
    steps = clifford_ptms(1, block.cliffords.reshape(-1)).reshape(30, 3, 4, 4)
    z = est._z_matrix(1)
    sel = corr.stats_for(3).probes
    r = _dense_reference(steps, probes.ptms[sel], None, z[0])
    w = counts.for_block(plan, block)
    w = w / w.sum(axis=1, keepdims=True)
    direct = est.kappa(2) * (np.einsum("xi,kqi,kx->kq", z, r, w) / 2 - 0.5)
    np.testing.assert_allclose(corr.stats_for(3).values, direct, atol=1e-12)


@pytest.mark.parametrize("n, m", [(1, 1), (1, 2), (2, 2), (2, 3)])
def test_error_free_run_equals_dense_products(n, m):
    # the ideal run of the short lengths (W_m G ... G W_1 e0, then the final map) against the
    # dense definition, with and without an interleaved gate G
    rng = np.random.default_rng(30 + n + m)
    d2 = 4**n
    order = 24 if n == 1 else 11520
    idx = rng.integers(0, order, size=(25, m))
    steps = clifford_ptms(n, idx.reshape(-1)).reshape(25, m, d2, d2)
    perm, sign = est._step_permutations(n, idx)
    e0 = est._z_matrix(n)[0]
    gate = clifford_ptms(n, np.array([7]))[0]
    for g, final in ((None, None), (gate, gate), (rotation("X" * n, 0.3).ptm, rotation("X" * n, 0.3).ptm)):
        ref = _dense_reference(steps, (np.eye(d2) if g is None else g)[None], final, e0)[:, 0]
        np.testing.assert_allclose(est._ideal_run(perm, sign, g, final, e0), ref, atol=1e-13)
