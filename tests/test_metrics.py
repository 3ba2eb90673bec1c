"""Tests of the figures of merit against published formulas and independent computations."""

from __future__ import annotations

import doctest
import functools
import warnings

import cvxpy as cp
import numpy as np
import pytest
import scipy.linalg
import stim

import robusttomo.metrics as metrics_module
from robusttomo.channels import (
    Channel,
    amplitude_damping,
    depolarizing,
    identity,
    pauli_channel,
    random_channel,
    rotation,
)
from robusttomo.generators import channel_from_rates
from robusttomo.metrics import (
    DiamondResult,
    SolveStatus,
    average_gate_fidelity,
    coherent_share,
    decay_to_error,
    diamond_distance,
    diamond_distance_details,
    diamond_norm_of_difference,
    entanglement_fidelity,
    error_to_decay,
    pauli_error_rates,
    unitarity,
)

from slow_reference import (  # noqa: E402  obviously-correct references shared by the tests
    HADAMARD as _HADAMARD,
    labels as _labels,
    pauli_slow as _pauli_slow,
)


@functools.lru_cache(maxsize=None)
def _stabilizer_states(n: int) -> tuple[np.ndarray, ...]:
    """All n-qubit stabilizer states from stim's enumeration of Clifford tableaux, up to phase."""
    seen = {}
    for tab in stim.Tableau.iter_all(n):
        v = np.asarray(tab.to_state_vector(endian="big"), dtype=complex)  # qubit 0 most significant
        v /= np.linalg.norm(v)
        k = int(np.argmax(np.abs(v) > 1e-6))
        v *= abs(v[k]) / v[k]
        key = tuple(np.round(v, 6))
        seen.setdefault(key, v)
    return tuple(seen.values())


def _random_unitary(d: int, rng: np.random.Generator) -> np.ndarray:
    q, r = np.linalg.qr(rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d)))
    return q * (np.diag(r) / np.abs(np.diag(r)))


def _kraus_apply(kraus: np.ndarray, rho: np.ndarray) -> np.ndarray:
    return sum(k @ rho @ k.conj().T for k in kraus)


# ---- fidelities -----------------------------------------------------------------------------
def test_stabilizer_state_counts():
    # Number of n-qubit stabilizer states: 6 for one qubit, 60 for two (common practice)
    assert len(_stabilizer_states(1)) == 6
    assert len(_stabilizer_states(2)) == 60


@pytest.mark.parametrize("n", [1, 2])
@pytest.mark.parametrize("seed", [0, 1])
def test_average_gate_fidelity_equals_state_design_average(n, seed):
    # Stabilizer states form a state 2-design, so their average of <psi|U^+ L(psi) U|psi> equals
    # the Haar average, the average gate fidelity (common practice); closed form
    # F_avg = (d F_e + 1)/(d + 1): PRA 60, 1888 (1999); Phys. Lett. A 303, 249 (2002).
    rng = np.random.default_rng(seed)
    d = 2**n
    ch = random_channel(n, 0.4, rng)
    kraus = ch.kraus()
    for target in (None, _random_unitary(d, rng)):
        u = np.eye(d) if target is None else target
        vals = []
        for psi in _stabilizer_states(n):
            rho = np.outer(psi, psi.conj())
            out = _kraus_apply(kraus, rho)
            phi = u @ psi
            vals.append((phi.conj() @ out @ phi).real)
        assert average_gate_fidelity(ch, target) == pytest.approx(np.mean(vals), abs=1e-12)


@pytest.mark.parametrize("n", [1, 2])
def test_entanglement_fidelity_from_kraus(n):
    # F_e = sum_k |tr(U^+ K_k)|^2 / d^2 ("Sending entanglement through noisy quantum channels",
    # PRA 54, 2614 (1996))
    rng = np.random.default_rng(7)
    d = 2**n
    ch = random_channel(n, 0.5, rng)
    u = _random_unitary(d, rng)
    ref = sum(abs(np.trace(u.conj().T @ k)) ** 2 for k in ch.kraus()) / d**2
    assert entanglement_fidelity(ch, u) == pytest.approx(ref, abs=1e-12)
    assert entanglement_fidelity(ch, Channel.from_unitary(u)) == pytest.approx(ref, abs=1e-12)
    assert entanglement_fidelity(Channel.from_unitary(u), u) == pytest.approx(1.0, abs=1e-12)


