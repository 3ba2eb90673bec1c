"""Generate the shipped three-qubit default probe basis (``robusttomo/_probe_tables3.py``).

Run once, offline, from the repository root (minutes: 24 minutes wall measured on the shared,
heavily loaded 2-core machine, 1 GB peak memory)::

    OPENBLAS_NUM_THREADS=1 python benchmarks/make_probe_table3.py --depth 1 --criterion trace \
        --out robusttomo/_probe_tables3.py

Without ``--out`` the table is only printed with its condition number.

The procedure is deterministic (no random numbers) and has two stages.

1. **Pattern cover.**  A Clifford's unital block ``B = R[1:, 1:]`` is a signed permutation
   matrix; its non-zero pattern depends only on the symplectic part ``S`` of the Clifford
   (``index = s * 64 + r``, see :mod:`robusttomo.clifford`), since the Pauli part ``r`` only
   flips signs.  For a fixed ``S`` the 64 Pauli variants have rows ``B_S D_r`` whose signs are
   the characters of the Pauli group, so together they are a tight frame (frame operator
   ``64 I``) on the 63 positions of ``S``'s pattern.  The cover scans all 1451520 symplectic
   matrices of Sp(6, 2) in index order and repeatedly takes the one whose pattern hits the
   most positions (of the 63 x 63) still covered fewer than ``depth`` times; ties go to the
   lowest index; the identity comes first.  The pool is every Pauli variant of every chosen
   symplectic matrix: its frame operator is ``64 diag(coverage)``, condition number
   ``sqrt(max coverage / min coverage)``.
2. **Backward selection.**  Starting from the whole pool, one row at a time is dropped until
   3969 remain.  Rule ``trace`` (default): the row whose removal raises ``tr(F^-1)`` least,
   ``||F^-1 b_r||**2 / (1 - h_r)`` with ``h_r = b_r^T F^-1 b_r`` (``F`` the frame operator of
   the rows kept; greedy A-optimal design, which guards the small eigenvalues); rule
   ``leverage``: the smallest ``h_r`` (greedy D-optimal).  Scores are rounded to 1e-9, ties go
   to the lowest pool position, and the identity is never dropped.  ``F^-1``, the leverages
   and the norms are updated by the Sherman-Morrison formula, one rank-one update per step;
   the rows are sparse (63 signed entries), so the row updates are gathers.

Measured (one core of a shared machine): depth 1, rule ``trace``: condition number 182.2
(shipped); depth 1, ``leverage``: 249.3; depth 2 (200 symplectic matrices): 221.4 with
``trace``, 294.7 with ``leverage``.

The module written holds ``POOL`` (the cover, stage 1), ``BASIS`` (Clifford indices, pool
order, identity first), ``CONDITION_NUMBER`` (of the flattened unital blocks, as
``robusttomo.estimate._condition``), and the ``DEPTH`` and ``CRITERION`` used.
``tests/test_three_qubit_probes.py`` re-checks the table and runs both stages on reduced
instances against slow references.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import scipy.linalg.blas

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from robusttomo.clifford import _sp_order, _symplectic_from_index, clifford_ptms  # noqa: E402

DEFAULT_DEPTH = 1
_CHUNK = 100_000


def symplectic_permutations(n: int, indices: np.ndarray) -> np.ndarray:
    """Action of symplectic matrices (by index) on the nonzero vectors of GF(2)**(2n).

    Vector ``v`` (an integer ``1 .. 4**n - 1``, bit ``i`` = coordinate ``i``) is point ``v - 1``.
    Returns ``(len(indices), 4**n - 1)`` uint8: ``out[s, v - 1] = S v - 1``.
    """
    dim = 2 * n
    vecs = ((np.arange(1, 4**n)[:, None] >> np.arange(dim)) & 1).astype(np.int64)
    weights = np.int64(1) << np.arange(dim, dtype=np.int64)
    out = np.empty((indices.size, 4**n - 1), dtype=np.uint8)
    for a in range(0, indices.size, _CHUNK):
        s = _symplectic_from_index(n, indices[a:a + _CHUNK]).astype(np.int64)
        img = (np.einsum("kij,vj->kvi", s, vecs) & 1) @ weights
        out[a:a + _CHUNK] = img - 1
    return out


def cover_symplectics(perms: np.ndarray, depth: int, *, log=None) -> list[int]:
    """Greedy pattern cover (stage 1): positions into ``perms``, the identity (row 0) first.

    ``perms`` ``(N, D)``: permutation ``j -> perms[s, j]`` of each candidate.  Each step takes
    the candidate with the most positions ``(j, perms[s, j])`` covered fewer than ``depth``
    times (first maximum: lowest row; no row twice), until every position is covered ``depth``
    times.
    """
    n_cand, dim = perms.shape
    cols = np.arange(dim)
    flat_base = cols * dim
    cover = np.zeros(dim * dim, dtype=np.int64)
    chosen = [0]
    cover[flat_base + perms[0]] += 1
    while (cover < depth).any():
        need = cover < depth
        gain = np.empty(n_cand, dtype=np.int64)
        for a in range(0, n_cand, _CHUNK):
            gain[a:a + _CHUNK] = need[flat_base + perms[a:a + _CHUNK].astype(np.intp)].sum(axis=1)
        gain[chosen] = -1  # each symplectic matrix once
        k = int(np.argmax(gain))
        if gain[k] <= 0:
            raise RuntimeError("the candidates cannot cover every position")
        chosen.append(k)
        cover[flat_base + perms[k]] += 1
        if log is not None:
            log(f"cover: {len(chosen)} symplectic matrices, {int((cover < depth).sum())} positions short")
    return chosen


def sparse_rows(blocks: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Flattened signed-permutation blocks ``(R, D, D)`` as (positions, values), each ``(R, D)``."""
    perm = np.argmax(np.abs(blocks), axis=-1)
    val = np.take_along_axis(blocks, perm[..., None], axis=-1)[..., 0]
    if not np.all(np.abs(val) == 1.0) or np.count_nonzero(blocks) != perm.size:
        raise ValueError("blocks must be signed permutation matrices")
    dim = blocks.shape[-1]
    return np.arange(dim)[None, :] * dim + perm, val


