"""Models with fewer parameters, fitted to the SPAM-free linear observations of the unital block.

The observations (:class:`robusttomo.fit.LinearObservations`) say ``y ~ A b`` with
``b = B_L.reshape(-1)`` the row-major flattening of the error channel's unital block
``B_L = R_L[1:, 1:]`` (``D x D``, ``D = d*d - 1``) and ``y`` Gaussian with covariance ``C``.
Every model here maps a handful of parameters ``theta`` to a unital block ``B(theta)`` and is
fitted by weighted least squares,

    chi2(theta) = (y - A vec B(theta))^T C^+ (y - A vec B(theta)),

where ``C^+`` is the pseudo-inverse (directions of zero variance are dropped; see
:func:`_whitener`).  The models, by their names in this interface:

``"coherent+stochastic"`` (:func:`fit_generator_model`)
    Error generator with Hamiltonian and Pauli-stochastic terms only, ``2 (d*d - 1)``
    parameters (6 for one qubit, 30 for two), channel ``exp(sum_P h_P H_P + sum_P s_P S_P)``
    with ``H_P[rho] = -i [P, rho]`` and ``S_P[rho] = P rho P - rho`` ("A taxonomy of small
    Markovian errors", PRX Quantum 3, 020335 (2022)); ``s_P >= 0``.
``"coherent"`` (:func:`fit_coherent_model`)
    Purely unitary error ``exp(-i sum_P h_P P)``, ``d*d - 1`` parameters.
``"pauli"`` (:func:`fit_pauli_model`)
    Pauli channel ``rho -> (1 - sum_P p_P) rho + sum_P p_P P rho P``, ``d*d - 1``
    probabilities, ``p_P >= 0`` and ``sum_P p_P <= 1``.
``"full"``
    Any unital block (``D*D`` data-visible parameters), fitted elsewhere (the CPTP
    reconstruction) and wrapped here with :meth:`ModelFit.from_channel`.

Parameter labels are ``"H:ZZ"`` (Hamiltonian rate ``h_ZZ``), ``"S:XI"`` (stochastic rate
``s_XI``) and ``"p:XI"`` (Pauli error probability), Pauli labels with qubit 0 leftmost.
A rotation ``exp(-i theta/2 P)`` has ``h_P = theta / 2``; ``exp(s S_P)`` is a Pauli-``P``
error of probability ``(1 - exp(-2 s)) / 2``.

All four models are unital, so their non-unital vector is zero; the data do not determine
the non-unital part of the true channel anyway (see THEORY.md).

:func:`compare_models` chooses between fitted models by the Akaike information criterion
``AIC = chi2 + 2 k`` ("A new look at the statistical model identification", IEEE Trans.
Autom. Control 19, 716 (1974)) or, when observations from held-out sequences are given, by
the prediction chi-square on them; ``docs/method-models.md`` explains the choice.
"""

from __future__ import annotations

import enum
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.stats

from robusttomo import _pauli
from robusttomo.channels import Channel
from robusttomo.fit import LinearObservations
from robusttomo.generators import hamiltonian_basis, rates_from_channel, stochastic_basis

__all__ = [
    "AIC_TIE",
    "COHERENT",
    "COHERENT_STOCHASTIC",
    "FIGURE_LABELS",
    "FULL",
    "PAULI",
    "IntervalMethod",
    "LR_REJECT_P",
    "ModelComparison",
    "ModelFit",
    "ModelFitStatus",
    "ModelScore",
    "ParameterIntervals",
    "SelectionCriterion",
    "TABLE_COLUMNS",
    "compare_models",
    "fit_coherent_model",
    "fit_generator_model",
    "fit_pauli_model",
    "intervals_from_replicates",
]

#: Model names used by this module (plain words of our own).
FULL = "full"
COHERENT_STOCHASTIC = "coherent+stochastic"
PAULI = "pauli"
COHERENT = "coherent"

# Eigenvalues of the covariance below this fraction of the largest are treated as zero.
_RANK_TOL = 1e-12
# A bounded rate closer than this to its bound is set onto it (far below any resolvable rate).
_AT_BOUND = 1e-10


class ModelFitStatus(enum.Enum):
    """How a :class:`ModelFit` was obtained."""

    #: The optimizer met its tolerance (or the problem was solved exactly).
    CONVERGED = "converged"
    #: The optimizer stopped at its evaluation limit; the estimate may be inaccurate.
    MAX_EVALUATIONS = "max_evaluations"
    #: The channel was fitted elsewhere and wrapped by :meth:`ModelFit.from_channel`.
    GIVEN = "given"


class IntervalMethod(enum.Enum):
    """How :class:`ParameterIntervals` were computed."""

    #: ``estimate +- z * standard error`` from the Gauss-Newton covariance.
    WALD = "wald"
    #: Percentiles of the estimates refitted to bootstrap replicates of the observations.
    BOOTSTRAP = "bootstrap"


class SelectionCriterion(enum.Enum):
    """The rule :func:`compare_models` used to choose."""

    #: Smallest ``AIC = chi2 + 2 k`` on the fitted observations.
    AIC = "aic"
    #: Smallest prediction chi-square on held-out observations.
    HELDOUT = "heldout"


# ---- the weighted least-squares system ---------------------------------------------------------
@dataclass(frozen=True)
class _System:
    """Whitened, compressed form of ``chi2(b) = ||W (y - A b)||^2``.

    With ``W A = Q R`` (economy QR), ``chi2(b) = ||z - R b||^2 + rest`` where ``z = Q^T W y``
    and ``rest = ||W y - Q z||^2`` does not depend on ``b``.
    """

    n_qubits: int
    whitener: np.ndarray  # (r, k)
    q: np.ndarray  # (r, m)
    r: np.ndarray  # (m, D*D)
    z: np.ndarray  # (m,)
    rest: float
    rank: int  # r, the number of independent observations

    def with_values(self, values: np.ndarray) -> _System:
        yw = self.whitener @ values
        z = self.q.T @ yw
        rest = float(np.sum((yw - self.q @ z) ** 2))
        return _System(self.n_qubits, self.whitener, self.q, self.r, z, rest, self.rank)

    def chi2(self, b: np.ndarray) -> float:
        return float(np.sum((self.z - self.r @ b) ** 2) + self.rest)


def _whitener(covariance: np.ndarray) -> np.ndarray:
    """Rows ``W`` with ``W^T W = C^+``: ``W = diag(w^-1/2) U^T`` over the nonzero eigenvalues ``w``."""
    w, u = np.linalg.eigh(covariance)
    keep = w > _RANK_TOL * max(float(w.max()), 0.0)
    return (u[:, keep] / np.sqrt(w[keep])).T


