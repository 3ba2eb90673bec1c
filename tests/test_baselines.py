"""Tests of the baseline methods in benchmarks/baselines.py (conventional tomography, standard RB)."""

from __future__ import annotations

import doctest
import itertools
import sys
from pathlib import Path

import cvxpy as cp
import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import baselines as bl  # noqa: E402

from robusttomo import clifford  # noqa: E402
from robusttomo.channels import (  # noqa: E402
    Channel,
    amplitude_damping,
    depolarizing,
    embed,
    random_channel,
    rotation,
)


def _avg_infidelity(ch: Channel) -> float:
    # F_e = tr(R)/d^2, F_avg = (d F_e + 1)/(d + 1): "General teleportation channel, singlet
    # fraction, and quasidistillation", PRA 60, 1888 (1999); Phys. Lett. A 303, 249 (2002).
    d = ch.dim
    fe = np.trace(ch.ptm) / d**2
    return 1.0 - (d * fe + 1) / (d + 1)


def _rb_decay(ch: Channel) -> float:
    # p = (tr R_L - 1)/(d^2 - 1): "Scalable and robust randomized benchmarking of quantum
    # processes", PRL 106, 180504 (2011) (depolarizing parameter of the twirled error).
    d = ch.dim
    return (np.trace(ch.ptm) - 1) / (d * d - 1)


def test_docstring_examples_run():
    res = doctest.testmod(bl, optionflags=doctest.ELLIPSIS)
    assert res.attempted >= 2 and res.failed == 0


# ---- SPAM model ------------------------------------------------------------------------------
def test_symmetric_spam_matches_explicit_one_qubit_model():
    sp = bl.SpamModel.symmetric(2, prep_error=0.1, readout_error=0.02)
    one_c = np.array([[0.98, 0.02], [0.02, 0.98]])
    # qubit 0 is the most significant bit, so the two-qubit matrix is kron(q0, q1) (common practice)
    assert np.allclose(sp.confusion, np.kron(one_c, one_c))
    assert np.allclose(np.diag(sp.prep_state).real, [0.81, 0.09, 0.09, 0.01])
    assert not sp.confusion.flags.writeable and not sp.prep_state.flags.writeable


def test_spam_model_from_package_device():
    from robusttomo.simulate import Device

    dev = Device.build(1, error=depolarizing(1, 0.99), readout=[(0.02, 0.05)])
    sp = bl.SpamModel.from_device(dev)
    assert np.array_equal(sp.confusion, dev.readout) and np.array_equal(sp.prep_state, dev.prep)
    with pytest.raises(TypeError, match="'device' must have 'prep' and 'readout' arrays; got int"):
        bl.SpamModel.from_device(3)


@pytest.mark.parametrize(
    ("kwargs", "exc", "match"),
    [
        ({"prep_state": np.eye(3) / 3, "confusion": np.eye(3)}, ValueError, "'prep_state' must be a d x d"),
        ({"prep_state": np.eye(2), "confusion": np.eye(2)}, ValueError, "'prep_state' must have trace 1"),
        ({"prep_state": np.diag([1.2, -0.2]), "confusion": np.eye(2)}, ValueError, "positive semidefinite"),
        ({"prep_state": np.array([[1, 1], [0, 0]]), "confusion": np.eye(2)}, ValueError, "Hermitian"),
        ({"prep_state": np.diag([1.0, 0]), "confusion": np.eye(4)}, ValueError, r"'confusion' must have shape \(2, 2\)"),
        ({"prep_state": np.diag([1.0, 0]), "confusion": [[0.9, 0.2], [0.2, 0.8]]}, ValueError, "columns must sum to 1"),
        ({"prep_state": np.diag([1.0, 0]), "confusion": [[1.1, 0], [-0.1, 1]]}, ValueError, r"probabilities in \[0, 1\]"),
    ],
)
def test_spam_model_rejects_bad_input(kwargs, exc, match):
    with pytest.raises(exc, match=match):
        bl.SpamModel(**kwargs)


