"""Figures of merit of a channel relative to an ideal operation.

Every function takes a :class:`robusttomo.channels.Channel` and, where it applies, a
``target``: ``None`` (the identity), a ``(d, d)`` unitary matrix, or a Channel.  Fidelities are
fidelities (1 = perfect); distances and error rates are errors (0 = perfect).

Conventions are those of :mod:`robusttomo.channels`: PTM ``R[i, j] = tr(P_i L(P_j)) / d`` in
Pauli order ``II, IX, IY, IZ, XI, ...`` (qubit 0 leftmost), trace-1 Choi matrix with the
input factor first.  Where an error channel is needed it is, as in the project's noise model
``L o U``, the error *after* the target: ``E = R R_target^T`` (``side="after"``); see
:func:`robusttomo.generators.error_ptm`.
"""

from __future__ import annotations

import enum
import functools
import threading
import warnings
from dataclasses import dataclass

import cvxpy as cp
import numpy as np

from robusttomo import _pauli
from robusttomo.channels import Channel
from robusttomo.generators import _target_ptm, error_ptm, rates_from_channel

__all__ = [
    "DiamondResult",
    "SolveStatus",
    "average_gate_fidelity",
    "coherent_share",
    "decay_to_error",
    "diamond_distance",
    "diamond_distance_details",
    "diamond_norm_of_difference",
    "entanglement_fidelity",
    "error_to_decay",
    "pauli_error_rates",
    "unitarity",
]


def _check_channel(channel: object) -> Channel:
    if not isinstance(channel, Channel):
        raise TypeError(f"'channel' must be a robusttomo Channel; got {type(channel).__name__}")
    return channel


# ---- fidelities -----------------------------------------------------------------------------
def entanglement_fidelity(channel: Channel, target: object = None) -> float:
    """Entanglement (process) fidelity to a unitary target, a fidelity (1 = perfect).

    ``F_e = tr(R_target^T R) / d**2``, the overlap of the maximally entangled state sent
    through ``channel`` with the one sent through the target.

    Parameters
    ----------
    channel : Channel
        Implemented operation, PTM ``R`` of shape ``(d*d, d*d)``.
    target : None, ndarray of shape (d, d), or Channel
        Ideal unitary (identity when None); a Channel target must be unitary.

    Returns
    -------
    float
        In ``[0, 1]`` for a CPTP channel.

    Examples
    --------
    >>> from robusttomo.channels import depolarizing
    >>> from robusttomo.metrics import entanglement_fidelity
    >>> round(entanglement_fidelity(depolarizing(1, 0.9)), 12)
    0.925
    """
    channel = _check_channel(channel)
    rt = _target_ptm(target, channel.n_qubits)
    return float(np.sum(rt * channel.ptm)) / channel.dim**2


def average_gate_fidelity(channel: Channel, target: object = None) -> float:
    """Average gate fidelity to a unitary target, a fidelity (1 = perfect).

    ``F_avg = (d F_e + 1) / (d + 1)``, the average of ``<psi| U^dagger L(psi) U |psi>`` over
    Haar-random pure states ("General teleportation channel, singlet fraction, and
    quasidistillation", PRA 60, 1888 (1999); "A simple formula for the average gate fidelity
    of a quantum dynamical operation", Phys. Lett. A 303, 249 (2002)).

    Parameters
    ----------
    channel : Channel
        Implemented operation.
    target : None, ndarray of shape (d, d), or Channel
        Ideal unitary (identity when None); a Channel target must be unitary.

    Returns
    -------
    float
        In ``[1/(d+1), 1]`` for a CPTP channel.

    Examples
    --------
    >>> from robusttomo.channels import depolarizing
    >>> from robusttomo.metrics import average_gate_fidelity
    >>> round(average_gate_fidelity(depolarizing(1, 0.9)), 12)
    0.95
    """
    fe = entanglement_fidelity(channel, target)
    d = channel.dim
    return (d * fe + 1) / (d + 1)


# ---- benchmarking decay <-> error rate ------------------------------------------------------
def _check_real(name: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"'{name}' must be a real number; got {value!r}")
    if not np.isfinite(value):
        raise ValueError(f"'{name}' must be finite; got {value!r}")
    return float(value)