def test_fidelity_of_depolarizing():
    # depolarizing with decay p: F_e = (1 + (d^2 - 1) p)/d^2 and 1 - F_avg = (d - 1)(1 - p)/d
    # ("Scalable and robust randomized benchmarking of quantum processes", PRL 106, 180504 (2011))
    for n in (1, 2):
        d = 2**n
        p = 0.93
        ch = depolarizing(n, p)
        assert entanglement_fidelity(ch) == pytest.approx((1 + (d * d - 1) * p) / d**2, abs=1e-14)
        assert 1 - average_gate_fidelity(ch) == pytest.approx(decay_to_error(p, n), abs=1e-14)


def test_decay_error_conversions():
    # r = (d - 1)(1 - p)/d: PRL 106, 180504 (2011)
    assert decay_to_error(0.99, 1) == pytest.approx(0.005, abs=1e-15)
    assert decay_to_error(0.98, 2) == pytest.approx(0.015, abs=1e-15)
    for n in (1, 2, 3):
        for p in (0.5, 0.9, 1.0):
            assert error_to_decay(decay_to_error(p, n), n) == pytest.approx(p, abs=1e-14)


@pytest.mark.parametrize(
    "fn, args, exc, match",
    [
        (decay_to_error, (float("nan"), 1), ValueError, "'p' must be finite; got nan"),
        (decay_to_error, ("0.9", 1), TypeError, "'p' must be a real number; got '0.9'"),
        (error_to_decay, (0.01, 0), ValueError, "'n_qubits' must be 1, 2 or 3; got 0"),
        (error_to_decay, (float("inf"), 1), ValueError, "'r' must be finite"),
    ],
)
def test_decay_validation(fn, args, exc, match):
    with pytest.raises(exc, match=match):
        fn(*args)


@pytest.mark.parametrize(
    "fn", [entanglement_fidelity, average_gate_fidelity, pauli_error_rates, coherent_share]
)
def test_fidelity_target_validation(fn):
    ch = rotation("X", 0.1)
    with pytest.raises(TypeError, match="'channel' must be a robusttomo Channel; got ndarray"):
        fn(np.eye(4))
    with pytest.raises(ValueError, match=r"'target' unitary must have shape \(2, 2\) for 1 qubit\(s\); got \(4, 4\)"):
        fn(ch, np.eye(4))
    with pytest.raises(ValueError, match="'target' must be a unitary channel"):
        fn(ch, amplitude_damping(0.2))
    with pytest.raises(ValueError, match="'target' is not unitary"):
        fn(ch, 2 * np.eye(2))


# ---- unitarity ------------------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_unitarity_of_depolarizing(n):
    # "Estimating the coherence of noise", NJP 17, 113020 (2015): u(depolarizing p) = p^2
    for p in (0.0, 0.5, 0.97):
        assert unitarity(depolarizing(n, p)) == pytest.approx(p * p, abs=1e-14)


@pytest.mark.parametrize("n", [1, 2])
def test_unitarity_equals_purity_average(n):
    # Definition u = d/(d-1) * avg_psi tr[L'(psi)^2], L'(A) = L(A - tr(A) I/d), averaged over
    # pure states; the integrand is quadratic in psi, so a 2-design (stabilizer states) suffices
    # ("Estimating the coherence of noise", NJP 17, 113020 (2015); definition from memory)
    rng = np.random.default_rng(3)
    d = 2**n
    for ch in (random_channel(n, 0.5, rng), Channel.from_unitary(_random_unitary(d, rng))):
        kraus = ch.kraus()
        mixed = _kraus_apply(kraus, np.eye(d) / d)
        vals = []
        for psi in _stabilizer_states(n):
            out = _kraus_apply(kraus, np.outer(psi, psi.conj())) - mixed
            vals.append(np.trace(out @ out).real)
        assert unitarity(ch) == pytest.approx(d / (d - 1) * np.mean(vals), abs=1e-12)
    assert unitarity(Channel.from_unitary(_random_unitary(d, rng))) == pytest.approx(1.0, abs=1e-12)


def test_unitarity_ignores_nonunital_part():
    # amplitude damping: unital block diag(sqrt(1-g), sqrt(1-g), 1-g) (from its Kraus operators)
    g = 0.3
    expected = (2 * (1 - g) + (1 - g) ** 2) / 3
    assert unitarity(amplitude_damping(g)) == pytest.approx(expected, abs=1e-14)