def test_symmetric_spam_rejects_bad_probability():
    with pytest.raises(ValueError, match=r"'readout_error' must be a probability in \[0, 1\]; got 1.5"):
        bl.SpamModel.symmetric(1, readout_error=1.5)
    with pytest.raises(TypeError, match="'prep_error' must be a float"):
        bl.SpamModel.symmetric(1, prep_error="0.1")


# ---- tomography: simulation against a slow reference ------------------------------------------
_KET = {
    "Z+": np.array([1, 0]),
    "Z-": np.array([0, 1]),
    "X+": np.array([1, 1]) / np.sqrt(2),
    "X-": np.array([1, -1]) / np.sqrt(2),
    "Y+": np.array([1, 1j]) / np.sqrt(2),
    "Y-": np.array([1, -1j]) / np.sqrt(2),
}
_OPPOSITE = {"Z+": "Z-", "Z-": "Z+", "X+": "X-", "X-": "X+", "Y+": "Y-", "Y-": "Y+"}
_EIGEN = {"X": ("X+", "X-"), "Y": ("Y+", "Y-"), "Z": ("Z+", "Z-")}


def _slow_tomography_probs(ch: Channel, prep_error: float, readout_error: float, states: str) -> np.ndarray:
    """Obviously-correct loop: density matrices and projectors written out one by one."""
    n = ch.n_qubits
    labels = ("Z+", "Z-", "X+", "X-", "Y+", "Y-") if states == "six" else ("Z+", "Z-", "X+", "Y+")
    kraus = ch.kraus()
    c1 = np.array([[1 - readout_error, readout_error], [readout_error, 1 - readout_error]])
    preps = list(itertools.product(labels, repeat=n))
    bases = list(itertools.product("XYZ", repeat=n))
    out = np.zeros((len(preps), len(bases), 2**n))
    for a, prep in enumerate(preps):
        rho = np.ones((1, 1), dtype=complex)
        for lab in prep:
            # an ideal unitary applied to (1-e)|0><0| + e|1><1| mixes in the opposite eigenstate
            good, bad = _KET[lab], _KET[_OPPOSITE[lab]]
            one = (1 - prep_error) * np.outer(good, good.conj()) + prep_error * np.outer(bad, bad.conj())
            rho = np.kron(rho, one)
        sigma = sum(k @ rho @ k.conj().T for k in kraus)
        for b, basis in enumerate(bases):
            for y in range(2**n):
                bits = [(y >> (n - 1 - q)) & 1 for q in range(n)]  # qubit 0 = most significant bit
                total = 0.0
                for x in range(2**n):
                    xbits = [(x >> (n - 1 - q)) & 1 for q in range(n)]
                    proj = np.ones((1, 1), dtype=complex)
                    weight = 1.0
                    for q in range(n):
                        v = _KET[_EIGEN[basis[q]][xbits[q]]]
                        proj = np.kron(proj, np.outer(v, v.conj()))
                        weight *= c1[bits[q], xbits[q]]
                    total += weight * np.trace(proj @ sigma).real
                out[a, b, y] = total
    return out


@pytest.mark.parametrize(("n", "states"), [(1, "six"), (1, "four"), (2, "six"), (2, "four")])
def test_tomography_probabilities_match_slow_reference(n, states):
    rng = np.random.default_rng(10 + n)
    ch = random_channel(n, 0.4, rng)
    sp = bl.SpamModel.symmetric(n, prep_error=0.07, readout_error=0.05)
    data = bl.simulate_tomography(ch, spam=sp, states=states)
    assert np.allclose(data.frequencies, _slow_tomography_probs(ch, 0.07, 0.05, states), atol=1e-12)
    assert data.total_shots is None


