"""Decay fits: from per-probe correlations to SPAM-robust linear observations of the unital block.

The model ``f_A(m) = c * lambda_A ** (m - 1)`` with one constant ``c`` shared by every probe
(``../THEORY.md``) is fitted jointly; the decays become :class:`LinearObservations`, the
contract consumed by the reconstruction stage.
"""

from __future__ import annotations

import math
import warnings as _warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass

import numpy as np
import scipy.optimize
import scipy.stats

from robusttomo.estimate import BlockKind, Correlations, ProbeSet, compute_correlations


@dataclass(frozen=True)
class LinearObservations:
    """Linear, SPAM-free observations of the error channel's unital block.

    The model is ``values ~ design @ b``, where ``b = B_L.reshape(-1)`` is the row-major
    flattening of the unital block ``B_L = R_L[1:, 1:]`` (shape ``(D, D)``, ``D = d*d - 1``)
    of the error channel's PTM in the normalized Pauli basis (see :mod:`robusttomo.channels`).
    Every observation is SPAM-robust: the preparation/readout constant has been divided out.

    Typical rows: a probe decay ``lambda_A = tr(B_A^T B_L) / D`` has row ``B_A.reshape(-1) / D``;
    an entry of the m = 2 statistic rescaled by the SPAM constant has a unit row.

    Attributes
    ----------
    n_qubits : int
        Number of qubits (1..3).
    design : ndarray, shape (k, D*D), float
        Linear functionals on ``b``.
    values : ndarray, shape (k,), float
        Observed values.
    covariance : ndarray, shape (k, k), float
        Estimated covariance of ``values`` (symmetric positive semidefinite; may be singular).
    labels : tuple of str, length k
        Human-readable label of each observation (probe label, or ``"M[i,j]"``).
    replicates : ndarray, shape (B, k), float, or None
        Bootstrap replicates of ``values`` (resampled sequences), if computed.
    """

    n_qubits: int
    design: np.ndarray
    values: np.ndarray
    covariance: np.ndarray
    labels: tuple[str, ...]
    replicates: np.ndarray | None = None

    @property
    def n_observations(self) -> int:
        """Number of observations ``k``."""
        return int(self.values.shape[0])


# ---- decay fits -----------------------------------------------------------------------------

#: A length with fewer sequences than this gets a warning: its standard error is unreliable.
MIN_SEQUENCES = 20
_SE_FLOOR = 1e-15  # standard error of a length whose values do not vary (keeps weights finite)
#: p-value below which a diagnostic test raises a warning.
WARN_P = 1e-3


