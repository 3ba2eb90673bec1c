"""Precision planner: predict what a plan will deliver, and choose sizes for a target precision.

Before a lab spends device time, :func:`predict` says what standard errors a plan will give on
an assumed device, and :func:`choose_plan` proposes the lengths, sequences per length and
shots per sequence that reach stated targets at the least device time.

Method
------
Every estimate of the product is a function of the per-length means of per-sequence filtered
correlations ``F_s`` (:mod:`robusttomo.estimate`), with the control variate applied
(:mod:`robusttomo.fit`).  Sequences are drawn independently, so the covariance of one length's
mean over ``K`` sequences of ``N`` shots splits into a part between sequences and a part
within a sequence (shot noise)::

    Cov(mean) = (Sigma_between + Sigma_shots / N) / K.

* ``Sigma_between`` is **simulated**: a pilot set of random sequences is run on the assumed
  device in exact-probabilities mode (``simulate(..., exact=True)``); the spread between the
  exact per-sequence values, with the control variate fitted and subtracted exactly as the
  decay fit does it (and, for comparison, without it), is the between part.
* ``Sigma_shots`` is **analytic**: for one sequence ``s`` with exact outcome probabilities
  ``p(x|s)`` the measured value is ``F_s = sum_x w_x F(x; s)`` with multinomial frequencies
  ``w`` of covariance ``(diag p - p p^T) / N`` (common practice), so
  ``N Cov(F_s | s) = sum_x p(x|s) F(x; s) F(x; s)^T - F_s F_s^T``; ``Sigma_shots`` is its
  average over the pilot sequences.  ``F(x; s)``, the value of one recorded outcome, is
  computed with the same propagation as the estimator.

The per-length covariances then go through the decay fit's own sandwich formula
(:mod:`robusttomo.fit`) to the covariance of the decays ``lambda_A``; that covariance is the
observation covariance of the linear observations the rest of the product consumes, so the
unital block's covariance is that of the weighted least-squares (linear) estimate, and every
reduced model's parameter covariance is its Gauss-Newton covariance (the package's own model
fits run on the noise-free predicted observations).  A run weights its model fits by a
covariance it estimates from its own length-2 sequences; the noise of that estimate raises the
variance of a ``k``-parameter fit of ``p`` observations by ``(nu - 1) / (nu - p + k - 1)``
(``nu`` = length-2 sequences - 1), which is included.  In interleaved mode the isolated gate's
error ``L_G`` is observed through ``B_int = B_G K`` with ``K`` from the reference run, and the
reference run's uncertainty is carried into ``L_G`` to first order.

Everything is linearized about the assumed device: the prediction is the large-sample
standard error of the estimator as the product runs it.  It does not describe estimates held
at a bound (a stochastic rate or Pauli probability within about two standard errors of 0), nor a
nonlinear model that does not describe the device (flagged by its misfit chi-square), and with
few sequences per length (tens) the spread is typically 5 to 10 % above the prediction.
``docs/planner.md`` has a worked example.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import shutil
import types
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.stats

from robusttomo import _io, _pauli
from robusttomo import channels as _ch
from robusttomo import fit as _fit
from robusttomo import models as _models
from robusttomo._version import __version__
from robusttomo.channels import Channel
from robusttomo.clifford import clifford_ptms
from robusttomo.errors import DataError
from robusttomo.estimate import BlockKind, Correlations, ProbeSet, compute_correlations, default_probes
from robusttomo.estimate import _propagate, _z_matrix, kappa
from robusttomo.fit import LinearObservations
from robusttomo.plan import InterleavedGate, Plan, SequenceKind, make_plan
from robusttomo.simulate import Device, simulate

__all__ = [
    "FIGURE_NAMES",
    "LengthVariance",
    "ModelPrediction",
    "PlanProposal",
    "PredictedFigure",
    "Prediction",
    "assumed_device",
    "attach_prediction",
    "choose_plan",
    "device_seconds",
    "format_prediction",
    "load_prediction",
    "predict",
]

_KIND = "robusttomo-prediction"
_SCHEMAS = (1,)
_MODEL_FITS = {
    _models.COHERENT_STOCHASTIC: _models.fit_generator_model,
    _models.PAULI: _models.fit_pauli_model,
    _models.COHERENT: _models.fit_coherent_model,
}
_MODEL_ORDER = (_models.FULL, _models.COHERENT_STOCHASTIC, _models.PAULI, _models.COHERENT)

#: Every figure a prediction holds (and a target may name), with its meaning.  Interleaved-only
#: figures are marked; in interleaved mode ``average_gate_fidelity``, ``unital_block`` and the
#: models refer to the isolated gate's error ``L_G`` (as :func:`robusttomo.analyze` reports them).
FIGURE_NAMES: Mapping[str, str] = types.MappingProxyType({
    "decay_fidelity": "average gate fidelity of L from the identity-probe decay (reference run)",
    "average_gate_fidelity": "average gate fidelity of the reconstructed channel (linear estimate)",
    "lambdas": "largest standard error over the probe decays lambda_A (reference run)",
    "interleaved_lambdas": "largest standard error over the interleaved run's decays (interleaved only)",
    "classic_interleaved_error": "classic interleaved error r = (d-1)(1 - p_int/p_ref)/d (interleaved only)",
    "unital_block": "Frobenius error of the unital block: sqrt(trace of its covariance)",
    _models.FULL: "largest standard error over the unital block's entries (full CPTP model)",
    _models.COHERENT_STOCHASTIC: "largest parameter standard error, coherent+stochastic model",
    _models.PAULI: "largest parameter standard error, Pauli-channel model",
    _models.COHERENT: "largest parameter standard error, coherent (unitary) model",
})
_INTERLEAVED_ONLY = ("interleaved_lambdas", "classic_interleaved_error")

# Default pilot: ten sequences per probe at the short lengths.  Measured for two qubits: with 500
# pilot sequences the per-sequence variance along single directions of the 225-dimensional
# length-2 statistic was off by up to 40 %, with 4000 by up to 20 %; the reported figures, which
# sum over many directions, moved by 2 to 4 % between pilot seeds at the default size.
_PILOT_MIN = 1000
_PILOT_PER_PROBE = 10
_PILOT_LONG_MIN = 400
# Outcome-resolved values are built in chunks of sequences to bound memory.
_CHUNK_ENTRIES = 2**22


# ---- the assumed device -------------------------------------------------------------------------
def _check_prob(name: str, value: object, *, low: float, high: float, open_low: bool = False,
                open_high: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"'{name}' must be a number; got {value!r}")
    v = float(value)
    if (not math.isfinite(v) or v < low or v > high or (open_low and v <= low) or (open_high and v >= high)):
        interval = f"{'(' if open_low else '['}{low:g}, {high:g}{')' if open_high else ']'}"
        raise ValueError(f"'{name}' must be a number in {interval}; got {value!r}")
    return v


def _error_channel(n: int, average_error: float, coherent_fraction: float) -> Channel:
    """Depolarizing channel followed by a rotation about ``Z...Z``, with the given average error.

    The rotation ``exp(-i theta/2 Z..Z)`` alone has average error ``coherent_fraction *
    average_error`` (``r_U = d sin^2(theta/2) / (d + 1)``); the depolarizing decay ``p`` then
    makes the total entanglement fidelity ``F_e = (1 + p (d^2 cos^2(theta/2) - 1)) / d^2``
    equal ``1 - (d + 1) average_error / d`` exactly.
    """
    d = 2**n
    r_c = coherent_fraction * average_error
    theta = 2.0 * math.asin(math.sqrt(r_c * (d + 1) / d))
    fe = 1.0 - (d + 1) * average_error / d
    cos2 = math.cos(theta / 2) ** 2
    p = (d * d * fe - 1.0) / (d * d * cos2 - 1.0)
    return _ch.rotation("Z" * n, theta) @ _ch.depolarizing(n, p)


def assumed_device(n_qubits: int, *, average_error: float, readout_error: float, prep_error: float = 0.0,
                   coherent_fraction: float = 0.1, gate_error: float | None = None) -> Device:
    """A simple assumed device from an average error and a SPAM level, for planning.

    The error after every Clifford is a depolarizing channel followed by a small coherent
    rotation ``exp(-i theta/2 Z...Z)`` (``Z`` on every qubit): the rotation alone has average
    error ``coherent_fraction * average_error`` and the depolarizing decay is set so that the
    whole channel has average gate infidelity ``1 - F_avg = average_error`` exactly.  Readout
    flips each qubit's result with probability ``readout_error`` (both directions), and
    preparation flips each qubit to ``|1>`` with probability ``prep_error``.

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    average_error : float
        Average gate infidelity ``1 - F_avg`` per Clifford (an error, not a fidelity), in
        ``(0, 0.5]``.
    readout_error : float
        Per-qubit readout flip probability in ``[0, 0.5)``.
    prep_error : float, default 0.0
        Per-qubit preparation flip probability in ``[0, 0.5)``.
    coherent_fraction : float, default 0.1
        Share of ``average_error`` due to the coherent rotation, in ``[0, 1)``.
    gate_error : float, optional
        Average error of the interleaved gate (same construction); default None, a perfect
        interleaved gate.

    Returns
    -------
    Device

    Examples
    --------
    >>> from robusttomo.metrics import average_gate_fidelity
    >>> dev = assumed_device(2, average_error=0.01, readout_error=0.02)
    >>> round(1 - average_gate_fidelity(dev.error), 12)
    0.01
    """
    n = _pauli.check_n_qubits(n_qubits)
    r = _check_prob("average_error", average_error, low=0.0, high=0.5, open_low=True)
    ro = _check_prob("readout_error", readout_error, low=0.0, high=0.5, open_high=True)
    pe = _check_prob("prep_error", prep_error, low=0.0, high=0.5, open_high=True)
    cf = _check_prob("coherent_fraction", coherent_fraction, low=0.0, high=1.0, open_high=True)
    inter = None
    if gate_error is not None:
        inter = _error_channel(n, _check_prob("gate_error", gate_error, low=0.0, high=0.5, open_low=True), cf)
    return Device.build(n, error=_error_channel(n, r, cf), interleaved_error=inter,
                        prep_flip=[pe] * n, readout=[(ro, ro)] * n)


def device_seconds(plan: Plan, costs: Mapping[str, float]) -> float:
    """Predicted device time of a plan: ``sum over sequences of (seconds_per_sequence + shots * seconds_per_shot)``.

    Parameters
    ----------
    plan : Plan
    costs : mapping
        ``{"seconds_per_shot": ..., "seconds_per_sequence": ...}``, non-negative, not both 0;
        ``seconds_per_sequence`` is the time to switch to (load, compile) a new circuit.

    Returns
    -------
    float
        Seconds.
    """
    if not isinstance(plan, Plan):
        raise TypeError(f"'plan' must be a robusttomo Plan; got {type(plan).__name__}")
    t_shot, t_seq = _check_costs(costs)
    return float(plan.n_sequences * (t_seq + plan.shots * t_shot))


def _check_costs(costs: object) -> tuple[float, float]:
    if not isinstance(costs, Mapping):
        raise TypeError("'costs' must be a mapping {'seconds_per_shot': ..., 'seconds_per_sequence': ...}; "
                        f"got {type(costs).__name__}")
    keys = {"seconds_per_shot", "seconds_per_sequence"}
    extra = sorted(set(costs) - keys)
    missing = sorted(keys - set(costs))
    if extra or missing:
        raise ValueError(f"'costs' must have exactly the keys {sorted(keys)}; "
                         + (f"unknown {extra}" if extra else f"missing {missing}"))
    vals = []
    for k in ("seconds_per_shot", "seconds_per_sequence"):
        v = costs[k]
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) \
                or not math.isfinite(v) or v < 0:
            raise ValueError(f"'costs[{k!r}]' must be a finite non-negative number of seconds; got {v!r}")
        vals.append(float(v))
    if vals[0] == 0 and vals[1] == 0:
        raise ValueError("'costs' are both 0; give the seconds per shot and per new sequence of the device")
    return vals[0], vals[1]


# ---- results --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PredictedFigure:
    """One row of the prediction table.

    Attributes
    ----------
    name : str
        Key of :data:`FIGURE_NAMES` (the name a target uses).
    description : str
        Plain words.
    value : float
        The figure on the assumed device (NaN for rows that are a largest standard error).
    stderr : float
        Predicted standard error with the control variate (the estimator as the product runs it).
    stderr_without_cv : float
        Predicted standard error of the same estimator with ``control_variate=False``.
    """

    name: str
    description: str
    value: float
    stderr: float
    stderr_without_cv: float

    @property
    def cost_factor_without_cv(self) -> float:
        """``(stderr_without_cv / stderr)**2``: the device-time factor to reach the same error
        without the control variate (at the same shots per sequence the variance falls as
        ``1 / sequences``)."""
        return float((self.stderr_without_cv / self.stderr) ** 2) if self.stderr > 0 else float("nan")


@dataclass(frozen=True, eq=False)
class ModelPrediction:
    """Predicted parameter standard errors of one model.

    Attributes
    ----------
    name : str
        ``"full"``, ``"coherent+stochastic"``, ``"pauli"`` or ``"coherent"``.
    labels : tuple of str, length k
        Parameter labels (``"H:ZZ"``, ``"S:XI"``, ``"p:XI"``, or ``"B[i,j]"`` for the unital
        block entries of the full model, Pauli order without the identity).
    values : ndarray, shape (k,), float
        The model fitted to the noise-free predicted observations of the assumed device.
    stderr, stderr_without_cv : ndarray, shape (k,), float
        Gauss-Newton standard errors with the predicted observation covariance, with and
        without the control variate (``inf`` for parameters the observations do not fix).
    misfit_chi2 : float
        ``chi2`` of that noise-free fit in units of the predicted noise (0 when the model
        describes the device).  For a nonlinear model far from the device (``misfit_chi2``
        much above the number of parameters) the spread of its estimates depends on noise in
        the fitted weights and is not predicted.
    near_bound : ndarray, shape (k,), bool
        Non-negative parameters (``S:``, ``p:``) whose value is below two standard errors:
        their estimates will often sit at 0, and their spread is smaller than ``stderr``.
    """

    name: str
    labels: tuple[str, ...]
    values: np.ndarray
    stderr: np.ndarray
    stderr_without_cv: np.ndarray
    misfit_chi2: float
    near_bound: np.ndarray


@dataclass(frozen=True)
class LengthVariance:
    """The variance split of one quantity at one length (one row of the variance table).

    Per-sequence variance ``between + shot / shots``: ``between`` simulated (exact outcome
    probabilities of pilot sequences), ``shot`` analytic (multinomial variance of the outcome
    values under the exact probabilities).

    Attributes
    ----------
    run : str
        ``"reference"`` or ``"interleaved"``.
    quantity : str
        ``"identity probe"`` (the filtered value ``F_s`` of the identity probe) or
        ``"unital block"`` (Frobenius-squared error of the unital block estimated from one
        length-2 sequence: the trace of its covariance).
    length : int
    n_sequences : int
        Sequences the plan has at this length.
    between : float
        Between-sequence variance with the control variate.
    between_without_cv : float
        Between-sequence variance without it.
    shot : float
        Shot-noise variance of one sequence times the shots per sequence (``sigma_shots^2``).
    """

    run: str
    quantity: str
    length: int
    n_sequences: int
    between: float
    between_without_cv: float
    shot: float


@dataclass(frozen=True, eq=False)
class Prediction:
    """What a plan will deliver on an assumed device (see the module docstring for the method).

    Attributes
    ----------
    n_qubits : int
    mode : str
        ``"reference"`` or ``"interleaved"``.
    gate_label : str or None
        The interleaved gate's label (interleaved mode).
    plan_fingerprint : str
        Fingerprint of the plan predicted for.
    device_fingerprint : str
        Fingerprint of the assumed device.
    shots : int
        Shots per sequence.
    blocks : tuple of (str, int, int)
        ``(kind, length, sequences)`` of every block of the plan.
    pilot_sequences : int
        Pilot sequences per length (exact probabilities).
    seed : int
        Seed of the pilot sequences.
    figures : tuple of PredictedFigure
        The table, in the order of :data:`FIGURE_NAMES` (those that apply to the mode).
    probe_labels : tuple of str, length P
    lambdas : ndarray, shape (P,), float
        Reference-run decays of the assumed device.
    lambda_stderr, lambda_stderr_without_cv : ndarray, shape (P,), float
    interleaved_lambdas, interleaved_lambda_stderr, interleaved_lambda_stderr_without_cv : ndarray, shape (P,), or None
        The same for the interleaved run (probes ``B o G``).
    lambda_covariance : ndarray, shape (P, P), float
        Predicted covariance of the reference-run decays (with the control variate).
    unital_block_covariance : ndarray, shape (D*D, D*D), float
        Predicted covariance of the row-major unital block (``D = d*d - 1``, Pauli order
        without the identity) of the reconstructed channel (``L``, or ``L_G`` in interleaved
        mode), from the linear estimate, with the control variate.
    models : tuple of ModelPrediction
    variances : tuple of LengthVariance
        The between / shot split, per run and length.
    device_seconds : float
        Predicted device time of the plan (NaN when no costs were given).
    warnings : tuple of str
        Plain-words cautions (bounds, misfit, few sequences).
    """

    n_qubits: int
    mode: str
    gate_label: str | None
    plan_fingerprint: str
    device_fingerprint: str
    shots: int
    blocks: tuple[tuple[str, int, int], ...]
    pilot_sequences: int
    seed: int
    figures: tuple[PredictedFigure, ...]
    probe_labels: tuple[str, ...]
    lambdas: np.ndarray
    lambda_stderr: np.ndarray
    lambda_stderr_without_cv: np.ndarray
    interleaved_lambdas: np.ndarray | None
    interleaved_lambda_stderr: np.ndarray | None
    interleaved_lambda_stderr_without_cv: np.ndarray | None
    lambda_covariance: np.ndarray
    unital_block_covariance: np.ndarray
    models: tuple[ModelPrediction, ...]
    variances: tuple[LengthVariance, ...]
    device_seconds: float
    warnings: tuple[str, ...]

    def figure(self, name: str) -> PredictedFigure:
        """The row called ``name`` (a key of :data:`FIGURE_NAMES`)."""
        for f in self.figures:
            if f.name == name:
                return f
        raise ValueError(f"prediction has no figure {name!r}; it has {[f.name for f in self.figures]}")

    def stderr(self, name: str) -> float:
        """Predicted standard error of the figure ``name`` (with the control variate)."""
        return self.figure(name).stderr

    def model(self, name: str) -> ModelPrediction:
        """The :class:`ModelPrediction` of model ``name``."""
        for m in self.models:
            if m.name == name:
                return m
        raise ValueError(f"prediction has no model {name!r}; it has {[m.name for m in self.models]}")

    def as_dict(self, *, covariances: bool = False) -> dict[str, object]:
        """JSON-able summary (NaN and inf become None); covariances only when asked (large)."""
        out: dict[str, object] = {
            "schema_version": 1, "kind": _KIND, "package_version": __version__,
            "n_qubits": self.n_qubits, "mode": self.mode, "gate_label": self.gate_label,
            "plan_fingerprint": self.plan_fingerprint, "device_fingerprint": self.device_fingerprint,
            "shots": self.shots, "blocks": [list(b) for b in self.blocks],
            "pilot_sequences": self.pilot_sequences, "seed": self.seed,
            "figures": [{"name": f.name, "description": f.description, "value": _num(f.value),
                         "stderr": _num(f.stderr), "stderr_without_cv": _num(f.stderr_without_cv),
                         "cost_factor_without_cv": _num(f.cost_factor_without_cv)} for f in self.figures],
            "probe_labels": list(self.probe_labels),
            "lambdas": _nums(self.lambdas), "lambda_stderr": _nums(self.lambda_stderr),
            "lambda_stderr_without_cv": _nums(self.lambda_stderr_without_cv),
            "interleaved_lambdas": _nums(self.interleaved_lambdas),
            "interleaved_lambda_stderr": _nums(self.interleaved_lambda_stderr),
            "interleaved_lambda_stderr_without_cv": _nums(self.interleaved_lambda_stderr_without_cv),
            "models": [{"name": m.name, "labels": list(m.labels), "values": _nums(m.values),
                        "stderr": _nums(m.stderr), "stderr_without_cv": _nums(m.stderr_without_cv),
                        "misfit_chi2": _num(m.misfit_chi2), "near_bound": [bool(b) for b in m.near_bound]}
                       for m in self.models],
            "variances": [dataclasses.asdict(v) for v in self.variances],
            "device_seconds": _num(self.device_seconds),
            "warnings": list(self.warnings),
        }
        if covariances:
            out["lambda_covariance"] = _nums(self.lambda_covariance)
            out["unital_block_covariance"] = _nums(self.unital_block_covariance)
        return out


def _num(x: object) -> float | None:
    v = float(x)  # type: ignore[arg-type]
    return v if math.isfinite(v) else None


def _nums(a: np.ndarray | None) -> list | None:
    if a is None:
        return None
    arr = np.asarray(a, dtype=float)
    obj = arr.astype(object)
    obj[~np.isfinite(arr)] = None
    return obj.tolist()


# ---- pilot statistics ---------------------------------------------------------------------------
@dataclass(frozen=True)
class _LengthStats:
    """Per-sequence covariance parts of one length (probes as evaluated there)."""

    length: int
    probes: np.ndarray  # (Q,) positions in the probe set ([0] stands for all at m = 1)
    between: np.ndarray  # (Q, Q) with the control variate
    between_raw: np.ndarray  # (Q, Q) without
    shot: np.ndarray  # (Q, Q) per-shot: the shot part is shot / N


@dataclass(frozen=True)
class _Run:
    """Pilot statistics of one run (reference or interleaved)."""

    kind: BlockKind
    corr: Correlations
    c: float
    lambdas: np.ndarray
    stats: Mapping[int, _LengthStats]


def _outcome_values(plan: Plan, corr: Correlations) -> dict[int, np.ndarray]:
    """``F(x; s)`` for every outcome ``x``: per length an array ``(K, Q, d)``.

    The same propagation as :func:`robusttomo.estimate.compute_correlations` (whose per-sequence
    value is ``sum_x w_x F(x; s)`` with the outcome frequencies ``w``), resolved by outcome.
    """
    n = plan.n_qubits
    d = 2**n
    d2 = d * d
    want = SequenceKind.REFERENCE if corr.kind is BlockKind.REFERENCE else SequenceKind.INTERLEAVED
    gate = None if corr.kind is BlockKind.REFERENCE else _pauli.ptm_of_unitary(np.asarray(plan.interleave.unitary))
    lam_ideal = np.eye(d2) if gate is None else gate
    phys = np.einsum("pij,jk->pik", corr.probes.ptms, lam_ideal)
    z = _z_matrix(n)
    e0 = z[0].copy()
    kap = kappa(d)
    sq = math.sqrt(d)
    out: dict[int, np.ndarray] = {}
    for s in corr.stats:
        m = s.length
        idx = np.concatenate([b.cliffords for b in plan.blocks if b.kind is want and b.length == m])
        q_n = s.probes.size if m != 2 else corr.probes.n_probes
        step = max(1, _CHUNK_ENTRIES // (m * d2 * d2 + q_n * (d2 + d)))
        parts = []
        for start in range(0, idx.shape[0], step):
            sub = idx[start:start + step]
            steps = clifford_ptms(n, sub.reshape(-1)).reshape(sub.shape[0], m, d2, d2)
            if m == 2:
                last = steps[:, 1] if gate is None else np.einsum("ij,kjl->kil", gate, steps[:, 1])
                v = np.einsum("kij,j->ki", steps[:, 0], e0)[:, 1:] / sq
                ux = np.einsum("kji,xj->kxi", last, z)[:, :, 1:] / sq
                bv = np.einsum("pij,kj->kpi", phys[:, 1:, 1:], v, optimize=True)
                parts.append(kap * np.einsum("kpi,kxi->kpx", bv, ux, optimize=True))
                continue
            probe_ptms = lam_ideal[None] if m == 1 else phys[s.probes]
            r = _propagate(steps, probe_ptms, gate, e0)
            q = np.einsum("xi,kqi->kqx", z, r) / d
            parts.append(kap * (q - 1.0 / d))
        out[m] = np.concatenate(parts, axis=0)
    return out


def _pilot_run(pilot: Plan, device: Device, kind: BlockKind, probes: ProbeSet,
               exact_lambdas: np.ndarray | None) -> _Run:
    counts = simulate(pilot, device, exact=True)
    corr = compute_correlations(pilot, counts, probes=probes, kind=kind)
    fx = _outcome_values(pilot, corr)
    want = SequenceKind.REFERENCE if kind is BlockKind.REFERENCE else SequenceKind.INTERLEAVED
    stats: dict[int, _LengthStats] = {}
    for s in corr.stats:
        cnt = np.concatenate([counts.for_block(pilot, b) for b in pilot.blocks
                              if b.kind is want and b.length == s.length])
        p = cnt / cnt.sum(axis=1, keepdims=True)
        f = fx[s.length]
        k, q_n, d = f.shape
        # sum_x p F F^T averaged over sequences, as one matrix product of sqrt(p)-weighted rows
        rows = (f * np.sqrt(p)[:, None, :]).transpose(0, 2, 1).reshape(k * d, q_n)
        shot = (rows.T @ rows - s.values.T @ s.values) / k
        _, corrected, _ = _fit._cv_means(s.values, s.ideal, s.mu, True)
        stats[s.length] = _LengthStats(
            s.length, s.probes, np.atleast_2d(np.cov(corrected, rowvar=False, ddof=1)),
            np.atleast_2d(np.cov(s.values, rowvar=False, ddof=1)), (shot + shot.T) / 2)
    dec = _fit.fit_decays(corr, bootstrap=0)
    lam = dec.lambdas if exact_lambdas is None else exact_lambdas
    return _Run(kind, corr, float(dec.spam_constant), np.asarray(lam, dtype=float), stats)


def _exact_blocks(device: Device, gate: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Unital blocks (reference L, interleaved composite, isolated gate error) of a
    gate-independent device; None when the noise depends on the gate (pilot fit used instead)."""
    if device.gate_errors:
        return None
    b_ref = device.error.unital_block
    n = device.n_qubits
    lg = device.interleaved_error.unital_block if device.interleaved_error is not None else np.eye(4**n - 1)
    if gate is None:
        return b_ref, None, lg  # type: ignore[return-value]
    bg = _pauli.ptm_of_unitary(gate)[1:, 1:]
    return b_ref, lg @ bg @ b_ref @ bg.T, lg


