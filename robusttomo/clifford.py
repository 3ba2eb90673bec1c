"""The n-qubit Clifford group (n = 1..3) in tableau form, with uniform sampling and fast tables.

Conventions (see also :mod:`robusttomo._pauli`):

* Qubit 0 is the leftmost tensor factor and the most significant bit of a basis index.
* A Pauli operator on ``n`` qubits is a bit vector ``v`` of length ``2n``: ``v[:n]`` are the
  x-bits of qubits ``0..n-1`` and ``v[n:]`` the z-bits.  The Hermitian Pauli it names is
  ``P(x, z) = tensor_k i**(x_k z_k) X**x_k Z**z_k`` (``Y`` for ``x = z = 1``).
* A Clifford ``U`` is stored, up to global phase, as its tableau: the symplectic matrix ``S``
  (``(2n, 2n)`` over GF(2)) whose column ``j`` is the bit vector of ``U g_j U^dagger`` for the
  generators ``g = (X_0, ..., X_{n-1}, Z_0, ..., Z_{n-1})``, and the phase bits ``r`` with
  ``U g_j U^dagger = (-1)**r[j] P(S[:, j])``.
* ``a @ b`` is the composition ``a o b``: ``b`` acts first, unitary ``U_a U_b``.
* Global phase of :meth:`Clifford.unitary`: the first entry of the first column (the
  amplitudes of ``U|0...0>``) whose modulus exceeds ``1e-6`` is real and positive.
  With this rule every entry of a Clifford unitary lies in ``{0, +-1, +-i} / sqrt(2**k)``.

Index bijection.  A uniformly random element is drawn by the recursive pair-selection
construction of "How to efficiently select an arbitrary Clifford group element",
J. Math. Phys. 55, 122202 (2014): the image ``v`` of ``X_0`` is uniform among the
``4**n - 1`` nonzero vectors, the image ``w`` of ``Z_0`` uniform among the ``2**(2n-1)``
vectors with symplectic product 1 with ``v``, and the remaining generators are mapped by a
uniform element of the symplectic group of the symplectic complement of ``span(v, w)``
(recursion on ``n - 1`` qubits); a uniform phase vector ``r`` (a uniform Pauli) completes
the element.  The mixed-radix number of these choices,

    index = s * 4**n + sum_j r[j] 2**j,   s = (a * 2**(2n-1) + b) * |Sp(2n-2)| + s',

(``a``: rank of ``v``, ``b``: rank of ``w``, ``s'``: index in the subgroup on qubits
``1..n-1``) is a bijection onto ``[0, clifford_group_order(n))``; index 0 is the identity.
Concretely the element is ``S = T(v, w) . (1 (+) S')``, with ``T(v, w)`` the symplectic
basis obtained from ``(v, w)`` by symplectic Gram-Schmidt over the standard basis.

Circuits.  For ``n <= 2`` the circuit of every element comes from a 0-1 breadth-first search
over the group (one-qubit gates cost 0, ``cz`` costs 1), so it has the least possible number
of ``cz`` gates (at most 3 for two qubits); each run of one-qubit gates is then replaced by the
shortest word over ``{h, s, sdg, x, y, z}`` for that one-qubit Clifford.  For ``n = 3`` a
tableau-elimination synthesis is used (at most 8 ``cx`` gates; see :meth:`Clifford.circuit`).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Sequence

import numpy as np

from robusttomo import _pauli

__all__ = [
    "GATES",
    "Clifford",
    "all_cliffords",
    "clifford_circuits",
    "clifford_group_order",
    "clifford_ptms",
    "clifford_unitaries",
    "gate_unitary",
    "random_clifford",
    "random_clifford_indices",
]

Gate = tuple[str, tuple[int, ...]]
Circuit = tuple[Gate, ...]

_SQ2 = 1.0 / math.sqrt(2.0)


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


GATES: dict[str, np.ndarray] = {
    "h": _frozen(np.array([[_SQ2, _SQ2], [_SQ2, -_SQ2]], dtype=complex)),
    "s": _frozen(np.diag([1.0, 1.0j])),
    "sdg": _frozen(np.diag([1.0, -1.0j])),
    "x": _frozen(np.array([[0, 1], [1, 0]], dtype=complex)),
    "y": _frozen(np.array([[0, -1j], [1j, 0]], dtype=complex)),
    "z": _frozen(np.diag([1.0 + 0j, -1.0])),
    "cx": _frozen(np.array([[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 0, 1], [0, 0, 1, 0]], dtype=complex)),
    "cz": _frozen(np.diag([1.0 + 0j, 1.0, 1.0, -1.0])),
}
"""Standard gate unitaries, read-only complex arrays.

