"""Tests of the error-generator basis and of rates_from_channel.

Definitions checked against "A taxonomy of small Markovian errors", PRX Quantum 3, 020335
(2022): H_P[rho] = -i [P, rho], S_P[rho] = P rho P - rho.
"""

from __future__ import annotations

import doctest

import numpy as np
import pytest
import scipy.linalg

import robusttomo.generators as gen_module
from robusttomo import _pauli
from robusttomo.channels import Channel, amplitude_damping, depolarizing, random_channel, rotation
from robusttomo.generators import (
    channel_from_rates,
    error_ptm,
    generator_matrix,
    hamiltonian_basis,
    rates_from_channel,
    stochastic_basis,
)

from slow_reference import (  # noqa: E402  obviously-correct references shared by the tests
    labels as _labels,
    pauli_slow as _pauli_slow,
    ptm_of_map_slow as _ptm_of_map_slow,
)


@pytest.mark.parametrize("n", [1, 2])
def test_bases_match_definitions(n):
    # Definitions of H_P and S_P: "A taxonomy of small Markovian errors", PRX Quantum 3, 020335 (2022)
    ham = hamiltonian_basis(n)
    sto = stochastic_basis(n)
    labels = _labels(n)[1:]
    assert ham.shape == sto.shape == (4**n - 1, 4**n, 4**n)
    for a, lab in enumerate(labels):
        p = _pauli_slow(lab)
        ref_h = _ptm_of_map_slow(lambda x, p=p: -1j * (p @ x - x @ p), n)
        ref_s = _ptm_of_map_slow(lambda x, p=p: p @ x @ p - x, n)
        np.testing.assert_allclose(ham[a], ref_h, atol=1e-12)
        np.testing.assert_allclose(sto[a], ref_s, atol=1e-12)


def test_three_qubit_bases_spot_check():
    ham = hamiltonian_basis(3)
    sto = stochastic_basis(3)
    for lab in ("XYZ", "IIZ", "ZIX"):
        a = _labels(3).index(lab) - 1
        p = _pauli_slow(lab)
        np.testing.assert_allclose(ham[a], _ptm_of_map_slow(lambda x, p=p: -1j * (p @ x - x @ p), 3), atol=1e-12)
        np.testing.assert_allclose(sto[a], _ptm_of_map_slow(lambda x, p=p: p @ x @ p - x, 3), atol=1e-12)


def test_bases_are_read_only():
    with pytest.raises(ValueError):
        hamiltonian_basis(1)[0, 0, 0] = 1.0


def test_generator_matrix_is_linear_combination():
    rng = np.random.default_rng(11)
    h = dict(zip(_labels(2)[1:], rng.normal(size=15)))
    s = dict(zip(_labels(2)[1:], rng.normal(size=15)))
    g = generator_matrix(2, h, s)
    ref = sum(h[lab] * hamiltonian_basis(2)[a] + s[lab] * stochastic_basis(2)[a] for a, lab in enumerate(_labels(2)[1:]))
    np.testing.assert_allclose(g, ref, atol=1e-12)
    np.testing.assert_array_equal(generator_matrix(2), np.zeros((16, 16)))


@pytest.mark.parametrize("label", ["X", "Y", "Z", "XZ", "YY", "IZ"])
@pytest.mark.parametrize("theta", [0.3, -1.1, 2.5])
def test_coherent_rotation_has_h_theta_over_two(label, theta):
    # exp(-i theta/2 P) rho exp(i theta/2 P) solves d rho/dt = -i [theta/2 P, rho]  (common practice)
    n = len(label)
    u = scipy.linalg.expm(-0.5j * theta * _pauli_slow(label))
    ref = _ptm_of_map_slow(lambda x: u @ x @ u.conj().T, n)
    ch = channel_from_rates(n, hamiltonian={label: theta / 2})
    np.testing.assert_allclose(ch.ptm, ref, atol=1e-12)
    rates = rates_from_channel(rotation(label, theta))
    assert rates.hamiltonian[label] == pytest.approx(theta / 2, abs=1e-12)
    assert all(abs(v) < 1e-12 for k, v in rates.hamiltonian.items() if k != label)
    assert all(abs(v) < 1e-12 for v in rates.stochastic.values())
    assert rates.residual < 1e-12


