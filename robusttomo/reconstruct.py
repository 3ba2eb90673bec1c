"""Convex reconstruction: from linear observations of the unital block to a CPTP error channel.

This stage consumes :class:`robusttomo.fit.LinearObservations` (``values ~ design @ b`` with
``b = B_L.reshape(-1)`` the row-major unital block, already free of state-preparation and
measurement constants) and returns

* :class:`ChannelFit`: the weighted least-squares fit over completely positive, trace-preserving
  (CPTP) channels, with its solver account and a certificate of its accuracy
  (:class:`CptpFitter`, :func:`fit_cptp`);
* :class:`NonunitalRange`: for each entry of the non-unital vector ``t = R[1:, 0]``, which the
  data do not determine, its range over the CPTP channels that fit the data within their
  confidence region (:meth:`CptpFitter.nonunital_range`);
* :class:`DiamondRange`: the range of the diamond distance to a target unitary over the same
  region (:meth:`CptpFitter.diamond_range`);
* the unconstrained linear estimate (:func:`linear_estimate`) and the error of one gate from
  interleaved observations (:func:`gate_error_observations`, :func:`isolate_gate_error`).

Conventions are those of :mod:`robusttomo.channels`: PTM ``R[i, j] = tr(P_i L(P_j)) / d`` in the
normalized Pauli basis (order ``II, IX, IY, IZ, XI, ...``, qubit 0 leftmost), row-major ``vec``,
trace-1 Choi matrix ``J = (1/d) sum_ij |i><j| (x) L(|i><j|)`` with the input factor first.

The Choi matrix is parameterized by the PTM of a trace-preserving map,

    ``J(x) = (1/d**2) sum_ij R_ij  P_j^T (x) P_i``,   ``R[0, :] = e_0``,  ``x = (t, b)``,

which is Hermitian for real ``R`` and satisfies ``tr_out J = I/d`` (trace preservation) exactly
for every ``x``; complete positivity is the one conic constraint ``J(x) >= 0``.  Solvers see
the real symmetric embedding ``[[Re J, -Im J], [Im J, Re J]] >= 0``, which is equivalent.

The cvxpy problems are built once per :class:`CptpFitter`, with the (whitened) observed values
as a :class:`cvxpy.Parameter`, so bootstrap replicates re-solve without rebuilding.  A fitter is
not thread safe (its parameters are shared state).
"""

from __future__ import annotations

import enum
import functools
import math
import warnings
from dataclasses import dataclass

import cvxpy as cp
import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg
import scipy.stats

from robusttomo import _pauli
from robusttomo.channels import Channel
from robusttomo.fit import LinearObservations

__all__ = [
    "ChannelFit",
    "CptpFitter",
    "DiamondRange",
    "FitStatus",
    "MaximumRule",
    "NonunitalRange",
    "Region",
    "SolveResiduals",
    "SolverError",
    "fit_cptp",
    "gate_error_observations",
    "isolate_gate_error",
    "linear_estimate",
]

_SOLVERS = ("SCS", "CLARABEL")
# absolute floor of the covariance ridge: exact (noise-free) observations are then weighted
# as if known to 1e-8, i.e. ordinary least squares
_RIDGE_FLOOR = 1e-16
# SCS tolerance window: 1e-7 already failed the certificate on two-qubit test problems whose
# optimum lies on the CPTP boundary; the default 1e-4 left Frobenius block errors near 2.5e-4
# even on exact two-qubit data
_SCS_EPS_MIN, _SCS_EPS_MAX = 1e-10, 1e-8
_CLARABEL_TOL = 1e-9
# the rule's program has no interior when the fitted block leaves t no freedom; do not let SCS
# spend its whole budget there before the fallback
_RULE_MAX_ITERS = 500
# region programs converge in a few hundred SCS iterations when they are well posed
_REGION_MAX_ITERS = 5000
# in the centred coordinates of the region programs the region is the unit ball, so one fixed
# tolerance serves every data set
_REGION_EPS = 1e-8
#: Candidate extreme points whose diamond distance is evaluated exactly (after screening).
_SCREEN_CANDIDATES = 6
_FIXED_NOTE = "; the region is thinner than absolute_accuracy in the unital block, so the block is held at the estimate's"
# singular values of the scaled whitened design below this (relative) count as unidentified
_RANK_TOL = 1e-10
# above this many block parameters (three qubits) the whitened factor is not decomposed by SVD
_SVD_MAX = 1000


class SolverError(RuntimeError):
    """Raised when neither solver returned a usable solution of a convex program."""


class FitStatus(enum.Enum):
    """Outcome of a CPTP fit."""

    CERTIFIED = "certified"
    """The duality-gap certificate meets the accuracy target (see :class:`SolveResiduals`)."""
    INACCURATE = "inaccurate"
    """A CPTP channel was returned but its certificate misses the target even after the fallback."""


class Region(enum.Enum):
    """Which confidence region of the unital block the ranges are taken over.

    Both are ``{x CPTP : chi2(x) <= chi2_ref + delta}`` (``chi2_ref`` the point estimate's
    chi-square); they differ in ``delta``.
    """

    JOINT = "joint"
    """``delta = chi2.ppf(level, r)``, ``r`` the rank of the design (225 for a full two-qubit
    block).  Guaranteed coverage: ``chi2(b_true) - chi2_ref <= chi2(b_true) - chi2_linear``, which
    is chi-square with ``r`` degrees of freedom for Gaussian observations with the stated
    covariance, so the true channel lies in the region with probability at least ``level``, and
    then every reported range contains its true value simultaneously.  Holds also when the truth
    is on the CPTP boundary.  The default."""
    PROFILE = "profile"
    """``delta = chi2.ppf(level, 1)`` (3.84 at 95%): the profile-likelihood interval of each
    quantity on its own.  Asymptotically right only when the truth is in the interior of the CPTP
    set: with a two-qubit amplitude-damping truth (Choi rank 2) the range of the damped entry
    covered the truth in 9 of 25 simulated experiments (25 of 25 with the joint region, and 25
    of 25 for both when depolarizing noise moved the truth inside)."""


class MaximumRule(enum.Enum):
    """Which number :attr:`DiamondRange.maximum` reports."""

    CERTIFIED = "certified"
    """A certified upper bound on the maximum (never below the true maximum; may not be attained)."""
    ATTAINED = "attained"
    """The largest value attained by a channel found in the region (never above the true maximum)."""


@dataclass(frozen=True)
class SolveResiduals:
    """How far a returned channel may be from the exact optimum.

    Attributes
    ----------
    psd_violation : float
        ``max(0, -lambda_min)`` of the solver's raw trace-1 Choi matrix, before repair.
    repair_weight : float
        Weight ``alpha`` of the repair ``J -> (1 - alpha) J + alpha I/d**2`` (mixing in the
        completely depolarizing channel) that made the returned Choi matrix positive
        semidefinite; 0 when none was needed.  It scales ``t`` and ``B`` by ``1 - alpha``.
    tp_violation : float
        ``max |tr_out J - I/d|`` of the returned channel's Choi matrix (trace preservation is
        built into the parameterization, so this is at rounding level).
    chi2_lower_bound : float
        Certified lower bound on the minimum weighted chi-square over all CPTP channels: the
        larger of the unconstrained minimum and the Lagrangian dual bound built from the
        solver's dual matrix (the non-unital vector enters through ``t_i = tr(P_i L(I/d))`` with
        ``L(I/d)`` a density matrix; unidentified block directions through ``|R_ij| <= 1``, which
        holds for every CPTP channel).
    duality_gap : float
        ``chi2 - chi2_lower_bound`` (>= 0): the returned chi-square exceeds the optimum by at
        most this much.
    mahalanobis_bound : float
        ``sqrt(duality_gap)``: bound on ``||W design (b - b*)||``, the distance of the returned
        unital block from the exact optimum ``b*`` in standard errors (the objective is a convex
        quadratic and the returned point is feasible, so
        ``chi2(b) - chi2(b*) >= ||W design (b - b*)||**2``).
    block_error_bound : float
        ``mahalanobis_bound / sigma_min(W design)``: bound on the Frobenius distance of the
        returned unital block from the exact optimum; ``inf`` when the design does not
        identify every entry.
    """

    psd_violation: float
    repair_weight: float
    tp_violation: float
    chi2_lower_bound: float
    duality_gap: float
    mahalanobis_bound: float
    block_error_bound: float


@dataclass(frozen=True)
class ChannelFit:
    """A CPTP channel fitted to linear observations of its unital block.

    Attributes
    ----------
    channel : Channel
        The point estimate: CPTP (Choi matrix positive semidefinite, trace preserving).  Its
        unital block is the weighted least-squares fit; its non-unital vector is chosen by the
        rule of :class:`CptpFitter` (closest to ``target_nonunital`` among the best fits).
    status : FitStatus
        CERTIFIED when the residuals meet the accuracy target.
    solver : str
        Solver of the weighted least-squares fit that produced the unital block, ``"SCS"`` or
        ``"CLARABEL"`` (the non-unital rule's program is solved by Clarabel first; ``message``
        names its solver).
    fell_back : bool
        True when the first solver's answer was rejected (status, failure or certificate) and the
        fallback solver was used in some stage.
    message : str
        Human-readable account of every solve and why any fallback happened.
    chi2 : float
        Weighted chi-square ``||W (design @ b - values)||**2`` of the returned channel.
    n_observations : int
        Number of observations ``k``.
    n_parameters : int
        Number of fitted parameters, ``D*D`` (the unital block; ``t`` does not enter the data).
    design_rank : int
        Rank of the whitened design (``D*D`` when every unital-block entry is identified).
    residuals : SolveResiduals
        Certificate and constraint residuals of the returned channel.
    linear_block : ndarray, shape (D, D), float
        Unconstrained weighted least-squares unital block (:func:`linear_estimate`).
    chi2_linear : float
        Chi-square of ``linear_block`` (the unconstrained minimum).
    linear_distance : float
        ``||linear_block - channel.unital_block||_F``: how much the CPTP constraints moved the
        estimate (a diagnostic; a large value relative to the standard errors flags data that
        fight complete positivity).
    rule_applied : bool
        True when the non-unital rule was solved; False when its program had no accurate
        solution (the fitted block then leaves ``t`` essentially no freedom) and the first
        stage's ``t`` was kept (``message`` says so).
    """

    channel: Channel
    status: FitStatus
    solver: str
    fell_back: bool
    message: str
    chi2: float
    n_observations: int
    n_parameters: int
    design_rank: int
    residuals: SolveResiduals
    linear_block: np.ndarray
    chi2_linear: float
    linear_distance: float
    rule_applied: bool

    @property
    def unital_block(self) -> np.ndarray:
        """``channel.unital_block``, shape ``(D, D)``."""
        return self.channel.unital_block

    @property
    def nonunital_vector(self) -> np.ndarray:
        """``channel.nonunital_vector``, shape ``(D,)``."""
        return self.channel.nonunital_vector