def test_tomography_shots_are_multinomial_frequencies():
    rng = np.random.default_rng(3)
    ch = amplitude_damping(0.2)
    budget = bl.tomography_budget(1, 18 * 4000 + 7)
    assert (budget.n_settings, budget.shots_per_setting, budget.total_shots) == (18, 4000, 72000)
    data = bl.simulate_tomography(ch, total_shots=18 * 4000 + 7, rng=rng)
    exact = bl.simulate_tomography(ch).frequencies
    counts = data.frequencies * 4000
    assert np.allclose(counts, np.round(counts)) and np.allclose(data.frequencies.sum(-1), 1)
    assert data.total_shots == 72000
    # multinomial standard error sqrt(p(1-p)/N) <= 0.0079; 5 sigma (common practice)
    assert np.max(np.abs(data.frequencies - exact)) < 5 * 0.5 / np.sqrt(4000)


# ---- tomography: estimates ----------------------------------------------------------------------
@pytest.mark.parametrize(("n", "states"), [(1, "six"), (1, "four"), (2, "six"), (2, "four"), (3, "four")])
def test_tomography_exact_with_perfect_spam(n, states):
    # Linear inversion is exact on exact ideal-device data for an informationally complete set
    # of inputs and measurements (common practice).
    rng = np.random.default_rng(20 + n)
    ch = random_channel(n, 0.3, rng)
    est = bl.process_tomography(ch, states=states)
    assert np.max(np.abs(est.ptm - ch.ptm)) < 1e-8
    assert np.max(np.abs(bl.linear_inversion(bl.simulate_tomography(ch, states=states)).ptm - ch.ptm)) < 1e-12


@pytest.mark.parametrize("n", [1, 2])
def test_tomography_readout_error_biases_estimate(n):
    # Conventional tomography assumes ideal SPAM, so readout error biases it even with exact
    # probabilities (common practice).  A symmetric bit flip e on each readout multiplies a
    # measured Pauli expectation of weight w by (1 - 2e)^w (common practice), so the linear
    # inversion returns D R with D = diag((1 - 2e)^wt(i)); that map is itself CPTP and
    # survives the projection, and its infidelity bias is first order in e.
    rng = np.random.default_rng(30 + n)
    ch = random_channel(n, 0.1, rng)
    truth = _avg_infidelity(ch)
    weights = np.array([sum(c != "I" for c in lab) for lab in itertools.product("IXYZ", repeat=n)])
    bias = {}
    for e in (0.0, 0.01, 0.03):
        est = bl.process_tomography(ch, spam=bl.SpamModel.symmetric(n, readout_error=e))
        assert est.is_cptp(atol=1e-8)
        assert np.allclose(est.ptm, np.diag((1 - 2 * e) ** weights) @ ch.ptm, atol=1e-8)
        bias[e] = _avg_infidelity(est) - truth
    assert abs(bias[0.0]) < 1e-8
    # near the identity the bias is about e * 2 n 3 4^(n-1) / (d (d + 1)): e for one qubit, 2.4 e for two
    first_order = {1: 1.0, 2: 2.4}[n]
    for e in (0.01, 0.03):
        assert 0.8 * first_order * e < bias[e] < 1.05 * first_order * e


def test_tomography_error_shrinks_with_shots_without_spam():
    # Shot-noise error of a linear estimator falls as 1/sqrt(N) (common practice): 100x the
    # shots, ~10x smaller error; averaged over repeats so a single draw cannot decide.
    ch = random_channel(2, 0.2, np.random.default_rng(4))
    rng = np.random.default_rng(5)
    err = {}
    for total in (10**5, 10**7):
        errs = [np.linalg.norm(bl.process_tomography(ch, total_shots=total, rng=rng).ptm - ch.ptm) for _ in range(6)]
        err[total] = np.mean(errs)
    assert 4 < err[10**5] / err[10**7] < 25


# ---- CPTP projection -----------------------------------------------------------------------------
@pytest.mark.parametrize(
    "ch",
    [
        random_channel(1, 0.5, np.random.default_rng(0)),
        random_channel(2, 0.3, np.random.default_rng(1)),
        amplitude_damping(0.3),
        embed(rotation("X", 0.4), [1], 2),
        depolarizing(2, -1 / 15),
    ],
    ids=["random1", "random2", "ampdamp", "unitary", "depol_edge"],
)
def test_projection_leaves_cptp_input_unchanged(ch):
    # The projection onto a convex set is the identity on that set (common practice).
    assert ch.is_cptp(atol=1e-10)
    assert np.max(np.abs(bl.project_cptp(ch).ptm - ch.ptm)) < 1e-10