def _check_pilot(pilot_sequences: object, n_probes: int) -> int:
    if pilot_sequences is None:
        return max(_PILOT_MIN, _PILOT_PER_PROBE * n_probes)
    if isinstance(pilot_sequences, bool) or not isinstance(pilot_sequences, (int, np.integer)):
        raise TypeError(f"'pilot_sequences' must be an integer or None; got {pilot_sequences!r}")
    if int(pilot_sequences) < 100:
        raise ValueError(f"'pilot_sequences' must be at least 100 (the variance estimates need them); "
                         f"got {int(pilot_sequences)}")
    return int(pilot_sequences)


def _check_seed(seed: object) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= int(seed) < 2**63:
        raise ValueError(f"'seed' must be a non-negative integer; got {seed!r}")
    return int(seed)


@dataclass(frozen=True)
class _Pilots:
    n: int
    probes: ProbeSet
    gate: InterleavedGate | None
    ref: _Run
    inter: _Run | None
    b_ref: np.ndarray  # (D, D) true (or pilot-estimated) unital block of L
    b_gate: np.ndarray | None  # (D, D) of L_G
    pilot_sequences: int
    seed: int
    device: Device


def _make_pilots(n: int, device: Device, probes: ProbeSet, gate: InterleavedGate | None, lengths_ref: Sequence[int],
                 lengths_int: Sequence[int], pilot_sequences: int, seed: int) -> _Pilots:
    d2m1 = 4**n - 1
    design = probes.unital_blocks.reshape(probes.n_probes, -1) / d2m1
    exact = _exact_blocks(device, None if gate is None else gate.unitary)
    pref = make_plan(n_qubits=n, lengths=list(lengths_ref), sequences=_pilot_counts(lengths_ref, pilot_sequences),
                     shots=1, seed=seed)
    ref = _pilot_run(pref, device, BlockKind.REFERENCE, probes,
                     None if exact is None else design @ exact[0].reshape(-1))
    inter = None
    b_ref = exact[0] if exact is not None else _linear_block(design, ref.lambdas, d2m1)
    b_gate = None
    if gate is not None:
        pint = make_plan(n_qubits=n, lengths=list(lengths_int), sequences=_pilot_counts(lengths_int, pilot_sequences),
                         shots=1, seed=seed + 1, interleave=gate, include_reference=False)
        inter = _pilot_run(pint, device, BlockKind.INTERLEAVED, probes,
                           None if exact is None else design @ exact[1].reshape(-1))
        if exact is not None:
            b_gate = exact[2]
        else:
            bg = _pauli.ptm_of_unitary(gate.unitary)[1:, 1:]
            b_int = _linear_block(design, inter.lambdas, d2m1)
            b_gate = b_int @ np.linalg.inv(bg @ b_ref @ bg.T)
    return _Pilots(n, probes, gate, ref, inter, b_ref, b_gate, pilot_sequences, seed, device)


