"""Assessment: the whole analysis of one data set and its figures of merit with intervals.

:func:`analyze` runs estimate -> fit -> reconstruct -> models and evaluates every figure of
merit on the point estimate and on each bootstrap replicate; intervals are bias-corrected
percentile intervals of the replicates (non-parametric bootstrap over sequences), except the
reference-mode fidelities, which take the identity decay's studentized (bootstrap-t) interval.
The result, a frozen :class:`Reconstruction`, saves to and loads from HDF5.
"""

from __future__ import annotations

import dataclasses as _dc
import enum
import warnings as _warnings
from collections.abc import Mapping
from dataclasses import dataclass

import h5py
import numpy as np

from robusttomo import _h5tree, _io, _pauli
from robusttomo._version import __version__
from robusttomo.channels import Channel
from robusttomo.errors import DataError
from robusttomo.estimate import BlockKind, Correlations, LengthStats, ProbeSet, compute_correlations
from robusttomo.fit import DecayResult, LinearObservations, fit_decays

__all__ = [
    "AnalysisMode",
    "ClassicInterleaved",
    "DiamondSpan",
    "Figures",
    "Interval",
    "ModelSummary",
    "Reconstruction",
]


class AnalysisMode(enum.Enum):
    """What was characterized."""

    #: The error channel ``L`` after every Clifford (target: identity).
    REFERENCE = "reference"
    #: One gate's error ``L_G`` from an interleaved run plus its reference run (target: ``G``).
    INTERLEAVED = "interleaved"


@dataclass(frozen=True)
class Interval:
    """A point estimate with its 95% interval.

    Attributes
    ----------
    value : float
        Point estimate (from the full data set).
    low, high : float
        2.5 and 97.5 percentiles of the bootstrap replicates (``nan`` without bootstrap).
    """

    value: float
    low: float
    high: float

    def contains(self, x: float) -> bool:
        """Whether ``low <= x <= high``."""
        return bool(self.low <= x <= self.high)

    def as_dict(self) -> dict[str, object]:
        """``{"value": v, "ci95": [low, high]}`` (the JSON-summary form)."""
        return {"value": self.value, "ci95": [self.low, self.high]}


@dataclass(frozen=True)
class DiamondSpan:
    """Range of the diamond distance over the CPTP channels consistent with the data.

    Attributes
    ----------
    low : float
        Minimum over the 95% region (one semidefinite program: attained).
    high : float
        Maximum over the region: a certified upper bound when ``high_is_bound``, else a value
        attained by a channel in the region.
    high_is_bound : bool
    method : str
        Plain-words description of how ``high`` was obtained.
    attained_max : float
        Largest value attained by a channel found in the region (a lower estimate of the
        maximum; ``nan`` if not computed).
    certified_max : float
        Certified upper bound on the maximum (``nan`` if not computed).
    """

    low: float
    high: float
    high_is_bound: bool
    method: str
    attained_max: float = float("nan")
    certified_max: float = float("nan")


@dataclass(frozen=True)
class Figures:
    """Figures of merit of the noisy operation against its target, each with a 95% interval.

    ``average_gate_fidelity`` and ``entanglement_fidelity`` are fidelities (1 = perfect);
    ``diamond_distance`` is ``(1/2) ||L - U||_diamond`` in [0, 1] (a worst-case error
    probability); ``unitarity`` as in "Estimating the coherence of noise", NJP 17, 113020
    (2015); ``coherent_share`` is the fraction of the infidelity due to the Hamiltonian
    (coherent) part of the error generator; ``decay_fidelity`` is the average gate fidelity
    from the identity-probe decay alone ("Scalable and robust randomized benchmarking of
    quantum processes", PRL 106, 180504 (2011)); in interleaved mode it is the classic
    interleaved estimate ``1 - (d - 1)(1 - p_int / p_ref) / d`` ("Efficient measurement of
    quantum gate error by interleaved randomized benchmarking", PRL 109, 080505 (2012)).  Rates are keyed by Pauli label (qubit 0
    leftmost).
    """

    average_gate_fidelity: Interval
    entanglement_fidelity: Interval
    diamond_distance: Interval
    diamond_distance_range: DiamondSpan
    unitarity: Interval
    coherent_share: Interval
    decay_fidelity: Interval
    pauli_error_rates: Mapping[str, Interval]
    hamiltonian: Mapping[str, Interval]
    stochastic: Mapping[str, Interval]


@dataclass(frozen=True)
class ModelSummary:
    """One model of the error channel and how well the data support it.

    Attributes
    ----------
    name : str
        Plain-words model name ("full", "coherent+stochastic", "pauli", "coherent").
    n_parameters : int
    chi2 : float
        Weighted residual sum of squares on the fitted observations.
    criterion : float
        The model-choice criterion (smaller is better; see docs/method-models.md).
    heldout_chi2 : float
        Prediction chi-square on held-out sequences (``nan`` when not computed).
    average_gate_fidelity, diamond_distance : float
        Of the model's channel against the target.
    parameters : Mapping[str, float]
        Named parameters (e.g. ``"H:ZZ"``).
    ptm : ndarray, shape (d*d, d*d)
        The model's error-channel PTM.
    """

    name: str
    n_parameters: int
    chi2: float
    criterion: float
    heldout_chi2: float
    average_gate_fidelity: float
    diamond_distance: float
    parameters: Mapping[str, float]
    ptm: np.ndarray


@dataclass(frozen=True)
class ClassicInterleaved:
    """The classic interleaved estimate of one gate's average error from two identity decays.

    ``r = (d - 1)(1 - p_int / p_ref) / d`` with the bounds of "Efficient measurement of quantum
    gate error by interleaved randomized benchmarking", PRL 109, 080505 (2012). An error, not
    a fidelity.
    """

    error: float
    low_bound: float
    high_bound: float
    reference_decay: float
    interleaved_decay: float


