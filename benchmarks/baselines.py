"""Baseline methods a practitioner would otherwise use, with their own small simulation.

Two baselines are implemented here (outside the package, so that they cannot lean on it beyond
the channel algebra and the Clifford group), for side-by-side accuracy-per-shot comparisons:

1. **Conventional process tomography** (:func:`process_tomography`): prepare every tensor
   product of one-qubit Pauli eigenstates, apply the channel under test, measure in every tensor
   product of Pauli bases, estimate the Pauli transfer matrix by linear inversion (assuming
   ideal preparations and measurements, as the method does) and project the estimate onto the
   completely positive and trace-preserving (CPTP) channels with the algorithm of
   "Quantum process tomography via completely positive and trace-preserving projection",
   Phys. Rev. A 98, 062336 (2018) (:func:`project_cptp`).
2. **Standard randomized benchmarking with the inversion gate**
   (:func:`randomized_benchmarking`): random Clifford sequences of length ``m`` followed by the
   Clifford that inverts them, survival probability of ``|0..0>``, fit of ``A p**m + B`` and
   average error ``r = (d - 1)(1 - p)/d``, from "Scalable and robust randomized benchmarking of
   quantum processes", Phys. Rev. Lett. 106, 180504 (2011); a percentile interval by bootstrap
   over sequences.

Simulated device (the same ingredients for both baselines)
----------------------------------------------------------
* **Preparation.**  The device can only make one fixed faulty state ``rho~`` (a ``d x d``
  density matrix, ideally ``|0..0><0..0|``); every other input state is made from it by an
  ideal unitary: ``rho_a = V_a rho~ V_a^dagger``.  This is how preparation error enters on
  hardware: the reset is imperfect, the gates that follow it are (here) perfect.
* **Measurement.**  Every measurement is an ideal basis-change unitary ``W_b`` followed by a
  computational-basis readout with a confusion matrix ``C[y, x] = P(read y | true x)``
  (columns sum to 1).  Outcome ``x`` is an integer with qubit 0 the most significant bit.
* **Gates.**  Tomography applies the channel under test ``L`` once.  Benchmarking implements
  every Clifford ``G`` (the inversion gate included) as ``L o G``: one fixed error channel after
  every Clifford (gate-independent, Markovian, time-stationary).
* Both are held in :class:`SpamModel`; :meth:`SpamModel.symmetric` builds the usual
  uncorrelated model (each qubit prepared in ``|1>`` with probability ``prep_error`` and each
  readout bit flipped with probability ``readout_error``).

Shot budgets
------------
Every entry point takes ``total_shots`` (an integer, or ``None`` for exact outcome
probabilities, i.e. the infinite-shot limit).  Shots are split evenly and rounded down:

* tomography: ``shots_per_setting = total_shots // n_settings`` with
  ``n_settings = n_preparations * 3**n`` (:func:`tomography_budget`); the outcome counts of a
  setting are multinomial;
* benchmarking: ``shots_per_sequence = total_shots // (len(lengths) * n_sequences)``; the
  number of ``0..0`` outcomes of a sequence is binomial.

The number of shots actually spent (at most ``total_shots``) is reported
(:attr:`TomographyBudget.total_shots`, :attr:`BenchmarkResult.total_shots`), so comparisons can
charge every method the same budget.  Randomness always comes from a
``numpy.random.Generator`` passed in.

Conventions are the package's (:mod:`robusttomo.channels`): Pauli order ``II, IX, IY, IZ, XI,
...``, qubit 0 leftmost, PTM ``R[i, j] = tr(P_i L(P_j)) / d``, trace-1 Choi matrix with the
input factor first.
"""

from __future__ import annotations

import enum
import functools
import itertools
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.optimize

from robusttomo import _pauli
from robusttomo.channels import Channel

__all__ = [
    "BenchmarkResult",
    "DecayFit",
    "PrepSet",
    "SpamModel",
    "TomographyBudget",
    "TomographyData",
    "fit_decay",
    "linear_inversion",
    "process_tomography",
    "project_cptp",
    "randomized_benchmarking",
    "sequence_survival",
    "simulate_tomography",
    "tomography_budget",
]

# Clifford group orders for n = 1, 2, 3: OEIS A003956.
_CLIFFORD_ORDER = {1: 24, 2: 11520, 3: 92897280}

_H = np.array([[1, 1], [1, -1]], dtype=complex) / np.sqrt(2)
_S = np.array([[1, 0], [0, 1j]], dtype=complex)
_X = np.array([[0, 1], [1, 0]], dtype=complex)
_I2 = np.eye(2, dtype=complex)

# Unitaries taking |0> to each one-qubit Pauli eigenstate.
_PREP_UNITARY = {
    "Z+": _I2,
    "Z-": _X,
    "X+": _H,
    "X-": _H @ _X,
    "Y+": _S @ _H,
    "Y-": _S @ _H @ _X,
}
# Basis changes taking the +1 eigenvector of the measured Pauli to |0> (and -1 to |1>).
_BASIS_CHANGE = {"X": _H, "Y": _H @ _S.conj().T, "Z": _I2}


# ---- validation helpers ---------------------------------------------------------------------
def _check_int(name: str, value: object, *, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"'{name}' must be an integer >= {minimum}; got {value!r}")
    if int(value) < minimum:
        raise ValueError(f"'{name}' must be an integer >= {minimum}; got {value!r}")
    return int(value)


def _check_channel(value: object) -> Channel:
    if not isinstance(value, Channel):
        raise TypeError(f"'channel' must be a robusttomo.Channel; got {type(value).__name__}")
    return value