@dataclass(frozen=True)
class DecayResult:
    """Per-probe decays ``lambda_A`` with the shared SPAM constant and diagnostics.

    Tables indexed ``[probe, length]`` hold NaN where a probe was not evaluated at a length
    (see the information rule in :mod:`robusttomo.estimate`); the length-1 column is the
    probe-independent value ``f(1) = c``.

    Attributes
    ----------
    n_qubits : int
    kind : BlockKind
        ``REFERENCE`` (decays of the error channel ``L``) or ``INTERLEAVED`` (of the composite
        ``L_int = L_G o (G L G^dagger)``, probes ``B o G``).
    probes : ProbeSet
    lengths : tuple of int
    n_sequences : ndarray, shape (n_lengths,), int
    control_variate : bool
        Whether the control variate was used.
    means, stderr : ndarray, shape (P, n_lengths)
        Estimate of ``f_A(m)`` (mean over sequences, control variate applied) and its standard
        error from the spread between sequences.
    median_of_means : ndarray, shape (P, n_lengths)
        Median over ``batches`` contiguous batches of sequences of the batch means.
    beta : ndarray, shape (P, n_lengths)
        Fitted control-variate coefficient (1.0 where the fallback applied, NaN when off).
    variance_reduction : ndarray, shape (P, n_lengths)
        Per-sequence variance without the control variate divided by the variance with it.
    spam_constant, spam_constant_stderr : float
        The shared constant ``c`` of ``f_A(m) = c lambda_A**(m-1)`` and its standard error.
    lambdas, lambda_stderr : ndarray, shape (P,)
        Fitted decays (in [-1, 1]) and standard errors.
    lambda_covariance : ndarray, shape (P, P)
        Covariance of the fitted decays (sandwich estimate from the between-sequence spread).
    m2_statistic : ndarray, shape (D, D) or None
        The length-2 sufficient statistic ``M`` (control variate applied), normalized Pauli
        basis, ``E[M] = c B / ((d*d - 1) kappa)``.
    m2_covariance : ndarray, shape (D*D, D*D) or None
        Covariance of ``M.reshape(-1)`` (None for three qubits, where it would be 126 MB).
    chi2, dof : float, int
        Weighted residual sum of squares of the joint fit and its degrees of freedom.
    residuals : ndarray, shape (P, n_lengths)
        Normalized residuals ``(mean - model) / stderr`` (NaN where not evaluated).
    probe_constants, probe_constants_stderr : ndarray, shape (P,)
        Constant of a per-probe fit with its own free constant (NaN for probes with fewer than
        two lengths >= 2); a wide spread means the gate-independent model is violated.
    constant_spread_p : float
        p-value of the chi-square test that every per-probe constant equals ``c`` (NaN if none).
    warnings : tuple of str
        Plain-words warnings.
    bootstrap_lambdas : ndarray, shape (B, P) or None
        Non-parametric bootstrap replicates (sequences resampled within each length).
    bootstrap_spam : ndarray, shape (B,) or None
    identity_gn_stderr : float
        Gauss-Newton (model-based) standard error of the identity probe's decay, from the
        per-length standard errors; the scale of :meth:`identity_decay_interval` (NaN
        without an identity probe or from files written before it existed).
    bootstrap_identity_gn_stderr : ndarray, shape (B,) or None
        The same standard error computed in each bootstrap replicate from its own re-estimated
        weights.
    """

    n_qubits: int
    kind: BlockKind
    probes: ProbeSet
    lengths: tuple[int, ...]
    n_sequences: np.ndarray
    control_variate: bool
    means: np.ndarray
    stderr: np.ndarray
    median_of_means: np.ndarray
    beta: np.ndarray
    variance_reduction: np.ndarray
    spam_constant: float
    spam_constant_stderr: float
    lambdas: np.ndarray
    lambda_stderr: np.ndarray
    lambda_covariance: np.ndarray
    m2_statistic: np.ndarray | None
    m2_covariance: np.ndarray | None
    chi2: float
    dof: int
    residuals: np.ndarray
    probe_constants: np.ndarray
    probe_constants_stderr: np.ndarray
    constant_spread_p: float
    warnings: tuple[str, ...]
    bootstrap_lambdas: np.ndarray | None
    bootstrap_spam: np.ndarray | None
    identity_gn_stderr: float = float("nan")
    bootstrap_identity_gn_stderr: np.ndarray | None = None

    @property
    def reduced_chi2(self) -> float:
        """``chi2 / dof`` (NaN when ``dof == 0``)."""
        return self.chi2 / self.dof if self.dof > 0 else float("nan")

    @property
    def identity_decay(self) -> float:
        """The identity probe's decay: the usual benchmarking decay ``p``."""
        return float(self.lambdas[self._ident()])

    @property
    def identity_decay_stderr(self) -> float:
        """Standard error of :attr:`identity_decay`."""
        return float(self.lambda_stderr[self._ident()])

    @property
    def average_gate_fidelity(self) -> float:
        """``F_avg = 1 - (d - 1)(1 - p)/d`` of the measured channel ("Scalable and robust
        randomized benchmarking of quantum processes", PRL 106, 180504 (2011)); a fidelity."""
        d = 2**self.n_qubits
        return 1.0 - (d - 1) * (1.0 - self.identity_decay) / d

    @property
    def average_gate_fidelity_stderr(self) -> float:
        """Standard error of :attr:`average_gate_fidelity`."""
        d = 2**self.n_qubits
        return (d - 1) / d * self.identity_decay_stderr

    def identity_decay_interval(self, level: float = 0.95) -> tuple[float, float]:
        """Studentized (bootstrap-t) interval of :attr:`identity_decay`.

        With ``t_b = (p_b - p) / se_b`` over the bootstrap replicates (``p_b`` and ``se_b`` the
        replicate's decay and Gauss-Newton standard error from its own re-estimated weights),
        the interval is ``[p - t_(1+level)/2 se, p - t_(1-level)/2 se]``, ``se`` the data's own
        Gauss-Newton standard error ("Bootstrap confidence intervals", Statistical Science 11,
        189 (1996), section 3).  Studentizing carries the uncertainty of the weights, which are
        estimated from a few tens of sequences per length and correlate with the errors of the
        estimate; a percentile interval with the weights held fixed was measured too narrow
        (docs/benchmarks.md, coverage study).  Clipped to [-1, 1]; ``(nan, nan)`` without
        replicates or with fewer than two finite ones.
        """
        if not 0.0 < float(level) < 1.0:
            raise ValueError(f"'level' must lie in (0, 1); got {level!r}")
        if self.bootstrap_lambdas is None or self.bootstrap_identity_gn_stderr is None:
            return float("nan"), float("nan")
        p = self.identity_decay
        se = float(self.identity_gn_stderr)
        pb = np.asarray(self.bootstrap_lambdas, dtype=float)[:, self._ident()]
        sb = np.asarray(self.bootstrap_identity_gn_stderr, dtype=float)
        ok = np.isfinite(pb) & np.isfinite(sb) & (sb > 0)
        if ok.sum() < 2 or not (np.isfinite(se) and se > 0):
            return float("nan"), float("nan")
        t = (pb[ok] - p) / sb[ok]
        q_lo, q_hi = np.quantile(t, [(1 - level) / 2, (1 + level) / 2])
        return float(np.clip(p - q_hi * se, -1.0, 1.0)), float(np.clip(p - q_lo * se, -1.0, 1.0))

    def _ident(self) -> int:
        i = self.probes.identity_index
        if i is None:
            raise ValueError("the probe set has no identity probe")
        return i

    def observations(self) -> LinearObservations:
        """The decays as :class:`LinearObservations` of the unital block for the reconstruction.

        Row ``a`` of the design is ``B_a.reshape(-1) / (d*d - 1)`` (``lambda_a =
        tr(B_a^T B) / (d*d - 1)``), ``B`` the unital block of ``L`` (reference) or ``L_int``
        (interleaved).
        """
        d2 = 4**self.n_qubits
        design = self.probes.unital_blocks.reshape(self.probes.n_probes, -1) / (d2 - 1)
        return LinearObservations(self.n_qubits, design, self.lambdas.copy(), self.lambda_covariance.copy(),
                                  self.probes.labels, None if self.bootstrap_lambdas is None
                                  else self.bootstrap_lambdas.copy())