@dataclass(frozen=True)
class Reconstruction:
    """Everything one analysis produced.

    Attributes
    ----------
    n_qubits : int
    mode : AnalysisMode
    target_label : str
        ``"identity"`` or the interleaved gate's label.
    target_unitary : ndarray, shape (d, d), complex
        The ideal operation the figures compare against.
    error_channel : Channel
        The estimated error: ``L`` (reference mode) or ``L_G`` (interleaved mode; the noisy
        gate is ``L_G o G``).  Figures of the noisy operation against ``target_unitary`` equal
        figures of ``error_channel`` against the identity.
    figures : Figures
    models : tuple of ModelSummary
    chosen_model : str
        The model the data support (by the documented criterion).
    decays : DecayResult
        Decays of the reference run.
    interleaved_decays : DecayResult or None
        Decays of the interleaved run (composite ``L_int``), interleaved mode only.
    linear_unital_block : ndarray, shape (D, D)
        Unconstrained least-squares unital block (diagnostic).
    constraint_distance : float
        Frobenius distance between the linear and the CPTP unital blocks.
    nonunital_ranges : ndarray, shape (D, 2)
        For each non-unital PTM entry ``R[i, 0]``, ``i = 1..D``, the [min, max] over CPTP
        channels consistent with the data (the data do not fix this part).
    solver, solver_status : str
        The convex solver actually used for the point estimate and its final status.
    solver_fell_back : bool
    classic_interleaved : ClassicInterleaved or None
    warnings : tuple of str
    plan_fingerprint, counts_fingerprint : str
    options : Mapping[str, object]
        The analysis options (bootstrap, seed, control_variate, probes).
    package_version : str
    unital_block_error : float
        Bootstrap-predicted Frobenius error of the unital block: the root mean square over
        replicates of ``||B_b - B||_F`` (``nan`` without bootstrap).
    reference_channel : Channel or None
        Interleaved mode: the reference error ``L`` the gate error was isolated with.
    anchor_weight : float
        Weight of the fidelity re-anchoring mixture (positive: towards higher fidelity, the
        share of the estimate replaced by its own unitary part; negative: towards the
        depolarizing channel) that made the estimate's identity-probe decay equal
        the measured one; see ``_anchor``.  A large value means the CPTP constraints fought
        the data.
    """

    n_qubits: int
    mode: AnalysisMode
    target_label: str
    target_unitary: np.ndarray
    error_channel: Channel
    figures: Figures
    models: tuple[ModelSummary, ...]
    chosen_model: str
    decays: DecayResult
    interleaved_decays: DecayResult | None
    linear_unital_block: np.ndarray
    constraint_distance: float
    nonunital_ranges: np.ndarray
    solver: str
    solver_status: str
    solver_fell_back: bool
    classic_interleaved: ClassicInterleaved | None
    warnings: tuple[str, ...]
    plan_fingerprint: str
    counts_fingerprint: str
    options: Mapping[str, object]
    package_version: str
    unital_block_error: float = float("nan")
    anchor_weight: float = 0.0
    reference_channel: Channel | None = None

    @property
    def noisy_gate(self) -> Channel:
        """The noisy operation ``error_channel o target``."""
        return self.error_channel @ Channel.from_unitary(self.target_unitary)


# ---- the analysis ---------------------------------------------------------------------------

RESULT_SCHEMA = 1