def _check_cptp(ch: Channel, name: str = "channel") -> Channel:
    # a simulated device must be physical, or its outcome probabilities are not probabilities
    if not ch.is_cptp(atol=1e-8):
        raise ValueError(
            f"'{name}' must be CPTP (Choi matrix >= 0, R[0, :] = e_0, to 1e-8) to simulate a device;"
            " project it first with project_cptp"
        )
    return ch


def _check_spam(spam: object, n_qubits: int) -> SpamModel:
    if spam is None:
        return SpamModel.ideal(n_qubits)
    if not isinstance(spam, SpamModel):
        raise TypeError(f"'spam' must be a SpamModel or None; got {type(spam).__name__}")
    if spam.n_qubits != n_qubits:
        raise ValueError(
            f"'spam' is a {spam.n_qubits}-qubit model but the channel acts on {n_qubits} qubits;"
            " build the SpamModel for the channel's qubit count"
        )
    return spam


def _check_rng(rng: object, total_shots: int | None) -> np.random.Generator | None:
    if rng is not None and not isinstance(rng, np.random.Generator):
        raise TypeError(f"'rng' must be a numpy.random.Generator; got {type(rng).__name__}")
    if total_shots is not None and rng is None:
        raise ValueError("'rng' is required when 'total_shots' is given; pass rng=numpy.random.default_rng(seed)")
    return rng


# ---- SPAM model -----------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class SpamModel:
    """Faulty state preparation and readout shared by both baselines.

    Attributes
    ----------
    prep_state : ndarray, shape (d, d), complex, read-only
        The one state the device prepares, ``rho~`` (Hermitian, positive semidefinite, trace 1;
        ideally ``|0..0><0..0|``).  Other input states are ideal unitaries applied to it.
    confusion : ndarray, shape (d, d), float, read-only
        Readout confusion matrix ``C[y, x] = P(read y | true x)``; entries in ``[0, 1]``, each
        column sums to 1.  Outcome integers have qubit 0 as the most significant bit.
    """

    prep_state: np.ndarray
    confusion: np.ndarray

    def __post_init__(self) -> None:
        rho = np.array(self.prep_state, dtype=complex, copy=True)
        conf = np.array(self.confusion, dtype=float, copy=True)
        d = rho.shape[0] if rho.ndim == 2 else -1
        if rho.ndim != 2 or rho.shape != (d, d) or d not in (2, 4, 8):
            raise ValueError(f"'prep_state' must be a d x d matrix with d = 2, 4 or 8; got shape {rho.shape}")
        if not np.all(np.isfinite(rho)):
            raise ValueError("'prep_state' must be finite; got NaN or inf entries")
        if not np.allclose(rho, rho.conj().T, atol=1e-10):
            raise ValueError("'prep_state' must be Hermitian; symmetrize it, (rho + rho^dagger)/2")
        if abs(np.trace(rho).real - 1) > 1e-9:
            raise ValueError(f"'prep_state' must have trace 1; got trace {np.trace(rho).real:.6g}")
        if np.linalg.eigvalsh(rho).min() < -1e-10:
            raise ValueError(
                f"'prep_state' must be positive semidefinite; got eigenvalue {np.linalg.eigvalsh(rho).min():.3g}"
            )
        if conf.shape != (d, d):
            raise ValueError(f"'confusion' must have shape ({d}, {d}) to match 'prep_state'; got {conf.shape}")
        if not np.all(np.isfinite(conf)) or conf.min() < 0 or conf.max() > 1:
            raise ValueError("'confusion' entries must be probabilities in [0, 1]")
        sums = conf.sum(axis=0)
        if not np.allclose(sums, 1, atol=1e-9, rtol=0):
            raise ValueError(
                f"'confusion' columns must sum to 1 (C[y, x] = P(read y | true x)); got column sums {sums.round(6).tolist()}"
            )
        rho.setflags(write=False)
        conf.setflags(write=False)
        object.__setattr__(self, "prep_state", rho)
        object.__setattr__(self, "confusion", conf)

    @property
    def dim(self) -> int:
        """Hilbert-space dimension ``d``."""
        return int(self.prep_state.shape[0])

    @property
    def n_qubits(self) -> int:
        """Number of qubits."""
        return self.dim.bit_length() - 1

    @classmethod
    def from_device(cls, device: object) -> SpamModel:
        """The preparation and readout of a device with ``prep`` and ``readout`` arrays.

        For example a :class:`robusttomo.simulate.Device` (its ``prep`` is ``rho~`` and its
        ``readout`` the confusion matrix, same conventions), so a baseline runs on the same
        faulty SPAM as the package's own simulation.  Only these two fields are read.
        """
        if not (hasattr(device, "prep") and hasattr(device, "readout")):
            raise TypeError(f"'device' must have 'prep' and 'readout' arrays; got {type(device).__name__}")
        return cls(prep_state=np.asarray(device.prep), confusion=np.asarray(device.readout))

    @classmethod
    def ideal(cls, n_qubits: int) -> SpamModel:
        """Perfect preparation of ``|0..0>`` and perfect readout."""
        n = _pauli.check_n_qubits(n_qubits)
        return cls.symmetric(n, prep_error=0.0, readout_error=0.0)

    @classmethod
    def symmetric(cls, n_qubits: int, *, prep_error: float = 0.0, readout_error: float = 0.0) -> SpamModel:
        """Uncorrelated one-qubit errors on every qubit.

        Parameters
        ----------
        n_qubits : int
            Number of qubits, 1 to 3.
        prep_error : float, default 0.0
            Probability that a qubit is prepared in ``|1>`` instead of ``|0>``:
            ``rho~ = (x)_k [(1 - e) |0><0| + e |1><1|]``.
        readout_error : float, default 0.0
            Probability that a readout bit is flipped (both directions):
            ``C = (x)_k [[1 - e, e], [e, 1 - e]]``.

        Returns
        -------
        SpamModel
        """
        n = _pauli.check_n_qubits(n_qubits)
        for name, val in (("prep_error", prep_error), ("readout_error", readout_error)):
            if not isinstance(val, (int, float, np.floating, np.integer)) or isinstance(val, bool):
                raise TypeError(f"'{name}' must be a float in [0, 1]; got {val!r}")
            if not 0.0 <= float(val) <= 1.0:
                raise ValueError(f"'{name}' must be a probability in [0, 1]; got {val!r}")
        rho1 = np.diag([1.0 - prep_error, prep_error]).astype(complex)
        c1 = np.array([[1.0 - readout_error, readout_error], [readout_error, 1.0 - readout_error]])
        rho = np.ones((1, 1), dtype=complex)
        conf = np.ones((1, 1))
        for _ in range(n):
            rho = np.kron(rho, rho1)
            conf = np.kron(conf, c1)
        return cls(prep_state=rho, confusion=conf)