# ---- Pauli error rates ----------------------------------------------------------------------
@pytest.mark.parametrize(
    "probs",
    [{"X": 0.01, "Y": 0.02, "Z": 0.05}, {"IX": 0.01, "ZZ": 0.03, "YI": 0.002, "XY": 0.01}],
)
def test_pauli_error_rates_of_pauli_channel(probs):
    n = len(next(iter(probs)))
    kraus = [np.sqrt(p) * _pauli_slow(lab) for lab, p in probs.items()]
    kraus.append(np.sqrt(1 - sum(probs.values())) * np.eye(2**n))
    ch = Channel.from_kraus(kraus)  # built independently of pauli_channel
    rates = pauli_error_rates(ch)
    assert list(rates) == _labels(n)
    for lab in _labels(n):
        expected = probs.get(lab, 1 - sum(probs.values()) if lab == "I" * n else 0.0)
        assert rates[lab] == pytest.approx(expected, abs=1e-14)


@pytest.mark.parametrize("n", [1, 2])
def test_pauli_error_rates_equal_explicit_twirl(n):
    # Pauli twirl T(rho) = (1/d^2) sum_Q Q^+ E(Q rho Q^+) Q is the Pauli channel with the rates
    # (common practice); here E is the error after the target, E = L o U^dagger.
    rng = np.random.default_rng(9)
    d = 2**n
    u = _random_unitary(d, rng)
    err = random_channel(n, 0.4, rng)
    implemented = err @ Channel.from_unitary(u)
    kraus = err.kraus()
    rates = pauli_error_rates(implemented, u)
    rho = np.outer(rng.normal(size=d) + 1j * rng.normal(size=d), np.ones(d))  # any matrix
    twirled = sum(
        _pauli_slow(q) @ _kraus_apply(kraus, _pauli_slow(q) @ rho @ _pauli_slow(q)) @ _pauli_slow(q)
        for q in _labels(n)
    ) / d**2
    by_rates = sum(p * _pauli_slow(lab) @ rho @ _pauli_slow(lab) for lab, p in rates.items())
    np.testing.assert_allclose(by_rates, twirled, atol=1e-12)
    assert 1 - rates["I" * n] == pytest.approx(1 - entanglement_fidelity(implemented, u), abs=1e-12)
    assert sum(rates.values()) == pytest.approx(1.0, abs=1e-12)


# ---- coherent share -------------------------------------------------------------------------
def test_coherent_share_limits():
    assert coherent_share(rotation("X", 0.05)) == pytest.approx(1.0, abs=1e-12)
    assert coherent_share(pauli_channel({"X": 0.01, "Z": 0.02})) == pytest.approx(0.0, abs=1e-12)
    assert coherent_share(identity(2)) == 0.0
    h, s = 0.01, 2e-4
    share = coherent_share(channel_from_rates(1, hamiltonian={"Z": h}, stochastic={"X": s}))
    assert share == pytest.approx(h * h / (h * h + s), abs=1e-10)
    assert 0 < coherent_share(random_channel(2, 0.1, np.random.default_rng(0))) < 1


def test_coherent_share_with_target():
    implemented = rotation("Z", 0.1) @ Channel.from_unitary(_HADAMARD)
    assert coherent_share(implemented, _HADAMARD) == pytest.approx(1.0, abs=1e-12)


# ---- diamond distance -----------------------------------------------------------------------
def _choi_unnormalized(ch: Channel) -> np.ndarray:
    """sum_ij |i><j| (x) L(|i><j|), input factor first, from Kraus operators (slow reference)."""
    d = ch.dim
    kraus = ch.kraus()
    out = np.zeros((d * d, d * d), dtype=complex)
    for i in range(d):
        for j in range(d):
            e = np.zeros((d, d))
            e[i, j] = 1
            out += np.kron(e, _kraus_apply(kraus, e))
    return out


def _diamond_dual_reference(j: np.ndarray, d: int) -> float:
    """(1/2)||Phi||_diamond of a trace-annihilating Hermiticity-preserving map, by the dual
    program: minimize ||tr_out Z||_inf s.t. Z >= J, Z >= 0 ("Simpler semidefinite programs for
    completely bounded norms", Chicago J. Theor. Comput. Sci. 2013), written independently."""
    z = cp.Variable((d * d, d * d), hermitian=True)
    t = cp.Variable()
    tr_out = cp.partial_trace(z, [d, d], axis=1)
    cons = [z >> 0, z - j >> 0, t * np.eye(d) - tr_out >> 0]
    prob = cp.Problem(cp.Minimize(t), cons)
    with warnings.catch_warnings():
        # the interior-point solver may end "almost solved" on complex programs; still ~1e-7
        warnings.simplefilter("ignore", UserWarning)
        prob.solve(solver="CLARABEL")
    assert prob.status in (cp.OPTIMAL, cp.OPTIMAL_INACCURATE)
    return float(prob.value)