def _check_obs(obs: object, name: str = "obs") -> LinearObservations:
    """Validate a LinearObservations once, where it enters."""
    if not isinstance(obs, LinearObservations):
        raise TypeError(f"'{name}' must be a robusttomo.fit.LinearObservations; got {type(obs).__name__}")
    n = _pauli.check_n_qubits(obs.n_qubits, name=f"{name}.n_qubits")
    dd = (4**n - 1) ** 2
    design = np.asarray(obs.design)
    values = np.asarray(obs.values)
    cov = np.asarray(obs.covariance)
    if design.ndim != 2 or design.shape[1] != dd:
        raise ValueError(f"'{name}.design' must have shape (k, {dd}) for {n} qubit(s); got {design.shape}")
    k = design.shape[0]
    if k == 0:
        raise ValueError(f"'{name}' holds no observations (design has 0 rows); supply at least one")
    if values.shape != (k,):
        raise ValueError(f"'{name}.values' must have shape ({k},) to match the design; got {values.shape}")
    if cov.shape != (k, k):
        raise ValueError(f"'{name}.covariance' must have shape ({k}, {k}); got {cov.shape}")
    for field, arr in (("design", design), ("values", values), ("covariance", cov)):
        if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
            raise TypeError(f"'{name}.{field}' must be a real numeric array; got dtype {arr.dtype}")
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"'{name}.{field}' must be finite; got NaN or inf entries")
    scale = float(np.max(np.abs(cov)))
    if scale == 0.0:
        raise ValueError(f"'{name}.covariance' is all zero; supply the estimated covariance of the values")
    if np.max(np.abs(cov - cov.T)) > 1e-10 * scale:
        raise ValueError(f"'{name}.covariance' must be symmetric; got max |C - C^T| = {np.max(np.abs(cov - cov.T)):.3g}")
    wmin = float(np.linalg.eigvalsh((cov + cov.T) / 2).min())
    if wmin < -1e-9 * scale:
        raise ValueError(f"'{name}.covariance' must be positive semidefinite; got smallest eigenvalue {wmin:.3g}")
    if obs.replicates is not None:
        rep = np.asarray(obs.replicates)
        if rep.ndim != 2 or rep.shape[1] != k:
            raise ValueError(f"'{name}.replicates' must have shape (B, {k}); got {rep.shape}")
        if not np.all(np.isfinite(rep)):
            raise ValueError(f"'{name}.replicates' must be finite; got NaN or inf entries")
    return obs


def _system(obs: LinearObservations) -> _System:
    cov = np.asarray(obs.covariance, dtype=float)
    w = _whitener((cov + cov.T) / 2)
    aw = w @ np.asarray(obs.design, dtype=float)
    q, r = np.linalg.qr(aw, mode="reduced")
    base = _System(obs.n_qubits, w, q, r, np.zeros(q.shape[1]), 0.0, int(w.shape[0]))
    return base.with_values(np.asarray(obs.values, dtype=float))


def _ptm_from_block(block: np.ndarray) -> np.ndarray:
    dd = block.shape[0] + 1
    ptm = np.zeros((dd, dd))
    ptm[0, 0] = 1.0
    ptm[1:, 1:] = block
    return ptm


# ---- results ----------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class ParameterIntervals:
    """Confidence intervals of a model's parameters, or of its figures of merit.

    Attributes
    ----------
    labels : tuple of str
        Parameter labels (``"H:ZZ"``, ``"S:XI"``, ``"p:XI"``), in the model's order, or the
        figure labels ``FIGURE_LABELS`` (``"average_gate_fidelity"``,
        ``"entanglement_fidelity"``).
    estimate : ndarray, shape (k,), float
        Point estimates (from the fit to the observed values).
    lower, upper : ndarray, shape (k,), float
        Interval ends.  Wald intervals of parameters bounded below by 0 are clipped at 0.
    level : float
        Nominal coverage, e.g. 0.95.
    method : IntervalMethod
        Wald (Gauss-Newton standard errors) or bootstrap percentiles.
    n_replicates : int
        Number of bootstrap replicates used (0 for Wald).
    """

    labels: tuple[str, ...]
    estimate: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    level: float
    method: IntervalMethod
    n_replicates: int

    def contains(self, values: Mapping[str, float]) -> dict[str, bool]:
        """Whether each given value (keyed by parameter label) lies inside its interval."""
        out = {}
        for lab, val in values.items():
            if lab not in self.labels:
                raise ValueError(f"unknown parameter label {lab!r}; expected one of {list(self.labels)}")
            i = self.labels.index(lab)
            out[lab] = bool(self.lower[i] <= val <= self.upper[i])
        return out


@dataclass(frozen=True, eq=False)
class ModelFit:
    """One model fitted to linear observations of the unital block.

    Attributes
    ----------
    name : str
        Model name: ``"coherent+stochastic"``, ``"coherent"``, ``"pauli"``, or the name
        given to :meth:`from_channel` (e.g. ``"full"``).
    channel : Channel
        The fitted error channel (unital for the models of this module).
    parameters : dict of str to float
        Estimates keyed by label (``"H:ZZ"``, ``"S:XI"``, ``"p:XI"``), in Pauli order, Hamiltonian
        terms first.  Empty for :meth:`from_channel`.  Treat as read-only.
    standard_errors : dict of str to float
        Gauss-Newton standard errors, same keys: square roots of the diagonal of
        ``(J^T C^+ J)^-1``, ``J`` the Jacobian of ``A vec B(theta)`` at the estimate.
        ``inf`` for a parameter the observations do not determine.
    parameter_covariance : ndarray, shape (k, k), float
        The Gauss-Newton covariance ``(J^T C^+ J)^+`` in the order of ``parameters``.
    chi2 : float
        ``(y - A b)^T C^+ (y - A b)`` at the estimate ``b = vec B(theta)``.
    n_parameters : int
        Number of free parameters ``k`` (the data-visible count, ``D*D``, for the full model).
    n_observations : int
        Number of independent observations: the rank of the covariance.
    status : ModelFitStatus
        How the fit ended.
    n_evaluations : int
        Residual evaluations used by the optimizer (0 for closed-form or given fits).
    """

    name: str
    channel: Channel
    parameters: dict[str, float]
    standard_errors: dict[str, float]
    parameter_covariance: np.ndarray
    chi2: float
    n_parameters: int
    n_observations: int
    status: ModelFitStatus
    n_evaluations: int

    @property
    def n_qubits(self) -> int:
        """Number of qubits."""
        return self.channel.n_qubits

    @property
    def unital_block(self) -> np.ndarray:
        """The fitted unital block ``B = R[1:, 1:]``, shape ``(D, D)``."""
        return self.channel.unital_block

    @property
    def dof(self) -> int:
        """Degrees of freedom ``n_observations - n_parameters`` (may be <= 0)."""
        return self.n_observations - self.n_parameters

    @property
    def aic(self) -> float:
        """Akaike information criterion ``chi2 + 2 k`` (Gaussian likelihood, known covariance)."""
        return self.chi2 + 2.0 * self.n_parameters

    def fidelity_intervals(self, *, level: float = 0.95) -> ParameterIntervals:
        """Wald intervals of the model channel's fidelities to the identity, by the delta method.

        The entanglement fidelity is ``F_e = (1 + tr B) / d**2`` and the average gate fidelity
        ``F_avg = (d F_e + 1) / (d + 1)`` ("A simple formula for the average gate fidelity of a
        quantum dynamical operation", Phys. Lett. A 303, 249 (2002)); with ``g`` the gradient
        of ``F`` with respect to the parameters at the estimate, the standard error is
        ``sqrt(g^T V g)``, ``V`` = :attr:`parameter_covariance`, and the interval
        ``F +- z_{(1+level)/2} sqrt(g^T V g)``, its upper end clipped at 1.  The standard error
        is ``inf`` when ``g`` touches a parameter the observations do not determine.

        Parameters
        ----------
        level : float
            Nominal coverage in (0, 1).

        Returns
        -------
        ParameterIntervals
            Labels ``FIGURE_LABELS``, method :attr:`IntervalMethod.WALD`.

        Raises
        ------
        ValueError
            For a channel wrapped by :meth:`from_channel` (it carries no parameter covariance).
        """
        level = _check_level(level)
        if self.status is ModelFitStatus.GIVEN:
            raise ValueError(
                f"model {self.name!r} was fitted elsewhere and carries no parameter covariance;"
                " take its intervals from the code that fitted it (e.g. the bootstrap of analyze)"
            )
        labels = tuple(self.parameters)
        theta = np.array([self.parameters[k] for k in labels], dtype=float)
        grad_tr = _trace_gradient(self.name, self.n_qubits, theta)
        d = 2**self.n_qubits
        est = np.array(_fidelities(self.unital_block))
        scale = np.array([d / (d * d * (d + 1)), 1.0 / (d * d)])  # dF/dtr(B) for F_avg, F_e
        se_par = np.array([self.standard_errors[k] for k in labels], dtype=float)
        touched = np.abs(grad_tr) > 1e-12 * max(float(np.abs(grad_tr).max()), 1e-300)
        if np.any(np.isinf(se_par) & touched):
            se = np.full(2, np.inf)
        else:
            se = scale * float(np.sqrt(max(grad_tr @ self.parameter_covariance @ grad_tr, 0.0)))
        zq = scipy.stats.norm.ppf(0.5 + level / 2)
        lower = est - zq * se
        upper = np.minimum(est + zq * se, 1.0)
        return ParameterIntervals(FIGURE_LABELS, est, lower, upper, level, IntervalMethod.WALD, 0)

    def intervals(self, *, level: float = 0.95) -> ParameterIntervals:
        """Wald intervals ``estimate +- z_{(1+level)/2} * standard_error``.

        Parameters
        ----------
        level : float
            Nominal coverage in (0, 1).

        Returns
        -------
        ParameterIntervals
            Parameters bounded below by 0 (``S:`` rates, ``p:`` probabilities) have their lower
            end clipped at 0.
        """
        level = _check_level(level)
        labels = tuple(self.parameters)
        est = np.array([self.parameters[k] for k in labels], dtype=float)
        se = np.array([self.standard_errors[k] for k in labels], dtype=float)
        zq = scipy.stats.norm.ppf(0.5 + level / 2)
        lower = est - zq * se
        upper = est + zq * se
        nonneg = np.array([not lab.startswith("H:") for lab in labels], dtype=bool)
        lower[nonneg] = np.maximum(lower[nonneg], 0.0)
        return ParameterIntervals(labels, est, lower, upper, level, IntervalMethod.WALD, 0)

    @classmethod
    def from_channel(cls, name: str, channel: Channel, n_parameters: int, obs: LinearObservations) -> ModelFit:
        """Wrap a channel fitted elsewhere (e.g. the full CPTP fit) for :func:`compare_models`.

        Parameters
        ----------
        name : str
            Model name shown in the comparison, e.g. ``"full"``.
        channel : Channel
            The fitted channel; only its unital block enters ``chi2``.
        n_parameters : int
            The model's data-visible parameter count (``D*D`` for an unrestricted unital block).
        obs : LinearObservations
            The observations the channel was fitted to.

        Returns
        -------
        ModelFit
            With empty ``parameters``, status :attr:`ModelFitStatus.GIVEN`, and ``chi2``
            computed on ``obs``.
        """
        if not isinstance(name, str) or not name:
            raise TypeError(f"'name' must be a non-empty string; got {name!r}")
        if not isinstance(channel, Channel):
            raise TypeError(f"'channel' must be a robusttomo Channel; got {type(channel).__name__}")
        if isinstance(n_parameters, bool) or not isinstance(n_parameters, (int, np.integer)) or n_parameters < 0:
            raise ValueError(f"'n_parameters' must be a non-negative integer; got {n_parameters!r}")
        obs = _check_obs(obs)
        if channel.n_qubits != obs.n_qubits:
            raise ValueError(
                f"'channel' acts on {channel.n_qubits} qubit(s) but 'obs' on {obs.n_qubits}; pass matching ones"
            )
        sys = _system(obs)
        return cls(
            name=name,
            channel=channel,
            parameters={},
            standard_errors={},
            parameter_covariance=np.zeros((0, 0)),
            chi2=sys.chi2(channel.unital_block.reshape(-1)),
            n_parameters=int(n_parameters),
            n_observations=sys.rank,
            status=ModelFitStatus.GIVEN,
            n_evaluations=0,
        )