def _noisy_estimate(n: int, seed: int) -> Channel:
    rng = np.random.default_rng(seed)
    ch = embed(rotation("Y", 0.1), [0], n) @ random_channel(n, 0.05, rng)
    return bl.linear_inversion(bl.simulate_tomography(ch, total_shots=500 * 9**n, rng=rng))


@pytest.mark.parametrize("n", [1, 2])
def test_projection_returns_cptp_and_matches_reference_solver(n):
    li = _noisy_estimate(n, 40 + n)
    assert np.linalg.eigvalsh(li.choi).min() < -1e-3  # the unconstrained estimate is not CP
    proj = bl.project_cptp(li)
    assert proj.is_cptp(atol=1e-10)
    # Reference: the same problem, min ||J - J0||_F s.t. J >= 0, tr_out J = I/d, solved as a
    # semidefinite program by cvxpy (general-purpose convex solver).
    d = 2**n
    j = cp.Variable((d * d, d * d), hermitian=True)
    prob = cp.Problem(
        cp.Minimize(cp.sum_squares(j - li.choi)),
        [j >> 0, cp.partial_trace(j, [d, d], axis=1) == np.eye(d) / d],
    )
    prob.solve(solver=cp.CLARABEL)
    assert prob.status == cp.OPTIMAL
    assert np.max(np.abs(j.value - proj.choi)) < 1e-5
    assert np.linalg.norm(proj.choi - li.choi) ** 2 <= prob.value + 1e-8


@pytest.mark.parametrize("n", [1, 2])
def test_projection_satisfies_optimality_condition(n):
    # J* is the Frobenius projection of J0 onto a convex set K iff Re<J0 - J*, K - J*> <= 0 for
    # every K in K (projection theorem, common practice); test it on random CPTP channels.
    li = _noisy_estimate(n, 50 + n)
    proj = bl.project_cptp(li)
    rng = np.random.default_rng(60 + n)
    others = [random_channel(n, s, rng) for s in (0.05, 0.2, 0.5, 1.0, 2.0)] + [proj @ random_channel(n, 0.1, rng)]
    for k in others:
        assert np.vdot(li.choi - proj.choi, k.choi - proj.choi).real <= 1e-9


def test_projection_warns_when_capped():
    li = _noisy_estimate(2, 70)
    with pytest.warns(RuntimeWarning, match="stopping rule not met after max_iter=2"):
        out = bl.project_cptp(li, max_iter=2)
    assert out.is_cptp(atol=1e-10)  # the fix-up keeps the output CPTP even when stopped early


# ---- tomography input validation --------------------------------------------------------------
def test_tomography_rejects_bad_input():
    ch = amplitude_damping(0.1)
    with pytest.raises(ValueError, match=r"'total_shots' must be at least the number of settings \(18\).*got 10"):
        bl.process_tomography(ch, total_shots=10, rng=np.random.default_rng(0))
    with pytest.raises(ValueError, match="'rng' is required when 'total_shots' is given"):
        bl.process_tomography(ch, total_shots=1000)
    with pytest.raises(ValueError, match="'states' must be PrepSet.SIX.*got 'eight'"):
        bl.process_tomography(ch, states="eight")
    with pytest.raises(TypeError, match="'channel' must be a robusttomo.Channel; got ndarray"):
        bl.process_tomography(np.eye(4))
    with pytest.raises(ValueError, match="'spam' is a 2-qubit model but the channel acts on 1"):
        bl.process_tomography(ch, spam=bl.SpamModel.ideal(2))
    with pytest.raises(ValueError, match="'channel' must be CPTP"):
        bl.simulate_tomography(Channel.from_ptm(np.diag([1.0, 1.2, 1.0, 1.0])))
    with pytest.raises(TypeError, match="'total_shots' must be an integer >= 1; got 1000.0"):
        bl.tomography_budget(1, 1000.0)
    with pytest.raises(ValueError, match="'tol' must be a positive number; got 0"):
        bl.project_cptp(ch, tol=0)