@functools.lru_cache(maxsize=None)
def _diag_pauli(n: int) -> np.ndarray:
    """``Z[x, i] = <x|P_i|x> / d``: computational-basis probabilities from a Pauli vector."""
    d = 2**n
    p = _pauli.pauli_stack(n)
    z = np.einsum("ixx->xi", p).real / d
    z.setflags(write=False)
    return z


# ---- process tomography ---------------------------------------------------------------------
class PrepSet(enum.Enum):
    """One-qubit input states of process tomography (tensor products over the qubits).

    ``SIX``: the six Pauli eigenstates, in order ``Z+, Z-, X+, X-, Y+, Y-`` (an overcomplete
    set, ``6**n`` inputs).  ``FOUR``: the informationally complete subset ``Z+, Z-, X+, Y+``
    (``|0>, |1>, |+>, |+i>``; ``4**n`` inputs, the minimum).
    """

    SIX = "six"
    FOUR = "four"

    @property
    def labels(self) -> tuple[str, ...]:
        """One-qubit state labels in order."""
        return ("Z+", "Z-", "X+", "X-", "Y+", "Y-") if self is PrepSet.SIX else ("Z+", "Z-", "X+", "Y+")


def _check_states(states: object) -> PrepSet:
    if isinstance(states, PrepSet):
        return states
    if isinstance(states, str):
        try:
            return PrepSet(states.lower())
        except ValueError:
            pass
    raise ValueError(f"'states' must be PrepSet.SIX, PrepSet.FOUR, 'six' or 'four'; got {states!r}")


def _kron_all(mats: Sequence[np.ndarray]) -> np.ndarray:
    out = np.ones((1, 1), dtype=complex)
    for m in mats:
        out = np.kron(out, m)
    return out


@functools.lru_cache(maxsize=None)
def _tomo_design(n: int, states: PrepSet) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], tuple[str, ...]]:
    """Ideal preparation unitaries ``(A, d, d)``, ideal effect Pauli vectors ``(Bb, d, d*d)``, labels."""
    d = 2**n
    prep_labels = tuple(itertools.product(states.labels, repeat=n))
    preps = np.array([_kron_all([_PREP_UNITARY[s] for s in lab]) for lab in prep_labels])
    basis_labels = tuple("".join(b) for b in itertools.product("XYZ", repeat=n))
    changes = np.array([_kron_all([_BASIS_CHANGE[c] for c in lab]) for lab in basis_labels])
    # effect of outcome y in basis b: E = (W_b^dagger |y>)(<y| W_b) = outer(conj(W_b[y, :]), W_b[y, :])
    effects = np.einsum("bya,byc->byac", changes.conj(), changes)
    evec = _pauli.pauli_vector(effects)  # (Bb, d, d*d)
    for arr in (preps, evec):
        arr.setflags(write=False)
    return preps, evec, tuple(" ".join(lab) for lab in prep_labels), basis_labels


@dataclass(frozen=True)
class TomographyBudget:
    """How a total shot budget is spread over the tomography settings.

    Attributes
    ----------
    n_preparations : int
        Number of input states, ``6**n`` or ``4**n``.
    n_bases : int
        Number of measurement bases, ``3**n``.
    n_settings : int
        ``n_preparations * n_bases``.
    shots_per_setting : int
        ``total_shots // n_settings`` (rounded down).
    total_shots : int
        Shots actually spent, ``shots_per_setting * n_settings`` (``<=`` the budget).
    """

    n_preparations: int
    n_bases: int
    n_settings: int
    shots_per_setting: int
    total_shots: int


def tomography_budget(n_qubits: int, total_shots: int, *, states: PrepSet | str = PrepSet.SIX) -> TomographyBudget:
    """Split a total shot budget evenly over the settings of process tomography.

    Parameters
    ----------
    n_qubits : int
        Number of qubits, 1 to 3.
    total_shots : int
        Total number of shots; at least one per setting.
    states : PrepSet or {"six", "four"}, default PrepSet.SIX
        Input state set.

    Returns
    -------
    TomographyBudget
    """
    n = _pauli.check_n_qubits(n_qubits)
    st = _check_states(states)
    n_prep = len(st.labels) ** n
    n_bases = 3**n
    n_settings = n_prep * n_bases
    total = _check_int("total_shots", total_shots, minimum=1)
    if total < n_settings:
        raise ValueError(
            f"'total_shots' must be at least the number of settings ({n_settings}) so that every setting"
            f" gets one shot; got {total}"
        )
    per = total // n_settings
    return TomographyBudget(n_prep, n_bases, n_settings, per, per * n_settings)


