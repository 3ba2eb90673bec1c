"""Obviously-correct slow references shared by the tests: Pauli matrices built by explicit
Kronecker products and transfer matrices by explicit loops over Pauli labels.

Conventions as in the package (qubit 0 leftmost, label order "II, IX, IY, IZ, XI, ..."), but
written out independently of :mod:`robusttomo._pauli` so the fast code is checked against them.
"""

from __future__ import annotations

import numpy as np

MATS = {
    "I": np.eye(2, dtype=complex),
    "X": np.array([[0, 1], [1, 0]], dtype=complex),
    "Y": np.array([[0, -1j], [1j, 0]], dtype=complex),
    "Z": np.diag([1.0, -1.0]).astype(complex),
}
HADAMARD = np.array([[1, 1], [1, -1]], dtype=complex) / np.sqrt(2)


def pauli_slow(label: str) -> np.ndarray:
    """The Pauli matrix of ``label`` (e.g. ``"XZ"``), qubit 0 leftmost."""
    out = np.ones((1, 1), dtype=complex)
    for c in label:
        out = np.kron(out, MATS[c])
    return out


def labels(n: int) -> list[str]:
    """All ``4**n`` Pauli labels in the package's order."""
    out = [""]
    for _ in range(n):
        out = [s + c for s in out for c in "IXYZ"]
    return out


def ptm_of_map_slow(fn, n: int) -> np.ndarray:
    """``R[i, j] = tr(P_i fn(P_j)) / d`` by explicit loops; ``fn`` maps a matrix to a matrix."""
    labs = labels(n)
    d = 2**n
    r = np.zeros((d * d, d * d))
    for j, lj in enumerate(labs):
        out = fn(pauli_slow(lj))
        for i, li in enumerate(labs):
            val = np.trace(pauli_slow(li) @ out) / d
            assert abs(val.imag) < 1e-12
            r[i, j] = val.real
    return r
