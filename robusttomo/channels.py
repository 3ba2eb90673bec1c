"""Channel algebra: an immutable n-qubit quantum channel held as its Pauli transfer matrix.

Conventions (see also :mod:`robusttomo._pauli`):

* PTM ``R[i, j] = tr(P_i L(P_j)) / d`` in the normalized Pauli basis, Pauli order
  ``II, IX, IY, IZ, XI, ...`` with qubit 0 the leftmost label character and tensor factor.
* Vectorization is row-major, ``vec(A)[a*d + b] = A[a, b]``; the superoperator ``S`` acts as
  ``vec(L(X)) = S vec(X)``, so for Kraus operators ``S = sum_k K_k kron conj(K_k)``.
* Choi matrix (trace 1): ``J = (1/d) sum_{ij} |i><j| (x) L(|i><j|)``, input factor first.
  ``L`` is CP iff ``J >= 0``; TP iff ``tr_out J = I/d``.
* Composition ``a @ b`` is the map ``a o b`` (``b`` acts first), so ``(a @ b).ptm == a.ptm @ b.ptm``.
* Trace preserving iff ``R[0, :] = e_0``; unital iff ``R[:, 0] = e_0``.  The unital block is
  ``B = R[1:, 1:]`` and the non-unital vector ``t = R[1:, 0]``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from robusttomo import _pauli

__all__ = [
    "Channel",
    "amplitude_damping",
    "dephasing",
    "depolarizing",
    "embed",
    "identity",
    "pauli_channel",
    "random_channel",
    "rotation",
]


def _as_square(name: str, a: object) -> np.ndarray:
    arr = np.asarray(a)
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1]:
        raise ValueError(f"'{name}' must be a square matrix; got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"'{name}' must be finite; got NaN or inf entries")
    return arr


def _n_from_dim(name: str, dim: int, power: int) -> int:
    # dim = 2**(power*n)
    n, rem = divmod(dim.bit_length() - 1, power)
    if rem or dim != 2 ** (power * n) or not 1 <= n <= 3:
        raise ValueError(
            f"'{name}' has dimension {dim}; expected {', '.join(str(2**(power*k)) for k in (1, 2, 3))}"
            " (1 to 3 qubits)"
        )
    return n


class Channel:
    """Immutable n-qubit quantum channel (n = 1..3), stored as its Pauli transfer matrix.

    Build it with :meth:`from_ptm`, :meth:`from_kraus`, :meth:`from_choi`,
    :meth:`from_superop` or :meth:`from_unitary`.  Conventions are in the module docstring.

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo import Channel
    >>> x = Channel.from_unitary(np.array([[0, 1], [1, 0]]))
    >>> bool(np.allclose((x @ x).ptm, np.eye(4)))
    True
    """

    __slots__ = ("_ptm", "_n")

    def __init__(self, ptm: np.ndarray, *, _trusted: bool = False) -> None:
        if not _trusted:
            ptm = _as_square("ptm", ptm)
            if np.iscomplexobj(ptm):
                if np.max(np.abs(ptm.imag), initial=0.0) > 1e-9:
                    raise ValueError("'ptm' must be real (a Pauli transfer matrix is real)")
                ptm = ptm.real
        n = _n_from_dim("ptm", ptm.shape[0], 2)
        arr = np.array(ptm, dtype=float, copy=True)
        arr.setflags(write=False)
        object.__setattr__(self, "_ptm", arr)
        object.__setattr__(self, "_n", n)

    def __setattr__(self, key: str, value: object) -> None:
        raise AttributeError("Channel is immutable")

    def __reduce__(self) -> tuple:
        # The refusing __setattr__ defeats the default reconstruction by copy and by the
        # inter-process transport of worker pools; a channel is its PTM, so rebuild from it.
        return (Channel, (np.array(self._ptm),))

    # ---- constructors -------------------------------------------------------------------
    @classmethod
    def from_ptm(cls, ptm: np.ndarray) -> Channel:
        """Channel from its PTM, shape ``(d*d, d*d)``, real, basis of the module docstring."""
        return cls(ptm)

    @classmethod
    def from_superop(cls, superop: np.ndarray) -> Channel:
        """Channel from its superoperator ``S`` (row-major vec), shape ``(d*d, d*d)``, complex."""
        s = _as_square("superop", superop)
        n = _n_from_dim("superop", s.shape[0], 2)
        d = 2**n
        v = _pauli.vec_basis(n)
        r = v.conj().T @ s @ v / d
        if np.max(np.abs(r.imag)) > 1e-8:
            raise ValueError("'superop' is not Hermiticity preserving (its PTM is not real)")
        return cls(r.real, _trusted=True)

    @classmethod
    def from_kraus(cls, kraus: Sequence[np.ndarray] | np.ndarray) -> Channel:
        """Channel ``rho -> sum_k K_k rho K_k^dagger`` from Kraus operators, each ``(d, d)``."""
        ks = np.asarray(kraus, dtype=complex)
        if ks.ndim == 2:
            ks = ks[None]
        if ks.ndim != 3 or ks.shape[1] != ks.shape[2] or ks.shape[0] == 0:
            raise ValueError(f"'kraus' must be a non-empty list of square matrices; got shape {ks.shape}")
        if not np.all(np.isfinite(ks)):
            raise ValueError("'kraus' must be finite; got NaN or inf entries")
        n = _n_from_dim("kraus", ks.shape[1], 1)
        d = 2**n
        p = _pauli.pauli_stack(n)
        # R[i,j] = sum_k tr(P_i K P_j K^+)/d
        kp = np.einsum("kab,jbc->kjac", ks, p)
        out = np.einsum("kjac,kdc->jad", kp, ks.conj())
        r = np.einsum("iba,jab->ij", p, out).real / d
        return cls(r, _trusted=True)

    @classmethod
    def from_unitary(cls, unitary: np.ndarray) -> Channel:
        """Unitary channel ``rho -> U rho U^dagger``; ``U`` shape ``(d, d)`` (checked unitary)."""
        u = _as_square("unitary", unitary).astype(complex)
        _n_from_dim("unitary", u.shape[0], 1)
        if not np.allclose(u.conj().T @ u, np.eye(u.shape[0]), atol=1e-8):
            raise ValueError("'unitary' is not unitary (U^dagger U != I to 1e-8)")
        return cls(_pauli.ptm_of_unitary(u), _trusted=True)

    @classmethod
    def from_choi(cls, choi: np.ndarray) -> Channel:
        """Channel from its trace-1 Choi matrix ``J = (1/d) sum |i><j| (x) L(|i><j|)``, ``(d*d, d*d)``."""
        j = _as_square("choi", choi).astype(complex)
        n = _n_from_dim("choi", j.shape[0], 2)
        d = 2**n
        # J[(i,a),(j,b)] = L(|i><j|)[a,b] / d ; S[(a,b),(i,j)] = L(|i><j|)[a,b]
        s = d * j.reshape(d, d, d, d).transpose(1, 3, 0, 2).reshape(d * d, d * d)
        return cls.from_superop(s)

    # ---- views --------------------------------------------------------------------------
    @property
    def n_qubits(self) -> int:
        """Number of qubits."""
        return self._n

    @property
    def dim(self) -> int:
        """Hilbert-space dimension ``d = 2**n_qubits``."""
        return 2**self._n

    @property
    def ptm(self) -> np.ndarray:
        """Pauli transfer matrix, ``(d*d, d*d)`` float, read-only."""
        return self._ptm

    @property
    def unital_block(self) -> np.ndarray:
        """``B = R[1:, 1:]``, shape ``(d*d-1, d*d-1)``."""
        return self._ptm[1:, 1:]

    @property
    def nonunital_vector(self) -> np.ndarray:
        """``t = R[1:, 0]``, shape ``(d*d-1,)`` (zero for a unital channel)."""
        return self._ptm[1:, 0]

    @property
    def superop(self) -> np.ndarray:
        """Superoperator ``S`` with ``vec(L(X)) = S vec(X)`` (row-major vec), ``(d*d, d*d)`` complex."""
        v = _pauli.vec_basis(self._n)
        return v @ self._ptm @ v.conj().T / self.dim

    @property
    def choi(self) -> np.ndarray:
        """Trace-1 Choi matrix ``(1/d) sum |i><j| (x) L(|i><j|)``, ``(d*d, d*d)`` complex Hermitian."""
        d = self.dim
        s = self.superop.reshape(d, d, d, d)  # [a,b,i,j]
        return s.transpose(2, 0, 3, 1).reshape(d * d, d * d) / d

    def kraus(self, *, tol: float = 1e-12) -> np.ndarray:
        """Kraus operators with the minimal number of terms (Choi rank), ``(r, d, d)`` complex.

        From the eigendecomposition ``J = sum_k l_k |v_k><v_k|`` of the Choi matrix: with
        ``|v_k> = sum_{i,a} v_k[i*d + a] |i>|a>``, ``K_k[a, i] = sqrt(d l_k) v_k[i*d + a]``.
        Eigenvalues below ``tol * max(l)`` are dropped; negative ones (a non-CP map) raise.
        """
        d = self.dim
        w, v = np.linalg.eigh(self.choi)
        wmax = max(float(w.max()), 0.0)
        if w.min() < -max(1e-9, 1e-7 * wmax):
            raise ValueError(f"channel is not completely positive (Choi eigenvalue {w.min():.3g})")
        keep = w > tol * wmax
        ks = np.sqrt(d * w[keep])[:, None, None] * v[:, keep].T.reshape(-1, d, d).transpose(0, 2, 1)
        return ks[::-1]

    def apply(self, rho: np.ndarray) -> np.ndarray:
        """Apply the channel to a ``(d, d)`` (or batched ``(..., d, d)``) matrix."""
        rho = np.asarray(rho, dtype=complex)
        d = self.dim
        if rho.ndim < 2 or rho.shape[-2:] != (d, d):
            raise ValueError(f"'rho' must have shape (..., {d}, {d}); got {rho.shape}")
        p = _pauli.pauli_stack(self._n)
        coeff = np.einsum("iba,...ab->...i", p, rho) / d  # rho = sum_j coeff_j P_j
        new = coeff @ self._ptm.T
        return np.einsum("...i,iab->...ab", new, p)

    # ---- algebra ------------------------------------------------------------------------
    def __matmul__(self, other: Channel) -> Channel:
        """``a @ b`` is ``a o b``: ``b`` acts first."""
        if not isinstance(other, Channel):
            return NotImplemented
        if other.n_qubits != self.n_qubits:
            raise ValueError(f"cannot compose a {self.n_qubits}-qubit and a {other.n_qubits}-qubit channel")
        return Channel(self._ptm @ other._ptm, _trusted=True)

    def then(self, after: Channel) -> Channel:
        """``self`` first, then ``after``: the map ``after o self``."""
        return after @ self

    def tensor(self, other: Channel) -> Channel:
        """``self (x) other`` with ``self`` on the leftmost (lower-numbered) qubits."""
        if not isinstance(other, Channel):
            raise TypeError(f"'other' must be a Channel; got {type(other).__name__}")
        if self.n_qubits + other.n_qubits > 3:
            raise ValueError("tensor product would exceed 3 qubits")
        return Channel(np.kron(self._ptm, other._ptm), _trusted=True)

    def adjoint(self) -> Channel:
        """Adjoint (Heisenberg-picture) map; its PTM is ``R.T``."""
        return Channel(self._ptm.T, _trusted=True)

    def power(self, k: int) -> Channel:
        """``k``-fold composition, ``k >= 0``."""
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 0:
            raise ValueError(f"'k' must be a non-negative integer; got {k!r}")
        return Channel(np.linalg.matrix_power(self._ptm, int(k)), _trusted=True)

    # ---- predicates ---------------------------------------------------------------------
    def is_tp(self, *, atol: float = 1e-8) -> bool:
        """Trace preserving: ``R[0, :] = e_0`` within ``atol``."""
        e0 = np.zeros(self._ptm.shape[0])
        e0[0] = 1.0
        return bool(np.allclose(self._ptm[0], e0, atol=atol, rtol=0))

    def is_unital(self, *, atol: float = 1e-8) -> bool:
        """Unital: ``R[:, 0] = e_0`` within ``atol``."""
        e0 = np.zeros(self._ptm.shape[0])
        e0[0] = 1.0
        return bool(np.allclose(self._ptm[:, 0], e0, atol=atol, rtol=0))

    def is_cp(self, *, atol: float = 1e-8) -> bool:
        """Completely positive: smallest Choi eigenvalue ``>= -atol``."""
        return bool(np.linalg.eigvalsh(self.choi).min() >= -atol)

    def is_cptp(self, *, atol: float = 1e-8) -> bool:
        """Both :meth:`is_cp` and :meth:`is_tp`."""
        return self.is_cp(atol=atol) and self.is_tp(atol=atol)

    # ---- value semantics ----------------------------------------------------------------
    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Channel):
            return NotImplemented
        return self._n == other._n and bool(np.array_equal(self._ptm, other._ptm))

    def __hash__(self) -> int:
        return hash((self._n, self._ptm.tobytes()))

    def allclose(self, other: Channel, *, atol: float = 1e-8) -> bool:
        """PTMs equal within ``atol``."""
        return self._n == other._n and bool(np.allclose(self._ptm, other._ptm, atol=atol, rtol=0))

    def __repr__(self) -> str:
        return f"Channel(n_qubits={self._n})"


# ---- standard channels ----------------------------------------------------------------------
def identity(n_qubits: int) -> Channel:
    """Identity channel on ``n_qubits`` qubits."""
    n = _pauli.check_n_qubits(n_qubits)
    return Channel(np.eye(4**n), _trusted=True)


def rotation(pauli: str, angle: float) -> Channel:
    """Unitary rotation ``exp(-i angle/2 P)`` about the Pauli axis ``P`` (a label such as ``"ZZ"``).

    ``angle`` in radians; e.g. ``rotation("Z", theta)`` is a Z rotation by ``theta`` and
    ``rotation("ZZ", theta)`` a ZZ coupling error.
    """
    _pauli.pauli_index(pauli)
    _pauli.check_n_qubits(len(pauli), name="len(pauli)")
    if not np.isfinite(angle):
        raise ValueError(f"'angle' must be finite; got {angle!r}")
    p = _pauli.pauli_matrix(pauli)
    u = np.cos(angle / 2) * np.eye(p.shape[0]) - 1j * np.sin(angle / 2) * p
    return Channel(_pauli.ptm_of_unitary(u), _trusted=True)


def depolarizing(n_qubits: int, p: float) -> Channel:
    """Depolarizing channel with PTM ``diag(1, p, ..., p)``.

    ``p`` is the decay (the benchmarking parameter), not an error probability:
    ``L(rho) = p rho + (1 - p) I/d``.  CP for ``-1/(d*d-1) <= p <= 1``.
    """
    n = _pauli.check_n_qubits(n_qubits)
    d2 = 4**n
    if not -1.0 / (d2 - 1) - 1e-12 <= p <= 1.0:
        raise ValueError(f"'p' must lie in [-1/{d2 - 1}, 1] for a CP depolarizing channel; got {p!r}")
    r = np.eye(d2) * p
    r[0, 0] = 1.0
    return Channel(r, _trusted=True)


def dephasing(prob: float) -> Channel:
    """One-qubit dephasing ``rho -> (1-prob) rho + prob Z rho Z``; PTM ``diag(1, 1-2prob, 1-2prob, 1)``."""
    if not 0.0 <= prob <= 1.0:
        raise ValueError(f"'prob' must lie in [0, 1]; got {prob!r}")
    return Channel(np.diag([1.0, 1 - 2 * prob, 1 - 2 * prob, 1.0]), _trusted=True)


def amplitude_damping(gamma: float) -> Channel:
    """One-qubit amplitude damping with decay probability ``gamma`` (|1> -> |0>)."""
    if not 0.0 <= gamma <= 1.0:
        raise ValueError(f"'gamma' must lie in [0, 1]; got {gamma!r}")
    k0 = np.array([[1, 0], [0, np.sqrt(1 - gamma)]])
    k1 = np.array([[0, np.sqrt(gamma)], [0, 0]])
    return Channel.from_kraus([k0, k1])


def pauli_channel(probabilities: Mapping[str, float]) -> Channel:
    """Pauli channel ``rho -> sum_P p_P P rho P`` from probabilities keyed by Pauli label.

    Labels have one character per qubit, qubit 0 leftmost (``"IX"`` is X on qubit 1).  The
    identity's probability is ``1 - sum`` of the others unless it is given; all must be
    non-negative and sum to 1.
    """
    if not isinstance(probabilities, Mapping) or not probabilities:
        raise ValueError("'probabilities' must be a non-empty mapping from Pauli label to probability")
    lengths = {len(k) if isinstance(k, str) else -1 for k in probabilities}
    if len(lengths) != 1:
        raise ValueError(f"Pauli labels in 'probabilities' must all have the same length; got {sorted(probabilities)}")
    n = _pauli.check_n_qubits(lengths.pop(), name="label length")
    probs = np.zeros(4**n)
    for lab, val in probabilities.items():
        probs[_pauli.pauli_index(lab)] = float(val)
    if "I" * n not in probabilities:
        probs[0] = 1.0 - probs.sum()
    if np.any(probs < -1e-12) or abs(probs.sum() - 1) > 1e-9:
        raise ValueError(f"'probabilities' must be non-negative and sum to 1; got sum {probs.sum():.6g}")
    # PTM is diagonal: eigenvalue for P_i is sum_j p_j * (+1 if P_i, P_j commute else -1)
    signs = _commutation_signs(n)
    return Channel(np.diag(signs @ probs), _trusted=True)


def _commutation_signs(n: int) -> np.ndarray:
    """``S[i, j] = +1`` if ``P_i`` and ``P_j`` commute, else ``-1``; ``(4**n, 4**n)``."""
    one = np.array([[1, 1, 1, 1], [1, 1, -1, -1], [1, -1, 1, -1], [1, -1, -1, 1]], dtype=float)
    out = np.ones((1, 1))
    for _ in range(n):
        out = np.kron(out, one)
    return out


def embed(channel: Channel, qubits: Sequence[int], n_qubits: int) -> Channel:
    """Place a k-qubit ``channel`` on ``qubits`` (in that order) of an ``n_qubits`` register.

    The other qubits see the identity.
    """
    n = _pauli.check_n_qubits(n_qubits)
    qubits = [int(q) for q in qubits]
    k = channel.n_qubits
    if len(qubits) != k or len(set(qubits)) != k or any(not 0 <= q < n for q in qubits):
        raise ValueError(f"'qubits' must be {k} distinct indices in 0..{n - 1}; got {qubits}")
    full = channel.tensor(identity(n - k)) if n > k else channel
    # permute Pauli digits: the channel's digit t sits at position qubits[t]
    order = qubits + [q for q in range(n) if q not in qubits]
    inv = np.argsort(order)
    r = full.ptm.reshape((4,) * (2 * n))
    axes = list(inv) + [n + i for i in inv]
    r = r.transpose(axes).reshape(4**n, 4**n)
    return Channel(r, _trusted=True)


def random_channel(n_qubits: int, strength: float, rng: np.random.Generator, *, rank: int = 4) -> Channel:
    """Random CPTP channel near the identity, for tests and benchmarks.

    A Stinespring isometry ``V = exp(-i strength G)[:, :d]`` on the system plus a ``rank``-level
    environment (in state ``|0>``), with ``G`` drawn from the Gaussian unitary ensemble
    (normalized so ``||G||_2 ~ 1`` per dimension).  ``strength = 0`` gives the identity;
    the infidelity grows as ``strength**2``.  The channel is generally non-unital.
    """
    import scipy.linalg

    n = _pauli.check_n_qubits(n_qubits)
    if isinstance(rank, bool) or not isinstance(rank, (int, np.integer)) or rank < 1:
        raise ValueError(f"'rank' must be a positive integer; got {rank!r}")
    if not strength >= 0:
        raise ValueError(f"'strength' must be non-negative; got {strength!r}")
    d = 2**n
    big = d * rank
    a = rng.normal(size=(big, big)) + 1j * rng.normal(size=(big, big))
    g = (a + a.conj().T) / (2 * np.sqrt(big))
    u = scipy.linalg.expm(-1j * strength * g)
    # environment is the slower index: system index a, env e -> row e*d + a; input env = 0
    v = u[:, :d]  # columns for env=0
    ks = v.reshape(rank, d, d)
    return Channel.from_kraus(ks)