def _cv_means(values: np.ndarray, ideal: np.ndarray, mu: np.ndarray, use_cv: bool):
    """Per-column control-variate estimate; returns (mean, per-sequence corrected values, beta)."""
    if not use_cv:
        return values.mean(axis=0), values, np.full(values.shape[1], np.nan)
    gm = ideal.mean(axis=0)
    gc = ideal - gm
    var = np.einsum("kq,kq->q", gc, gc)
    cov = np.einsum("kq,kq->q", values - values.mean(axis=0), gc)
    scale = np.maximum(1.0, np.abs(gm)) ** 2 * values.shape[0]
    degenerate = var <= 1e-24 * scale  # every G_s equal: least squares undefined, use beta = 1
    beta = np.where(degenerate, 1.0, cov / np.where(degenerate, 1.0, var))
    corrected = values - beta * (ideal - mu)
    return corrected.mean(axis=0), corrected, beta


@dataclass(frozen=True)
class _Design:
    """Bookkeeping of the joint fit: which (probe, length) data exist."""

    n_probes: int
    lengths: tuple[int, ...]
    probe_rows: tuple[np.ndarray, ...]  # per length index >= 1: probe positions
    slow: np.ndarray  # probes with data at lengths >= 3


def _make_design(corr: Correlations) -> _Design:
    rows = tuple(s.probes for s in corr.stats)
    slow = np.unique(np.concatenate([s.probes for s in corr.stats if s.length >= 3] or [np.zeros(0, np.int64)]))
    return _Design(corr.probes.n_probes, corr.lengths, rows, slow.astype(np.int64))


def _length_means(corr: Correlations, use_cv: bool, picks: list[np.ndarray] | None = None):
    out = []
    for i, s in enumerate(corr.stats):
        vals, ideal = (s.values, s.ideal) if picks is None else (s.values[picks[i]], s.ideal[picks[i]])
        mean, corrected, beta = _cv_means(vals, ideal, s.mu, use_cv)
        out.append((mean, corrected, beta))
    return out


def _joint_fit(design: _Design, corr: Correlations, means: list[np.ndarray], sig: list[np.ndarray],
               start: np.ndarray | None = None) -> tuple[float, np.ndarray]:
    """Weighted least squares for ``f_A(m) = c lambda_A**(m-1)``; returns (c, lambdas (P,)).

    Objective: sum over (probe, length) data of ((mean - c lambda**(m-1)) / stderr)**2, with
    the probe-independent length-1 point ``(mean_1 - c)/stderr_1`` once.  Probes seen only at
    length 2 are fitted exactly (``lambda = mean_2 / c``) and do not influence ``c``.
    """
    lengths = corr.lengths
    y1, s1 = float(means[0][0]), float(sig[0][0])
    pos2 = lengths.index(2) if 2 in lengths else None
    slow = design.slow
    lam = np.zeros(design.n_probes)
    if pos2 is not None:
        lam[design.probe_rows[pos2]] = means[pos2] / y1 if y1 != 0 else 0.0
    if slow.size == 0:
        c = y1
    else:
        slot = {int(p): i for i, p in enumerate(slow)}
        terms = []  # (length, slow slot, mean, sigma)
        for li, m in enumerate(lengths):
            if m == 1:
                continue
            rows = design.probe_rows[li]
            for j, p in enumerate(rows):
                if int(p) in slot:
                    terms.append((m, slot[int(p)], means[li][j], sig[li][j]))
        mm = np.array([t[0] for t in terms], dtype=float)
        ss = np.array([t[1] for t in terms], dtype=np.int64)
        yy = np.array([t[2] for t in terms])
        sg = np.array([t[3] for t in terms])

        def resid(theta):
            c, lm = theta[0], theta[1:]
            return np.concatenate([[(y1 - c) / s1], (yy - c * lm[ss] ** (mm - 1)) / sg])

        def jac(theta):
            c, lm = theta[0], theta[1:]
            j = np.zeros((1 + yy.size, theta.size))
            j[0, 0] = -1.0 / s1
            j[1:, 0] = -(lm[ss] ** (mm - 1)) / sg
            j[np.arange(1, 1 + yy.size), 1 + ss] = -c * (mm - 1) * lm[ss] ** (mm - 2) / sg
            return j

        if start is None:
            x0 = np.concatenate([[y1], np.clip(lam[slow], -0.999, 0.999)])
        else:
            x0 = start
        lo = np.concatenate([[-np.inf], -np.ones(slow.size)])
        hi = np.concatenate([[np.inf], np.ones(slow.size)])
        x0 = np.clip(x0, lo + 1e-9, hi - 1e-9)
        sol = scipy.optimize.least_squares(resid, x0, jac=jac, bounds=(lo, hi), method="trf",
                                           x_scale="jac", xtol=1e-12, ftol=1e-12, gtol=1e-12)
        c = float(sol.x[0])
        if pos2 is not None:
            lam[design.probe_rows[pos2]] = means[pos2] / c
        lam[slow] = sol.x[1:]
    return c, np.clip(lam, -1.0, 1.0)