# ---- randomized benchmarking -----------------------------------------------------------------
def _slow_survival(ch: Channel, seq: np.ndarray, sp: bl.SpamModel) -> float:
    """Obviously-correct reference: density matrices, Kraus operators, Clifford objects."""
    n = ch.n_qubits
    kraus = ch.kraus()
    rho = np.array(sp.prep_state)
    net = clifford.Clifford.identity(n)
    gates = [clifford.Clifford.from_index(n, int(i)) for i in seq]
    for g in gates:
        net = g @ net
    for g in [*gates, net.inverse()]:
        u = g.unitary()
        rho = u @ rho @ u.conj().T
        rho = sum(k @ rho @ k.conj().T for k in kraus)
    return float(sum(sp.confusion[0, x] * rho[x, x].real for x in range(2**n)))


@pytest.mark.parametrize("n", [1, 2])
def test_sequence_survival_matches_slow_reference(n):
    rng = np.random.default_rng(80 + n)
    ch = random_channel(n, 0.3, rng)
    sp = bl.SpamModel.symmetric(n, prep_error=0.04, readout_error=0.06)
    idx = clifford.random_clifford_indices(n, 6 * 5, rng).reshape(6, 5)
    fast = bl.sequence_survival(ch, idx, spam=sp)
    slow = [_slow_survival(ch, row, sp) for row in idx]
    assert np.allclose(fast, slow, atol=1e-12)


@pytest.mark.parametrize("n", [1, 2])
def test_rb_ideal_device_survives(n):
    # With no error at all the inversion gate undoes the sequence: survival 1 (common practice).
    rng = np.random.default_rng(90)
    idx = clifford.random_clifford_indices(n, 8 * 7, rng).reshape(8, 7)
    assert np.allclose(bl.sequence_survival(depolarizing(n, 1.0), idx), 1.0, atol=1e-12)


@pytest.mark.parametrize("n", [1, 2])
def test_rb_depolarizing_exact_probabilities_returns_p(n):
    # Depolarizing noise commutes with every Clifford, so each sequence's survival is exactly
    # A p^m + B (PRL 106, 180504 (2011)); SPAM only changes A and B.
    p = 0.97
    sp = bl.SpamModel.symmetric(n, prep_error=0.02, readout_error=0.03)
    res = bl.randomized_benchmarking(
        depolarizing(n, p), lengths=[1, 3, 10, 30, 60], n_sequences=4, rng=np.random.default_rng(n), spam=sp
    )
    d = 2**n
    assert abs(res.decay.p - p) < 1e-8
    assert abs(res.average_error - (d - 1) * (1 - p) / d) < 1e-8
    assert res.error_interval[1] - res.error_interval[0] < 1e-8  # no sequence-to-sequence spread
    assert res.total_shots is None and res.n_failed_replicates == 0


@pytest.mark.parametrize(
    "spam",
    [bl.SpamModel.ideal(1), bl.SpamModel.symmetric(1, prep_error=0.05, readout_error=0.04)],
    ids=["ideal", "faulty"],
)
def test_rb_exact_group_average_gives_ptm_formula(spam):
    # Averaging over ALL 24^m one-qubit Clifford sequences is the exact twirl, so the mean
    # survival is exactly A p^m + B with p = (tr R_L - 1)/(d^2 - 1) for any gate-independent
    # error and any SPAM (PRL 106, 180504 (2011)); four lengths over-determine the 3-parameter fit.
    ch = random_channel(1, 0.3, np.random.default_rng(5))
    lengths = [1, 2, 3, 4]
    means = [bl.sequence_survival(ch, np.array(list(itertools.product(range(24), repeat=m))), spam=spam).mean()
             for m in lengths]
    fit = bl.fit_decay(lengths, means, n_qubits=1)
    assert abs(fit.p - _rb_decay(ch)) < 1e-8
    assert abs(fit.average_error - (1 - _rb_decay(ch)) / 2) < 1e-8