@dataclass(frozen=True)
class TomographyData:
    """Outcome frequencies of a (simulated) process-tomography experiment.

    Attributes
    ----------
    n_qubits : int
        Number of qubits.
    states : PrepSet
        Input state set.
    frequencies : ndarray, shape (n_preparations, n_bases, d), float, read-only
        ``frequencies[a, b, y]``: fraction of the shots of setting (input ``a``, basis ``b``)
        that read outcome ``y`` (qubit 0 the most significant bit; bit 0 means the +1
        eigenvalue of the measured Pauli).  Exact probabilities if ``shots_per_setting`` is None.
    shots_per_setting : int or None
        Shots per setting, or None for exact probabilities.
    preparation_labels : tuple of str
        Label of each input, e.g. ``"Z+ X-"`` (qubit 0 first).
    basis_labels : tuple of str
        Label of each measurement basis, e.g. ``"XZ"`` (qubit 0 first).
    """

    n_qubits: int
    states: PrepSet
    frequencies: np.ndarray
    shots_per_setting: int | None
    preparation_labels: tuple[str, ...]
    basis_labels: tuple[str, ...]

    @property
    def total_shots(self) -> int | None:
        """Shots spent, or None for exact probabilities."""
        if self.shots_per_setting is None:
            return None
        return self.shots_per_setting * self.frequencies.shape[0] * self.frequencies.shape[1]


def simulate_tomography(
    channel: Channel,
    *,
    spam: SpamModel | None = None,
    total_shots: int | None = None,
    rng: np.random.Generator | None = None,
    states: PrepSet | str = PrepSet.SIX,
) -> TomographyData:
    """Simulate conventional process tomography of ``channel`` on the faulty device.

    Setting ``(a, b)`` prepares ``V_a rho~ V_a^dagger``, applies ``channel``, applies the basis
    change ``W_b`` and reads out through the confusion matrix:
    ``P(y | a, b) = sum_x C[y, x] <x| W_b L(V_a rho~ V_a^dagger) W_b^dagger |x>``.

    Parameters
    ----------
    channel : Channel
        The channel under test (1 to 3 qubits).
    spam : SpamModel or None, default None
        Faulty preparation and readout; None means perfect.
    total_shots : int or None, default None
        Total shot budget, split by :func:`tomography_budget`; None gives exact probabilities.
    rng : numpy.random.Generator or None, default None
        Source of the multinomial shot noise; required when ``total_shots`` is given.
    states : PrepSet or {"six", "four"}, default PrepSet.SIX
        Input state set.

    Returns
    -------
    TomographyData
    """
    ch = _check_cptp(_check_channel(channel))
    n = ch.n_qubits
    d = ch.dim
    sp = _check_spam(spam, n)
    st = _check_states(states)
    per = None if total_shots is None else tomography_budget(n, total_shots, states=st).shots_per_setting
    gen = _check_rng(rng, total_shots)
    preps, evec, prep_labels, basis_labels = _tomo_design(n, st)
    rhos = np.einsum("aij,jk,alk->ail", preps, sp.prep_state, preps.conj(), optimize=True)
    out = _pauli.pauli_vector(rhos) @ ch.ptm.T  # (A, d*d): Pauli vectors of L(rho_a)
    ideal = np.einsum("byi,ai->aby", evec, out) / d  # true-outcome probabilities
    probs = np.einsum("zy,aby->abz", sp.confusion, ideal)
    probs = np.clip(probs, 0.0, None)
    probs /= probs.sum(axis=-1, keepdims=True)
    if per is None:
        freqs = probs
    else:
        assert gen is not None
        freqs = gen.multinomial(per, probs) / per
    freqs = np.ascontiguousarray(freqs, dtype=float)
    freqs.setflags(write=False)
    return TomographyData(n, st, freqs, per, prep_labels, basis_labels)


def linear_inversion(data: TomographyData) -> Channel:
    """Linear-inversion estimate of the PTM, assuming ideal preparations and measurements.

    With ideal input Pauli vectors ``r_a`` (columns of ``Rm``, shape ``(d*d, A)``) and ideal
    effect Pauli vectors ``e_{b,y}`` (rows of ``Em``, shape ``(Bb*d, d*d)``) the model is
    ``P = Em R Rm / d``.  The estimate is its least-squares solution
    ``R_hat = d * pinv(Em) @ P @ pinv(Rm)``, which is exact for exact ideal-device data.  No
    constraint is imposed: ``R_hat`` need not be completely positive, nor exactly trace
    preserving.

    Parameters
    ----------
    data : TomographyData
        Outcome frequencies from :func:`simulate_tomography` (or from a device, in the same layout).

    Returns
    -------
    Channel
        The unconstrained estimate (generally not CPTP; see :func:`project_cptp`).
    """
    if not isinstance(data, TomographyData):
        raise TypeError(f"'data' must be TomographyData; got {type(data).__name__}")
    n = data.n_qubits
    d = 2**n
    preps, evec, _, _ = _tomo_design(n, data.states)
    expected = (preps.shape[0], evec.shape[0], d)
    if data.frequencies.shape != expected:
        raise ValueError(f"'data.frequencies' must have shape {expected}; got {data.frequencies.shape}")
    em_pinv, rm_pinv = _inversion_maps(n, data.states)
    pmat = data.frequencies.transpose(1, 2, 0).reshape(-1, preps.shape[0])
    return Channel.from_ptm(d * em_pinv @ pmat @ rm_pinv)