``"h", "s", "sdg", "x", "y", "z"`` are ``2 x 2``; ``"cx"`` and ``"cz"`` are ``4 x 4`` with the
first (control) qubit the leftmost tensor factor, so ``cx |10> = |11>``.
"""

_GATE_INVERSE = {"h": "h", "s": "sdg", "sdg": "s", "x": "x", "y": "y", "z": "z", "cx": "cx", "cz": "cz"}
_ONE_QUBIT_GATES = ("h", "s", "sdg", "x", "y", "z")
_PHASE_TOL = 1e-6
_N3_UNITARY_CACHE_SIZE = 16384
_N3_PTM_CACHE_SIZE = 1024
_N3_CIRCUIT_CACHE_SIZE = 16384
_CHUNK = 4096
_I_POWERS = np.array([1, 1j, -1, -1j])
_POPCOUNT = np.array([bin(i).count("1") for i in range(8)], dtype=np.int64)


def gate_unitary(name: str) -> np.ndarray:
    """Unitary of a named gate.

    Parameters
    ----------
    name : str
        One of ``"h", "s", "sdg", "x", "y", "z", "cx", "cz"``.

    Returns
    -------
    numpy.ndarray
        ``(2, 2)`` or ``(4, 4)`` complex, a fresh writable copy of ``GATES[name]``
        (for ``"cx"`` the control is the first, leftmost qubit).

    Raises
    ------
    TypeError
        If ``name`` is not a string.
    ValueError
        If ``name`` is not a known gate.
    """
    if not isinstance(name, str):
        raise TypeError(f"'name' must be a gate name string; got {name!r}")
    if name not in GATES:
        raise ValueError(f"'name' must be one of {sorted(GATES)}; got {name!r}")
    return np.array(GATES[name])


# ---------------------------------------------------------------------------------------
# Group orders and bit-vector helpers
# ---------------------------------------------------------------------------------------


@functools.lru_cache(maxsize=None)
def _sp_order(n: int) -> int:
    # |Sp(2n, 2)| = 2**(n*n) prod_{j=1..n} (4**j - 1); each level picks v (4**j - 1 ways)
    # and w (2**(2j-1) ways).
    out = 1
    for j in range(1, n + 1):
        out *= (4**j - 1) * 2 ** (2 * j - 1)
    return out


def clifford_group_order(n_qubits: int) -> int:
    """Order of the n-qubit Clifford group modulo global phase.

    ``2**(n*n + 2n) * prod_{j=1..n} (4**j - 1)``: 24, 11520 and 92897280 for n = 1, 2, 3
    (OEIS A003956).

    Parameters
    ----------
    n_qubits : int
        Number of qubits, 1, 2 or 3.

    Returns
    -------
    int
        The group order.

    Examples
    --------
    >>> from robusttomo.clifford import clifford_group_order
    >>> [clifford_group_order(n) for n in (1, 2, 3)]
    [24, 11520, 92897280]
    """
    n = _pauli.check_n_qubits(n_qubits)
    return 2 ** (n * n + 2 * n) * math.prod(4**j - 1 for j in range(1, n + 1))


def _sym_prod_int(a: int, b: int, n: int) -> int:
    # symplectic product <a, b> = a_x.b_z + a_z.b_x of bit-masks (bit i = coordinate i)
    mask = (1 << (2 * n)) - 1
    swapped = ((b >> n) | (b << n)) & mask
    return bin(a & swapped).count("1") & 1


def _int_to_bits(values: np.ndarray, width: int) -> np.ndarray:
    values = np.asarray(values, dtype=np.int64)
    return ((values[..., None] >> np.arange(width)) & 1).astype(np.uint8)


def _bits_to_int(bits: np.ndarray) -> np.ndarray:
    return bits.astype(np.int64) @ (np.int64(1) << np.arange(bits.shape[-1], dtype=np.int64))


def _omega(n: int) -> np.ndarray:
    om = np.zeros((2 * n, 2 * n), dtype=np.uint8)
    om[:n, n:] = np.eye(n, dtype=np.uint8)
    om[n:, :n] = np.eye(n, dtype=np.uint8)
    return om


def _sub_coords(n: int) -> np.ndarray:
    # coordinates of qubits 1..n-1 (x-bits, then z-bits) inside the 2n coordinates
    return np.array(list(range(1, n)) + list(range(n + 1, 2 * n)), dtype=np.int64)


def _pauli_index_of_bits(bits: np.ndarray) -> np.ndarray:
    """Index in the ``_pauli`` basis order of Pauli bit vectors ``(..., 2n)``."""
    n = bits.shape[-1] // 2
    x = bits[..., :n].astype(np.int64)
    z = bits[..., n:].astype(np.int64)
    digit = x * (1 + z) + (1 - x) * 3 * z  # I=0, X=1, Y=2, Z=3
    weights = 4 ** np.arange(n - 1, -1, -1, dtype=np.int64)
    return digit @ weights


@functools.lru_cache(maxsize=None)
def _bits_of_pauli_index(n: int) -> np.ndarray:
    """Bit vectors ``(4**n, 2n)`` uint8 of the Paulis in ``_pauli`` basis order."""
    idx = np.arange(4**n)
    digits = (idx[:, None] // 4 ** np.arange(n - 1, -1, -1)) % 4
    x = ((digits == 1) | (digits == 2)).astype(np.uint8)
    z = ((digits == 2) | (digits == 3)).astype(np.uint8)
    return _frozen(np.concatenate([x, z], axis=1))


# ---------------------------------------------------------------------------------------
# Tableau algebra (vectorized over leading axes)
# ---------------------------------------------------------------------------------------


def _image(s: np.ndarray, r: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Conjugate Paulis by tableaux.

    ``s`` ``(..., 2n, 2n)``, ``r`` ``(..., 2n)``, ``v`` ``(..., m, 2n)`` (broadcast).  Returns
    bits ``(..., m, 2n)`` uint8 and sign ``(..., m)`` uint8 with
    ``U P(v) U^dagger = (-1)**sign P(bits)``.
    """
    n2 = s.shape[-1]
    n = n2 // 2
    s = s.astype(np.int64)
    r = r.astype(np.int64)
    v = v.astype(np.int64)
    # P(v) = i**(x.z) X**x Z**z and X**x Z**z = X_0^x_0 .. X_{n-1}^x_{n-1} Z_0^z_0 .. Z_{n-1}^z_{n-1},
    # so its image is the ordered product of the generator images; track i-powers mod 4 in
    # the form i**e X**x Z**z, where (X^a Z^b)(X^c Z^d) = (-1)**(b.c) X^(a+c) Z^(b+d).
    e = np.sum(v[..., :n] * v[..., n:], axis=-1)
    acc = np.zeros(np.broadcast_shapes(s.shape[:-2] + (1, n2), v.shape), dtype=np.int64)
    for j in range(n2):
        col = s[..., None, :, j]  # (..., 1, 2n)
        b_j = 2 * r[..., None, j] + np.sum(col[..., :n] * col[..., n:], axis=-1)
        cross = np.sum(acc[..., n:] * col[..., :n], axis=-1)
        mask = v[..., j]
        e = e + mask * (b_j + 2 * cross)
        acc = acc ^ (mask[..., None] * col)
    xz = np.sum(acc[..., :n] * acc[..., n:], axis=-1)
    sign = ((e - xz) % 4) // 2
    return acc.astype(np.uint8), sign.astype(np.uint8)