def test_rb_random_channel_sampled_sequences_two_qubits():
    # Sampled sequences, exact probabilities: the estimate scatters around the PTM formula
    # p = (tr R_L - 1)/(d^2 - 1) (PRL 106, 180504 (2011)) by the sequence-to-sequence spread,
    # whatever the SPAM; the bootstrap interval should cover it (fixed seed).
    ch = random_channel(2, 0.1, np.random.default_rng(6))
    truth = _rb_decay(ch)
    r_true = 3 * (1 - truth) / 4
    for sp in (bl.SpamModel.ideal(2), bl.SpamModel.symmetric(2, prep_error=0.03, readout_error=0.03)):
        res = bl.randomized_benchmarking(
            ch, lengths=[1, 2, 4, 8, 16, 32, 64], n_sequences=60, rng=np.random.default_rng(7), spam=sp
        )
        assert abs(res.decay.p - truth) < 2e-3
        assert res.error_interval[0] <= r_true <= res.error_interval[1]
        assert 0 < res.error_interval[1] - res.error_interval[0] < r_true


def test_rb_shot_budget_and_interval():
    ch = random_channel(1, 0.15, np.random.default_rng(8))
    res = bl.randomized_benchmarking(
        ch,
        lengths=[1, 4, 16, 64],
        n_sequences=25,
        rng=np.random.default_rng(9),
        spam=bl.SpamModel.symmetric(1, readout_error=0.03),
        total_shots=100_099,
    )
    assert res.shots_per_sequence == 1000 and res.total_shots == 100_000
    counts = res.survival * 1000
    assert np.allclose(counts, np.round(counts))
    lo, hi = res.error_interval
    assert lo < res.average_error < hi
    assert np.allclose(res.fidelity_interval, [1 - hi, 1 - lo]) and res.fidelity == 1 - res.average_error
    r_true = (1 - _rb_decay(ch)) / 2
    assert lo <= r_true <= hi  # 95% interval, fixed seed


def test_rb_rejects_bad_input():
    ch = depolarizing(1, 0.99)
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match=r"'lengths' must be positive integers; got \[0, 2, 4\]"):
        bl.randomized_benchmarking(ch, lengths=[0, 2, 4], n_sequences=5, rng=rng)
    with pytest.raises(ValueError, match="at least 3 distinct values"):
        bl.randomized_benchmarking(ch, lengths=[2, 2, 4], n_sequences=5, rng=rng)
    with pytest.raises(ValueError, match=r"'n_sequences' must be an integer >= 2; got 1"):
        bl.randomized_benchmarking(ch, lengths=[1, 2, 4], n_sequences=1, rng=rng)
    with pytest.raises(ValueError, match=r"'total_shots' must be at least len\(lengths\) \* n_sequences = 15"):
        bl.randomized_benchmarking(ch, lengths=[1, 2, 4], n_sequences=5, rng=rng, total_shots=10)
    with pytest.raises(TypeError, match="'rng' must be a numpy.random.Generator; got int"):
        bl.randomized_benchmarking(ch, lengths=[1, 2, 4], n_sequences=5, rng=0)
    with pytest.raises(ValueError, match="'confidence' must lie strictly between 0 and 1; got 1.5"):
        bl.randomized_benchmarking(ch, lengths=[1, 2, 4], n_sequences=5, rng=rng, confidence=1.5)
    with pytest.raises(ValueError, match=r"'indices' must be Clifford indices in 0..23 for 1 qubit\(s\); got range 0..24"):
        bl.sequence_survival(ch, np.array([[0, 24]]))
    with pytest.raises(ValueError, match="'channel' must be CPTP"):
        bl.sequence_survival(Channel.from_ptm(np.diag([1.0, 1.2, 1.0, 1.0])), np.array([[0, 1]]))
    with pytest.raises(ValueError, match="'indices' must be a 2-d array"):
        bl.sequence_survival(ch, np.array([1, 2]))
    with pytest.raises(ValueError, match="'mean_survival' must be finite with the shape of 'lengths'"):
        bl.fit_decay([1, 2, 3], [0.9, 0.8], n_qubits=1)