#: Labels of the figures in :meth:`ModelFit.fidelity_intervals` and
#: ``intervals_from_replicates(..., figures=True)``.
FIGURE_LABELS = ("average_gate_fidelity", "entanglement_fidelity")


def _fidelities(block: np.ndarray) -> tuple[float, float]:
    """``(F_avg, F_e)`` of a unital channel with unital block ``block``, against the identity."""
    dd = block.shape[0] + 1
    d = int(round(np.sqrt(dd)))
    fe = (1.0 + float(np.trace(block))) / dd
    return (d * fe + 1.0) / (d + 1.0), fe


def _trace_gradient(name: str, n: int, theta: np.ndarray) -> np.ndarray:
    """Gradient of ``tr B(theta)`` with respect to the parameters of model ``name``."""
    dim = 4**n - 1
    diag = np.arange(dim) * (dim + 1)
    if name == PAULI:
        return -2.0 * _anticommutation(n).sum(axis=0)  # tr(I - 2 diag(M p)) = D - 2 1^T M p
    basis, _, _ = _generator_parts(n, name == COHERENT_STOCHASTIC)
    return _expm_and_jacobian(basis, theta)[1][diag].sum(axis=0)


def _check_level(level: object) -> float:
    if isinstance(level, bool) or not isinstance(level, (int, float, np.floating)) or not 0 < level < 1:
        raise ValueError(f"'level' must be a number in (0, 1), e.g. 0.95; got {level!r}")
    return float(level)


