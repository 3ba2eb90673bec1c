"""Tests of the channel algebra (robusttomo.channels) against explicit matrix computations and stim."""

from __future__ import annotations

import doctest

import numpy as np
import pytest
import scipy.linalg
import stim
from hypothesis import given, settings
from hypothesis import strategies as st

import robusttomo.channels as channels_module
from robusttomo.channels import (
    Channel,
    amplitude_damping,
    dephasing,
    depolarizing,
    embed,
    identity,
    pauli_channel,
    random_channel,
    rotation,
)

from slow_reference import (  # noqa: E402  obviously-correct references shared by the tests
    HADAMARD as _HADAMARD,
    MATS as _MATS,
    labels as _labels,
    pauli_slow as _pauli_slow,
    ptm_of_map_slow as _ptm_of_map_slow,
)
_CNOT = np.array([[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 0, 1], [0, 0, 1, 0]], dtype=complex)  # control qubit 0


def _kraus_apply(kraus, rho):
    return sum(k @ rho @ k.conj().T for k in kraus)


def _ptm_slow(kraus, n: int) -> np.ndarray:
    """R[i, j] = tr(P_i L(P_j)) / d by loops (obviously correct reference)."""
    return _ptm_of_map_slow(lambda x: _kraus_apply(kraus, x), n)


def _choi_slow(kraus, d: int) -> np.ndarray:
    """(1/d) sum_ij |i><j| (x) L(|i><j|), input factor first."""
    out = np.zeros((d * d, d * d), dtype=complex)
    for i in range(d):
        for j in range(d):
            e = np.zeros((d, d))
            e[i, j] = 1
            out += np.kron(e, _kraus_apply(kraus, e))
    return out / d


def _random_unitary(d: int, rng: np.random.Generator) -> np.ndarray:
    q, r = np.linalg.qr(rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d)))
    return q * (np.diag(r) / np.abs(np.diag(r)))


def _random_density(d: int, rng: np.random.Generator) -> np.ndarray:
    a = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    rho = a @ a.conj().T
    return rho / np.trace(rho)


_channel_args = st.tuples(
    st.sampled_from([1, 2]),
    st.floats(min_value=0.0, max_value=2.0),
    st.integers(min_value=1, max_value=6),
    st.integers(min_value=0, max_value=2**32 - 1),
)


# ---- conversions (property tests) -----------------------------------------------------------
@settings(max_examples=40, deadline=None)
@given(_channel_args)
def test_conversions_round_trip(args):
    n, strength, rank, seed = args
    ch = random_channel(n, strength, np.random.default_rng(seed), rank=rank)
    assert Channel.from_choi(ch.choi).allclose(ch, atol=1e-10)
    assert Channel.from_superop(ch.superop).allclose(ch, atol=1e-10)
    assert Channel.from_kraus(ch.kraus()).allclose(ch, atol=1e-10)
    assert Channel.from_ptm(ch.ptm).allclose(ch, atol=0)
    # Kraus -> Choi -> Kraus -> PTM, the long way round
    assert Channel.from_kraus(Channel.from_choi(ch.choi).kraus()).allclose(ch, atol=1e-10)


@settings(max_examples=40, deadline=None)
@given(_channel_args)
def test_cptp_is_preserved(args):
    n, strength, rank, seed = args
    d = 2**n
    ch = random_channel(n, strength, np.random.default_rng(seed), rank=rank)
    for c in (ch, Channel.from_kraus(ch.kraus()), Channel.from_choi(ch.choi)):
        assert c.is_cptp()
        j = c.choi
        # CP iff Choi >= 0; TP iff tr_out J = I/d (Choi-Jamiolkowski, common practice)
        assert np.linalg.eigvalsh(j).min() > -1e-10
        np.testing.assert_allclose(np.einsum("iaja->ij", j.reshape(d, d, d, d)), np.eye(d) / d, atol=1e-10)
    kraus = ch.kraus()
    np.testing.assert_allclose(sum(k.conj().T @ k for k in kraus), np.eye(d), atol=1e-10)