def _interval(value: float, replicates: np.ndarray | None) -> Interval:
    """Bias-corrected percentile bootstrap interval (95%).

    With ``z0 = Phi^-1(fraction of replicates below the estimate)``, the ends are the
    ``Phi(2 z0 -+ 1.96)`` quantiles of the replicates ("Nonparametric standard errors and
    confidence intervals", Canadian Journal of Statistics 9, 139 (1981)).  The correction
    matters for figures that noise biases, such as the diamond distance (noise in the unital
    block moves the estimate away from the identity); ``z0 = 0`` gives the plain percentile
    interval.
    """
    import scipy.stats

    if replicates is None or len(replicates) == 0 or not np.isfinite(value):
        return Interval(float(value), float("nan"), float("nan"))
    v = np.asarray(replicates, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 2:
        return Interval(float(value), float("nan"), float("nan"))
    frac = (np.sum(v < value) + 0.5 * np.sum(v == value)) / v.size
    frac = float(np.clip(frac, 1.0 / (v.size + 1), v.size / (v.size + 1)))
    z0 = scipy.stats.norm.ppf(frac)
    z = scipy.stats.norm.ppf(0.975)
    lo, hi = np.quantile(v, scipy.stats.norm.cdf([2 * z0 - z, 2 * z0 + z]))
    return Interval(float(value), float(lo), float(hi))


def _subset(corr: Correlations, parity: int) -> Correlations:
    """Every other sequence (by position within each length): a split for held-out checks."""
    stats = []
    for s in corr.stats:
        pick = np.arange(parity, s.values.shape[0], 2)
        stats.append(LengthStats(s.length, s.probes, s.values[pick], s.ideal[pick], s.mu, s.shots[pick]))
    m2 = [None if a is None else a[parity::2] for a in (corr.m2_u, corr.m2_v, corr.m2_u_ideal)]
    return _dc.replace(corr, stats=tuple(stats), m2_u=m2[0], m2_v=m2[1], m2_u_ideal=m2[2])


def _channel_figures(ch: Channel, *, diamond: bool = True) -> dict[str, object]:
    """Every figure of merit of an error channel against the identity."""
    from robusttomo import metrics
    from robusttomo.generators import rates_from_channel

    out: dict[str, object] = {
        "agf": metrics.average_gate_fidelity(ch),
        "ef": metrics.entanglement_fidelity(ch),
        "unitarity": metrics.unitarity(ch),
        "pauli": metrics.pauli_error_rates(ch),
    }
    try:
        gen = rates_from_channel(ch)
        out["ham"], out["sto"] = gen.hamiltonian, gen.stochastic
        out["coh"] = metrics.coherent_share(ch)
    except ValueError:  # no real logarithm: far from the identity
        labels = _pauli.pauli_labels(ch.n_qubits)[1:]
        out["ham"] = {k: float("nan") for k in labels}
        out["sto"] = {k: float("nan") for k in labels}
        out["coh"] = float("nan")
    out["dd"] = metrics.diamond_distance_details(ch).value if diamond else float("nan")
    return out


def _classic_interleaved(ref, inter, n: int) -> ClassicInterleaved:
    """Classic interleaved estimate with the bounds of PRL 109, 080505 (2012)."""
    d = 2**n
    p_ref, p_int = ref.identity_decay, inter.identity_decay
    r = (d - 1) * (1 - p_int / p_ref) / d
    e1 = (d - 1) * (abs(p_ref - p_int / p_ref) + (1 - p_ref)) / d
    e2 = (2 * (d * d - 1) * (1 - p_ref) / (p_ref * d * d)
          + 4 * np.sqrt(max(1 - p_ref, 0.0)) * np.sqrt(d * d - 1) / p_ref)
    e = min(e1, e2)
    return ClassicInterleaved(float(r), float(r - e), float(r + e), float(p_ref), float(p_int))


def _closest_unitary(ch: Channel) -> Channel:
    """The unitary channel of the polar part of the estimate's dominant Kraus operator.

    ``K`` from the largest Choi eigenvector (:meth:`Channel.kraus` convention), ``U = W V^dagger``
    from its singular value decomposition ``K = W S V^dagger``: the unitary closest to ``K`` in
    Frobenius norm (common practice: the orthogonal Procrustes solution), i.e. the coherent part
    of the estimate's error.
    """
    d = ch.dim
    _, v = np.linalg.eigh(ch.choi)
    k = v[:, -1].reshape(d, d).T
    w, _, vh = np.linalg.svd(k)
    return Channel.from_unitary(w @ vh)


def _anchor(ch: Channel, functional: np.ndarray, target: float) -> tuple[Channel, float]:
    """Re-anchor the fidelity direction of a CPTP estimate to a precisely measured decay.

    The CPTP constraints bias a noisy fit towards lower fidelity (lifting negative Choi
    eigenvalues takes weight from the dominant one), while the identity-probe decay, pinned by
    the long sequences, is unbiased and far more precise.  The estimate is therefore mixed with
    a CPTP channel ``A`` so that ``functional . vec(B) = target``:

        L' = (1 - a) L + a A,   0 <= a <= 1.

    To raise the fidelity, ``A`` is the estimate's own coherent part, the unitary channel
    :func:`_closest_unitary`: the excess error the constraints added is incoherent, and mixing
    with ``U`` removes it while keeping the estimate's rotation (mixing with the identity
    instead would shrink the coherent error by ``1 - a`` too; measured on two-qubit data at the
    default plan, it lowered the diamond distance by about a tenth of its value, on top of the
    fit's own shrinkage).  If even ``U`` is below the target, ``U`` is then mixed with the
    identity.  To lower the fidelity, ``A`` is the completely depolarizing channel.  A convex
    combination of CPTP maps is CPTP.  Returns the mixed channel and the signed weight
    (positive: towards higher fidelity, the share of the estimate replaced; negative: towards
    the depolarizing channel).
    """
    d2 = ch.ptm.shape[0]
    f_now = float(functional @ ch.unital_block.reshape(-1))
    f_id = float(functional @ np.eye(d2 - 1).reshape(-1))
    if target > f_now and f_id > f_now:
        u = _closest_unitary(ch)
        f_u = float(functional @ u.unital_block.reshape(-1))
        if f_u > f_now and target <= f_u:
            a = (target - f_now) / (f_u - f_now)
            return Channel.from_ptm((1 - a) * ch.ptm + a * u.ptm), float(a)
        if f_u > f_now and f_id > f_u:  # all the way to U, then towards the identity
            b = min((target - f_u) / (f_id - f_u), 1.0)
            return Channel.from_ptm((1 - b) * u.ptm + b * np.eye(d2)), 1.0
        a = min((target - f_now) / (f_id - f_now), 1.0)
        return Channel.from_ptm((1 - a) * ch.ptm + a * np.eye(d2)), float(a)
    if target < f_now and f_now > 0:
        a = min((f_now - target) / f_now, 1.0)  # the depolarizing block is 0
        anchor = np.zeros((d2, d2))
        anchor[0, 0] = 1.0
        return Channel.from_ptm((1 - a) * ch.ptm + a * anchor), -float(a)
    return ch, 0.0


def _gate_frame_values(comp: LinearObservations, ref_b: Channel, ref: Channel, gate: np.ndarray,
                       values: np.ndarray) -> np.ndarray:
    """Move a replicate's composite values into the point estimate's frame.

    The gate-error fit with reference ``L`` has design ``A (I kron K^T)`` on ``vec(B_G)``,
    ``K = B(G L G^dagger)`` (unital blocks compose exactly).  A replicate comes with its own
    reference ``L_b``; its implied composite ``B_int = unvec(A^+ y_b)`` gives
    ``B_G = B_int K_b^{-1}``, whose values under the point design are
    ``A vec(B_int K_b^{-1} K)``.  For a full probe basis (square, invertible ``A``) fitting these
    with the point problem is exactly the replicate's own fit, without rebuilding the problem.
    """
    d2 = comp.design.shape[1]
    dd = int(round(np.sqrt(d2)))
    rg = _pauli.ptm_of_unitary(gate)
    k_b = (rg @ ref_b.ptm @ rg.T)[1:, 1:]
    k = (rg @ ref.ptm @ rg.T)[1:, 1:]
    b_int = (np.linalg.pinv(comp.design) @ values).reshape(dd, dd)
    return comp.design @ (b_int @ np.linalg.solve(k_b.T, k.T).T).reshape(-1)


def analyze(plan: object, counts: object, *, target: object = None, reference: tuple | None = None,
            bootstrap: int = 200, seed: int | None = None, probes: ProbeSet | None = None,
            control_variate: bool = True, models: bool = True, ranges: bool = True,
            diamond: bool = True, jobs: int = 1,
            solver: str = "SCS", progress: object = None, refits: bool = True) -> Reconstruction:
    """Reconstruct the error channel and its figures of merit with 95% intervals.

    Reference mode (a plan without an interleaved gate): the error channel ``L`` after every
    Clifford.  Interleaved mode (a plan with an interleaved gate): ``L`` from the reference
    sequences (held in the same plan, or given as ``reference=(plan, counts)``), the composite
    ``L_int`` from the interleaved ones, and the gate's own error ``L_G`` by a convex fit with
    ``L`` fixed; figures compare the noisy gate ``L_G o G`` with ``G``.

    Intervals: bootstrap over sequences (resampled within each length, every replicate
    re-fits the control variate, re-estimates the weights of the decay fit, re-fits the decays
    and the CPTP channel; in interleaved mode reference and interleaved runs are resampled
    together so the uncertainty of ``L`` propagates into ``L_G``).  Bias-corrected percentile
    intervals of the replicates; in reference mode the average-gate and entanglement fidelities
    and ``decay_fidelity`` take the studentized interval of the identity decay they are affine
    maps of (:meth:`robusttomo.fit.DecayResult.identity_decay_interval`).

    The result does not depend on ``jobs``: every part of the analysis (each range family,
    each group of bootstrap replicates, the models) starts its solvers from a fixed state, and
    replicate ``i`` depends only on ``seed`` and ``i`` (docs/method-analysis.md, "Parallel
    parts").

    Parameters
    ----------
    plan : robusttomo.plan.Plan
    counts : robusttomo.counts.Counts
        Must carry the plan's fingerprint.
    target : None or ndarray (d, d)
        Target unitary of the figures; default identity (reference mode) or the plan's
        interleaved gate.
    reference : tuple (Plan, Counts), optional
        A separate reference run for an interleaved plan without reference sequences.
    bootstrap : int, default 200
        Bootstrap replicates (0: no intervals).
    seed : int, optional
        Seed of the bootstrap.
    probes : ProbeSet, optional
        Default: :func:`robusttomo.estimate.default_probes`.
    control_variate : bool, default True
    models : bool, default True
        Fit and compare the reduced models.
    ranges : bool, default True
        Compute the non-unital and diamond-distance ranges (semidefinite programs).
    diamond : bool, default True
        Compute the diamond distance (one semidefinite program per bootstrap replicate);
        ``False`` reports it as NaN, for fast studies of the other figures.
    refits : bool, default True
        Re-fit the CPTP channel in every bootstrap replicate.  ``False`` keeps only the decay
        bootstrap (cheap): in reference mode the fidelities and ``decay_fidelity`` still get
        their (studentized) intervals, every other figure's interval is NaN; in interleaved
        mode only ``decay_fidelity``.  For large problems (three qubits) or fidelity-only use.
    jobs : int, default 1
        Worker processes for the convex stages after the point fit (range programs, groups of
        bootstrap re-fits, models), which run in parallel when ``jobs > 1``.  The default is 1
        because analyses are themselves the work units of ``robusttomo batch`` (local pool or
        Dask workers), where nested process pools would oversubscribe the cores; pass the
        number of free cores for a single interactive analysis.
    solver : {"SCS", "CLARABEL"}
        First convex solver (the other is the fallback).
    progress : callable, optional
        ``progress(stage: str, done: int, total: int)`` for progress display.

    Returns
    -------
    Reconstruction

    Examples
    --------
    >>> import robusttomo as rt
    >>> from robusttomo.channels import depolarizing
    >>> plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4], sequences=60, shots=200, seed=1)
    >>> dev = rt.Device.build(1, error=depolarizing(1, 0.98), readout=[(0.02, 0.03)])
    >>> rec = rt.analyze(plan, rt.simulate(plan, dev, seed=2), bootstrap=20, seed=3)
    >>> bool(rec.figures.average_gate_fidelity.value > 0.97)
    True
    """
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs < 1:
        raise ValueError(f"'jobs' must be a positive integer; got {jobs!r}")
    if not isinstance(refits, (bool, np.bool_)):
        raise TypeError(f"'refits' must be True or False; got {refits!r}")

    def tick(stage: str, done: int, total: int) -> None:
        if progress is not None:
            progress(stage, done, total)  # type: ignore[operator]

    prep = _prepare_analysis(plan, counts, target=target, reference=reference, bootstrap=bootstrap, seed=seed,
                             probes=probes, control_variate=control_variate, models=models, ranges=ranges,
                             diamond=diamond, solver=solver, tick=tick)
    if not refits:
        prep = _dc.replace(prep, refits=False)
    try:
        if jobs == 1:
            results = _run_parts_here(prep, _analysis_parts(prep, groups=1), tick)
        else:
            results = _run_parts_pool(prep, _analysis_parts(prep, groups=_GROUPS_PER_JOB * int(jobs)), int(jobs),
                                      tick)
    finally:
        _forget_fitters(prep)
    return _assemble_analysis(prep, results)


# ---- the analysis in parts ----------------------------------------------------------------------
#
# analyze() = _prepare_analysis (serial: correlations, decays with their bootstrap, point fit)
#           -> parts (independent of each other, any order, any process)
#           -> _assemble_analysis.
# A part is a tuple of plain values: ("ranges", "joint"), ("ranges", "profile"), ("point",),
# ("models",) or ("replicates", start, stop); _run_part(prep, part) returns a plain dict.
# Each part starts every solver from a fixed state (fresh range programs; the point fit's SCS
# solution for every replicate), so the assembled result is the same however the parts are
# distributed (robusttomo.batch sends them to Dask workers).


#: Groups of bootstrap replicates per worker process in analyze(jobs > 1): enough to balance
#: the load against the two long range parts, few enough that each group is seconds of work.
_GROUPS_PER_JOB = 4
#: Fitters of the observations seen in this process, reused by replicate groups (keyed by a
#: digest of the observations and the solver); a handful is enough.
_FITTERS: dict[str, object] = {}
_FITTERS_MAX = 4


@dataclass(frozen=True)
class _Prepared:
    """Output of the serial stages: everything the parts need (plain data, picklable).

    ``ref_state`` / ``main_state`` are the SCS starting points after the point fits
    (``CptpFitter._solver_state``); every bootstrap replicate starts from them.
    """

    n_qubits: int
    interleaved: bool
    label: str
    gate: np.ndarray
    inter_gate: np.ndarray | None
    solver: str
    bootstrap: int
    seed: int | None
    control_variate: bool
    models: bool
    ranges: bool
    diamond: bool
    corr_ref: Correlations
    corr_int: Correlations | None
    dec_ref: DecayResult
    dec_int: DecayResult | None
    obs_ref: LinearObservations
    obs_int: LinearObservations | None
    obs_main: LinearObservations
    fit_ref: object
    fit_main: object
    error_channel: Channel
    anchor_weight: float
    warnings: tuple[str, ...]
    ref_state: dict
    main_state: dict
    plan_fingerprint: str
    counts_fingerprint: str
    refits: bool = True  # False: the decay bootstrap only, no CPTP re-fit per replicate

    @property
    def replicate_diamond(self) -> bool:
        """Whether each replicate needs its diamond distance (only without the profile interval)."""
        return self.diamond and not self.ranges

    @property
    def dec_main(self) -> DecayResult:
        return self.dec_int if self.interleaved else self.dec_ref  # type: ignore[return-value]


def _obs_key(obs: LinearObservations, solver: str) -> str:
    import hashlib

    h = hashlib.sha256(solver.encode())
    for arr in (obs.design, obs.covariance, obs.values):
        a = np.ascontiguousarray(arr, dtype=float)
        h.update(str(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _fitter_for(obs: LinearObservations, solver: str, fitter: object = None) -> object:
    """The cached fitter of ``obs`` in this process (built on first use; ``fitter`` seeds it)."""
    from robusttomo import reconstruct as rc

    key = _obs_key(obs, solver)
    if key not in _FITTERS:
        while len(_FITTERS) >= _FITTERS_MAX:
            _FITTERS.pop(next(iter(_FITTERS)))
        _FITTERS[key] = fitter if fitter is not None else rc.CptpFitter(obs, solver=solver)
    return _FITTERS[key]


def _forget_fitters(prep: _Prepared) -> None:
    for obs in {id(o): o for o in (prep.obs_ref, prep.obs_main)}.values():
        _FITTERS.pop(_obs_key(obs, prep.solver), None)


def _functional(n_qubits: int, inter_gate: np.ndarray | None, ref_channel: Channel) -> np.ndarray:
    """Linear functional of ``vec(B)`` equal to the identity probe's decay (see ``_anchor``).

    Reference mode (``inter_gate`` None): ``tr(B) / (d*d - 1)``; interleaved mode:
    ``lambda_int(identity) = tr(B_G K) / (d*d - 1)``, ``K = B(G L G^dagger)``.
    """
    d2m1 = 4**n_qubits - 1
    if inter_gate is None:
        return np.eye(d2m1).reshape(-1) / d2m1
    rg = _pauli.ptm_of_unitary(inter_gate)
    k = (rg @ ref_channel.ptm @ rg.T)[1:, 1:]
    return k.T.reshape(-1) / d2m1  # lambda_int(identity) = tr(B_G K) / (d*d - 1)


def _prepare_analysis(plan: object, counts: object, *, target: object, reference: tuple | None, bootstrap: int,
                      seed: int | None, probes: ProbeSet | None, control_variate: bool, models: bool, ranges: bool,
                      diamond: bool, solver: str, tick) -> _Prepared:
    """Validate the inputs and run the serial stages: correlations, decays, point fit, anchoring."""
    from robusttomo import reconstruct as rc
    from robusttomo.plan import SequenceKind

    if isinstance(bootstrap, bool) or not isinstance(bootstrap, (int, np.integer)) or bootstrap < 0:
        raise ValueError(f"'bootstrap' must be a non-negative integer; got {bootstrap!r}")
    fp = getattr(counts, "plan_fingerprint", None)
    if fp != getattr(plan, "fingerprint", None):
        raise DataError(f"counts ({getattr(counts, 'source', '?')}): field 'plan_fingerprint' {fp!r} does not match "
                        "the plan's fingerprint; analyze the counts with the plan they were taken for")
    n = plan.n_qubits  # type: ignore[attr-defined]
    d = 2**n
    interleaved = plan.interleave is not None and any(  # type: ignore[attr-defined]
        b.kind is SequenceKind.INTERLEAVED for b in plan.blocks)  # type: ignore[attr-defined]
    warn: list[str] = []
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        tick("correlations", 0, 1)
        inter_gate = None
        if interleaved:
            ref_plan, ref_counts = (plan, counts) if reference is None else reference
            corr_ref = compute_correlations(ref_plan, ref_counts, probes=probes, kind=BlockKind.REFERENCE)
            corr_int = compute_correlations(plan, counts, probes=corr_ref.probes, kind=BlockKind.INTERLEAVED)
            inter_gate = np.asarray(plan.interleave.unitary, dtype=complex)  # type: ignore[attr-defined]
            gate = inter_gate
            label = str(plan.interleave.label)  # type: ignore[attr-defined]
        else:
            corr_ref = compute_correlations(plan, counts, probes=probes, kind=BlockKind.REFERENCE)
            corr_int = None
            gate = np.eye(d, dtype=complex)
            label = "identity"
        if target is not None:
            gate = _validated_unitary(target, d)
            label = "user target"
        tick("correlations", 1, 1)
        tick("decay fit", 0, 1)
        # the decay bootstrap is a small part of the cost; in-process it avoids a pool start-up
        # (replicate i depends only on the seed and i either way)
        dec_ref = fit_decays(corr_ref, control_variate=control_variate, bootstrap=bootstrap, seed=seed)
        dec_int = (None if corr_int is None else
                   fit_decays(corr_int, control_variate=control_variate, bootstrap=bootstrap, seed=seed))
        tick("decay fit", 1, 1)
        warn += [f"reference run: {w}" if interleaved else w for w in dec_ref.warnings]
        if dec_int is not None:
            warn += [f"interleaved run: {w}" for w in dec_int.warnings]

        obs_ref = dec_ref.observations()
        tick("convex fit", 0, 1)
        fitter = rc.CptpFitter(obs_ref, solver=solver)
        fit_ref = fitter.fit()
        if interleaved:
            obs_int = dec_int.observations()  # type: ignore[union-attr]
            # the same program isolate_gate_error solves, kept for the replicates' warm start
            obs_main = rc.gate_error_observations(obs_int, fit_ref.channel, inter_gate)
            main_fitter = rc.CptpFitter(obs_main, solver=solver)
            fit_main = main_fitter.fit()
        else:
            obs_int = None
            fit_main, obs_main, main_fitter = fit_ref, obs_ref, fitter
        _fitter_for(obs_ref, solver, fitter)
        _fitter_for(obs_main, solver, main_fitter)
        dec_main = dec_int if interleaved else dec_ref
        ident = dec_ref._ident()
        err, anchor_weight = _anchor(fit_main.channel, _functional(n, inter_gate, fit_ref.channel),
                                     float(dec_main.lambdas[ident]))  # type: ignore[union-attr]
        tick("convex fit", 1, 1)
        if fit_main.status is not rc.FitStatus.CERTIFIED:
            warn.append(f"the convex solver did not certify its solution ({fit_main.message}); "
                        "treat the channel as approximate")
        if fit_main.fell_back:
            warn.append(f"the first convex solver failed and {fit_main.solver} was used instead")
    return _Prepared(
        n_qubits=n, interleaved=interleaved, label=label, gate=np.asarray(gate, dtype=complex), inter_gate=inter_gate,
        solver=str(solver), bootstrap=int(bootstrap), seed=seed, control_variate=bool(control_variate),
        models=bool(models), ranges=bool(ranges), diamond=bool(diamond), corr_ref=corr_ref, corr_int=corr_int,
        dec_ref=dec_ref, dec_int=dec_int, obs_ref=obs_ref, obs_int=obs_int, obs_main=obs_main, fit_ref=fit_ref,
        fit_main=fit_main, error_channel=err, anchor_weight=float(anchor_weight), warnings=tuple(warn),
        ref_state=fitter._solver_state(), main_state=main_fitter._solver_state(),
        plan_fingerprint=str(plan.fingerprint), counts_fingerprint=str(counts.fingerprint),  # type: ignore[attr-defined]
    )


def _group_bounds(total: int, groups: int) -> list[tuple[int, int]]:
    """``groups`` contiguous ``[start, stop)`` ranges covering ``0..total`` (empty ones dropped)."""
    edges = np.linspace(0, total, max(1, min(int(groups), total)) + 1).round().astype(int) if total else [0]
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def _parts_for(*, bootstrap: int, models: bool, ranges: bool, diamond: bool, groups: int) -> list[tuple]:
    """The independent parts of an analysis with these options, longest first.

    ``("ranges", "profile")`` (with ranges and diamond), ``("ranges", "joint")`` (with ranges),
    ``("point",)``, ``("models",)`` (with models) and ``("replicates", start, stop)`` for the
    bootstrap replicates in ``groups`` contiguous groups.
    """
    parts: list[tuple] = []
    if ranges:
        if diamond:
            parts.append(("ranges", "profile"))
        parts.append(("ranges", "joint"))
    parts.append(("point",))
    if models:
        parts.append(("models",))
    parts += [("replicates", a, b) for a, b in _group_bounds(int(bootstrap), groups)]
    return parts


def _analysis_parts(prep: _Prepared, *, groups: int) -> list[tuple]:
    """:func:`_parts_for` with the options of a prepared analysis."""
    return _parts_for(bootstrap=prep.bootstrap if prep.refits else 0, models=prep.models, ranges=prep.ranges, diamond=prep.diamond,
                      groups=groups)


def _replicate_group(prep: _Prepared, start: int, stop: int, *, tick=None) -> dict[str, np.ndarray]:
    """Bootstrap replicates ``start .. stop - 1`` of one analysis, as plain arrays.

    Replicate ``i`` uses the decay bootstrap's replicate ``i`` (its resampling depends only on
    the seed and ``i``), re-fits the CPTP channel starting the solver from the point fit's
    solution (``_Prepared.ref_state``, ``main_state``), re-anchors it and evaluates every figure.
    So any split of ``0 .. bootstrap - 1`` into groups, computed in any processes, gives
    bit-identical replicates; :func:`_merge_replicate_groups` puts them back together.

    Returns
    -------
    dict of str to ndarray
        ``"index"`` (k,) int64: the replicate numbers; ``"agf"``, ``"ef"``, ``"unitarity"``,
        ``"coh"``, ``"dd"`` (k,) float (``dd`` NaN unless the replicates need it);
        ``"pauli"`` (k, d*d) in the order of ``pauli_labels(n)``; ``"ham"``, ``"sto"``
        (k, d*d - 1) in the order of ``pauli_labels(n)[1:]``; ``"block"`` (k, D, D) the
        anchored replicates' unital blocks.  ``k = stop - start``.
    """
    if isinstance(start, bool) or isinstance(stop, bool) or not 0 <= int(start) < int(stop) <= prep.bootstrap:
        raise ValueError(f"replicate group [{start}, {stop}) must lie within [0, {prep.bootstrap}) and be non-empty")
    start, stop = int(start), int(stop)
    dd_reps = prep.replicate_diamond
    ident = prep.dec_ref._ident()
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        fitter = _fitter_for(prep.obs_ref, prep.solver)
        fitter._restore_solver_state(prep.ref_state)  # type: ignore[attr-defined]
        # the reference replicates' non-unital part is needed only when they are the answer
        ref_b = fitter.fit_replicates(prep.dec_ref.bootstrap_lambdas[start:stop],  # type: ignore[attr-defined,index]
                                      nonunital_rule=dd_reps and not prep.interleaved)
        fits_b = ref_b
        if prep.interleaved:
            int_vals = prep.dec_int.bootstrap_lambdas[start:stop]  # type: ignore[union-attr,index]
            moved = np.array([_gate_frame_values(prep.obs_int, fb.channel, prep.fit_ref.channel,  # type: ignore[arg-type,attr-defined]
                                                 prep.inter_gate, v) for fb, v in zip(ref_b, int_vals)])
            main = _fitter_for(prep.obs_main, prep.solver)
            main._restore_solver_state(prep.main_state)  # type: ignore[attr-defined]
            fits_b = main.fit_replicates(moved, nonunital_rule=dd_reps)  # type: ignore[attr-defined]
        labels = _pauli.pauli_labels(prep.n_qubits)
        rows = []
        for j, fb in enumerate(fits_b):
            target_b = float(prep.dec_main.bootstrap_lambdas[start + j, ident])  # type: ignore[index]
            ch_b, _ = _anchor(fb.channel, _functional(prep.n_qubits, prep.inter_gate, ref_b[j].channel), target_b)
            rows.append((_channel_figures(ch_b, diamond=dd_reps), ch_b.unital_block))
            if tick is not None:
                tick(j + 1, stop - start)
    out: dict[str, np.ndarray] = {"index": np.arange(start, stop, dtype=np.int64)}
    for key in ("agf", "ef", "unitarity", "coh", "dd"):
        out[key] = np.array([r[key] for r, _ in rows], dtype=float)
    out["pauli"] = np.array([[r["pauli"][k] for k in labels] for r, _ in rows], dtype=float)  # type: ignore[index]
    for key in ("ham", "sto"):
        out[key] = np.array([[r[key][k] for k in labels[1:]] for r, _ in rows], dtype=float)  # type: ignore[index]
    out["block"] = np.array([b for _, b in rows], dtype=float)
    return out


def _merge_replicate_groups(groups: list[dict[str, np.ndarray]], total: int) -> dict[str, np.ndarray]:
    """Concatenate replicate groups in replicate order; they must cover ``0 .. total - 1`` once."""
    ordered = sorted(groups, key=lambda g: int(g["index"][0]) if g["index"].size else -1)
    index = np.concatenate([g["index"] for g in ordered]) if ordered else np.zeros(0, dtype=np.int64)
    if index.shape != (total,) or not np.array_equal(index, np.arange(total)):
        raise ValueError(f"replicate groups must cover replicates 0..{total - 1} exactly once; "
                         f"got {index.size} replicate(s)")
    return {key: np.concatenate([g[key] for g in ordered]) for key in ordered[0]} if ordered else {}


def _range_part(prep: _Prepared, which: str, tick=None) -> dict[str, object]:
    """The ranges over one region, from a freshly built fitter (so from a fixed solver state).

    ``"joint"``: non-unital ranges and the diamond-distance span over the joint 95% region;
    ``"profile"``: the diamond distance's profile interval (region ``chi2 + 3.84``).
    """
    from robusttomo import reconstruct as rc

    def step(k: int) -> None:
        if tick is not None:
            tick(k)

    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        fitter = rc.CptpFitter(prep.obs_main, solver=prep.solver)
        fit = prep.fit_main
        if which == "joint":
            nu = fitter.nonunital_range(fit, region=rc.Region.JOINT)  # type: ignore[arg-type]
            step(1)
            out: dict[str, object] = {"nonunital": np.column_stack([nu.minimum, nu.maximum])}
            if prep.diamond:
                dr = fitter.diamond_range(fit, nonunital=nu, region=rc.Region.JOINT,  # type: ignore[arg-type]
                                          ascent_starts=1, ascent_steps=1)
                out["span"] = DiamondSpan(float(dr.minimum), float(dr.maximum), bool(dr.max_is_bound), dr.method,
                                          float(dr.maximum_attained), float(dr.maximum_certified))
            step(2)
            return out
        if which == "profile":
            nu_p = fitter.nonunital_range(fit, region=rc.Region.PROFILE)  # type: ignore[arg-type]
            step(1)
            dp = fitter.diamond_range(fit, nonunital=nu_p, region=rc.Region.PROFILE,  # type: ignore[arg-type]
                                      maximum_rule=rc.MaximumRule.ATTAINED, ascent_starts=2, ascent_steps=2)
            step(2)
            return {"dd_profile": (float(dp.minimum), float(dp.maximum_attained))}
    raise ValueError(f"range part must be 'joint' or 'profile'; got {which!r}")


def _run_part(prep: _Prepared, part: tuple, tick=None) -> dict[str, object]:
    """Run one part (see ``_analysis_parts``); ``tick(done, total)`` reports progress within it."""
    kind = part[0]
    if kind == "ranges":
        from robusttomo import reconstruct as rc

        try:
            return {"part": part, **_range_part(prep, part[1], None if tick is None else (lambda k: tick(k, 2)))}
        except rc.SolverError as exc:
            # never a silent wrong number: the range is reported as not computed, with the reason
            return {"part": part, "failed": str(exc)}
    if kind == "replicates":
        return {"part": part, "arrays": _replicate_group(prep, part[1], part[2], tick=tick)}
    if kind == "point":
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore", RuntimeWarning)
            return {"part": part, "figures": _channel_figures(prep.error_channel, diamond=prep.diamond)}
    if kind == "models":
        from robusttomo import models as mdl
        from robusttomo import reconstruct as rc

        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore", RuntimeWarning)
            summaries, chosen, mwarn = _model_summaries(
                mdl, rc, prep.fit_main, prep.obs_main, prep.corr_ref, prep.corr_int, prep.control_variate,
                prep.interleaved, prep.inter_gate, prep.solver)
        return {"part": part, "summaries": tuple(summaries), "chosen": chosen, "warnings": tuple(mwarn)}
    raise ValueError(f"unknown analysis part {part!r}")


def _run_parts_here(prep: _Prepared, parts: list[tuple], tick) -> list[dict[str, object]]:
    """Run the parts in this process, in the order (and with the progress) of a serial analysis."""
    order = {"ranges": 0, "point": 1, "replicates": 2, "models": 3}
    todo = sorted(parts, key=lambda p: (order[p[0]], p[1] != "joint" if p[0] == "ranges" else 0))
    results = []
    n_ranges = 2 * sum(p[0] == "ranges" for p in parts)
    done_ranges = 0
    if n_ranges:
        tick("ranges", 0, n_ranges)
    for part in todo:
        if part[0] == "ranges":
            base = done_ranges
            results.append(_run_part(prep, part, lambda k, t, base=base: tick("ranges", base + k, n_ranges)))
            done_ranges += 2
        elif part[0] == "replicates":
            start = part[1]
            results.append(_run_part(prep, part, lambda k, t, start=start: tick("bootstrap", start + k,
                                                                                prep.bootstrap)))
        elif part[0] == "models":
            tick("models", 0, 1)
            results.append(_run_part(prep, part))
            tick("models", 1, 1)
        else:
            results.append(_run_part(prep, part))
    return results


_POOL_PREP: _Prepared | None = None


def _pool_init(prep: _Prepared) -> None:
    # a forked worker also inherits the parent's cached fitters; _fitter_for finds them by digest
    global _POOL_PREP
    _POOL_PREP = prep


def _pool_part(part: tuple) -> dict[str, object]:
    if _POOL_PREP is None:
        raise RuntimeError("analysis worker started without its prepared analysis")
    return _run_part(_POOL_PREP, part)


def _single_threaded() -> bool:
    """Whether this process has exactly one (native) thread (Linux; False when unknown)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Threads:"):
                    return int(line.split()[1]) == 1
    except (OSError, ValueError):
        pass
    return False


def _pool_context():
    """Start method of the analysis workers.

    ``fork`` (no start-up cost; the prepared analysis and the compiled programs are shared)
    only while this process has a single thread: a solver's thread pool (Clarabel's, OpenBLAS
    without ``OPENBLAS_NUM_THREADS=1``, a notebook kernel's threads) does not survive a fork, and
    a worker waiting on it hangs (seen).  Otherwise ``forkserver`` with the analysis modules
    preloaded (about 1.6 s once per process), or ``spawn``.
    """
    import multiprocessing

    methods = multiprocessing.get_all_start_methods()
    if "fork" in methods and _single_threaded():
        return multiprocessing.get_context("fork")
    if "forkserver" in methods:
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["robusttomo.assess", "robusttomo.reconstruct", "robusttomo.models",
                                    "robusttomo.metrics"])
        return ctx
    return multiprocessing.get_context("spawn")


def _run_parts_pool(prep: _Prepared, parts: list[tuple], jobs: int, tick) -> list[dict[str, object]]:
    """Run the parts on ``jobs`` local worker processes, longest first; progress as they finish."""
    from concurrent.futures import ProcessPoolExecutor, as_completed

    ctx = _pool_context()
    n_ranges = sum(p[0] == "ranges" for p in parts)
    done = {"ranges": 0, "bootstrap": 0}
    if n_ranges:
        tick("ranges", 0, 2 * n_ranges)
    results = []
    with ProcessPoolExecutor(max_workers=min(jobs, len(parts)), mp_context=ctx, initializer=_pool_init,
                             initargs=(prep,)) as pool:
        futures = [pool.submit(_pool_part, p) for p in parts]
        for fut in as_completed(futures):
            r = fut.result()
            results.append(r)
            part = r["part"]
            if part[0] == "ranges":
                done["ranges"] += 2
                tick("ranges", done["ranges"], 2 * n_ranges)
            elif part[0] == "replicates":
                done["bootstrap"] += part[2] - part[1]
                tick("bootstrap", done["bootstrap"], prep.bootstrap)
            elif part[0] == "models":
                tick("models", 1, 1)
    return results


def _assemble_analysis(prep: _Prepared, results: list[dict[str, object]]) -> Reconstruction:
    """The Reconstruction from the prepared analysis and the results of all its parts."""
    by_kind: dict[str, list[dict[str, object]]] = {}
    for r in results:
        by_kind.setdefault(r["part"][0], []).append(r)  # type: ignore[index]
    n = prep.n_qubits
    d = 2**n
    d2m1 = d * d - 1
    err = prep.error_channel
    warn = list(prep.warnings)
    ranges = {r["part"][1]: r for r in by_kind.get("ranges", [])}  # type: ignore[index]
    dd_profile: tuple[float, float] | None = None
    if prep.ranges:
        joint, profile = ranges["joint"], ranges.get("profile", {})
        for which, r in (("ranges over the joint region", joint), ("diamond-distance profile interval (the diamond distance's 95% interval)", profile)):
            if "failed" in r:
                warn.append(f"{which} not computed: {r['failed']}; usually too few sequences for the "
                            "decays' covariance (add sequences at every length)")
        nu_arr = np.full((d2m1, 2), np.nan) if "failed" in joint else np.asarray(joint["nonunital"])
        if not prep.diamond:
            span = DiamondSpan(float("nan"), float("nan"), True, "not computed (diamond=False)")
        elif "failed" in joint:
            span = DiamondSpan(float("nan"), float("nan"), True, "not computed (solver failure, see warnings)")
        else:
            span = joint["span"]
        if prep.diamond and "failed" not in profile:
            dd_profile = profile["dd_profile"]  # type: ignore[assignment]
    else:
        nu_arr = np.full((d2m1, 2), np.nan)
        span = DiamondSpan(float("nan"), float("nan"), True, "not computed (ranges=False)")
    point = by_kind["point"][0]["figures"]
    reps = (_merge_replicate_groups([r["arrays"] for r in by_kind.get("replicates", [])], prep.bootstrap)  # type: ignore[misc]
            if prep.bootstrap > 0 and prep.refits else None)
    labels = _pauli.pauli_labels(n)

    def rep(key: str) -> np.ndarray | None:
        return None if reps is None else reps[key]

    def rep_col(key: str, lab: str, names: tuple[str, ...]) -> np.ndarray | None:
        return None if reps is None else reps[key][:, names.index(lab)]

    # fidelity from the identity decay(s) alone: the benchmarking number in reference mode,
    # the classic interleaved estimate 1 - (d-1)(1 - p_int/p_ref)/d in interleaved mode
    dec_ref, dec_main = prep.dec_ref, prep.dec_main
    ident = dec_ref._ident()
    p_main = float(dec_main.lambdas[ident])
    p_rep = None if dec_main.bootstrap_lambdas is None else dec_main.bootstrap_lambdas[:, ident]
    if prep.interleaved:
        p_ref0 = float(dec_ref.lambdas[ident])
        p_main = p_main / p_ref0
        if p_rep is not None and dec_ref.bootstrap_lambdas is not None:
            p_rep = p_rep / dec_ref.bootstrap_lambdas[:, ident]
    dfid_value = 1 - (d - 1) * (1 - p_main) / d
    dfid = 1 - (d - 1) * (1 - np.asarray(p_rep)) / d if p_rep is not None else None
    agf_iv = _interval(point["agf"], rep("agf"))  # type: ignore[arg-type,index]
    ef_iv = _interval(point["ef"], rep("ef"))  # type: ignore[arg-type,index]
    dfid_iv = _interval(dfid_value, dfid)
    if not prep.interleaved and dec_ref.bootstrap_lambdas is not None:
        # reference mode: the anchored estimate's trace is the identity decay's, so both
        # fidelities are increasing affine maps of it and take its studentized interval
        lo, hi = dec_ref.identity_decay_interval()
        if np.isfinite(lo) and np.isfinite(hi):
            p0 = float(dec_ref.lambdas[ident])
            agf_iv = Interval(agf_iv.value, *(float(point["agf"]) + (d - 1) * (x - p0) / d for x in (lo, hi)))  # type: ignore[arg-type]
            ef_iv = Interval(ef_iv.value, *(float(point["ef"]) + d2m1 * (x - p0) / d**2 for x in (lo, hi)))  # type: ignore[arg-type]
            dfid_iv = Interval(dfid_value, *(1 - (d - 1) * (1 - x) / d for x in (lo, hi)))
    figures = Figures(
        average_gate_fidelity=agf_iv,
        entanglement_fidelity=ef_iv,
        diamond_distance=(_interval(point["dd"], rep("dd")) if dd_profile is None  # type: ignore[arg-type,index]
                          else Interval(float(point["dd"]), *dd_profile)),  # type: ignore[index]
        diamond_distance_range=span,  # type: ignore[arg-type]
        unitarity=_interval(point["unitarity"], rep("unitarity")),  # type: ignore[arg-type,index]
        coherent_share=_interval(point["coh"], rep("coh")),  # type: ignore[arg-type,index]
        decay_fidelity=dfid_iv,
        pauli_error_rates={k: _interval(v, rep_col("pauli", k, labels))
                           for k, v in point["pauli"].items()},  # type: ignore[index,union-attr]
        hamiltonian={k: _interval(v, rep_col("ham", k, labels[1:]))
                     for k, v in point["ham"].items()},  # type: ignore[index,union-attr]
        stochastic={k: _interval(v, rep_col("sto", k, labels[1:]))
                    for k, v in point["sto"].items()},  # type: ignore[index,union-attr]
    )
    summaries: tuple[ModelSummary, ...] = ()
    chosen = "full"
    if prep.models:
        m = by_kind["models"][0]
        summaries, chosen = m["summaries"], str(m["chosen"])  # type: ignore[assignment]
        warn += list(m["warnings"])  # type: ignore[call-overload]
    classic = _classic_interleaved(dec_ref, prep.dec_int, n) if prep.dec_int is not None else None
    block_err = (float(np.sqrt(np.mean([np.sum((b - err.unital_block) ** 2) for b in reps["block"]])))
                 if reps is not None else float("nan"))
    fit_main = prep.fit_main
    opts = {"bootstrap": prep.bootstrap, "seed": -1 if prep.seed is None else int(prep.seed),
            "control_variate": prep.control_variate, "probes": f"{dec_ref.probes.n_probes} probes",
            "solver": prep.solver, "refits": bool(prep.refits)}
    return Reconstruction(
        n_qubits=n, mode=AnalysisMode.INTERLEAVED if prep.interleaved else AnalysisMode.REFERENCE,
        target_label=prep.label, target_unitary=np.asarray(prep.gate, dtype=complex), error_channel=err,
        figures=figures, models=tuple(summaries), chosen_model=chosen, decays=dec_ref,
        interleaved_decays=prep.dec_int, linear_unital_block=np.asarray(fit_main.linear_block),  # type: ignore[attr-defined]
        constraint_distance=float(fit_main.linear_distance), nonunital_ranges=nu_arr,  # type: ignore[attr-defined]
        solver=str(fit_main.solver), solver_status=str(fit_main.status.value),  # type: ignore[attr-defined]
        solver_fell_back=bool(fit_main.fell_back), classic_interleaved=classic, warnings=tuple(warn),  # type: ignore[attr-defined]
        plan_fingerprint=prep.plan_fingerprint, counts_fingerprint=prep.counts_fingerprint,
        options=opts, package_version=__version__, unital_block_error=block_err,
        anchor_weight=prep.anchor_weight, reference_channel=prep.fit_ref.channel if prep.interleaved else None,  # type: ignore[attr-defined]
    )


def _validated_unitary(target: object, d: int) -> np.ndarray:
    if isinstance(target, Channel):
        raise TypeError("'target' must be a unitary matrix for analyze(); got a Channel")
    u = np.asarray(target, dtype=complex)
    if u.shape != (d, d) or not np.allclose(u.conj().T @ u, np.eye(d), atol=1e-8):
        raise ValueError(f"'target' must be a {d} x {d} unitary matrix; got shape {u.shape}")
    return u


def _model_summaries(mdl, rc, fit_main, obs_main, corr_ref, corr_int, control_variate, interleaved, inter_gate,
                     solver):
    """Fit every model on the full data; choose by held-out prediction on a split of sequences."""
    from robusttomo import metrics

    d2 = 4**obs_main.n_qubits
    warn: list[str] = []

    def fit_all(obs: LinearObservations, full_fit) -> list:
        out = [mdl.ModelFit.from_channel("full", full_fit.channel, (d2 - 1) ** 2, obs)]
        for f in (mdl.fit_generator_model, mdl.fit_pauli_model, mdl.fit_coherent_model):
            try:
                out.append(f(obs))
            except (ValueError, RuntimeError, np.linalg.LinAlgError) as exc:
                warn.append(f"model fit {f.__name__} failed: {exc}")
        return out

    def split_obs(parity: int) -> LinearObservations:
        dref = fit_decays(_subset(corr_ref, parity), control_variate=control_variate, bootstrap=0)
        if not interleaved:
            return dref.observations()
        lref = rc.fit_cptp(dref.observations(), solver=solver).channel
        dint = fit_decays(_subset(corr_int, parity), control_variate=control_variate, bootstrap=0)
        return rc.gate_error_observations(dint.observations(), lref, inter_gate)

    full = fit_all(obs_main, fit_main)
    comp_full = mdl.compare_models(full)
    heldout_chi2: dict[str, float] = {}
    chosen = comp_full.chosen
    try:
        train, test = split_obs(0), split_obs(1)
        train_fits = fit_all(train, rc.fit_cptp(train, solver=solver))
        comp = mdl.compare_models(train_fits, heldout=test)
        heldout_chi2 = {s.name: float(s.heldout_chi2) for s in comp.scores if s.heldout_chi2 is not None}
        chosen = comp.chosen
    except (ValueError, RuntimeError, np.linalg.LinAlgError) as exc:
        warn.append(f"held-out model check skipped: {exc}")
    out = []
    for f in full:
        sc = comp_full.score(f.name)
        out.append(ModelSummary(
            name=f.name, n_parameters=int(f.n_parameters), chi2=float(f.chi2), criterion=float(sc.aic),
            heldout_chi2=heldout_chi2.get(f.name, float("nan")),
            average_gate_fidelity=float(metrics.average_gate_fidelity(f.channel)),
            diamond_distance=float(metrics.diamond_distance(f.channel)),
            parameters={k: float(v) for k, v in f.parameters.items()}, ptm=np.array(f.channel.ptm)))
    return out, chosen, warn


# ---- files ------------------------------------------------------------------------------------
def save_reconstruction(rec: Reconstruction, path: object, *, force: bool = False) -> None:
    """Write a :class:`Reconstruction` to HDF5 (atomically; no overwrite unless ``force``).

    Layout: root attributes ``schema_version`` (1), ``kind`` = ``"robusttomo-result"``,
    ``plan_fingerprint``, ``counts_fingerprint``, ``package_version``; one group per field of
    :class:`Reconstruction` (see docs/file-formats.md).
    """
    with _io.atomic_path(path, force=force) as tmp:  # type: ignore[arg-type]
        with h5py.File(tmp, "w") as f:
            f.attrs["schema_version"] = RESULT_SCHEMA
            f.attrs["kind"] = _io.fixed_text("robusttomo-result")
            grp = f.create_group("reconstruction")
            _h5tree.write(grp, rec)
            for key in ("plan_fingerprint", "counts_fingerprint", "package_version"):
                f.attrs[key] = _io.fixed_text(getattr(rec, key))


def load_reconstruction(path: object) -> Reconstruction:
    """Read a result file written by :func:`save_reconstruction`; DataError on a bad file."""
    from pathlib import Path

    p = Path(path)  # type: ignore[arg-type]
    if not p.is_file():
        raise DataError(f"{p}: result file not found")
    try:
        f = h5py.File(p, "r")
    except OSError:
        raise DataError(f"{p}: not an HDF5 file; expected a result written by 'robusttomo analyze'") from None
    with f:
        version = _io.safe_attr(f, "schema_version", p) if "schema_version" in f.attrs else None
        _io.check_schema(p, version, kind="result", supported=(RESULT_SCHEMA,))
        kind = _io.safe_attr(f, "kind", p) if "kind" in f.attrs else None
        if (kind.decode() if isinstance(kind, bytes) else kind) != "robusttomo-result":
            raise DataError(f"{p}: field 'kind' is {kind!r}, not 'robusttomo-result'; is this a result file?")
        grp = f.get("reconstruction")
        if not isinstance(grp, h5py.Group):
            raise DataError(f"{p}: group 'reconstruction' is missing")
        rec = _h5tree.read(grp, Reconstruction, path=p)
    return rec  # type: ignore[return-value]