def decay_to_error(p: float, n_qubits: int) -> float:
    """Benchmarking error rate ``r = (d - 1)(1 - p) / d`` from a decay ``p``.

    ``r`` is the average gate infidelity ``1 - F_avg`` of the depolarizing channel with decay
    ``p`` ("Scalable and robust randomized benchmarking of quantum processes", PRL 106,
    180504 (2011)).

    Parameters
    ----------
    p : float
        Decay parameter (1 = no error).
    n_qubits : int
        Number of qubits, 1..3 (``d = 2**n_qubits``).

    Returns
    -------
    float
        Error rate (0 = perfect).
    """
    d = 2 ** _pauli.check_n_qubits(n_qubits)
    return (d - 1) * (1 - _check_real("p", p)) / d


def error_to_decay(r: float, n_qubits: int) -> float:
    """Inverse of :func:`decay_to_error`: ``p = 1 - d r / (d - 1)``.

    Parameters
    ----------
    r : float
        Error rate (0 = perfect).
    n_qubits : int
        Number of qubits, 1..3.

    Returns
    -------
    float
        Decay parameter.
    """
    d = 2 ** _pauli.check_n_qubits(n_qubits)
    return 1 - d * _check_real("r", r) / (d - 1)


# ---- unitarity ------------------------------------------------------------------------------
def unitarity(channel: Channel) -> float:
    """Unitarity ``u = tr(B^T B) / (d**2 - 1)`` with ``B = R[1:, 1:]`` the unital block.

    ("Estimating the coherence of noise", NJP 17, 113020 (2015).)  The non-unital vector
    ``R[1:, 0]`` does not enter.  ``u = 1`` for a unitary channel, ``p**2`` for a depolarizing
    channel with decay ``p``; it does not depend on any target, since composing with a unitary
    leaves it unchanged.

    Parameters
    ----------
    channel : Channel

    Returns
    -------
    float
        In ``[0, 1]`` for a CPTP channel.
    """
    channel = _check_channel(channel)
    b = channel.unital_block
    return float(np.sum(b * b)) / (channel.dim**2 - 1)


# ---- Pauli error rates ----------------------------------------------------------------------
@functools.lru_cache(maxsize=None)
def _commutation_table(n: int) -> np.ndarray:
    """``T[i, j] = tr(P_i P_j P_i P_j) / d``: +1 if ``P_i, P_j`` commute, -1 if not."""
    p = _pauli.pauli_stack(n)
    t = np.einsum("iab,jbc,icd,jda->ij", p, p, p, p, optimize=True).real / 2**n
    t = np.rint(t)
    t.setflags(write=False)
    return t


def pauli_error_rates(channel: Channel, target: object = None, *, side: str = "after") -> dict[str, float]:
    """Probabilities of the Pauli-twirled error channel, keyed by Pauli label (an error rate each).

    The twirl of the error ``E`` (see :func:`robusttomo.generators.error_ptm`) over the Pauli
    group is the Pauli channel ``rho -> sum_P p_P P rho P`` whose PTM is ``diag(E)``.  With
    ``f = diag(E)`` and ``T[i, j] = +1`` where ``P_i, P_j`` commute and ``-1`` otherwise,
    ``f = T p``, and since ``T T = d**2 I`` (a Walsh-Hadamard matrix), ``p = T f / d**2``
    (common practice).

    Parameters
    ----------
    channel : Channel
        Implemented operation.
    target : None, ndarray of shape (d, d), or Channel
        Ideal unitary (identity when None).
    side : {"after", "before"}
        Where the error sits relative to the target (default: after, ``E = R R_target^T``).

    Returns
    -------
    dict of str to float
        ``p_P`` for every label, identity included, in Pauli order; they sum to 1 for a TP
        channel and are non-negative for a CP one (an estimate may give small negatives).
        ``1 - p_I`` equals the entanglement infidelity.
    """
    channel = _check_channel(channel)
    e = error_ptm(channel, target, side=side)
    n = channel.n_qubits
    probs = _commutation_table(n) @ np.diag(e) / channel.dim**2
    return {lab: float(v) for lab, v in zip(_pauli.pauli_labels(n), probs)}