@pytest.mark.parametrize("label", ["Z", "X", "ZZ", "XY"])
@pytest.mark.parametrize("theta", [0.05, 1.0, 2.8])
def test_diamond_distance_of_rotation(label, theta):
    # (1/2)||U - I||_diamond = sin(theta/2) for U = exp(-i theta/2 P): the eigenvalues e^{-+i theta/2}
    # span an arc of angle theta ("The Theory of Quantum Information", Watrous, 2018)
    assert diamond_distance(rotation(label, theta)) == pytest.approx(np.sin(theta / 2), abs=1e-6)


def test_diamond_distance_with_unitary_target():
    implemented = rotation("Z", 0.3) @ Channel.from_unitary(_HADAMARD)
    assert diamond_distance(implemented, _HADAMARD) == pytest.approx(np.sin(0.15), abs=1e-6)
    assert diamond_distance(implemented, Channel.from_unitary(_HADAMARD)) == pytest.approx(np.sin(0.15), abs=1e-6)


@pytest.mark.parametrize(
    "probs",
    [{"X": 0.01, "Y": 0.02, "Z": 0.03}, {"Z": 0.2}, {"IX": 0.01, "ZZ": 0.03, "YI": 0.002, "XY": 0.01}],
)
def test_diamond_distance_of_pauli_channel(probs):
    # Pauli channel vs identity: 1 - p_I (from memory; see "Bounding quantum gate error rate based
    # on reported average fidelity", NJP 18, 012002 (2016))
    assert diamond_distance(pauli_channel(probs)) == pytest.approx(sum(probs.values()), abs=1e-6)


@pytest.mark.parametrize("n", [1, 2])
@pytest.mark.parametrize("seed", [0, 1])
def test_diamond_distance_agrees_with_dual_program(n, seed):
    rng = np.random.default_rng(100 + seed)
    d = 2**n
    a = random_channel(n, 0.4, rng)
    b = random_channel(n, 0.4, rng)
    ref = _diamond_dual_reference(_choi_unnormalized(a) - _choi_unnormalized(b), d)
    for solver in ("SCS", "CLARABEL"):
        res = diamond_distance_details(a, b, solver=solver)
        assert res.status is SolveStatus.OPTIMAL and not res.fell_back and res.solver == solver
        assert res.value == pytest.approx(ref, abs=1e-5)
    assert diamond_norm_of_difference(a.choi, b.choi) == pytest.approx(2 * ref, abs=2e-5)


def _diamond_general_reference(j: np.ndarray, d: int) -> float:
    """||Phi||_diamond of any linear map by the primal program of "Simpler semidefinite programs
    for completely bounded norms", Chicago J. Theor. Comput. Sci. 2013, in its original complex
    form: maximize Re tr(J^+ X) s.t. [[rho0 (x) I, X], [X^+, rho1 (x) I]] >= 0 (input factor
    first), rho0, rho1 density matrices."""
    x = cp.Variable((d * d, d * d), complex=True)
    rho0 = cp.Variable((d, d), hermitian=True)
    rho1 = cp.Variable((d, d), hermitian=True)
    eye = np.eye(d)
    block = cp.bmat([[cp.kron(rho0, eye), x], [x.H, cp.kron(rho1, eye)]])
    cons = [block >> 0, rho0 >> 0, rho1 >> 0, cp.real(cp.trace(rho0)) == 1, cp.real(cp.trace(rho1)) == 1]
    prob = cp.Problem(cp.Maximize(cp.real(cp.trace(j.conj().T @ x))), cons)
    prob.solve(solver="SCS", eps_abs=1e-8, eps_rel=1e-8, max_iters=200_000)
    assert prob.status == cp.OPTIMAL
    return float(prob.value)


@pytest.mark.parametrize("n", [1, 2])
def test_diamond_norm_of_non_trace_preserving_difference_agrees_with_general_program(n):
    # 0.9 * channel is not trace preserving, so the module's general program runs
    rng = np.random.default_rng(40 + n)
    d = 2**n
    a = random_channel(n, 0.4, rng)
    b = random_channel(n, 0.4, rng)
    ref = _diamond_general_reference(d * (0.9 * a.choi - b.choi), d)
    for solver in ("SCS", "CLARABEL"):
        assert diamond_norm_of_difference(0.9 * a.choi, b.choi, solver=solver) == pytest.approx(ref, abs=2e-5)


@pytest.mark.parametrize("n", [1, 2])
def test_diamond_distance_bounds(n):
    # trace distance of the Choi states <= diamond distance <= d * that (common practice), and
    # 1 - F_e <= diamond distance (Fuchs-van de Graaf on the Choi states, common practice)
    rng = np.random.default_rng(21)
    ch = random_channel(n, 0.3, rng)
    diff = ch.choi - identity(n).choi
    choi_trace_distance = 0.5 * np.abs(np.linalg.eigvalsh(diff)).sum()
    dd = diamond_distance(ch)
    assert choi_trace_distance - 1e-7 <= dd <= 2**n * choi_trace_distance + 1e-7
    assert 1 - entanglement_fidelity(ch) <= dd + 1e-7


