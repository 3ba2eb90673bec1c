"""Probe correlations and decay fits against exact enumeration and the published decay law.

External references:
* The identity f_A(m) = c lambda_A**(m-1), lambda_A = tr(B_A^T B_L)/(d*d-1), with c shared by
  all probes: "A general framework for randomized benchmarking", PRX Quantum 3, 020357 (2022);
  "Robust extraction of tomographic information via randomized benchmarking", PRX 4, 011050 (2014).
* Closed form of c: ../shared/THEORY.md (checked there numerically for two qubits), re-derived
  here by exact enumeration for one qubit.
* F_avg = 1 - (d-1)(1-p)/d: "Scalable and robust randomized benchmarking of quantum processes",
  PRL 106, 180504 (2011).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from robusttomo import _pauli
from robusttomo.channels import Channel, amplitude_damping, depolarizing, embed, random_channel, rotation
from robusttomo.clifford import clifford_ptms, clifford_unitaries
from robusttomo.counts import Counts
from robusttomo.estimate import (
    BlockKind,
    _propagate,
    _z_matrix,
    compute_correlations,
    default_probes,
    kappa,
    probes_from_cliffords,
)
from robusttomo.fit import estimate_decays, fit_decays
from robusttomo.plan import Plan, SequenceBlock, SequenceKind


def _enumerated_plan(n: int, lengths: list[int]) -> Plan:
    blocks, first = [], 0
    for m in lengths:
        idx = np.array(list(itertools.product(range(24), repeat=m)), dtype=np.int64)
        blocks.append(SequenceBlock(SequenceKind.REFERENCE, m, idx, first))
        first += idx.shape[0]
    return Plan(n_qubits=n, shots=1, seed=0, blocks=tuple(blocks), interleave=None)


def _exact_probabilities(plan: Plan, err: Channel, prep: np.ndarray, confusion: np.ndarray, block) -> np.ndarray:
    """Slow, obviously-correct noisy simulation: rho -> L(C rho C^dagger) per Clifford, then readout."""
    us = clifford_unitaries(plan.n_qubits, block.cliffords.reshape(-1)).reshape(*block.cliffords.shape, *prep.shape)
    out = []
    for seq in us:
        rho = prep
        for u in seq:
            rho = err.apply(u @ rho @ u.conj().T)
        out.append(confusion @ np.real(np.diag(rho)))
    return np.array(out)


def _exact_counts(plan: Plan, err: Channel, prep: np.ndarray, confusion: np.ndarray) -> Counts:
    probs = np.concatenate([_exact_probabilities(plan, err, prep, confusion, b) for b in plan.blocks])
    return Counts(n_qubits=plan.n_qubits, plan_fingerprint=plan.fingerprint, sequence_ids=plan.sequence_ids,
                  counts=probs * 1000.0, exact=True, source="test")


def _c_closed_form(err: Channel, prep: np.ndarray, confusion: np.ndarray) -> float:
    # c = d/(d-1)^2 [sum_x tr(E_x L(|x><x|)) - 1] [<0|rho|0> - 1/d]  (THEORY.md)
    d = prep.shape[0]
    total = 0.0
    for x in range(d):
        proj = np.zeros((d, d))
        proj[x, x] = 1.0
        out = err.apply(proj)
        total += float(np.real(confusion[x] @ np.diag(out)))  # E_x = sum_y C[x, y] |y><y|
    return d / (d - 1) ** 2 * (total - 1.0) * (float(np.real(prep[0, 0])) - 1.0 / d)


def test_exact_enumeration_one_qubit_decay_law_and_spam_constant():
    rng = np.random.default_rng(11)
    err = random_channel(1, 0.25, rng) @ amplitude_damping(0.08)
    prep = np.array([[0.97, 0.02], [0.02, 0.03]], dtype=complex)
    confusion = np.array([[0.96, 0.07], [0.04, 0.93]])
    plan = _enumerated_plan(1, [1, 2, 3])
    counts = _exact_counts(plan, err, prep, confusion)
    probes = probes_from_cliffords(1, np.arange(24))
    # keep every probe at length 3 so the exact ratio is testable for all 24
    corr = compute_correlations(plan, counts, probes=probes)
    f = {s.length: dict(zip(s.probes.tolist(), s.values.mean(axis=0))) for s in corr.stats}
    c = f[1][0]
    assert c == pytest.approx(_c_closed_form(err, prep, confusion), abs=1e-12)
    lam_true = np.einsum("pij,ij->p", probes.unital_blocks, err.unital_block) / 3.0
    for a in range(24):
        assert f[2][a] / c == pytest.approx(lam_true[a], abs=1e-10)
        if a in f[3]:
            assert f[3][a] / f[2][a] == pytest.approx(lam_true[a], abs=1e-10)
    assert 0 in f[3]  # identity probe kept at every length
    # the control variate's group average mu is exact: over the whole group mean(G) == mu
    for s in corr.stats:
        np.testing.assert_allclose(s.ideal.mean(axis=0), s.mu, atol=1e-12)


def test_exact_enumeration_all_probes_at_length_three():
    """f_A(3)/f_A(2) = lambda_A for every one of the 24 probes (propagated directly)."""
    rng = np.random.default_rng(5)
    err = random_channel(1, 0.3, rng)
    prep = np.array([[0.95, 0.0], [0.0, 0.05]], dtype=complex)
    confusion = np.array([[0.97, 0.05], [0.03, 0.95]])
    plan = _enumerated_plan(1, [3])
    block = plan.blocks[0]
    probs = _exact_probabilities(plan, err, prep, confusion, block)
    steps = clifford_ptms(1, block.cliffords.reshape(-1)).reshape(block.cliffords.shape[0], 3, 4, 4)
    probes = probes_from_cliffords(1, np.arange(24))
    z = _z_matrix(1)
    r = _propagate(steps, probes.ptms, None, z[0])
    q = np.einsum("xi,kqi->kqx", z, r) / 2
    f3 = kappa(2) * (np.einsum("kqx,kx->q", q, probs) / q.shape[0] - 0.5)
    plan2 = _enumerated_plan(1, [1, 2])
    corr = compute_correlations(plan2, _exact_counts(plan2, err, prep, confusion), probes=probes)
    f2 = corr.stats_for(2).values.mean(axis=0)
    lam_true = np.einsum("pij,ij->p", probes.unital_blocks, err.unital_block) / 3.0
    np.testing.assert_allclose(f3 / f2, lam_true, atol=1e-10)


def test_length_two_statistic_equals_direct_per_probe_computation():
    """At m = 2 every probe value read off M equals the direct propagation (THEORY.md, "What follows")."""
    rng = np.random.default_rng(3)
    n = 2
    idx = rng.integers(0, 11520, size=(150, 2))
    plan = Plan(n_qubits=n, shots=50, seed=0, blocks=(
        SequenceBlock(SequenceKind.REFERENCE, 1, rng.integers(0, 11520, size=(10, 1)), 0),
        SequenceBlock(SequenceKind.REFERENCE, 2, idx, 10)), interleave=None)
    cnt = rng.integers(0, 20, size=(160, 4)).astype(float)
    cnt[:, 0] += 1
    counts = Counts(n_qubits=n, plan_fingerprint=plan.fingerprint, sequence_ids=plan.sequence_ids,
                    counts=cnt, exact=False, source="test")
    probes = default_probes(2)
    corr = compute_correlations(plan, counts, probes=probes)
    via_m = corr.stats_for(2).values
    steps = clifford_ptms(n, idx.reshape(-1)).reshape(150, 2, 16, 16)
    z = _z_matrix(n)
    r = _propagate(steps, probes.ptms, None, z[0])
    q = np.einsum("xi,kqi->kqx", z, r) / 4
    w = cnt[10:] / cnt[10:].sum(axis=1, keepdims=True)
    direct = kappa(4) * (np.einsum("kqx,kx->kq", q, w) - 0.25)
    np.testing.assert_allclose(via_m, direct, atol=1e-12)


def test_default_probe_basis_is_full_deterministic_identity_first():
    for n, size in [(1, 9), (2, 225)]:
        p = default_probes(n)
        assert p.n_probes == size
        assert p.identity_index == 0 and p.labels[0] == "I"
        assert np.isfinite(p.condition_number)
        assert p.labels == default_probes(n).labels
    assert default_probes(1, overcomplete=True).n_probes == 24
    assert default_probes(2, overcomplete=True).n_probes == 450


def test_shipped_probe_tables_equal_a_fresh_scan():
    from robusttomo._probe_tables import BASES, SECOND_BASES
    from robusttomo.estimate import _default_indices

    for n, idx in BASES.items():
        assert tuple(idx) == _default_indices.__wrapped__(n, False), n
    for n, idx in SECOND_BASES.items():
        assert tuple(BASES[n]) + tuple(idx) == _default_indices.__wrapped__(n, True), n
    assert default_probes(1, overcomplete=True).clifford_indices.tolist() == list(range(24))


def _simulate_plan(plan, err, prep, confusion, rng, shots):
    """Independent finite-shot reference simulator (PTM propagation + multinomial)."""
    n = plan.n_qubits
    d = 2**n
    z = _z_matrix(n)
    rows = []
    r0 = _pauli.pauli_vector(prep)
    for b in plan.blocks:
        steps = clifford_ptms(n, b.cliffords.reshape(-1)).reshape(*b.cliffords.shape, d * d, d * d)
        r = np.broadcast_to(r0, (steps.shape[0], d * d)).copy()
        for t in range(b.length):
            r = np.einsum("ij,kj->ki", err.ptm, np.einsum("kij,kj->ki", steps[:, t], r))
        p = np.clip(np.einsum("xi,ki->kx", z, r) / d, 0, None) @ confusion.T
        p /= p.sum(axis=1, keepdims=True)
        rows.append(rng.multinomial(shots, p).astype(float))
    return Counts(n_qubits=n, plan_fingerprint=plan.fingerprint, sequence_ids=plan.sequence_ids,
                  counts=np.concatenate(rows), exact=False, source="test")


def _random_plan(n, lengths, k, rng):
    blocks, first = [], 0
    order = 24 if n == 1 else 11520
    for m in lengths:
        blocks.append(SequenceBlock(SequenceKind.REFERENCE, m, rng.integers(0, order, size=(k, m)), first))
        first += k
    return Plan(n_qubits=n, shots=100, seed=0, blocks=tuple(blocks), interleave=None)


def _product_confusion(pairs):
    c = np.ones((1, 1))
    for p10, p01 in pairs:
        c = np.kron(c, np.array([[1 - p10, p01], [p10, 1 - p01]]))
    return c


@pytest.mark.slow
def test_two_qubit_statistical_recovery_and_spam_invariance():
    """Every lambda within 4 standard errors; SPAM changes c but not the lambdas."""
    rng = np.random.default_rng(2024)
    err = (rotation("ZZ", 0.06) @ embed(amplitude_damping(0.02), [1], 2) @ depolarizing(2, 0.985))
    probes = default_probes(2)
    lam_true = np.einsum("pij,ij->p", probes.unital_blocks, err.unital_block) / 15.0
    plan = _random_plan(2, [1, 2, 3, 5, 8], 600, rng)
    results = []
    for flip, ro in [(0.0, 0.03), (0.02, 0.06)]:
        prep = np.diag([(1 - flip) ** 2, flip * (1 - flip), flip * (1 - flip), flip**2]).astype(complex)
        counts = _simulate_plan(plan, err, prep, _product_confusion([(ro, ro)] * 2), rng, 100)
        res = estimate_decays(plan, counts, probes=probes, bootstrap=0)
        z = (res.lambdas - lam_true) / res.lambda_stderr
        assert np.max(np.abs(z)) < 4.0, np.max(np.abs(z))  # 225 probes: P(max > 4) ~ 1.4% by chance
        assert res.average_gate_fidelity == pytest.approx(
            1 - 3 * (1 - (np.trace(err.ptm) - 1) / 15) / 4, abs=4 * res.average_gate_fidelity_stderr)
        results.append(res)
    a, b = results
    assert abs(a.spam_constant - b.spam_constant) > 10 * (a.spam_constant_stderr + b.spam_constant_stderr)
    diff = (a.lambdas - b.lambdas) / np.sqrt(a.lambda_stderr**2 + b.lambda_stderr**2)
    assert np.max(np.abs(diff)) < 4.0


@pytest.mark.slow
def test_standard_errors_match_spread_over_repeats_and_control_variate_unbiased():
    """One qubit: stderr within 30% of the spread over repeats; CV unbiased and >= 50-fold reduction."""
    rng = np.random.default_rng(77)
    err = random_channel(1, 0.15, rng)
    probes = default_probes(1)
    lam_true = np.einsum("pij,ij->p", probes.unital_blocks, err.unital_block) / 3.0
    prep = np.diag([0.99, 0.01]).astype(complex)
    conf = _product_confusion([(0.03, 0.05)])
    est, se, vr, raw = [], [], [], []
    for _ in range(60):
        plan = _random_plan(1, [1, 2, 4, 8], 80, rng)
        counts = _simulate_plan(plan, err, prep, conf, rng, 100)
        res = estimate_decays(plan, counts, probes=probes, bootstrap=0)
        est.append(res.lambdas)
        se.append(res.lambda_stderr)
        vr.append(res.variance_reduction[0, 1])
        raw.append(estimate_decays(plan, counts, probes=probes, bootstrap=0, control_variate=False).lambdas)
    est, se = np.array(est), np.array(se)
    spread = est.std(axis=0, ddof=1)
    ratio = se.mean(axis=0) / spread
    assert np.all((ratio > 0.7) & (ratio < 1.3)), ratio
    # unbiased: mean over repeats agrees with the exact value within its error
    zbias = (est.mean(axis=0) - lam_true) / (spread / np.sqrt(len(est)))
    assert np.max(np.abs(zbias)) < 4.0
    assert np.median(vr) >= 50.0  # identity probe, m = 2, 100 shots per sequence
    assert np.mean(raw, axis=0) == pytest.approx(lam_true, abs=0.05)


def test_control_variate_degenerate_fallback():
    """When every G_s is equal the least-squares beta is undefined: beta falls back to 1."""
    from robusttomo.fit import _cv_means

    vals = np.array([[1.0], [2.0], [3.0]])
    ideal = np.full((3, 1), 0.5)
    mean, corrected, beta = _cv_means(vals, ideal, np.array([0.5]), True)
    assert beta[0] == 1.0 and mean[0] == pytest.approx(2.0)


def test_bootstrap_replicates_and_observations_contract():
    rng = np.random.default_rng(8)
    err = depolarizing(1, 0.97)
    plan = _random_plan(1, [1, 2, 4], 40, rng)
    counts = _simulate_plan(plan, err, np.diag([1.0, 0.0]).astype(complex), np.eye(2), rng, 200)
    res = estimate_decays(plan, counts, bootstrap=30, seed=3)
    assert res.bootstrap_lambdas.shape == (30, 9)
    again = estimate_decays(plan, counts, bootstrap=30, seed=3)
    np.testing.assert_array_equal(res.bootstrap_lambdas, again.bootstrap_lambdas)
    obs = res.observations()
    assert obs.design.shape == (9, 9) and obs.replicates.shape == (30, 9)
    # the design reproduces the true lambdas from the true unital block
    np.testing.assert_allclose(obs.design @ err.unital_block.reshape(-1),
                               np.einsum("pij,ij->p", res.probes.unital_blocks, err.unital_block) / 3)
    assert res.identity_decay == pytest.approx(0.97, abs=5 * res.identity_decay_stderr + 1e-3)


@pytest.mark.parametrize("kwargs, match", [
    ({"bootstrap": -1}, "'bootstrap' must be a non-negative integer"),
    ({"batches": 0}, "'batches' must be a positive integer"),
    ({"jobs": 0}, "'jobs' must be a positive integer"),
])
def test_fit_validation(kwargs, match):
    rng = np.random.default_rng(1)
    plan = _random_plan(1, [1, 2], 25, rng)
    counts = _simulate_plan(plan, depolarizing(1, 0.99), np.diag([1.0, 0.0]).astype(complex), np.eye(2), rng, 50)
    corr = compute_correlations(plan, counts)
    with pytest.raises(ValueError, match=match):
        fit_decays(corr, **kwargs)


def test_interleaved_probes_measure_composite():
    """Interleaved blocks with probes B o G: exact enumeration gives lambda of L_int (1 qubit, G = H)."""
    from robusttomo.plan import InterleavedGate

    rng = np.random.default_rng(4)
    err = random_channel(1, 0.2, rng)
    err_g = random_channel(1, 0.2, rng)
    h = np.array([[1, 1], [1, -1]]) / np.sqrt(2)
    blocks, first = [], 0
    for m in (1, 2):
        idx = np.array(list(itertools.product(range(24), repeat=m)), dtype=np.int64)
        blocks.append(SequenceBlock(SequenceKind.INTERLEAVED, m, idx, first))
        first += idx.shape[0]
    plan = Plan(n_qubits=1, shots=1, seed=0, blocks=tuple(blocks), interleave=InterleavedGate("h", h))
    gch = Channel.from_unitary(h)
    probs = []
    for b in plan.blocks:
        us = clifford_unitaries(1, b.cliffords.reshape(-1)).reshape(*b.cliffords.shape, 2, 2)
        for seq in us:
            rho = np.diag([1.0, 0.0]).astype(complex)
            for u in seq:
                rho = err_g.apply(gch.apply(err.apply(u @ rho @ u.conj().T)))
            probs.append(np.real(np.diag(rho)))
    counts = Counts(n_qubits=1, plan_fingerprint=plan.fingerprint, sequence_ids=plan.sequence_ids,
                    counts=np.array(probs) * 100, exact=True, source="test")
    probes = default_probes(1)
    corr = compute_correlations(plan, counts, probes=probes, kind=BlockKind.INTERLEAVED)
    l_int = err_g @ gch @ err @ gch.adjoint()
    lam_true = np.einsum("pij,ij->p", probes.unital_blocks, l_int.unital_block) / 3.0
    f1 = corr.stats_for(1).values.mean()
    f2 = corr.stats_for(2).values.mean(axis=0)
    np.testing.assert_allclose(f2 / f1, lam_true, atol=1e-10)
    assert f1 > 0.5  # the final ideal G keeps c healthy


@pytest.mark.slow
def test_two_qubit_standard_errors_match_spread_over_repeats():
    """Two qubits: reported standard errors within 30% of the spread over 30 repeats (common practice)."""
    rng = np.random.default_rng(99)
    err = rotation("ZZ", 0.06) @ depolarizing(2, 0.985)
    probes = default_probes(2)
    prep = np.diag([0.98, 0.01, 0.01, 0.0]).astype(complex)
    conf = _product_confusion([(0.03, 0.03)] * 2)
    est, se = [], []
    for _ in range(30):
        plan = _random_plan(2, [1, 2, 4, 8], 250, rng)
        counts = _simulate_plan(plan, err, prep, conf, rng, 100)
        res = estimate_decays(plan, counts, probes=probes, bootstrap=0)
        est.append(res.lambdas)
        se.append(res.lambda_stderr)
    ratio = np.mean(se, axis=0) / np.std(est, axis=0, ddof=1)
    # with 30 repeats the spread itself is uncertain by ~13%: judge the typical probe and the bulk
    assert 0.85 < np.median(ratio) < 1.15, np.median(ratio)
    assert np.mean(np.abs(ratio - 1) < 0.3) >= 0.9, np.sort(ratio)[[0, -1]]
    assert 0.7 < ratio[0] < 1.3  # the identity probe