@dataclass(frozen=True)
class NonunitalRange:
    """Range of each non-unital PTM entry ``t_i = R[i, 0]`` over the CPTP channels in the region.

    The region is ``{x CPTP : chi2(x) <= chi2_ref + delta_chi2}`` with ``chi2_ref`` the point
    estimate's chi-square.  Each end is the optimum of one semidefinite program (minimize or
    maximize ``t_i`` over the region), so both ends are attained by CPTP channels in the region
    (``max_is_bound`` is False); they are exact up to the solver tolerance (about 1e-8).

    Attributes
    ----------
    labels : tuple of str, length D
        Pauli label of the row of each entry (``"IX", "IY", ...``; ``t_i = tr(P_i L(I)) / d``).
    minimum, maximum : ndarray, shape (D,), float
        Ends of each entry's range.
    estimate : ndarray, shape (D,), float
        The point estimate's non-unital vector.
    argmin, argmax : tuple of Channel, length D
        CPTP channels in the region attaining each end.
    max_is_bound : bool
        False: both ends are attained values.
    region : Region
        Which region.
    level : float
        Confidence level of the region (e.g. 0.95).
    delta_chi2 : float
        Its chi-square allowance above ``chi2_ref``.
    chi2_ref : float
        Chi-square of the point estimate.
    block_held_fixed : bool
        True when the region's extent in the unital block (bound ``(sqrt(delta + gap) +
        sqrt(gap)) / sigma_min(W design)``) is below ``absolute_accuracy`` (exact or nearly exact
        data, where the region is thinner than the solvers resolve): the programs then vary
        ``t`` only, at the estimate's block.
    method : str
        One-line description of how the ends were computed.
    notes : str
        Solver account (fallbacks, if any).
    """

    labels: tuple[str, ...]
    minimum: np.ndarray
    maximum: np.ndarray
    estimate: np.ndarray
    argmin: tuple[Channel, ...]
    argmax: tuple[Channel, ...]
    max_is_bound: bool
    region: Region
    level: float
    delta_chi2: float
    chi2_ref: float
    block_held_fixed: bool
    method: str
    notes: str


@dataclass(frozen=True)
class DiamondRange:
    """Range of the diamond distance ``(1/2)||L - U||_diamond`` over the CPTP channels in the region.

    Attributes
    ----------
    minimum : float
        Minimum over the region, from one semidefinite program (the diamond-norm program of
        "Simpler semidefinite programs for completely bounded norms", Chicago J. Theor. Comput.
        Sci. 2013, solved jointly with the channel), attained by ``argmin``.
    maximum : float
        Reported upper end: ``maximum_certified`` or ``maximum_attained`` per the rule.
    max_is_bound : bool
        True when ``maximum`` is the certified bound (true maximum <= maximum), False when it is
        the attained value (true maximum >= maximum).
    maximum_attained : float
        Largest diamond distance of a channel found in the region (by the extreme points of the
        non-unital range programs and a linearize-and-maximize ascent), evaluated by
        :func:`robusttomo.metrics.diamond_distance_details`; a lower estimate of the maximum.
    maximum_certified : float
        Upper bound on the maximum: ``estimate + (d/2) rho``, with ``rho`` a bound on the
        Frobenius distance between the PTM of any channel in the region and the point estimate
        (triangle inequality and ``||X||_diamond <= d ||J_X||_1 <= d ||R_X||_F``), capped at 1.
    estimate : float
        Diamond distance of the point estimate.
    argmin, argmax : Channel
        Channels in the region attaining ``minimum`` and ``maximum_attained``.
    region : Region
    level : float
    delta_chi2 : float
    block_held_fixed : bool
        As in :class:`NonunitalRange`.
    method : str
        Description of how each number was computed.
    notes : str
        Solver account.
    """

    minimum: float
    maximum: float
    max_is_bound: bool
    maximum_attained: float
    maximum_certified: float
    estimate: float
    argmin: Channel
    argmax: Channel
    region: Region
    level: float
    delta_chi2: float
    block_held_fixed: bool
    method: str
    notes: str


# ---- Choi-matrix parameterization ------------------------------------------------------------
@functools.lru_cache(maxsize=None)
def _choi_basis(n: int) -> tuple[sp.csc_matrix, np.ndarray, sp.csc_matrix, np.ndarray]:
    """Affine maps ``x -> vec_F(E(J(x)))`` and ``x -> vec_C(J(x))``.

    ``x = (t, b)``: ``t_i = R[i, 0]`` (i = 1..D) then ``b = R[1:, 1:].reshape(-1)``; ``E`` is the
    real embedding ``[[Re, -Im], [Im, Re]]``.  Returns ``(Zmat, z0, Cmat, c0)`` with
    ``vec_F(E(J)) = Zmat @ x + z0`` (shape ``(4 m**2, nx)``, ``m = d*d``) and the complex
    row-major ``vec(J) = Cmat @ x + c0``.  Each ``P_j^T (x) P_i`` has one non-zero per row, so
    both are assembled from the Pauli permutations and phases without dense Kronecker products.
    """
    d = 2**n
    m = d * d
    stack = _pauli.pauli_stack(n)
    perm = np.argmax(np.abs(stack), axis=2)  # [q, a]: column of the non-zero in row a
    phase = np.take_along_axis(stack, perm[:, :, None], axis=2)[:, :, 0]
    inv = np.argsort(perm, axis=1)  # row a of P^T has its non-zero in column inv[a]
    qs = np.arange(m)[:, None]
    phase_t = stack[qs, inv, np.arange(d)[None, :]]  # P[inv[a], a]
    pairs = [(i, 0) for i in range(1, m)] + [(i, j) for i in range(1, m) for j in range(1, m)]
    ii = np.array([p[0] for p in pairs])
    jj = np.array([p[1] for p in pairs])
    a = np.arange(d)
    # kron(P_j^T, P_i)[(a, c), (inv_j[a], perm_i[c])] = phase_t_j[a] * phase_i[c]
    rows = (a[:, None] * d + a[None, :]).reshape(-1)  # (a, c) flattened
    cols = (inv[jj][:, :, None] * d + perm[ii][:, None, :]).reshape(len(pairs), -1)
    vals = (phase_t[jj][:, :, None] * phase[ii][:, None, :]).reshape(len(pairs), -1) / m
    kk = np.repeat(np.arange(len(pairs)), m)
    r = np.tile(rows, len(pairs))
    c = cols.reshape(-1)
    v = vals.reshape(-1)
    cmat = sp.csc_matrix((v, (r * m + c, kk)), shape=(m * m, len(pairs)))
    re, im = v.real, v.imag
    isre = np.abs(re) > 0.5 / m
    isim = np.abs(im) > 0.5 / m
    size = 2 * m
    # E[p, q] sits at p + q * size in column-major vec
    er = np.concatenate([r[isre], r[isre] + m, r[isim], r[isim] + m])
    ec = np.concatenate([c[isre], c[isre] + m, c[isim] + m, c[isim]])
    ev = np.concatenate([re[isre], re[isre], -im[isim], im[isim]])
    ek = np.concatenate([kk[isre], kk[isre], kk[isim], kk[isim]])
    zmat = sp.csc_matrix((ev, (er + ec * size, ek)), shape=(size * size, len(pairs)))
    z0 = (np.eye(size) / m).reshape(-1, order="F")
    c0 = (np.eye(m) / m).reshape(-1).astype(complex)
    return zmat, z0, cmat, c0


def _embed(mat: np.ndarray) -> np.ndarray:
    """Real symmetric embedding ``[[Re M, -Im M], [Im M, Re M]]`` of a Hermitian matrix."""
    return np.block([[mat.real, -mat.imag], [mat.imag, mat.real]])


def _ptm_from_x(x: np.ndarray, n: int) -> np.ndarray:
    d2 = 4**n
    dd = d2 - 1
    r = np.zeros((d2, d2))
    r[0, 0] = 1.0
    r[1:, 0] = x[:dd]
    r[1:, 1:] = x[dd:].reshape(dd, dd)
    return r


def _choi_from_x(x: np.ndarray, n: int) -> np.ndarray:
    _, _, cmat, c0 = _choi_basis(n)
    m = 4**n
    j = (cmat @ x + c0).reshape(m, m)
    return (j + j.conj().T) / 2


def _block_partial_trace(z: cp.Expression, m: int, d: int) -> cp.Expression:
    """Partial trace over the output factor of each ``m x m`` block of a real-embedded matrix."""
    blocks = [[cp.partial_trace(z[r * m:(r + 1) * m, c * m:(c + 1) * m], dims=(d, d), axis=1)
               for c in range(2)] for r in range(2)]
    return cp.bmat(blocks)


def _block_kron(z: cp.Expression, d: int) -> cp.Expression:
    """``[[A, B], [C, D]] -> [[A (x) I, B (x) I], [C (x) I, D (x) I]]``: real embedding of ``rho (x) I``."""
    eye = np.eye(d)
    blocks = [[cp.kron(z[r * d:(r + 1) * d, c * d:(c + 1) * d], eye) for c in range(2)] for r in range(2)]
    return cp.bmat(blocks)