def _bread(design: _Design, corr: Correlations, c: float, lam: np.ndarray, sig):
    """The arrowhead Gauss-Newton matrix ``H = J^T W J`` of the joint fit, by its parts.

    Returns ``(h00, h0p, hpp, parts)``: ``H[0, 0]``, the ``c``-probe column ``H[0, 1:]``, the
    diagonal ``H[1:, 1:]`` (each residual involves ``c`` and one probe, so the probe block is
    diagonal), and per length ``(probe columns or None at m = 1, w a, w b)`` with ``a``, ``b``
    the Jacobian entries of the ``c`` and probe columns and ``w = 1/stderr**2``.
    """
    p = design.n_probes
    h00 = 0.0
    h0p = np.zeros(p)
    hpp = np.zeros(p)
    parts = []
    for li, m in enumerate(corr.lengths):
        w = 1.0 / sig[li] ** 2
        if m == 1:
            a_, b_, pr = np.ones(1), np.zeros(1), None
        else:
            pr = design.probe_rows[li]
            lm = lam[pr]
            a_ = lm ** (m - 1)
            b_ = c * (m - 1) * lm ** (m - 2)
            h0p += np.bincount(pr, weights=w * a_ * b_, minlength=p)
            hpp += np.bincount(pr, weights=w * b_ * b_, minlength=p)
        h00 += float(np.sum(w * a_ * a_))
        parts.append((pr, w * a_, w * b_))
    return h00, h0p, hpp, parts


def _gn_stderr(design: _Design, corr: Correlations, c: float, lam: np.ndarray, sig, probe: int) -> float:
    """Model-based (Gauss-Newton) standard error of one probe's decay, ``sqrt((H^-1)_aa)``.

    The arrowhead ``H`` (:func:`_bread`) inverts in closed form: ``(H^-1)_aa = 1/h_aa +
    (h_0a / h_aa)**2 / s`` with the Schur complement ``s = h_00 - sum_b h_0b**2 / h_bb``.  It
    uses only the weights, so a bootstrap replicate computes it from its own re-estimated
    weights: the scale of the studentized (bootstrap-t) interval of :meth:`DecayResult.
    identity_decay_interval`.  NaN when the probe has no data or ``H`` is singular.
    """
    h00, h0p, hpp, _ = _bread(design, corr, c, lam, sig)
    on = hpp > 0
    if not on[probe]:
        return float("nan")
    schur = h00 - float(np.sum(h0p[on] ** 2 / hpp[on]))
    if not schur > 0:
        return float("nan")
    var = 1.0 / hpp[probe] + (h0p[probe] / hpp[probe]) ** 2 / schur
    return float(math.sqrt(var)) if var > 0 else float("nan")


