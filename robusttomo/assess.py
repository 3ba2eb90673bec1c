"""Assessment: the whole analysis of one data set and its figures of merit with intervals.

:func:`analyze` runs estimate -> fit -> reconstruct -> models and evaluates every figure of
merit on the point estimate and on each bootstrap replicate; intervals are the 2.5 and 97.5
percentiles of the replicates (non-parametric percentile bootstrap over sequences).
The result, a frozen :class:`Reconstruction`, saves to and loads from HDF5.
"""

from __future__ import annotations

import enum
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from robusttomo.channels import Channel
from robusttomo.fit import DecayResult

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
    """

    low: float
    high: float
    high_is_bound: bool
    method: str


@dataclass(frozen=True)
class Figures:
    """Figures of merit of the noisy operation against its target, each with a 95% interval.

    ``average_gate_fidelity`` and ``entanglement_fidelity`` are fidelities (1 = perfect);
    ``diamond_distance`` is ``(1/2) ||L - U||_diamond`` in [0, 1] (a worst-case error
    probability); ``unitarity`` as in "Estimating the coherence of noise", NJP 17, 113020
    (2015); ``coherent_share`` is the fraction of the infidelity due to the Hamiltonian
    (coherent) part of the error generator; ``decay_fidelity`` is the average gate fidelity
    from the identity-probe decay alone ("Scalable and robust randomized benchmarking of
    quantum processes", PRL 106, 180504 (2011)).  Rates are keyed by Pauli label (qubit 0
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

    @property
    def noisy_gate(self) -> Channel:
        """The noisy operation ``error_channel o target``."""
        return self.error_channel @ Channel.from_unitary(self.target_unitary)