@pytest.mark.parametrize("n", [1, 2])
@pytest.mark.parametrize("seed", [0, 1])
def test_representations_match_definitions(n, seed):
    rng = np.random.default_rng(seed)
    d = 2**n
    kraus = random_channel(n, 0.7, rng, rank=3).kraus()
    ch = Channel.from_kraus(kraus)
    np.testing.assert_allclose(ch.ptm, _ptm_slow(kraus, n), atol=1e-12)
    np.testing.assert_allclose(ch.choi, _choi_slow(kraus, d), atol=1e-12)
    # row-major vec: vec(K X K^+) = (K kron conj(K)) vec(X)  (common practice)
    np.testing.assert_allclose(ch.superop, sum(np.kron(k, k.conj()) for k in kraus), atol=1e-12)
    rho = _random_density(d, rng)
    np.testing.assert_allclose(ch.apply(rho), _kraus_apply(kraus, rho), atol=1e-12)
    np.testing.assert_allclose((ch.superop @ rho.reshape(-1)).reshape(d, d), _kraus_apply(kraus, rho), atol=1e-12)
    batch = np.stack([rho, _random_density(d, rng)])
    np.testing.assert_allclose(ch.apply(batch)[1], _kraus_apply(kraus, batch[1]), atol=1e-12)


@pytest.mark.parametrize(
    "channel, expected",
    [
        (Channel.from_unitary(_HADAMARD), 1),
        (identity(2), 1),
        (amplitude_damping(0.3), 2),
        (dephasing(0.1), 2),
        (depolarizing(1, 0.8), 4),
        (depolarizing(2, 0.8), 16),
        (pauli_channel({"X": 0.1, "Z": 0.2}), 3),
    ],
)
def test_kraus_count_is_choi_rank(channel, expected):
    # minimal number of Kraus operators = rank of the Choi matrix (common practice)
    kraus = channel.kraus()
    assert kraus.shape[0] == expected == np.linalg.matrix_rank(channel.choi, tol=1e-10)
    assert Channel.from_kraus(kraus).allclose(channel, atol=1e-12)


@settings(max_examples=25, deadline=None)
@given(
    st.sampled_from([1, 2]),
    st.floats(min_value=0.05, max_value=2.0),
    st.integers(min_value=1, max_value=6),
    st.integers(min_value=0, max_value=2**32 - 1),
)
def test_kraus_count_of_random_channels(n, strength, rank, seed):
    # a generic isometry into an r-level environment gives Choi rank min(r, d^2) (common practice)
    ch = random_channel(n, strength, np.random.default_rng(seed), rank=rank)
    expected = min(rank, 4**n)
    assert ch.kraus().shape[0] == expected == np.linalg.matrix_rank(ch.choi, tol=1e-10)


def test_kraus_of_non_cp_map_raises():
    # PTM diag(1, 1, -1, 1) is the transpose map: positive but not completely positive (common practice)
    with pytest.raises(ValueError, match="not completely positive"):
        Channel.from_ptm(np.diag([1.0, 1.0, -1.0, 1.0])).kraus()


# ---- algebra --------------------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 2])
def test_composition_order_matches_unitary_products(n):
    rng = np.random.default_rng(4)
    a, b = _random_unitary(2**n, rng), _random_unitary(2**n, rng)
    ca, cb = Channel.from_unitary(a), Channel.from_unitary(b)
    # a @ b is a o b: b acts first, so its unitary is a.b
    assert (ca @ cb).allclose(Channel.from_unitary(a @ b), atol=1e-12)
    assert not (ca @ cb).allclose(Channel.from_unitary(b @ a), atol=1e-6)
    assert cb.then(ca).allclose(ca @ cb, atol=0)
    np.testing.assert_allclose((ca @ cb).ptm, ca.ptm @ cb.ptm, atol=1e-14)


def test_composition_of_general_channels():
    rng = np.random.default_rng(8)
    a, b = random_channel(2, 0.5, rng), random_channel(2, 0.5, rng)
    rho = _random_density(4, rng)
    np.testing.assert_allclose((a @ b).apply(rho), a.apply(b.apply(rho)), atol=1e-12)
    assert a.power(3).allclose(a @ a @ a, atol=1e-12)
    assert a.power(0).allclose(identity(2), atol=0)


def test_tensor_puts_qubit_zero_leftmost():
    rng = np.random.default_rng(5)
    u, v = _random_unitary(2, rng), _random_unitary(4, rng)
    assert Channel.from_unitary(u).tensor(Channel.from_unitary(v)).allclose(Channel.from_unitary(np.kron(u, v)), atol=1e-12)
    # X on qubit 0 maps |00> (index 0) to |10>, index 2: qubit 0 is the most significant bit
    x0 = Channel.from_unitary(_MATS["X"]).tensor(identity(1))
    out = x0.apply(np.diag([1.0, 0, 0, 0]))
    np.testing.assert_allclose(out, np.diag([0, 0, 1.0, 0]), atol=1e-12)
    a, b = random_channel(1, 0.5, rng), random_channel(1, 0.5, rng)
    kraus = [np.kron(ka, kb) for ka in a.kraus() for kb in b.kraus()]
    assert a.tensor(b).allclose(Channel.from_kraus(kraus), atol=1e-12)