def _sandwich(design: _Design, corr: Correlations, c: float, lam: np.ndarray, means, sig, corrected,
              shrink_covariance: bool = True):
    """Covariance of (c, lambdas) by the sandwich formula, plus chi2 and normalized residuals.

    ``cov = H^+ (J^T W S W J) H^+`` with ``H = J^T W J``, ``W = diag(1/stderr**2)`` and ``S`` the
    block-diagonal (one block per length) covariance of the means.  Every Jacobian row has two
    entries (column 0 for ``c``, one probe column), so ``H`` is an arrowhead matrix: its inverse
    is a diagonal plus a rank-one term, and the meat is accumulated per length from the
    centred per-sequence values.  That costs ``O(K P**2)`` instead of the ``O(P**3)`` of dense
    products and a pseudo-inverse (:func:`_sandwich_dense`, used instead when ``H`` is too
    ill-conditioned for the closed form to equal the pseudo-inverse).
    """
    p = design.n_probes
    lengths = corr.lengths
    h00, h0p, hpp, parts = _bread(design, corr, c, lam, sig)
    res_l, sg_l = [], []
    fast_only = np.ones(p, dtype=bool)
    fast_only[design.slow] = False
    for li, m in enumerate(lengths):
        res_l.append(means[0] - c if m == 1 else means[li] - c * lam[design.probe_rows[li]] ** (m - 1))
        sg_l.append(sig[li])
    res = np.concatenate(res_l)
    sg = np.concatenate(sg_l)
    chi2 = float(np.sum((res / sg) ** 2))
    dof = int(res.size - (1 + design.slow.size + int(fast_only.sum()) * (2 in lengths)))

    on = hpp > 0  # probes without data have zero bread rows: the pseudo-inverse leaves them at 0
    e = np.zeros(p)
    e[on] = 1.0 / hpp[on]
    zt = -h0p * e
    schur = h00 + float(np.sum(h0p * zt))
    if not _arrowhead_ok(h00, h0p, hpp, on, e, zt, schur):
        return _sandwich_dense(design, corr, c, lam, means, sig, corrected, shrink_covariance)

    meat = np.zeros((p + 1, p + 1))
    for li, (pr, alpha, beta) in enumerate(parts):
        x = corrected[li] - corrected[li].mean(axis=0)
        k = x.shape[0]
        scale = 1.0 / (k * (k - 1)) if k > 1 else float("nan")  # np.cov(ddof=1) / k
        # S -> (1 - shrink) S + shrink diag(S) in every product (_shrinkage)
        shrink = _shrinkage(x) if shrink_covariance else 0.0
        var = scale * np.einsum("ki,ki->i", x, x) if shrink > 0 else None  # diag(S) / k
        xa = x @ alpha
        meat[0, 0] += scale * float(xa @ xa) * (1 - shrink)
        if var is not None:
            meat[0, 0] += shrink * float(np.sum(alpha**2 * var))
        if pr is None:
            continue
        xb = x * beta
        cross = scale * (xa @ xb)
        if var is not None:
            cross = (1 - shrink) * cross + shrink * alpha * beta * var
        meat[0, 1 + pr] += cross
        meat[1 + pr, 0] += cross
        gram = xb.T @ xb
        gram *= scale
        if var is not None:
            gram *= 1 - shrink
            gram[np.diag_indices_from(gram)] += shrink * beta**2 * var
        if pr.size == p and np.array_equal(pr, np.arange(p)):
            meat[1:, 1:] += gram
        else:
            meat[1 + pr[:, None], 1 + pr[None, :]] += gram
    # H^+ = E + z z^T / schur with E = diag(0, e), z = (1, zt)
    z = np.concatenate([[1.0], zt])
    ev = np.concatenate([[0.0], e])
    mz = meat @ z
    emz = ev * mz
    zmz = float(z @ mz)
    cov = meat
    cov *= ev[:, None]
    cov *= ev[None, :]
    left = emz / schur
    right = left + (zmz / schur**2) * z
    cov += left[:, None] * z[None, :]
    cov += z[:, None] * right[None, :]
    return cov, chi2, max(dof, 0), res / sg


def _shrinkage(x: np.ndarray) -> float:
    """Shrinkage intensity of a length's sample covariance towards its diagonal.

    ``x`` (K, Q): the centred per-sequence values of one length.  The off-diagonal part is
    shrunk by the estimated optimal intensity of "A shrinkage approach to large-scale covariance
    matrix estimation and implications for functional genomics", Statistical Applications in
    Genetics and Molecular Biology 4, 32 (2005) (target D, the diagonal):
    ``sum_(i!=j) Var(r_ij) / sum_(i!=j) r_ij**2`` on the standardized values, clipped to [0, 1].

    Needed with fewer sequences than values (the sample covariance is then singular), and also
    when the two are of the same order: the inverse of a sample covariance of ``Q`` values from
    ``K`` sequences overstates the precision by about ``(K - 1) / (K - Q - 2)`` (the mean of an
    inverse Wishart matrix), 1.8 for the 225 length-2 values of 500 sequences of the default
    two-qubit plan, which inflated every chi-square of the reconstruction by that factor and
    biased its diamond distance low (docs/method-estimation.md).  With ``K >> Q`` the estimated
    intensity is small by itself.
    """
    k, q = x.shape
    if q < 2:
        return 0.0
    if k < 3:
        return 1.0
    sd = np.sqrt(np.einsum("ki,ki->i", x, x) / (k - 1))
    z = x[:, sd > 0] / sd[sd > 0]
    q = z.shape[1]
    if q < 2:
        return 0.0
    # sum_ij r_ij**2 (r_ii = 1) from the smaller of the K x K and Q x Q Gram matrices
    gram = z @ z.T if k < q else z.T @ z
    r2_all = float(np.sum(gram * gram)) / (k - 1) ** 2
    z2 = z * z
    w2_all = float(np.sum(np.sum(z2, axis=1) ** 2))  # sum_ij sum_k z_ki**2 z_kj**2
    w2_diag = float(np.sum(z2 * z2))
    den = r2_all - q
    if not den > 0:
        return 1.0
    wbar2_off = ((k - 1) / k) ** 2 * den  # sum_(i!=j) mean_k(z_ki z_kj)**2
    num = (k / (k - 1) ** 3) * ((w2_all - w2_diag) - k * wbar2_off)
    return float(np.clip(num / den, 0.0, 1.0))


def _arrowhead_ok(h00: float, h0p: np.ndarray, hpp: np.ndarray, on: np.ndarray, e: np.ndarray, zt: np.ndarray,
                  schur: float) -> bool:
    """Whether the closed-form inverse of the bread equals its pseudo-inverse (rcond 1e-12).

    True when a lower bound of the smallest eigenvalue of the nonzero part (``1 / ||H^-1||``,
    with ``||H^-1|| <= max(e) + ||z||**2 / schur``) exceeds ``1e-11`` times a Gershgorin upper
    bound of the largest, so that no eigenvalue falls under the pseudo-inverse cut.
    """
    if not (np.isfinite(h00) and np.all(np.isfinite(h0p)) and np.all(np.isfinite(hpp))):
        return False
    if not schur > 0:
        return False
    inv_norm = (float(e.max()) if on.any() else 0.0) + (1.0 + float(np.sum(zt * zt))) / schur
    lam_max = max(h00 + float(np.sum(np.abs(h0p))), float(np.max(hpp + np.abs(h0p), initial=0.0)))
    return 1.0 / inv_norm > 1e-11 * lam_max


