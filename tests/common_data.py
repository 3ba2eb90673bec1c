"""Small builders shared by several test modules: random plans and counts, and the numbers of a
reconstruction flattened for bit-for-bit comparisons."""

from __future__ import annotations

import numpy as np

from robusttomo.counts import Counts
from robusttomo.plan import Plan, SequenceBlock, SequenceKind


def random_plan(n, lengths, k, rng):
    """A reference plan of ``k`` uniformly random Clifford sequences per length (1 or 2 qubits)."""
    order = 24 if n == 1 else 11520
    blocks, first = [], 0
    for m in lengths:
        blocks.append(SequenceBlock(SequenceKind.REFERENCE, m, rng.integers(0, order, size=(k, m)), first))
        first += k
    return Plan(n_qubits=n, shots=100, seed=0, blocks=tuple(blocks), interleave=None)


def random_counts(plan, rng):
    """Arbitrary (not physical) outcome counts for every sequence of ``plan``."""
    d = 2**plan.n_qubits
    cnt = rng.integers(0, 30, size=(sum(b.cliffords.shape[0] for b in plan.blocks), d)).astype(float)
    cnt[:, 0] += 1
    return Counts(n_qubits=plan.n_qubits, plan_fingerprint=plan.fingerprint, sequence_ids=plan.sequence_ids,
                  counts=cnt, exact=False, source="test")


def result_numbers(rec) -> tuple[np.ndarray, np.ndarray]:
    """Every number of a Reconstruction: (compared exactly, error-generator figures)."""
    f = rec.figures
    vals = []
    for iv in (f.average_gate_fidelity, f.entanglement_fidelity, f.diamond_distance, f.unitarity,
               f.decay_fidelity, *f.pauli_error_rates.values()):
        vals += [iv.value, iv.low, iv.high]
    # error-generator figures go through a matrix logarithm and a least-squares solve (LAPACK),
    # whose last digit can depend on the memory layout of the process: compared to rounding
    rates = [x for iv in (f.coherent_share, *f.hamiltonian.values(), *f.stochastic.values())
             for x in (iv.value, iv.low, iv.high)]
    s = f.diamond_distance_range
    vals += [s.low, s.high, s.attained_max, s.certified_max, rec.unital_block_error, rec.anchor_weight]
    vals += [x for m in rec.models for x in (m.chi2, m.criterion, m.heldout_chi2, m.diamond_distance)]
    exact = np.concatenate([np.array(vals, dtype=float), rec.nonunital_ranges.ravel(), rec.error_channel.ptm.ravel(),
                            rec.decays.bootstrap_lambdas.ravel()])
    return exact, np.array(rates, dtype=float)