def backward_selection(pos: np.ndarray, val: np.ndarray, count: int, *, protect: int = 0,
                       criterion: str = "trace", log=None) -> np.ndarray:
    """Stage 2: drop one row at a time until ``count`` remain; returns the kept rows, sorted.

    Rows are sparse: row ``r`` has values ``val[r]`` at flat positions ``pos[r]`` of a vector of
    length ``dim = D*D``.  The pool must span the space.  Row ``protect`` is never dropped.
    ``criterion="trace"`` drops the row whose removal raises ``tr(F^-1)`` least
    (``||F^-1 b_r||**2 / (1 - h_r)``, the greedy A-optimal rule, which guards the small
    eigenvalues); ``"leverage"`` drops the smallest leverage ``h_r = b_r^T F^-1 b_r`` (greedy
    D-optimal: keeps ``det F`` largest).  Scores are rounded to 1e-9; ties go to the lowest row.
    """
    if criterion not in ("trace", "leverage"):
        raise ValueError(f"'criterion' must be 'trace' or 'leverage'; got {criterion!r}")
    n_rows = pos.shape[0]
    dim = pos.shape[1] ** 2
    dense = np.zeros((n_rows, dim))
    np.put_along_axis(dense, pos, val, axis=1)
    finv = np.linalg.inv(dense.T @ dense)
    del dense
    lev = _leverages(finv, pos, val)
    sq = _inverse_norms(finv, pos, val) if criterion == "trace" else None
    upd = finv.T  # F^-1 is symmetric: its transpose is the Fortran-ordered view BLAS updates in place
    alive = np.ones(n_rows, dtype=bool)
    for step in range(n_rows - count):
        ok = alive & (lev < 1.0 - 1e-9)  # dropping a row of leverage 1 would lose rank
        score = np.full(n_rows, np.inf)
        score[ok] = np.round(lev[ok] if sq is None else sq[ok] / (1.0 - lev[ok]), 9)
        score[protect] = np.inf
        k = int(np.argmin(score))  # first minimum: lowest row on ties
        if not np.isfinite(score[k]):
            raise RuntimeError("dropping any further row would make the frame singular")
        y = finv[:, pos[k]] @ val[k]  # F^-1 b_k
        hk = float(val[k] @ y[pos[k]])
        g = np.einsum("rk,rk->r", val, y[pos])  # b_r^T F^-1 b_k
        if sq is not None:
            e = np.einsum("rk,rk->r", val, (finv @ y)[pos])  # b_r^T F^-2 b_k
            sq += 2.0 * g * e / (1.0 - hk) + g * g * float(y @ y) / (1.0 - hk) ** 2
        scipy.linalg.blas.dger(1.0 / (1.0 - hk), y, y, a=upd, overwrite_a=True)
        lev += g * g / (1.0 - hk)
        alive[k] = False
        if log is not None and (step + 1) % 500 == 0:
            log(f"selection: {int(alive.sum())} rows left, leverage dropped {hk:.4f}")
    return np.flatnonzero(alive)


def _inverse_norms(finv: np.ndarray, pos: np.ndarray, val: np.ndarray) -> np.ndarray:
    out = np.empty(pos.shape[0])
    for r in range(pos.shape[0]):
        x = finv[:, pos[r]] @ val[r]
        out[r] = x @ x
    return out