def test_ptm_of_clifford_matches_stim():
    # stim's tableau gives U P U^+ for each Pauli: R[i, j] = sign where U P_j U^+ = sign P_i
    # (stim: general stabilizer-circuit library; qubit 0 is the first character of a PauliString)
    for name, u, n in (("CNOT", _CNOT, 2), ("H", _HADAMARD, 1), ("S", np.diag([1, 1j]), 1), ("CZ", np.diag([1, 1, 1, -1]), 2)):
        tab = stim.Tableau.from_named_gate(name)
        ptm = Channel.from_unitary(u).ptm
        labels = _labels(n)
        for j, lab in enumerate(labels):
            out = tab(stim.PauliString(lab.replace("I", "_")))
            out_label = str(out)[1:].replace("_", "I")
            sign = 1.0 if str(out)[0] == "+" else -1.0
            expected = np.zeros(4**n)
            expected[labels.index(out_label)] = sign
            np.testing.assert_allclose(ptm[:, j], expected, atol=1e-12)
        # stim's unitary (qubit 0 most significant: endian="big") equals ours up to a global phase
        s = np.asarray(tab.to_unitary_matrix(endian="big"), dtype=complex)
        k = np.unravel_index(np.argmax(np.abs(u)), u.shape)
        np.testing.assert_allclose(s, np.asarray(u) * (s[k] / u[k]), atol=1e-6)


def test_adjoint():
    rng = np.random.default_rng(6)
    ch = random_channel(2, 0.6, rng)
    adj = ch.adjoint()
    np.testing.assert_array_equal(adj.ptm, ch.ptm.T)
    # Kraus operators of the adjoint are K^+ (common practice)
    assert adj.allclose(Channel.from_kraus([k.conj().T for k in ch.kraus()]), atol=1e-12)
    # Hilbert-Schmidt duality tr(A^+ L(B)) = tr(L^+(A)^+ B)
    a = rng.normal(size=(4, 4)) + 1j * rng.normal(size=(4, 4))
    b = rng.normal(size=(4, 4)) + 1j * rng.normal(size=(4, 4))
    lhs = np.trace(a.conj().T @ ch.apply(b))
    rhs = np.trace(adj.apply(a).conj().T @ b)
    assert lhs == pytest.approx(rhs, abs=1e-12)


def test_predicates_on_known_channels():
    ad = amplitude_damping(0.3)
    assert ad.is_cp() and ad.is_tp() and not ad.is_unital()
    for dep in (depolarizing(1, 0.7), depolarizing(2, -1 / 15)):
        assert dep.is_cp() and dep.is_tp() and dep.is_unital()
    assert not Channel.from_ptm(np.diag([1.0, -0.5, -0.5, -0.5])).is_cp()  # decay below -1/3
    assert not Channel.from_ptm(np.diag([1.0, 1.0, -1.0, 1.0])).is_cp()  # transpose map
    shrunk = Channel.from_kraus([0.9 * np.eye(2)])
    assert shrunk.is_cp() and not shrunk.is_tp() and shrunk.is_unital() is False
    assert Channel.from_unitary(_HADAMARD).is_cptp()
    # amplitude damping: |1><1| -> |0><0| for gamma = 1
    np.testing.assert_allclose(amplitude_damping(1.0).apply(np.diag([0.0, 1.0])), np.diag([1.0, 0.0]), atol=1e-12)


def _apply_on_qubits(kraus_op: np.ndarray, qubits: list[int], n: int) -> np.ndarray:
    """Matrix of a k-qubit operator acting on `qubits` of an n-qubit register, built column by
    column by reshaping state vectors (qubit 0 is the first tensor axis)."""
    d = 2**n
    k = len(qubits)
    cols = []
    for idx in range(d):
        psi = np.zeros(d, dtype=complex)
        psi[idx] = 1
        t = psi.reshape((2,) * n)
        t = np.moveaxis(t, qubits, list(range(k)))
        t = (kraus_op @ t.reshape(2**k, -1)).reshape((2,) * n)
        t = np.moveaxis(t, list(range(k)), qubits)
        cols.append(t.reshape(-1))
    return np.array(cols).T