# ---- validation ------------------------------------------------------------------------------
def _check_observations(obs: object) -> LinearObservations:
    if not isinstance(obs, LinearObservations):
        raise TypeError(f"'obs' must be a robusttomo.fit.LinearObservations; got {type(obs).__name__}")
    n = _pauli.check_n_qubits(obs.n_qubits, name="obs.n_qubits")
    p = (4**n - 1) ** 2
    design = np.asarray(obs.design)
    values = np.asarray(obs.values)
    cov = np.asarray(obs.covariance)
    if design.ndim != 2 or design.shape[1] != p or design.shape[0] == 0:
        raise ValueError(f"'obs.design' must have shape (k, {p}) with k >= 1 for {n} qubit(s); got {design.shape}")
    k = design.shape[0]
    if values.shape != (k,):
        raise ValueError(f"'obs.values' must have shape ({k},) to match 'obs.design'; got {values.shape}")
    if cov.shape != (k, k):
        raise ValueError(f"'obs.covariance' must have shape ({k}, {k}); got {cov.shape}")
    for name, arr in (("obs.design", design), ("obs.values", values), ("obs.covariance", cov)):
        if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
            raise TypeError(f"'{name}' must be a real numeric array; got dtype {arr.dtype}")
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"'{name}' must be finite; got NaN or inf entries")
    scale = max(float(np.max(np.abs(cov), initial=0.0)), 1e-300)
    if np.max(np.abs(cov - cov.T), initial=0.0) > 1e-9 * scale:
        raise ValueError("'obs.covariance' must be symmetric; got an asymmetric matrix (symmetrize it: (C + C.T)/2)")
    if obs.replicates is not None:
        reps = np.asarray(obs.replicates)
        if reps.ndim != 2 or reps.shape[1] != k or not np.all(np.isfinite(reps)):
            raise ValueError(f"'obs.replicates' must be a finite array of shape (B, {k}); got shape {reps.shape}")
    return obs


def _check_solver(solver: object) -> str:
    if not isinstance(solver, str) or solver.upper() not in _SOLVERS:
        raise ValueError(f"'solver' must be 'SCS' or 'CLARABEL'; got {solver!r}")
    return solver.upper()


def _check_positive(name: str, value: object, *, upper: float = math.inf) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"'{name}' must be a number; got {value!r}")
    if not 0 < float(value) < upper:
        raise ValueError(f"'{name}' must lie in (0, {upper}); got {value!r}")
    return float(value)