@functools.lru_cache(maxsize=None)
def _inversion_maps(n: int, states: PrepSet) -> tuple[np.ndarray, np.ndarray]:
    """``pinv(Em)`` ``(d*d, Bb*d)`` and ``pinv(Rm)`` ``(A, d*d)``, fixed by the design (cached)."""
    d = 2**n
    preps, evec, _, _ = _tomo_design(n, states)
    zero = np.zeros((d, d), dtype=complex)
    zero[0, 0] = 1.0
    rm = _pauli.pauli_vector(np.einsum("aij,jk,alk->ail", preps, zero, preps.conj())).T  # (d*d, A)
    em = evec.reshape(-1, d * d)
    out = (np.linalg.pinv(em), np.linalg.pinv(rm))
    for arr in out:
        arr.setflags(write=False)
    return out


# ---- CPTP projection ------------------------------------------------------------------------
def _partial_trace_out(j: np.ndarray, d: int) -> np.ndarray:
    return np.einsum("iaja->ij", j.reshape(d, d, d, d))


def _project_tp(j: np.ndarray, d: int) -> np.ndarray:
    # Frobenius-nearest point of the affine set tr_out J = I/d: remove (tr_out J - I/d) (x) I/d.
    excess = _partial_trace_out(j, d) - np.eye(d) / d
    return j - np.kron(excess, np.eye(d) / d)


def _project_cp(j: np.ndarray) -> np.ndarray:
    w, v = np.linalg.eigh((j + j.conj().T) / 2)
    return (v * np.clip(w, 0.0, None)) @ v.conj().T


def project_cptp(channel: Channel, *, tol: float = 1e-16, max_iter: int = 20000) -> Channel:
    """Frobenius-nearest CPTP channel, by the CPTP projection of PRA 98, 062336 (2018).

    Solves ``min ||J - J0||_F  subject to  J >= 0, tr_out J = I/d`` over trace-1 Choi
    matrices ``J`` (input factor first; ``||J||_F`` is ``||R||_F / d`` in PTM terms, so this is
    also the least-squares projection of the PTM).  As in "Quantum process tomography via
    completely positive and trace-preserving projection", Phys. Rev. A 98, 062336 (2018), the
    projection onto the intersection is computed by Dykstra's alternating projections between
    the trace-preserving affine set (``TP``: subtract ``(tr_out J - I/d) (x) I/d``) and the
    positive semidefinite cone (``CP``: clip negative eigenvalues to zero)::

        x_0 = J0, p_0 = q_0 = 0
        y_k     = TP(x_k + p_k);   p_{k+1} = x_k + p_k - y_k
        x_{k+1} = CP(y_k + q_k);   q_{k+1} = y_k + q_k - x_{k+1}

    Unlike plain alternating projections, the correction terms ``p, q`` make the iterates
    converge to the nearest point of the intersection, not just to some point in it.

    Stopping rule: stop at the first ``k >= 1`` with
    ``||p_{k+1} - p_k||^2 + ||q_{k+1} - q_k||^2 + 2|<p_k, y_k - y_{k-1}>| + 2|<q_k, x_{k+1} - x_k>| < tol``
    (squared Frobenius norms on the trace-1 Choi scale), a criterion of the robust form of
    "Robust stopping criteria for Dykstra's algorithm", SIAM J. Sci. Comput. 26, 1405 (2005);
    the paper stops at ``1e-4`` on its own scale (from memory), far looser than the default here.
    The last iterate ``x`` is positive semidefinite but trace preserving only to about
    ``sqrt(tol)``; it is made exactly trace preserving, and kept positive, by the congruence
    ``J -> (A (x) I) J (A (x) I)^dagger`` with ``A = (d tr_out J)^(-1/2)``, which moves it by the
    same small amount.

    Parameters
    ----------
    channel : Channel
        Any Hermiticity-preserving map (for example a :func:`linear_inversion` estimate).
    tol : float, default 1e-16
        Threshold of the stopping rule.
    max_iter : int, default 20000
        Iteration cap; reaching it issues a ``RuntimeWarning`` and returns the (CPTP)
        fixed-up last iterate.

    Returns
    -------
    Channel
        A CPTP channel (Choi eigenvalues >= 0, ``R[0, :] = e_0`` to rounding).  A CPTP input
        comes back unchanged (up to rounding).
    """
    ch = _check_channel(channel)
    if not (isinstance(tol, (float, int)) and not isinstance(tol, bool) and tol > 0):
        raise ValueError(f"'tol' must be a positive number; got {tol!r}")
    iters = _check_int("max_iter", max_iter, minimum=1)
    d = ch.dim
    x = ch.choi.copy()
    p = np.zeros_like(x)
    q = np.zeros_like(x)
    y_prev = None
    converged = False
    for _ in range(iters):
        y = _project_tp(x + p, d)
        p_new = x + p - y
        x_new = _project_cp(y + q)
        q_new = y + q - x_new
        crit = np.linalg.norm(p_new - p) ** 2 + np.linalg.norm(q_new - q) ** 2
        crit += 2 * abs(np.vdot(q, x_new - x))
        if y_prev is not None:
            crit += 2 * abs(np.vdot(p, y - y_prev))
        x, p, q, y_prev = x_new, p_new, q_new, y
        if crit < tol:
            converged = True
            break
    if not converged:
        warnings.warn(
            f"project_cptp: stopping rule not met after max_iter={iters} iterations; raise 'max_iter' or 'tol'",
            RuntimeWarning,
            stacklevel=2,
        )
    t = d * _partial_trace_out(x, d)
    w, v = np.linalg.eigh((t + t.conj().T) / 2)
    if w.min() <= 1e-12:
        raise RuntimeError("project_cptp: the projected map's input marginal is singular; cannot restore trace preservation")
    a = (v / np.sqrt(w)) @ v.conj().T
    big = np.kron(a, np.eye(d))
    x = big @ x @ big.conj().T
    return Channel.from_choi((x + x.conj().T) / 2)