@pytest.mark.parametrize("label", ["X", "Z", "XY", "ZI"])
def test_stochastic_rate_gives_pauli_channel(label):
    # exp(s S_P): the PTM eigenvalue of an anticommuting Pauli is exp(-2 s) = 1 - 2 p (common practice)
    s = 0.07
    p = (1 - np.exp(-2 * s)) / 2
    q = _pauli_slow(label)
    ref = _ptm_of_map_slow(lambda x: (1 - p) * x + p * q @ x @ q, len(label))
    np.testing.assert_allclose(channel_from_rates(len(label), stochastic={label: s}).ptm, ref, atol=1e-12)


@pytest.mark.parametrize("n", [1, 2])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rates_round_trip(n, seed):
    rng = np.random.default_rng(seed)
    labels = _labels(n)[1:]
    h = {lab: float(v) for lab, v in zip(labels, rng.normal(scale=0.02, size=len(labels)))}
    s = {lab: float(v) for lab, v in zip(labels, rng.uniform(0, 0.01, size=len(labels)))}
    ch = channel_from_rates(n, hamiltonian=h, stochastic=s)
    assert ch.is_cptp()
    out = rates_from_channel(ch)
    assert list(out.hamiltonian) == labels and list(out.stochastic) == labels
    np.testing.assert_allclose([out.hamiltonian[k] for k in labels], [h[k] for k in labels], atol=1e-10)
    np.testing.assert_allclose([out.stochastic[k] for k in labels], [s[k] for k in labels], atol=1e-10)
    assert out.residual < 1e-10
    np.testing.assert_allclose(scipy.linalg.expm(out.generator), ch.ptm, atol=1e-10)


@pytest.mark.parametrize("n", [1, 2])
def test_first_order_infidelity(n):
    # Entanglement infidelity ~ sum_P s_P + sum_P h_P**2 to first order: "A taxonomy of small
    # Markovian errors", PRX Quantum 3, 020335 (2022).  F_e = tr(R) / d**2 (THEORY.md conventions).
    rng = np.random.default_rng(5)
    labels = _labels(n)[1:]
    h = dict(zip(labels, rng.normal(scale=3e-3, size=len(labels))))
    s = dict(zip(labels, rng.uniform(0, 1e-4, size=len(labels))))
    ch = channel_from_rates(n, hamiltonian=h, stochastic=s)
    infidelity = 1 - np.trace(ch.ptm) / 4**n
    first_order = sum(s.values()) + sum(v * v for v in h.values())
    assert infidelity == pytest.approx(first_order, rel=2e-2)


def test_amplitude_damping_has_residual():
    # Amplitude damping is non-unital: its generator has terms outside H and S (taxonomy paper,
    # "A taxonomy of small Markovian errors", PRX Quantum 3, 020335 (2022)).
    ch = amplitude_damping(0.1)
    out = rates_from_channel(ch)
    assert out.residual > 0.05
    np.testing.assert_allclose(scipy.linalg.expm(out.generator), ch.ptm, atol=1e-12)
    assert out.stochastic["X"] == pytest.approx(out.stochastic["Y"], abs=1e-12)
    assert all(abs(v) < 1e-12 for v in out.hamiltonian.values())


def test_random_channel_generator_reproduces_channel():
    ch = random_channel(2, 0.2, np.random.default_rng(3))
    out = rates_from_channel(ch)
    np.testing.assert_allclose(scipy.linalg.expm(out.generator), ch.ptm, atol=1e-10)
    assert out.generator.flags.writeable is False


def test_principal_branch_wraps_angle():
    # principal logarithm: an angle theta in (pi, 2 pi) is reported as theta - 2 pi
    theta = 4.0
    out = rates_from_channel(rotation("Y", theta))
    assert out.hamiltonian["Y"] == pytest.approx((theta - 2 * np.pi) / 2, abs=1e-10)


