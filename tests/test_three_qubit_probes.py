"""The shipped three-qubit probe basis, its generator, and the three-qubit correlation path.

External references:
* Clifford group orders 24, 11520, 92897280 and |Sp(2n, 2)| = 2**(n*n) prod_j (4**j - 1)
  (OEIS A003956; "How to efficiently select an arbitrary Clifford group element",
  J. Math. Phys. 55, 122202 (2014)).
* The characters of the Pauli group are orthogonal, so the 4**n Pauli variants of one Clifford
  form a tight frame on the pattern of its unital block (common practice: orthogonality of the
  rows of a Sylvester-Hadamard matrix).
* lambda_A = tr(B_A^T B_L) / (d*d - 1): "A general framework for randomized benchmarking",
  PRX Quantum 3, 020357 (2022).
* Slow, obviously-correct references: dense singular values, from-scratch leverages, plain
  Python loops for the greedy cover, dense PTM propagation.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse
import scipy.sparse.linalg

from robusttomo.channels import depolarizing, embed, random_channel
from robusttomo.clifford import clifford_group_order, clifford_ptms
from robusttomo.counts import Counts
from robusttomo.estimate import _condition, _propagate, _z_matrix, compute_correlations, default_probes, kappa
from robusttomo.fit import estimate_decays
from robusttomo.plan import Plan, SequenceBlock, SequenceKind

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "benchmarks"))

import make_probe_table3 as gen  # noqa: E402


def _sparse_rows(n: int, idx: np.ndarray) -> scipy.sparse.csr_matrix:
    dd = (4**n - 1) ** 2
    pos, val = [], []
    for a in range(0, idx.size, 1024):
        p, v = gen.sparse_rows(clifford_ptms(n, idx[a:a + 1024])[:, 1:, 1:])
        pos.append(p)
        val.append(v)
    pos, val = np.concatenate(pos), np.concatenate(val)
    rows = np.repeat(np.arange(idx.size), pos.shape[1])
    return scipy.sparse.csr_matrix((val.ravel(), (rows, pos.ravel())), shape=(idx.size, dd))


def _sparse_condition(a: scipy.sparse.csr_matrix) -> tuple[float, float]:
    """(condition number, smallest eigenvalue of A^T A) by Lanczos on A^T A and on its inverse."""
    g = (a.T @ a).tocsc()
    lmax = scipy.sparse.linalg.eigsh(g, k=1, which="LA", return_eigenvectors=False)[0]
    lu = scipy.sparse.linalg.splu(g)
    op = scipy.sparse.linalg.LinearOperator(g.shape, matvec=lu.solve, dtype=float)
    inv_min = scipy.sparse.linalg.eigsh(op, k=1, which="LA", return_eigenvectors=False)[0]
    return float(np.sqrt(lmax * inv_min)), float(1.0 / inv_min)


def test_sparse_condition_matches_dense_svd_on_two_qubit_basis():
    p = default_probes(2)
    cond, _ = _sparse_condition(_sparse_rows(2, p.clifford_indices))
    assert cond == pytest.approx(_condition(p.ptms), rel=1e-8)


def test_shipped_three_qubit_table_is_a_full_rank_basis_with_its_stated_condition_number():
    from robusttomo._probe_tables3 import BASIS, CONDITION_NUMBER

    idx = np.array(BASIS, dtype=np.int64)
    assert idx.size == 63**2 == 3969 and np.unique(idx).size == idx.size
    assert idx[0] == 0 and idx.min() >= 0 and idx.max() < clifford_group_order(3)
    cond, lmin = _sparse_condition(_sparse_rows(3, idx))
    assert lmin > 1e-6  # full rank: the 3969 unital blocks are linearly independent
    assert cond == pytest.approx(CONDITION_NUMBER, rel=1e-7)
    assert cond < 1000.0
    probes = default_probes(3)
    assert probes.n_probes == 3969 and probes.labels[0] == "I" and probes.identity_index == 0
    assert probes.clifford_indices.tolist() == list(BASIS)
    assert probes.condition_number == CONDITION_NUMBER
    assert default_probes(3) is probes  # cached: no second build
    with pytest.raises(ValueError, match="'overcomplete' is not offered for 3 qubits"):
        default_probes(3, overcomplete=True)


def test_shipped_table_is_the_stated_selection_from_its_pattern_cover():
    """Stage 1's result covers every block position DEPTH times; BASIS is in pool order."""
    from robusttomo._probe_tables3 import BASIS, DEPTH, POOL

    pool = np.array(POOL, dtype=np.int64)
    assert pool[0] == 0 and np.unique(pool).size == pool.size and pool.max() < 1451520
    cover = (clifford_ptms(3, pool * 64)[:, 1:, 1:] != 0).sum(axis=0)
    assert cover.min() >= DEPTH
    idx = np.array(BASIS, dtype=np.int64)
    where = {int(s): i for i, s in enumerate(pool)}
    key = np.array([where[int(s)] * 64 + int(r) for s, r in zip(idx // 64, idx % 64)])
    assert np.all(np.diff(key) > 0)  # pool order: symplectic part in cover order, then Pauli part


def test_symplectic_permutations_give_the_ptm_patterns():
    """Pattern overlaps from the symplectic action equal those read off the PTMs (label-free)."""
    rng = np.random.default_rng(12)
    for n in (2, 3):
        n_sp = clifford_group_order(n) // 4**n
        assert n_sp == (720 if n == 2 else 1451520)  # |Sp(2n, 2)| (OEIS A003956 / 4**n)
        s = rng.integers(0, n_sp, size=12)
        perms = gen.symplectic_permutations(n, s)
        blocks = clifford_ptms(n, s * 4**n)[:, 1:, 1:] != 0
        for i in range(12):
            for j in range(12):
                assert np.sum(perms[i] == perms[j]) == np.sum(blocks[i] & blocks[j])


def test_pauli_variants_form_a_tight_frame_on_their_pattern():
    s = 777
    rows = _sparse_rows(3, s * 64 + np.arange(64)).toarray()
    frame = rows.T @ rows
    pattern = rows[0] != 0
    np.testing.assert_array_equal(frame, 64.0 * np.diag(pattern.astype(float)))


def _slow_cover(perms: np.ndarray, depth: int) -> list[int]:
    dim = perms.shape[1]
    cover = {}
    chosen = [0]
    for j in range(dim):
        cover[(j, int(perms[0, j]))] = 1
    while any(cover.get((j, t), 0) < depth for j in range(dim) for t in range(dim)):
        best, best_gain = -1, 0
        for s in range(perms.shape[0]):
            if s in chosen:
                continue
            gain = sum(1 for j in range(dim) if cover.get((j, int(perms[s, j])), 0) < depth)
            if gain > best_gain:
                best, best_gain = s, gain
        chosen.append(best)
        for j in range(dim):
            cover[(j, int(perms[best, j]))] = cover.get((j, int(perms[best, j])), 0) + 1
    return chosen


@pytest.mark.parametrize("depth", [1, 2])
def test_cover_matches_slow_reference_on_two_qubits(depth):
    perms = gen.symplectic_permutations(2, np.arange(720))
    assert gen.cover_symplectics(perms, depth) == _slow_cover(perms, depth)


def _slow_backward(dense: np.ndarray, count: int, protect: int, criterion: str) -> np.ndarray:
    alive = np.ones(dense.shape[0], dtype=bool)
    while alive.sum() > count:
        finv = np.linalg.inv(dense[alive].T @ dense[alive])
        lev = np.einsum("ij,jk,ik->i", dense, finv, dense)
        # removing row r: F^-1 -> F^-1 + F^-1 b b^T F^-1 / (1 - h_r) (Sherman-Morrison)
        ok = alive & (lev < 1.0 - 1e-9)
        raw = lev if criterion == "leverage" else np.sum((dense @ finv) ** 2, axis=1) / np.where(ok, 1.0 - lev, 1.0)
        score = np.where(ok, np.round(np.where(ok, raw, 0.0), 9), np.inf)
        score[protect] = np.inf
        alive[int(np.argmin(score))] = False
    return np.flatnonzero(alive)


@pytest.mark.parametrize("criterion", ["trace", "leverage"])
def test_backward_selection_matches_from_scratch_inverses_on_a_reduced_pool(criterion):
    """The generator's stage 2 on a two-qubit pool (depth-1 cover) against recomputed inverses."""
    perms = gen.symplectic_permutations(2, np.arange(720))
    sym = gen.cover_symplectics(perms, 1)
    pool = (np.array(sym)[:, None] * 16 + np.arange(16)).reshape(-1)
    pos, val = gen.sparse_rows(clifford_ptms(2, pool)[:, 1:, 1:])
    keep = gen.backward_selection(pos, val, 225, protect=0, criterion=criterion)
    dense = _sparse_rows(2, pool).toarray()
    np.testing.assert_array_equal(keep, _slow_backward(dense, 225, 0, criterion))
    assert keep[0] == 0 and keep.size == 225
    cond = gen.condition_number(pos[keep], val[keep])
    assert cond == pytest.approx(_condition(clifford_ptms(2, pool[keep])), rel=1e-10)
    assert cond < 100.0


def _plan3(rng, lengths, k):
    blocks, first = [], 0
    for m in lengths:
        blocks.append(SequenceBlock(SequenceKind.REFERENCE, m, rng.integers(0, clifford_group_order(3), size=(k, m)),
                                    first))
        first += k
    return Plan(n_qubits=3, shots=100, seed=0, blocks=tuple(blocks), interleave=None)


def _exact_counts3(plan, err, shots):
    """Slow reference: dense PTM propagation with the error after every Clifford, exact counts."""
    z = _z_matrix(3)
    rows = []
    for b in plan.blocks:
        steps = clifford_ptms(3, b.cliffords.reshape(-1)).reshape(*b.cliffords.shape, 64, 64)
        r = np.tile(z[0], (steps.shape[0], 1))
        for t in range(b.length):
            r = np.einsum("ij,kj->ki", err.ptm, np.einsum("kij,kj->ki", steps[:, t], r))
        rows.append(np.clip(r @ z.T / 8, 0, None) * shots)
    return Counts(n_qubits=3, plan_fingerprint=plan.fingerprint, sequence_ids=plan.sequence_ids,
                  counts=np.concatenate(rows), exact=True, source="test")


def test_three_qubit_values_equal_direct_propagation_for_every_probe():
    rng = np.random.default_rng(31)
    plan = _plan3(rng, [1, 2, 3], 6)
    err = embed(depolarizing(1, 0.97), [1], 3) @ random_channel(3, 0.05, rng)
    counts = _exact_counts3(plan, err, 100)
    probes = default_probes(3)
    corr = compute_correlations(plan, counts, probes=probes)
    z = _z_matrix(3)
    for m in (2, 3):
        block = plan.blocks[m - 1]
        st = corr.stats_for(m)
        steps = clifford_ptms(3, block.cliffords.reshape(-1)).reshape(6, m, 64, 64)
        r = _propagate(steps[:, :, :, :], probes.ptms[st.probes], None, z[0])
        w = counts.for_block(plan, block)
        w = w / w.sum(axis=1, keepdims=True)
        direct = kappa(8) * (np.einsum("xi,kqi,kx->kq", z, r, w) / 8 - 1 / 8)
        np.testing.assert_allclose(st.values, direct, atol=1e-11)
    # the length-2 statistic reproduces the exact decays for a spanning set (THEORY.md)
    assert corr.m2_u.shape == (6, 63)


@pytest.mark.slow
def test_three_qubit_decays_recover_exact_lambdas():
    """Exact counts, 3969 probes: lambda_A = tr(B_A^T B_L)/63 within the reported errors."""
    rng = np.random.default_rng(32)
    plan = _plan3(rng, [1, 2, 3, 4], 150)
    err = random_channel(3, 0.08, rng)
    counts = _exact_counts3(plan, err, 100)
    res = estimate_decays(plan, counts, bootstrap=0)
    probes = res.probes
    lam_true = np.einsum("pij,ij->p", probes.unital_blocks, err.unital_block) / 63.0
    z = (res.lambdas - lam_true) / res.lambda_stderr
    # 3969 probes: P(max |N(0,1)| > 5.5) <= 3969 * 2 * Phi(-5.5) ~ 1.5e-4
    assert np.max(np.abs(z)) < 5.5, np.max(np.abs(z))
    assert res.lambda_covariance.shape == (3969, 3969)
    assert res.identity_decay == pytest.approx(lam_true[0], abs=5 * res.identity_decay_stderr)