def process_tomography(
    channel: Channel,
    *,
    spam: SpamModel | None = None,
    total_shots: int | None = None,
    rng: np.random.Generator | None = None,
    states: PrepSet | str = PrepSet.SIX,
    tol: float = 1e-16,
    max_iter: int = 20000,
) -> Channel:
    """Conventional process tomography: simulate, invert linearly, project onto CPTP.

    ``project_cptp(linear_inversion(simulate_tomography(...)))``; the budget actually spent is
    ``tomography_budget(n, total_shots, states=states).total_shots``.  The estimator assumes
    ideal preparation and measurement, so any SPAM error in ``spam`` biases it (a bias that no
    number of shots removes).

    Parameters
    ----------
    channel : Channel
        The channel under test.
    spam : SpamModel or None, default None
        Faulty preparation and readout of the simulated device; None means perfect.
    total_shots : int or None, default None
        Total shot budget; None gives exact probabilities.
    rng : numpy.random.Generator or None, default None
        Required when ``total_shots`` is given.
    states : PrepSet or {"six", "four"}, default PrepSet.SIX
        Input state set.
    tol, max_iter
        Passed to :func:`project_cptp`.

    Returns
    -------
    Channel
        The CPTP estimate.

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo.channels import amplitude_damping
    >>> est = process_tomography(amplitude_damping(0.1))
    >>> bool(est.allclose(amplitude_damping(0.1), atol=1e-8))
    True
    """
    data = simulate_tomography(channel, spam=spam, total_shots=total_shots, rng=rng, states=states)
    return project_cptp(linear_inversion(data), tol=tol, max_iter=max_iter)


# ---- standard randomized benchmarking -------------------------------------------------------
def _check_indices(n: int, indices: object) -> np.ndarray:
    arr = np.asarray(indices)
    if arr.ndim != 2 or arr.shape[0] == 0 or arr.shape[1] == 0:
        raise ValueError(f"'indices' must be a 2-d array (n_sequences, length) with both sizes >= 1; got shape {arr.shape}")
    if not np.issubdtype(arr.dtype, np.integer):
        raise TypeError(f"'indices' must hold integer Clifford indices; got dtype {arr.dtype}")
    order = _CLIFFORD_ORDER[n]
    if arr.min() < 0 or arr.max() >= order:
        raise ValueError(
            f"'indices' must be Clifford indices in 0..{order - 1} for {n} qubit(s); got range {arr.min()}..{arr.max()}"
        )
    return arr.astype(np.int64)


def sequence_survival(channel: Channel, indices: np.ndarray, *, spam: SpamModel | None = None) -> np.ndarray:
    """Exact survival probability of benchmarking sequences with their inversion gate.

    Sequence ``k`` applies ``C_1 .. C_m`` (``C_j`` = Clifford ``indices[k, j - 1]`` of
    :mod:`robusttomo.clifford`) and then the inverting Clifford ``(C_m ... C_1)^dagger``, each
    implemented as ``channel o C``, to the faulty state ``rho~`` and returns
    ``sum_x C[0, x] <x| rho_out |x>``, the probability of reading ``0..0``.  The ideal product
    ``U`` is tracked as a unitary; the inversion gate ``U^dagger`` has PTM ``PTM(U)^T``.

    Parameters
    ----------
    channel : Channel
        The error channel after every Clifford.
    indices : ndarray, shape (K, m), int
        Clifford indices of ``K`` sequences of length ``m``.
    spam : SpamModel or None, default None
        Faulty preparation and readout; None means perfect.

    Returns
    -------
    ndarray, shape (K,), float
        Survival probabilities.
    """
    from robusttomo import clifford

    ch = _check_cptp(_check_channel(channel))
    n = ch.n_qubits
    sp = _check_spam(spam, n)
    idx = _check_indices(n, indices)
    k, m = idx.shape
    r_err = ch.ptm
    r0 = _pauli.pauli_vector(sp.prep_state)
    state = np.broadcast_to(r0, (k, r0.size)).copy()
    d = 2**n
    # The ideal product is tracked as a d x d unitary (d**3 work per step rather than d**6 for
    # a PTM product); the inversion gate is its adjoint, whose PTM is the transpose of its PTM.
    total = np.broadcast_to(np.eye(d, dtype=complex), (k, d, d)).copy()
    for j in range(m):
        step = np.asarray(clifford.clifford_ptms(n, idx[:, j]), dtype=float)
        state = np.einsum("kij,kj->ki", step, state) @ r_err.T
        total = np.asarray(clifford.clifford_unitaries(n, idx[:, j])) @ total
    inverse = _pauli.ptms_of_unitaries(total)
    state = np.einsum("kji,kj->ki", inverse, state) @ r_err.T
    return (state @ _diag_pauli(n).T) @ sp.confusion[0]