def test_diamond_norm_of_non_trace_preserving_maps():
    # ||c * id||_diamond = |c| and ||channel||_diamond = 1 (common practice); these differences are
    # not trace annihilating, so the general program runs
    j_id = identity(1).choi
    assert diamond_norm_of_difference(1.3 * j_id, j_id) == pytest.approx(0.3, abs=1e-5)
    j_ad = amplitude_damping(0.4).choi
    assert diamond_norm_of_difference(j_ad, np.zeros((4, 4))) == pytest.approx(1.0, abs=1e-5)
    assert diamond_norm_of_difference(j_ad, np.zeros((4, 4)), solver="CLARABEL") == pytest.approx(1.0, abs=1e-5)


def test_forced_scs_failure_falls_back_to_clarabel():
    res = diamond_distance_details(rotation("ZX", 0.4), scs_max_iters=1)
    assert isinstance(res, DiamondResult)
    assert res.fell_back is True
    assert res.solver == "CLARABEL"
    assert res.status is SolveStatus.OPTIMAL
    assert "SCS" in res.message and "CLARABEL" in res.message
    assert res.value == pytest.approx(np.sin(0.2), abs=1e-6)


def test_both_solvers_failing_is_reported(monkeypatch):
    def fail(problem, solver, *, scs_max_iters):
        return float("nan"), SolveStatus.FAILED, f"{solver}: forced failure"

    monkeypatch.setattr(metrics_module, "_solve_once", fail)
    res = diamond_distance_details(rotation("X", 0.1))
    assert res.status is SolveStatus.FAILED and np.isnan(res.value) and res.fell_back
    with pytest.raises(RuntimeError, match="diamond distance could not be computed: SCS: forced failure"):
        diamond_distance(rotation("X", 0.1))


def test_diamond_result_is_frozen():
    res = diamond_distance_details(rotation("X", 0.1))
    with pytest.raises(AttributeError):
        res.value = 0.0  # type: ignore[misc]


@pytest.mark.parametrize(
    "kwargs, exc, match",
    [
        ({"solver": "MOSEK"}, ValueError, "'solver' must be 'SCS' or 'CLARABEL'; got 'MOSEK'"),
        ({"scs_max_iters": 0}, ValueError, "'scs_max_iters' must be a positive integer; got 0"),
        ({"target": np.eye(3)}, ValueError, r"'target' unitary must have shape \(2, 2\)"),
        ({"target": identity(2)}, ValueError, "'target' acts on 2 qubit"),
    ],
)
def test_diamond_validation(kwargs, exc, match):
    with pytest.raises(exc, match=match):
        diamond_distance_details(rotation("X", 0.1), **kwargs)


def test_diamond_accepts_non_unitary_target():
    # the distance between two channels is defined for any target channel
    assert diamond_distance(amplitude_damping(0.2), amplitude_damping(0.2)) == pytest.approx(0.0, abs=1e-6)


@pytest.mark.parametrize(
    "a, b, exc, match",
    [
        (np.zeros((3, 3)), np.zeros((3, 3)), ValueError, r"'choi_a' must be a \(d\*d, d\*d\) Choi matrix"),
        (np.zeros((4, 4)), np.zeros((16, 16)), ValueError, "'choi_a' and 'choi_b' must have the same shape"),
        (np.zeros((4, 4)), np.triu(np.ones((4, 4))), ValueError, "'choi_b' must be Hermitian"),
        (np.full((4, 4), np.nan), np.zeros((4, 4)), ValueError, "'choi_a' must be finite"),
        (np.array([["a"] * 4] * 4), np.zeros((4, 4)), TypeError, "'choi_a' must be a numeric matrix"),
    ],
)
def test_diamond_norm_validation(a, b, exc, match):
    with pytest.raises(exc, match=match):
        diamond_norm_of_difference(a, b)


def test_docstring_examples_run():
    result = doctest.testmod(metrics_module, verbose=False)
    assert result.attempted >= 3
    assert result.failed == 0


def test_scipy_expm_consistency_of_rotation_reference():
    # guard for the rotation references above: rotation(P, t) is exp(-i t/2 P) (common practice)
    u = scipy.linalg.expm(-0.5j * 0.7 * _pauli_slow("XY"))
    assert rotation("XY", 0.7).allclose(Channel.from_unitary(u))