def _sandwich_dense(design: _Design, corr: Correlations, c: float, lam: np.ndarray, means, sig, corrected,
                    shrink_covariance: bool = True):
    """Reference form of :func:`_sandwich` with dense Jacobian, bread and meat (``O(P**3)``).

    Used when the structured inverse would not match the pseudo-inverse (a near-singular bread).
    """
    p = design.n_probes
    lengths = corr.lengths
    rows_j, rows_res = [], []
    blocks = []
    fast_only = np.ones(p, dtype=bool)
    fast_only[design.slow] = False
    for li, m in enumerate(lengths):
        k = corrected[li].shape[0]
        cov = np.atleast_2d(np.cov(corrected[li], rowvar=False, ddof=1)) / k
        shrink = _shrinkage(corrected[li] - corrected[li].mean(axis=0)) if shrink_covariance else 0.0
        if shrink > 0:
            cov = (1 - shrink) * cov + shrink * np.diag(np.diag(cov))
        if m == 1:
            jrow = np.zeros((1, p + 1))
            jrow[0, 0] = 1.0
            rows_j.append(jrow)
            rows_res.append(means[0] - c)
            blocks.append(cov)
            continue
        pr = design.probe_rows[li]
        jrow = np.zeros((pr.size, p + 1))
        lm = lam[pr]
        jrow[:, 0] = lm ** (m - 1)
        jrow[np.arange(pr.size), 1 + pr] = c * (m - 1) * lm ** (m - 2)
        rows_j.append(jrow)
        rows_res.append(means[li] - c * lm ** (m - 1))
        blocks.append(cov)
    jm = np.vstack(rows_j)
    res = np.concatenate(rows_res)
    sg = np.concatenate(sig)
    w = 1.0 / sg**2
    sigma = _block_diag(blocks)
    # Fast probes' length-2 point is fitted exactly; its weight only scales its own column.
    h = jm.T @ (w[:, None] * jm)
    hinv = np.linalg.pinv(h, rcond=1e-12, hermitian=True)
    jw = jm.T * w
    meat = jw @ sigma @ jw.T
    cov = hinv @ meat @ hinv
    chi2 = float(np.sum(res**2 * w))
    dof = int(res.size - (1 + design.slow.size + int(fast_only.sum()) * (2 in lengths)))
    return cov, chi2, max(dof, 0), res / sg


def _block_diag(blocks: list[np.ndarray]) -> np.ndarray:
    n = sum(b.shape[0] for b in blocks)
    out = np.zeros((n, n))
    i = 0
    for b in blocks:
        k = b.shape[0]
        out[i:i + k, i:i + k] = b
        i += k
    return out


def _own_constant_fit(ms: np.ndarray, ys: np.ndarray, ss: np.ndarray, c0: float, l0: float):
    """Fit ``y = c_a lambda**(m-1)`` with a free constant; returns (c_a, stderr, chi2, dof)."""
    def resid(t):
        return (ys - t[0] * t[1] ** (ms - 1)) / ss

    l0 = float(np.clip(l0, -0.999, 0.999))
    sol = scipy.optimize.least_squares(resid, [c0, l0], bounds=([-np.inf, -1], [np.inf, 1]), method="trf")
    j = sol.jac
    try:
        cov = np.linalg.inv(j.T @ j)
        se = float(np.sqrt(max(cov[0, 0], 0.0)))
    except np.linalg.LinAlgError:
        se = float("nan")
    return float(sol.x[0]), se, float(np.sum(sol.fun**2)), int(ys.size - 2)


def _stderr_of(corrected: list[np.ndarray]) -> list[np.ndarray]:
    """Per-length standard errors of the means from the per-sequence (corrected) values."""
    return [np.maximum(np.std(x, axis=0, ddof=1) / np.sqrt(x.shape[0]), _SE_FLOOR) for x in corrected]


def _bootstrap_chunk(args):
    """Replicates of the decay fit for the given seeds: (lambdas (k, P), c (k,), stderr (k,)).

    Each replicate resamples sequences within each length, re-fits the control variate,
    re-estimates the per-length standard errors (the weights of the fit) from its own
    sequences and re-fits the decays; the third array is the replicate's Gauss-Newton
    standard error of probe ``probe`` (NaN if ``probe`` is None).
    """
    corr, design, use_cv, start, seeds, probe = args
    lam_out, c_out, se_out = [], [], []
    for seed in seeds:
        rng = np.random.default_rng(seed)
        picks = [rng.integers(0, s.values.shape[0], size=s.values.shape[0]) for s in corr.stats]
        lm = _length_means(corr, use_cv, picks)
        sig = _stderr_of([x[1] for x in lm])
        c, lam = _joint_fit(design, corr, [x[0] for x in lm], sig, start=start)
        lam_out.append(lam)
        c_out.append(c)
        se_out.append(float("nan") if probe is None else _gn_stderr(design, corr, c, lam, sig, probe))
    return np.array(lam_out), np.array(c_out), np.array(se_out)