def _pilot_counts(lengths: Sequence[int], k: int) -> list[int]:
    """Pilot sequences per length: ``k`` up to length 3, a quarter (at least 400) beyond.

    Lengths up to 3 carry many probes (all of them at 2), whose joint covariance needs many
    sequences; longer lengths carry only the slowly decaying probes, and their sequences are
    the expensive ones to propagate.  The count depends on the length alone, so a pilot over
    a ladder of lengths and one over a prefix of it share their sequences.
    """
    return [k if m <= 3 else max(_PILOT_LONG_MIN, k // 4) for m in lengths]


def _linear_block(design: np.ndarray, lambdas: np.ndarray, dim: int) -> np.ndarray:
    return np.linalg.lstsq(design, lambdas, rcond=None)[0].reshape(dim, dim)


# ---- from per-length covariances to the decays: the fit's own sandwich -------------------------
def _per_length_cov(st: _LengthStats, k: float, shots: float, cv: bool) -> np.ndarray:
    return ((st.between if cv else st.between_raw) + st.shot / shots) / k


def _rows_with_covariance(cov: np.ndarray) -> np.ndarray:
    """Rows ``X`` (``2q`` of them, mean exactly 0) with ``np.cov(X, rowvar=False) / len(X) == cov``.

    Lets the decay fit's sandwich formula (which takes per-sequence values) run on a predicted
    covariance: ``X = [+r_i; -r_i]`` with ``r_i = sqrt(k (k - 1) e_i / 2) v_i`` over the
    eigenpairs ``(e_i, v_i)`` of ``cov`` and ``k = 2q``.
    """
    e, v = np.linalg.eigh((cov + cov.T) / 2)
    k = 2 * cov.shape[0]
    r = (np.sqrt(k * (k - 1) / 2 * np.clip(e, 0.0, None)) * v).T
    return np.vstack([r, -r])


def _sub_corr(run: _Run, lengths: Sequence[int]) -> Correlations:
    return dataclasses.replace(run.corr, lengths=tuple(lengths), stats=tuple(run.corr.stats_for(m) for m in lengths))


def _lambda_covariance(run: _Run, alloc: Mapping[int, float], shots: float, cv: bool) -> np.ndarray:
    """Covariance ``(P + 1, P + 1)`` of ``(c, lambdas)`` by :func:`robusttomo.fit._sandwich`."""
    lengths = sorted(alloc)
    corr = _sub_corr(run, lengths)
    design = _fit._make_design(corr)
    means, sig, rows = [], [], []
    for m in lengths:
        st = run.stats[m]
        cov = _per_length_cov(st, alloc[m], shots, cv)
        rows.append(_rows_with_covariance(cov))
        sig.append(np.maximum(np.sqrt(np.clip(np.diag(cov), 0.0, None)), 1e-15))
        means.append(np.array([run.c]) if m == 1 else run.c * run.lambdas[st.probes] ** (m - 1))
    # the rows stand for a predicted covariance, not for sequences: nothing to shrink
    cov, _, _, _ = _fit._sandwich(design, corr, run.c, run.lambdas, means, sig, rows, shrink_covariance=False)
    return (cov + cov.T) / 2


def _fast_lambda_covariance(run: _Run, alloc: Mapping[int, float], shots: float, cv: bool) -> np.ndarray:
    """The same covariance as :func:`_lambda_covariance`, using the structure of the fit.

    Each data row of length ``m >= 2`` and probe ``a`` has two nonzero Jacobian entries,
    ``d/dc = lambda_a**(m-1)`` and ``d/dlambda_a = c (m-1) lambda_a**(m-2)`` (the length-1 row
    only ``d/dc = 1``), so ``H = J^T W J`` (weights ``W = 1 / diag Cov(mean)``) is an arrowhead
    matrix (dense first row and column, diagonal otherwise), inverted in closed form:
    ``H^-1 = diag(0, D^-1) + z z^T / s`` with ``z = (1, -D^-1 u)`` and ``s = alpha - u^T D^-1 u``.
    Then ``cov = H^-1 (J^T W Sigma W J) H^-1`` as in the fit's sandwich (checked against it in
    the tests); used inside the plan search, where it runs thousands of times.
    """
    p = run.lambdas.size
    c, lam = run.c, run.lambdas
    alpha = 0.0
    u = np.zeros(p)
    dg = np.zeros(p)
    meat = np.zeros((p + 1, p + 1))
    for m in sorted(alloc):
        st = run.stats[m]
        cov = _per_length_cov(st, alloc[m], shots, cv)
        w = 1.0 / np.maximum(np.clip(np.diag(cov), 0.0, None), 1e-30)
        if m == 1:
            alpha += float(w[0])
            meat[0, 0] += float(w[0] * cov[0, 0] * w[0])
            continue
        pr = st.probes
        lm = lam[pr]
        a = w * lm ** (m - 1)  # weighted d/dc entries
        b = w * c * (m - 1) * lm ** (m - 2)  # weighted d/dlambda entries
        alpha += float(a @ (lm ** (m - 1)))
        np.add.at(u, pr, a * c * (m - 1) * lm ** (m - 2))
        np.add.at(dg, pr, b * c * (m - 1) * lm ** (m - 2))
        ca = cov @ a
        meat[0, 0] += float(a @ ca)
        block = (b[:, None] * cov) * b[None, :]
        if pr.size == p:  # every probe (length 2), in order: no scatter needed
            meat[0, 1:] += ca * b
            meat[1:, 1:] += block
        else:
            np.add.at(meat[0, 1:], pr, ca * b)
            meat[1:, 1:][np.ix_(pr, pr)] += block
    meat[1:, 0] = meat[0, 1:]
    dinv = 1.0 / dg
    z = np.concatenate([[1.0], -dinv * u])
    s = alpha - float(u @ (dinv * u))
    dm = np.zeros_like(meat)  # diag(0, D^-1) M diag(0, D^-1)
    dm[1:, 1:] = dinv[:, None] * meat[1:, 1:] * dinv[None, :]
    mz = meat @ z
    dmz = np.concatenate([[0.0], dinv * mz[1:]])
    out = dm + (np.outer(dmz, z) + np.outer(z, dmz)) / s + float(z @ mz) / s**2 * np.outer(z, z)
    return (out + out.T) / 2


# ---- from the decays to the channel and the models -------------------------------------------
def _rank_psd(c: np.ndarray) -> int:
    """Number of independent observations: eigenvalues above 1e-12 of the largest (as the
    models' whitening counts them)."""
    w = np.linalg.eigvalsh((c + c.T) / 2)
    return int(np.sum(w > 1e-12 * max(float(w.max()), 0.0)))


def _pinv_psd(c: np.ndarray) -> np.ndarray:
    w, u = np.linalg.eigh((c + c.T) / 2)
    keep = w > 1e-12 * max(float(w.max()), 0.0)
    return (u[:, keep] / w[keep]) @ u[:, keep].T


def _weighted_covariance(jac: np.ndarray, w_obs: np.ndarray, c_true: np.ndarray) -> np.ndarray:
    """Covariance of the weighted least-squares estimate ``argmin (y - J t)^T W (y - J t)``.

    ``(J^T W J)^+ J^T W C W J (J^T W J)^+`` for values ``y`` of covariance ``C``; it is the
    Gauss-Newton covariance ``(J^T C^+ J)^+`` when the weights are ``W = C^+``.
    """
    jw = jac.T @ w_obs
    h = jw @ jac
    hinv = np.linalg.pinv((h + h.T) / 2, rcond=1e-12, hermitian=True)
    out = hinv @ (jw @ c_true @ jw.T) @ hinv
    return (out + out.T) / 2


def _weight_noise_factor(nu: float, p: int, k: int) -> float:
    """Variance factor of a k-parameter weighted fit of ``p`` observations whose weight matrix
    is a covariance estimated with ``nu`` degrees of freedom: ``(nu - 1) / (nu - p + k - 1)``
    ("Least squares theory using an estimated dispersion matrix and its application to
    measurement of signals", Proc. Fifth Berkeley Symp. Math. Statist. Prob. 1, 355 (1967);
    from memory, checked by simulation in the tests).  1 when ``k = p`` (the weights then do
    not matter); ``inf`` when too few sequences leave the weights singular.
    """
    den = nu - p + k - 1
    return (nu - 1) / den if den > 0 else float("inf")


def _interleaved_effective_cov(c_int: np.ndarray, design: np.ndarray, cov_b_ref: np.ndarray, b_gate: np.ndarray,
                               gate_block: np.ndarray) -> np.ndarray:
    """True covariance of the values of ``L_G``'s observations, including the reference run.

    ``lambda_int = A vec(B_G K)`` with ``K = B_g B_L B_g^T``; an error ``dB_L`` of the reference
    estimate moves the implied values by ``A (B_G (x) I)(B_g (x) B_g) vec(dB_L)`` (row-major
    ``vec(X Y Z) = (X (x) Z^T) vec(Y)``), independent of the interleaved run's own noise.
    """
    dim = b_gate.shape[0]
    t = design @ np.kron(b_gate, np.eye(dim)) @ np.kron(gate_block, gate_block)
    out = c_int + t @ cov_b_ref @ t.T
    return (out + out.T) / 2


@dataclass(frozen=True)
class _Stage:
    """Everything downstream of the decay covariances for one (allocation, shots, cv)."""

    cov_ref: np.ndarray  # (P+1, P+1) of (c, lambdas), reference run
    cov_int: np.ndarray | None  # the same, interleaved run
    obs_main: LinearObservations  # what the product fits the channel and the models to
    c_true: np.ndarray  # (P, P) true covariance of obs_main.values
    w_obs: np.ndarray  # (P, P) the weights the product uses: pseudo-inverse of obs_main.covariance
    nu: float  # degrees of freedom of the covariance estimate behind those weights
    p_eff: int  # independent observations (rank of obs_main.covariance)
    cov_b: np.ndarray  # (DD, DD) of the reconstructed unital block


def _downstream(pil: _Pilots, cov_ref: np.ndarray, cov_int: np.ndarray | None, nu_ref: float,
                nu_int: float) -> _Stage:
    n = pil.n
    dim = 4**n - 1
    p = pil.probes.n_probes
    design = pil.probes.unital_blocks.reshape(p, -1) / dim
    c_ref = cov_ref[1:, 1:]
    w_ref = _pinv_psd(c_ref)
    p_ref = _rank_psd(c_ref)
    cov_b_ref = _weighted_covariance(design, w_ref, c_ref) * _weight_noise_factor(nu_ref, p_ref, dim * dim)
    if pil.inter is None:
        obs = LinearObservations(n, design, pil.ref.lambdas.copy(), c_ref, pil.probes.labels)
        return _Stage(cov_ref, None, obs, c_ref, w_ref, nu_ref, p_ref, cov_b_ref)
    from robusttomo.reconstruct import gate_error_observations

    assert cov_int is not None and pil.b_gate is not None and pil.gate is not None
    ref_channel = Channel(_ptm_from_block(pil.b_ref), _trusted=True)
    gate_block = _pauli.ptm_of_unitary(pil.gate.unitary)[1:, 1:]
    c_int = cov_int[1:, 1:]
    c_eff = _interleaved_effective_cov(c_int, design, cov_b_ref, pil.b_gate, gate_block)
    # the product weights L_G's observations by the interleaved run's covariance alone
    comp = LinearObservations(n, design, pil.inter.lambdas.copy(), c_int, pil.probes.labels)
    obs = gate_error_observations(comp, ref_channel, pil.gate.unitary)
    w = _pinv_psd(c_int)
    p_int = _rank_psd(c_int)
    cov_b = _weighted_covariance(np.asarray(obs.design), w, c_eff) * _weight_noise_factor(nu_int, p_int, dim * dim)
    return _Stage(cov_ref, cov_int, obs, c_eff, w, nu_int, p_int, cov_b)


def _ptm_from_block(block: np.ndarray) -> np.ndarray:
    ptm = np.zeros((block.shape[0] + 1,) * 2)
    ptm[0, 0] = 1.0
    ptm[1:, 1:] = block
    return ptm


def _agf_gradient(n: int) -> np.ndarray:
    """``d F_avg / d vec(B)`` with ``F_avg = ((1 + tr B)/d + 1)/(d + 1)``."""
    d = 2**n
    return np.eye(4**n - 1).reshape(-1) / (d * (d + 1))


def _main_block(pil: _Pilots) -> np.ndarray:
    return pil.b_ref if pil.b_gate is None else pil.b_gate


def _figure_values(pil: _Pilots) -> dict[str, float]:
    d = 2**pil.n
    ident = pil.probes.identity_index
    p_ref = float(pil.ref.lambdas[ident])
    b = _main_block(pil)
    out = {"decay_fidelity": 1 - (d - 1) * (1 - p_ref) / d,
           "average_gate_fidelity": ((1 + np.trace(b)) / d + 1) / (d + 1)}
    if pil.inter is not None:
        p_int = float(pil.inter.lambdas[ident])
        out["classic_interleaved_error"] = (d - 1) * (1 - p_int / p_ref) / d
    return out


def _simple_stderrs(pil: _Pilots, st: _Stage) -> dict[str, float]:
    """Standard errors of the figures that follow linearly from the covariances."""
    n = pil.n
    d = 2**n
    ident = pil.probes.identity_index
    c_ref = st.cov_ref[1:, 1:]
    g = _agf_gradient(n)
    out = {
        "decay_fidelity": (d - 1) / d * math.sqrt(max(c_ref[ident, ident], 0.0)),
        "average_gate_fidelity": math.sqrt(max(float(g @ st.cov_b @ g), 0.0)),
        "lambdas": float(np.sqrt(np.clip(np.diag(c_ref), 0.0, None)).max()),
        "unital_block": math.sqrt(max(float(np.trace(st.cov_b)), 0.0)),
        _models.FULL: float(np.sqrt(np.clip(np.diag(st.cov_b), 0.0, None)).max()),
    }
    if st.cov_int is not None and pil.inter is not None:
        c_int = st.cov_int[1:, 1:]
        p_ref, p_int = float(pil.ref.lambdas[ident]), float(pil.inter.lambdas[ident])
        out["interleaved_lambdas"] = float(np.sqrt(np.clip(np.diag(c_int), 0.0, None)).max())
        # r = (d-1)(1 - p_int/p_ref)/d, the two runs independent
        var = ((d - 1) / d) ** 2 * (c_int[ident, ident] / p_ref**2 + p_int**2 * c_ref[ident, ident] / p_ref**4)
        out["classic_interleaved_error"] = math.sqrt(max(var, 0.0))
    return out


def _model_jacobian(name: str, n: int, values: np.ndarray) -> np.ndarray:
    """``d vec(B) / d theta`` of a model at its parameters ``values``, ``(D*D, k)``."""
    dim = 4**n - 1
    if name == _models.FULL:
        return np.eye(dim * dim)
    if name == _models.PAULI:
        e = np.zeros((dim * dim, dim))
        e[np.arange(dim) * (dim + 1), :] = -2.0 * _models._anticommutation(n)
        return e
    basis, _, _ = _models._generator_parts(n, name == _models.COHERENT_STOCHASTIC)
    return _models._expm_and_jacobian(basis, values)[1]


# ---- validation --------------------------------------------------------------------------------
def _check_device(device: object, n: int) -> Device:
    if not isinstance(device, Device):
        raise TypeError(f"'device' must be a robusttomo Device (e.g. from assumed_device or Device.build); "
                        f"got {type(device).__name__}")
    if device.n_qubits != n:
        raise ValueError(f"'device' has {device.n_qubits} qubit(s) but the plan has {n}; build it for {n}")
    return device


def _check_probes(probes: object, n: int) -> ProbeSet:
    if probes is None:
        return default_probes(n)
    if not isinstance(probes, ProbeSet):
        raise TypeError(f"'probes' must be a ProbeSet or None; got {type(probes).__name__}")
    if probes.n_qubits != n:
        raise ValueError(f"'probes' are for {probes.n_qubits} qubit(s) but the plan has {n}")
    if probes.identity_index is None:
        raise ValueError("'probes' must include the identity probe (the fidelity is its decay)")
    if not math.isfinite(probes.condition_number):
        raise ValueError("'probes' must span the unital block (their condition number is infinite); "
                         "use default_probes or add probes")
    return probes


def _plan_layout(plan: Plan) -> tuple[dict[int, int], dict[int, int]]:
    ref = {b.length: b.n_sequences for b in plan.blocks if b.kind is SequenceKind.REFERENCE}
    inter = {b.length: b.n_sequences for b in plan.blocks if b.kind is SequenceKind.INTERLEAVED}
    for name, lay in (("reference", ref), ("interleaved", inter)):
        if lay and not {1, 2} <= set(lay):
            raise ValueError(f"the plan's {name} lengths {sorted(lay)} must include 1 and 2 (length 1 fixes the "
                             "SPAM constant, length 2 the fast probes); make the plan with make_plan")
    if not ref:
        raise ValueError("the plan has no reference sequences; predict needs them (make an interleaved plan "
                         "with include_reference=True)")
    return ref, inter


# ---- predict ----------------------------------------------------------------------------------
def predict(plan: Plan, device: Device, *, seed: int = 0, pilot_sequences: int | None = None,
            probes: ProbeSet | None = None, costs: Mapping[str, float] | None = None) -> Prediction:
    """Predict the standard errors a plan will deliver on an assumed device.

    The between-sequence part of every per-length variance is simulated on ``pilot_sequences``
    fresh random sequences per length in exact-probabilities mode, the shot-noise part is
    computed analytically from the exact outcome probabilities, and both are propagated
    through the decay fit's sandwich formula to the decays and then to the channel and the
    models (module docstring).  Every figure is given with the control variate (as the
    product runs) and without it.

    Parameters
    ----------
    plan : Plan
        The plan; its reference blocks must include lengths 1 and 2.  An interleaved plan must
        hold its reference blocks too (``make_plan(..., include_reference=True)``).
    device : Device
        The assumed device (:func:`assumed_device` builds one from an average error and a SPAM
        level).  With gate-independent noise the decays are computed exactly; otherwise the
        pilot's fitted decays serve as the linearization point.
    seed : int, default 0
        Seed of the pilot sequences (the prediction does not use the plan's own sequences: it
        is the error expected over random plans of this size).
    pilot_sequences : int, optional
        Pilot sequences at each length up to 3; default ``max(1000, 10 * number of probes)``
        (1000 for one qubit, 2250 for two).  Longer lengths, which carry only the slowly
        decaying probes, get a quarter of that (at least 400).
    probes : ProbeSet, optional
        Probe set of the analysis; default :func:`robusttomo.estimate.default_probes`.
    costs : mapping, optional
        ``{"seconds_per_shot": ..., "seconds_per_sequence": ...}`` for the device-time
        estimate (:func:`device_seconds`).

    Returns
    -------
    Prediction

    Examples
    --------
    >>> from robusttomo.plan import make_plan
    >>> plan = make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=100, shots=100, seed=1)
    >>> dev = assumed_device(1, average_error=0.01, readout_error=0.02)
    >>> pred = predict(plan, dev, pilot_sequences=200)
    >>> 1e-4 < pred.stderr("decay_fidelity") < 1e-2
    True
    """
    if not isinstance(plan, Plan):
        raise TypeError(f"'plan' must be a robusttomo Plan; got {type(plan).__name__}")
    n = plan.n_qubits
    device = _check_device(device, n)
    prb = _check_probes(probes, n)
    seed_v = _check_seed(seed)
    k_pilot = _check_pilot(pilot_sequences, prb.n_probes)
    t_cost = None if costs is None else _check_costs(costs)
    ref_lay, int_lay = _plan_layout(plan)
    gate = plan.interleave if int_lay else None
    pil = _make_pilots(n, device, prb, gate, sorted(ref_lay), sorted(int_lay), k_pilot, seed_v)
    seconds = float("nan") if t_cost is None else float(plan.n_sequences * (t_cost[1] + plan.shots * t_cost[0]))
    return _prediction(pil, ref_lay, int_lay, plan.shots, plan.fingerprint, seconds)


def _prediction(pil: _Pilots, ref_lay: Mapping[int, int], int_lay: Mapping[int, int], shots: int,
                fingerprint: str, seconds: float) -> Prediction:
    n = pil.n
    stages = {}
    for cv in (True, False):
        cov_ref = _lambda_covariance(pil.ref, ref_lay, shots, cv)
        cov_int = None if pil.inter is None else _lambda_covariance(pil.inter, int_lay, shots, cv)
        stages[cv] = _downstream(pil, cov_ref, cov_int, ref_lay[2] - 1.0, int_lay.get(2, 2) - 1.0)
    values = _figure_values(pil)
    se = {cv: _simple_stderrs(pil, stages[cv]) for cv in (True, False)}
    warn: list[str] = []
    models = []
    factors: dict[str, float] = {}
    for name in _MODEL_ORDER:
        mp = _model_prediction(name, stages, pil, warn, factors)
        models.append(mp)
        for cv in (True, False):
            se[cv].setdefault(name, float(np.max(mp.stderr if cv else mp.stderr_without_cv)))
    big = {k: f for k, f in factors.items() if f > 1.02}
    if big:
        st = stages[True]
        warn.append(f"the reduced-model fits weight the {st.p_eff} independent observations by a covariance the "
                    f"run estimates from {st.nu + 1:.0f} length-2 sequences; the noise of that estimate raises their "
                    "parameter variances by " + ", ".join(f"{f:.3g} ({k})" for k, f in big.items())
                    + " (included); more length-2 sequences reduce it")
    names = [k for k in FIGURE_NAMES if pil.inter is not None or k not in _INTERLEAVED_ONLY]
    desc = dict(FIGURE_NAMES)
    if pil.inter is not None:
        for k in ("average_gate_fidelity", "unital_block", *_MODEL_ORDER):
            desc[k] = desc[k] + f" of the isolated gate {pil.gate.label!r}"  # type: ignore[union-attr]
    figures = tuple(PredictedFigure(k, desc[k], float(values.get(k, float("nan"))), float(se[True][k]),
                                    float(se[False][k])) for k in names)
    for kind, lay in (("reference", ref_lay), ("interleaved", int_lay)):
        small = sorted(m for m, k in lay.items() if k < _fit.MIN_SEQUENCES)
        if small:
            warn.append(f"{kind} lengths {small} have fewer than {_fit.MIN_SEQUENCES} sequences: the spread will "
                        "exceed the prediction and the reported errors will be unreliable")
    lam_se = {cv: np.sqrt(np.clip(np.diag(stages[cv].cov_ref)[1:], 0.0, None)) for cv in (True, False)}
    int_se = {cv: (None if stages[cv].cov_int is None else np.sqrt(np.clip(np.diag(stages[cv].cov_int)[1:], 0.0, None)))
              for cv in (True, False)}
    for run, ses in ((pil.ref, lam_se), (pil.inter, int_se)):
        if run is None:
            continue
        for cv, label in ((True, ""), (False, " without the control variate")):
            near = np.flatnonzero(np.abs(run.lambdas) + 2.0 * ses[cv] > 1.0)
            if near.size:
                which = ", ".join(repr(pil.probes.labels[i]) for i in near[:3]) + (", ..." if near.size > 3 else "")
                warn.append(f"{run.kind.value} run{label}: the decay of probe(s) {which} lies within two standard "
                            "errors of 1, where the fit clips it; its spread (and the fidelity's) will be smaller "
                            "than predicted")
    blocks = tuple([("reference", m, int(k)) for m, k in sorted(ref_lay.items())]
                   + [("interleaved", m, int(k)) for m, k in sorted(int_lay.items())])
    return Prediction(
        n_qubits=n, mode="interleaved" if pil.inter is not None else "reference",
        gate_label=None if pil.gate is None else pil.gate.label, plan_fingerprint=fingerprint,
        device_fingerprint=pil.device.fingerprint, shots=int(shots), blocks=blocks,
        pilot_sequences=pil.pilot_sequences, seed=pil.seed, figures=figures, probe_labels=pil.probes.labels,
        lambdas=pil.ref.lambdas.copy(), lambda_stderr=lam_se[True], lambda_stderr_without_cv=lam_se[False],
        interleaved_lambdas=None if pil.inter is None else pil.inter.lambdas.copy(),
        interleaved_lambda_stderr=int_se[True], interleaved_lambda_stderr_without_cv=int_se[False],
        lambda_covariance=stages[True].cov_ref[1:, 1:].copy(), unital_block_covariance=stages[True].cov_b.copy(),
        models=tuple(models), variances=_variances(pil, ref_lay, int_lay), device_seconds=seconds,
        warnings=tuple(warn))


def _model_prediction(name: str, stages: Mapping[bool, _Stage], pil: _Pilots, warn: list[str],
                      factors: dict[str, float]) -> ModelPrediction:
    n = pil.n
    dim = 4**n - 1
    if name == _models.FULL:
        labels = tuple(f"B[{i},{j}]" for i in range(dim) for j in range(dim))
        vals = _main_block(pil).reshape(-1).copy()
        se = {cv: np.sqrt(np.clip(np.diag(stages[cv].cov_b), 0.0, None)) for cv in (True, False)}
        return ModelPrediction(name, labels, vals, se[True], se[False], 0.0, np.zeros(vals.size, dtype=bool))
    se = {}
    for cv in (True, False):
        st = stages[cv]
        try:
            fit = _MODEL_FITS[name](st.obs_main)
        except (ValueError, RuntimeError, np.linalg.LinAlgError) as exc:
            warn.append(f"model {name!r} could not be fitted to the predicted observations ({exc}); no prediction")
            labels = (tuple(f"p:{q}" for q in _pauli.pauli_labels(n)[1:]) if name == _models.PAULI
                      else _models._generator_parts(n, name == _models.COHERENT_STOCHASTIC)[1])
            nan = np.full(len(labels), np.nan)
            return ModelPrediction(name, labels, nan, nan, nan.copy(), float("nan"), np.zeros(nan.size, dtype=bool))
        theta = np.array(list(fit.parameters.values()))
        jac = np.asarray(st.obs_main.design) @ _model_jacobian(name, n, theta)
        factor = _weight_noise_factor(st.nu, st.p_eff, theta.size)
        cov = _weighted_covariance(jac, st.w_obs, st.c_true) * factor
        s_cv = np.sqrt(np.clip(np.diag(cov), 0.0, None))
        s_cv[~np.isfinite(np.array(list(fit.standard_errors.values())))] = np.inf
        se[cv] = s_cv
        if cv:
            labels = tuple(fit.parameters)
            vals, chi2 = theta, float(fit.chi2)
            factors[name] = factor
    nonneg = np.array([not lab.startswith("H:") for lab in labels], dtype=bool)
    near = nonneg & (vals < 2.0 * se[True])
    if near.any():
        warn.append(f"model {name!r}: {int(near.sum())} non-negative parameter(s) lie within two standard errors "
                    f"of 0 ({', '.join(np.array(labels)[near][:4])}{', ...' if near.sum() > 4 else ''}): their "
                    "estimates will often sit at 0, where the spread is smaller than predicted; add data")
    if chi2 > max(1.0, float(len(labels))):
        warn.append(f"model {name!r} does not describe the assumed device (misfit chi2 {chi2:.3g} in units of the "
                    "predicted noise): the spread of its parameters also depends on noise in the fitted weights "
                    "and is not predicted reliably")
    return ModelPrediction(name, labels, vals, se[True], se[False], chi2, near)


def _variances(pil: _Pilots, ref_lay: Mapping[int, int], int_lay: Mapping[int, int]) -> tuple[LengthVariance, ...]:
    out = []
    ident = pil.probes.identity_index
    dim = 4**pil.n - 1
    design = pil.probes.unital_blocks.reshape(pil.probes.n_probes, -1) / dim
    ainv = np.linalg.pinv(design)
    for run, lay in ((pil.ref, ref_lay), (pil.inter, int_lay)):
        if run is None:
            continue
        rname = run.kind.value
        for m in sorted(lay):
            st = run.stats[m]
            q = 0 if m == 1 else int(np.flatnonzero(st.probes == ident)[0])
            out.append(LengthVariance(rname, "identity probe", m, int(lay[m]), float(st.between[q, q]),
                                      float(st.between_raw[q, q]), float(st.shot[q, q])))
        if 2 in lay:
            st = run.stats[2]
            tr = [float(np.trace(ainv @ x @ ainv.T)) / run.c**2 for x in (st.between, st.between_raw, st.shot)]
            out.append(LengthVariance(rname, "unital block", 2, int(lay[2]), *tr))
    return tuple(out)


# ---- table --------------------------------------------------------------------------------------
def _fmt(x: float, spec: str = ".3g") -> str:
    return "-" if not math.isfinite(x) else format(x, spec)


def format_prediction(prediction: Prediction) -> str:
    """The prediction as a plain-text table (figures, then the between / shot variance split).

    Parameters
    ----------
    prediction : Prediction

    Returns
    -------
    str
        Lines separated by ``"\\n"``, no trailing newline.
    """
    if not isinstance(prediction, Prediction):
        raise TypeError(f"'prediction' must be a Prediction; got {type(prediction).__name__}")
    p = prediction
    nseq = sum(b[2] for b in p.blocks)
    lines = [f"Predicted precision: {p.n_qubits}-qubit {p.mode} plan {p.plan_fingerprint[:12]}"
             + (f" (gate {p.gate_label!r})" if p.gate_label else "")
             + f", {nseq} sequences x {p.shots} shots",
             f"assumed device {p.device_fingerprint[:12]}; pilot of {p.pilot_sequences} sequences per length "
             f"(seed {p.seed})"]
    if math.isfinite(p.device_seconds):
        lines.append(f"device time: {p.device_seconds:.4g} s ({p.device_seconds / 3600:.3g} h)")
    lines.append("")
    head = f"{'figure':<26} {'value':>10} {'std. error':>11} {'without CV':>11} {'time x without CV':>18}"
    lines += [head, "-" * len(head)]
    for f in p.figures:
        lines.append(f"{f.name:<26} {_fmt(f.value, '.6g'):>10} {_fmt(f.stderr):>11} {_fmt(f.stderr_without_cv):>11} "
                     f"{_fmt(f.cost_factor_without_cv, '.3g'):>18}")
    lines += ["", "Variance per sequence = between + shot / shots; between: simulated (exact probabilities of the "
              "pilot), shot: analytic (multinomial)"]
    head = f"{'run':<12} {'quantity':<15} {'m':>4} {'sequences':>9} {'between (CV)':>13} {'between (no CV)':>16} " \
           f"{'shot':>10} {'shot/shots':>11}"
    lines += [head, "-" * len(head)]
    for v in p.variances:
        lines.append(f"{v.run:<12} {v.quantity:<15} {v.length:>4} {v.n_sequences:>9} {_fmt(v.between):>13} "
                     f"{_fmt(v.between_without_cv):>16} {_fmt(v.shot):>10} {_fmt(v.shot / p.shots):>11}")
    if p.warnings:
        lines += ["", "Cautions:"] + [f"- {w}" for w in p.warnings]
    return "\n".join(lines)


# ---- storage in the plan file ---------------------------------------------------------------
_GROUP = "prediction"


def attach_prediction(plan_path: str | os.PathLike[str], prediction: Prediction, *, force: bool = False) -> Path:
    """Store a prediction in an existing plan HDF5 file, as the group ``"prediction"``.

    The file is copied to a temporary file beside it, the group is added there, the copy is
    checked to load as the same plan, and it is renamed onto the original (atomic).  The plan's
    fingerprint covers the plan content only, so it is unchanged.  Layout: group attributes
    ``schema_version`` (1), ``kind`` = ``"robusttomo-prediction"``, ``plan_fingerprint``,
    ``package_version``; dataset ``summary`` (UTF-8 JSON of :meth:`Prediction.as_dict`);
    datasets ``lambda_covariance`` ``(P, P)`` and ``unital_block_covariance`` ``(D*D, D*D)``
    (float64).

    Parameters
    ----------
    plan_path : str or path-like
        A plan file written by :func:`robusttomo.plan.save_plan`.
    prediction : Prediction
        Must have been made for this plan (same fingerprint).
    force : bool, default False
        Replace a prediction the file already holds (otherwise FileExistsError).

    Returns
    -------
    Path
    """
    from robusttomo.plan import load_plan

    if not isinstance(prediction, Prediction):
        raise TypeError(f"'prediction' must be a Prediction; got {type(prediction).__name__}")
    if not isinstance(plan_path, (str, os.PathLike)):
        raise TypeError(f"'plan_path' must be a path; got {type(plan_path).__name__}")
    path = Path(plan_path)
    plan = load_plan(path)
    if plan.fingerprint != prediction.plan_fingerprint:
        raise ValueError(f"{path}: the prediction was made for plan {prediction.plan_fingerprint[:12]}..., not for "
                         f"this plan {plan.fingerprint[:12]}...; run predict on this plan")
    with h5py.File(path, "r") as f:
        if _GROUP in f and not force:
            raise FileExistsError(f"{path}: already holds a prediction; pass force=True (--force) to replace it")
    with _io.atomic_path(path, force=True) as tmp:
        shutil.copyfile(path, tmp)
        with h5py.File(tmp, "r+") as f:
            if _GROUP in f:
                del f[_GROUP]
            g = f.create_group(_GROUP)
            g.attrs["schema_version"] = np.int64(1)
            g.attrs["kind"] = _KIND
            g.attrs["plan_fingerprint"] = prediction.plan_fingerprint
            g.attrs["package_version"] = __version__
            g.create_dataset("summary", data=json.dumps(prediction.as_dict(), allow_nan=False),
                             dtype=h5py.string_dtype(encoding="utf-8"))
            g.create_dataset("lambda_covariance", data=prediction.lambda_covariance, dtype="<f8")
            g.create_dataset("unital_block_covariance", data=prediction.unital_block_covariance, dtype="<f8")
        if load_plan(tmp).fingerprint != plan.fingerprint:  # never replace a plan by a different one
            raise RuntimeError(f"{path}: the copy with the prediction no longer loads as the same plan; nothing written")
    return path


def load_prediction(plan_path: str | os.PathLike[str]) -> Prediction:
    """Read the prediction stored in a plan file by :func:`attach_prediction`.

    Raises
    ------
    DataError
        If the file is missing or not HDF5, holds no prediction, has an unsupported
        ``schema_version``, a prediction for another plan, or a malformed field (named).
    """
    if not isinstance(plan_path, (str, os.PathLike)):
        raise TypeError(f"'plan_path' must be a path; got {type(plan_path).__name__}")
    p = Path(plan_path)
    if not p.is_file():
        raise DataError(f"{p}: plan file does not exist (or is not a file)")
    try:
        f = h5py.File(p, "r")
    except OSError:
        raise DataError(f"{p}: not an HDF5 file; expected a robusttomo plan file") from None
    with f:
        g = f.get(_GROUP)
        if not isinstance(g, h5py.Group):
            raise DataError(f"{p}: holds no group 'prediction'; add one with attach_prediction "
                            "(robusttomo plan ... --predict)")
        _io.check_schema(p, g.attrs.get("schema_version"), kind="prediction", supported=_SCHEMAS)
        kind = g.attrs.get("kind")
        kind = kind.decode() if isinstance(kind, bytes) else kind
        if kind != _KIND:
            raise DataError(f"{p}: attribute 'kind' of group 'prediction' is {kind!r:.40}, not {_KIND!r}")
        fp_plan = f.attrs.get("fingerprint")
        fp_plan = fp_plan.decode() if isinstance(fp_plan, bytes) else fp_plan
        fp_pred = g.attrs.get("plan_fingerprint")
        fp_pred = fp_pred.decode() if isinstance(fp_pred, bytes) else fp_pred
        if fp_plan != fp_pred:
            raise DataError(f"{p}: attribute 'plan_fingerprint' of group 'prediction' does not match the plan's "
                            "fingerprint; the prediction belongs to another plan")
        try:
            doc = json.loads(g["summary"].asstr()[()])
            lam_cov = np.asarray(g["lambda_covariance"][()], dtype=float)
            b_cov = np.asarray(g["unital_block_covariance"][()], dtype=float)
        except (KeyError, TypeError, ValueError, OSError) as exc:
            raise DataError(f"{p}: group 'prediction' is damaged ({type(exc).__name__}: {exc})") from None
    try:
        return _prediction_from_dict(doc, lam_cov, b_cov)
    except (KeyError, TypeError, ValueError) as exc:
        raise DataError(f"{p}: dataset 'summary' of group 'prediction': {exc}") from None


def _arr(doc: Mapping[str, object], key: str, size: int | None = None, *, dtype: type = float) -> np.ndarray:
    raw = doc[key]
    if not isinstance(raw, list):
        raise ValueError(f"field {key!r} must be a list; got {type(raw).__name__}")
    a = np.array([np.nan if v is None else v for v in raw], dtype=dtype)
    if a.ndim != 1 or (size is not None and a.size != size):
        raise ValueError(f"field {key!r} must be a list of {size} numbers; got shape {a.shape}")
    return a


def _opt_arr(doc: Mapping[str, object], key: str, size: int) -> np.ndarray | None:
    return None if doc.get(key) is None else _arr(doc, key, size)


def _f(x: object) -> float:
    if x is None:
        return float("nan")
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        raise ValueError(f"expected a number; got {x!r:.40}")
    return float(x)


def _prediction_from_dict(doc: object, lam_cov: np.ndarray, b_cov: np.ndarray) -> Prediction:
    if not isinstance(doc, dict):
        raise ValueError("must be a JSON object")
    if doc.get("kind") != _KIND:
        raise ValueError(f"field 'kind' must be {_KIND!r}")
    n = _pauli.check_n_qubits(doc["n_qubits"], name="n_qubits")
    labels = tuple(str(x) for x in doc["probe_labels"])  # type: ignore[union-attr]
    p = len(labels)
    dd = (4**n - 1) ** 2
    if lam_cov.shape != (p, p) or b_cov.shape != (dd, dd):
        raise ValueError(f"covariances must have shapes ({p}, {p}) and ({dd}, {dd}); got {lam_cov.shape}, {b_cov.shape}")
    figures = tuple(PredictedFigure(str(f["name"]), str(f["description"]), _f(f["value"]), _f(f["stderr"]),
                                    _f(f["stderr_without_cv"])) for f in doc["figures"])  # type: ignore[union-attr]
    models = []
    for m in doc["models"]:  # type: ignore[union-attr]
        k = len(m["labels"])
        models.append(ModelPrediction(str(m["name"]), tuple(str(x) for x in m["labels"]), _arr(m, "values", k),
                                      _arr(m, "stderr", k), _arr(m, "stderr_without_cv", k), _f(m["misfit_chi2"]),
                                      _arr(m, "near_bound", k, dtype=bool)))
    variances = tuple(LengthVariance(str(v["run"]), str(v["quantity"]), int(v["length"]), int(v["n_sequences"]),
                                     _f(v["between"]), _f(v["between_without_cv"]), _f(v["shot"]))
                      for v in doc["variances"])  # type: ignore[union-attr]
    blocks = tuple((str(b[0]), int(b[1]), int(b[2])) for b in doc["blocks"])  # type: ignore[union-attr]
    mode = str(doc["mode"])
    if mode not in ("reference", "interleaved"):
        raise ValueError(f"field 'mode' must be 'reference' or 'interleaved'; got {mode!r:.40}")
    return Prediction(
        n_qubits=n, mode=mode, gate_label=None if doc["gate_label"] is None else str(doc["gate_label"]),
        plan_fingerprint=str(doc["plan_fingerprint"]), device_fingerprint=str(doc["device_fingerprint"]),
        shots=int(doc["shots"]), blocks=blocks, pilot_sequences=int(doc["pilot_sequences"]),  # type: ignore[call-overload]
        seed=int(doc["seed"]), figures=figures, probe_labels=labels,  # type: ignore[call-overload]
        lambdas=_arr(doc, "lambdas", p), lambda_stderr=_arr(doc, "lambda_stderr", p),
        lambda_stderr_without_cv=_arr(doc, "lambda_stderr_without_cv", p),
        interleaved_lambdas=_opt_arr(doc, "interleaved_lambdas", p),
        interleaved_lambda_stderr=_opt_arr(doc, "interleaved_lambda_stderr", p),
        interleaved_lambda_stderr_without_cv=_opt_arr(doc, "interleaved_lambda_stderr_without_cv", p),
        lambda_covariance=lam_cov, unital_block_covariance=b_cov, models=tuple(models), variances=variances,
        device_seconds=_f(doc["device_seconds"]), warnings=tuple(str(w) for w in doc["warnings"]))  # type: ignore[union-attr]


# ---- the fast evaluator used by the plan search ---------------------------------------------------
def _cho_inv(a: np.ndarray) -> np.ndarray:
    """Inverse of a symmetric positive definite matrix (pseudo-inverse if it is singular)."""
    try:
        return scipy.linalg.cho_solve(scipy.linalg.cho_factor((a + a.T) / 2), np.eye(a.shape[0]))
    except (np.linalg.LinAlgError, ValueError):
        return _pinv_psd(a)


@dataclass(frozen=True)
class _Fast:
    """Standard errors of chosen figures for any allocation, from fixed pilot statistics.

    The algebra of :func:`_prediction` with the models' Jacobians frozen at their noise-free
    fits (tests check it against :func:`_prediction`); both runs of an interleaved plan share
    the allocation.  With a square, invertible probe design (the default probe sets) the
    unital-block estimate is ``b = M_ref y_ref + M_int y_int`` for fixed matrices, so every
    figure of ``b`` is a quadratic form in the two decay covariances, precomputed here.
    """

    pil: _Pilots
    names: tuple[str, ...]
    jacobians: Mapping[str, np.ndarray]  # d(values)/d(theta) of each targeted model, (P, k)
    design: np.ndarray
    main_design: np.ndarray
    gate_t: np.ndarray | None  # maps dvec(B_L) to the interleaved values' shift (interleaved mode)
    maps: tuple[np.ndarray, np.ndarray | None] | None  # (M_ref, M_int), None for a non-square design
    reduce: Mapping[str, tuple[np.ndarray, ...]]  # per figure of b: precomputed vectors/matrices
    p_eff: int  # independent observations of the fits (rank of their covariance at the nominal sizes)

    def deficiency(self, name: str) -> int:
        """``p - k`` of the weighted fit behind a figure (0 when its weights do not matter)."""
        if name in self.jacobians:
            return self.p_eff - self.jacobians[name].shape[1]
        if name in ("average_gate_fidelity", "unital_block", _models.FULL):
            return max(self.p_eff - (4**self.pil.n - 1) ** 2, 0)
        return 0

    def stderrs(self, alloc: Mapping[int, float], shots: float, cv: bool, *, weights_noise: bool = True
                ) -> dict[str, float]:
        """Standard errors; ``weights_noise=False`` leaves out :func:`_weight_noise_factor`,
        which depends on the absolute number of length-2 sequences (the search scales it in)."""
        pil = self.pil
        n = pil.n
        d = 2**n
        p = pil.probes.n_probes
        dd = (4**n - 1) ** 2
        ident = pil.probes.identity_index
        cov_ref = _fast_lambda_covariance(pil.ref, alloc, shots, cv)
        c_ref = cov_ref[1:, 1:]
        out: dict[str, float] = {}
        if "decay_fidelity" in self.names:
            out["decay_fidelity"] = (d - 1) / d * math.sqrt(max(c_ref[ident, ident], 0.0))
        if "lambdas" in self.names:
            out["lambdas"] = float(np.sqrt(np.clip(np.diag(c_ref), 0.0, None)).max())
        c_int = None
        if pil.inter is not None and any(k not in ("decay_fidelity", "lambdas") for k in self.names):
            c_int = _fast_lambda_covariance(pil.inter, alloc, shots, cv)[1:, 1:]
            p_ref, p_int = float(pil.ref.lambdas[ident]), float(pil.inter.lambdas[ident])
            if "interleaved_lambdas" in self.names:
                out["interleaved_lambdas"] = float(np.sqrt(np.clip(np.diag(c_int), 0.0, None)).max())
            if "classic_interleaved_error" in self.names:
                var = ((d - 1) / d) ** 2 * (c_int[ident, ident] / p_ref**2
                                            + p_int**2 * c_ref[ident, ident] / p_ref**4)
                out["classic_interleaved_error"] = math.sqrt(max(var, 0.0))
        rest = [k for k in self.names if k not in out]
        if not rest:
            return out
        nu = alloc[2] - 1.0

        def factor(k: int) -> float:
            return _weight_noise_factor(nu, self.p_eff, k) if weights_noise else 1.0

        if self.maps is None:
            return {**out, **self._general(rest, c_ref, c_int, factor)}
        m_ref, m_int = self.maps
        covs = [c_ref] if c_int is None else [c_ref, c_int]  # in the order of the maps
        for k in rest:
            if k == "average_gate_fidelity":
                var = sum(float(u @ c @ u) for u, c in zip(self.reduce[k], covs))
                out[k] = math.sqrt(max(var, 0.0) * factor(dd))
            elif k == "unital_block":
                var = sum(float(np.sum(q * c)) for q, c in zip(self.reduce[k], covs))
                out[k] = math.sqrt(max(var, 0.0) * factor(dd))
            elif k == _models.FULL:
                diag = np.einsum("ij,ij->i", m_ref @ c_ref, m_ref)
                if c_int is not None:
                    diag = diag + np.einsum("ij,ij->i", m_int @ c_int, m_int)
                out[k] = float(np.sqrt(np.clip(diag, 0.0, None) * factor(dd)).max())
        models = [k for k in rest if k in self.jacobians]
        if models:
            c_obs = c_ref if c_int is None else c_int
            cf = scipy.linalg.cho_factor(c_obs)
            for k in models:
                jac = self.jacobians[k]
                v = scipy.linalg.cho_solve(cf, jac)  # W J
                hinv = _cho_inv(jac.T @ v)
                if c_int is None:
                    cov = hinv
                else:  # the true covariance adds the reference run's: R = A^-T T^T
                    (r,) = self.reduce["sandwich"]
                    rv = r @ v
                    cov = hinv @ (v.T @ c_int @ v + rv.T @ c_ref @ rv) @ hinv
                out[k] = float(np.sqrt(np.clip(np.diag(cov), 0.0, None) * factor(jac.shape[1])).max())
        return out

    def _general(self, names: Sequence[str], c_ref: np.ndarray, c_int: np.ndarray | None, factor) -> dict[str, float]:
        """Any probe design: weighted least squares with the product's weights."""
        n = self.pil.n
        dd = (4**n - 1) ** 2
        # the covariances of a redundant probe set are singular: pseudo-inverses, as the fits use
        w_ref = _pinv_psd(c_ref)
        cov_b_ref = _weighted_covariance(self.design, w_ref, c_ref) * factor(dd)
        if c_int is None:
            w_obs, c_true, cov_b = w_ref, c_ref, cov_b_ref
        else:
            assert self.gate_t is not None
            c_true = c_int + self.gate_t @ cov_b_ref @ self.gate_t.T
            w_obs = _pinv_psd(c_int)
            cov_b = _weighted_covariance(self.main_design, w_obs, c_true) * factor(dd)
        out = {}
        for k in names:
            if k == "average_gate_fidelity":
                g = _agf_gradient(n)
                out[k] = math.sqrt(max(float(g @ cov_b @ g), 0.0))
            elif k == "unital_block":
                out[k] = math.sqrt(max(float(np.trace(cov_b)), 0.0))
            elif k == _models.FULL:
                out[k] = float(np.sqrt(np.clip(np.diag(cov_b), 0.0, None)).max())
            elif k in self.jacobians:
                jac = self.jacobians[k]
                cov = _weighted_covariance(jac, w_obs, c_true) * factor(jac.shape[1])
                out[k] = float(np.sqrt(np.clip(np.diag(cov), 0.0, None)).max())
        return out


def _make_fast(pil: _Pilots, names: Sequence[str], nominal: Mapping[int, float], shots: float) -> _Fast:
    n = pil.n
    dim = 4**n - 1
    p = pil.probes.n_probes
    design = pil.probes.unital_blocks.reshape(p, -1) / dim
    jac: dict[str, np.ndarray] = {}
    wanted = [k for k in names if k in _MODEL_FITS]
    cov_ref = _lambda_covariance(pil.ref, nominal, shots, True)
    cov_int = None if pil.inter is None else _lambda_covariance(pil.inter, nominal, shots, True)
    stage = _downstream(pil, cov_ref, cov_int, nominal[2] - 1.0, nominal[2] - 1.0)
    main_design = np.asarray(stage.obs_main.design)
    for k in wanted:
        fit = _MODEL_FITS[k](stage.obs_main)
        jac[k] = main_design @ _model_jacobian(k, n, np.array(list(fit.parameters.values())))
    gate_t = None
    if pil.inter is not None:
        assert pil.b_gate is not None and pil.gate is not None
        gb = _pauli.ptm_of_unitary(pil.gate.unitary)[1:, 1:]
        gate_t = design @ np.kron(pil.b_gate, np.eye(dim)) @ np.kron(gb, gb)
    maps = None
    reduce: dict[str, tuple[np.ndarray, ...]] = {}
    if p == dim * dim and np.linalg.cond(design) < 1e8 and np.linalg.cond(main_design) < 1e8:
        ainv = np.linalg.inv(design)
        if pil.inter is None:
            maps = (ainv, None)
        else:
            agi = np.linalg.inv(main_design)
            maps = (agi @ gate_t @ ainv, agi)
            reduce["sandwich"] = (ainv.T @ gate_t.T,)
        g = _agf_gradient(n)
        mats = [m for m in maps if m is not None]
        reduce["average_gate_fidelity"] = tuple(m.T @ g for m in mats)
        reduce["unital_block"] = tuple(m.T @ m for m in mats)
    return _Fast(pil, tuple(names), jac, design, main_design, gate_t, maps, reduce, stage.p_eff)


# ---- choose_plan ---------------------------------------------------------------------------------
_LADDERS = {1: (1, 2, 3, 4, 8, 16, 32, 64, 128, 256), 2: (1, 2, 3, 4, 8, 16, 32, 64, 128)}
_SIGNAL_FLOOR = 0.02
_MIN_SEQUENCES = 50  # longest useful length: the identity signal lambda**(m-1) stays above this


@dataclass(frozen=True, eq=False)
class PlanProposal:
    """The cheapest plan found for the targets, with its prediction and the reasoning.

    Attributes
    ----------
    n_qubits : int
    lengths : tuple of int
        Sequence lengths (increasing; 1 and 2 always).
    sequences : tuple of int
        Sequences per length (per run: an interleaved plan holds as many reference sequences).
    shots : int
        Shots per sequence.
    interleave : InterleavedGate or None
    seed : int
        Seed :meth:`make` draws the sequences with.
    targets : dict of str to float
        The targets as given (standard errors, or half-widths at ``level``).
    target_stderr : dict of str to float
        The targets as standard errors (``target / z`` with ``z`` the two-sided normal
        quantile at ``level``; the targets themselves when ``level`` is None).
    level : float or None
    safety : float
        The plan is sized for standard errors of at most ``target_stderr / safety``.
    binding : str
        The target that sets the size (the others are met with room to spare).
    device_seconds : float
        Predicted device time of the plan.
    device_seconds_without_cv : float
        Device time of the cheapest plan meeting the same targets without the control variate.
    plan_without_cv : tuple
        ``(lengths, sequences, shots)`` of that plan.
    prediction : Prediction
        The full prediction for :meth:`make`'s plan (with its fingerprint).
    explanation : str
        One paragraph in plain words: why these lengths, sequences and shots.
    """

    n_qubits: int
    lengths: tuple[int, ...]
    sequences: tuple[int, ...]
    shots: int
    interleave: InterleavedGate | None
    seed: int
    targets: dict[str, float]
    target_stderr: dict[str, float]
    level: float | None
    safety: float
    binding: str
    device_seconds: float
    device_seconds_without_cv: float
    plan_without_cv: tuple[tuple[int, ...], tuple[int, ...], int]
    prediction: Prediction
    explanation: str

    def make(self) -> Plan:
        """The proposed plan: :func:`robusttomo.plan.make_plan` with the chosen sizes and :attr:`seed`."""
        return make_plan(n_qubits=self.n_qubits, lengths=list(self.lengths), sequences=list(self.sequences),
                         shots=self.shots, seed=self.seed, interleave=self.interleave,
                         include_reference=True)


def _check_targets(targets: object, level: object, interleaved: bool) -> tuple[dict[str, float], dict[str, float], float | None]:
    if not isinstance(targets, Mapping) or not targets:
        raise TypeError("'targets' must be a non-empty mapping from figure name to a standard error, e.g. "
                        f"{{'decay_fidelity': 5e-4}}; got {targets!r}")
    allowed = [k for k in FIGURE_NAMES if interleaved or k not in _INTERLEAVED_ONLY]
    out = {}
    for k, v in targets.items():
        if k not in allowed:
            raise ValueError(f"'targets' key {k!r} is not a figure of this {'interleaved' if interleaved else 'reference'}"
                             f" plan; choose from {allowed}")
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) \
                or not math.isfinite(v) or v <= 0:
            raise ValueError(f"'targets[{k!r}]' must be a positive number; got {v!r}")
        out[str(k)] = float(v)
    if level is None:
        return out, dict(out), None
    lv = _check_prob("level", level, low=0.0, high=1.0, open_low=True, open_high=True)
    z = float(scipy.stats.norm.ppf(0.5 + lv / 2))
    return out, {k: v / z for k, v in out.items()}, lv


def _check_ladder(lengths: object, n: int) -> tuple[int, ...]:
    if lengths is None:
        return _LADDERS[n]
    if isinstance(lengths, (str, bytes)) or not isinstance(lengths, (Sequence, np.ndarray)):
        raise TypeError(f"'lengths' must be a sequence of candidate lengths; got {lengths!r}")
    vals = list(lengths)
    if not vals or any(isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1 for v in vals):
        raise ValueError(f"'lengths' must be positive integers; got {vals}")
    vals = sorted({int(v) for v in vals})
    if not {1, 2} <= set(vals):
        raise ValueError(f"'lengths' must include 1 and 2; got {vals}")
    return tuple(vals)


def _int_option(name: str, value: object, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"'{name}' must be an integer; got {value!r}")
    if not low <= int(value) <= high:
        raise ValueError(f"'{name}' must be an integer in {low}..{high}; got {int(value)}")
    return int(value)


def _groups(lengths: Sequence[int]) -> tuple[list[int], list[int], list[int]]:
    return [1], [m for m in lengths if m in (2, 3)], [m for m in lengths if m >= 4]


def _unit_alloc(lengths: Sequence[int], r1: float, rl: float) -> dict[int, float]:
    g1, g2, gl = _groups(lengths)
    return {**{m: r1 for m in g1}, **{m: 1.0 for m in g2}, **{m: rl for m in gl}}


@dataclass(frozen=True)
class _Choice:
    seconds: float
    lengths: tuple[int, ...]
    sequences: tuple[int, ...]
    shots: int
    stderr: Mapping[str, float]


def _search(fast: _Fast, ladder: Sequence[int], goals: Mapping[str, float], t_shot: float, t_seq: float,
            runs: int, cv: bool, min_seq: int, fixed_shots: int | None, max_shots: int) -> _Choice:
    """Least device time over longest length, allocation ratios and shots (Nelder-Mead in logs)."""
    best: tuple[float, tuple[int, ...], dict[int, float], float] | None = None
    lo_n, hi_n = (math.log(fixed_shots),) * 2 if fixed_shots else (0.0, math.log(max_shots))

    def needed(alloc: dict[int, float], shots: float) -> float:
        """Scale ``k`` of the allocation that meets every goal.

        Without the weight-noise factor the variances scale as ``1 / k``, so ``k0 = (se /
        goal)**2``.  The factor ``(K2 - 2) / (K2 - 2 - delta)`` with ``K2 = k a_2`` and
        ``delta = p - (model parameters)`` then asks for ``k = k0 (k a_2 - 2) / (k a_2 - 2 -
        delta)``: the larger root of ``a_2 k^2 - (2 + delta + k0 a_2) k + 2 k0 = 0``.
        """
        se = fast.stderrs(alloc, shots, cv, weights_noise=False)
        a2 = alloc[2]
        k = min_seq / min(alloc.values())
        for name, goal in goals.items():
            k0 = (se[name] / goal) ** 2
            delta = fast.deficiency(name)
            if delta > 0:
                b = 2.0 + delta + k0 * a2
                k0 = (b + math.sqrt(max(b * b - 8.0 * a2 * k0, 0.0))) / (2.0 * a2)
            k = max(k, k0)
        return k

    starts = [np.array([0.0, math.log(0.25), min(max(math.log(100.0), lo_n), hi_n)]),
              np.array([0.0, math.log(1.0), min(max(math.log(1000.0), lo_n), hi_n)])]
    bounds = [(math.log(1 / 1024), math.log(16.0)), (math.log(1 / 1024), math.log(16.0)), (lo_n, hi_n)]
    costs = {}
    for top in [m for m in ladder if m >= 2]:
        lengths = tuple(m for m in ladder if m <= top)

        def cost(x: np.ndarray, lengths: tuple[int, ...] = lengths) -> float:
            has_long = any(m >= 4 for m in lengths)
            r1, rl, ns = math.exp(x[0]), math.exp(x[1]) if has_long else 1.0, math.exp(x[2])
            alloc = _unit_alloc(lengths, r1, rl)
            total = needed(alloc, ns) * sum(alloc.values()) * (t_seq + ns * t_shot) * runs
            return math.log(total) if math.isfinite(total) and total > 0 else 1e3

        costs[lengths] = cost
    # every longest length from one start, then the best two again from a second start
    found = []
    for lengths, cost in costs.items():
        res = scipy.optimize.minimize(cost, starts[0], method="Nelder-Mead", bounds=bounds,
                                      options={"xatol": 0.01, "fatol": 1e-4, "maxfev": 150})
        found.append((float(res.fun), lengths, res.x))
    found.sort(key=lambda t: t[0])
    for _, lengths, _ in found[:2]:
        res = scipy.optimize.minimize(costs[lengths], starts[1], method="Nelder-Mead", bounds=bounds,
                                      options={"xatol": 0.01, "fatol": 1e-4, "maxfev": 150})
        found.append((float(res.fun), lengths, res.x))
    for fun, lengths, x in found:
        has_long = any(m >= 4 for m in lengths)
        if best is None or fun < best[0]:
            best = (fun, lengths, _unit_alloc(lengths, math.exp(x[0]), math.exp(x[1]) if has_long else 1.0),
                    math.exp(x[2]))
    assert best is not None
    _, lengths, alloc, ns = best
    shots = int(fixed_shots) if fixed_shots else int(min(max(round(ns), 1), max_shots))
    k = needed(alloc, shots)
    for _ in range(20):  # round up; rounding never loses precision, but shots were rounded
        seqs = tuple(max(min_seq, math.ceil(k * alloc[m])) for m in lengths)
        se = fast.stderrs(dict(zip(lengths, map(float, seqs))), shots, cv)
        worst = max(se[k2] / g for k2, g in goals.items())
        if worst <= 1.0:
            break
        k *= worst**2 * 1.01
    seconds = float(sum(seqs) * (t_seq + shots * t_shot) * runs)
    return _Choice(seconds, lengths, seqs, shots, se)


def choose_plan(*, n_qubits: int, device: Device, targets: Mapping[str, float], costs: Mapping[str, float],
                interleave: str | InterleavedGate | None = None, level: float | None = None,
                lengths: Sequence[int] | None = None, shots: int | None = None, safety: float = 1.1,
                min_sequences: int = _MIN_SEQUENCES, max_shots: int = 10**6,
                pilot_sequences: int | None = None, probes: ProbeSet | None = None, seed: int = 0) -> PlanProposal:
    """Propose the lengths, sequences per length and shots that meet every target at least device time.

    The device time of a plan is ``runs * sum_m K_m * (seconds_per_sequence + shots *
    seconds_per_shot)`` (two runs in interleaved mode: the plan holds as many reference as
    interleaved sequences).  Once the pilot has fixed the between-sequence and shot parts of
    every per-length variance, each predicted variance is an explicit function of the
    sequences ``K_m`` and the shots, so the search is cheap: for every longest length of the
    ladder (lengths kept while the identity signal ``lambda**(m-1)`` stays above 2 %), it
    minimizes the device time over the ratio of sequences at length 1 to lengths 2 and 3, the
    ratio at each longer length, and the shots (Nelder-Mead on their logarithms), scaling the
    number of sequences to just meet the most demanding target divided by ``safety``; every
    length keeps at least ``min_sequences``.

    Parameters
    ----------
    n_qubits : int
        1 or 2.
    device : Device
        The assumed device (e.g. :func:`assumed_device`).
    targets : mapping of str to float
        Figure names of :data:`FIGURE_NAMES` to the precision wanted, e.g.
        ``{"decay_fidelity": 5e-4, "coherent+stochastic": 1e-3}``.  By default each value is a
        **standard error** (one sigma; for a model, the largest over its parameters); with
        ``level`` it is the **half-width** of a two-sided interval at that level.
    costs : mapping
        ``{"seconds_per_shot": ..., "seconds_per_sequence": ...}`` (switching to a new
        circuit costs time on most hardware).
    interleave : str or InterleavedGate, optional
        Plan an interleaved experiment for this gate (as :func:`robusttomo.plan.make_plan`).
    level : float, optional
        Interpret the targets as half-widths at this two-sided level (e.g. 0.95).
    lengths : sequence of int, optional
        Candidate lengths (must include 1 and 2); default ``1, 2, 3, 4, 8, ..., 256`` (one
        qubit) or ``..., 128`` (two).
    shots : int, optional
        Fix the shots per sequence instead of choosing them.
    safety : float, default 1.1
        Aim at ``target / safety``: the headroom covers the pilot's own uncertainty (a few
        percent) and the scatter, between runs, of the standard error a run reports.
    min_sequences : int, default 50
        Fewest sequences at any length.  The prediction is a large-sample one: with a few tens
        of sequences per length the spread of the estimates was measured 5 to 10 % above it and
        the standard errors the fit reports 10 to 15 % below it (below 20 the fit warns).
    max_shots : int, default 10**6
        Most shots per sequence considered.
    pilot_sequences : int, optional
        Pilot size per length (see :func:`predict`).
    probes : ProbeSet, optional
        Probe set of the analysis.
    seed : int, default 0
        Seed of the pilot and of :meth:`PlanProposal.make`.

    Returns
    -------
    PlanProposal

    Examples
    --------
    >>> dev = assumed_device(1, average_error=0.01, readout_error=0.02)
    >>> prop = choose_plan(n_qubits=1, device=dev, targets={"decay_fidelity": 1e-3},
    ...                    costs={"seconds_per_shot": 1e-4, "seconds_per_sequence": 0.05},
    ...                    pilot_sequences=200, lengths=[1, 2, 4, 8, 16])
    >>> prop.prediction.stderr("decay_fidelity") <= 1e-3
    True
    """
    n = _pauli.check_n_qubits(n_qubits)
    if n > 2:
        raise ValueError(f"'n_qubits' must be 1 or 2 for the planner; got {n} (the three-qubit statistic has "
                         "3969 probes, whose covariance does not fit in memory)")
    device = _check_device(device, n)
    t_shot, t_seq = _check_costs(costs)
    from robusttomo.plan import _check_interleave

    gate = _check_interleave(interleave, n)
    given, goals_se, lv = _check_targets(targets, level, gate is not None)
    ladder = _check_ladder(lengths, n)
    fixed = None if shots is None else _int_option("shots", shots, 1, 10**9)
    sf = _check_prob("safety", safety, low=1.0, high=10.0)
    min_seq = _int_option("min_sequences", min_sequences, 2, 10**7)
    max_sh = _int_option("max_shots", max_shots, 1, 10**9)
    prb = _check_probes(probes, n)
    seed_v = _check_seed(seed)
    k_pilot = _check_pilot(pilot_sequences, prb.n_probes)

    # longest useful length from the identity decay (exact, or from a short pilot)
    exact = _exact_blocks(device, None)
    if exact is not None:
        p_id = float(np.trace(exact[0])) / (4**n - 1)
    else:
        short = make_plan(n_qubits=n, lengths=[1, 2], sequences=200, shots=1, seed=seed_v)
        p_id = float(_fit.estimate_decays(short, simulate(short, device, exact=True), probes=prb,
                                          bootstrap=0).identity_decay)
    useful = [m for m in ladder if m <= 3 or abs(p_id) ** (m - 1) >= _SIGNAL_FLOOR]
    pil = _make_pilots(n, device, prb, gate, useful, useful, k_pilot, seed_v)
    goals = {k: v / sf for k, v in goals_se.items()}
    runs = 2 if gate is not None else 1
    nominal = {m: 100.0 for m in useful}
    fast = _make_fast(pil, list(goals), nominal, 100.0)
    best = _search(fast, useful, goals, t_shot, t_seq, runs, True, min_seq, fixed, max_sh)
    best0 = _search(fast, useful, goals, t_shot, t_seq, runs, False, min_seq, fixed, max_sh)

    plan = make_plan(n_qubits=n, lengths=list(best.lengths), sequences=list(best.sequences), shots=best.shots,
                     seed=seed_v, interleave=gate, include_reference=True)
    lay = dict(zip(best.lengths, best.sequences))
    pred = _prediction(pil, lay, lay if gate is not None else {}, best.shots, plan.fingerprint,
                       float(plan.n_sequences * (t_seq + best.shots * t_shot)))
    binding = max(goals, key=lambda k: best.stderr[k] / goals[k])
    text = _explain(pil, best, best0, binding, goals_se, sf, t_shot, t_seq, pred)
    return PlanProposal(
        n_qubits=n, lengths=best.lengths, sequences=best.sequences, shots=best.shots, interleave=gate,
        seed=seed_v, targets=given, target_stderr=goals_se, level=lv, safety=sf, binding=binding,
        device_seconds=best.seconds, device_seconds_without_cv=best0.seconds,
        plan_without_cv=(best0.lengths, best0.sequences, best0.shots), prediction=pred, explanation=text)


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    if seconds < 3 * 86400:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} days"