# ---- coherent share -------------------------------------------------------------------------
def coherent_share(channel: Channel, target: object = None, *, side: str = "after") -> float:
    """Fraction of the (first-order) infidelity that is coherent, in ``[0, 1]``.

    With the error generator's Hamiltonian rates ``h_P`` and stochastic rates ``s_P``
    (:func:`robusttomo.generators.rates_from_channel`), the entanglement infidelity is, to
    first order, ``sum_P h_P**2 + sum_P s_P`` ("A taxonomy of small Markovian errors",
    PRX Quantum 3, 020335 (2022)).  The coherent share is

        ``sum_P h_P**2 / (sum_P h_P**2 + max(sum_P s_P, 0))``,

    1 for a unitary error and 0 for a Pauli channel.  Correlation and active generator terms
    (e.g. amplitude damping's non-unital part) do not enter the first-order infidelity and so
    not this ratio.  It is 0 for an error-free channel (no infidelity at all).

    Parameters
    ----------
    channel : Channel
        Implemented operation.
    target : None, ndarray of shape (d, d), or Channel
        Ideal unitary (identity when None).
    side : {"after", "before"}
        Where the error sits relative to the target (default: after).

    Returns
    -------
    float

    Raises
    ------
    ValueError
        If the error channel has no real principal logarithm (see
        :func:`robusttomo.generators.rates_from_channel`).
    """
    gen = rates_from_channel(_check_channel(channel), target, side=side)
    h2 = float(sum(v * v for v in gen.hamiltonian.values()))
    s = max(float(sum(gen.stochastic.values())), 0.0)
    total = h2 + s
    if total <= 1e-15:
        return 0.0
    return h2 / total


# ---- diamond norm ---------------------------------------------------------------------------
class SolveStatus(enum.Enum):
    """Outcome of a diamond-norm semidefinite program."""

    OPTIMAL = "optimal"
    """The solver reached its tolerances."""
    INACCURATE = "inaccurate"
    """The solver stopped early (iteration limit or numerical trouble); the value is approximate."""
    FAILED = "failed"
    """No value could be computed."""


@dataclass(frozen=True)
class DiamondResult:
    """Result of a diamond-distance computation.

    Attributes
    ----------
    value : float
        The diamond distance ``(1/2) ||A - B||_diamond`` (an error: the worst-case
        probability of telling the two operations apart, in ``[0, 1]`` for two channels;
        clipped at 0 below, and at 1 above when both maps are trace preserving).  NaN when
        ``status`` is FAILED.
    solver : str
        The solver whose answer is reported, ``"SCS"`` or ``"CLARABEL"``.
    status : SolveStatus
        Status of the reported solve.
    fell_back : bool
        True when the first solver did not reach OPTIMAL and the other one was tried.
    message : str
        Human-readable account of what was tried.
    """

    value: float
    solver: str
    status: SolveStatus
    fell_back: bool
    message: str


_SOLVERS = ("SCS", "CLARABEL")
# SCS needs tight tolerances: with its defaults it was off by up to 5e-5 on two-qubit
# channels; with eps = 1e-9 it agrees with the interior-point solver to about 2e-8.
_SCS_EPS = 1e-9
_LOCK = threading.Lock()


def _real_embedding(a: np.ndarray) -> np.ndarray:
    """``[[Re a, -Im a], [Im a, Re a]]``: a Hermitian ``a`` maps to a real symmetric matrix."""
    return np.block([[a.real, -a.imag], [a.imag, a.real]])


def _kron_identity(rho: cp.Expression, d: int) -> cp.Expression:
    """Real embedding of ``rho (x) I_d`` from the ``2d x 2d`` embedding ``rho``, blockwise."""
    eye = np.eye(d)
    return cp.bmat(
        [
            [cp.kron(rho[:d, :d], eye), cp.kron(rho[:d, d:], eye)],
            [cp.kron(rho[d:, :d], eye), cp.kron(rho[d:, d:], eye)],
        ]
    )


