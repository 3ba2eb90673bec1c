"""Error generators: Hamiltonian and Pauli-stochastic rates of a channel near its target.

The elementary generators follow "A taxonomy of small Markovian errors", PRX Quantum 3,
020335 (2022), with unnormalized Pauli matrices ``P`` (labels ``"X"``, ``"IZ"``, ...):

* Hamiltonian  ``H_P[rho] = -i [P, rho]``,
* Pauli-stochastic  ``S_P[rho] = P rho P - rho``,

for every non-identity Pauli ``P``.  Each is returned as a real ``(d*d, d*d)`` matrix in the
PTM basis of :mod:`robusttomo.channels` (``G[i, j] = tr(P_i G[P_j]) / d``, Pauli order
``II, IX, IY, IZ, XI, ...``, qubit 0 the leftmost label character).

A generator ``G = sum_P h_P H_P + sum_P s_P S_P`` gives the channel ``exp(G)`` (matrix
exponential of the PTM).  Two worked cases fix the scale of the rates:

* ``exp(h H_P)`` is the unitary ``rho -> U rho U^dagger`` with ``U = exp(-i h P)``; so a
  coherent rotation ``exp(-i theta/2 P)`` (see :func:`robusttomo.channels.rotation`) has
  ``h_P = theta / 2``.
* ``exp(s S_P)`` is the Pauli channel ``rho -> (1 - p) rho + p P rho P`` with
  ``p = (1 - exp(-2 s)) / 2``, so ``p ~ s`` for small ``s``.

To first order the entanglement infidelity of ``exp(G)`` is ``sum_P s_P + sum_P h_P**2``
(same reference), which :func:`robusttomo.metrics.coherent_share` uses.

Error convention: the project's noise model is an error channel *after* the ideal gate
(``L o U``), so by default ``rates_from_channel(channel, target)`` analyses
``E = R R_target^T``, i.e. ``R = exp(G) R_target``.  ``side="before"`` analyses
``E = R_target^T R`` (``R = R_target exp(G)``) instead.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from robusttomo import _pauli
from robusttomo.channels import Channel

__all__ = [
    "ErrorGenerator",
    "channel_from_rates",
    "error_ptm",
    "generator_matrix",
    "hamiltonian_basis",
    "rates_from_channel",
    "stochastic_basis",
]

_SIDES = ("after", "before")


@functools.lru_cache(maxsize=None)
def _bases(n_qubits: int) -> tuple[np.ndarray, np.ndarray]:
    d = 2**n_qubits
    p = _pauli.pauli_stack(n_qubits)
    q = p[1:]
    # tr(P_i Q P_j) and tr(P_i P_j Q) for every non-identity Q (axis a)
    left = np.einsum("ibc,acd,jdb->aij", p, q, p, optimize=True)
    right = np.einsum("ibc,jcd,adb->aij", p, p, q, optimize=True)
    ham = (-1j * (left - right)).real / d
    # tr(P_i Q P_j Q) / d - delta_ij; Q P_j Q = +-P_j so only the diagonal survives
    sto = np.einsum("ibc,acd,jde,aeb->aij", p, q, p, q, optimize=True).real / d
    sto = sto - np.eye(d * d)[None]
    ham.setflags(write=False)
    sto.setflags(write=False)
    return ham, sto


def hamiltonian_basis(n_qubits: int) -> np.ndarray:
    """PTMs of the Hamiltonian generators ``H_P[rho] = -i [P, rho]``.

    Parameters
    ----------
    n_qubits : int
        Number of qubits, 1..3.

    Returns
    -------
    ndarray, shape (d*d - 1, d*d, d*d), float, read-only
        Entry ``a`` is the PTM of ``H_P`` for ``P = pauli_labels(n_qubits)[a + 1]``
        (Pauli order without the identity).  Each is antisymmetric.
    """
    return _bases(_pauli.check_n_qubits(n_qubits))[0]


def stochastic_basis(n_qubits: int) -> np.ndarray:
    """PTMs of the Pauli-stochastic generators ``S_P[rho] = P rho P - rho``.

    Parameters
    ----------
    n_qubits : int
        Number of qubits, 1..3.

    Returns
    -------
    ndarray, shape (d*d - 1, d*d, d*d), float, read-only
        Entry ``a`` is the PTM of ``S_P`` for ``P = pauli_labels(n_qubits)[a + 1]``.  Each is
        diagonal, with ``-2`` where ``P_j`` anticommutes with ``P`` and ``0`` elsewhere.
    """
    return _bases(_pauli.check_n_qubits(n_qubits))[1]


def _rate_vector(name: str, rates: object, n: int) -> np.ndarray:
    """Mapping label -> rate to a vector over the non-identity labels (validated)."""
    out = np.zeros(4**n - 1)
    if rates is None:
        return out
    if not isinstance(rates, Mapping):
        raise TypeError(f"'{name}' must be a mapping from Pauli label to rate, or None; got {type(rates).__name__}")
    for label, value in rates.items():
        if not isinstance(label, str) or len(label) != n or any(c not in "IXYZ" for c in label):
            raise ValueError(
                f"'{name}' keys must be {n}-character Pauli labels over 'IXYZ'; got {label!r}"
            )
        if label == "I" * n:
            raise ValueError(f"'{name}' must not contain the identity label {label!r}; it generates nothing")
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise TypeError(f"'{name}[{label!r}]' must be a real number; got {value!r}")
        if not np.isfinite(value):
            raise ValueError(f"'{name}[{label!r}]' must be finite; got {value!r}")
        out[_pauli.pauli_index(label) - 1] = float(value)
    return out


def generator_matrix(
    n_qubits: int,
    hamiltonian: Mapping[str, float] | None = None,
    stochastic: Mapping[str, float] | None = None,
) -> np.ndarray:
    """PTM of the generator ``G = sum_P h_P H_P + sum_P s_P S_P``.

    Parameters
    ----------
    n_qubits : int
        Number of qubits, 1..3.
    hamiltonian : mapping of str to float, optional
        Hamiltonian rates ``h_P`` keyed by non-identity Pauli label (``n_qubits`` characters,
        qubit 0 leftmost).  Missing labels are 0.
    stochastic : mapping of str to float, optional
        Pauli-stochastic rates ``s_P``, same keys.

    Returns
    -------
    ndarray, shape (d*d, d*d), float
        The generator in the PTM basis; ``scipy.linalg.expm`` of it is the channel's PTM.
    """
    n = _pauli.check_n_qubits(n_qubits)
    h = _rate_vector("hamiltonian", hamiltonian, n)
    s = _rate_vector("stochastic", stochastic, n)
    ham, sto = _bases(n)
    return np.tensordot(h, ham, axes=1) + np.tensordot(s, sto, axes=1)


def channel_from_rates(
    n_qubits: int,
    *,
    hamiltonian: Mapping[str, float] | None = None,
    stochastic: Mapping[str, float] | None = None,
) -> Channel:
    """Channel ``exp(G)`` of a Hamiltonian-plus-stochastic error generator.

    Parameters
    ----------
    n_qubits : int
        Number of qubits, 1..3.
    hamiltonian, stochastic : mapping of str to float, optional
        Rates ``h_P`` and ``s_P`` keyed by non-identity Pauli label (see
        :func:`generator_matrix`).  A coherent rotation ``exp(-i theta/2 P)`` is
        ``hamiltonian={P: theta / 2}``; ``stochastic={P: s}`` is a Pauli-``P`` error with
        probability ``(1 - exp(-2 s)) / 2``.  The result is CPTP whenever every ``s_P >= 0``.

    Returns
    -------
    Channel

    Examples
    --------
    >>> import numpy as np
    >>> from robusttomo.channels import rotation
    >>> from robusttomo.generators import channel_from_rates
    >>> channel_from_rates(1, hamiltonian={"Z": 0.05}).allclose(rotation("Z", 0.1))
    True
    """
    g = generator_matrix(n_qubits, hamiltonian, stochastic)
    return Channel.from_ptm(scipy.linalg.expm(g))


@dataclass(frozen=True)
class ErrorGenerator:
    """Hamiltonian and stochastic rates of an error generator ``G`` with ``E = exp(G)``.

    Attributes
    ----------
    n_qubits : int
        Number of qubits.
    hamiltonian : dict of str to float
        ``h_P`` for every non-identity Pauli label, in Pauli order.
    stochastic : dict of str to float
        ``s_P`` for every non-identity Pauli label, in Pauli order.
    residual : float
        Frobenius norm of the part of ``G`` outside the span of the ``H_P`` and ``S_P``
        (the correlation and active terms of the taxonomy, e.g. amplitude damping's
        non-unital part); 0 for a generator of pure H and S type.
    generator : ndarray, shape (d*d, d*d), float, read-only
        The full generator ``G = logm(E)`` in the PTM basis.
    """

    n_qubits: int
    hamiltonian: dict[str, float]
    stochastic: dict[str, float]
    residual: float
    generator: np.ndarray


def _target_ptm(target: object, n: int, *, unitary_only: bool = True) -> np.ndarray:
    """PTM of a target given as None (identity), a (d, d) unitary or a Channel (validated).

    With ``unitary_only`` a Channel target must have an orthogonal PTM (a unitary channel),
    because ``R_target^T`` is then used as its inverse.
    """
    d = 2**n
    if target is None:
        return np.eye(d * d)
    if isinstance(target, Channel):
        if target.n_qubits != n:
            raise ValueError(
                f"'target' acts on {target.n_qubits} qubit(s) but the channel on {n}; pass a matching target"
            )
        r = target.ptm
        if unitary_only and not np.allclose(r.T @ r, np.eye(d * d), atol=1e-8, rtol=0):
            raise ValueError(
                "'target' must be a unitary channel (orthogonal PTM, R^T R = I to 1e-8); got a "
                "non-unitary Channel; pass the ideal unitary matrix instead"
            )
        return r
    if isinstance(target, (str, bytes, Mapping)):
        raise TypeError(f"'target' must be None, a unitary matrix or a Channel; got {type(target).__name__}")
    arr = np.asarray(target)
    if not np.issubdtype(arr.dtype, np.number):
        raise TypeError(f"'target' must be None, a unitary matrix or a Channel; got {type(target).__name__}")
    if arr.shape != (d, d):
        raise ValueError(f"'target' unitary must have shape ({d}, {d}) for {n} qubit(s); got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError("'target' must be finite; got NaN or inf entries")
    if not np.allclose(arr.conj().T @ arr, np.eye(d), atol=1e-8, rtol=0):
        raise ValueError("'target' is not unitary (U^dagger U != I to 1e-8); pass a unitary matrix or a Channel")
    return _pauli.ptm_of_unitary(arr.astype(complex))


def error_ptm(channel: Channel, target: object = None, *, side: str = "after") -> np.ndarray:
    """PTM of the error of ``channel`` relative to a unitary ``target``.

    Parameters
    ----------
    channel : Channel
        The implemented operation, PTM ``R``.
    target : None, ndarray of shape (d, d), or Channel
        The ideal operation (identity when None); a Channel target should be unitary, since
        ``R_target^T`` is used as its inverse.
    side : {"after", "before"}
        ``"after"`` (default, the project's noise model ``L o U``): ``E = R R_target^T``.
        ``"before"``: ``E = R_target^T R``.

    Returns
    -------
    ndarray, shape (d*d, d*d), float
    """
    if not isinstance(channel, Channel):
        raise TypeError(f"'channel' must be a robusttomo Channel; got {type(channel).__name__}")
    if side not in _SIDES:
        raise ValueError(f"'side' must be 'after' or 'before'; got {side!r}")
    rt = _target_ptm(target, channel.n_qubits)
    return channel.ptm @ rt.T if side == "after" else rt.T @ channel.ptm


def rates_from_channel(channel: Channel, target: object = None, *, side: str = "after") -> ErrorGenerator:
    """Error generator of a channel: ``G = logm(E)`` projected onto the H and S generators.

    Parameters
    ----------
    channel : Channel
        The implemented operation.
    target : None, ndarray of shape (d, d), or Channel
        The ideal unitary (identity when None).
    side : {"after", "before"}
        Where the error sits; see :func:`error_ptm` (default ``E = R R_target^T``).

    Returns
    -------
    ErrorGenerator

    Raises
    ------
    ValueError
        If ``E`` has no real principal logarithm: an eigenvalue that is zero (e.g. a fully
        depolarizing or fully damping channel) or lies on the closed negative real axis
        (e.g. a rotation by ``pi``, or a depolarizing channel with negative decay).

    Notes
    -----
    The logarithm is the principal branch (``scipy.linalg.logm``): every eigenvalue ``z`` of
    ``E`` maps to ``log|z| + i arg z`` with ``arg z`` in ``(-pi, pi)``.  So rotation angles are
    reported wrapped into ``(-pi, pi)``: ``h_P = theta / 2`` only for ``|theta| < pi``.  Other,
    real, non-principal logarithms may exist when negative eigenvalues come in pairs; they
    are not considered.

    The rates solve the least-squares problem ``min || G - sum h_P H_P - sum s_P S_P ||_F``.
    The ``H_P`` are mutually orthogonal antisymmetric matrices (so ``h_P = <H_P, G> / <H_P, H_P>``)
    and the ``S_P`` are diagonal, linearly independent but not orthogonal, so the ``s_P`` come
    from a least-squares fit to the diagonal of ``G``; ``residual`` is the norm left over.

    Examples
    --------
    >>> from robusttomo.channels import rotation
    >>> from robusttomo.generators import rates_from_channel
    >>> round(rates_from_channel(rotation("X", 0.2)).hamiltonian["X"], 12)
    0.1
    """
    e = error_ptm(channel, target, side=side)
    n = channel.n_qubits
    g = _real_log(e)
    ham, sto = _bases(n)
    h = np.einsum("aij,ij->a", ham, g) / np.einsum("aij,aij->a", ham, ham)
    diag_basis = np.einsum("aii->ia", sto)  # (d*d, d*d-1)
    s = np.linalg.lstsq(diag_basis, np.diag(g), rcond=None)[0]
    fitted = np.tensordot(h, ham, axes=1) + np.tensordot(s, sto, axes=1)
    labels = _pauli.pauli_labels(n)[1:]
    g.setflags(write=False)
    return ErrorGenerator(
        n_qubits=n,
        hamiltonian={lab: float(v) for lab, v in zip(labels, h)},
        stochastic={lab: float(v) for lab, v in zip(labels, s)},
        residual=float(np.linalg.norm(g - fitted)),
        generator=g,
    )


def _real_log(e: np.ndarray) -> np.ndarray:
    """Real principal matrix logarithm, or ValueError when there is none."""
    w = np.linalg.eigvals(e)
    scale = max(1.0, float(np.max(np.abs(w))))
    tiny = 1e-10 * scale
    if np.min(np.abs(w)) < tiny:
        raise ValueError(
            "error channel has a zero eigenvalue (it is not invertible, e.g. fully depolarizing "
            f"or fully damping; smallest |eigenvalue| {np.min(np.abs(w)):.3g}); it has no logarithm "
            "and no error generator"
        )
    on_negative_axis = (np.abs(w.imag) <= 1e-9 * scale) & (w.real < 0)
    if np.any(on_negative_axis):
        raise ValueError(
            f"error channel has a negative real eigenvalue ({w.real[on_negative_axis].min():.6g}); "
            "it has no real principal logarithm (e.g. a rotation by pi or a depolarizing decay "
            "below 0); no error generator is defined"
        )
    g = scipy.linalg.logm(e)
    if np.iscomplexobj(g):
        if np.max(np.abs(g.imag)) > 1e-8 * max(1.0, float(np.max(np.abs(g.real)))):
            raise ValueError("error channel has no real principal logarithm (complex logm); no error generator is defined")
        g = g.real
    return np.array(g, dtype=float)