def _compose(sa: np.ndarray, ra: np.ndarray, sb: np.ndarray, rb: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Tableau of ``a o b`` (``b`` first), broadcast over leading axes."""
    s = (sa @ sb) & 1
    _, sign = _image(sa, ra, np.swapaxes(sb, -1, -2))
    return s.astype(np.uint8), (rb ^ sign).astype(np.uint8)


def _symplectic_inverse(s: np.ndarray) -> np.ndarray:
    n = s.shape[-1] // 2
    om = _omega(n)
    return ((om @ np.swapaxes(s, -1, -2) @ om) & 1).astype(np.uint8)


def _inverse(s: np.ndarray, r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    si = _symplectic_inverse(s)
    # The sign of column j of a o a^-1 is r_inv[j] xor sign(U_a P(si[:, j]) U_a^dagger);
    # it must vanish.
    _, sign = _image(s, r, np.swapaxes(si, -1, -2))
    return si, sign.astype(np.uint8)


def _is_symplectic(s: np.ndarray) -> bool:
    n = s.shape[-1] // 2
    om = _omega(n).astype(np.int64)
    s = s.astype(np.int64)
    return bool(np.array_equal((s.T @ om @ s) & 1, om))


# ---------------------------------------------------------------------------------------
# Index bijection (recursive pair selection)
# ---------------------------------------------------------------------------------------


def _pair_basis(v: int, w: int, n: int) -> np.ndarray:
    """Symplectic matrix with columns 0 and n equal to ``v`` and ``w`` (``<v, w> = 1``).

    The other columns are a symplectic basis of the complement of ``span(v, w)`` found by
    symplectic Gram-Schmidt over ``e_0, f_0, e_1, f_1, ...``; for ``v = e_0, w = f_0`` the
    result is the identity, which makes index 0 the identity element.
    """
    pairs = [(v, w)]

    def project(x: int, a: int, b: int) -> int:
        # x + <x, b> a + <x, a> b is symplectic-orthogonal to a and b when <a, b> = 1
        if _sym_prod_int(x, b, n):
            x ^= a
        if _sym_prod_int(x, a, n):
            x ^= b
        return x

    cands = []
    for k in range(n):
        cands.extend([1 << k, 1 << (n + k)])
    cands = [project(c, v, w) for c in cands]
    while len(pairs) < n:
        i = next(i for i, c in enumerate(cands) if c)
        a = cands.pop(i)
        j = next(j for j, c in enumerate(cands) if _sym_prod_int(a, c, n))
        b = cands.pop(j)
        pairs.append((a, b))
        cands = [project(c, a, b) for c in cands]
    t = np.zeros((2 * n, 2 * n), dtype=np.uint8)
    for k, (a, b) in enumerate(pairs):
        t[:, k] = _int_to_bits(a, 2 * n)
        t[:, n + k] = _int_to_bits(b, 2 * n)
    return t


class _PairTables:
    """Per-``n`` tables of the first pair choice: partner vectors and basis completions."""

    def __init__(self, n: int) -> None:
        n_v = 4**n - 1
        n_w = 2 ** (2 * n - 1)
        w_of = np.zeros((n_v, n_w), dtype=np.int64)
        b_of = np.full((n_v, 4**n), -1, dtype=np.int64)
        t = np.zeros((n_v, n_w, 2 * n, 2 * n), dtype=np.uint8)
        for a in range(n_v):
            v = a + 1
            low = (v & -v).bit_length() - 1
            # coordinate p with (Omega v)_p = 1; u = e_p satisfies <v, u> = 1
            p = low + n if low < n else low - n
            u = 1 << p
            others = [i for i in range(2 * n) if i != p]
            for b in range(n_w):
                c = 0
                for k, i in enumerate(others):
                    if (b >> k) & 1:
                        c |= 1 << i
                if _sym_prod_int(v, c, n):
                    c |= 1 << p  # put c in the symplectic complement of v
                w = u ^ c
                w_of[a, b] = w
                b_of[a, w] = b
                t[a, b] = _pair_basis(v, w, n)
        self.n_v = n_v
        self.n_w = n_w
        self.w_of = _frozen(w_of)
        self.b_of = _frozen(b_of)
        self.t = _frozen(t)
        self.t_inv = _frozen(_symplectic_inverse(t))


@functools.lru_cache(maxsize=None)
def _pair_tables(n: int) -> _PairTables:
    return _PairTables(n)


def _embed_sub(sub: np.ndarray, n: int) -> np.ndarray:
    k = sub.shape[0]
    out = np.zeros((k, 2 * n, 2 * n), dtype=np.uint8)
    out[:, 0, 0] = 1
    out[:, n, n] = 1
    sc = _sub_coords(n)
    out[:, sc[:, None], sc[None, :]] = sub
    return out


@functools.lru_cache(maxsize=None)
def _symplectic_table(n: int) -> np.ndarray:
    """All of Sp(2n, 2) in index order, ``(|Sp|, 2n, 2n)`` uint8 (``n <= 2``)."""
    return _frozen(_symplectic_from_index(n, np.arange(_sp_order(n), dtype=np.int64)))


def _symplectic_from_index(n: int, s: np.ndarray) -> np.ndarray:
    if n == 0:
        return np.zeros((s.shape[0], 0, 0), dtype=np.uint8)
    pt = _pair_tables(n)
    rest, sub = np.divmod(s, _sp_order(n - 1))
    a, b = np.divmod(rest, pt.n_w)
    t = pt.t[a, b]
    if n == 1:
        return t.copy()
    return ((t @ _embed_sub(_symplectic_table(n - 1)[sub], n)) & 1).astype(np.uint8)


def _symplectic_to_index(n: int, s: np.ndarray) -> np.ndarray:
    if n == 0:
        return np.zeros(s.shape[0], dtype=np.int64)
    pt = _pair_tables(n)
    a = _bits_to_int(s[:, :, 0]) - 1
    b = pt.b_of[a, _bits_to_int(s[:, :, n])]
    m = (pt.t_inv[a, b] @ s) & 1
    sc = _sub_coords(n)
    sub = m[:, sc[:, None], sc[None, :]]
    return (a * pt.n_w + b) * _sp_order(n - 1) + _symplectic_to_index(n - 1, sub)


def _decode(n: int, index: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Tableaux ``(k, 2n, 2n)``, ``(k, 2n)`` uint8 of trusted int64 indices ``(k,)``."""
    s, r = np.divmod(np.asarray(index, dtype=np.int64), 4**n)
    return _symplectic_from_index(n, s), _int_to_bits(r, 2 * n)


def _encode(n: int, s: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Indices ``(k,)`` int64 of tableaux ``(k, 2n, 2n)``, ``(k, 2n)``."""
    return _symplectic_to_index(n, s) * 4**n + _bits_to_int(r)


# ---------------------------------------------------------------------------------------
# Unitaries and PTMs from tableaux (vectorized)
# ---------------------------------------------------------------------------------------


def _apply_paulis(bits: np.ndarray, sign: np.ndarray, psi: np.ndarray) -> np.ndarray:
    """``out[k, m] = (-1)**sign[k, m] P(bits[k, m]) psi[k]``; bits ``(k, m, 2n)``, psi ``(k, d)``."""
    k, _, n2 = bits.shape
    n = n2 // 2
    d = psi.shape[-1]
    weights = 1 << np.arange(n - 1, -1, -1)  # qubit 0 the most significant bit
    xi = bits[..., :n].astype(np.int64) @ weights  # (k, m)
    zi = bits[..., n:].astype(np.int64) @ weights
    popc = _POPCOUNT[:d]
    # (i^(x.z) X^x Z^z psi)[y] = i^(x.z) (-1)^(z.(y^x)) psi[y^x]
    yx = np.arange(d)[None, None, :] ^ xi[..., None]  # (k, m, d)
    expo = popc[xi & zi][..., None] + 2 * popc[zi[..., None] & yx] + 2 * sign[..., None].astype(np.int64)
    return _I_POWERS[expo % 4] * psi[np.arange(k)[:, None, None], yx]


def _unitaries_from_tableaux(s: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Unitaries ``(k, d, d)`` complex of tableaux, global phase fixed as in the module doc.

    ``psi = U|0>`` spans the range of the stabilizer projector ``prod_q (I + U Z_q U^+)/2``, and
    ``U|x> = (U X^x U^dagger) psi`` gives every other column with the same phase.
    """
    k = s.shape[0]
    n = s.shape[-1] // 2
    d = 2**n
    # The projector is applied to phi_y = 3**y: the amplitudes of a stabilizer state are in
    # {0, +-1, +-i} / sqrt(2**j), and signed sums of distinct powers of 3 never vanish, so
    # <psi|phi> != 0 and the result is a nonzero multiple of psi.
    vec = np.broadcast_to(3.0 ** np.arange(d), (k, d)).astype(complex)
    for q in range(n):
        g = _apply_paulis(s[:, None, :, n + q], r[:, None, n + q], vec)[:, 0]
        vec = (vec + g) / 2
    rows = np.arange(k)
    psi = vec / np.linalg.norm(vec, axis=1)[:, None]
    first = np.argmax(np.abs(psi) > _PHASE_TOL, axis=1)
    ph = psi[rows, first]
    psi = psi * (np.abs(ph) / ph)[:, None]
    # images of X^x for every basis index x (qubit 0 the most significant bit)
    xs = np.arange(d)
    xbits = ((xs[:, None] >> np.arange(n - 1, -1, -1)) & 1).astype(np.uint8)
    v = np.concatenate([xbits, np.zeros_like(xbits)], axis=1)
    bits, sign = _image(s, r, v)  # (k, d, 2n), (k, d)
    cols = _apply_paulis(bits, sign, psi)  # (k, column x, row y)
    return np.swapaxes(cols, 1, 2)


def _ptms_from_tableaux(s: np.ndarray, r: np.ndarray) -> np.ndarray:
    """PTMs ``(k, d*d, d*d)`` float (signed permutations) of tableaux."""
    k = s.shape[0]
    n = s.shape[-1] // 2
    dd = 4**n
    v = _bits_of_pauli_index(n)  # row j is the Pauli P_j
    bits, sign = _image(s, r, v)
    dst = _pauli_index_of_bits(bits)  # (k, dd)
    out = np.zeros((k, dd, dd), dtype=float)
    out[np.arange(k)[:, None], dst, np.arange(dd)[None, :]] = 1.0 - 2.0 * sign
    return out


def _chunked(fn, s: np.ndarray, r: np.ndarray) -> np.ndarray:
    parts = [fn(s[i : i + _CHUNK], r[i : i + _CHUNK]) for i in range(0, s.shape[0], _CHUNK)]
    return np.concatenate(parts, axis=0)


# ---------------------------------------------------------------------------------------
# Gates as tableaux
# ---------------------------------------------------------------------------------------


def _embed_unitary(u: np.ndarray, qubits: tuple[int, ...], n: int) -> np.ndarray:
    d = 2**n
    m = len(qubits)
    full = np.eye(d, dtype=complex).reshape((2,) * n + (d,))
    g = u.reshape((2,) * (2 * m))
    out = np.tensordot(g, full, axes=(list(range(m, 2 * m)), list(qubits)))
    out = np.moveaxis(out, list(range(m)), list(qubits))
    return out.reshape(d, d)


def _tableau_of_unitary(u: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray] | None:
    """Tableau of a Clifford unitary, or ``None`` if ``u`` is not Clifford (to 1e-8)."""
    d = 2**n
    paulis = _pauli.pauli_stack(n)
    gen_bits = np.eye(2 * n, dtype=np.uint8)
    s = np.zeros((2 * n, 2 * n), dtype=np.uint8)
    r = np.zeros(2 * n, dtype=np.uint8)
    for j in range(2 * n):
        g = paulis[_pauli_index_of_bits(gen_bits[j])]
        m = u @ g @ u.conj().T
        coef = np.einsum("iba,ab->i", paulis, m).real / d
        i = int(np.argmax(np.abs(coef)))
        if abs(abs(coef[i]) - 1.0) > 1e-8:
            return None
        s[:, j] = _bits_of_pauli_index(n)[i]
        r[j] = 1 if coef[i] < 0 else 0
    return s, r


@functools.lru_cache(maxsize=None)
def _gate_tableau(name: str, qubits: tuple[int, ...], n: int) -> tuple[np.ndarray, np.ndarray]:
    tab = _tableau_of_unitary(_embed_unitary(GATES[name], qubits, n), n)
    assert tab is not None
    return _frozen(tab[0]), _frozen(tab[1])


def _check_gates(n: int, gates: object) -> Circuit:
    if isinstance(gates, (str, bytes)) or not isinstance(gates, Iterable):
        raise TypeError(f"'gates' must be a sequence of (name, qubits) pairs; got {gates!r}")
    out = []
    for pos, item in enumerate(gates):
        if not isinstance(item, Sequence) or isinstance(item, str) or len(item) != 2:
            raise TypeError(f"'gates'[{pos}] must be a (name, qubits) pair; got {item!r}")
        name, qubits = item
        if not isinstance(name, str) or name not in GATES:
            raise ValueError(f"'gates'[{pos}] has gate name {name!r}; use one of {sorted(GATES)}")
        if isinstance(qubits, (int, np.integer)) and not isinstance(qubits, bool):
            qubits = (qubits,)
        if not isinstance(qubits, Sequence) or isinstance(qubits, str):
            raise TypeError(f"'gates'[{pos}] qubits must be a tuple of ints; got {qubits!r}")
        arity = GATES[name].shape[0].bit_length() - 1
        ok = (
            len(qubits) == arity
            and all(isinstance(q, (int, np.integer)) and not isinstance(q, bool) for q in qubits)
            and all(0 <= q < n for q in qubits)
            and len(set(int(q) for q in qubits)) == arity
        )
        if not ok:
            raise ValueError(
                f"'gates'[{pos}] gate {name!r} needs {arity} distinct qubit(s) in 0..{n - 1}; got {qubits!r}"
            )
        out.append((name, tuple(int(q) for q in qubits)))
    return tuple(out)


class _Rows:
    """Mutable tableau held as bit rows, for fast gate-by-gate updates of one element.

    ``x[a]`` / ``z[a]`` are ints whose bit ``j`` is ``S[a, j]`` / ``S[n + a, j]``; bit ``j`` of
    ``r`` is ``phase[j]``.  Applying a gate after the element conjugates every column Pauli;
    the update rules for h, s and cx are those of "Improved simulation of stabilizer circuits",
    Phys. Rev. A 70, 052328 (2004); the other gates are products of these.
    """

    __slots__ = ("n", "x", "z", "r", "full")

    def __init__(self, n: int, s: np.ndarray, r: np.ndarray) -> None:
        self.n = n
        w = 1 << np.arange(2 * n, dtype=np.int64)
        self.x = [int(s[a] @ w) for a in range(n)]
        self.z = [int(s[n + a] @ w) for a in range(n)]
        self.r = int(r @ w)
        self.full = (1 << (2 * n)) - 1

    def h(self, a: int) -> None:
        self.r ^= self.x[a] & self.z[a]
        self.x[a], self.z[a] = self.z[a], self.x[a]

    def s(self, a: int) -> None:
        self.r ^= self.x[a] & self.z[a]
        self.z[a] ^= self.x[a]

    def cx(self, c: int, t: int) -> None:
        x, z = self.x, self.z
        self.r ^= x[c] & z[t] & (x[t] ^ z[c] ^ self.full)
        x[t] ^= x[c]
        z[c] ^= z[t]

    def apply(self, name: str, qubits: tuple[int, ...]) -> None:
        if name == "h":
            self.h(qubits[0])
        elif name == "s":
            self.s(qubits[0])
        elif name == "sdg":
            for _ in range(3):
                self.s(qubits[0])
        elif name == "z":
            self.s(qubits[0])
            self.s(qubits[0])
        elif name == "x":
            self.h(qubits[0])
            self.apply("z", qubits)
            self.h(qubits[0])
        elif name == "y":
            self.apply("x", qubits)
            self.apply("z", qubits)
        elif name == "cx":
            self.cx(*qubits)
        else:  # cz = h_t cx h_t
            self.h(qubits[1])
            self.cx(*qubits)
            self.h(qubits[1])

    def bit(self, row: int, col: int) -> int:
        n = self.n
        word = self.x[row] if row < n else self.z[row - n]
        return (word >> col) & 1

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        n = self.n
        bits = np.arange(2 * n)
        s = np.array([(w >> bits) & 1 for w in self.x + self.z], dtype=np.uint8).reshape(2 * n, 2 * n)
        r = ((self.r >> bits) & 1).astype(np.uint8)
        return s, r


def _apply_gates(n: int, s: np.ndarray, r: np.ndarray, gates: Circuit) -> tuple[np.ndarray, np.ndarray]:
    rows = _Rows(n, s, r)
    for name, qubits in gates:
        rows.apply(name, qubits)
    return rows.arrays()


def _circuit_unitary(n: int, gates: Circuit) -> np.ndarray:
    u = np.eye(2**n, dtype=complex)
    for name, qubits in gates:
        u = _embed_unitary(GATES[name], qubits, n) @ u
    return u


# ---------------------------------------------------------------------------------------
# Circuits
# ---------------------------------------------------------------------------------------


@functools.lru_cache(maxsize=None)
def _one_qubit_words() -> tuple[tuple[tuple[str, ...], ...], np.ndarray]:
    """Shortest words over the one-qubit gates, and the table ``next[c, g] = index(g o c)``."""
    s, r = _decode(1, np.arange(24))
    nxt = np.zeros((24, len(_ONE_QUBIT_GATES)), dtype=np.int64)
    for gi, name in enumerate(_ONE_QUBIT_GATES):
        gs, gr = _gate_tableau(name, (0,), 1)
        nxt[:, gi] = _encode(1, *_compose(gs, gr, s, r))
    words: list[tuple[str, ...] | None] = [None] * 24
    words[0] = ()
    queue = [0]
    while queue:  # breadth first, so each word is a shortest one
        nq = []
        for c in queue:
            for gi, name in enumerate(_ONE_QUBIT_GATES):
                t = int(nxt[c, gi])
                if words[t] is None:
                    words[t] = words[c] + (name,)
                    nq.append(t)
        queue = nq
    return tuple(words), _frozen(nxt)  # type: ignore[arg-type]


def _compress(n: int, gates: Sequence[Gate]) -> Circuit:
    """Replace each run of one-qubit gates on a qubit by a shortest word for its product."""
    words, nxt = _one_qubit_words()
    gid = {g: i for i, g in enumerate(_ONE_QUBIT_GATES)}
    pending = [0] * n
    out: list[Gate] = []

    def flush(q: int) -> None:
        out.extend((g, (q,)) for g in words[pending[q]])
        pending[q] = 0

    for name, qubits in gates:
        if len(qubits) == 1:
            q = qubits[0]
            pending[q] = int(nxt[pending[q], gid[name]])
        else:
            for q in qubits:
                flush(q)
            out.append((name, qubits))
    for q in range(n):
        flush(q)
    return tuple(out)


def _bfs_circuits(n: int) -> tuple[Circuit, ...]:
    """Circuits of every element (index order) with the fewest ``cz`` gates (0-1 BFS)."""
    order = clifford_group_order(n)
    moves: list[Gate] = [(g, (q,)) for q in range(n) for g in ("h", "s")]
    local = list(range(len(moves)))
    if n > 1:
        moves.append(("cz", (0, 1)))
    tabs = [_gate_tableau(name, qubits, n) for name, qubits in moves]
    parent = np.full(order, -1, dtype=np.int64)
    move = np.full(order, -1, dtype=np.int64)
    seen = np.zeros(order, dtype=bool)
    seen[0] = True
    frontier = np.array([0], dtype=np.int64)

    def step(src: np.ndarray, mi: int) -> np.ndarray:
        s, r = _decode(n, src)
        dst = _encode(n, *_compose(tabs[mi][0], tabs[mi][1], s, r))
        fresh = ~seen[dst]
        dst_f, first = np.unique(dst[fresh], return_index=True)
        seen[dst_f] = True
        parent[dst_f] = src[fresh][first]
        move[dst_f] = mi
        return dst_f

    while frontier.size:
        level = [frontier]
        queue = frontier
        while queue.size:  # closure under cost-0 moves
            queue = np.concatenate([step(queue, mi) for mi in local])
            level.append(queue)
        frontier = step(np.concatenate(level), len(moves) - 1) if n > 1 else np.zeros(0, np.int64)
    assert seen.all()
    parent_l = parent.tolist()
    move_l = move.tolist()
    out = []
    for c in range(order):
        path = []
        while c != 0:
            path.append(moves[move_l[c]])
            c = parent_l[c]
        out.append(_compress(n, path[::-1]))
    return tuple(out)


def _synthesize(n: int, s: np.ndarray, r: np.ndarray) -> Circuit:
    """Circuit of a tableau by elimination (any n; at most 8 ``cx`` for n = 3).

    Gates ``g_1, g_2, ...`` are applied after the element until it is a Pauli, then the Pauli
    is removed; the element is the inverse word.  Per qubit ``q``: local gates make the image
    of ``X_q`` X-type, at most ``n - q`` ``cx`` gates reduce it to ``X_q``; ``h s h`` on ``q`` and
    local gates plus at most ``n - q - 1`` ``cx`` gates targeting ``q`` reduce the image of
    ``Z_q`` to ``Z_q`` while fixing ``X_q``.
    """
    applied: list[Gate] = []
    rows = _Rows(n, s, r)
    bit = rows.bit

    def apply(name: str, qubits: tuple[int, ...]) -> None:
        rows.apply(name, qubits)
        applied.append((name, qubits))

    for q in range(n):
        for k in range(q, n):
            if bit(n + k, q):
                apply("s" if bit(k, q) else "h", (k,))
        xs = [k for k in range(q, n) if bit(k, q)]
        if q not in xs:
            apply("cx", (xs[0], q))
        for k in range(q + 1, n):
            if bit(k, q):
                apply("cx", (q, k))
        if bit(q, n + q):
            for g in ("h", "s", "h"):
                apply(g, (q,))
        for k in range(q + 1, n):
            xk, zk = bit(k, n + q), bit(n + k, n + q)
            if xk and zk:
                apply("s", (k,))
            if xk:
                apply("h", (k,))
            if xk or zk:
                apply("cx", (k, q))
    for q in range(n):
        flip_x, flip_z = (rows.r >> q) & 1, (rows.r >> (n + q)) & 1
        if flip_x or flip_z:
            apply("y" if flip_x and flip_z else ("z" if flip_x else "x"), (q,))
    s_end, r_end = rows.arrays()
    assert np.array_equal(s_end, np.eye(2 * n, dtype=np.uint8)) and not r_end.any()
    inverse = [(_GATE_INVERSE[g], qs) for g, qs in reversed(applied)]
    return _compress(n, inverse)


# ---------------------------------------------------------------------------------------
# The element type
# ---------------------------------------------------------------------------------------


class Clifford:
    """Immutable n-qubit Clifford element (n = 1..3), modulo global phase, in tableau form.

    Parameters
    ----------
    symplectic : array_like
        ``(2n, 2n)`` over GF(2) (entries 0/1), symplectic.  Column ``j`` is the bit vector of
        ``U g_j U^dagger`` for generators ``X_0..X_{n-1}, Z_0..Z_{n-1}``; rows are the x-bits of
        qubits ``0..n-1`` then the z-bits.
    phase : array_like
        ``(2n,)`` bits with ``U g_j U^dagger = (-1)**phase[j] P(symplectic[:, j])``.

    Notes
    -----
    Conventions are in the module docstring.  ``a @ b`` is ``a o b`` (``b`` first).  Equality
    and hashing use the tableau, so elements differing by a global phase are equal.

    Examples
    --------
    >>> from robusttomo.clifford import Clifford
    >>> h = Clifford.from_circuit(1, [("h", (0,))])
    >>> (h @ h) == Clifford.identity(1)
    True
    >>> Clifford.from_index(2, 0) == Clifford.identity(2)
    True
    """

    __slots__ = ("_s", "_r", "_n", "_index")

    def __init__(self, symplectic: np.ndarray, phase: np.ndarray) -> None:
        s = np.asarray(symplectic)
        r = np.asarray(phase)
        if s.ndim != 2 or s.shape[0] != s.shape[1] or s.shape[0] not in (2, 4, 6):
            raise ValueError(f"'symplectic' must have shape (2n, 2n) with n = 1..3; got shape {s.shape}")
        n = s.shape[0] // 2
        if r.shape != (2 * n,):
            raise ValueError(f"'phase' must have shape ({2 * n},) to match 'symplectic'; got shape {r.shape}")
        for name, arr in (("symplectic", s), ("phase", r)):
            if not (arr.dtype == bool or np.issubdtype(arr.dtype, np.number)):
                raise TypeError(f"'{name}' must be a numeric 0/1 array; got dtype {arr.dtype}")
            if arr.dtype != bool and not np.isin(arr, (0, 1)).all():
                raise ValueError(f"'{name}' must hold only 0 and 1; got {arr.tolist()}")
        s = s.astype(np.uint8)
        if not _is_symplectic(s):
            raise ValueError(
                f"'symplectic' must satisfy S^T Omega S = Omega over GF(2) (a symplectic matrix); got {s.tolist()}"
            )
        self._set(n, s, r.astype(np.uint8))

    def _set(self, n: int, s: np.ndarray, r: np.ndarray) -> None:
        object.__setattr__(self, "_n", n)
        object.__setattr__(self, "_s", _frozen(s))
        object.__setattr__(self, "_r", _frozen(r))
        object.__setattr__(self, "_index", None)

    @classmethod
    def _trusted(cls, n: int, s: np.ndarray, r: np.ndarray) -> Clifford:
        obj = cls.__new__(cls)
        obj._set(n, s, r)
        return obj

    def __setattr__(self, key: str, value: object) -> None:
        raise AttributeError("Clifford is immutable")

    # ---- constructors -----------------------------------------------------------------
    @classmethod
    def identity(cls, n_qubits: int) -> Clifford:
        """The identity element.

        Parameters
        ----------
        n_qubits : int
            1, 2 or 3.

        Returns
        -------
        Clifford
            The element with index 0 (identity symplectic matrix, zero phase).
        """
        n = _pauli.check_n_qubits(n_qubits)
        return cls._trusted(n, np.eye(2 * n, dtype=np.uint8), np.zeros(2 * n, dtype=np.uint8))

    @classmethod
    def from_index(cls, n_qubits: int, index: int) -> Clifford:
        """Element with a given index (the bijection of the module docstring).

        Parameters
        ----------
        n_qubits : int
            1, 2 or 3.
        index : int
            In ``[0, clifford_group_order(n_qubits))``; 0 is the identity.

        Returns
        -------
        Clifford
        """
        n = _pauli.check_n_qubits(n_qubits)
        if isinstance(index, bool) or not isinstance(index, (int, np.integer)):
            raise TypeError(f"'index' must be an integer; got {index!r}")
        order = clifford_group_order(n)
        if not 0 <= int(index) < order:
            raise ValueError(f"'index' must be in [0, {order}) for {n} qubit(s); got {index!r}")
        s, r = _decode(n, np.array([int(index)], dtype=np.int64))
        out = cls._trusted(n, s[0], r[0])
        object.__setattr__(out, "_index", int(index))
        return out

    @classmethod
    def from_circuit(cls, n_qubits: int, gates: Iterable[tuple[str, Sequence[int]]]) -> Clifford:
        """Element implemented by a gate sequence.

        Parameters
        ----------
        n_qubits : int
            1, 2 or 3.
        gates : iterable of (str, tuple of int)
            ``(name, qubits)`` in time order; names from :data:`GATES`; for ``"cx"`` the qubits
            are ``(control, target)``.  A bare int is accepted for a one-qubit gate.

        Returns
        -------
        Clifford
        """
        n = _pauli.check_n_qubits(n_qubits)
        circ = _check_gates(n, gates)
        s, r = _apply_gates(n, np.eye(2 * n, dtype=np.uint8), np.zeros(2 * n, dtype=np.uint8), circ)
        return cls._trusted(n, s, r)

    # ---- views --------------------------------------------------------------------------
    @property
    def n_qubits(self) -> int:
        """Number of qubits (1..3)."""
        return self._n

    @property
    def symplectic(self) -> np.ndarray:
        """Symplectic matrix, ``(2n, 2n)`` uint8 over GF(2), read-only (see class docstring)."""
        return self._s

    @property
    def phase(self) -> np.ndarray:
        """Phase bits, ``(2n,)`` uint8 in {0, 1}, read-only (see class docstring)."""
        return self._r

    @property
    def index(self) -> int:
        """Index in ``[0, clifford_group_order(n))`` (bijection; 0 is the identity)."""
        if self._index is None:
            object.__setattr__(self, "_index", int(_encode(self._n, self._s[None], self._r[None])[0]))
        return self._index

    def unitary(self) -> np.ndarray:
        """Unitary matrix of the element.

        Returns
        -------
        numpy.ndarray
            ``(d, d)`` complex, ``d = 2**n``, qubit 0 the leftmost tensor factor (most
            significant bit of the row/column index).  Global phase: the first entry of the
            first column with modulus above 1e-6 is real and positive.
        """
        return _unitaries_from_tableaux(self._s[None], self._r[None])[0]

    def ptm(self) -> np.ndarray:
        """Pauli transfer matrix of the unitary channel ``rho -> U rho U^dagger``.

        Returns
        -------
        numpy.ndarray
            ``(d*d, d*d)`` float, ``R[i, j] = tr(P_i U P_j U^dagger) / d``: a signed permutation
            matrix in the Pauli order ``II, IX, IY, IZ, XI, ...`` of :mod:`robusttomo._pauli`.
        """
        return _ptms_from_tableaux(self._s[None], self._r[None])[0]

    def circuit(self) -> Circuit:
        """A gate sequence implementing the element, in time order.

        Returns
        -------
        tuple of (str, tuple of int)
            Gate names from ``{"h", "s", "sdg", "x", "y", "z", "cx", "cz"}``; for ``"cx"`` the
            qubits are ``(control, target)``.  For n <= 2 the number of two-qubit gates (all
            ``cz``) is the minimum possible, at most 3 for two qubits, and each one-qubit run
            is a shortest word.  For n = 3 a tableau-elimination synthesis with at most 8
            ``cx`` gates.
        """
        if self._n <= 2:
            return _circuit_table(self._n)[self.index]
        return _synthesize(self._n, self._s, self._r)

    def inverse(self) -> Clifford:
        """The inverse element.

        Returns
        -------
        Clifford
            ``c.inverse()`` with ``c @ c.inverse() == c.inverse() @ c == Clifford.identity(n)``;
            its symplectic matrix is ``Omega S^T Omega`` with ``Omega = [[0, I], [I, 0]]``.
        """
        s, r = _inverse(self._s, self._r)
        return Clifford._trusted(self._n, s, r)

    # ---- algebra ------------------------------------------------------------------------
    def __matmul__(self, other: object) -> Clifford:
        """Composition ``self o other`` (``other`` acts first), unitary ``U_self U_other``."""
        if not isinstance(other, Clifford):
            return NotImplemented
        if other._n != self._n:
            raise ValueError(f"cannot compose a {self._n}-qubit Clifford with a {other._n}-qubit one")
        s, r = _compose(self._s, self._r, other._s, other._r)
        return Clifford._trusted(self._n, s, r)

    def __eq__(self, other: object) -> bool:
        """Equal tableaux, i.e. equal unitaries up to global phase."""
        if not isinstance(other, Clifford):
            return NotImplemented
        return self._n == other._n and np.array_equal(self._s, other._s) and np.array_equal(self._r, other._r)

    def __hash__(self) -> int:
        """Hash of the tableau (consistent with ``==``)."""
        return hash((self._n, self._s.tobytes(), self._r.tobytes()))

    def __repr__(self) -> str:
        return f"Clifford(n_qubits={self._n}, index={self.index})"


# ---------------------------------------------------------------------------------------
# Sampling
# ---------------------------------------------------------------------------------------


def _check_rng(rng: object) -> np.random.Generator:
    if not isinstance(rng, np.random.Generator):
        raise TypeError(f"'rng' must be a numpy.random.Generator (numpy.random.default_rng(seed)); got {rng!r}")
    return rng


def random_clifford_indices(n_qubits: int, size: int, rng: np.random.Generator) -> np.ndarray:
    """Indices of independent, exactly uniform random Clifford elements.

    Each choice of the recursive pair-selection construction ("How to efficiently select an
    arbitrary Clifford group element", J. Math. Phys. 55, 122202 (2014)) is drawn uniformly
    and independently: the image of ``X_0`` among the ``4**j - 1`` nonzero vectors, the image of
    ``Z_0`` among the ``2**(2j-1)`` symplectic partners, for ``j = n, ..., 1``, and a uniform
    Pauli (phase bits).  The choices are combined into the index by the mixed-radix rule of
    the module docstring, so the index is uniform on ``[0, clifford_group_order(n))``.

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    size : int
        Number of elements, ``>= 0``.
    rng : numpy.random.Generator
        Source of randomness, e.g. ``numpy.random.default_rng(seed)``.

    Returns
    -------
    numpy.ndarray
        ``(size,)`` int64 indices; use :func:`clifford_unitaries` etc. to get the elements.

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo.clifford import random_clifford_indices
    >>> idx = random_clifford_indices(2, 5, np.random.default_rng(1))
    >>> idx.shape, idx.dtype.name, bool(((idx >= 0) & (idx < 11520)).all())
    ((5,), 'int64', True)
    """
    n = _pauli.check_n_qubits(n_qubits)
    if isinstance(size, bool) or not isinstance(size, (int, np.integer)):
        raise TypeError(f"'size' must be a non-negative integer; got {size!r}")
    if size < 0:
        raise ValueError(f"'size' must be a non-negative integer; got {size!r}")
    rng = _check_rng(rng)
    s = np.zeros(int(size), dtype=np.int64)
    for j in range(n, 0, -1):  # outermost choice first: s = (a * n_w + b) * |Sp(2j-2)| + s'
        a = rng.integers(0, 4**j - 1, size=int(size), dtype=np.int64)
        b = rng.integers(0, 2 ** (2 * j - 1), size=int(size), dtype=np.int64)
        s = s + (a * 2 ** (2 * j - 1) + b) * _sp_order(j - 1)
    r = rng.integers(0, 4**n, size=int(size), dtype=np.int64)
    return s * 4**n + r


def random_clifford(n_qubits: int, rng: np.random.Generator) -> Clifford:
    """One exactly uniform random Clifford element (see :func:`random_clifford_indices`).

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    Clifford

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo.clifford import random_clifford
    >>> c = random_clifford(2, np.random.default_rng(0))
    >>> c @ c.inverse() == c.identity(2)
    True
    """
    n = _pauli.check_n_qubits(n_qubits)
    return Clifford.from_index(n, int(random_clifford_indices(n, 1, rng)[0]))


# ---------------------------------------------------------------------------------------
# Tables and batched accessors
# ---------------------------------------------------------------------------------------


@functools.lru_cache(maxsize=None)
def _tableau_table(n: int) -> tuple[np.ndarray, np.ndarray]:
    s, r = _decode(n, np.arange(clifford_group_order(n), dtype=np.int64))
    return _frozen(s), _frozen(r)


@functools.lru_cache(maxsize=None)
def _unitary_table(n: int) -> np.ndarray:
    return _frozen(_chunked(_unitaries_from_tableaux, *_tableau_table(n)))


@functools.lru_cache(maxsize=None)
def _ptm_table(n: int) -> np.ndarray:
    return _frozen(_chunked(_ptms_from_tableaux, *_tableau_table(n)))


@functools.lru_cache(maxsize=None)
def _circuit_table(n: int) -> tuple[Circuit, ...]:
    return _bfs_circuits(n)


def _check_indices(n: int, indices: object) -> np.ndarray:
    arr = np.asarray(indices)
    if arr.ndim != 1:
        raise ValueError(f"'indices' must be a 1-D array of integers; got shape {arr.shape}")
    if arr.size == 0:
        return arr.astype(np.int64)
    if not np.issubdtype(arr.dtype, np.integer):
        raise TypeError(f"'indices' must hold integers; got dtype {arr.dtype}")
    order = clifford_group_order(n)
    bad = (arr < 0) | (arr >= order)
    if bad.any():
        raise ValueError(
            f"'indices' must lie in [0, {order}) for {n} qubit(s); got {arr[bad][:5].tolist()} (first bad values)"
        )
    return arr.astype(np.int64)


class _BoundedCache:
    """Index -> read-only array cache that is cleared when it exceeds ``limit`` entries."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.store: dict[int, object] = {}

    def get_many(self, keys: np.ndarray, compute) -> list:
        # read the hits before any eviction below can drop them
        found = {int(k): self.store[int(k)] for k in keys if int(k) in self.store}
        missing = list(dict.fromkeys(int(k) for k in keys if int(k) not in found))
        if missing:
            values = compute(np.array(missing, dtype=np.int64))
            found.update(zip(missing, values))
            if len(self.store) + len(missing) > self.limit:
                self.store.clear()
            for k, v in zip(missing[: self.limit], values[: self.limit]):
                # a private read-only copy, so a cached entry keeps no large batch alive
                self.store[k] = _frozen(v) if isinstance(v, np.ndarray) else v
        return [found[int(k)] for k in keys]


_N3_UNITARIES = _BoundedCache(_N3_UNITARY_CACHE_SIZE)
_N3_PTMS = _BoundedCache(_N3_PTM_CACHE_SIZE)
_N3_CIRCUITS = _BoundedCache(_N3_CIRCUIT_CACHE_SIZE)


def _n3_batch(cache: _BoundedCache, fn, idx: np.ndarray, shape: tuple[int, ...], dtype) -> np.ndarray:
    uniq, inv = np.unique(idx, return_inverse=True)
    keys = uniq.tolist()
    hit = np.array([k in cache.store for k in keys], dtype=bool)
    out = np.empty((uniq.size,) + shape, dtype=dtype)
    if hit.any():
        out[hit] = np.array([cache.store[k] for k, h in zip(keys, hit) if h])
    if not hit.all():
        miss = uniq[~hit]
        s, r = _decode(3, miss)
        vals = _chunked(fn, s, r)
        out[~hit] = vals
        if len(cache.store) + miss.size > cache.limit:
            cache.store.clear()
        for k, v in zip(miss[: cache.limit].tolist(), vals[: cache.limit]):
            cache.store[k] = _frozen(v)
    return out[inv.reshape(-1)]


def clifford_unitaries(n_qubits: int, indices: np.ndarray) -> np.ndarray:
    """Unitaries of Clifford elements given by index.

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    indices : array_like of int
        ``(k,)`` indices in ``[0, clifford_group_order(n))``.

    Returns
    -------
    numpy.ndarray
        ``(k, d, d)`` complex, a fresh array; ``[i]`` equals
        ``Clifford.from_index(n, indices[i]).unitary()`` (same global-phase rule).

    Notes
    -----
    For n <= 2 the full table is built once per process on first use; for n = 3 each unique
    index is computed once and kept in a bounded cache.
    """
    n = _pauli.check_n_qubits(n_qubits)
    idx = _check_indices(n, indices)
    d = 2**n
    if n <= 2:
        return _unitary_table(n)[idx]
    if idx.size == 0:
        return np.zeros((0, d, d), dtype=complex)
    return _n3_batch(_N3_UNITARIES, _unitaries_from_tableaux, idx, (d, d), complex)


def clifford_ptms(n_qubits: int, indices: np.ndarray) -> np.ndarray:
    """Pauli transfer matrices of Clifford elements given by index.

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    indices : array_like of int
        ``(k,)`` indices in ``[0, clifford_group_order(n))``.

    Returns
    -------
    numpy.ndarray
        ``(k, d*d, d*d)`` float signed permutation matrices, ``R[i, j] = tr(P_i U P_j U^+) / d``
        in the Pauli order of :mod:`robusttomo._pauli`; a fresh array.

    Notes
    -----
    For n <= 2 the full table is built once per process; for n = 3 a bounded per-index cache.
    """
    n = _pauli.check_n_qubits(n_qubits)
    idx = _check_indices(n, indices)
    dd = 4**n
    if n <= 2:
        return _ptm_table(n)[idx]
    if idx.size == 0:
        return np.zeros((0, dd, dd), dtype=float)
    return _n3_batch(_N3_PTMS, _ptms_from_tableaux, idx, (dd, dd), float)


def clifford_circuits(n_qubits: int, indices: np.ndarray) -> list[Circuit]:
    """Circuits (as in :meth:`Clifford.circuit`) of Clifford elements given by index.

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    indices : array_like of int
        ``(k,)`` indices in ``[0, clifford_group_order(n))``.

    Returns
    -------
    list of tuple of (str, tuple of int)
        ``k`` circuits in time order.
    """
    n = _pauli.check_n_qubits(n_qubits)
    idx = _check_indices(n, indices)
    if n <= 2:
        table = _circuit_table(n)
        return [table[i] for i in idx.tolist()]

    def compute(keys: np.ndarray) -> list:
        s, r = _decode(3, keys)
        return [_synthesize(3, s[i], r[i]) for i in range(keys.size)]

    return _N3_CIRCUITS.get_many(idx, compute)


@functools.lru_cache(maxsize=None)
def _all_cliffords(n: int) -> tuple[Clifford, ...]:
    s, r = _tableau_table(n)
    out = []
    for i in range(s.shape[0]):
        c = Clifford._trusted(n, s[i], r[i])
        object.__setattr__(c, "_index", i)
        out.append(c)
    return tuple(out)


def all_cliffords(n_qubits: int) -> tuple[Clifford, ...]:
    """Every element of the n-qubit Clifford group (n = 1 or 2), in index order.

    Parameters
    ----------
    n_qubits : int
        1 or 2 (three qubits have 92897280 elements: sample them instead).

    Returns
    -------
    tuple of Clifford
        ``clifford_group_order(n_qubits)`` elements; element ``i`` has index ``i``.
    """
    n = _pauli.check_n_qubits(n_qubits)
    if n > 2:
        raise ValueError(f"'n_qubits' must be 1 or 2 for the full enumeration; got {n_qubits!r}")
    return _all_cliffords(n)