@functools.lru_cache(maxsize=None)
def _trace_annihilating_program(d: int) -> tuple[cp.Problem, cp.Parameter]:
    """``max Re tr(J W)`` s.t. ``0 <= W <= rho (x) I``, ``rho`` a density matrix.

    For ``J`` the (unnormalized, input-first) Choi matrix of a Hermiticity-preserving,
    trace-annihilating map ``Phi`` (the difference of two trace-preserving maps), the optimum
    is ``(1/2) ||Phi||_diamond`` ("Simpler semidefinite programs for completely bounded
    norms", Chicago J. Theor. Comput. Sci. 2013).

    Written over real symmetric matrices: the parameter is the real embedding of ``J`` and
    ``W``, ``rho`` are unstructured real symmetric ``2x`` larger matrices (``rho (x) I`` acts
    blockwise).  The set and objective are invariant under conjugation by
    ``[[0, -1], [1, 0]]``, so averaging a solution with its conjugate gives one of embedded
    form: the optimum is unchanged.  Without the forced ``[[A, -B], [B, A]]`` structure the
    interior-point solver no longer stalls on the doubled eigenvalues of embedded matrices.
    """
    dd = d * d
    j = cp.Parameter((2 * dd, 2 * dd), symmetric=True)
    w = cp.Variable((2 * dd, 2 * dd), PSD=True)
    rho = cp.Variable((2 * d, 2 * d), symmetric=True)
    rho_kron = _kron_identity(rho, d)
    constraints = [rho_kron - w >> 0, cp.trace(rho) == 2]
    # tr(emb(J) emb(W)) = 2 Re tr(J W)
    return cp.Problem(cp.Maximize(cp.trace(j @ w) / 2), constraints), j


@functools.lru_cache(maxsize=None)
def _general_program(d: int) -> tuple[cp.Problem, cp.Parameter]:
    """``max Re tr(J X)`` s.t. ``-rho (x) I <= X <= rho (x) I``, ``X`` Hermitian, ``rho`` a density matrix.

    The optimum is ``||Phi||_diamond`` for a Hermiticity-preserving map with (unnormalized,
    input-first) Choi matrix ``J``.  It is the program of "Simpler semidefinite programs for
    completely bounded norms", Chicago J. Theor. Comput. Sci. 2013 (maximize ``Re tr(J^dagger X)``
    subject to ``[[rho0 (x) I, X], [X^dagger, rho1 (x) I]] >= 0``) reduced by symmetry: for
    Hermitian ``J``, ``(X^dagger, rho1, rho0)`` is feasible with the same objective, so the
    average ``X`` Hermitian, ``rho0 = rho1 = rho`` is optimal, and then the block condition
    reads ``rho (x) I +- X >= 0``.  Real embedding as in :func:`_trace_annihilating_program`.
    """
    dd = d * d
    j = cp.Parameter((2 * dd, 2 * dd), symmetric=True)
    x = cp.Variable((2 * dd, 2 * dd), symmetric=True)
    rho = cp.Variable((2 * d, 2 * d), symmetric=True)
    big = _kron_identity(rho, d)
    constraints = [big - x >> 0, big + x >> 0, cp.trace(rho) == 2]
    return cp.Problem(cp.Maximize(cp.trace(j @ x) / 2), constraints), j


def _solve_once(problem: cp.Problem, solver: str, *, scs_max_iters: int) -> tuple[float, SolveStatus, str]:
    if solver == "SCS":
        opts = {"eps_abs": _SCS_EPS, "eps_rel": _SCS_EPS, "max_iters": scs_max_iters}
    else:
        # Clarabel (interior point) reaches 1e-8 in ~15 iterations; asking for 1e-9 often ends
        # "almost solved" with the same value.  One thread: answers do not depend on the core
        # count, and a forked worker never inherits a solver thread pool without its threads.
        opts = {"tol_gap_abs": 1e-8, "tol_gap_rel": 1e-8, "tol_feas": 1e-8, "max_threads": 1}
    try:
        with warnings.catch_warnings():
            # an inaccurate solve is reported through the status, not a warning
            warnings.simplefilter("ignore", UserWarning)
            value = problem.solve(solver=solver, warm_start=False, **opts)
    except cp.error.SolverError as exc:
        return float("nan"), SolveStatus.FAILED, f"{solver} failed ({exc})"
    status = problem.status
    if status == cp.OPTIMAL and value is not None and np.isfinite(value):
        return float(value), SolveStatus.OPTIMAL, f"{solver}: optimal"
    if status == cp.OPTIMAL_INACCURATE and value is not None and np.isfinite(value):
        return float(value), SolveStatus.INACCURATE, f"{solver}: {status}"
    return float("nan"), SolveStatus.FAILED, f"{solver}: {status}"