@dataclass(frozen=True)
class DecayFit:
    """Least-squares fit of ``A p**m + B`` to mean survival probabilities.

    Attributes
    ----------
    a : float
        Amplitude ``A`` (absorbs preparation and readout errors).
    p : float
        Decay parameter ``p`` (SPAM-independent).
    b : float
        Offset ``B`` (absorbs preparation and readout errors).
    n_qubits : int
        Number of qubits, which fixes ``d`` in :attr:`average_error`.
    """

    a: float
    p: float
    b: float
    n_qubits: int

    @property
    def average_error(self) -> float:
        """``r = (d - 1)(1 - p)/d``, PRL 106, 180504 (2011); an error, not a fidelity."""
        d = 2**self.n_qubits
        return (d - 1) * (1 - self.p) / d


def _check_lengths(lengths: object) -> np.ndarray:
    arr = np.asarray(lengths)
    ok = arr.ndim == 1 and arr.size > 0 and np.issubdtype(arr.dtype, np.integer)
    if not ok or arr.min() < 1:
        raise ValueError(f"'lengths' must be positive integers; got {np.asarray(lengths).tolist()}")
    if np.unique(arr).size != arr.size or arr.size < 3:
        raise ValueError(
            f"'lengths' must hold at least 3 distinct values (three fit parameters); got {arr.tolist()}"
        )
    return np.sort(arr).astype(np.int64)


def _fit(lengths: np.ndarray, means: np.ndarray) -> tuple[float, float, float]:
    m = lengths.astype(float)
    # Start curve_fit from the best p on a grid, with A and B solved linearly for each p
    # (a vectorized 2x2 least squares): the residual is not convex in p and a fixed start can
    # land in the wrong basin.
    grid = np.linspace(0.0, 1.0, 401)[1:-1] ** 0.25
    u = grid[:, None] ** m[None, :]  # (G, L)
    nl = float(m.size)
    su, suu = u.sum(axis=1), (u * u).sum(axis=1)
    sy, suy = float(means.sum()), u @ means
    det = suu * nl - su * su
    det = np.where(np.abs(det) < 1e-300, 1e-300, det)
    a_g = (nl * suy - su * sy) / det
    b_g = (suu * sy - su * suy) / det
    resid = ((a_g[:, None] * u + b_g[:, None] - means[None, :]) ** 2).sum(axis=1)
    g = int(np.argmin(resid))

    def model(x: np.ndarray, a: float, p: float, b: float) -> np.ndarray:
        return a * p**x + b

    start = [float(a_g[g]), float(grid[g]), float(b_g[g])]
    with warnings.catch_warnings():
        # an exact fit (as many lengths as parameters) has no covariance; it is not used
        warnings.simplefilter("ignore", scipy.optimize.OptimizeWarning)
        popt, _ = scipy.optimize.curve_fit(model, m, means, p0=start, xtol=1e-15, ftol=1e-15, maxfev=20000)
    return float(popt[0]), float(popt[1]), float(popt[2])


def fit_decay(lengths: Sequence[int] | np.ndarray, mean_survival: Sequence[float] | np.ndarray, *, n_qubits: int) -> DecayFit:
    """Fit ``A p**m + B`` to the mean survival probability at each sequence length.

    Minimizes ``sum_m (A p**m + B - mean_survival[m])**2`` with ``scipy.optimize.curve_fit``
    (Levenberg-Marquardt), started from the best ``p`` of a grid on ``(0, 1)`` with ``A, B``
    solved linearly for it.

    Parameters
    ----------
    lengths : array_like, shape (L,), int
        Distinct positive sequence lengths ``m`` (the inversion gate not counted), ``L >= 3``.
    mean_survival : array_like, shape (L,), float
        Mean survival probability at each length, in the order of ``lengths``.
    n_qubits : int
        Number of qubits (for the average error).

    Returns
    -------
    DecayFit
    """
    n = _pauli.check_n_qubits(n_qubits)
    raw = np.asarray(lengths)
    lens = _check_lengths(raw)
    y = np.asarray(mean_survival, dtype=float)
    if y.shape != raw.shape or not np.all(np.isfinite(y)):
        raise ValueError(f"'mean_survival' must be finite with the shape of 'lengths' {raw.shape}; got shape {y.shape}")
    y = y[np.argsort(raw)]
    a, p, b = _fit(lens, y)
    return DecayFit(a, p, b, n)


@dataclass(frozen=True)
class BenchmarkResult:
    """Result of standard randomized benchmarking.

    Attributes
    ----------
    n_qubits : int
        Number of qubits.
    lengths : ndarray, shape (L,), int
        Sequence lengths ``m``, increasing (the inversion gate not counted).
    survival : ndarray, shape (L, K), float
        Observed survival frequency of each sequence (exact probability if
        ``shots_per_sequence`` is None).
    decay : DecayFit
        Fit of ``A p**m + B`` to ``survival.mean(axis=1)``.
    error_interval : ndarray, shape (2,), float
        Percentile bootstrap interval (over sequences, resampled within each length) of the
        average error ``r``, at level ``confidence``.
    confidence : float
        Level of :attr:`error_interval`.
    shots_per_sequence : int or None
        Shots per sequence, or None for exact probabilities.
    n_failed_replicates : int
        Bootstrap replicates whose fit failed (left out of the interval).
    """

    n_qubits: int
    lengths: np.ndarray
    survival: np.ndarray
    decay: DecayFit
    error_interval: np.ndarray
    confidence: float
    shots_per_sequence: int | None
    n_failed_replicates: int

    @property
    def average_error(self) -> float:
        """Average error ``r = (d - 1)(1 - p)/d`` (an error; the average gate fidelity is ``1 - r``)."""
        return self.decay.average_error

    @property
    def fidelity(self) -> float:
        """Average gate fidelity estimate ``1 - r``."""
        return 1.0 - self.decay.average_error

    @property
    def fidelity_interval(self) -> np.ndarray:
        """Interval of the average gate fidelity, ``1 - error_interval[::-1]``, shape (2,)."""
        return 1.0 - self.error_interval[::-1]

    @property
    def total_shots(self) -> int | None:
        """Shots spent, ``shots_per_sequence * L * K``, or None for exact probabilities."""
        if self.shots_per_sequence is None:
            return None
        return self.shots_per_sequence * self.survival.size


