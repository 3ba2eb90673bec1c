"""Decay fits: from per-probe correlations to SPAM-robust linear observations of the unital block.

(The decay-fitting code lands here; this module already fixes the contract that the
reconstruction stage consumes.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


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