def _gauss_newton_covariance(jac: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(J^T J)^+`` and standard errors; ``inf`` for parameters touching the null space of ``J``."""
    k = jac.shape[1]
    _, sv, vt = np.linalg.svd(jac, full_matrices=True)  # vt is (k, k)
    tol = max(jac.shape) * np.finfo(float).eps * (sv[0] if sv.size else 0.0)
    good = np.zeros(k, dtype=bool)
    good[: sv.size] = sv > tol
    v = vt[good].T
    cov = (v / sv[good[: sv.size]] ** 2) @ v.T
    se = np.sqrt(np.diag(cov))
    if not good.all():
        # a parameter with a component along an undetermined direction has no finite error
        touched = np.max(np.abs(vt[~good]), axis=0) > 1e-8
        se = np.where(touched, np.inf, se)
    return cov, se


# ---- the error-generator models ---------------------------------------------------------------
def _generator_parts(n: int, stochastic: bool) -> tuple[np.ndarray, tuple[str, ...], np.ndarray]:
    """Basis blocks (p, D, D), labels, and lower bounds of the generator parameters."""
    pl = _pauli.pauli_labels(n)[1:]
    ham = hamiltonian_basis(n)[:, 1:, 1:]
    labels = tuple(f"H:{p}" for p in pl)
    lower = [-np.inf] * len(pl)
    if stochastic:
        ham = np.concatenate([ham, stochastic_basis(n)[:, 1:, 1:]])
        labels = labels + tuple(f"S:{p}" for p in pl)
        lower = lower + [0.0] * len(pl)
    return np.ascontiguousarray(ham), labels, np.array(lower)


def _expm_and_jacobian(basis: np.ndarray, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``B = expm(G)``, ``G = sum_a theta_a E_a``, and ``dvec(B)/dtheta`` (D*D, p).

    The derivative along ``E_a`` is the Frechet derivative of expm, read off the upper-right
    block of ``expm([[G, eps E_a], [0, G]]) / eps`` (one batched call; accurate without finite
    differences and without diagonalizing a possibly non-normal ``G``).
    """
    p, dim, _ = basis.shape
    g = np.tensordot(theta, basis, axes=1)
    # the derivative is linear in E_a: a small multiple keeps the block norm (and so the
    # number of squarings in expm) that of G
    eps = max(float(np.abs(g).sum(axis=1).max()), 1e-3) / float(np.abs(basis).sum(axis=2).max())
    big = np.zeros((p, 2 * dim, 2 * dim))
    big[:, :dim, :dim] = g
    big[:, dim:, dim:] = g
    big[:, :dim, dim:] = eps * basis
    ex = scipy.linalg.expm(big)
    b = ex[0, :dim, :dim]
    jac = ex[:, :dim, dim:].reshape(p, dim * dim).T / eps
    return b, jac


def _linear_start(sys: _System, basis: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """Start from the first-order model ``B ~ I + G(theta)``: a bounded linear least squares."""
    dim = basis.shape[1]
    e = basis.reshape(basis.shape[0], dim * dim).T
    rhs = sys.z - sys.r @ np.eye(dim).reshape(-1)
    a = sys.r @ e
    ub = np.full(lower.shape, np.inf)
    if np.all(np.isinf(lower)):
        return np.linalg.lstsq(a, rhs, rcond=None)[0]
    return scipy.optimize.lsq_linear(a, rhs, bounds=(lower, ub), method="bvls").x


def _log_start(sys: _System, n: int, stochastic: bool) -> np.ndarray | None:
    """Start from the logarithm of the unconstrained linear estimate, projected on H (and S)."""
    dd = sys.r.shape[1]
    if sys.r.shape[0] < dd or np.linalg.matrix_rank(sys.r) < dd:
        return None
    b = np.linalg.solve(sys.r, sys.z) if sys.r.shape[0] == dd else np.linalg.lstsq(sys.r, sys.z, rcond=None)[0]
    dim = int(round(np.sqrt(dd)))
    try:
        gen = rates_from_channel(Channel(_ptm_from_block(b.reshape(dim, dim)), _trusted=True))
    except ValueError:
        return None
    h = np.array(list(gen.hamiltonian.values()))
    if not stochastic:
        return h
    return np.concatenate([h, np.maximum(np.array(list(gen.stochastic.values())), 0.0)])


def _fit_generator(
    sys: _System,
    *,
    name: str,
    stochastic: bool,
    start: np.ndarray | None,
    restarts: int,
    rng: np.random.Generator | None,
    max_evaluations: int,
    tolerance: float,
) -> ModelFit:
    n = sys.n_qubits
    basis, labels, lower = _generator_parts(n, stochastic)
    upper = np.full(lower.shape, np.inf)

    # least_squares asks for residuals at trial points it may reject, so only the Jacobian
    # (one batched expm) is computed on demand; the residual needs a single expm
    def fun(theta: np.ndarray) -> np.ndarray:
        b = scipy.linalg.expm(np.tensordot(theta, basis, axes=1))
        return sys.z - sys.r @ b.reshape(-1)

    def jac(theta: np.ndarray) -> np.ndarray:
        return -sys.r @ _expm_and_jacobian(basis, theta)[1]

    starts: list[np.ndarray] = []
    if start is not None:
        starts.append(np.maximum(start, lower))
    else:
        starts.append(np.maximum(_linear_start(sys, basis, lower), lower))
        log0 = _log_start(sys, n, stochastic)
        if log0 is not None:
            starts.append(log0)
    if restarts:
        # spread restarts on the scale of the first start's linearized standard errors
        _, se0 = _gauss_newton_covariance(jac(starts[0]))
        scale = np.where(np.isfinite(se0), 3.0 * se0, 0.1)
        for _ in range(restarts):
            starts.append(np.maximum(starts[0] + rng.normal(size=starts[0].shape) * scale, lower))

    best = None
    total_nfev = 0
    for x0 in starts:
        res = scipy.optimize.least_squares(
            fun,
            x0,
            jac=jac,
            bounds=(lower, upper),
            method="trf",
            x_scale=1.0,  # "jac" scaling stalls (xtol) when a parameter is undetermined
            ftol=tolerance,
            xtol=tolerance,
            gtol=tolerance,
            max_nfev=max_evaluations,
        )
        total_nfev += int(res.nfev)
        if best is None or res.cost < best.cost:
            best = res
    theta = np.array(best.x, dtype=float)
    # the trust-region iterates stay strictly inside the bounds, so a rate at its bound comes
    # back as 1e-20 or so; put it on the bound, or an interval [0, ...] would exclude a true 0
    theta = np.where(theta - lower < _AT_BOUND, lower, theta)
    b, jb = _expm_and_jacobian(basis, theta)
    cov, se = _gauss_newton_covariance(sys.r @ jb)
    status = ModelFitStatus.CONVERGED if best.status > 0 else ModelFitStatus.MAX_EVALUATIONS
    return ModelFit(
        name=name,
        channel=Channel(_ptm_from_block(b), _trusted=True),
        parameters={lab: float(v) for lab, v in zip(labels, theta)},
        standard_errors={lab: float(v) for lab, v in zip(labels, se)},
        parameter_covariance=cov,
        chi2=sys.chi2(b.reshape(-1)),
        n_parameters=len(labels),
        n_observations=sys.rank,
        status=status,
        n_evaluations=total_nfev,
    )


def _check_options(max_evaluations: object, tolerance: object, restarts: object, rng: object) -> None:
    if isinstance(max_evaluations, bool) or not isinstance(max_evaluations, (int, np.integer)) or max_evaluations < 1:
        raise ValueError(f"'max_evaluations' must be a positive integer; got {max_evaluations!r}")
    if isinstance(tolerance, bool) or not isinstance(tolerance, (int, float)) or not 0 < tolerance < 1:
        raise ValueError(f"'tolerance' must be a number in (0, 1), e.g. 1e-12; got {tolerance!r}")
    if isinstance(restarts, bool) or not isinstance(restarts, (int, np.integer)) or restarts < 0:
        raise ValueError(f"'restarts' must be a non-negative integer; got {restarts!r}")
    if rng is not None and not isinstance(rng, np.random.Generator):
        raise TypeError(f"'rng' must be a numpy.random.Generator or None; got {type(rng).__name__}")
    if restarts and rng is None:
        raise ValueError(
            f"'restarts' = {restarts} needs random starting points; pass rng=numpy.random.default_rng(seed)"
        )


def _check_start(start: object, labels: tuple[str, ...]) -> np.ndarray | None:
    if start is None:
        return None
    if not isinstance(start, Mapping):
        raise TypeError(f"'start' must be a mapping from parameter label to value, or None; got {type(start).__name__}")
    unknown = [k for k in start if k not in labels]
    if unknown:
        raise ValueError(f"'start' has unknown labels {unknown}; expected labels like {labels[0]!r}")
    out = np.zeros(len(labels))
    for i, lab in enumerate(labels):
        val = float(start.get(lab, 0.0))
        if not np.isfinite(val):
            raise ValueError(f"'start[{lab!r}]' must be finite; got {val!r}")
        out[i] = val
    return out


def fit_generator_model(
    obs: LinearObservations,
    *,
    rng: np.random.Generator | None = None,
    restarts: int = 0,
    start: Mapping[str, float] | None = None,
    max_evaluations: int = 200,
    tolerance: float = 1e-12,
) -> ModelFit:
    """Fit the "coherent+stochastic" model: an error generator with H and S terms only.

    The error channel is ``exp(G)`` with

        G = sum_P h_P H_P + sum_P s_P S_P,   H_P[rho] = -i [P, rho],   S_P[rho] = P rho P - rho,

    over the ``d*d - 1`` non-identity Paulis ``P`` ("A taxonomy of small Markovian errors",
    PRX Quantum 3, 020335 (2022)); ``2 (d*d - 1)`` parameters (6 for one qubit, 30 for two).
    The estimate solves the weighted nonlinear least-squares problem

        minimize_{h, s}  || W (y - A vec B(h, s)) ||^2   subject to  s_P >= 0,

    with ``B(h, s) = expm(G)[1:, 1:]`` (``G`` is unital, so this is ``expm`` of its unital
    block) and ``W^T W = C^+`` from the observations' covariance.  Solved by
    ``scipy.optimize.least_squares`` (trust-region reflective, bounds) with the analytic
    Jacobian (the Frechet derivative of the matrix exponential), after compressing ``W A``
    by a QR factorization.  The starting point is the better of (i) the first-order estimate
    ``B ~ I + G`` (a bounded linear least squares) and (ii) the H and S projection of the
    logarithm of the unconstrained linear estimate, when that exists.

    Parameters
    ----------
    obs : LinearObservations
        Observations ``y ~ A vec(B_L)`` with covariance ``C``; see :mod:`robusttomo.fit`.
    rng : numpy.random.Generator, optional
        Source of the random extra starting points (needed only when ``restarts > 0``).
    restarts : int
        Extra random starting points around the first one (spread three linearized standard
        errors); the fit with the smallest ``chi2`` is kept.
    start : mapping of str to float, optional
        Starting point keyed by label (``"H:ZZ"``, ``"S:XI"``; missing labels start at 0),
        replacing the automatic one (used when refitting bootstrap replicates).
    max_evaluations : int
        Residual evaluations allowed per starting point.
    tolerance : float
        ``ftol``, ``xtol`` and ``gtol`` of ``least_squares``.

    Returns
    -------
    ModelFit
        Named ``"coherent+stochastic"``; parameters ``"H:<P>"`` then ``"S:<P>"`` in Pauli
        order; standard errors from the Gauss-Newton covariance ``(J^T C^+ J)^-1`` at the
        estimate (for a rate at its bound 0 this is the curvature there, not a one-sided error).

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo.fit import LinearObservations
    >>> from robusttomo.generators import channel_from_rates
    >>> from robusttomo.models import fit_generator_model
    >>> truth = channel_from_rates(1, hamiltonian={"Z": 0.02}, stochastic={"X": 0.01})
    >>> obs = LinearObservations(1, np.eye(9), truth.unital_block.reshape(-1), 1e-6 * np.eye(9),
    ...                          tuple(f"M{i}" for i in range(9)))
    >>> fit = fit_generator_model(obs)
    >>> round(fit.parameters["H:Z"], 8), round(fit.parameters["S:X"], 8)
    (0.02, 0.01)
    """
    obs = _check_obs(obs)
    _check_options(max_evaluations, tolerance, restarts, rng)
    _, labels, _ = _generator_parts(obs.n_qubits, True)
    x0 = _check_start(start, labels)
    return _fit_generator(
        _system(obs),
        name=COHERENT_STOCHASTIC,
        stochastic=True,
        start=x0,
        restarts=int(restarts),
        rng=rng,
        max_evaluations=int(max_evaluations),
        tolerance=float(tolerance),
    )


def fit_coherent_model(
    obs: LinearObservations,
    *,
    rng: np.random.Generator | None = None,
    restarts: int = 0,
    start: Mapping[str, float] | None = None,
    max_evaluations: int = 200,
    tolerance: float = 1e-12,
) -> ModelFit:
    """Fit the "coherent" model: a purely unitary error ``U = exp(-i sum_P h_P P)``.

    The channel is ``exp(sum_P h_P H_P)`` with ``H_P[rho] = -i [P, rho]`` (so a rotation
    ``exp(-i theta/2 P)`` has ``h_P = theta / 2``), ``d*d - 1`` parameters.  The estimate solves

        minimize_h  || W (y - A vec B(h)) ||^2,   B(h) = expm(sum_P h_P H_P)[1:, 1:],

    exactly as :func:`fit_generator_model` with every stochastic rate fixed at 0 (same solver,
    Jacobian, starting points and options).

    Parameters
    ----------
    obs : LinearObservations
        Observations ``y ~ A vec(B_L)`` with covariance ``C``.
    rng, restarts, start, max_evaluations, tolerance
        As in :func:`fit_generator_model` (``start`` keys ``"H:<P>"``).

    Returns
    -------
    ModelFit
        Named ``"coherent"``; parameters ``"H:<P>"`` in Pauli order.
    """
    obs = _check_obs(obs)
    _check_options(max_evaluations, tolerance, restarts, rng)
    _, labels, _ = _generator_parts(obs.n_qubits, False)
    x0 = _check_start(start, labels)
    return _fit_generator(
        _system(obs),
        name=COHERENT,
        stochastic=False,
        start=x0,
        restarts=int(restarts),
        rng=rng,
        max_evaluations=int(max_evaluations),
        tolerance=float(tolerance),
    )


# ---- the Pauli channel ------------------------------------------------------------------------
def _anticommutation(n: int) -> np.ndarray:
    """``M[i, j] = 1`` if non-identity Paulis ``P_i`` and ``P_j`` anticommute, else 0; (D, D)."""
    sym = np.array([[0, 0, 0, 0], [0, 0, 1, 1], [0, 1, 0, 1], [0, 1, 1, 0]])
    # per qubit: 1 where single-qubit Paulis anticommute; the n-qubit Paulis anticommute when
    # an odd number of positions do
    digits = np.array([[int(c) for c in np.base_repr(i, 4).zfill(n)] for i in range(4**n)])
    count = sum(sym[digits[:, q][:, None], digits[:, q][None, :]] for q in range(n))
    return (count % 2)[1:, 1:].astype(float)


def _fit_pauli(sys: _System) -> ModelFit:
    n = sys.n_qubits
    dim = 4**n - 1
    labels = tuple(f"p:{p}" for p in _pauli.pauli_labels(n)[1:])
    # diagonal of B is 1 - 2 M p; the off-diagonal entries are 0
    diag_idx = np.arange(dim) * (dim + 1)
    a = -2.0 * sys.r[:, diag_idx] @ _anticommutation(n)
    rhs = sys.z - sys.r @ np.eye(dim).reshape(-1)
    res = scipy.optimize.lsq_linear(a, rhs, bounds=(0.0, 1.0), method="bvls", tol=1e-14)
    p = res.x
    if p.sum() > 1.0:
        p = _simplex_least_squares(a, rhs)
    b = np.eye(dim) - 2.0 * np.diag(_anticommutation(n) @ p)
    cov, se = _gauss_newton_covariance(a)
    return ModelFit(
        name=PAULI,
        channel=Channel(_ptm_from_block(b), _trusted=True),
        parameters={lab: float(v) for lab, v in zip(labels, p)},
        standard_errors={lab: float(v) for lab, v in zip(labels, se)},
        parameter_covariance=cov,
        chi2=sys.chi2(b.reshape(-1)),
        n_parameters=dim,
        n_observations=sys.rank,
        status=ModelFitStatus.CONVERGED,
        n_evaluations=0,
    )


def _simplex_least_squares(a: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """``min ||a p - rhs||^2`` over ``p >= 0, sum p <= 1``: a small convex QP (Clarabel, via cvxpy).

    Reached only when the box-bounded solution sums above 1 (an error probability above 1,
    i.e. data far from any Pauli channel), so the heavier import is paid only then.
    """
    import cvxpy

    x = cvxpy.Variable(a.shape[1])
    prob = cvxpy.Problem(cvxpy.Minimize(cvxpy.sum_squares(a @ x - rhs)), [x >= 0, cvxpy.sum(x) <= 1])
    prob.solve(solver=cvxpy.CLARABEL, tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12,
               max_threads=1)  # one thread: core-count independent, safe in forked workers
    if x.value is None:
        raise RuntimeError(f"the Pauli-channel fit's quadratic program failed (solver status {prob.status!r})")
    p = np.clip(np.asarray(x.value, dtype=float), 0.0, 1.0)
    return p / max(1.0, float(p.sum()))


def fit_pauli_model(obs: LinearObservations) -> ModelFit:
    """Fit the "pauli" model: a Pauli channel ``rho -> p_I rho + sum_P p_P P rho P``.

    The PTM of a Pauli channel is diagonal with ``R[i, i] = sum_j p_j (+1 if P_i, P_j
    commute, else -1)`` (common practice), so with ``p_I = 1 - sum_P p_P`` the unital block is
    ``B(p) = I - 2 diag(M p)``, ``M[i, j] = 1`` when ``P_i`` and ``P_j`` anticommute: linear in
    the ``d*d - 1`` probabilities.  The estimate solves the bounded least-squares problem

        minimize_p  || W (y - A vec B(p)) ||^2   subject to  p_P >= 0,  sum_P p_P <= 1,

    by ``scipy.optimize.lsq_linear`` (bounded-variable least squares, exact active set) and,
    only when that solution has ``sum_P p_P > 1``, as a quadratic program with the sum
    constraint (Clarabel through cvxpy).

    Parameters
    ----------
    obs : LinearObservations
        Observations ``y ~ A vec(B_L)`` with covariance ``C``.

    Returns
    -------
    ModelFit
        Named ``"pauli"``; parameters ``"p:<P>"`` (error probabilities, not fidelities) in
        Pauli order; standard errors ``sqrt(diag((J^T C^+ J)^-1))`` with the constant Jacobian.
    """
    return _fit_pauli(_system(_check_obs(obs)))


# ---- bootstrap intervals ----------------------------------------------------------------------
def intervals_from_replicates(
    fit: ModelFit, obs: LinearObservations, *, level: float = 0.95, figures: bool = False
) -> ParameterIntervals:
    """Bootstrap percentile intervals: refit the model to every replicate in ``obs.replicates``.

    Each replicate ``y_b`` (the values recomputed on resampled sequences) is fitted with the
    same design, covariance weights and model as ``fit`` (the nonlinear models start from
    ``fit``'s estimate), and the interval of each parameter (or, with ``figures=True``, of
    each fidelity of the refitted channel) runs between the ``(1 - level)/2`` and
    ``(1 + level)/2`` quantiles of the refitted values.

    Parameters
    ----------
    fit : ModelFit
        A fit by :func:`fit_generator_model`, :func:`fit_coherent_model` or
        :func:`fit_pauli_model` to ``obs``.
    obs : LinearObservations
        The observations ``fit`` was made on, with ``replicates`` of shape ``(B, k)``, ``B >= 2``.
    level : float
        Nominal coverage in (0, 1).
    figures : bool
        False: intervals of the parameters.  True: intervals of the average gate fidelity
        and the entanglement fidelity of the model channel to the identity (labels
        ``FIGURE_LABELS``).

    Returns
    -------
    ParameterIntervals
        Method :attr:`IntervalMethod.BOOTSTRAP`, estimates from ``fit``.
    """
    if not isinstance(fit, ModelFit):
        raise TypeError(f"'fit' must be a ModelFit; got {type(fit).__name__}")
    obs = _check_obs(obs)
    level = _check_level(level)
    if not isinstance(figures, (bool, np.bool_)):
        raise TypeError(f"'figures' must be True or False; got {figures!r}")
    if fit.name not in (COHERENT_STOCHASTIC, COHERENT, PAULI) or fit.status is ModelFitStatus.GIVEN:
        raise ValueError(
            f"cannot refit model {fit.name!r} here: only 'coherent+stochastic', 'coherent' and 'pauli' fits"
            " are refitted; bootstrap a given channel with the code that fitted it"
        )
    if fit.n_qubits != obs.n_qubits:
        raise ValueError(f"'fit' is for {fit.n_qubits} qubit(s) but 'obs' for {obs.n_qubits}; pass the fitted observations")
    if obs.replicates is None or np.asarray(obs.replicates).shape[0] < 2:
        raise ValueError("'obs.replicates' must hold at least 2 bootstrap replicates; recompute the observations with a bootstrap")
    sys = _system(obs)
    labels = tuple(fit.parameters)
    est = np.array([fit.parameters[k] for k in labels])
    reps = np.asarray(obs.replicates, dtype=float)
    out = np.empty((reps.shape[0], len(FIGURE_LABELS) if figures else len(labels)))
    for i, y in enumerate(reps):
        s = sys.with_values(y)
        if fit.name == PAULI:
            refit = _fit_pauli(s)
        else:
            refit = _fit_generator(
                s,
                name=fit.name,
                stochastic=fit.name == COHERENT_STOCHASTIC,
                start=est,
                restarts=0,
                rng=None,
                max_evaluations=200,
                tolerance=1e-10,
            )
        out[i] = _fidelities(refit.unital_block) if figures else [refit.parameters[k] for k in labels]
    lower, upper = np.quantile(out, [0.5 - level / 2, 0.5 + level / 2], axis=0)
    if figures:
        labels, est = FIGURE_LABELS, np.array(_fidelities(fit.unital_block))
    return ParameterIntervals(labels, est, lower, upper, level, IntervalMethod.BOOTSTRAP, int(reps.shape[0]))


# ---- comparison -------------------------------------------------------------------------------
#: Models whose AIC is within this of the lowest count as equally supported ("Model Selection
#: and Multimodel Inference", Springer (2002), section 2.6: Delta AIC <= 2, substantial support).
AIC_TIE = 2.0

#: With held-out data, a model is not chosen when a model with more parameters fits the same
#: observations better by a chi2 difference whose likelihood-ratio p-value is below this
#: (Wilks' theorem: "The large-sample distribution of the likelihood ratio for testing
#: composite hypotheses", Ann. Math. Statist. 9, 60 (1938)); see :func:`compare_models`.
LR_REJECT_P = 1e-3


@dataclass(frozen=True)
class ModelScore:
    """One model's figures in a :class:`ModelComparison` (one row of the report's table).

    Attributes
    ----------
    name : str
        Model name.
    n_parameters : int
        Free parameters ``k``.
    n_observations : int
        Independent observations fitted.
    chi2 : float
        Weighted residual ``chi2`` on the fitted observations.
    dof : int
        ``n_observations - n_parameters``.
    p_value : float or None
        Goodness of fit: ``P(chi2_dof >= chi2)`` for a chi-square variable with ``dof`` degrees
        of freedom; None when ``dof <= 0``.
    aic : float
        ``chi2 + 2 k``.
    delta_aic : float
        ``aic`` minus the smallest ``aic`` among the models (0 for the lowest).
    aic_weight : float
        Akaike weight ``exp(-delta_aic / 2) / sum(...)``, the relative support, in (0, 1].
    heldout_chi2 : float or None
        Prediction chi-square ``(y' - A' b)^T C'^+ (y' - A' b)`` of the fitted block ``b`` on the
        held-out observations; None when none were given.
    heldout_gap : float or None
        ``heldout_chi2`` minus the smallest ``heldout_chi2`` (0 for the best predictor).
    heldout_gap_se : float or None
        Standard error of ``heldout_gap`` due to the held-out noise,
        ``2 ||W' A' (b - b_best)||`` (0 for the best predictor).
    heldout_n : int
        Independent held-out observations (0 when none).
    rejected_by : str or None
        Name of a model with more parameters that fits the same observations significantly
        better (likelihood-ratio p-value below ``LR_REJECT_P``, the smallest such p-value's
        model); such a model is not chosen with held-out data.  None when no model does.
    rejected_p : float or None
        That likelihood-ratio p-value, ``P(chi-square(k' - k) >= chi2 - chi2')``.
    """

    name: str
    n_parameters: int
    n_observations: int
    chi2: float
    dof: int
    p_value: float | None
    aic: float
    delta_aic: float
    aic_weight: float
    heldout_chi2: float | None
    heldout_gap: float | None
    heldout_gap_se: float | None
    heldout_n: int
    rejected_by: str | None = None
    rejected_p: float | None = None


#: Column names of :meth:`ModelComparison.table`, in order.
TABLE_COLUMNS = (
    "model",
    "parameters",
    "observations",
    "chi2",
    "dof",
    "p_value",
    "aic",
    "delta_aic",
    "aic_weight",
    "heldout_chi2",
    "heldout_gap",
    "heldout_gap_se",
    "chosen",
)


@dataclass(frozen=True)
class ModelComparison:
    """Which of several fitted models the data support.

    Attributes
    ----------
    scores : tuple of ModelScore
        Every model's figures, in the order the fits were given.
    chosen : str
        Name of the chosen model.
    criterion : SelectionCriterion
        :attr:`SelectionCriterion.HELDOUT` when held-out observations were given, else
        :attr:`SelectionCriterion.AIC`.
    reason : str
        The choice in plain words, with the figures it rests on.
    heldout_threshold : float or None
        With held-out data: the standard error of the held-out chi2 of the best predictor
        among the models the fitted data do not reject, the margin of the one-standard-error
        rule.  None without held-out data.
    """

    scores: tuple[ModelScore, ...]
    chosen: str
    criterion: SelectionCriterion
    reason: str
    heldout_threshold: float | None = None

    def score(self, name: str) -> ModelScore:
        """The :class:`ModelScore` of the model called ``name``."""
        for s in self.scores:
            if s.name == name:
                return s
        raise ValueError(f"no model named {name!r}; the comparison holds {[s.name for s in self.scores]}")

    def table(self) -> tuple[tuple[object, ...], ...]:
        """Rows for a side-by-side table, one per model, columns as in ``TABLE_COLUMNS``."""
        return tuple(
            (
                s.name,
                s.n_parameters,
                s.n_observations,
                s.chi2,
                s.dof,
                s.p_value,
                s.aic,
                s.delta_aic,
                s.aic_weight,
                s.heldout_chi2,
                s.heldout_gap,
                s.heldout_gap_se,
                s.name == self.chosen,
            )
            for s in self.scores
        )


def compare_models(fits: Sequence[ModelFit], *, heldout: LinearObservations | None = None) -> ModelComparison:
    """Choose between fitted models by fit quality against number of parameters.

    Without held-out data the score is the Akaike information criterion

        AIC = chi2 + 2 k,

    ``chi2`` the weighted residual on the fitted observations and ``k`` the number of free
    parameters; since the observations are Gaussian with known covariance, ``chi2`` is
    ``-2 log(likelihood)`` up to a constant shared by every model ("A new look at the
    statistical model identification", IEEE Trans. Autom. Control 19, 716 (1974)).  The
    chosen model is the one with the FEWEST parameters among those with
    ``AIC <= min AIC + 2`` (``AIC_TIE``; such models are about equally supported, "Model
    Selection and Multimodel Inference", Springer (2002)); ties go to the lower AIC.

    With ``heldout`` observations (from sequences NOT used in any fit) the score is the
    prediction chi-square

        chi2_heldout(m) = (y' - A' b_m)^T C'^+ (y' - A' b_m),

    ``b_m`` model ``m``'s fitted unital block: a direct measurement of the out-of-sample error
    that AIC estimates.  The choice takes two steps.

    1. Models the fitted observations reject are set aside: model ``m`` is rejected when a
       model ``m'`` with MORE parameters fits them better by ``t = chi2_m - chi2_m' > 0`` with
       ``P(chi-square(k_m' - k_m) >= t) < LR_REJECT_P`` (likelihood-ratio test, Wilks'
       theorem, "The large-sample distribution of the likelihood ratio for testing composite
       hypotheses", Ann. Math. Statist. 9, 60 (1938)).  The largest model is never rejected.
    2. Among the others, the one-standard-error rule of cross-validation ("The Elements of
       Statistical Learning", 2nd ed., Springer (2009), section 7.10): with ``b`` the best
       predictor and ``se_b = sqrt(2 n + 4 max(chi2_heldout(b) - n, 0))`` the standard error
       of its held-out chi2 (noncentral chi-square with ``n`` independent held-out
       observations), the chosen model is the one with the fewest parameters among those with
       ``chi2_heldout(m) - chi2_heldout(b) <= se_b``.

    Why both (measured on simulated pipeline data, ``docs/method-models.md``): held-out fits
    are trained on part of the data, so the held-out check alone understates what the whole
    data resolve (it kept a Pauli model that missed a 0.04 rad ZZ rotation, p ~ 1e-7 on the
    fitted data); and the difference of two held-out chi2 values varies with the training
    noise of both fits, which the held-out noise alone (reported as ``heldout_gap_se``,
    ``2 ||W' A' (b_m - b_best)||``, ``W'^T W' = C'^+``) understates, so a margin of
    ``heldout_gap_se`` chose the full model for a truth inside the reduced one in 1 to 2 of
    20 experiments.  The AIC figures are still reported, and the reason says whether the
    two criteria agree.

    Parameters
    ----------
    fits : sequence of ModelFit
        At least one fit, all on the same observations and qubit count, with distinct names.
    heldout : LinearObservations, optional
        Observations from held-out sequences (same qubit count).

    Returns
    -------
    ModelComparison
        Every model's figures (:meth:`ModelComparison.table`), the chosen model, the
        criterion used and a plain-words reason.
    """
    if isinstance(fits, ModelFit) or not isinstance(fits, Sequence):
        raise TypeError(f"'fits' must be a sequence of ModelFit; got {type(fits).__name__}")
    fits = list(fits)
    if not fits:
        raise ValueError("'fits' is empty; pass at least one ModelFit")
    for i, f in enumerate(fits):
        if not isinstance(f, ModelFit):
            raise TypeError(f"'fits[{i}]' must be a ModelFit; got {type(f).__name__}")
    names = [f.name for f in fits]
    if len(set(names)) != len(names):
        raise ValueError(f"model names in 'fits' must be distinct; got {names}")
    nq = {f.n_qubits for f in fits}
    if len(nq) != 1:
        raise ValueError(f"all fits must be for the same number of qubits; got {sorted(nq)}")
    nobs = {f.n_observations for f in fits}
    if len(nobs) != 1:
        raise ValueError(f"all fits must be on the same observations; got observation counts {sorted(nobs)}")
    ho = None
    if heldout is not None:
        heldout = _check_obs(heldout, "heldout")
        if heldout.n_qubits != fits[0].n_qubits:
            raise ValueError(f"'heldout' is for {heldout.n_qubits} qubit(s) but the fits for {fits[0].n_qubits}")
        ho = _system(heldout)

    aic = np.array([f.aic for f in fits])
    delta = aic - aic.min()
    weight = np.exp(-delta / 2)
    weight = weight / weight.sum()
    k = np.array([f.n_parameters for f in fits])
    blocks = [f.unital_block.reshape(-1) for f in fits]
    if ho is not None:
        hchi = np.array([ho.chi2(b) for b in blocks])
        ibest = int(np.argmin(hchi))
        gap = hchi - hchi[ibest]
        # the held-out noise enters the difference of two chi2 values as 2 e.(u_m - u_best)
        gap_se = np.array([2.0 * float(np.linalg.norm(ho.r @ (b - blocks[ibest]))) for b in blocks])
    rej_by, rej_p = _likelihood_ratio_rejections(fits)
    scores = []
    for i, f in enumerate(fits):
        scores.append(
            ModelScore(
                name=f.name,
                n_parameters=f.n_parameters,
                n_observations=f.n_observations,
                chi2=float(f.chi2),
                dof=f.dof,
                p_value=float(scipy.stats.chi2.sf(f.chi2, f.dof)) if f.dof > 0 else None,
                aic=float(f.aic),
                delta_aic=float(delta[i]),
                aic_weight=float(weight[i]),
                heldout_chi2=float(hchi[i]) if ho is not None else None,
                heldout_gap=float(gap[i]) if ho is not None else None,
                heldout_gap_se=float(gap_se[i]) if ho is not None else None,
                heldout_n=ho.rank if ho is not None else 0,
                rejected_by=rej_by[i],
                rejected_p=rej_p[i],
            )
        )
    tie = np.flatnonzero(delta <= AIC_TIE)
    by_aic = scores[min(tie, key=lambda i: (k[i], aic[i]))]
    if ho is None:
        chosen, criterion = by_aic, SelectionCriterion.AIC
        reason = _aic_reason(chosen, scores)
    else:
        # candidates: the models the fitted observations do not reject (never empty: no model
        # has more parameters than the largest)
        cand = [i for i in range(len(fits)) if rej_by[i] is None]
        icb = min(cand, key=lambda i: hchi[i])
        threshold = _heldout_se(ho.rank, float(hchi[icb]))
        close = [i for i in cand if hchi[i] - hchi[icb] <= threshold]
        ichosen = min(close, key=lambda i: (k[i], hchi[i]))
        chosen = scores[ichosen]
        criterion = SelectionCriterion.HELDOUT
        vetoed = [scores[i] for i in range(len(fits)) if i not in cand and hchi[i] - hchi[icb] <= threshold]
        reason = _heldout_reason(chosen, scores[icb], by_aic, scores, vetoed, threshold)
    if chosen.p_value is not None and chosen.p_value < 1e-3:
        reason += (
            f" Even this model fits poorly (chi2 = {chosen.chi2:.1f} on {chosen.dof} degrees of freedom,"
            f" p = {chosen.p_value:.1e}): the error may hold terms outside every model compared,"
            " or the covariance of the observations is underestimated."
        )
    return ModelComparison(tuple(scores), chosen.name, criterion, reason, threshold if ho is not None else None)


def _heldout_se(n: int, chi2: float) -> float:
    """Standard error of a held-out chi2 with ``n`` independent observations.

    With the right covariance the whitened residuals are independent, unit-variance Gaussians
    shifted by the model's misfit, so the held-out chi2 is noncentral chi-square with ``n``
    degrees of freedom and noncentrality ``lam``: variance ``2 (n + 2 lam)`` (common practice),
    ``lam`` estimated by ``max(chi2 - n, 0)``.  Unlike the spread of the individual squared
    residuals, this does not depend on the choice of whitening basis.
    """
    return float(np.sqrt(2.0 * n + 4.0 * max(chi2 - n, 0.0)))


def _likelihood_ratio_rejections(fits: list[ModelFit]) -> tuple[list[str | None], list[float | None]]:
    """For each fit, the larger model (if any) that fits the same observations significantly better.

    ``t = chi2_m - chi2_m'`` for a model ``m'`` with ``k' > k`` parameters is, when ``m`` holds the
    truth and ``m'`` contains ``m``, approximately chi-square with ``k' - k`` degrees of freedom
    (Wilks' theorem).  Parameters held at a bound and the CPTP constraints of a given fit make the
    true law stochastically smaller, so the test is conservative.  Returns the rejecting model's
    name and the smallest p-value below ``LR_REJECT_P``, or None, per fit.
    """
    by: list[str | None] = []
    pv: list[float | None] = []
    for f in fits:
        best: tuple[float, str] | None = None
        for g in fits:
            dk = g.n_parameters - f.n_parameters
            t = f.chi2 - g.chi2
            if dk <= 0 or t <= 0:
                continue
            p = float(scipy.stats.chi2.sf(t, dk))
            if p < LR_REJECT_P and (best is None or p < best[0]):
                best = (p, g.name)
        by.append(None if best is None else best[1])
        pv.append(None if best is None else best[0])
    return by, pv


def _aic_reason(chosen: ModelScore, scores: list[ModelScore]) -> str:
    if len(scores) == 1:
        return f"'{chosen.name}' is the only model compared (AIC = chi2 + 2k = {chosen.aic:.1f})."
    lowest = min(scores, key=lambda s: s.aic)
    if lowest is not chosen:
        return (
            f"'{chosen.name}' ({chosen.n_parameters} parameters) is chosen: its AIC = chi2 + 2k ({chosen.aic:.1f})"
            f" is within {AIC_TIE:g} of the lowest, that of '{lowest.name}' ({lowest.n_parameters} parameters,"
            f" {lowest.aic:.1f}), so the data do not support the extra parameters and the simpler model is kept."
        )
    text = f"'{chosen.name}' ({chosen.n_parameters} parameters) has the lowest AIC = chi2 + 2k ({chosen.aic:.1f})."
    nxt = min((s for s in scores if s is not chosen), key=lambda s: s.aic)
    dchi = nxt.chi2 - chosen.chi2
    dk = chosen.n_parameters - nxt.n_parameters
    if dk > 0:
        text += (
            f" Its chi2 is {dchi:.1f} below that of '{nxt.name}' ({nxt.n_parameters} parameters),"
            f" more than the penalty {2 * dk} for its {dk} extra parameters"
            f" (AIC difference {nxt.delta_aic:.1f})."
        )
    elif dk < 0:
        text += (
            f" '{nxt.name}' ({nxt.n_parameters} parameters) lowers chi2 by only {-dchi:.1f},"
            f" less than the penalty {-2 * dk} for its {-dk} extra parameters."
        )
    else:
        text += f" '{nxt.name}' has as many parameters and a chi2 higher by {dchi:.1f}."
    return text


def _heldout_reason(chosen: ModelScore, best: ModelScore, by_aic: ModelScore, scores: list[ModelScore],
                    vetoed: list[ModelScore], threshold: float) -> str:
    if best is chosen:
        text = (
            f"'{chosen.name}' ({chosen.n_parameters} parameters) predicts the {chosen.heldout_n} held-out"
            f" observations best among the models the fitted data do not reject (prediction chi2"
            f" {chosen.heldout_chi2:.1f})."
        )
        others = [s for s in scores if s is not chosen and s.rejected_by is None]
        if others:
            nxt = min(others, key=lambda s: s.heldout_chi2)
            gap = nxt.heldout_chi2 - chosen.heldout_chi2
            text += (
                f" Next is '{nxt.name}' ({nxt.n_parameters} parameters) at {nxt.heldout_chi2:.1f},"
                f" {gap:.1f} worse, {'within' if gap <= threshold else 'more than'} one standard error"
                f" ({threshold:.1f})."
            )
    else:
        text = (
            f"'{chosen.name}' ({chosen.n_parameters} parameters) predicts the {chosen.heldout_n} held-out"
            f" observations within one standard error ({threshold:.1f}) of the best predictor '{best.name}'"
            f" ({best.n_parameters} parameters): prediction chi2 {chosen.heldout_chi2:.1f} against"
            f" {best.heldout_chi2:.1f}; the simpler model is kept."
        )
    for v in vetoed:
        text += (
            f" '{v.name}' ({v.n_parameters} parameters) predicts within that standard error too"
            f" ({v.heldout_chi2:.1f}), but the fitted observations reject it against '{v.rejected_by}'"
            f" (likelihood-ratio p = {v.rejected_p:.1e}), so it is not chosen."
        )
    if by_aic is chosen:
        text += " The AIC on the fitted observations agrees."
    else:
        text += f" The AIC on the fitted observations would choose '{by_aic.name}' instead; the held-out check decides."
    return text