def randomized_benchmarking(
    channel: Channel,
    *,
    lengths: Sequence[int] | np.ndarray,
    n_sequences: int,
    rng: np.random.Generator,
    spam: SpamModel | None = None,
    total_shots: int | None = None,
    n_bootstrap: int = 200,
    confidence: float = 0.95,
) -> BenchmarkResult:
    """Standard randomized benchmarking with the inversion gate, simulated.

    For each length ``m`` draw ``n_sequences`` sequences of ``m`` independent uniform Cliffords
    (:func:`robusttomo.clifford.random_clifford_indices`), append the inverting Clifford, run
    each on the faulty device (:func:`sequence_survival`: every Clifford followed by
    ``channel``), read ``0..0`` with ``shots_per_sequence`` binomial shots, fit ``A p**m + B``
    to the mean survival (:func:`fit_decay`) and report ``r = (d - 1)(1 - p)/d``
    ("Scalable and robust randomized benchmarking of quantum processes", PRL 106, 180504
    (2011)).  For a gate-independent error the expected survival is exactly ``A p**m + B``
    with ``p = (tr R_L - 1)/(d*d - 1)`` whatever the SPAM errors.  The interval is the
    percentile bootstrap over sequences (``n_bootstrap`` replicates, sequences resampled with
    replacement within each length, the fit repeated).

    Parameters
    ----------
    channel : Channel
        Error channel after every Clifford.
    lengths : array_like, shape (L,), int
        At least 3 distinct positive lengths ``m``.
    n_sequences : int
        Sequences per length, ``K >= 2``.
    rng : numpy.random.Generator
        Source of the sequences, the shot noise and the bootstrap.
    spam : SpamModel or None, default None
        Faulty preparation and readout; None means perfect.
    total_shots : int or None, default None
        Total shot budget; ``shots_per_sequence = total_shots // (L * K)`` (at least 1).  None
        gives exact survival probabilities (sequence-to-sequence spread only).
    n_bootstrap : int, default 200
        Bootstrap replicates, at least 10.
    confidence : float, default 0.95
        Interval level, in ``(0, 1)``.

    Returns
    -------
    BenchmarkResult

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo.channels import depolarizing
    >>> res = randomized_benchmarking(depolarizing(1, 0.99), lengths=[1, 5, 20], n_sequences=5,
    ...                               rng=np.random.default_rng(0))
    >>> round(res.decay.p, 10)
    0.99
    """
    from robusttomo import clifford

    ch = _check_cptp(_check_channel(channel))
    n = ch.n_qubits
    sp = _check_spam(spam, n)
    lens = _check_lengths(lengths)
    k = _check_int("n_sequences", n_sequences, minimum=2)
    boots = _check_int("n_bootstrap", n_bootstrap, minimum=10)
    if not isinstance(rng, np.random.Generator):
        raise TypeError(f"'rng' must be a numpy.random.Generator; got {type(rng).__name__}")
    if isinstance(confidence, bool) or not isinstance(confidence, (float, int)) or not 0 < confidence < 1:
        raise ValueError(f"'confidence' must lie strictly between 0 and 1; got {confidence!r}")
    per: int | None = None
    if total_shots is not None:
        budget = _check_int("total_shots", total_shots, minimum=1)
        if budget < lens.size * k:
            raise ValueError(
                f"'total_shots' must be at least len(lengths) * n_sequences = {lens.size * k} (one shot per"
                f" sequence); got {budget}"
            )
        per = budget // (lens.size * k)
    survival = np.empty((lens.size, k))
    for i, m in enumerate(lens):
        idx = np.asarray(clifford.random_clifford_indices(n, k * int(m), rng)).reshape(k, int(m))
        prob = np.clip(sequence_survival(ch, idx, spam=sp), 0.0, 1.0)
        survival[i] = prob if per is None else rng.binomial(per, prob) / per
    decay = DecayFit(*_fit(lens, survival.mean(axis=1)), n)
    errors = []
    failed = 0
    for _ in range(boots):
        pick = rng.integers(0, k, size=(lens.size, k))
        means = np.take_along_axis(survival, pick, axis=1).mean(axis=1)
        try:
            _, p_b, _ = _fit(lens, means)
        except RuntimeError:  # curve_fit gave up (maxfev)
            failed += 1
            continue
        errors.append((2**n - 1) * (1 - p_b) / 2**n)
    if not errors:
        raise RuntimeError("randomized_benchmarking: every bootstrap fit failed; use more sequences or shots")
    alpha = (1 - confidence) / 2
    interval = np.quantile(np.asarray(errors), [alpha, 1 - alpha])
    for arr in (lens, survival, interval):
        arr.setflags(write=False)
    return BenchmarkResult(n, lens, survival, decay, interval, float(confidence), per, failed)