def _leverages(finv: np.ndarray, pos: np.ndarray, val: np.ndarray) -> np.ndarray:
    out = np.empty(pos.shape[0])
    for r in range(pos.shape[0]):
        out[r] = val[r] @ finv[np.ix_(pos[r], pos[r])] @ val[r]
    return out


def condition_number(pos: np.ndarray, val: np.ndarray) -> float:
    """2-norm condition number of the dense ``(R, D*D)`` matrix of the rows."""
    dense = np.zeros((pos.shape[0], pos.shape[1] ** 2))
    np.put_along_axis(dense, pos, val, axis=1)
    s = np.linalg.svd(dense, compute_uv=False)
    return float(s[0] / s[-1])


def make_table(depth: int = DEFAULT_DEPTH, criterion: str = "trace", *,
               log=print) -> tuple[tuple[int, ...], float, list[int]]:
    """Both stages for three qubits; returns (Clifford indices, condition number, cover)."""
    t0 = time.perf_counter()
    perms = symplectic_permutations(3, np.arange(_sp_order(3), dtype=np.int64))
    log(f"symplectic actions: {perms.shape[0]} in {time.perf_counter() - t0:.1f} s")
    sym = cover_symplectics(perms, depth, log=log)
    del perms
    pool = (np.array(sym, dtype=np.int64)[:, None] * 64 + np.arange(64)[None, :]).reshape(-1)
    pos = np.empty((pool.size, 63), dtype=np.intp)
    val = np.empty((pool.size, 63))
    for a in range(0, pool.size, 1024):
        pos[a:a + 1024], val[a:a + 1024] = sparse_rows(clifford_ptms(3, pool[a:a + 1024])[:, 1:, 1:])
    log(f"pool: {pool.size} Cliffords from {len(sym)} symplectic matrices ({time.perf_counter() - t0:.1f} s)")
    keep = backward_selection(pos, val, 63 * 63, protect=0, criterion=criterion, log=log)
    cond = condition_number(pos[keep], val[keep])
    log(f"selected {keep.size} probes, condition number {cond:.4f} ({time.perf_counter() - t0:.1f} s)")
    return tuple(int(i) for i in pool[keep]), cond, [int(x) for x in sym]


def render(indices: tuple[int, ...], cond: float, depth: int, sym: list[int], criterion: str = "trace") -> str:
    """Text of the table module."""
    n_sym = len(sym)
    lines = ['"""Three-qubit default probe basis, generated by ``benchmarks/make_probe_table3.py``.',
             "",
             "Regenerate (minutes; see the generator's docstring)::",
             "",
             f"    OPENBLAS_NUM_THREADS=1 python benchmarks/make_probe_table3.py --depth {depth} "
             f"--criterion {criterion} --out robusttomo/_probe_tables3.py",
             "",
             f"``POOL``: the {n_sym} symplectic-matrix indices of the greedy pattern cover of depth",
             "``DEPTH`` (stage 1), in cover order.  ``BASIS``: 3969 Clifford indices ``s * 64 + r``",
             "(identity first, pool order) of Pauli variants of ``POOL`` kept by backward selection",
             "with rule ``CRITERION`` (stage 2).  ``CONDITION_NUMBER``: 2-norm condition number",
             "of the ``(3969, 3969)`` matrix of flattened unital blocks.  Checked by",
             "``tests/test_three_qubit_probes.py``.",
             '"""',
             "",
             f"DEPTH = {depth}",
             f"CRITERION = {criterion!r}",
             f"CONDITION_NUMBER = {cond!r}",
             "",
             "POOL = ("]
    for a in range(0, n_sym, 10):
        lines.append("    " + " ".join(f"{i}," for i in sym[a:a + 10]))
    lines += [")", "", "BASIS = ("]
    for a in range(0, len(indices), 10):
        lines.append("    " + " ".join(f"{i}," for i in indices[a:a + 10]))
    lines.append(")")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--depth", type=int, default=DEFAULT_DEPTH, help="pattern cover depth (default %(default)s)")
    ap.add_argument("--criterion", choices=("trace", "leverage"), default="trace",
                    help="backward-selection rule (default %(default)s)")
    ap.add_argument("--out", type=Path, default=None, help="write the table module here")
    args = ap.parse_args(argv)
    indices, cond, sym = make_table(args.depth, args.criterion)
    text = render(indices, cond, args.depth, sym, args.criterion)
    if args.out is None:
        print(f"condition number {cond:.4f}; {len(indices)} probes from {len(sym)} symplectic matrices")
    else:
        tmp = args.out.with_suffix(".tmp")
        tmp.write_text(text)
        tmp.replace(args.out)
        print(f"wrote {args.out}: condition number {cond:.4f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