def _explain(pil: _Pilots, best: _Choice, best0: _Choice, binding: str, goals_se: Mapping[str, float],
             safety: float, t_shot: float, t_seq: float, pred: Prediction) -> str:
    lay = dict(zip(best.lengths, best.sequences))
    g1, g2, gl = _groups(best.lengths)
    where = " in each of the reference and interleaved runs" if pil.inter is not None else ""
    text = (f"The cheapest plan found that meets every target takes {sum(best.sequences)} sequences{where}, "
            f"{best.shots} shots each, at lengths {', '.join(map(str, best.lengths))}: about "
            f"{_duration(best.seconds)} of device time. The target that sets the size is '{binding}', with a "
            f"predicted standard error of {pred.stderr(binding):.3g} for a target of {goals_se[binding]:.3g}: the "
            f"plan aims {round((safety - 1) * 100)} % below every target to cover the pilot's own uncertainty "
            "and the scatter, from run to run, of the error a run reports")
    others = [k for k in goals_se if k != binding]
    if others:
        lead = pred.stderr(binding) / goals_se[binding]

        def note(k: str) -> str:
            tied = pred.stderr(k) / goals_se[k] >= 0.99 * lead
            return f"'{k}' comes out at {pred.stderr(k):.3g} against {goals_se[k]:.3g}{' (binding too)' if tied else ''}"

        text += "; " + ", ".join(note(k) for k in others)
    text += ". "
    if binding in ("decay_fidelity", "lambdas", "interleaved_lambdas", "classic_interleaved_error"):
        v = next(x for x in pred.variances if x.quantity == "identity probe" and x.length == 2)
        what = "the identity probe's value"
    else:
        v = next(x for x in pred.variances if x.quantity == "unital block")
        what = "the unital block estimated from one sequence (Frobenius-squared error)"
    sb, ss = v.between, v.shot
    if t_shot > 0 and t_seq > 0:
        ratio = t_seq / t_shot
        text += (f"A new sequence costs {t_seq:g} s, as much as {ratio:.3g} shots; at length 2 {what} varies by "
                 f"{sb:.2g} between sequences (after the control variate) against {ss:.2g}/shots within one, ")
        if sb > 0:
            text += (f"so shots beyond about sqrt({ss:.2g} / {sb:.2g} x {ratio:.3g}) = "
                     f"{math.sqrt(ss / sb * ratio):.3g} per sequence stop paying for themselves; ")
        else:
            text += "so shots pay until their time outweighs switching; "
        text += f"weighing every target and length, {best.shots} shots per sequence came out cheapest. "
    short = "length 2 carries" if len(g2) == 1 else "lengths 2 and 3 carry"
    text += (f"Length 1 fixes the SPAM constant shared by every decay ({lay[1]} sequences); {short} the "
             "fast-decaying probes, which make up most of the unital block and of the reduced models "
             f"({lay[2]} sequences{' each' if len(g2) > 1 else ''})")
    if gl:
        text += (f"; the longer lengths up to {gl[-1]} ({lay[gl[0]]} sequences each) pin the slow decays such as the "
                 "identity probe's, which sets the fidelity")
    else:
        text += "; longer lengths did not pay for themselves here"
    factor = best0.seconds / best.seconds if best.seconds > 0 else float("nan")
    text += (f". Without the control variate the same targets would need about {factor:.3g} times the device "
             f"time ({_duration(best0.seconds)}, with {best0.shots} shots per sequence).")
    return text
