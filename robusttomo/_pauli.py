"""Pauli basis conventions shared by every module.

Conventions (fixed for the whole package):

* ``n`` qubits, ``d = 2**n``.  Qubit 0 is the leftmost tensor factor and the most
  significant bit of a computational-basis index ``x`` (textbook order ``|q0 q1 ...>``).
* Pauli labels are strings such as ``"IX"``: character ``k`` acts on qubit ``k``.
* Pauli index ``i = sum_k digit_k * 4**(n-1-k)`` with digits ``I=0, X=1, Y=2, Z=3``, so
  ``P_0`` is the identity and the order is ``II, IX, IY, IZ, XI, ...``.
* The normalized basis is ``P_i / sqrt(d)``; Pauli transfer matrices (PTMs) are
  ``R[i, j] = tr(P_i L(P_j)) / d``.
* Vectorization is row-major: ``vec(A)[a*d + b] = A[a, b]`` (numpy ``reshape``), so
  ``vec(A X B) = (A kron B.T) vec(X)``.
"""

from __future__ import annotations

import functools
import itertools

import numpy as np

_SINGLE = {
    "I": np.array([[1, 0], [0, 1]], dtype=complex),
    "X": np.array([[0, 1], [1, 0]], dtype=complex),
    "Y": np.array([[0, -1j], [1j, 0]], dtype=complex),
    "Z": np.array([[1, 0], [0, -1]], dtype=complex),
}
_LETTERS = "IXYZ"


def check_n_qubits(n_qubits: object, *, name: str = "n_qubits") -> int:
    """Validate a qubit count (1..3) and return it as ``int``."""
    if isinstance(n_qubits, bool) or not isinstance(n_qubits, (int, np.integer)):
        raise TypeError(f"'{name}' must be an integer 1, 2 or 3; got {n_qubits!r}")
    if not 1 <= int(n_qubits) <= 3:
        raise ValueError(f"'{name}' must be 1, 2 or 3; got {n_qubits!r}")
    return int(n_qubits)


@functools.lru_cache(maxsize=None)
def pauli_labels(n_qubits: int) -> tuple[str, ...]:
    """All ``4**n`` Pauli labels in basis order (``"II", "IX", ...``)."""
    return tuple("".join(t) for t in itertools.product(_LETTERS, repeat=n_qubits))


def pauli_index(label: str) -> int:
    """Basis index of a Pauli label; raises ``ValueError`` on a bad label."""
    if not isinstance(label, str) or not label or any(c not in _LETTERS for c in label):
        raise ValueError(f"Pauli label must be a non-empty string over 'IXYZ'; got {label!r}")
    idx = 0
    for c in label:
        idx = 4 * idx + _LETTERS.index(c)
    return idx


def pauli_matrix(label: str) -> np.ndarray:
    """The (unnormalized) Pauli matrix of a label, shape ``(d, d)``, complex."""
    pauli_index(label)
    out = np.ones((1, 1), dtype=complex)
    for c in label:
        out = np.kron(out, _SINGLE[c])
    return out


@functools.lru_cache(maxsize=None)
def _pauli_stack(n_qubits: int) -> np.ndarray:
    stack = np.array([pauli_matrix(lab) for lab in pauli_labels(n_qubits)])
    stack.setflags(write=False)
    return stack


def pauli_stack(n_qubits: int) -> np.ndarray:
    """All Pauli matrices, shape ``(d*d, d, d)``, complex, read-only, basis order."""
    return _pauli_stack(n_qubits)


@functools.lru_cache(maxsize=None)
def _vec_basis(n_qubits: int) -> np.ndarray:
    d = 2**n_qubits
    v = _pauli_stack(n_qubits).reshape(d * d, d * d).T.copy()  # column j = vec(P_j)
    v.setflags(write=False)
    return v


def vec_basis(n_qubits: int) -> np.ndarray:
    """Matrix ``V`` whose column ``j`` is ``vec(P_j)``; ``V V^H = d I``. Shape ``(d*d, d*d)``."""
    return _vec_basis(n_qubits)


def ptm_of_unitary(u: np.ndarray) -> np.ndarray:
    """PTM ``R[i, j] = tr(P_i U P_j U^dagger) / d`` of a unitary, shape ``(d*d, d*d)``, real."""
    d = u.shape[-1]
    n = d.bit_length() - 1
    p = _pauli_stack(n)
    conj = np.einsum("ab,jbc,dc->jad", u, p, u.conj())
    return np.einsum("iba,jab->ij", p, conj).real / d


def ptms_of_unitaries(us: np.ndarray) -> np.ndarray:
    """Batched :func:`ptm_of_unitary`: ``(k, d, d)`` unitaries to ``(k, d*d, d*d)`` PTMs."""
    us = np.asarray(us)
    d = us.shape[-1]
    n = d.bit_length() - 1
    p = _pauli_stack(n)
    conj = np.einsum("kab,jbc,kdc->kjad", us, p, us.conj(), optimize=True)
    return np.einsum("iba,kjab->kij", p, conj, optimize=True).real / d


def pauli_vector(rho: np.ndarray) -> np.ndarray:
    """Coefficients ``tr(P_i rho)`` of a (batch of) ``d x d`` matrices, last axis ``d*d``, real part."""
    rho = np.asarray(rho)
    d = rho.shape[-1]
    n = d.bit_length() - 1
    return np.einsum("iba,...ab->...i", _pauli_stack(n), rho).real