@pytest.mark.parametrize("qubits, n", [([1], 2), ([0], 2), ([1, 0], 2), ([2, 0], 3), ([1], 3), ([0, 2], 3)])
def test_embed_matches_explicit_placement(qubits, n):
    rng = np.random.default_rng(len(qubits) * 10 + n)
    k = len(qubits)
    ch = random_channel(k, 0.6, rng, rank=2)
    kraus = [_apply_on_qubits(kk, qubits, n) for kk in ch.kraus()]
    assert embed(ch, qubits, n).allclose(Channel.from_kraus(kraus), atol=1e-12)


def test_embed_cnot_reversed():
    # CNOT with control qubit 1 and target qubit 0
    reversed_cnot = np.array([[1, 0, 0, 0], [0, 0, 0, 1], [0, 0, 1, 0], [0, 1, 0, 0]], dtype=complex)
    assert embed(Channel.from_unitary(_CNOT), [1, 0], 2).allclose(Channel.from_unitary(reversed_cnot), atol=1e-12)
    rx = scipy.linalg.expm(-0.5j * 0.3 * _MATS["X"])
    assert embed(rotation("X", 0.3), [1], 2).allclose(Channel.from_unitary(np.kron(np.eye(2), rx)), atol=1e-12)


@pytest.mark.parametrize("label, theta", [("Z", 0.4), ("XY", -1.2), ("ZIX", 2.0)])
def test_rotation_is_exponential(label, theta):
    u = scipy.linalg.expm(-0.5j * theta * _pauli_slow(label))
    assert rotation(label, theta).allclose(Channel.from_unitary(u), atol=1e-12)


@pytest.mark.parametrize(
    "probs", [{"X": 0.1, "Y": 0.05, "Z": 0.2}, {"IX": 0.02, "ZZ": 0.1, "YX": 0.03, "II": 0.85}]
)
def test_pauli_channel_eigenvalues(probs):
    # PTM of a Pauli channel is diagonal with eigenvalue sum_j p_j (+1 if P_i, P_j commute else -1)
    # (common practice); commutation decided here from the matrices themselves
    n = len(next(iter(probs)))
    full = {lab: probs.get(lab, 0.0) for lab in _labels(n)}
    full["I" * n] = 1 - sum(v for k, v in full.items() if k != "I" * n)
    ch = pauli_channel(probs)
    expected = []
    for li in _labels(n):
        pi = _pauli_slow(li)
        val = 0.0
        for lj, p in full.items():
            pj = _pauli_slow(lj)
            val += p if np.allclose(pi @ pj, pj @ pi) else -p
        expected.append(val)
    np.testing.assert_allclose(ch.ptm, np.diag(expected), atol=1e-14)
    kraus = [np.sqrt(p) * _pauli_slow(lab) for lab, p in full.items() if p > 0]
    assert ch.allclose(Channel.from_kraus(kraus), atol=1e-12)


def test_standard_channels_match_kraus_forms():
    # dephasing: (1-p) rho + p Z rho Z; depolarizing: p rho + (1-p) I/d (module docstrings)
    p = 0.15
    assert dephasing(p).allclose(Channel.from_kraus([np.sqrt(1 - p) * np.eye(2), np.sqrt(p) * _MATS["Z"]]), atol=1e-12)
    rng = np.random.default_rng(2)
    rho = _random_density(4, rng)
    np.testing.assert_allclose(depolarizing(2, 0.6).apply(rho), 0.6 * rho + 0.4 * np.eye(4) / 4, atol=1e-12)


def test_random_channel_strength_zero_is_identity():
    assert random_channel(2, 0.0, np.random.default_rng(0)).allclose(identity(2), atol=1e-12)


# ---- value semantics ------------------------------------------------------------------------
def test_channel_is_immutable_and_copies_input():
    r = np.eye(4)
    ch = Channel.from_ptm(r)
    r[1, 1] = 0.5
    assert ch.ptm[1, 1] == 1.0
    with pytest.raises(ValueError):
        ch.ptm[0, 0] = 2.0
    with pytest.raises(AttributeError, match="immutable"):
        ch.foo = 1
    assert ch == identity(1) and hash(ch) == hash(identity(1))
    assert ch.n_qubits == 1 and ch.dim == 2
    np.testing.assert_array_equal(amplitude_damping(0.2).nonunital_vector, amplitude_damping(0.2).ptm[1:, 0])
    np.testing.assert_array_equal(amplitude_damping(0.2).unital_block, amplitude_damping(0.2).ptm[1:, 1:])