def fit_decays(corr: Correlations, *, control_variate: bool = True, bootstrap: int = 200,
               seed: int | None = None, batches: int = 10, jobs: int = 1) -> DecayResult:
    """Fit ``f_A(m) = c lambda_A**(m-1)`` jointly over probes, with diagnostics and bootstrap.

    Parameters
    ----------
    corr : Correlations
        From :func:`robusttomo.estimate.compute_correlations`.
    control_variate : bool, default True
        Subtract ``beta (G_s - mu)`` per (probe, length) (see :mod:`robusttomo.estimate`).
    bootstrap : int, default 200
        Number of non-parametric bootstrap replicates (sequences resampled within each length;
        each replicate re-fits the control variate and the decays). 0 disables it.
    seed : int, optional
        Seed of the bootstrap resampling.
    batches : int, default 10
        Number of contiguous batches of sequences for the median of means.
    jobs : int, default 1
        Worker processes for the bootstrap.

    Returns
    -------
    DecayResult
    """
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, (int, np.integer)) or bootstrap < 0:
        raise ValueError(f"'bootstrap' must be a non-negative integer; got {bootstrap!r}")
    if isinstance(batches, bool) or not isinstance(batches, (int, np.integer)) or batches < 1:
        raise ValueError(f"'batches' must be a positive integer; got {batches!r}")
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs < 1:
        raise ValueError(f"'jobs' must be a positive integer; got {jobs!r}")
    design = _make_design(corr)
    lengths = corr.lengths
    p = corr.probes.n_probes
    nl = len(lengths)
    lm = _length_means(corr, control_variate)
    means = [x[0] for x in lm]
    corrected = [x[1] for x in lm]
    sig = _stderr_of(corrected)
    c, lam = _joint_fit(design, corr, means, sig)
    cov, chi2, dof, nres = _sandwich(design, corr, c, lam, means, sig, corrected)

    table = {k: np.full((p, nl), np.nan) for k in ("means", "stderr", "mom", "beta", "vr", "res")}
    off = 0
    for li, s in enumerate(corr.stats):
        rows = np.arange(p) if s.length == 1 else s.probes
        raw_var = np.var(s.values, axis=0, ddof=1)
        cor_var = np.var(corrected[li], axis=0, ddof=1)
        vr = np.where(cor_var > 0, raw_var / np.where(cor_var > 0, cor_var, 1.0), np.inf)
        k = s.values.shape[0]
        nb = min(batches, k)
        edges = np.linspace(0, k, nb + 1).astype(int)
        bm = np.array([corrected[li][edges[i]:edges[i + 1]].mean(axis=0) for i in range(nb)])
        mom = np.median(bm, axis=0)
        width = s.probes.size if s.length != 1 else 1
        table["means"][rows, li] = means[li]
        table["stderr"][rows, li] = sig[li]
        table["mom"][rows, li] = mom
        table["beta"][rows, li] = lm[li][2]
        table["vr"][rows, li] = vr
        table["res"][rows, li] = nres[off:off + width]
        off += width

    warn: list[str] = []
    nseq = np.array([s.values.shape[0] for s in corr.stats])
    for m, k in zip(lengths, nseq):
        if k < MIN_SEQUENCES:
            warn.append(f"length {m} has only {k} sequences; its standard errors are unreliable below "
                        f"{MIN_SEQUENCES}: add sequences at this length")
    for m, sd in zip(lengths, sig):
        if np.any(sd <= _SE_FLOOR * 10):
            warn.append(f"the values at length {m} do not vary over its sequences (standard error 0), so "
                        "its weight is unbounded and the chi-square regions are meaningless: add sequences "
                        "at this length")
    # per-probe fits with a free constant
    pc = np.full(p, np.nan)
    pcs = np.full(p, np.nan)
    ident = corr.probes.identity_index
    for a in design.slow:
        cols = [li for li, m in enumerate(lengths) if m >= 2 and not np.isnan(table["means"][a, li])]
        if len(cols) < 2:
            continue
        ms = np.array([lengths[li] for li in cols], dtype=float)
        ca, se, chi_a, dof_a = _own_constant_fit(ms, table["means"][a, cols], table["stderr"][a, cols],
                                                 c, lam[a])
        pc[a], pcs[a] = ca, se
        if a == ident and dof_a >= 1:
            pval = float(scipy.stats.chi2.sf(chi_a, dof_a))
            if pval < WARN_P:
                warn.append(f"the identity-probe decay is not single-exponential (chi-square {chi_a:.1f} "
                            f"for {dof_a} degrees of freedom, p = {pval:.1e}): leakage, drift or "
                            "non-Markovian noise; treat the figures with care")
    ok = np.isfinite(pc) & np.isfinite(pcs) & (pcs > 0)
    if ok.any():
        spread_chi2 = float(np.sum(((pc[ok] - c) / pcs[ok]) ** 2))
        spread_p = float(scipy.stats.chi2.sf(spread_chi2, int(ok.sum())))
        if spread_p < WARN_P:
            warn.append(f"per-probe constants spread more than their errors allow (p = {spread_p:.1e}): "
                        "the noise may depend on the gate, violating the model")
    else:
        spread_p = float("nan")
    if dof > 0:
        pfit = float(scipy.stats.chi2.sf(chi2, dof))
        if pfit < WARN_P:
            warn.append(f"the decay model fits poorly (reduced chi-square {chi2 / dof:.2f}, p = {pfit:.1e})")
    if not 0.0 < c <= 1.2:
        warn.append(f"the SPAM constant c = {c:.3f} is outside (0, 1.2]: check the bit order and the plan")

    # length-2 sufficient statistic
    m2, m2cov = None, None
    if corr.m2_u is not None:
        ms = np.einsum("ki,kj->kij", corr.m2_u, corr.m2_v).reshape(corr.m2_u.shape[0], -1)
        if control_variate:
            mi = np.einsum("ki,kj->kij", corr.m2_u_ideal, corr.m2_v).reshape(ms.shape)
            mic = mi - mi.mean(axis=0)
            den = float(np.sum(mic * mic))
            beta_m = float(np.sum((ms - ms.mean(axis=0)) * mic) / den) if den > 1e-24 else 1.0
            ms = ms - beta_m * (mi - corr.m2_mu.reshape(-1))
        dd = corr.m2_u.shape[1]
        m2 = ms.mean(axis=0).reshape(dd, dd)
        if corr.n_qubits <= 2:
            m2cov = np.cov(ms, rowvar=False, ddof=1) / ms.shape[0]

    ident = corr.probes.identity_index
    gn_se = float("nan") if ident is None else _gn_stderr(design, corr, c, lam, sig, ident)
    boot_l = boot_c = boot_se = None
    if bootstrap > 0:
        ss = np.random.SeedSequence(seed)
        seeds = [int(s.generate_state(1)[0]) for s in ss.spawn(bootstrap)]
        start = np.concatenate([[c], lam[design.slow]])
        if jobs == 1:
            boot_l, boot_c, boot_se = _bootstrap_chunk((corr, design, control_variate, start, seeds, ident))
        else:
            chunks = np.array_split(np.array(seeds, dtype=np.int64), jobs)
            with ProcessPoolExecutor(max_workers=jobs) as ex:
                parts = list(ex.map(_bootstrap_chunk, [(corr, design, control_variate, start,
                                                        [int(x) for x in ch], ident) for ch in chunks if ch.size]))
            boot_l, boot_c, boot_se = (np.concatenate([x[i] for x in parts]) for i in range(3))

    lam_cov = cov[1:, 1:]
    return DecayResult(
        n_qubits=corr.n_qubits, kind=corr.kind, probes=corr.probes, lengths=lengths, n_sequences=nseq,
        control_variate=control_variate, means=table["means"], stderr=table["stderr"],
        median_of_means=table["mom"], beta=table["beta"], variance_reduction=table["vr"],
        spam_constant=c, spam_constant_stderr=float(math.sqrt(max(cov[0, 0], 0.0))), lambdas=lam,
        lambda_stderr=np.sqrt(np.clip(np.diag(lam_cov), 0.0, None)), lambda_covariance=lam_cov,
        m2_statistic=m2, m2_covariance=m2cov, chi2=chi2, dof=dof, residuals=table["res"],
        probe_constants=pc, probe_constants_stderr=pcs, constant_spread_p=spread_p,
        warnings=tuple(warn), bootstrap_lambdas=boot_l, bootstrap_spam=boot_c,
        identity_gn_stderr=gn_se, bootstrap_identity_gn_stderr=boot_se,
    )