def _diamond_half_norm(jdiff: np.ndarray, d: int, *, solver: str, scs_max_iters: int) -> DiamondResult:
    """Solve for ``(1/2)||Phi||_diamond`` from the unnormalized Choi matrix ``jdiff``, with fallback."""
    jdiff = (jdiff + jdiff.conj().T) / 2
    # tr_out J: the map is trace-annihilating iff this vanishes
    tr_out = np.einsum("iaja->ij", jdiff.reshape(d, d, d, d))
    annihilating = np.max(np.abs(tr_out), initial=0.0) <= 1e-9
    program, factor = (_trace_annihilating_program(d), 1.0) if annihilating else (_general_program(d), 0.5)
    problem, param = program
    order = [solver] + [s for s in _SOLVERS if s != solver]
    notes = []
    best: tuple[float, SolveStatus, str] | None = None
    with _LOCK:
        param.value = _real_embedding(jdiff)
        for name in order:
            value, status, note = _solve_once(problem, name, scs_max_iters=scs_max_iters)
            notes.append(note)
            if status is SolveStatus.OPTIMAL:
                best = (value, status, name)
                break
            if status is SolveStatus.INACCURATE:
                # the later (fallback) solver's approximate answer is preferred: the first
                # one stopped early for a reason
                best = (value, status, name)
    fell_back = len(notes) > 1
    if best is None:
        return DiamondResult(float("nan"), order[-1], SolveStatus.FAILED, fell_back, "; ".join(notes))
    value, status, name = best
    value = max(factor * value, 0.0)
    if annihilating:
        value = min(value, 1.0)
    if fell_back:
        notes.append(f"reported {name}")
    return DiamondResult(value, name, status, fell_back, "; ".join(notes))


def _check_solver(solver: object) -> str:
    if not isinstance(solver, str) or solver.upper() not in _SOLVERS:
        raise ValueError(f"'solver' must be 'SCS' or 'CLARABEL'; got {solver!r}")
    return solver.upper()


def _check_iters(scs_max_iters: object) -> int:
    if isinstance(scs_max_iters, bool) or not isinstance(scs_max_iters, (int, np.integer)) or scs_max_iters < 1:
        raise ValueError(f"'scs_max_iters' must be a positive integer; got {scs_max_iters!r}")
    return int(scs_max_iters)


def diamond_distance_details(
    channel: Channel,
    target: object = None,
    *,
    solver: str = "SCS",
    scs_max_iters: int = 100_000,
) -> DiamondResult:
    """Diamond distance ``(1/2) ||L - T||_diamond`` with the solver's account.

    The diamond distance is the largest probability, over all input states (entangled with a
    reference system), of telling the channel from the target in one use, minus the 1/2 of a
    guess, times two: an error in ``[0, 1]`` (0 = identical).

    It is computed by the semidefinite program of "Simpler semidefinite programs for
    completely bounded norms", Chicago J. Theor. Comput. Sci. 2013: with ``J`` the
    unnormalized Choi matrix of ``L - T`` (input factor first),

        maximize ``Re tr(J W)``  over  ``W >= 0``, ``rho >= 0``, ``tr rho = 1``,
        subject to ``W <= rho (x) I``,

    whose optimum is ``(1/2) ||L - T||_diamond`` when both maps are trace preserving.  When
    they are not, the general program of the same paper is used instead.  The first solver
    runs with tight tolerances (SCS: ``eps_abs = eps_rel = 1e-9``); if it does not report an
    optimal solution (iteration limit, inaccurate, failed), the other solver (Clarabel for
    SCS) is tried and ``fell_back`` is set.

    Parameters
    ----------
    channel : Channel
        Implemented operation.
    target : None, ndarray of shape (d, d), or Channel
        Identity when None; a unitary matrix; or any Channel on the same qubits.
    solver : {"SCS", "CLARABEL"}
        Solver tried first.
    scs_max_iters : int
        Iteration limit for SCS (when it runs).

    Returns
    -------
    DiamondResult
    """
    channel = _check_channel(channel)
    solver = _check_solver(solver)
    scs_max_iters = _check_iters(scs_max_iters)
    n = channel.n_qubits
    target_channel = Channel.from_ptm(_target_ptm(target, n, unitary_only=False))
    d = channel.dim
    jdiff = d * (channel.choi - target_channel.choi)
    return _diamond_half_norm(jdiff, d, solver=solver, scs_max_iters=scs_max_iters)