# ---- validation -----------------------------------------------------------------------------
@pytest.mark.parametrize(
    "build, exc, match",
    [
        (lambda: Channel.from_ptm(np.eye(3)), ValueError, "'ptm' has dimension 3"),
        (lambda: Channel.from_ptm(np.ones((4, 2))), ValueError, r"'ptm' must be a square matrix; got shape \(4, 2\)"),
        (lambda: Channel.from_ptm(np.eye(4) * 1j), ValueError, "'ptm' must be real"),
        (lambda: Channel.from_ptm(np.full((4, 4), np.nan)), ValueError, "'ptm' must be finite"),
        (lambda: Channel.from_ptm(np.eye(256)), ValueError, "'ptm' has dimension 256"),
        (lambda: Channel.from_kraus([]), ValueError, "'kraus' must be a non-empty list of square matrices"),
        (lambda: Channel.from_kraus(np.ones((2, 2, 3))), ValueError, "'kraus' must be a non-empty list"),
        (lambda: Channel.from_kraus(np.ones((3, 3))), ValueError, "'kraus' has dimension 3"),
        (lambda: Channel.from_unitary(np.ones((2, 2))), ValueError, "'unitary' is not unitary"),
        (lambda: Channel.from_choi(np.eye(8)), ValueError, "'choi' has dimension 8"),
        (lambda: Channel.from_superop(np.eye(4) + 1j * np.diag([0, 1, 0, 0])), ValueError, "not Hermiticity preserving"),
        (lambda: pauli_channel({"X": -0.1}), ValueError, "'probabilities' must be non-negative and sum to 1"),
        (lambda: pauli_channel({"X": 0.7, "I": 0.7}), ValueError, "must be non-negative and sum to 1; got sum 1.4"),
        (lambda: pauli_channel({"X": 0.1, "XY": 0.1}), ValueError, "must all have the same length"),
        (lambda: pauli_channel({}), ValueError, "'probabilities' must be a non-empty mapping"),
        (lambda: rotation("Q", 0.1), ValueError, "Pauli label must be a non-empty string over 'IXYZ'; got 'Q'"),
        (lambda: rotation("X", float("inf")), ValueError, "'angle' must be finite"),
        (lambda: depolarizing(1, 1.5), ValueError, r"'p' must lie in \[-1/3, 1\]"),
        (lambda: depolarizing(4, 0.5), ValueError, "'n_qubits' must be 1, 2 or 3; got 4"),
        (lambda: dephasing(1.2), ValueError, r"'prob' must lie in \[0, 1\]; got 1.2"),
        (lambda: amplitude_damping(-0.1), ValueError, r"'gamma' must lie in \[0, 1\]; got -0.1"),
        (lambda: embed(rotation("X", 0.1), [2], 2), ValueError, r"'qubits' must be 1 distinct indices in 0..1; got \[2\]"),
        (lambda: embed(rotation("XX", 0.1), [0, 0], 2), ValueError, "'qubits' must be 2 distinct indices"),
        (lambda: identity(2).tensor(identity(2)), ValueError, "would exceed 3 qubits"),
        (lambda: identity(1) @ identity(2), ValueError, "cannot compose a 1-qubit and a 2-qubit channel"),
        (lambda: random_channel(1, -1.0, np.random.default_rng(0)), ValueError, "'strength' must be non-negative"),
    ],
)
def test_validation_messages(build, exc, match):
    with pytest.raises(exc, match=match):
        build()


def test_docstring_examples_run():
    result = doctest.testmod(channels_module, verbose=False)
    assert result.attempted >= 1
    assert result.failed == 0


def test_channel_survives_copy_and_process_transport():
    # worker pools and Dask move channels between processes by the standard library's
    # serializer; the copy must hold the same bits and stay immutable
    import copy
    import pickle

    ch = random_channel(2, 0.1, rng=np.random.default_rng(11))
    for other in (copy.deepcopy(ch), pickle.loads(pickle.dumps(ch))):
        assert np.array_equal(other.ptm, ch.ptm) and other.n_qubits == 2
        assert not other.ptm.flags.writeable
        with pytest.raises(AttributeError, match="immutable"):
            other._ptm = None