def estimate_decays(plan: object, counts: object, *, probes: ProbeSet | None = None,
                    kind: BlockKind | str = BlockKind.REFERENCE, control_variate: bool = True,
                    bootstrap: int = 200, seed: int | None = None, batches: int = 10,
                    jobs: int = 1) -> DecayResult:
    """SPAM-robust decays of every probe from one set of inverse-free sequences.

    Computes the filtered correlations (:func:`robusttomo.estimate.compute_correlations`) and
    fits them (:func:`fit_decays`); see those for the parameters.

    Examples
    --------
    >>> import numpy as np
    >>> import robusttomo as rt
    >>> from robusttomo.channels import depolarizing
    >>> plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=60, shots=200, seed=1)
    >>> device = rt.Device.build(1, error=depolarizing(1, 0.98), readout=[(0.03, 0.05)])
    >>> counts = rt.simulate(plan, device, seed=2)
    >>> res = rt.estimate_decays(plan, counts, bootstrap=0)
    >>> bool(abs(res.identity_decay - 0.98) < 0.02)
    True
    """
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        corr = compute_correlations(plan, counts, probes=probes, kind=kind)
        return fit_decays(corr, control_variate=control_variate, bootstrap=bootstrap, seed=seed,
                          batches=batches, jobs=jobs)