@pytest.mark.parametrize(
    "channel, match",
    [
        (rotation("X", np.pi), "negative real eigenvalue"),
        (depolarizing(1, -0.2), "negative real eigenvalue"),
        (depolarizing(1, 0.0), "zero eigenvalue"),
        (amplitude_damping(1.0), "zero eigenvalue"),
    ],
)
def test_no_real_logarithm_raises(channel, match):
    with pytest.raises(ValueError, match=match):
        rates_from_channel(channel)


def test_target_and_side():
    # error after the target (project noise model L o U) vs before it
    hadamard = np.array([[1, 1], [1, -1]]) / np.sqrt(2)
    u_ch = Channel.from_unitary(hadamard)
    implemented = rotation("Z", 0.2) @ u_ch  # Z error after H
    after = rates_from_channel(implemented, hadamard)
    assert after.hamiltonian["Z"] == pytest.approx(0.1, abs=1e-12)
    # H^dagger Rz H = Rx, so the same operation seen as an error before H is an X rotation
    before = rates_from_channel(implemented, u_ch, side="before")
    assert before.hamiltonian["X"] == pytest.approx(0.1, abs=1e-12)
    np.testing.assert_allclose(error_ptm(implemented, hadamard), rotation("Z", 0.2).ptm, atol=1e-12)
    np.testing.assert_allclose(error_ptm(implemented, hadamard, side="before"), rotation("X", 0.2).ptm, atol=1e-12)


@pytest.mark.parametrize(
    "kwargs, exc, match",
    [
        ({"hamiltonian": {"XX": 0.1}}, ValueError, "'hamiltonian' keys must be 1-character Pauli labels"),
        ({"stochastic": {"Q": 0.1}}, ValueError, "'stochastic' keys must be 1-character Pauli labels over 'IXYZ'; got 'Q'"),
        ({"hamiltonian": {"I": 0.1}}, ValueError, "must not contain the identity label 'I'"),
        ({"hamiltonian": [("X", 0.1)]}, TypeError, "'hamiltonian' must be a mapping"),
        ({"stochastic": {"X": float("nan")}}, ValueError, r"'stochastic\['X'\]' must be finite"),
        ({"stochastic": {"X": "0.1"}}, TypeError, r"'stochastic\['X'\]' must be a real number"),
        ({"stochastic": {"X": True}}, TypeError, "must be a real number"),
    ],
)
def test_rate_validation(kwargs, exc, match):
    with pytest.raises(exc, match=match):
        channel_from_rates(1, **kwargs)


def test_n_qubits_validation():
    with pytest.raises(ValueError, match="'n_qubits' must be 1, 2 or 3; got 4"):
        hamiltonian_basis(4)
    with pytest.raises(TypeError, match="'n_qubits' must be an integer"):
        generator_matrix(1.5)


@pytest.mark.parametrize(
    "channel, target, side, exc, match",
    [
        ("not a channel", None, "after", TypeError, "'channel' must be a robusttomo Channel; got str"),
        (rotation("X", 0.1), None, "left", ValueError, "'side' must be 'after' or 'before'; got 'left'"),
        (rotation("X", 0.1), np.eye(4), "after", ValueError, r"'target' unitary must have shape \(2, 2\)"),
        (rotation("X", 0.1), np.array([[1, 1], [0, 1]]), "after", ValueError, "'target' is not unitary"),
        (rotation("X", 0.1), depolarizing(1, 0.5), "after", ValueError, "'target' must be a unitary channel"),
        (rotation("X", 0.1), rotation("XX", 0.1), "after", ValueError, "'target' acts on 2 qubit"),
        (rotation("X", 0.1), "H", "after", TypeError, "'target' must be None, a unitary matrix or a Channel"),
    ],
)
def test_target_validation(channel, target, side, exc, match):
    with pytest.raises(exc, match=match):
        rates_from_channel(channel, target, side=side)


def test_pauli_labels_order_matches_basis():
    # the bases follow robusttomo._pauli's label order without the identity
    assert list(_pauli.pauli_labels(2)[1:]) == _labels(2)[1:]


def test_docstring_examples_run():
    result = doctest.testmod(gen_module, verbose=False)
    assert result.attempted >= 2
    assert result.failed == 0
