"""Probe correlations: the filtered, SPAM-robust statistics of every probe at every length.

For a probe unitary channel ``A`` and one recorded outcome ``x`` of a sequence
``C = (C_1 .. C_m)`` the filtered correlation is (``../THEORY.md``, "The identity")::

    F_A(x; C) = kappa * ( <x| W_m A W_(m-1) A ... A W_1 (|0><0|) |x> - 1/d ),
    kappa = d (d + 1) / (d - 1),

the ideal outcome probability of the same sequence with ``A`` inserted between consecutive
Cliffords, minus its uniform part.  Its mean over sequences and outcomes is
``f_A(m) = c * lambda_A ** (m - 1)`` with ``c`` shared by every probe.  The law rests on
Schur's lemma for the Clifford twirl ("A general framework for randomized benchmarking",
PRX Quantum 3, 020357 (2022); "Robust extraction of tomographic information via randomized
benchmarking", Phys. Rev. X 4, 011050 (2014)).

Interleaved blocks run ``C_1, G, C_2, G, ..., C_m, G``.  The fixed channel after every random
Clifford is then ``Lambda = L_G o G o L = L_int o G`` and the physical probes are ``B o G``
(``G`` first, then the probe ``B``), so ``lambda_(B o G) = tr(B_B^T B_int) / (d*d - 1)``
measures the composite error ``L_int = L_G o (G L G^dagger)``.  The ideal propagation of an
interleaved sequence ends with the final ``G`` (an ideal ``G`` before the measurement), which
keeps the shared constant ``c`` close to 1 for any ``G``.

Rules implemented here (documented in docs/method-estimation.md):

* Length 1 carries no probe: ``f(1) = c`` for every probe.
* Length 2: every probe value is linear in the probe, ``F_A = kappa * u^T B_A v`` per shot,
  so the sufficient statistic ``M = mean(u v^T)`` is computed once and every probe's value is
  read off it; the probe set's size costs nothing there.
* Lengths ``m >= 3`` are propagated only for probes whose decay is slow enough to carry
  information there: with ``lambda_2`` the length-2 estimate ``f_A(2) / f(1)``, length ``m``
  is kept when ``(m - 1) |lambda_2| ** (m - 2) >= 0.2``, i.e. when it holds at least about
  4 % of the length-2 Fisher information about ``lambda_A`` (equal noise assumed).  The
  identity probe is kept at every length.
* Control variate (standard Monte Carlo practice): each sequence's exactly computable
  ideal-device expectation ``G_s`` has a known group average ``mu``; the estimate is
  ``mean(F_s) - beta (mean(G_s) - mu)`` with one scalar ``beta`` per (probe, length) fitted by
  least squares, ``beta = 1`` when every ``G_s`` is equal.  For the statistic ``M`` one scalar
  ``beta`` serves the whole matrix (one per entry is biased and gains nothing).
"""

from __future__ import annotations

import enum
import functools
from dataclasses import dataclass, field

import numpy as np

from robusttomo import _pauli
from robusttomo.clifford import clifford_circuits, clifford_group_order, clifford_ptms

__all__ = [
    "Correlations",
    "LengthStats",
    "ProbeSet",
    "compute_correlations",
    "default_probes",
    "probes_from_cliffords",
    "probes_from_unitaries",
]

#: Length ``m >= 3`` is kept for a probe when ``(m-1) |lambda_2|**(m-2)`` reaches this value.
INFO_THRESHOLD = 0.2


def kappa(d: int) -> float:
    """Filter normalization ``d (d + 1) / (d - 1)``."""
    return d * (d + 1) / (d - 1)


# ---- probes ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class ProbeSet:
    """A set of unitary probe channels ``B`` with their Pauli transfer matrices.

    Attributes
    ----------
    n_qubits : int
    labels : tuple of str, length P
        Stable, human-readable labels: the compiled circuit of a Clifford probe (gates
        separated by spaces, qubits as digits, e.g. ``"h0 cz01"``; ``"I"`` for the
        identity) or a user label.  The identity probe comes first in default sets.
    ptms : ndarray, shape (P, d*d, d*d), float
        PTMs of the probes in the normalized Pauli basis.
    clifford_indices : ndarray, shape (P,), int64
        Clifford index of each probe (``robusttomo.clifford`` convention), -1 if not a Clifford.
    condition_number : float
        2-norm condition number of the ``(P, D*D)`` matrix of flattened unital blocks
        (``D = d*d - 1``); finite iff the probes span the unital block (needs ``P >= D*D``).
        For the shipped three-qubit basis this is the stored value, recomputed by the tests.
    """

    n_qubits: int
    labels: tuple[str, ...]
    ptms: np.ndarray
    clifford_indices: np.ndarray
    condition_number: float

    @property
    def n_probes(self) -> int:
        """Number of probes ``P``."""
        return len(self.labels)

    @property
    def unital_blocks(self) -> np.ndarray:
        """Unital blocks ``B = R[1:, 1:]``, shape ``(P, D, D)``."""
        return self.ptms[:, 1:, 1:]

    @property
    def identity_index(self) -> int | None:
        """Position of the identity probe, or None."""
        eye = np.eye(self.ptms.shape[1])
        for i, r in enumerate(self.ptms):
            if np.allclose(r, eye, atol=1e-12):
                return i
        return None


