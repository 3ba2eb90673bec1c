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
    ptms = clifford_ptms(n, idx)
    labels = tuple(_circuit_label(c) for c in clifford_circuits(n, idx))
    return ProbeSet(n, labels, _readonly(ptms), _readonly(idx.astype(np.int64)), _condition(ptms))


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
    dd = (4**n - 1) ** 2
    if n <= 2:
        cand = np.arange(clifford_group_order(n), dtype=np.int64)
    else:  # a fixed pool: the group is too large to scan (92897280 elements)
        rng = np.random.default_rng(20261201)
        cand = np.unique(rng.integers(1, clifford_group_order(3), size=dd + 2000))
        cand = np.concatenate([[0], cand])
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
    independent, chosen by a greedy Gram-Schmidt scan of the Clifford group in index order
    (largest residual first).  ``overcomplete=True`` gives all 24 one-qubit Cliffords, or two
    disjoint bases (450 probes) for two qubits.  For three qubits the scan runs over a fixed
    pseudo-random pool of Cliffords.
    """
    from robusttomo._probe_tables import BASES, SECOND_BASES

    n = _pauli.check_n_qubits(n_qubits)
    if n == 1 and overcomplete:
        idx: tuple[int, ...] = tuple(range(24))
    elif n in BASES:
        idx = tuple(BASES[n]) + (tuple(SECOND_BASES[n]) if overcomplete else ())
    else:
        idx = _default_indices(n, bool(overcomplete))
    return _cached_probes(n, idx)


@functools.lru_cache(maxsize=8)
def _cached_probes(n: int, idx: tuple[int, ...]) -> ProbeSet:
    return probes_from_cliffords(n, np.array(idx, dtype=np.int64))


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


def _z_matrix(n: int) -> np.ndarray:
    """``Z[x, i] = <x|P_i|x>``, shape ``(d, d*d)``."""
    p = _pauli.pauli_stack(n)
    return np.einsum("ixx->xi", p).real.copy()


def _measured_and_ideal(r: np.ndarray, w: np.ndarray, z: np.ndarray, d: int, p_ideal: np.ndarray | None):
    """From final Pauli vectors ``r`` (K, Q, d*d): per-sequence F and G, and outcome probabilities."""
    q = np.einsum("xi,kqi->kqx", z, r) / d  # ideal probabilities with the probe inserted
    kap = kappa(d)
    f = kap * (np.einsum("kqx,kx->kq", q, w) - 1.0 / d)
    if p_ideal is None:
        return f, None, q
    g = kap * (np.einsum("kqx,kx->kq", q, p_ideal) - 1.0 / d)
    return f, g, q


def _propagate(step_ptms: np.ndarray, probe_ptms: np.ndarray, final: np.ndarray | None, e0: np.ndarray) -> np.ndarray:
    """Pauli vectors ``final W_m A W_(m-1) ... A W_1 e0`` for every sequence and probe.

    step_ptms (K, m, d2, d2), probe_ptms (Q, d2, d2) -> (K, Q, d2).
    """
    k, m = step_ptms.shape[:2]
    r = np.einsum("kij,j->ki", step_ptms[:, 0], e0)
    r = np.broadcast_to(r[:, None, :], (k, probe_ptms.shape[0], r.shape[-1]))
    for t in range(1, m):
        r = np.einsum("qij,kqj->kqi", probe_ptms, r, optimize=True)
        r = np.einsum("kij,kqj->kqi", step_ptms[:, t], r, optimize=True)
    if final is not None:
        r = np.einsum("ij,kqj->kqi", final, r)
    return np.ascontiguousarray(r)


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
        lam_ideal = np.eye(d2)
    phys = np.einsum("pij,jk->pik", probes.ptms, lam_ideal)  # probes B o G (G first)
    final = None if gate is None else gate
    z = _z_matrix(n)
    e0 = z[0].copy()  # Pauli vector of |0><0|: tr(P_i |0><0|) = <0|P_i|0>
    mu_base = (np.trace(probes.ptms, axis1=1, axis2=2) - 1.0) / (d2 - 1)
    ident = probes.identity_index
    # information rule needs the length-1 and length-2 estimates first
    grouped: dict[int, list] = {m: [] for m in lengths}
    for b in blocks:
        grouped[b.length].append(b)

    def block_arrays(m: int):
        idx = np.concatenate([b.cliffords for b in grouped[m]], axis=0)
        cnt = np.concatenate([counts.for_block(plan, b) for b in grouped[m]], axis=0)  # type: ignore[attr-defined]
        shots = cnt.sum(axis=1)
        w = cnt / shots[:, None]
        steps = clifford_ptms(n, idx.reshape(-1)).reshape(idx.shape[0], m, d2, d2)
        return steps, w, shots

    stats: list[LengthStats] = []
    m2 = (None, None, None, None)
    lam2 = None
    c1 = None
    for m in lengths:
        steps, w, shots = block_arrays(m)
        ideal_r = _propagate(steps, lam_ideal[None], final, e0)  # as run, no error
        p_ideal = np.clip(np.einsum("xi,ki->kx", z, ideal_r[:, 0]) / d, 0.0, None)
        if m == 1:
            f, g, _ = _measured_and_ideal(ideal_r, w, z, d, p_ideal)
            sel = np.zeros(1, dtype=np.int64)  # stands for every probe
            stats.append(LengthStats(1, sel, f, g, np.ones(1), shots))
            c1 = float(np.mean(f[:, 0] - (g[:, 0] - 1.0)))
            continue
        if m == 2:
            sq = np.sqrt(d)
            last = steps[:, 1] if final is None else np.einsum("ij,kjl->kil", final, steps[:, 1])
            v = np.einsum("kij,j->ki", steps[:, 0], e0)[:, 1:] / sq
            zw = w @ z  # (K, d2): sum_x w(x) Z[x, :]
            zp = p_ideal @ z
            u = np.einsum("kji,kj->ki", last, zw)[:, 1:] / sq
            u_id = np.einsum("kji,kj->ki", last, zp)[:, 1:] / sq
            kap = kappa(d)
            bl = phys[:, 1:, 1:]
            bv = np.einsum("pij,kj->kpi", bl, v, optimize=True)
            f = kap * np.einsum("kpi,ki->kp", bv, u, optimize=True)
            g = kap * np.einsum("kpi,ki->kp", bv, u_id, optimize=True)
            sel = np.arange(probes.n_probes, dtype=np.int64)
            stats.append(LengthStats(2, sel, f, g, mu_base.copy(), shots))
            m2 = (u, v, u_id, lam_ideal[1:, 1:] / ((d2 - 1) * kap))
            lam2 = np.mean(f - (g - mu_base), axis=0) / c1 if c1 else None
            continue
        if lam2 is None:
            sel = np.arange(probes.n_probes) if ident is None else np.array([ident])
        else:
            keep = (m - 1) * np.abs(np.clip(lam2, -1, 1)) ** (m - 2) >= INFO_THRESHOLD
            if ident is not None:
                keep[ident] = True
            sel = np.flatnonzero(keep)
        sel = sel.astype(np.int64)
        r = _propagate(steps, phys[sel], final, e0)
        f, g, _ = _measured_and_ideal(r, w, z, d, p_ideal)
        stats.append(LengthStats(m, sel, f, g, mu_base[sel] ** (m - 1), shots))

    return Correlations(n, kind, probes, tuple(lengths), tuple(stats), m2[0], m2[1], m2[2], m2[3], gate)