def _check_int(name: str, value: object, *, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or int(value) < minimum:
        raise ValueError(f"'{name}' must be an integer >= {minimum}; got {value!r}")
    return int(value)


def _check_bool(name: str, value: object) -> bool:
    if not isinstance(value, (bool, np.bool_)):
        raise TypeError(f"'{name}' must be True or False; got {value!r}")
    return bool(value)


def _check_vector(name: str, value: object, size: int) -> np.ndarray:
    arr = np.asarray(value)
    if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
        raise TypeError(f"'{name}' must be a real numeric array; got dtype {arr.dtype}")
    if arr.shape != (size,):
        raise ValueError(f"'{name}' must have shape ({size},); got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"'{name}' must be finite; got NaN or inf entries")
    return arr.astype(float)


def _check_unitary(name: str, value: object, d: int) -> np.ndarray:
    arr = np.asarray(value)
    if not np.issubdtype(arr.dtype, np.number):
        raise TypeError(f"'{name}' must be a numeric matrix; got dtype {arr.dtype}")
    if arr.shape != (d, d):
        raise ValueError(f"'{name}' must have shape ({d}, {d}); got {arr.shape}")
    u = arr.astype(complex)
    if not np.all(np.isfinite(u)) or not np.allclose(u.conj().T @ u, np.eye(d), atol=1e-8):
        raise ValueError(f"'{name}' must be unitary (U^dagger U = I to 1e-8); got a non-unitary matrix")
    return u


# ---- whitening ---------------------------------------------------------------------------------
class _Whitened:
    """Whitened design ``W design = Q R`` and the linear algebra the fit needs on ``rs = R / s``.

    ``W^T W = (C + eps I)^{-1}``.  Small problems (or rank-deficient, or fewer observations than
    parameters) keep the SVD of ``rs``; a large square full-rank ``rs`` (three qubits) uses
    triangular solves instead, with ``s`` and ``sigma_min`` from Lanczos iterations: the dense
    SVD of a 3969 x 3969 factor took 80 s on two cores, the rest of the whitening about 10 s.
    """

    def __init__(self, design: np.ndarray, cov: np.ndarray, ridge: float, *, svd_max: int | None = None) -> None:
        k, p = design.shape
        cov = (cov + cov.T) / 2
        diag = np.diag(cov)
        self.ridge = max(ridge * float(np.clip(diag, 0.0, None).sum()) / k, _RIDGE_FLOOR)
        if not np.any(cov - np.diag(diag)):
            self.w = np.diag(1.0 / np.sqrt(np.clip(diag, 0.0, None) + self.ridge))
        else:
            try:
                chol = np.linalg.cholesky(cov + self.ridge * np.eye(k))
                self.w = scipy.linalg.solve_triangular(chol, np.eye(k), lower=True)
            except np.linalg.LinAlgError:
                # slightly indefinite beyond the ridge: clip the spectrum instead
                lam, vec = np.linalg.eigh(cov)
                self.w = (vec / np.sqrt(np.clip(lam, 0.0, None) + self.ridge)).T
        self.a = self.w @ design
        if k == p and not np.any(np.tril(self.a, -1)):
            # already triangular (unit rows with a diagonal covariance): Q = I
            self.q, r = np.eye(k), self.a.copy()
        else:
            self.q, r = np.linalg.qr(self.a, mode="reduced")
        self.p = p
        limit = _SVD_MAX if svd_max is None else svd_max
        self.triangular = False
        if r.shape[0] == p and p > limit:
            scale = float(scipy.sparse.linalg.svds(r, k=1, return_singular_vectors=False)[0])
            rs = r / scale
            smin = self._smallest_singular_value(rs)
            if smin > _RANK_TOL:
                self.triangular = True
                self.scale, self.rs, self.rank, self.sigma_min = scale, rs, p, smin * scale
                return
        u, svals, vt = np.linalg.svd(r, full_matrices=True)
        scale = float(svals[0]) if svals.size and svals[0] > 0 else 1.0
        self.scale = scale
        self.rs = r / scale
        self.u, self.svals, self.vt = u, svals / scale, vt
        self.rank = int(np.sum(self.svals > _RANK_TOL))
        self.sigma_min = float(self.svals[-1] * scale) if self.rank == p else 0.0

    @staticmethod
    def _smallest_singular_value(rs: np.ndarray) -> float:
        """``sigma_min(rs)`` by shift-invert Lanczos on ``rs^T rs`` (two triangular solves per step)."""
        p = rs.shape[0]
        if np.min(np.abs(np.diag(rs))) <= _RANK_TOL:
            return 0.0
        gram = scipy.sparse.linalg.LinearOperator((p, p), matvec=lambda v: rs.T @ (rs @ v), dtype=float)
        inv = scipy.sparse.linalg.LinearOperator(
            (p, p), dtype=float,
            matvec=lambda v: scipy.linalg.solve_triangular(rs, scipy.linalg.solve_triangular(rs, v, trans="T")))
        lam = scipy.sparse.linalg.eigsh(gram, k=1, sigma=0.0, OPinv=inv, which="LM", tol=1e-12,
                                        return_eigenvectors=False)
        return float(np.sqrt(max(lam[0], 0.0)))

    def solve(self, y: np.ndarray) -> np.ndarray:
        """Least-squares ``b`` for ``rs b = y`` (minimum norm when ``rs`` is rank deficient)."""
        if self.triangular:
            return scipy.linalg.solve_triangular(self.rs, y)
        r = self.rank
        return self.vt[:r].T @ ((self.u[:, :r].T @ y) / self.svals[:r])

    def quadratic_minimum(self, y: np.ndarray, c: np.ndarray) -> float:
        """Lower bound on ``min_b ||rs b - y||^2 - c @ b`` over blocks with ``|b_ij| <= 1``.

        Exact (unconstrained minimum) on the identified subspace; the part of ``c`` outside it
        contributes ``-||c_perp||_1`` (the box).
        """
        if self.triangular:
            blin = scipy.linalg.solve_triangular(self.rs, y)
            z = scipy.linalg.solve_triangular(self.rs, c, trans="T")
            res = y - self.rs @ blin
            return float(res @ res - c @ blin - (z @ z) / 4)
        r = self.rank
        uy = self.u[:, :r].T @ y
        a = self.vt[:r] @ c
        c_perp = c - self.vt[:r].T @ a
        s_r = self.svals[:r]
        outside = y - self.u[:, :r] @ uy  # part of y no b can reach (direct, no cancellation)
        quad = float(np.sum(-a * uy / s_r - a**2 / (4 * s_r**2)))
        return float(outside @ outside) + quad - float(np.abs(c_perp).sum())


def _whiten(design: np.ndarray, cov: np.ndarray, ridge: float) -> _Whitened:
    return _Whitened(design, cov, ridge)


# ---- solving -----------------------------------------------------------------------------------
def _compile_once(problem: cp.Problem, solver: str) -> None:
    """Compile ``problem`` for ``solver`` before its first solve, keeping its warm start.

    cvxpy empties a problem's warm-start cache when it first compiles it, i.e. inside the
    first solve.  A starting point set before that (``CptpFitter._restore_solver_state`` on a
    freshly built fitter, as in a worker process) would be lost and the first replicate of a
    group solved from a cold start, so its answer would depend on how the replicates were
    split over processes (seen: last-digit differences).
    """
    done = problem.__dict__.setdefault("_robusttomo_compiled", set())
    if solver not in done:
        saved = dict(problem._solver_cache)
        problem.get_problem_data(solver)
        problem._solver_cache.update(saved)
        done.add(solver)


def _solve(problem: cp.Problem, solver: str, *, eps: float, scs_max_iters: int) -> tuple[bool, str]:
    """Run one solver; return (usable, note).  ``usable`` means the solver claims optimality."""
    if solver == "SCS":
        # SCS starts from the problem's last optimal point (CptpFitter sets that point explicitly
        # where the answer must not depend on what was solved before)
        opts = {"eps_abs": eps, "eps_rel": eps, "max_iters": scs_max_iters, "warm_start": True}
    else:
        # a fresh interior-point solver every time: cvxpy would otherwise update a cached one,
        # which keeps the scaling of the first data it saw, so answers would depend on history;
        # one thread: answers do not depend on the machine's core count, and no solver thread
        # pool exists that a forked worker process would inherit without its threads (deadlock)
        opts = {"tol_gap_abs": _CLARABEL_TOL, "tol_gap_rel": _CLARABEL_TOL, "tol_feas": _CLARABEL_TOL,
                "max_iter": 500, "warm_start": False, "max_threads": 1}
    try:
        with warnings.catch_warnings():
            # an inaccurate solve is handled through the status and the certificate
            warnings.simplefilter("ignore")
            _compile_once(problem, solver)
            problem.solve(solver=solver, **opts)
    except cp.error.SolverError as exc:
        return False, f"{solver} failed ({str(exc).splitlines()[0]})"
    status = problem.status
    if status == cp.OPTIMAL:
        return True, f"{solver}: optimal"
    return False, f"{solver}: status {status!r}"


def _repair(x: np.ndarray, n: int) -> tuple[np.ndarray, float, float]:
    """Mix in the completely depolarizing channel until the Choi matrix is PSD.

    Returns ``(x_repaired, psd_violation, alpha)``; mixing keeps trace preservation and scales
    ``x`` by ``1 - alpha``.
    """
    m = 4**n
    lmin = float(np.linalg.eigvalsh(_choi_from_x(x, n))[0])
    violation = max(0.0, -lmin)
    if violation == 0.0:
        return x, 0.0, 0.0
    # (1 - a) lmin + a / m >= 0, with a hair of margin for rounding
    alpha = min(1.0, violation * (1 + 1e-9) / (1.0 / m + violation) + 1e-15)
    return (1 - alpha) * x, violation, alpha


@dataclass(frozen=True)
class _Candidate:
    x: np.ndarray
    chi2: float
    lower_bound: float
    psd_violation: float
    alpha: float
    solver: str


class CptpFitter:
    """Weighted least squares over CPTP channels, built once and re-solved for new values.

    **Objective.**  With ``C`` the covariance of the observations, ``W`` a whitening matrix,
    ``W^T W = (C + eps I)^{-1}``, the fit is

        minimize    ``chi2(b) = || W (design @ b - values) ||_2**2``
        over        ``x = (t, b)``  (``t = R[1:, 0]``, ``b = R[1:, 1:].reshape(-1)``, ``R[0, :] = e_0``)
        subject to  ``J(x) >= 0``   (complete positivity; trace preservation holds by construction),

    with ``J(x) = (1/d**2) sum_ij R_ij P_j^T (x) P_i`` the trace-1 Choi matrix (module docstring).
    The ridge ``eps = max(ridge * tr(C) / k, 1e-16)`` regularizes a singular covariance: the
    directions ``C`` leaves unconstrained get variance ``eps``; with ``C = 0`` (exact data) the fit
    is ordinary least squares.  Internally ``W design = Q R`` (thin QR) and the solvers minimize
    ``||R b / s - Q^T W values / s||_2`` (``s = ||R||_2``; same minimizer, norm rather than its
    square so the solver's tolerance acts linearly on the residual); ``Q^T W values / s`` is a
    :class:`cvxpy.Parameter`.

    **Non-unital rule.**  The data do not determine ``t``.  The point estimate is, among the
    best fits, the CPTP channel whose ``t`` is closest (Euclidean) to ``target_nonunital``.
    When the design identifies the unital block, the objective is strictly convex in ``b``, so
    every best fit has the same block ``b*``; the rule is then the second program

        minimize ``||t - target_nonunital||_2``  s.t.  ``J(t, b_1) >= 0``,

    with ``b_1`` the first stage's certified block (within ``accuracy`` standard errors of
    ``b*``); it is skipped when ``t = target_nonunital`` is already feasible.  This program
    usually has no interior (at a boundary fit ``t`` is confined to a lower-dimensional set),
    where SCS does not converge, so it is solved by Clarabel first and SCS second, whatever
    ``solver`` says.  (Holding ``b``
    fixed, rather than allowing a chi-square tolerance, keeps the program well posed: a
    tolerance band around the minimum is a sliver with no room for the solvers.)  With the
    default ``target_nonunital = 0`` this is the most unital best fit.  When the design leaves
    directions of the block unidentified, the rule acts at the block the first stage found.

    **Accuracy and fallback.**  SCS runs with ``eps_abs = eps_rel = clip(0.01 accuracy / s,
    1e-10, 1e-8)``: from the data's own uncertainty (``1/s`` is the smallest standard error of a
    unit-norm combination of block entries), 1e-10 for exact data.  Each solution is
    made exactly feasible (:class:`SolveResiduals` ``repair_weight``) and certified by a duality
    gap: ``chi2(x) - L`` with ``L`` a lower bound on the CPTP minimum from the solver's dual
    matrix.  A stage is accepted when the bound on the distance to the exact optimum is at most
    ``accuracy`` standard errors (default 0.1: the solver then adds at most 1% to the variance
    of any linear function of the block) or ``absolute_accuracy`` in Frobenius norm.  When the
    first solver reports anything but optimal, raises, or misses the certificate, the other
    solver (Clarabel for SCS) re-solves the stage; ``fell_back`` and ``message`` say so.

    Parameters
    ----------
    obs : LinearObservations
        Observations of the unital block (:mod:`robusttomo.fit`).
    solver : {"SCS", "CLARABEL"}
        First solver of the fit and of the region programs; the other one is the fallback.
    accuracy : float
        Target for the solver-induced error of the unital block, in standard errors of the data
        (Mahalanobis distance to the exact optimum), in ``(0, 1)``.
    absolute_accuracy : float
        Alternative target, Frobenius distance of the unital block to the exact optimum; it is
        what certifies fits of (nearly) exact data, whose standard errors vanish.
    ridge : float
        Relative ridge added to the covariance (see Objective).
    target_nonunital : ndarray, shape (D,), float, or None
        Target for the non-unital rule; None means zeros (the most unital best fit).
    scs_max_iters : int
        SCS iteration limit (a tiny value forces the fallback, for testing).

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo.channels import depolarizing
    >>> from robusttomo.fit import LinearObservations
    >>> from robusttomo.reconstruct import CptpFitter
    >>> truth = depolarizing(1, 0.9)
    >>> obs = LinearObservations(1, np.eye(9), truth.unital_block.reshape(-1), np.zeros((9, 9)),
    ...                          tuple(f"M{i}" for i in range(9)))
    >>> fit = CptpFitter(obs).fit()
    >>> fit.status.value, bool(np.allclose(fit.unital_block, truth.unital_block, atol=1e-6))
    ('certified', True)
    """

    def __init__(
        self,
        obs: LinearObservations,
        *,
        solver: str = "SCS",
        accuracy: float = 0.1,
        absolute_accuracy: float = 1e-6,
        ridge: float = 1e-9,
        target_nonunital: np.ndarray | None = None,
        scs_max_iters: int = 100_000,
    ) -> None:
        self._obs = _check_observations(obs)
        self._solver = _check_solver(solver)
        self._accuracy = _check_positive("accuracy", accuracy, upper=1.0)
        self._abs_accuracy = _check_positive("absolute_accuracy", absolute_accuracy, upper=1.0)
        self._ridge_rel = _check_positive("ridge", ridge, upper=1.0)
        self._scs_max_iters = _check_int("scs_max_iters", scs_max_iters, minimum=1)
        n = obs.n_qubits
        self._n = n
        self._d = 2**n
        self._m = 4**n
        self._dd = self._m - 1
        self._nx = self._dd + self._dd**2
        self._t0 = (np.zeros(self._dd) if target_nonunital is None
                    else _check_vector("target_nonunital", target_nonunital, self._dd))
        self._design = np.array(obs.design, dtype=float)
        self._wh = _whiten(self._design, np.asarray(obs.covariance, dtype=float), self._ridge_rel)
        wh = self._wh
        self._py = wh.q.T @ wh.w / wh.scale  # values -> projected whitened values
        self._scs_eps = float(np.clip(0.01 * self._accuracy / wh.scale, _SCS_EPS_MIN, _SCS_EPS_MAX))
        self._zmat, self._z0, _, _ = _choi_basis(n)
        self._rs_sparse = sp.csr_matrix(np.where(np.abs(wh.rs) > 1e-15, wh.rs, 0.0))
        self._ys = cp.Parameter(wh.rs.shape[0], name="whitened_values")
        self._build_fit_problem()
        self._region_cache: dict[str, object] = {}

    # ---- problem construction ---------------------------------------------------------------
    def _choi_expr(self, x: cp.Variable) -> cp.Expression:
        size = 2 * self._m
        return cp.reshape(self._zmat @ x + self._z0, (size, size), order="F")

    def _build_fit_problem(self) -> None:
        x = cp.Variable(self._nx, name="ptm_entries")
        psd = self._choi_expr(x) >> 0
        objective = cp.Minimize(cp.norm(self._rs_sparse @ x[self._dd:] - self._ys, 2))
        self._fit_x = x
        self._fit_psd = psd
        # one Problem per solver so each keeps its own compiled form and warm start
        self._fit_problems = {s: cp.Problem(objective, [psd]) for s in _SOLVERS}
        # non-unital rule: min ||t - target|| s.t. J(t, b_fixed) >= 0, b_fixed entering as an offset
        size = 2 * self._m
        self._zmat_t = self._zmat[:, : self._dd]
        self._zmat_b = self._zmat[:, self._dd:]
        t = cp.Variable(self._dd, name="nonunital")
        self._rule_offset = cp.Parameter(size * size, name="choi_offset")
        self._t_target = cp.Parameter(self._dd, name="target_nonunital")
        cons = [cp.reshape(self._zmat_t @ t + self._rule_offset, (size, size), order="F") >> 0]
        rule_obj = cp.Minimize(cp.norm(t - self._t_target, 2))
        self._rule_t = t
        self._fiber_offset = cp.Parameter(size * size, name="fiber_offset")
        self._fiber_b = np.zeros(self._dd**2)
        self._region_t = cp.Variable(self._dd, name="nonunital_region")
        self._region_w = cp.Variable(self._dd**2, name="block_deviation")
        self._region_r = cp.Parameter(nonneg=True, name="region_radius")
        self._region_c = cp.Parameter(self._wh.rs.shape[0], name="region_centre")
        self._rule_problems = {s: cp.Problem(rule_obj, cons) for s in _SOLVERS}

    def _region_problem(self, kind: str) -> tuple[cp.Parameter, dict[str, cp.Problem]]:
        """Parameterized program over the region, in centred and scaled coordinates.

        The block is written ``b = b_fit + r w`` with ``r`` the region's radius in the scaled
        objective, so the region ``||rs b - ys|| <= r`` becomes ``||rs w + c|| <= 1``,
        ``c = (rs b_fit - ys) / r``: every variable is of order one, which SCS needs (in the raw
        coordinates it took about ten times more iterations).  ``r = 0`` holds the block at
        ``b_fit``.  ``kind`` is ``"linear"`` (minimize ``direction @ (t, w)``) or
        ``"diamond_min"``.  Returns ``(parameter, problems)``; :meth:`_region_x` reads the point.
        """
        if kind in self._region_cache:
            return self._region_cache[kind]  # type: ignore[return-value]
        size, m, d, dd = 2 * self._m, self._m, self._d, self._dd
        t, w = self._region_t, self._region_w
        jx = cp.reshape(self._zmat_t @ t + self._region_r * (self._zmat_b @ w) + self._fiber_offset,
                        (size, size), order="F")
        cons = [jx >> 0, cp.norm(self._rs_sparse @ w + self._region_c, 2) <= 1]
        if kind == "linear":
            param = cp.Parameter(self._nx, name="direction")
            objective = cp.Minimize(param[:dd] @ t + param[dd:] @ w)
        else:
            # min s  s.t.  Z >= 0, Z >= d (J(x) - J_U), tr_out Z <= s I, with x in the region: for
            # fixed x the dual diamond-norm program of "Simpler semidefinite programs for
            # completely bounded norms", Chicago J. Theor. Comput. Sci. 2013 (optimum
            # (1/2)||L - U||_diamond), here minimized jointly over the channel
            z = cp.Variable((size, size), PSD=True, name="diamond_dual")
            half = cp.Variable(name="half_diamond")
            param = cp.Parameter((size, size), name="target_choi_embedded")
            cons += [z - d * (jx - param) >> 0, half * np.eye(2 * d) - _block_partial_trace(z, m, d) >> 0]
            objective = cp.Minimize(half)
        entry = (param, {q: cp.Problem(objective, cons) for q in _SOLVERS})
        self._region_cache[kind] = entry
        return entry

    def _region_x(self) -> np.ndarray | None:
        t, w = self._region_t.value, self._region_w.value
        if t is None or w is None:
            return None
        return np.concatenate([t, self._fiber_b + float(self._region_r.value) * np.asarray(w)])

    def _direction(self, c: np.ndarray) -> np.ndarray:
        """Objective ``c @ x`` in the region coordinates ``(t, w)`` (constant part dropped)."""
        return np.concatenate([c[: self._dd], float(self._region_r.value) * c[self._dd:]])

    def _witness_problem(self) -> tuple[cp.Variable, cp.Parameter, dict[str, cp.Problem]]:
        # max Re tr(J_D W)  s.t.  0 <= W <= rho (x) I, tr rho = 1 (same reference), embedded
        if "witness" not in self._region_cache:
            size, d = 2 * self._m, self._d
            jd = cp.Parameter((size, size), name="difference_choi_embedded")
            w = cp.Variable((size, size), PSD=True, name="witness")
            rho = cp.Variable((2 * d, 2 * d), PSD=True, name="input_state")
            cons = [_block_kron(rho, d) - w >> 0, cp.trace(rho) == 2]
            obj = cp.Maximize(cp.trace(jd @ w) / 2)
            self._region_cache["witness"] = (w, jd, {q: cp.Problem(obj, cons) for q in _SOLVERS})
        return self._region_cache["witness"]  # type: ignore[return-value]

    # ---- evaluation helpers -------------------------------------------------------------------
    def _chi2(self, b: np.ndarray, values: np.ndarray) -> float:
        r = self._wh.a @ b - self._wh.w @ values
        return float(r @ r)

    def _outside(self, values: np.ndarray) -> float:
        """Part of the chi-square no unital block can explain (outside the range of W design)."""
        w_v = self._wh.w @ values
        r = w_v - self._wh.q @ (self._wh.q.T @ w_v)
        return float(r @ r)

    def _linear(self, values: np.ndarray) -> tuple[np.ndarray, float]:
        # minimum-norm solution when the design leaves directions unidentified
        blin = self._wh.solve(self._py @ values)
        return blin, self._chi2(blin, values)

    def _dual_lower_bound(self, ydual: np.ndarray, values: np.ndarray) -> float:
        """Lower bound on min chi2 over CPTP from a PSD matrix ``ydual`` (squared-objective scaling)."""
        wh = self._wh
        lam, vec = np.linalg.eigh((ydual + ydual.T) / 2)
        ypsd = (vec * np.clip(lam, 0.0, None)) @ vec.T
        yv = ypsd.reshape(-1, order="F")
        c = self._zmat.T @ yv
        ct, cb = c[: self._dd], c[self._dd:]
        # min over b of ||rs b - y||^2 - cb . b, in closed form
        quad = wh.quadratic_minimum(self._py @ values, cb)
        # t_i = tr(P_i rho) with rho = L(I/d) a density matrix, so c_t . t <= lambda_max(sum c_i P_i);
        # unidentified block directions use |R_ij| <= 1
        c_state = np.einsum("i,iab->ab", ct, _pauli.pauli_stack(self._n)[1:])
        t_term = float(np.linalg.eigvalsh((c_state + c_state.conj().T) / 2)[-1])
        lb_scaled = -float(yv @ self._z0) + quad - max(t_term, 0.0)
        return wh.scale**2 * lb_scaled + self._outside(values)

    def _candidate(self, x_raw: np.ndarray, values: np.ndarray, lower: float, solver: str) -> _Candidate:
        x, viol, alpha = _repair(x_raw, self._n)
        chi2 = self._chi2(x[self._dd:], values)
        return _Candidate(x, chi2, lower, viol, alpha, solver)

    def _bounds(self, cand: _Candidate, lower: float) -> tuple[float, float, float]:
        gap = max(cand.chi2 - lower, 0.0)
        maha = math.sqrt(gap)
        frob = maha / self._wh.sigma_min if self._wh.sigma_min > 0 else math.inf
        return gap, maha, frob

    def _order(self) -> list[str]:
        return [self._solver] + [s for s in _SOLVERS if s != self._solver]

    # ---- stages -------------------------------------------------------------------------------
    def _stage_fit(self, values: np.ndarray, chi2_lin: float, notes: list[str]) -> tuple[_Candidate, bool]:
        best: _Candidate | None = None
        best_gap = math.inf
        for k, solver in enumerate(self._order()):
            problem = self._fit_problems[solver]
            ok, note = _solve(problem, solver, eps=self._scs_eps, scs_max_iters=self._scs_max_iters)
            x_raw = self._fit_x.value
            if x_raw is None or not np.all(np.isfinite(x_raw)):
                notes.append(f"fit: {note}; no solution")
                continue
            ydual = self._fit_psd.dual_value
            f_norm = float(problem.value) if problem.value is not None else 0.0
            cand = self._candidate(np.asarray(x_raw, dtype=float), values, chi2_lin, solver)
            lower = chi2_lin
            if ydual is not None and np.all(np.isfinite(ydual)) and np.isfinite(f_norm):
                # the norm objective's multiplier times 2||r|| is the squared objective's multiplier
                dual = self._dual_lower_bound(2.0 * f_norm * np.asarray(ydual), values)
                # a bound above a feasible point's chi2 can only be rounding: never trust it
                if dual <= cand.chi2 * (1 + 1e-12) + 1e-12:
                    lower = max(lower, min(dual, cand.chi2))
                else:
                    notes.append(f"fit: dual bound {dual:.6g} above the attained {cand.chi2:.6g} ignored")
            cand = _Candidate(cand.x, cand.chi2, lower, cand.psd_violation, cand.alpha, solver)
            gap, maha, frob = self._bounds(cand, lower)
            good = maha <= self._accuracy or frob <= self._abs_accuracy
            notes.append(f"fit: {note}; certified distance to optimum {maha:.2g} standard errors, "
                         f"{frob:.2g} Frobenius")
            if gap < best_gap:
                best, best_gap = cand, gap
            # the first solver must also claim optimality; the fallback is judged by the certificate
            if good and (ok or k > 0):
                return cand, k > 0
            if k == 0:
                notes.append(f"fit: {solver} answer rejected, re-solving with the fallback")
        if best is None:
            raise SolverError("CPTP fit failed with every solver: " + "; ".join(notes))
        return best, True

    def _stage_rule(self, values: np.ndarray, first: _Candidate, notes: list[str]) -> tuple[_Candidate, bool, bool]:
        """Non-unital rule: closest ``t`` to the target with the first stage's unital block held fixed.

        Returns ``(candidate, fell_back, rule_applied)``.
        """
        b1 = first.x[self._dd:]
        direct = np.concatenate([self._t0, b1])
        if np.linalg.eigvalsh(_choi_from_x(direct, self._n))[0] >= 0.0:
            # the target itself is compatible with the fitted block: no program needed
            return _Candidate(direct, first.chi2, first.lower_bound, first.psd_violation, first.alpha,
                              first.solver), False, True
        self._rule_offset.value = self._zmat_b @ b1 + self._z0
        self._t_target.value = self._t0
        # interior-point first: this program usually has no interior (the fitted block leaves t a
        # lower-dimensional set), where SCS does not converge
        for k, solver in enumerate(("CLARABEL", "SCS")):
            ok, note = _solve(self._rule_problems[solver], solver, eps=self._scs_eps,
                              scs_max_iters=min(self._scs_max_iters, _RULE_MAX_ITERS))
            t_raw = self._rule_t.value
            if t_raw is None or not np.all(np.isfinite(t_raw)):
                notes.append(f"non-unital rule: {note}; no solution")
                continue
            cand = self._candidate(np.concatenate([np.asarray(t_raw, dtype=float), b1]), values,
                                   first.lower_bound, solver)
            _, maha, frob = self._bounds(cand, first.lower_bound)
            # the block is certified by the first stage's bound; the rule's t is as accurate as
            # the solver (an "almost solved" interior-point answer is kept, and said so)
            if maha <= self._accuracy or frob <= self._abs_accuracy:
                notes.append(f"non-unital rule: {note}")
                return cand, k > 0, True
            notes.append(f"non-unital rule: {note}; after repair {maha:.2g} standard errors, {frob:.2g} Frobenius")
        # typically the fitted block sits on the boundary of the CPTP set, where it leaves t
        # (almost) no freedom and the program has no interior: the first stage's t is the answer
        notes.append("non-unital rule: not applied (no accurate solution); kept the first-stage non-unital vector")
        return first, True, False

    # ---- public API -----------------------------------------------------------------------------
    @property
    def observations(self) -> LinearObservations:
        """The observations this fitter was built for."""
        return self._obs

    def _solver_state(self) -> dict[str, dict[str, np.ndarray]]:
        """Copy of the SCS starting points of the fit and rule programs (plain arrays, picklable).

        SCS warm-starts from ``x, y, s`` of a problem's last optimal solve; nothing else carries
        over between solves (Clarabel always starts afresh, see ``_solve``).  Keys are
        ``"fit"`` and ``"rule"``; a missing key means a cold start.
        """
        out: dict[str, dict[str, np.ndarray]] = {}
        for name, problem in (("fit", self._fit_problems["SCS"]), ("rule", self._rule_problems["SCS"])):
            cached = problem._solver_cache.get("SCS")
            if cached is not None:
                out[name] = {k: np.array(cached[k], dtype=float) for k in ("x", "y", "s")}
        return out

    def _restore_solver_state(self, state: dict[str, dict[str, np.ndarray]]) -> None:
        """Make the next solves start exactly as after :meth:`_solver_state` was taken."""
        for name, problem in (("fit", self._fit_problems["SCS"]), ("rule", self._rule_problems["SCS"])):
            problem._solver_cache.pop("SCS", None)
            if name in state:
                problem._solver_cache["SCS"] = {k: np.array(v, dtype=float) for k, v in state[name].items()}

    def fit(self, values: np.ndarray | None = None, *, nonunital_rule: bool = True) -> ChannelFit:
        """Fit a CPTP channel to ``values`` (default: the observations' own values).

        Parameters
        ----------
        values : ndarray, shape (k,), float, or None
            Observed values (e.g. a bootstrap replicate) for the fixed design and covariance.
        nonunital_rule : bool
            Apply the non-unital rule (second program).  False skips it: the unital block is the
            same, ``t`` is whatever feasible vector the first stage returned (``rule_applied``
            False); use it for replicates whose ``t`` is not needed.

        Returns
        -------
        ChannelFit

        Raises
        ------
        SolverError
            If neither solver returns a solution.
        """
        k = self._obs.n_observations
        v = np.asarray(self._obs.values, dtype=float) if values is None else _check_vector("values", values, k)
        return self._fit(v, _check_bool("nonunital_rule", nonunital_rule))

    def _fit(self, v: np.ndarray, rule: bool) -> ChannelFit:
        notes: list[str] = []
        self._ys.value = self._py @ v
        blin, chi2_lin = self._linear(v)
        first, fb1 = self._stage_fit(v, chi2_lin, notes)
        if rule:
            final, fb2, rule_applied = self._stage_rule(v, first, notes)
        else:
            final, fb2, rule_applied = first, False, False
        gap, maha, frob = self._bounds(final, first.lower_bound)
        certified = maha <= self._accuracy or frob <= self._abs_accuracy
        r = _ptm_from_x(final.x, self._n)
        channel = Channel.from_ptm(r)
        choi = channel.choi
        tr_out = np.einsum("iaja->ij", choi.reshape(self._d, self._d, self._d, self._d))
        tp = float(np.max(np.abs(tr_out - np.eye(self._d) / self._d)))
        residuals = SolveResiduals(
            psd_violation=final.psd_violation,
            repair_weight=final.alpha,
            tp_violation=tp,
            chi2_lower_bound=first.lower_bound,
            duality_gap=gap,
            mahalanobis_bound=maha,
            block_error_bound=frob,
        )
        lin_block = blin.reshape(self._dd, self._dd)
        lin_block.setflags(write=False)
        return ChannelFit(
            channel=channel,
            status=FitStatus.CERTIFIED if certified else FitStatus.INACCURATE,
            solver=first.solver,
            fell_back=fb1 or fb2,
            message="; ".join(notes),
            chi2=final.chi2,
            n_observations=self._obs.n_observations,
            n_parameters=self._dd**2,
            design_rank=self._wh.rank,
            residuals=residuals,
            linear_block=lin_block,
            chi2_linear=chi2_lin,
            linear_distance=float(np.linalg.norm(lin_block - channel.unital_block)),
            rule_applied=rule_applied,
        )

    def fit_replicates(
        self, replicates: np.ndarray | None = None, *, nonunital_rule: bool = True
    ) -> tuple[ChannelFit, ...]:
        """Fit every bootstrap replicate with the already-built problems (warm-started).

        Every replicate starts the solver from the same point, the one the fitter held when the
        call began (normally the point estimate's solution, after :meth:`fit`), and the fitter is
        left in that state afterwards.  So replicate ``i``'s fit depends only on its own values:
        any split of the replicates over calls or processes gives bit-identical fits.

        Parameters
        ----------
        replicates : ndarray, shape (B, k), float, or None
            Replicated values; None uses ``obs.replicates``.
        nonunital_rule : bool
            As in :meth:`fit`.

        Returns
        -------
        tuple of ChannelFit, length B
        """
        k = self._obs.n_observations
        reps = self._obs.replicates if replicates is None else replicates
        if reps is None:
            raise ValueError("'replicates' is None and the observations carry none; pass an array of shape (B, k)")
        reps = np.asarray(reps)
        if not np.issubdtype(reps.dtype, np.number) or np.iscomplexobj(reps):
            raise TypeError(f"'replicates' must be a real numeric array; got dtype {reps.dtype}")
        if reps.ndim != 2 or reps.shape[1] != k or reps.shape[0] == 0 or not np.all(np.isfinite(reps)):
            raise ValueError(f"'replicates' must be a finite array of shape (B, {k}) with B >= 1; got shape {reps.shape}")
        rule = _check_bool("nonunital_rule", nonunital_rule)
        state = self._solver_state()
        out = []
        try:
            for row in reps:
                self._restore_solver_state(state)
                out.append(self._fit(np.asarray(row, dtype=float), rule))
        finally:
            self._restore_solver_state(state)
        return tuple(out)

    # ---- ranges ---------------------------------------------------------------------------------
    def _delta(self, level: object, region: object) -> tuple[float, float, Region]:
        lev = _check_positive("level", level, upper=1.0)
        if not isinstance(region, Region):
            raise TypeError(f"'region' must be a robusttomo.reconstruct.Region; got {region!r}")
        df = 1 if region is Region.PROFILE else max(self._wh.rank, 1)
        return lev, float(scipy.stats.chi2.ppf(lev, df)), region

    def _check_fit(self, fit: object, values: np.ndarray) -> ChannelFit:
        if not isinstance(fit, ChannelFit):
            raise TypeError(f"'fit' must be a ChannelFit; got {type(fit).__name__}")
        if fit.channel.n_qubits != self._n:
            raise ValueError(f"'fit' is a {fit.channel.n_qubits}-qubit fit; this fitter is for {self._n} qubit(s)")
        chi2 = self._chi2(fit.unital_block.reshape(-1), values)
        if not math.isclose(chi2, fit.chi2, rel_tol=1e-6, abs_tol=1e-9):
            raise ValueError(f"'fit' does not belong to these values: its chi2 is {fit.chi2:.6g}, "
                             f"recomputed {chi2:.6g}; pass the values it was fitted to")
        return fit

    def _region_extent(self, fit: ChannelFit, delta: float) -> float:
        """Bound on ``||b - b_fit||`` over the region (``inf`` when the block is not identified)."""
        if self._wh.sigma_min <= 0:
            return math.inf
        gap = fit.residuals.duality_gap
        # ||A(b - b*)||^2 <= chi2(b) - chi2(b*) <= delta + gap for b in the region, and
        # ||A(b_fit - b*)||^2 <= gap (see SolveResiduals)
        return (math.sqrt(delta + gap) + math.sqrt(gap)) / self._wh.sigma_min

    def _set_region(self, values: np.ndarray, fit: ChannelFit, delta: float) -> tuple[float, bool]:
        """Set the region parameters; return (chi2 acceptance bound, block held fixed)."""
        wh = self._wh
        resid = self._outside(values)
        ys = self._py @ values
        radius = math.sqrt(max(fit.chi2 + delta - resid, 0.0)) / wh.scale
        fixed = self._region_extent(fit, delta) <= self._abs_accuracy or radius <= 0.0
        b_fit = np.array(fit.unital_block, dtype=float).reshape(-1)
        self._fiber_b = b_fit
        self._fiber_offset.value = self._zmat_b @ b_fit + self._z0
        self._region_r.value = 0.0 if fixed else radius
        self._region_c.value = np.zeros(wh.rs.shape[0]) if fixed else (wh.rs @ b_fit - ys) / radius
        # a solution may sit outside the region by the solver tolerance: accept that much
        slack = delta * 1e-3 + self._accuracy**2 + (self._abs_accuracy * max(wh.sigma_min, 0.0)) ** 2
        return fit.chi2 + delta + slack, fixed

    def _solve_region(self, problem_by_solver: dict[str, cp.Problem], values: np.ndarray,
                      bound: float, eps: float, what: str, notes: list[str]) -> tuple[np.ndarray, str]:
        """Solve a region program with fallback; return the repaired point and the solver used."""
        tried = []
        for k, solver in enumerate(self._order()):
            ok, note = _solve(problem_by_solver[solver], solver, eps=eps,
                              scs_max_iters=min(self._scs_max_iters, _REGION_MAX_ITERS))
            x_raw = self._region_x()
            if x_raw is not None and np.all(np.isfinite(x_raw)):
                x, _, _ = _repair(np.asarray(x_raw, dtype=float), self._n)
                inside = self._chi2(x[self._dd:], values) <= bound
                if (ok or k > 0) and inside:
                    if k > 0:
                        notes.append(f"{what}: {'; '.join(tried)}; used {solver}")
                    return x, solver
                tried.append(note if inside else f"{note}, point outside the region")
            else:
                tried.append(f"{note}, no solution")
        raise SolverError(f"{what}: no solver returned a usable point ({'; '.join(tried)})")

    def nonunital_range(
        self,
        fit: ChannelFit,
        *,
        values: np.ndarray | None = None,
        level: float = 0.95,
        region: Region = Region.JOINT,
    ) -> NonunitalRange:
        """Range of each non-unital entry over the CPTP channels in the confidence region.

        For each ``i``, two semidefinite programs (one parameterized problem, the direction a
        :class:`cvxpy.Parameter`):

            minimize / maximize  ``t_i``
            subject to  ``J(x) >= 0``,  ``chi2(b) <= chi2(fit) + delta``,

        ``delta = chi2.ppf(level, rank)`` for :attr:`Region.JOINT` (the default: at least
        ``level`` simultaneous coverage of every entry, also at the CPTP boundary) or
        ``chi2.ppf(level, 1)`` for :attr:`Region.PROFILE` (pointwise, asymptotic, interior
        truths only; see :class:`Region`).

        Parameters
        ----------
        fit : ChannelFit
            The point estimate of these ``values`` (from :meth:`fit`).
        values : ndarray, shape (k,), or None
            Values ``fit`` was fitted to; None means ``obs.values``.
        level : float
            Confidence level in (0, 1).
        region : Region
            Which region.

        Returns
        -------
        NonunitalRange

        Raises
        ------
        SolverError
            If a program fails with both solvers.
        """
        k = self._obs.n_observations
        v = np.asarray(self._obs.values, dtype=float) if values is None else _check_vector("values", values, k)
        fit = self._check_fit(fit, v)
        lev, delta, region = self._delta(level, region)
        bound, fixed = self._set_region(v, fit, delta)
        eps = _REGION_EPS
        direction, problems = self._region_problem("linear")
        notes: list[str] = []
        lo, hi = np.zeros(self._dd), np.zeros(self._dd)
        argmin, argmax = [], []
        for i in range(self._dd):
            for sign, out, arg in ((1.0, lo, argmin), (-1.0, hi, argmax)):
                c = np.zeros(self._nx)
                c[i] = sign
                direction.value = self._direction(c)
                x, _ = self._solve_region(problems, v, bound, eps,
                                          f"{'min' if sign > 0 else 'max'} t[{i}]", notes)
                out[i] = x[i]
                arg.append(Channel.from_ptm(_ptm_from_x(x, self._n)))
        est = np.array(fit.nonunital_vector, dtype=float)
        # the point estimate is in the region: never report a range that excludes it
        lo, hi = np.minimum(lo, est), np.maximum(hi, est)
        for arr in (lo, hi, est):
            arr.setflags(write=False)
        return NonunitalRange(
            labels=_pauli.pauli_labels(self._n)[1:],
            minimum=lo,
            maximum=hi,
            estimate=est,
            argmin=tuple(argmin),
            argmax=tuple(argmax),
            max_is_bound=False,
            region=region,
            level=lev,
            delta_chi2=delta,
            chi2_ref=fit.chi2,
            block_held_fixed=fixed,
            method=("each end is the optimum of one SDP: min/max t_i over CPTP channels with "
                    f"chi2 <= chi2(estimate) + {delta:.4g} ({region.value} region, level {lev:g})"
                    + (_FIXED_NOTE if fixed else "")),
            notes="; ".join(notes) if notes else f"all {2 * self._dd} programs solved by {self._solver}",
        )

    def _witness(self, x: np.ndarray, target_embedded: np.ndarray, notes: list[str]) -> np.ndarray:
        """Linear functional ``c`` with ``c @ x' + const <= dd(x')`` for all ``x'``, tight at ``x``."""
        w, jd, problems = self._witness_problem()
        jd.value = self._d * (_embed(_choi_from_x(x, self._n)) - target_embedded)
        for k, solver in enumerate(self._order()):
            ok, note = _solve(problems[solver], solver, eps=1e-9, scs_max_iters=self._scs_max_iters)
            if w.value is not None and np.all(np.isfinite(w.value)) and (ok or k > 0):
                if k > 0:
                    notes.append(f"diamond witness: fell back ({note})")
                wv = np.asarray(w.value).reshape(-1, order="F")
                return (self._d / 2) * (self._zmat.T @ wv)
        raise SolverError("diamond witness program failed with every solver")

    def diamond_range(
        self,
        fit: ChannelFit,
        *,
        values: np.ndarray | None = None,
        nonunital: NonunitalRange | None = None,
        target_unitary: np.ndarray | None = None,
        level: float = 0.95,
        region: Region = Region.JOINT,
        maximum_rule: MaximumRule = MaximumRule.CERTIFIED,
        ascent_starts: int = 3,
        ascent_steps: int = 4,
    ) -> DiamondRange:
        """Range of the diamond distance ``(1/2)||L - U||_diamond`` over the confidence region.

        **Minimum** (one SDP, attained): with ``J_U`` the trace-1 Choi matrix of the target,

            minimize  ``s``
            over      ``x``, ``Z >= 0``
            s.t.      ``Z >= d (J(x) - J_U)``,  ``tr_out Z <= s I``,  ``J(x) >= 0``,
                      ``chi2(b) <= chi2(fit) + delta``;

        for fixed ``x`` this is the dual diamond-norm program of "Simpler semidefinite programs
        for completely bounded norms", Chicago J. Theor. Comput. Sci. 2013 (optimum
        ``(1/2)||L - U||_diamond``), so the joint program is the minimum over the region.

        **Maximum**: the maximum of a convex function over a convex set is not an SDP.
        ``maximum_attained`` is the largest value found at channels in the region: the point
        estimate, the minimizer, and the extreme points of the non-unital range programs are
        screened by the lower bound ``(1/2)||J_L - J_U||_1`` and the most promising are
        evaluated; from the ``ascent_starts`` best, each step takes the optimal primal witness
        ``W`` of the diamond program at the current channel (``dd(x') >= <d (J(x') - J_U), W>``
        for every ``x'``, equality at the current one) and maximizes that linear functional over
        the region, which never decreases the diamond distance.  ``maximum_certified`` bounds
        the maximum from above: for ``x`` in the region,
        ``dd(x) <= dd(estimate) + (d/2) ||R_x - R_estimate||_F`` (triangle inequality and
        ``||X||_diamond <= d ||J_X||_1 <= d ||R_X||_F``), with
        ``||t - t_est||`` bounded by the non-unital ranges and
        ``||b - b_est|| <= (sqrt(delta + gap) + sqrt(gap)) / sigma_min(W design)``
        (``gap`` the fit's certified duality gap); capped at 1.  It is certified up to the
        solvers' tolerance (about 1e-7).

        Parameters
        ----------
        fit : ChannelFit
            The point estimate of these ``values``.
        values : ndarray, shape (k,), or None
            Values ``fit`` was fitted to; None means ``obs.values``.
        nonunital : NonunitalRange or None
            The non-unital ranges for the same fit, level and region (computed when None).
        target_unitary : ndarray, shape (d, d), complex, or None
            Target unitary ``U``; None is the identity (the error channel's own distance).
        level : float
            Confidence level of the region.
        region : Region
            Which region.
        maximum_rule : MaximumRule
            Which maximum :attr:`DiamondRange.maximum` reports.
        ascent_starts : int
            Number of starting channels for the ascent (>= 1).
        ascent_steps : int
            Maximum number of ascent steps from each start (>= 0).

        Returns
        -------
        DiamondRange
        """
        from robusttomo.metrics import diamond_distance_details

        k = self._obs.n_observations
        v = np.asarray(self._obs.values, dtype=float) if values is None else _check_vector("values", values, k)
        fit = self._check_fit(fit, v)
        lev, delta, region = self._delta(level, region)
        if not isinstance(maximum_rule, MaximumRule):
            raise TypeError(f"'maximum_rule' must be a robusttomo.reconstruct.MaximumRule; got {maximum_rule!r}")
        starts = _check_int("ascent_starts", ascent_starts, minimum=1)
        steps = _check_int("ascent_steps", ascent_steps, minimum=0)
        u = np.eye(self._d, dtype=complex) if target_unitary is None else _check_unitary("target_unitary", target_unitary, self._d)
        if nonunital is None:
            nonunital = self.nonunital_range(fit, values=v, level=lev, region=region)
        elif not isinstance(nonunital, NonunitalRange):
            raise TypeError(f"'nonunital' must be a NonunitalRange or None; got {type(nonunital).__name__}")
        elif not (math.isclose(nonunital.delta_chi2, delta) and math.isclose(nonunital.chi2_ref, fit.chi2)):
            raise ValueError("'nonunital' was computed for another fit, level or region; pass the matching one or None")
        target_channel = Channel.from_unitary(u)
        target_emb = _embed(target_channel.choi)
        notes: list[str] = []

        evaluated: dict[bytes, float] = {}

        def evaluate(ch: Channel) -> float:
            # the estimate and the minimizer are also candidates: the evaluation is deterministic
            # (a cold solve of the same program), so a repeat would return the same number
            key = np.ascontiguousarray(ch.ptm).tobytes()
            if key in evaluated:
                return evaluated[key]
            res = diamond_distance_details(ch, u)
            if not np.isfinite(res.value):
                raise SolverError(f"diamond distance evaluation failed: {res.message}")
            if res.fell_back:
                notes.append(f"evaluation: {res.message}")
            evaluated[key] = float(res.value)
            return evaluated[key]

        def x_of(ch: Channel) -> np.ndarray:
            r = ch.ptm
            return np.concatenate([r[1:, 0], r[1:, 1:].reshape(-1)])

        estimate = evaluate(fit.channel)
        bound, fixed = self._set_region(v, fit, delta)
        eps = _REGION_EPS
        # minimum: one joint SDP
        tparam, problems = self._region_problem("diamond_min")
        tparam.value = target_emb
        xmin, _ = self._solve_region(problems, v, bound, eps, "diamond minimum", notes)
        argmin = Channel.from_ptm(_ptm_from_x(xmin, self._n))
        minimum = min(evaluate(argmin), estimate)
        if estimate <= minimum:
            argmin = fit.channel
        # maximum: evaluate candidate extreme points, then ascend from the best
        cands = [fit.channel, argmin, *nonunital.argmin, *nonunital.argmax]
        # screen by a cheap lower bound, half the trace norm of the Choi difference (the maximally
        # entangled input is one admissible input), and evaluate the diamond program only for the
        # most promising candidates: every value kept is still attained by a channel in the region
        j_target = target_channel.choi
        proxy = [0.5 * float(np.abs(np.linalg.eigvalsh(ch.choi - j_target)).sum()) for ch in cands]
        keep = sorted(range(len(cands)), key=lambda i: -proxy[i])[: max(starts + 2, _SCREEN_CANDIDATES)]
        scored = sorted(((evaluate(cands[i]), i, cands[i]) for i in keep), key=lambda z: -z[0])
        best_val, _, best_ch = scored[0]
        direction, lin_problems = self._region_problem("linear")
        for val0, _, ch0 in scored[:starts]:
            cur_val, cur = val0, ch0
            for _ in range(steps):
                c = self._witness(x_of(cur), target_emb, notes)
                direction.value = self._direction(-c)
                xn, _ = self._solve_region(lin_problems, v, bound, eps, "diamond ascent", notes)
                nxt = Channel.from_ptm(_ptm_from_x(xn, self._n))
                val = evaluate(nxt)
                if val <= cur_val + 1e-7:
                    break
                cur_val, cur = val, nxt
            if cur_val > best_val:
                best_val, best_ch = cur_val, cur
        # certified upper bound
        b_dev = self._region_extent(fit, delta)
        if math.isfinite(b_dev):
            est_t = nonunital.estimate
            t_dev = np.maximum(nonunital.maximum - est_t, est_t - nonunital.minimum)
            rho = math.sqrt(float(t_dev @ t_dev) + b_dev**2)
            certified = min(1.0, estimate + self._d / 2 * rho)
        else:
            certified = 1.0
        certified = max(certified, best_val)
        use_bound = maximum_rule is MaximumRule.CERTIFIED
        method = (
            f"{region.value} region chi2 <= chi2(estimate) + {delta:.4g} (level {lev:g}); minimum: one joint "
            "channel + diamond-norm SDP, attained; maximum_attained: best of the range extreme points and "
            f"{starts} linearize-and-maximize ascents of <= {steps} steps, attained (a lower estimate of the maximum); "
            "maximum_certified: diamond(estimate) + (d/2) max ||R - R_estimate||_F over the region, an upper bound; "
            f"reported maximum = {'maximum_certified (a bound)' if use_bound else 'maximum_attained (attained)'}"
            + (_FIXED_NOTE if fixed else "")
        )
        return DiamondRange(
            minimum=minimum,
            maximum=certified if use_bound else best_val,
            max_is_bound=use_bound,
            maximum_attained=best_val,
            maximum_certified=certified,
            estimate=estimate,
            argmin=argmin,
            argmax=best_ch,
            region=region,
            level=lev,
            delta_chi2=delta,
            block_held_fixed=fixed,
            method=method,
            notes="; ".join(notes) if notes else f"all programs solved by {self._solver}",
        )


# ---- functions -----------------------------------------------------------------------------------
def fit_cptp(
    obs: LinearObservations,
    *,
    solver: str = "SCS",
    accuracy: float = 0.1,
    absolute_accuracy: float = 1e-6,
    ridge: float = 1e-9,
    target_nonunital: np.ndarray | None = None,
    scs_max_iters: int = 100_000,
) -> ChannelFit:
    """Weighted least-squares CPTP fit of ``obs.values`` (one-shot :class:`CptpFitter`).

    Minimizes ``||W (design @ b - values)||**2`` over CPTP channels; see :class:`CptpFitter`
    for the objective, constraints, non-unital rule, parameters and certificate.

    Returns
    -------
    ChannelFit
    """
    return CptpFitter(
        obs, solver=solver, accuracy=accuracy, absolute_accuracy=absolute_accuracy, ridge=ridge,
        target_nonunital=target_nonunital, scs_max_iters=scs_max_iters,
    ).fit()


def linear_estimate(obs: LinearObservations, *, ridge: float = 1e-9) -> np.ndarray:
    """Unconstrained weighted least-squares unital block.

    Minimizes ``||W (design @ b - values)||_2**2`` over all real ``b`` (no CPTP constraint), with
    the whitening and ridge of :class:`CptpFitter`.  When the design does not identify every
    entry the minimum-norm solution is returned.

    Parameters
    ----------
    obs : LinearObservations
    ridge : float
        Relative covariance ridge (see :class:`CptpFitter`).

    Returns
    -------
    ndarray, shape (D, D), float
        ``B`` with ``b = B.reshape(-1)`` (row-major, Pauli order without the identity).
    """
    obs = _check_observations(obs)
    ridge = _check_positive("ridge", ridge, upper=1.0)
    wh = _whiten(np.asarray(obs.design, dtype=float), np.asarray(obs.covariance, dtype=float), ridge)
    b = wh.solve(wh.q.T @ (wh.w @ np.asarray(obs.values, dtype=float)) / wh.scale)
    dd = 4**obs.n_qubits - 1
    return b.reshape(dd, dd)


def gate_error_observations(
    composite: LinearObservations, reference: Channel, gate_unitary: np.ndarray
) -> LinearObservations:
    """Observations of one gate's error ``L_G`` from interleaved (composite) observations.

    The interleaved run observes the composite ``L_int = L_G o (G L G^dagger)``.  Unital blocks
    of trace-preserving channels compose exactly (``B(a o b) = B(a) B(b)``), so with
    ``K = B(G L G^dagger) = B_G B_L B_G^T`` and row-major ``vec``,

        ``design @ vec(B_G_err K) = (design @ kron(I, K^T)) @ vec(B_G_err)``:

    the same values and covariance, with the design ``design @ kron(I_D, K^T)``.  Both runs are
    free of preparation and measurement constants, so ``B(L_G)`` is too.

    Parameters
    ----------
    composite : LinearObservations
        Observations of ``B(L_int)`` (probes ``B o G`` of the interleaved run).
    reference : Channel
        The reference error channel ``L`` (trace preserving), e.g. the reference run's fit.
    gate_unitary : ndarray, shape (d, d), complex
        The gate ``G``.

    Returns
    -------
    LinearObservations
        Observations of ``B(L_G)`` (labels and replicates carried over).
    """
    composite = _check_observations(composite)
    if not isinstance(reference, Channel):
        raise TypeError(f"'reference' must be a Channel; got {type(reference).__name__}")
    n = composite.n_qubits
    if reference.n_qubits != n:
        raise ValueError(f"'reference' acts on {reference.n_qubits} qubit(s); the observations on {n}")
    if not reference.is_tp(atol=1e-8):
        raise ValueError("'reference' must be trace preserving (R[0, :] = e_0); got a non-TP channel")
    g = Channel.from_unitary(_check_unitary("gate_unitary", gate_unitary, 2**n))
    k_block = (g @ reference @ g.adjoint()).unital_block
    dd = 4**n - 1
    design = np.asarray(composite.design, dtype=float) @ np.kron(np.eye(dd), k_block.T)
    return LinearObservations(
        n_qubits=n,
        design=design,
        values=np.array(composite.values, dtype=float),
        covariance=np.array(composite.covariance, dtype=float),
        labels=tuple(composite.labels),
        replicates=None if composite.replicates is None else np.array(composite.replicates, dtype=float),
    )


def isolate_gate_error(
    composite: LinearObservations,
    reference: Channel,
    gate_unitary: np.ndarray,
    *,
    solver: str = "SCS",
    accuracy: float = 0.1,
    absolute_accuracy: float = 1e-6,
    ridge: float = 1e-9,
    target_nonunital: np.ndarray | None = None,
    scs_max_iters: int = 100_000,
) -> ChannelFit:
    """CPTP fit of one gate's error ``L_G`` with the reference error ``L`` held fixed.

    Minimizes ``||W (design @ kron(I, K^T) @ b_G - values)||**2`` over CPTP ``L_G``
    (:func:`gate_error_observations`; objective and options as in :class:`CptpFitter`).  To
    carry the uncertainty of ``L`` into ``L_G``, call this once per joint bootstrap replicate
    (reference refitted on the reference run's replicate, composite values from the
    interleaved run's replicate).

    Returns
    -------
    ChannelFit
        The fit of ``L_G``.
    """
    obs = gate_error_observations(composite, reference, gate_unitary)
    return fit_cptp(
        obs, solver=solver, accuracy=accuracy, absolute_accuracy=absolute_accuracy, ridge=ridge,
        target_nonunital=target_nonunital, scs_max_iters=scs_max_iters,
    )