def _circuit_label(circuit: tuple) -> str:
    if not circuit:
        return "I"
    return " ".join(name + "".join(str(q) for q in qubits) for name, qubits in circuit)


def _condition(ptms: np.ndarray) -> float:
    blocks = ptms[:, 1:, 1:].reshape(ptms.shape[0], -1)
    if blocks.shape[0] < blocks.shape[1]:
        return float("inf")
    s = np.linalg.svd(blocks, compute_uv=False)
    return float(s[0] / s[-1]) if s[-1] > 1e-12 * s[0] else float("inf")


def _readonly(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def probes_from_cliffords(n_qubits: int, indices: object) -> ProbeSet:
    """Probe set from Clifford indices (``robusttomo.clifford`` index convention).

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    indices : sequence of int
        Clifford indices, each in ``[0, clifford_group_order(n_qubits))``, no repeats.
    """
    n = _pauli.check_n_qubits(n_qubits)
    idx = np.asarray(indices)
    if idx.ndim != 1 or idx.size == 0 or not np.issubdtype(idx.dtype, np.integer):
        raise ValueError(f"'indices' must be a non-empty list of integers; got {indices!r}")
    order = clifford_group_order(n)
    if idx.min() < 0 or idx.max() >= order:
        raise ValueError(f"'indices' must lie in [0, {order}); got min {idx.min()}, max {idx.max()}")
    if np.unique(idx).size != idx.size:
        raise ValueError("'indices' must not repeat a Clifford")
    return _clifford_probes(n, idx.astype(np.int64), None)


def _clifford_probes(n: int, idx: np.ndarray, condition: float | None) -> ProbeSet:
    """ProbeSet of validated Clifford indices; ``condition`` given for shipped tables.

    A shipped table carries its (test-checked) condition number: the SVD of the (3969, 3969)
    three-qubit matrix would take tens of seconds on every first use.
    """
    ptms = clifford_ptms(n, idx)
    labels = tuple(_circuit_label(c) for c in clifford_circuits(n, idx))
    cond = _condition(ptms) if condition is None else float(condition)
    return ProbeSet(n, labels, _readonly(ptms), _readonly(idx), cond)


def probes_from_unitaries(unitaries: object, labels: object) -> ProbeSet:
    """Probe set from user unitaries ``(P, d, d)`` with one label each."""
    us = np.asarray(unitaries, dtype=complex)
    if us.ndim != 3 or us.shape[1] != us.shape[2]:
        raise ValueError(f"'unitaries' must have shape (P, d, d); got {us.shape}")
    d = us.shape[1]
    n = _pauli.check_n_qubits(d.bit_length() - 1, name="qubits of 'unitaries'")
    if d != 2**n:
        raise ValueError(f"'unitaries' must be 2**n x 2**n matrices; got {d} x {d}")
    eye = np.eye(d)
    for i, u in enumerate(us):
        if not np.allclose(u.conj().T @ u, eye, atol=1e-8):
            raise ValueError(f"'unitaries'[{i}] is not unitary (U^dagger U != I to 1e-8)")
    labs = tuple(str(x) for x in labels)  # type: ignore[union-attr]
    if len(labs) != us.shape[0] or len(set(labs)) != len(labs):
        raise ValueError(f"'labels' must be {us.shape[0]} distinct strings; got {len(labs)}")
    ptms = _pauli.ptms_of_unitaries(us)
    return ProbeSet(n, labs, _readonly(ptms), _readonly(np.full(len(labs), -1, np.int64)), _condition(ptms))


def _greedy_basis(blocks: np.ndarray, first: int, count: int, exclude: np.ndarray) -> list[int]:
    """Deterministic greedy Gram-Schmidt selection of ``count`` rows of ``blocks``.

    Starts with row ``first``; each step takes the candidate with the largest residual norm
    after projecting out the chosen rows (norms rounded to 1e-9, ties to the lowest index), so
    the choice does not depend on floating-point noise of a particular BLAS.  Residual norms
    are updated incrementally, one matrix-vector product per step.
    """
    x = np.asarray(blocks, dtype=float)
    norms = np.einsum("ij,ij->i", x, x)
    avail = np.ones(x.shape[0], dtype=bool)
    avail[exclude] = False
    basis: list[np.ndarray] = []
    chosen: list[int] = []
    k = first
    while True:
        v = x[k].copy()
        for q in basis:  # re-orthogonalize explicitly: stable even over thousands of steps
            v -= (v @ q) * q
        nv = np.linalg.norm(v)
        if nv <= 1e-6:
            raise RuntimeError("candidate probes do not span the unital block")
        q = v / nv
        basis.append(q)
        chosen.append(k)
        avail[k] = False
        if len(chosen) == count:
            return chosen
        norms = norms - (x @ q) ** 2
        score = np.where(avail, np.round(norms, 9), -1.0)
        k = int(np.argmax(score))  # first maximum: lowest index on ties


@functools.lru_cache(maxsize=None)
def _default_indices(n: int, overcomplete: bool) -> tuple[int, ...]:
    # one and two qubits (the whole group is scanned); three qubits: robusttomo/_probe_tables3.py
    if n > 2:
        raise ValueError(f"the greedy scan covers 1 and 2 qubits; got {n}")
    dd = (4**n - 1) ** 2
    cand = np.arange(clifford_group_order(n), dtype=np.int64)
    blocks = clifford_ptms(n, cand)[:, 1:, 1:].reshape(cand.size, -1)
    if n == 1 and overcomplete:
        return tuple(int(i) for i in cand)  # all 24 one-qubit Cliffords
    first = _greedy_basis(blocks, 0, dd, np.zeros(0, dtype=np.int64))
    if not overcomplete:
        return tuple(int(cand[i]) for i in first)
    second = _greedy_basis(blocks, int(np.setdiff1d(np.arange(cand.size), first)[0]), dd,
                           np.array(first, dtype=np.int64))
    return tuple(int(cand[i]) for i in first + second)


def default_probes(n_qubits: int, *, overcomplete: bool = False) -> ProbeSet:
    """The default, deterministic, well-conditioned Clifford probe basis, identity first.

    ``(d*d - 1)**2`` probes (9, 225, 3969 for 1, 2, 3 qubits) whose unital blocks are linearly
    independent, read from shipped tables.  One and two qubits: a greedy Gram-Schmidt scan of
    the Clifford group in index order (largest residual first; ``_default_indices``).  Three
    qubits: Pauli variants of a greedy cover of the block patterns, thinned by backward
    optimal-design selection (``benchmarks/make_probe_table3.py``; condition number 182.2
    instead of about 14000 for a greedy scan of random Cliffords).  ``overcomplete=True``
    gives all 24 one-qubit Cliffords, or two disjoint bases (450 probes) for two qubits; it is
    not offered for three qubits.
    """
    from robusttomo._probe_tables import BASES, SECOND_BASES

    n = _pauli.check_n_qubits(n_qubits)
    if n == 3:
        if overcomplete:
            raise ValueError("'overcomplete' is not offered for 3 qubits (3969 probes already); got True")
        from robusttomo._probe_tables3 import BASIS, CONDITION_NUMBER

        return _cached_probes(3, tuple(BASIS), float(CONDITION_NUMBER))
    if n == 1 and overcomplete:
        idx: tuple[int, ...] = tuple(range(24))
    else:
        idx = tuple(BASES[n]) + (tuple(SECOND_BASES[n]) if overcomplete else ())
    return _cached_probes(n, idx, None)


@functools.lru_cache(maxsize=8)
def _cached_probes(n: int, idx: tuple[int, ...], condition: float | None) -> ProbeSet:
    if condition is None:
        return probes_from_cliffords(n, np.array(idx, dtype=np.int64))
    return _clifford_probes(n, np.array(idx, dtype=np.int64), condition)


# ---- correlations ---------------------------------------------------------------------------
class BlockKind(enum.Enum):
    """Which run a block of statistics belongs to."""

    REFERENCE = "reference"
    INTERLEAVED = "interleaved"


@dataclass(frozen=True)
class LengthStats:
    """Per-sequence statistics of one sequence length, for the probes propagated there.

    Attributes
    ----------
    length : int
        Number of random Cliffords ``m``.
    probes : ndarray, shape (Q,), int64
        Positions (in the probe set) of the probes evaluated at this length; all probes at
        ``m <= 2``.
    values : ndarray, shape (K, Q), float
        Per-sequence filtered correlation ``F_s`` (outcomes weighted by counts).
    ideal : ndarray, shape (K, Q), float
        Per-sequence ideal-device expectation ``G_s`` (control variate).
    mu : ndarray, shape (Q,), float
        Exact group average of ``G_s``.
    shots : ndarray, shape (K,), float
        Shots per sequence.
    """

    length: int
    probes: np.ndarray
    values: np.ndarray
    ideal: np.ndarray
    mu: np.ndarray
    shots: np.ndarray


@dataclass(frozen=True)
class Correlations:
    """Everything the decay fit and the bootstrap need, computed once from plan and counts.

    Attributes
    ----------
    n_qubits : int
    kind : BlockKind
        Reference run, or interleaved run (statistics of the composite ``L_int``).
    probes : ProbeSet
        The probes ``B`` (in interleaved mode the physical probes are ``B o G``).
    lengths : tuple of int
        Sequence lengths, increasing.
    stats : tuple of LengthStats
        One entry per length.
    m2_u, m2_v, m2_u_ideal : ndarray, shape (K2, D), or None
        Per-sequence factors of the length-2 statistic ``M_s = u_s v_s^T`` (measured and
        ideal-device ``u``), ``D = d*d - 1``; normalized Pauli basis.  None without length 2.
    m2_mu : ndarray, shape (D, D), or None
        Exact group average of the ideal-device ``M_s``.
    gate_ptm : ndarray, shape (d*d, d*d), or None
        PTM of the interleaved gate ``G`` (interleaved mode only).
    """

    n_qubits: int
    kind: BlockKind
    probes: ProbeSet
    lengths: tuple[int, ...]
    stats: tuple[LengthStats, ...]
    m2_u: np.ndarray | None
    m2_v: np.ndarray | None
    m2_u_ideal: np.ndarray | None
    m2_mu: np.ndarray | None
    gate_ptm: np.ndarray | None = field(default=None)

    def stats_for(self, length: int) -> LengthStats:
        """The statistics of one length."""
        for s in self.stats:
            if s.length == length:
                return s
        raise KeyError(f"no sequences of length {length}")


@functools.lru_cache(maxsize=None)
def _z_matrix(n: int) -> np.ndarray:
    """``Z[x, i] = <x|P_i|x>``, shape ``(d, d*d)``, read-only (one per process)."""
    p = _pauli.pauli_stack(n)
    return _readonly(np.einsum("ixx->xi", p).real)


@functools.lru_cache(maxsize=None)
def _eye(d2: int) -> np.ndarray:
    """Read-only identity matrix (one per process)."""
    return _readonly(np.eye(d2))


def _probe_constants(probes: ProbeSet) -> tuple[np.ndarray, int | None]:
    """``(mu_base, identity position)`` of a probe set, computed once per ProbeSet object.

    ``mu_base[p] = (tr R_p - 1)/(d*d - 1)``.  Kept in the instance's ``__dict__`` (a
    ProbeSet is frozen and its arrays are read-only when built by this module's constructors).
    """
    got = probes.__dict__.get("_constants")
    if got is None or got[0] is not probes.ptms:
        d2 = probes.ptms.shape[1]
        mu = _readonly((np.einsum("pii->p", probes.ptms) - 1.0) / (d2 - 1))
        got = (probes.ptms, mu, _identity_position(probes))
        probes.__dict__["_constants"] = got
    return got[1], got[2]


#: Target size (array elements) of the per-chunk working arrays of the propagation.
_CHUNK_ELEMENTS = 1 << 21


def _signed_permutations(mats: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """``(perm, sign)`` with ``mats[..., i, :] = sign[..., i] * e_(perm[..., i])``, or None.

    Clifford PTMs are signed permutation matrices, so ``mats @ r`` is the gather
    ``sign * r[perm]``: exact (a dense product only adds zeros) at ``1/d2`` of the cost.
    None when any matrix has a row that is not a signed unit vector.
    """
    flat = mats.reshape(-1, mats.shape[-1])
    perm = np.argmax(np.abs(flat), axis=-1)
    sign = flat[np.arange(flat.shape[0]), perm]
    if not (np.all(np.abs(sign) == 1.0) and np.count_nonzero(flat) == perm.size):
        return None
    return perm.reshape(mats.shape[:-1]), sign.reshape(mats.shape[:-1])


@functools.lru_cache(maxsize=None)
def _permutation_table(n: int) -> tuple[np.ndarray, np.ndarray]:
    """(perm, sign) of every Clifford's PTM for ``n <= 2``, shape ``(|C_n|, d2)``, read-only."""
    ps = _signed_permutations(clifford_ptms(n, np.arange(clifford_group_order(n), dtype=np.int64)))
    assert ps is not None  # Clifford PTMs are signed permutations
    return _readonly(ps[0]), _readonly(ps[1])


def _step_permutations(n: int, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Clifford PTMs of ``idx`` (any shape) as (perm, sign) arrays of shape ``idx.shape + (d2,)``.

    One and two qubits read a per-process table; three qubits look the PTMs up in chunks, so
    that the dense ``(d2, d2)`` matrices of a large block never exist at once.
    """
    d2 = 4**n
    flat = np.asarray(idx, dtype=np.int64).reshape(-1)
    if n <= 2:
        tp, ts = _permutation_table(n)
        return tp[flat].reshape(idx.shape + (d2,)), ts[flat].reshape(idx.shape + (d2,))
    perm = np.empty((flat.size, d2), dtype=np.intp)
    sign = np.empty((flat.size, d2))
    step = max(1, _CHUNK_ELEMENTS // (d2 * d2))
    for a in range(0, flat.size, step):
        ps = _signed_permutations(clifford_ptms(n, flat[a:a + step]))
        assert ps is not None  # Clifford PTMs are signed permutations
        perm[a:a + step], sign[a:a + step] = ps
    return perm.reshape(idx.shape + (d2,)), sign.reshape(idx.shape + (d2,))


def _propagate_signed(perm: np.ndarray, sign: np.ndarray, probe_ptms: np.ndarray, final: np.ndarray | None,
                      e0: np.ndarray) -> np.ndarray:
    """Pauli vectors ``final W_m A W_(m-1) ... A W_1 e0``, layout ``(Q, K, d2)``.

    ``perm``, ``sign`` ``(K, m, d2)``: the Clifford steps as signed permutations; probe_ptms
    ``(Q, d2, d2)`` (gathered too when they are signed permutations); final ``(d2, d2)`` or None.
    Every gather is a ``take`` with flat indices computed once, so a step costs two numpy
    calls whatever the length.
    """
    k, m, d2 = perm.shape
    q = probe_ptms.shape[0]
    r = sign[:, 0] * e0[perm[:, 0]]  # (K, d2)
    r = np.broadcast_to(r, (q, k, d2)).copy().reshape(q, k * d2)  # a writable copy, also for q = 1
    if m > 1:
        probe_op = _signed_permutations(probe_ptms)
        identity = bool(probe_op is not None and np.all(probe_op[1] == 1.0) and np.array_equal(
            probe_op[0], np.broadcast_to(np.arange(d2), probe_op[0].shape)))
        if identity:
            probe_op = None  # only identity probes: the probe step is nothing
        if probe_op is not None:
            pidx = (np.arange(q)[:, None, None] * (k * d2) + np.arange(k)[None, :, None] * d2
                    + probe_op[0][:, None, :]).reshape(-1)
            psign = probe_op[1][:, None, :]
        elif not identity:
            dense_t = np.swapaxes(probe_ptms, -1, -2)
        sidx = (np.arange(k)[None, :, None] * d2 + np.swapaxes(perm[:, 1:], 0, 1)).reshape(m - 1, k * d2)
        ssign = np.swapaxes(sign[:, 1:], 0, 1).reshape(m - 1, k * d2)
        buf = np.empty_like(r)
        for t in range(m - 1):
            if probe_op is not None:
                # the indices are in range; mode "clip" lets take write into ``out`` unbuffered
                r.reshape(-1).take(pidx, out=buf.reshape(-1), mode="clip")
                np.multiply(buf.reshape(q, k, d2), psign, out=r.reshape(q, k, d2))
            elif not identity:
                r = np.matmul(r.reshape(q, k, d2), dense_t).reshape(q, k * d2)
            r.take(sidx[t], axis=1, out=buf, mode="clip")
            np.multiply(buf, ssign[t], out=r)
    r = r.reshape(q, k, d2)
    if final is not None:
        r = r @ final.T
    return r


def _ideal_run(perm: np.ndarray, sign: np.ndarray, gate: np.ndarray | None, final: np.ndarray | None,
               e0: np.ndarray) -> np.ndarray:
    """Pauli vectors ``final W_m G ... G W_1 e0`` of the error-free sequences, ``(K, d2)``.

    :func:`_propagate_signed` with the one probe ``G`` (the identity when None), without its
    set-up: the short lengths of every run need only this.
    """
    if gate is None:
        r = _error_free_walk(perm, sign, e0)
        return r if final is None else r @ final.T
    k, m, d2 = perm.shape
    r = sign[:, 0] * e0[perm[:, 0]]
    if m > 1:
        rows = np.arange(0, k * d2, d2)[:, None]
        for t in range(1, m):
            r = r @ gate.T
            r = r.take(perm[:, t] + rows)  # flat gather: r[k, perm[k, t, i]]
            r *= sign[:, t]
    return r if final is None else r @ final.T


def _propagate(step_ptms: np.ndarray, probe_ptms: np.ndarray, final: np.ndarray | None, e0: np.ndarray) -> np.ndarray:
    """Pauli vectors ``final W_m A W_(m-1) ... A W_1 e0`` for every sequence and probe.

    step_ptms (K, m, d2, d2), probe_ptms (Q, d2, d2) -> (K, Q, d2).  Steps that are signed
    permutations (Clifford PTMs) are applied as gathers, any others as dense products.
    """
    ops = _signed_permutations(step_ptms)
    if ops is not None:
        return np.ascontiguousarray(np.swapaxes(_propagate_signed(*ops, probe_ptms, final, e0), 0, 1))
    k, m = step_ptms.shape[:2]
    r = np.einsum("kij,j->ki", step_ptms[:, 0], e0)
    r = np.broadcast_to(r[None], (probe_ptms.shape[0],) + r.shape)
    for t in range(1, m):
        r = np.matmul(r, np.swapaxes(probe_ptms, -1, -2))
        r = np.einsum("kij,qkj->qki", step_ptms[:, t], r)
    if final is not None:
        r = r @ final.T
    return np.ascontiguousarray(np.swapaxes(r, 0, 1))


def _filtered(r: np.ndarray, zw: np.ndarray, d: int) -> np.ndarray:
    """Per-sequence filtered value ``kappa (sum_x w(x) <x|rho|x> - 1/d)`` from ``r`` (Q, K, d2).

    ``zw`` (K, d2) is ``w @ Z``: ``sum_x w(x) <x|rho|x> = r . zw / d``.  Returns (K, Q).
    """
    return kappa(d) * (np.einsum("qki,ki->kq", r, zw) / d - 1.0 / d)


def _length_two_values(phys: np.ndarray, u: np.ndarray, u_id: np.ndarray, v: np.ndarray, kap: float):
    """Per-sequence length-2 values ``kappa u_s^T B_p v_s`` of every probe, measured and ideal.

    One matrix product per chunk of sequences: the flattened outer products ``u_s v_s^T``
    ``(2K, D*D)`` (measured and ideal) times the flattened unital blocks ``(D*D, P)``, so no
    ``(K, P, D)`` intermediate is formed.  (Sharing one product ``v @ [B_p^T]`` between the
    measured and ideal values was measured 7% slower for two qubits and much slower for three,
    docs/benchmarks.md.)  Returns f, g, each (K, P).
    """
    p = phys.shape[0]
    dd = u.shape[1]
    blocks = phys[:, 1:, 1:].reshape(p, dd * dd).T  # (D*D, P); a copy: the slice is strided
    k = u.shape[0]
    f = np.empty((k, p))
    g = np.empty((k, p))
    kc = max(1, _CHUNK_ELEMENTS // (2 * max(p, dd * dd)))
    for a in range(0, k, kc):
        sl = slice(a, a + kc)
        outer = (np.concatenate([u[sl], u_id[sl]])[:, :, None] * np.concatenate([v[sl], v[sl]])[:, None, :])
        prod = outer.reshape(-1, dd * dd) @ blocks
        h = prod.shape[0] // 2
        f[sl] = kap * prod[:h]
        g[sl] = kap * prod[h:]
    return f, g


def _identity_position(probes: ProbeSet) -> int | None:
    """:attr:`ProbeSet.identity_index` without scanning every PTM of a Clifford probe set.

    Clifford index 0 is the identity and indices do not repeat, so its position is the answer.
    """
    hit = np.flatnonzero(probes.clifford_indices == 0)
    if hit.size and np.array_equal(probes.ptms[hit[0]], np.eye(probes.ptms.shape[1])):
        earlier = probes.clifford_indices[:hit[0]] < 0  # non-Clifford probes before it could be identities
        if not earlier.any():
            return int(hit[0])
    return probes.identity_index


def _kept_probes(m: int, lam2, ident, n_probes: int) -> np.ndarray:
    """Probes propagated at length ``m >= 3``: the information rule on the length-2 estimates."""
    if lam2 is None:
        sel = np.arange(n_probes) if ident is None else np.array([ident])
    else:
        keep = (m - 1) * np.minimum(np.abs(lam2), 1.0) ** (m - 2) >= INFO_THRESHOLD
        if ident is not None:
            keep[ident] = True
        sel = np.flatnonzero(keep)
    return sel.astype(np.int64)


def _error_free_walk(perm: np.ndarray, sign: np.ndarray, e0: np.ndarray) -> np.ndarray:
    """Pauli vectors ``W_m ... W_1 e0`` of the sequences ``(perm, sign)`` ``(K, m, d2)``: ``(K, d2)``.

    The error-free reference run, which is also the identity probe's propagated vector: the
    flat gather indices of every step computed at once, then two numpy calls per step.
    """
    k, m, d2 = perm.shape
    r = (sign[:, 0] * e0[perm[:, 0]]).reshape(-1)
    if m > 1:
        sidx = np.swapaxes(perm[:, 1:] + np.arange(0, k * d2, d2)[:, None, None], 0, 1).reshape(m - 1, k * d2)
        ssign = np.swapaxes(sign[:, 1:], 0, 1).reshape(m - 1, k * d2)
        buf = np.empty_like(r)
        for t in range(m - 1):
            # the indices are in range; mode "clip" lets take write into ``out`` unbuffered
            r.take(sidx[t], out=buf, mode="clip")
            np.multiply(buf, ssign[t], out=r)
    return r.reshape(k, d2)


def _long_length(m: int, perm, sign, shots, zw, sel, phys, lam_ideal, final, e0, z, d: int, mu_base,
                 ident: int | None = None, identity_is_ideal: bool = False) -> LengthStats:
    """Statistics of one length ``m >= 3`` for the probes ``sel``, by chunked propagation.

    The ideal run (the error-free sequence, for the control variate) rides along with the
    first chunk of probes, so long sequences are walked through once per chunk.  ``ident``:
    the identity probe's position; ``identity_is_ideal``: the caller has checked that the
    identity probe's physical PTM equals the ideal run's step (reference mode), so that a
    length keeping only it needs only the error-free walk, which gives the probe's vector and
    the ideal one at once.
    """
    k, _, d2 = perm.shape
    if identity_is_ideal and final is None and sel.size == 1 and int(sel[0]) == ident:
        r = _error_free_walk(perm, sign, e0)
        zp = np.maximum(r @ z.T / d, 0.0) @ z
        f = _filtered(r[None], zw, d)
        g = _filtered(r[None], zp, d)
        return LengthStats(m, sel, f, g, mu_base[sel] ** (m - 1), shots)
    f = np.empty((k, sel.size))
    g = np.empty((k, sel.size))
    qc = max(1, _CHUNK_ELEMENTS // (k * d2))  # probes per chunk: bounded working arrays
    first = min(sel.size, max(qc - 1, 1))
    r = _propagate_signed(perm, sign, np.concatenate([lam_ideal[None], phys[sel[:first]]]), final, e0)
    p_ideal = np.maximum(r[0] @ z.T / d, 0.0)
    zp = p_ideal @ z
    f[:, :first] = _filtered(r[1:], zw, d)
    g[:, :first] = _filtered(r[1:], zp, d)
    for a0 in range(first, sel.size, qc):
        r = _propagate_signed(perm, sign, phys[sel[a0:a0 + qc]], final, e0)
        f[:, a0:a0 + qc] = _filtered(r, zw, d)
        g[:, a0:a0 + qc] = _filtered(r, zp, d)
    return LengthStats(m, sel, f, g, mu_base[sel] ** (m - 1), shots)


def compute_correlations(plan: object, counts: object, *, probes: ProbeSet | None = None,
                         kind: BlockKind | str = BlockKind.REFERENCE) -> Correlations:
    """Filtered correlations of every probe, per sequence and length, from plan and counts.

    Parameters
    ----------
    plan : robusttomo.plan.Plan
        The plan that was run (its Clifford indices define every sequence's unitary).
    counts : robusttomo.counts.Counts
        Outcome counts (or exact ``shots * probabilities``) for the plan's sequences.
    probes : ProbeSet, optional
        Probe set ``B``; default :func:`default_probes`.
    kind : BlockKind or {"reference", "interleaved"}
        Which blocks of the plan to use.

    Returns
    -------
    Correlations
    """
    from robusttomo.plan import SequenceKind

    kind = BlockKind(kind)
    n = plan.n_qubits  # type: ignore[attr-defined]
    d = 2**n
    d2 = d * d
    probes = default_probes(n) if probes is None else probes
    if probes.n_qubits != n:
        raise ValueError(f"probe set is for {probes.n_qubits} qubits but the plan has {n}")
    want = SequenceKind.REFERENCE if kind is BlockKind.REFERENCE else SequenceKind.INTERLEAVED
    blocks = [b for b in plan.blocks if b.kind is want]  # type: ignore[attr-defined]
    if not blocks:
        raise ValueError(f"plan has no {kind.value} sequences")
    lengths = sorted({b.length for b in blocks})
    if 1 not in lengths:
        raise ValueError(f"the plan's {kind.value} lengths {lengths} lack length 1, which fixes the SPAM constant")

    if kind is BlockKind.INTERLEAVED:
        gate = _pauli.ptm_of_unitary(np.asarray(plan.interleave.unitary))  # type: ignore[attr-defined]
        lam_ideal = gate
    else:
        gate = None
        lam_ideal = _eye(d2)
    # probes B o G (G first); the reference run needs no product
    phys = probes.ptms if gate is None else np.matmul(probes.ptms, lam_ideal)
    final = None if gate is None else gate
    z = _z_matrix(n)
    e0 = z[0].copy()  # Pauli vector of |0><0|: tr(P_i |0><0|) = <0|P_i|0>
    mu_base, ident = _probe_constants(probes)
    identity_is_ideal = final is None and ident is not None and np.array_equal(phys[ident], lam_ideal)
    # information rule needs the length-1 and length-2 estimates first
    grouped: dict[int, list] = {m: [] for m in lengths}
    for b in blocks:
        grouped[b.length].append(b)

    def block_arrays(m: int):
        bl = grouped[m]
        if len(bl) == 1:
            idx, cnt = bl[0].cliffords, counts.for_block(plan, bl[0])  # type: ignore[attr-defined]
        else:
            idx = np.concatenate([b.cliffords for b in bl], axis=0)
            cnt = np.concatenate([counts.for_block(plan, b) for b in bl], axis=0)  # type: ignore[attr-defined]
        shots = cnt.sum(axis=1)
        w = cnt / shots[:, None]
        perm, sign = _step_permutations(n, idx)
        return perm, sign, w, shots

    stats: list[LengthStats] = []
    m2 = (None, None, None, None)
    lam2 = None
    c1 = None
    kap = kappa(d)
    for m in lengths:
        perm, sign, w, shots = block_arrays(m)
        k = perm.shape[0]
        zw = w @ z  # (K, d2): sum_x w(x) Z[x, :]
        if m >= 3:
            sel = _kept_probes(m, lam2, ident, probes.n_probes)
            stats.append(_long_length(m, perm, sign, shots, zw, sel, phys, lam_ideal, final, e0, z, d, mu_base, ident,
                                      identity_is_ideal))
            continue
        ideal_r = _ideal_run(perm, sign, gate, final, e0)  # as run, no error
        p_ideal = np.maximum(ideal_r @ z.T / d, 0.0)
        zp = p_ideal @ z
        if m == 1:
            f = _filtered(ideal_r[None], zw, d)
            g = _filtered(ideal_r[None], zp, d)
            sel = np.zeros(1, dtype=np.int64)  # stands for every probe
            stats.append(LengthStats(1, sel, f, g, np.ones(1), shots))
            c1 = float(np.mean(f[:, 0] - (g[:, 0] - 1.0)))
            continue
        if m == 2:
            sq = np.sqrt(d)
            rows = np.arange(k)[:, None]
            v = sign[:, 0] * e0[perm[:, 0]]  # W_1 e0
            # u = last^T y with last = W_2 (or G W_2): scatter through W_2's permutation
            u = np.zeros((k, d2))
            u_id = np.zeros((k, d2))
            u[rows, perm[:, 1]] = sign[:, 1] * (zw if final is None else zw @ final)
            u_id[rows, perm[:, 1]] = sign[:, 1] * (zp if final is None else zp @ final)
            v, u, u_id = v[:, 1:] / sq, u[:, 1:] / sq, u_id[:, 1:] / sq
            f, g = _length_two_values(phys, u, u_id, v, kap)
            sel = np.arange(probes.n_probes, dtype=np.int64)
            stats.append(LengthStats(2, sel, f, g, mu_base.copy(), shots))
            m2 = (u, v, u_id, lam_ideal[1:, 1:] / ((d2 - 1) * kap))
            lam2 = np.mean(f - (g - mu_base), axis=0) / c1 if c1 else None
    return Correlations(n, kind, probes, tuple(lengths), tuple(stats), m2[0], m2[1], m2[2], m2[3], gate)