def diamond_distance(channel: Channel, target: object = None) -> float:
    """Diamond distance ``(1/2) ||L - T||_diamond``, a worst-case error probability in ``[0, 1]``.

    See :func:`diamond_distance_details` for the program, solvers and fallback.  For a
    unitary error ``exp(-i theta/2 P)`` it is ``|sin(theta/2)|``; for a Pauli channel it is
    ``1 - p_I``.

    Parameters
    ----------
    channel : Channel
        Implemented operation.
    target : None, ndarray of shape (d, d), or Channel
        Identity when None; a unitary matrix; or any Channel on the same qubits.

    Returns
    -------
    float

    Raises
    ------
    RuntimeError
        If neither solver produced a value.

    Examples
    --------
    >>> from robusttomo.channels import rotation
    >>> from robusttomo.metrics import diamond_distance
    >>> round(diamond_distance(rotation("Z", 0.2)), 5)
    0.09983
    """
    result = diamond_distance_details(channel, target)
    if result.status is SolveStatus.FAILED:
        raise RuntimeError(f"diamond distance could not be computed: {result.message}")
    return result.value


def diamond_norm_of_difference(choi_a: np.ndarray, choi_b: np.ndarray, *, solver: str = "SCS") -> float:
    """Diamond norm ``||A - B||_diamond`` of the difference of two Hermiticity-preserving maps.

    Unlike :func:`diamond_distance` this is the full norm (in ``[0, 2]`` for two channels),
    and it takes Choi matrices, so estimates that are not exactly CPTP can be compared.

    Parameters
    ----------
    choi_a, choi_b : ndarray, shape (d*d, d*d), complex
        Trace-1 Choi matrices ``(1/d) sum |i><j| (x) L(|i><j|)`` (input factor first), each
        Hermitian (the map is Hermiticity preserving).
    solver : {"SCS", "CLARABEL"}
        Solver tried first (the other is the fallback).

    Returns
    -------
    float

    Raises
    ------
    RuntimeError
        If neither solver produced a value.
    """
    mats = []
    for name, c in (("choi_a", choi_a), ("choi_b", choi_b)):
        arr = np.asarray(c)
        if not np.issubdtype(arr.dtype, np.number):
            raise TypeError(f"'{name}' must be a numeric matrix; got dtype {arr.dtype}")
        if arr.ndim != 2 or arr.shape[0] != arr.shape[1] or arr.shape[0] not in (4, 16, 64):
            raise ValueError(f"'{name}' must be a (d*d, d*d) Choi matrix with d = 2, 4 or 8; got shape {arr.shape}")
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"'{name}' must be finite; got NaN or inf entries")
        if not np.allclose(arr, arr.conj().T, atol=1e-9, rtol=0):
            raise ValueError(f"'{name}' must be Hermitian (a Hermiticity-preserving map); got a non-Hermitian matrix")
        mats.append(arr.astype(complex))
    if mats[0].shape != mats[1].shape:
        raise ValueError(f"'choi_a' and 'choi_b' must have the same shape; got {mats[0].shape} and {mats[1].shape}")
    solver = _check_solver(solver)
    d = int(round(np.sqrt(mats[0].shape[0])))
    result = _diamond_half_norm(d * (mats[0] - mats[1]), d, solver=solver, scs_max_iters=100_000)
    if result.status is SolveStatus.FAILED:
        raise RuntimeError(f"diamond norm could not be computed: {result.message}")
    return 2.0 * result.value
