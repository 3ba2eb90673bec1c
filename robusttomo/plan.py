"""Experiment plans: the random Clifford sequences to run, their HDF5 file, and OpenQASM 3 export.

Conventions (fixed for the whole package; see also :mod:`robusttomo._pauli`)
------------------------------------------------------------------------------
* ``n`` qubits (1..3), ``d = 2**n``.  Qubit 0 is the leftmost tensor factor of every matrix and
  the most significant bit of a measured outcome ``x`` (textbook order ``|q0 q1 ...>``).
* A *reference* sequence of length ``m`` prepares ``|0...0>``, applies the random Cliffords
  ``C_1``, then ``C_2``, ..., then ``C_m``, and measures every qubit.  There is no inversion
  gate.  Its ideal total unitary is ``U = C_m ... C_1``.
* An *interleaved* sequence applies the gate ``G`` after every Clifford:
  ``C_1, G, C_2, G, ..., C_m, G``, so ``U = G C_m ... G C_1``.
* Cliffords are stored as integer indices in the convention of :mod:`robusttomo.clifford`
  (``Clifford.from_index(n, i)``).  ``cliffords[k, 0]`` is applied first.
* Sequence ids are unique non-negative integers across a whole plan; block ``b`` holds ids
  ``b.first_id + arange(K)``.

The HDF5 layout and the OpenQASM 3 export are documented in ``docs/file-formats.md``; why the
default plans look as they do is in ``docs/plans.md``.
"""

from __future__ import annotations

import functools
import json
import math
import os
import re
import types
import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from enum import Enum
from pathlib import Path

import h5py
import numpy as np

from robusttomo import _io, _pauli
from robusttomo import clifford as _clifford
from robusttomo._version import __version__
from robusttomo.errors import DataError

__all__ = [
    "CONVENTION",
    "InterleavedGate",
    "Plan",
    "SequenceBlock",
    "SequenceKind",
    "STANDARD_GATES",
    "default_lengths",
    "export_qasm",
    "load_plan",
    "make_plan",
    "save_plan",
]

_KIND = "robusttomo-plan"
_SCHEMAS = (1,)
_INDEX_KIND = "robusttomo-qasm-bundle-index"

#: Unitary, qubit-order and Clifford-index convention of every plan; stored in plan files.
CONVENTION = (
    "sequence unitary U = C_m ... C_1 (reference) or U = G C_m ... G C_1 (interleaved), "
    "C_1 = cliffords[:, 0] applied first to |0...0>, every qubit measured, no inversion gate; "
    "qubit 0 is the leftmost tensor factor and the most significant bit of an outcome; "
    "Clifford indices are those of robusttomo.clifford (Clifford.from_index)"
)

# Largest plan accepted (total number of stored Clifford indices, sum of K * m over blocks):
# 2**26 int64 entries is 512 MiB, far beyond any experiment; larger requests are mistakes.
_MAX_CLIFFORDS = 2**26
_MAX_SHOTS = 10**9
_MAX_ID = 2**62
_UNITARY_ATOL_EXACT = 1e-8  # a unitary given as an array (constructor) must be this unitary
_UNITARY_ATOL_FILE = 1e-6  # a unitary read from a text file may carry rounding; it is re-unitarized

# ---- standard gates ----------------------------------------------------------------------------
_S2 = 1 / math.sqrt(2)


def _controlled(u: np.ndarray) -> np.ndarray:
    k = u.shape[0]
    out = np.eye(2 * k, dtype=complex)
    out[k:, k:] = u
    return out


_ONE_QUBIT = {
    "id": np.eye(2),
    "x": np.array([[0, 1], [1, 0]]),
    "y": np.array([[0, -1j], [1j, 0]]),
    "z": np.array([[1, 0], [0, -1]]),
    "h": np.array([[1, 1], [1, -1]]) * _S2,
    "s": np.diag([1, 1j]),
    "sdg": np.diag([1, -1j]),
    "t": np.diag([1, np.exp(1j * np.pi / 4)]),
    "tdg": np.diag([1, np.exp(-1j * np.pi / 4)]),
    "sx": np.array([[1 + 1j, 1 - 1j], [1 - 1j, 1 + 1j]]) / 2,
    "sxdg": np.array([[1 - 1j, 1 + 1j], [1 + 1j, 1 - 1j]]) / 2,
}
_SWAP = np.eye(4)[[0, 2, 1, 3]]
_MULTI_QUBIT = {
    "cx": _controlled(_ONE_QUBIT["x"]),
    "cy": _controlled(_ONE_QUBIT["y"]),
    "cz": _controlled(_ONE_QUBIT["z"]),
    "ch": _controlled(_ONE_QUBIT["h"]),
    "swap": _SWAP,
    "iswap": np.array([[1, 0, 0, 0], [0, 0, 1j, 0], [0, 1j, 0, 0], [0, 0, 0, 1]]),
    "sqrt_iswap": np.array([[1, 0, 0, 0], [0, _S2, 1j * _S2, 0], [0, 1j * _S2, _S2, 0], [0, 0, 0, 1]]),
    "ccx": _controlled(_controlled(_ONE_QUBIT["x"])),
    "cswap": _controlled(_SWAP),
}
_GATE_TABLE: dict[str, np.ndarray] = {}
for _name, _u in {**_ONE_QUBIT, **_MULTI_QUBIT}.items():
    _arr = np.array(_u, dtype=complex)
    _arr.setflags(write=False)
    _GATE_TABLE[_name] = _arr

#: Names accepted by :meth:`InterleavedGate.standard`, mapped to the number of qubits they act on.
#: Matrices use the gate's first qubit as its leftmost factor (``cx``: first qubit controls).
STANDARD_GATES: Mapping[str, int] = types.MappingProxyType(
    {name: u.shape[0].bit_length() - 1 for name, u in _GATE_TABLE.items()})

# Gates of OpenQASM 3's stdgates.inc with the same matrix (up to a global phase) as ours; the
# others (sxdg, iswap, sqrt_iswap) are exported as a gate definition.
_QASM_STDGATES = frozenset({"id", "x", "y", "z", "h", "s", "sdg", "t", "tdg", "sx",
                            "cx", "cy", "cz", "ch", "swap", "ccx", "cswap"})
_QASM_GATE_NAME = "rt_interleave"


def _embed_unitary(u: np.ndarray, qubits: tuple[int, ...], n: int) -> np.ndarray:
    """Full ``(d, d)`` matrix of a ``k``-qubit ``u`` acting on ``qubits`` (u's factor t on qubits[t])."""
    k = len(qubits)
    rest = [q for q in range(n) if q not in qubits]
    full = np.kron(u, np.eye(2 ** (n - k)))  # factors ordered qubits + rest
    order = list(qubits) + rest  # position p of `full` holds register qubit order[p]
    inv = np.argsort(order)
    t = full.reshape((2,) * (2 * n))
    t = t.transpose(list(inv) + [n + i for i in inv])
    return t.reshape(2**n, 2**n)


class SequenceKind(Enum):
    """Kind of a block of sequences."""

    #: ``C_1, ..., C_m`` then measure.
    REFERENCE = "reference"
    #: ``C_1, G, ..., C_m, G`` then measure.
    INTERLEAVED = "interleaved"


def _check_label(label: object) -> str:
    if not isinstance(label, str):
        raise TypeError(f"'label' must be a string; got {type(label).__name__}")
    if not label.strip() or len(label) > 100 or not label.isprintable():
        raise ValueError(f"'label' must be 1 to 100 printable characters (no newlines); got {label!r}")
    return label


def _check_unitary_array(u: object, *, name: str, atol: float) -> np.ndarray:
    """Validate a square unitary of dimension 2, 4 or 8; return a complex128 copy."""
    try:
        arr = np.array(u, dtype=complex)
    except (TypeError, ValueError):
        raise TypeError(f"'{name}' must be a numeric (d, d) array; got {type(u).__name__}") from None
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1] or arr.shape[0] not in (2, 4, 8):
        raise ValueError(f"'{name}' must be a square matrix of dimension 2, 4 or 8 (1 to 3 qubits); "
                         f"got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"'{name}' must be finite; got NaN or inf entries")
    err = float(np.max(np.abs(arr.conj().T @ arr - np.eye(arr.shape[0]))))
    if err > atol:
        raise ValueError(f"'{name}' is not unitary: max |U^dagger U - I| = {err:.3g} > {atol:g}")
    return arr


@dataclass(frozen=True, eq=False)
class InterleavedGate:
    """The gate ``G`` of interleaved sequences, as the unitary it should implement.

    Build it with :meth:`standard` (a named gate), :meth:`from_file` (a user unitary in a file),
    or directly from a label and a full-register unitary.

    Attributes
    ----------
    label : str
        Human-readable name (1 to 100 printable characters), e.g. ``"cz"`` or ``"my_gate"``.
    unitary : ndarray, shape (d, d), complex128, read-only
        The ideal unitary on the whole register, qubit 0 the leftmost tensor factor.  Checked
        unitary to 1e-8 (not re-normalized, so a stored plan reloads bit for bit).
    name : str or None
        Name from :data:`STANDARD_GATES` for a standard gate, ``None`` for a user unitary.
    qubits : tuple of int or None
        Register qubits a standard gate acts on, in the gate's own order (``("cx", (1, 0))``:
        qubit 1 controls).  ``None`` for a user unitary, which acts on the whole register.

    Examples
    --------
    >>> from robusttomo.plan import InterleavedGate
    >>> g = InterleavedGate.standard("cz")
    >>> g.label, g.unitary.shape
    ('cz', (4, 4))
    """

    label: str
    unitary: np.ndarray
    name: str | None = None
    qubits: tuple[int, ...] | None = None

    def __post_init__(self) -> None:
        _check_label(self.label)
        u = _check_unitary_array(self.unitary, name="unitary", atol=_UNITARY_ATOL_EXACT)
        n = u.shape[0].bit_length() - 1
        if self.name is None:
            if self.qubits is not None:
                raise ValueError("'qubits' applies to standard gates only; a user unitary acts on the "
                                 f"whole register; got qubits={self.qubits!r}")
        else:
            if not isinstance(self.name, str) or self.name not in STANDARD_GATES:
                raise ValueError(f"'name' must be one of {sorted(STANDARD_GATES)} or None; got {self.name!r}")
            qubits = _check_gate_qubits(self.qubits, STANDARD_GATES[self.name], n)
            object.__setattr__(self, "qubits", qubits)
            expect = _embed_unitary(_GATE_TABLE[self.name], qubits, n)
            if not np.allclose(u, expect, atol=1e-12, rtol=0):
                raise ValueError(f"'unitary' does not match the standard gate {self.name!r} on qubits "
                                 f"{qubits}; pass name=None for a user unitary")
        u.setflags(write=False)
        object.__setattr__(self, "unitary", u)

    @property
    def n_qubits(self) -> int:
        """Number of qubits of the register the unitary acts on."""
        return int(self.unitary.shape[0]).bit_length() - 1

    @property
    def is_clifford(self) -> bool:
        """Whether ``G`` maps every Pauli to a signed Pauli (its PTM is a signed permutation)."""
        r = _pauli.ptm_of_unitary(self.unitary)
        return bool(np.allclose(np.abs(r).sum(axis=1), 1.0, atol=1e-9)
                    and np.allclose(np.abs(r).max(axis=1), 1.0, atol=1e-9))

    @classmethod
    def standard(cls, name: str, *, n_qubits: int | None = None,
                 qubits: Sequence[int] | None = None) -> InterleavedGate:
        """A named standard gate, optionally placed on some qubits of a larger register.

        Parameters
        ----------
        name : str
            One of :data:`STANDARD_GATES` (case-insensitive): one-qubit ``id, x, y, z, h, s,
            sdg, t, tdg, sx, sxdg``; two-qubit ``cx, cy, cz, ch, swap, iswap, sqrt_iswap``;
            three-qubit ``ccx, cswap``.  ``iswap`` maps ``|01> -> i|10>``; ``sqrt_iswap`` is its
            square root ``exp(i pi/8 (XX + YY))``.
        n_qubits : int, optional
            Register size (1..3); default: the gate's own number of qubits.
        qubits : sequence of int, optional
            Distinct register qubits the gate acts on, in the gate's qubit order; default
            ``0, 1, ...``.

        Returns
        -------
        InterleavedGate
            With label ``name`` on the default qubits, else ``"name(q1,q0)"`` style.
        """
        if not isinstance(name, str):
            raise TypeError(f"'name' must be a string; got {type(name).__name__}")
        key = name.strip().lower()
        if key not in STANDARD_GATES:
            raise ValueError(f"unknown standard gate {name!r}; choose one of {sorted(STANDARD_GATES)}, "
                             "or load a user unitary with InterleavedGate.from_file")
        k = STANDARD_GATES[key]
        n = k if n_qubits is None else _pauli.check_n_qubits(n_qubits)
        if k > n:
            raise ValueError(f"gate {key!r} acts on {k} qubits but 'n_qubits' is {n}")
        q = _check_gate_qubits(None if qubits is None else tuple(qubits), k, n)
        label = key if q == tuple(range(k)) else f"{key}({','.join(f'q{i}' for i in q)})"
        return cls(label=label, unitary=_embed_unitary(_GATE_TABLE[key], q, n), name=key, qubits=q)

    @classmethod
    def from_file(cls, path: str | os.PathLike[str], *, label: str | None = None) -> InterleavedGate:
        """A user unitary read from a ``.npy`` or ``.json`` file.

        Formats (see ``docs/file-formats.md``): ``.npy`` holds a numeric ``(d, d)`` array (read
        with ``allow_pickle=False``); ``.json`` holds the matrix as nested rows of ``[re, im]``
        pairs, either bare or as ``{"unitary": [...], "label": "..."}``.  ``d`` is 2, 4 or 8, qubit
        0 the leftmost factor; at most 1 MiB.  The matrix must be unitary to 1e-6; it is then
        replaced by the nearest unitary (polar factor) so rounding in a text file does not leak
        into the model.

        Parameters
        ----------
        path : str or path-like
            The file.
        label : str, optional
            Label; default the ``"label"`` of a JSON object, else the file stem.

        Raises
        ------
        DataError
            If the file is missing, unreadable or not a unitary (the message names the file).
        """
        p = Path(path)
        if not p.is_file():
            raise DataError(f"{p}: interleaved-gate file does not exist (or is not a file)")
        if p.stat().st_size > 2**20:  # an 8 x 8 complex matrix needs about 1 KiB
            raise DataError(f"{p}: interleaved-gate file is larger than 1 MiB; it should hold one (d, d) matrix")
        suffix = p.suffix.lower()
        file_label: str | None = None
        if suffix == ".npy":
            try:
                raw = np.load(p, allow_pickle=False)
            except (OSError, ValueError, EOFError, TypeError, KeyError, SyntaxError, zipfile.BadZipFile) as exc:
                # np.load also opens zip archives (.npz content), so a corrupt one fails as BadZipFile
                raise DataError(f"{p}: not a readable .npy array ({exc}); save it with numpy.save") from None
            if not isinstance(raw, np.ndarray) or raw.dtype.kind not in "iufc":
                raise DataError(f"{p}: field 'unitary' must be a numeric array; got dtype "
                                f"{getattr(raw, 'dtype', type(raw).__name__)}")
            arr = raw
        elif suffix == ".json":
            try:
                doc = json.loads(p.read_text(encoding="utf-8"))
            except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError) as exc:
                raise DataError(f"{p}: not valid UTF-8 JSON ({exc})") from None
            if isinstance(doc, dict):
                if "unitary" not in doc:
                    raise DataError(f"{p}: JSON object has no field 'unitary'; give the matrix as "
                                    "{\"unitary\": [[[re, im], ...], ...]}")
                if "label" in doc:
                    if not isinstance(doc["label"], str):
                        raise DataError(f"{p}: field 'label' must be a string; got {doc['label']!r:.60}")
                    file_label = doc["label"]
                doc = doc["unitary"]
            arr = _pairs_to_complex(doc, p)
        else:
            raise DataError(f"{p}: unsupported file type {p.suffix!r}; use .npy or .json")
        if arr.ndim != 2 or arr.shape[0] != arr.shape[1] or arr.shape[0] not in (2, 4, 8):
            raise DataError(f"{p}: field 'unitary' must be a square matrix of dimension 2, 4 or 8; "
                            f"got shape {arr.shape}")
        arr = arr.astype(complex)
        if not np.all(np.isfinite(arr)):
            raise DataError(f"{p}: field 'unitary' has NaN or inf entries")
        err = float(np.max(np.abs(arr.conj().T @ arr - np.eye(arr.shape[0]))))
        if err > _UNITARY_ATOL_FILE:
            raise DataError(f"{p}: field 'unitary' is not unitary: max |U^dagger U - I| = {err:.3g} "
                            f"> {_UNITARY_ATOL_FILE:g}; write more digits or fix the matrix")
        w, _, vh = np.linalg.svd(arr)
        lab = label if label is not None else (file_label if file_label is not None else p.stem)
        try:
            return cls(label=lab, unitary=w @ vh)
        except (TypeError, ValueError) as exc:
            raise DataError(f"{p}: {exc}") from None

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, InterleavedGate):
            return NotImplemented
        return (self.label == other.label and self.name == other.name and self.qubits == other.qubits
                and bool(np.array_equal(self.unitary, other.unitary)))

    def __hash__(self) -> int:
        return hash((self.label, self.name, self.qubits, self.unitary.tobytes()))

    def __repr__(self) -> str:
        kind = f"standard {self.name!r} on qubits {self.qubits}" if self.name else "user unitary"
        return f"InterleavedGate(label={self.label!r}, {kind}, n_qubits={self.n_qubits})"


def _check_gate_qubits(qubits: object, k: int, n: int) -> tuple[int, ...]:
    if qubits is None:
        return tuple(range(k))
    if not isinstance(qubits, (tuple, list)) or not all(
            isinstance(q, (int, np.integer)) and not isinstance(q, bool) for q in qubits):
        raise TypeError(f"'qubits' must be a sequence of integers; got {qubits!r}")
    q = tuple(int(v) for v in qubits)
    if len(q) != k or len(set(q)) != k or any(not 0 <= v < n for v in q):
        raise ValueError(f"'qubits' must be {k} distinct qubit indices in 0..{n - 1}; got {list(q)}")
    return q


def _pairs_to_complex(doc: object, path: Path) -> np.ndarray:
    """Nested rows of ``[re, im]`` pairs to a complex matrix; DataError naming row and column."""
    if not isinstance(doc, list) or not doc:
        raise DataError(f"{path}: field 'unitary' must be a non-empty list of rows of [re, im] pairs")
    rows = []
    for i, row in enumerate(doc):
        if not isinstance(row, list) or len(row) != len(doc):
            raise DataError(f"{path}: field 'unitary' row {i} must be a list of {len(doc)} [re, im] pairs")
        vals = []
        for j, pair in enumerate(row):
            if (not isinstance(pair, list) or len(pair) != 2
                    or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in pair)):
                raise DataError(f"{path}: field 'unitary' row {i} column {j} must be a pair [re, im] of "
                                f"numbers; got {pair!r:.60}")
            vals.append(complex(float(pair[0]), float(pair[1])))
        rows.append(vals)
    return np.array(rows, dtype=complex)


@dataclass(frozen=True, eq=False)
class SequenceBlock:
    """All sequences of one kind and one length.

    Attributes
    ----------
    kind : SequenceKind
        Reference or interleaved.
    length : int
        Number ``m >= 1`` of random Cliffords per sequence.
    cliffords : ndarray, shape (K, m), int64, read-only
        Clifford indices (convention of :mod:`robusttomo.clifford`); row ``k`` is sequence
        ``first_id + k`` and column 0 is applied first.
    first_id : int
        The block's sequence ids are ``first_id + arange(K)``.
    """

    kind: SequenceKind
    length: int
    cliffords: np.ndarray
    first_id: int

    def __post_init__(self) -> None:
        if not isinstance(self.kind, SequenceKind):
            try:
                object.__setattr__(self, "kind", SequenceKind(self.kind))
            except ValueError:
                raise ValueError(f"'kind' must be one of {[k.value for k in SequenceKind]}; "
                                 f"got {self.kind!r}") from None
        length = _check_int(self.length, "length", low=1)
        first = _check_int(self.first_id, "first_id", low=0)
        c = self.cliffords
        if not isinstance(c, np.ndarray) or c.dtype.kind not in "iu":
            raise TypeError(f"'cliffords' must be an integer numpy array; got "
                            f"{getattr(c, 'dtype', type(c).__name__)}")
        if c.ndim != 2 or c.shape[0] < 1 or c.shape[1] != length:
            raise ValueError(f"'cliffords' must have shape (K, {length}) with K >= 1; got {c.shape}")
        if c.min() < 0:
            raise ValueError(f"'cliffords' must be non-negative Clifford indices; got {int(c.min())}")
        if first + c.shape[0] > _MAX_ID:
            raise ValueError(f"'first_id' + K must stay below 2**62; got {first} + {c.shape[0]}")
        arr = np.array(c, dtype=np.int64, order="C", copy=True)
        arr.setflags(write=False)
        object.__setattr__(self, "cliffords", arr)
        object.__setattr__(self, "length", length)
        object.__setattr__(self, "first_id", first)

    @property
    def n_sequences(self) -> int:
        """Number ``K`` of sequences in the block."""
        return int(self.cliffords.shape[0])

    @property
    def sequence_ids(self) -> np.ndarray:
        """Ids ``first_id + arange(K)``, shape ``(K,)``, int64."""
        return self.first_id + np.arange(self.n_sequences, dtype=np.int64)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, SequenceBlock):
            return NotImplemented
        return (self.kind == other.kind and self.length == other.length and self.first_id == other.first_id
                and bool(np.array_equal(self.cliffords, other.cliffords)))

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return (f"SequenceBlock(kind={self.kind.value}, length={self.length}, "
                f"n_sequences={self.n_sequences}, first_id={self.first_id})")


def _check_int(value: object, name: str, *, low: int, high: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"'{name}' must be an integer; got {value!r}")
    v = int(value)
    if v < low or (high is not None and v > high):
        rng = f">= {low}" if high is None else f"in {low}..{high}"
        raise ValueError(f"'{name}' must be an integer {rng}; got {v}")
    return v


@dataclass(frozen=True, eq=False)
class Plan:
    """An experiment plan: every sequence to run, with its Cliffords and the interleaved gate.

    Conventions are in the module docstring: a reference sequence runs ``U = C_m ... C_1`` on
    ``|0...0>``, an interleaved one ``U = G C_m ... G C_1``; every qubit is measured.

    Attributes
    ----------
    n_qubits : int
        Number of qubits (1..3).
    shots : int
        Shots per sequence (1 .. 10**9).
    seed : int
        Seed of ``numpy.random.default_rng`` the Cliffords were drawn with (0 .. 2**63 - 1).
    blocks : tuple of SequenceBlock
        Non-empty; at most one block per (kind, length); sequence ids unique across blocks.
        :func:`make_plan` orders them reference first, then interleaved, each by length.
    interleave : InterleavedGate or None
        The gate ``G`` of the interleaved blocks; required iff there is an interleaved block.

    Examples
    --------
    >>> from robusttomo.plan import make_plan
    >>> plan = make_plan(n_qubits=1, lengths=[1, 2, 4], sequences=3, seed=7)
    >>> plan.n_sequences, plan.sequence_unitaries(0).shape
    (9, (3, 2, 2))
    """

    n_qubits: int
    shots: int
    seed: int
    blocks: tuple[SequenceBlock, ...]
    interleave: InterleavedGate | None = None

    def __post_init__(self) -> None:
        n = _pauli.check_n_qubits(self.n_qubits)
        object.__setattr__(self, "n_qubits", n)
        object.__setattr__(self, "shots", _check_int(self.shots, "shots", low=1, high=_MAX_SHOTS))
        object.__setattr__(self, "seed", _check_int(self.seed, "seed", low=0, high=2**63 - 1))
        if not isinstance(self.blocks, (tuple, list)) or not self.blocks:
            raise ValueError("'blocks' must be a non-empty tuple of SequenceBlock")
        blocks = tuple(self.blocks)
        if not all(isinstance(b, SequenceBlock) for b in blocks):
            raise TypeError("'blocks' must contain SequenceBlock objects only")
        object.__setattr__(self, "blocks", blocks)
        keys = [(b.kind, b.length) for b in blocks]
        if len(set(keys)) != len(keys):
            dup = next(k for k in keys if keys.count(k) > 1)
            raise ValueError(f"'blocks' has two {dup[0].value} blocks of length {dup[1]}; merge them")
        order = _clifford.clifford_group_order(n)
        total = 0
        for i, b in enumerate(blocks):
            hi = int(b.cliffords.max())
            if hi >= order:
                raise ValueError(f"block {i}: Clifford index {hi} is out of range for {n} qubit(s) "
                                 f"(group order {order})")
            total += b.cliffords.size
        if total > _MAX_CLIFFORDS:
            raise ValueError(f"plan holds {total} Clifford indices; at most {_MAX_CLIFFORDS} are supported; "
                             "use fewer or shorter sequences")
        spans = sorted((b.first_id, b.first_id + b.n_sequences) for b in blocks)
        for (_, end), (start, _) in zip(spans, spans[1:]):
            if start < end:
                raise ValueError("sequence ids of the blocks overlap; give every block its own id range "
                                 "(first_id)")
        g = self.interleave
        has_int = any(b.kind is SequenceKind.INTERLEAVED for b in blocks)
        if g is not None and not isinstance(g, InterleavedGate):
            raise TypeError(f"'interleave' must be an InterleavedGate or None; got {type(g).__name__}")
        if has_int and g is None:
            raise ValueError("plan has interleaved blocks but no 'interleave' gate")
        if g is not None and not has_int:
            raise ValueError("plan has an 'interleave' gate but no interleaved block")
        if g is not None and g.n_qubits != n:
            raise ValueError(f"'interleave' acts on {g.n_qubits} qubit(s) but the plan has {n}")

    # ---- views ---------------------------------------------------------------------------
    @property
    def dim(self) -> int:
        """Hilbert-space dimension ``d = 2**n_qubits``."""
        return 2**self.n_qubits

    @property
    def lengths(self) -> dict[SequenceKind, tuple[int, ...]]:
        """Sequence lengths present, per kind (sorted); only kinds present are keys."""
        out: dict[SequenceKind, list[int]] = {}
        for b in self.blocks:
            out.setdefault(b.kind, []).append(b.length)
        return {k: tuple(sorted(v)) for k, v in out.items()}

    @property
    def n_sequences(self) -> int:
        """Total number of sequences over all blocks."""
        return sum(b.n_sequences for b in self.blocks)

    @functools.cached_property
    def sequence_ids(self) -> np.ndarray:
        """All sequence ids in block order, shape ``(n_sequences,)``, int64, read-only."""
        ids = np.concatenate([b.sequence_ids for b in self.blocks])
        ids.setflags(write=False)
        return ids

    @functools.cached_property
    def fingerprint(self) -> str:
        """SHA-256 hex digest of the canonical content.

        Covers the schema kind and version, :data:`CONVENTION`, ``n_qubits``, ``shots``,
        ``seed``, every block (kind, length, first_id, Clifford indices) and the interleaved gate
        (label, name, qubits, unitary).  Not covered: the package version and the compiled
        circuits (derived from the indices; checked against them on load).
        """
        parts: list[object] = [_KIND, 1, CONVENTION, self.n_qubits, self.shots, self.seed, len(self.blocks)]
        for b in self.blocks:
            parts += [b.kind.value, b.length, b.first_id, b.cliffords.astype("<i8")]
        g = self.interleave
        if g is None:
            parts.append("no-interleave")
        else:
            parts += ["interleave", g.label, g.name or "", np.array(g.qubits or (), dtype="<i8"),
                      g.unitary.astype("<c16")]
        return _io.fingerprint(*parts)

    def block_index(self, kind: SequenceKind | str, length: int) -> int:
        """Position in :attr:`blocks` of the block of ``kind`` and ``length``.

        Raises
        ------
        ValueError
            If the plan has no such block (the message lists the lengths it has).
        """
        k = _as_kind(kind)
        for i, b in enumerate(self.blocks):
            if b.kind is k and b.length == length:
                return i
        have = list(self.lengths.get(k, ()))
        raise ValueError(f"plan has no {k.value} block of length {length!r}; its {k.value} lengths are {have}")

    def block(self, kind: SequenceKind | str, length: int) -> SequenceBlock:
        """The block of ``kind`` (a :class:`SequenceKind` or its value) and ``length``."""
        return self.blocks[self.block_index(kind, length)]

    def locate(self, sequence_id: int) -> tuple[int, int]:
        """``(block index, row)`` of a sequence id; ValueError if the plan has no such id."""
        sid = _check_int(sequence_id, "sequence_id", low=0)
        for i, b in enumerate(self.blocks):
            if b.first_id <= sid < b.first_id + b.n_sequences:
                return i, sid - b.first_id
        raise ValueError(f"plan has no sequence with id {sid}")

    def sequence_unitaries(self, block_index: int) -> np.ndarray:
        """Ideal total unitary of every sequence of one block.

        Parameters
        ----------
        block_index : int
            Position in :attr:`blocks`.

        Returns
        -------
        ndarray, shape (K, d, d), complex128
            ``U[k] = C_m ... C_1`` for a reference block and ``G C_m ... G C_1`` for an
            interleaved one, with ``C_j = Clifford.from_index(n, cliffords[k, j - 1]).unitary()``
            and qubit 0 the leftmost tensor factor.  The global phase is that of the Clifford
            module's unitaries (physically irrelevant).
        """
        i = _check_int(block_index, "block_index", low=0, high=len(self.blocks) - 1)
        b = self.blocks[i]
        uniq, inv = np.unique(b.cliffords, return_inverse=True)
        inv = inv.reshape(b.cliffords.shape)
        cu = np.asarray(_clifford.clifford_unitaries(self.n_qubits, uniq), dtype=complex)
        out = np.broadcast_to(np.eye(self.dim, dtype=complex), (b.n_sequences, self.dim, self.dim)).copy()
        g = self.interleave.unitary if b.kind is SequenceKind.INTERLEAVED and self.interleave else None
        for j in range(b.length):
            out = cu[inv[:, j]] @ out
            if g is not None:
                out = g @ out
        return out

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Plan):
            return NotImplemented
        return self.fingerprint == other.fingerprint

    def __hash__(self) -> int:
        return hash(self.fingerprint)

    def __repr__(self) -> str:
        blocks = ", ".join(f"{b.kind.value} m={b.length} x{b.n_sequences}" for b in self.blocks)
        g = f", interleave={self.interleave.label!r}" if self.interleave else ""
        return (f"Plan(n_qubits={self.n_qubits}, shots={self.shots}, seed={self.seed}, "
                f"blocks=[{blocks}]{g}, fingerprint={self.fingerprint[:12]}...)")


def _as_kind(kind: object) -> SequenceKind:
    if isinstance(kind, SequenceKind):
        return kind
    try:
        return SequenceKind(kind)
    except ValueError:
        raise ValueError(f"'kind' must be one of {[k.value for k in SequenceKind]}; got {kind!r}") from None


# ---- make_plan ---------------------------------------------------------------------------------
# Defaults, per number of qubits: (lengths, sequences per length).  Short lengths 1, 2, 3 carry
# the information about fast-decaying probes and get many sequences; longer lengths, for the
# slow near-identity probes, get fewer.  Reasoning in docs/plans.md.
_DEFAULTS: dict[int, tuple[tuple[int, ...], int, int]] = {
    # n: (lengths, sequences at m <= 3, sequences at m > 3)
    1: ((1, 2, 3, 6, 12, 24), 200, 50),
    2: ((1, 2, 3, 4, 8, 16), 500, 100),
    3: ((1, 2, 3, 4, 8, 16), 1000, 200),
}
_DEFAULT_SHOTS = 100


def default_lengths(n_qubits: int) -> tuple[int, ...]:
    """The default sequence lengths of :func:`make_plan` for ``n_qubits`` qubits."""
    return _DEFAULTS[_pauli.check_n_qubits(n_qubits)][0]


def _default_sequences(n: int, lengths: Sequence[int]) -> list[int]:
    _, short, long = _DEFAULTS[n]
    return [short if m <= 3 else long for m in lengths]


def _check_lengths(lengths: object) -> list[int]:
    if isinstance(lengths, (str, bytes)) or not isinstance(lengths, (Sequence, np.ndarray)):
        raise TypeError(f"'lengths' must be a sequence of positive integers; got {lengths!r}")
    vals = list(lengths)
    if not vals:
        raise ValueError("'lengths' must be a non-empty sequence of positive integers; got []")
    if any(isinstance(v, bool) or not isinstance(v, (int, np.integer)) for v in vals):
        raise TypeError(f"'lengths' must be positive integers; got {vals}")
    vals = [int(v) for v in vals]
    if any(v < 1 for v in vals):
        raise ValueError(f"'lengths' must be positive integers; got {vals}")
    if len(set(vals)) != len(vals):
        raise ValueError(f"'lengths' must not repeat a length; got {vals}")
    missing = [m for m in (1, 2) if m not in vals]
    if missing:
        raise ValueError(f"'lengths' must include 1 and 2 (length 1 fixes the shared SPAM constant, "
                         f"length 2 carries the m = 2 statistic); got {vals}, add {missing}")
    return vals


def _check_sequences(sequences: object, lengths: list[int], n: int) -> list[int]:
    if sequences is None:
        return _default_sequences(n, lengths)
    if isinstance(sequences, (int, np.integer)) and not isinstance(sequences, bool):
        vals = [int(sequences)] * len(lengths)
        if vals[0] < 1:
            raise ValueError(f"'sequences' must be a positive integer; got {int(sequences)}")
        return vals
    if isinstance(sequences, (str, bytes)) or not isinstance(sequences, (Sequence, np.ndarray)):
        raise TypeError("'sequences' must be a positive integer or one positive integer per length; "
                        f"got {sequences!r}")
    vals = list(sequences)
    if any(isinstance(v, bool) or not isinstance(v, (int, np.integer)) for v in vals):
        raise TypeError(f"'sequences' must be positive integers; got {vals}")
    vals = [int(v) for v in vals]
    if len(vals) != len(lengths):
        raise ValueError(f"'sequences' must give one count per length ({len(lengths)} for lengths "
                         f"{lengths}); got {len(vals)}: {vals}")
    if any(v < 1 for v in vals):
        raise ValueError(f"'sequences' must be positive integers; got {vals}")
    return vals


def _check_interleave(interleave: object, n: int) -> InterleavedGate | None:
    if interleave is None or isinstance(interleave, InterleavedGate):
        g = interleave
    elif isinstance(interleave, str):
        key = interleave.strip().lower()
        if key not in STANDARD_GATES:
            raise ValueError(f"'interleave' must name a standard gate {sorted(STANDARD_GATES)} or be an "
                             f"InterleavedGate (e.g. InterleavedGate.from_file(path)); got {interleave!r}")
        k = STANDARD_GATES[key]
        if k != n:
            raise ValueError(f"'interleave' gate {key!r} acts on {k} qubit(s) but the plan has {n}; place it "
                             f"with InterleavedGate.standard({key!r}, n_qubits={n}, qubits=...)")
        g = InterleavedGate.standard(key)
    else:
        raise TypeError(f"'interleave' must be a gate name, an InterleavedGate or None; "
                        f"got {type(interleave).__name__}")
    if g is not None and g.n_qubits != n:
        raise ValueError(f"'interleave' acts on {g.n_qubits} qubit(s) but 'n_qubits' is {n}")
    return g


def make_plan(*, n_qubits: int, lengths: Sequence[int] | None = None,
              sequences: int | Sequence[int] | None = None, shots: int | None = None, seed: int,
              interleave: str | InterleavedGate | None = None, include_reference: bool = True) -> Plan:
    """Draw the random Clifford sequences of an experiment.

    Every Clifford is drawn independently and uniformly from the ``n_qubits``-qubit Clifford
    group (:func:`robusttomo.clifford.random_clifford_indices`) with
    ``numpy.random.default_rng(seed)``, block after block in the order of :attr:`Plan.blocks`
    (reference blocks by length, then interleaved blocks by length), so a seed fixes the plan.

    Parameters
    ----------
    n_qubits : int
        1, 2 or 3.
    lengths : sequence of int, optional
        Distinct sequence lengths ``m >= 1``; must include 1 (fixes the shared SPAM constant)
        and 2 (the m = 2 statistic).  Default :func:`default_lengths`: ``1, 2, 3, 6, 12, 24``
        for one qubit, ``1, 2, 3, 4, 8, 16`` for two and three.
    sequences : int or sequence of int, optional
        Sequences per length: one count for all, or one per entry of ``lengths``.  Default:
        200 / 500 / 1000 (one / two / three qubits) at lengths up to 3, and 50 / 100 / 200 at
        longer lengths (see ``docs/plans.md``).
    shots : int, optional
        Shots per sequence, default 100.
    seed : int
        Non-negative seed.
    interleave : str or InterleavedGate, optional
        The gate ``G`` of interleaved sequences: a name from :data:`STANDARD_GATES` acting on
        all ``n_qubits`` qubits, or an :class:`InterleavedGate`.  Default: reference only.
    include_reference : bool
        With ``interleave``, also hold the reference blocks (same lengths and counts, drawn
        independently) so one plan serves both runs.  Default True.

    Returns
    -------
    Plan
        Sequence ids run ``0 .. n_sequences - 1`` in block order.

    Examples
    --------
    >>> from robusttomo.plan import make_plan
    >>> plan = make_plan(n_qubits=2, lengths=[1, 2, 4], sequences=[10, 20, 5], seed=1,
    ...                  interleave="cz")
    >>> [(b.kind.value, b.length, b.n_sequences) for b in plan.blocks]  # doctest: +NORMALIZE_WHITESPACE
    [('reference', 1, 10), ('reference', 2, 20), ('reference', 4, 5),
     ('interleaved', 1, 10), ('interleaved', 2, 20), ('interleaved', 4, 5)]
    """
    n = _pauli.check_n_qubits(n_qubits)
    lens = list(default_lengths(n)) if lengths is None else _check_lengths(lengths)
    counts = _check_sequences(sequences, lens, n)
    n_shots = _DEFAULT_SHOTS if shots is None else _check_int(shots, "shots", low=1, high=_MAX_SHOTS)
    seed_v = _check_int(seed, "seed", low=0, high=2**63 - 1)
    gate = _check_interleave(interleave, n)
    if not isinstance(include_reference, (bool, np.bool_)):
        raise TypeError(f"'include_reference' must be True or False; got {include_reference!r}")
    if gate is None and not include_reference:
        raise ValueError("include_reference=False needs an 'interleave' gate (otherwise the plan is empty)")
    pairs = sorted(zip(lens, counts))
    total = sum(m * k for m, k in pairs) * (2 if gate is not None and include_reference else 1)
    if total > _MAX_CLIFFORDS:
        raise ValueError(f"plan would hold {total} Clifford indices (sum of sequences x length); at most "
                         f"{_MAX_CLIFFORDS} are supported; use fewer or shorter sequences")
    kinds = ([SequenceKind.REFERENCE] if gate is None or include_reference else []) + \
        ([SequenceKind.INTERLEAVED] if gate is not None else [])
    rng = np.random.default_rng(seed_v)
    blocks = []
    next_id = 0
    for kind in kinds:
        for m, k in pairs:
            idx = np.asarray(_clifford.random_clifford_indices(n, k * m, rng), dtype=np.int64)
            blocks.append(SequenceBlock(kind=kind, length=m, cliffords=idx.reshape(k, m), first_id=next_id))
            next_id += k
    return Plan(n_qubits=n, shots=n_shots, seed=seed_v, blocks=tuple(blocks), interleave=gate)


# ---- compiled circuits -------------------------------------------------------------------------
_CIRCUIT_GATES = {"h": 1, "s": 1, "sdg": 1, "x": 1, "y": 1, "z": 1, "cx": 2, "cz": 2}
_GATE_RE = re.compile(r"([a-z]+) q\[(\d)\](?:, q\[(\d)\])?")


def _circuit_text(circuit: Sequence[tuple[str, Sequence[int]]]) -> str:
    """``"h q[0]; cx q[0], q[1]"``; the identity Clifford is the empty string."""
    return "; ".join(f"{g} " + ", ".join(f"q[{int(q)}]" for q in qs) for g, qs in circuit)


def _circuit_table(n: int, uniq: np.ndarray) -> list[str]:
    circuits = _clifford.clifford_circuits(n, uniq)
    return [_circuit_text(c) for c in circuits]


def _parse_circuit_text(text: str, n: int) -> list[tuple[str, tuple[int, ...]]] | None:
    """Inverse of :func:`_circuit_text`; None if ``text`` is not a well-formed circuit."""
    if text == "":
        return []
    out = []
    for part in text.split("; "):
        mt = _GATE_RE.fullmatch(part)
        if mt is None or mt.group(1) not in _CIRCUIT_GATES:
            return None
        qs = tuple(int(v) for v in mt.group(2, 3) if v is not None)
        if len(qs) != _CIRCUIT_GATES[mt.group(1)] or len(set(qs)) != len(qs) or max(qs) >= n:
            return None
        out.append((mt.group(1), qs))
    return out


def _circuit_unitary(circuit: list[tuple[str, tuple[int, ...]]], n: int) -> np.ndarray:
    u = np.eye(2**n, dtype=complex)
    for g, qs in circuit:
        u = _embed_unitary(_GATE_TABLE[g], qs, n) @ u
    return u


# ---- HDF5 --------------------------------------------------------------------------------------
def save_plan(plan: Plan, path: str | os.PathLike[str], *, force: bool = False) -> Path:
    """Write a plan to an HDF5 file (schema in ``docs/file-formats.md``, "Plan files").

    Parameters
    ----------
    plan : Plan
        The plan.
    path : str or path-like
        Output file (conventionally ``.h5``).  Written atomically: a temporary file beside it
        is renamed onto it only after a complete write.
    force : bool
        Overwrite an existing file.  Default False (FileExistsError).

    Returns
    -------
    Path
        The written path.
    """
    if not isinstance(plan, Plan):
        raise TypeError(f"'plan' must be a Plan; got {type(plan).__name__}")
    n = plan.n_qubits
    with _io.atomic_path(path, force=force) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["schema_version"] = np.int64(1)
            f.attrs["kind"] = _io.fixed_text(_KIND)
            f.attrs["fingerprint"] = _io.fixed_text(plan.fingerprint)
            f.attrs["n_qubits"] = np.int64(n)
            f.attrs["shots"] = np.int64(plan.shots)
            f.attrs["seed"] = np.int64(plan.seed)
            f.attrs["n_blocks"] = np.int64(len(plan.blocks))
            f.attrs["package_version"] = _io.fixed_text(__version__)
            f.attrs["convention"] = _io.fixed_text(CONVENTION)
            root = f.create_group("blocks")
            for i, b in enumerate(plan.blocks):
                g = root.create_group(f"{i:03d}")
                g.attrs["kind"] = _io.fixed_text(b.kind.value)
                g.attrs["length"] = np.int64(b.length)
                g.attrs["first_id"] = np.int64(b.first_id)
                g.create_dataset("cliffords", data=b.cliffords, dtype="<i8")
                g.create_dataset("sequence_ids", data=b.sequence_ids, dtype="<i8")
                uniq, inv = np.unique(b.cliffords, return_inverse=True)
                table = np.array(_circuit_table(n, uniq), dtype=object)
                g.create_dataset("circuits", data=_io.fixed_text_array(table[inv.reshape(b.cliffords.shape)]))
            gate = plan.interleave
            if gate is not None:
                ig = f.create_group("interleave")
                ig.attrs["label"] = _io.fixed_text(gate.label)
                ig.attrs["name"] = _io.fixed_text(gate.name or "")
                ig.attrs["qubits"] = np.array(gate.qubits or (), dtype=np.int64)
                ig.create_dataset("unitary", data=gate.unitary, dtype="<c16")
    return Path(path)


def load_plan(path: str | os.PathLike[str]) -> Plan:
    """Read a plan written by :func:`save_plan`, validating everything.

    Checks the ``kind`` and ``schema_version`` attributes, every field's presence, type, shape
    and range (Clifford indices within the group order), the compiled circuits against the
    Clifford indices (each stored circuit must run the unitary its index names), and finally
    recomputes the fingerprint and compares it with the stored one.

    Parameters
    ----------
    path : str or path-like
        The HDF5 file.

    Returns
    -------
    Plan

    Raises
    ------
    DataError
        For any problem with the file, naming the file and the field (never another exception
        for bad file content).
    """
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"'path' must be a path; got {type(path).__name__}")
    p = Path(path)
    if not p.is_file():
        raise DataError(f"{p}: plan file does not exist (or is not a file)")
    try:
        with h5py.File(p, "r") as f:
            return _read_plan(f, p)
    except DataError:
        raise
    except (OSError, KeyError, TypeError, ValueError, IndexError, AttributeError, RuntimeError,
            UnicodeError, OverflowError) as exc:
        # h5py reports damaged files through several exception types; the explicit checks in
        # _read_plan catch the expected problems with better messages, this catches the rest.
        raise DataError(f"{p}: not a readable robusttomo plan file ({type(exc).__name__}: {exc})") from None


def _attr(obj: h5py.HLObject, name: str, where: str, path: Path) -> object:
    if name not in obj.attrs:
        raise DataError(f"{path}: attribute '{name}' of {where} is missing; is this a robusttomo plan file?")
    return _io.safe_attr(obj, name, path)


def _attr_int(obj: h5py.HLObject, name: str, where: str, path: Path) -> int:
    v = _attr(obj, name, where, path)
    if isinstance(v, np.ndarray) and v.shape == ():
        v = v[()]
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer)):
        raise DataError(f"{path}: attribute '{name}' of {where} must be an integer; got {v!r:.60}")
    return int(v)


def _attr_str(obj: h5py.HLObject, name: str, where: str, path: Path) -> str:
    v = _attr(obj, name, where, path)
    if isinstance(v, np.ndarray) and v.shape == ():
        v = v[()]
    if isinstance(v, bytes):
        try:
            v = v.decode("utf-8")
        except UnicodeDecodeError:
            raise DataError(f"{path}: attribute '{name}' of {where} is not UTF-8 text") from None
    if not isinstance(v, str):
        raise DataError(f"{path}: attribute '{name}' of {where} must be a string; got {v!r:.60}")
    return v


def _dataset(group: h5py.Group, name: str, where: str, path: Path, *, kinds: str,
             shape: tuple[int, ...]) -> h5py.Dataset:
    """Fetch a dataset and check its dtype kind and exact shape before reading any data."""
    obj = group.get(name)
    if not isinstance(obj, h5py.Dataset):
        raise DataError(f"{path}: dataset '{name}' of {where} is missing (or not a dataset)")
    if kinds == "str":
        _io.check_fixed_strings(obj, f"{where}/{name}", path)
    elif obj.dtype.kind not in kinds:
        raise DataError(f"{path}: dataset '{name}' of {where} has dtype {obj.dtype}; expected "
                        f"{'integers' if kinds == 'iu' else 'complex numbers'}")
    if obj.shape != shape:
        raise DataError(f"{path}: dataset '{name}' of {where} has shape {obj.shape}; expected {shape}")
    return obj


def _read_plan(f: h5py.File, p: Path) -> Plan:
    kind = _attr_str(f, "kind", "the root", p)
    if kind != _KIND:
        raise DataError(f"{p}: attribute 'kind' is {kind!r:.60}, not {_KIND!r}; this is not a plan file")
    _io.check_schema(p, _io.safe_attr(f, "schema_version", p) if "schema_version" in f.attrs else None, kind="plan", supported=_SCHEMAS)
    stored_fp = _attr_str(f, "fingerprint", "the root", p)
    convention = _attr_str(f, "convention", "the root", p)
    if convention != CONVENTION:
        raise DataError(f"{p}: attribute 'convention' differs from this robusttomo's ({convention!r:.80}); "
                        "the plan was written under another convention and cannot be used")
    n = _attr_int(f, "n_qubits", "the root", p)
    if not 1 <= n <= 3:
        raise DataError(f"{p}: attribute 'n_qubits' must be 1, 2 or 3; got {n}")
    shots = _attr_int(f, "shots", "the root", p)
    seed = _attr_int(f, "seed", "the root", p)
    n_blocks = _attr_int(f, "n_blocks", "the root", p)
    if not 1 <= n_blocks <= 10**4:
        raise DataError(f"{p}: attribute 'n_blocks' must be in 1..10000; got {n_blocks}")
    root = f.get("blocks")
    if not isinstance(root, h5py.Group):
        raise DataError(f"{p}: group 'blocks' is missing")
    order = _clifford.clifford_group_order(n)
    blocks = []
    total = 0
    for i in range(n_blocks):
        key = f"{i:03d}"
        where = f"block '{key}'"
        g = root.get(key)
        if not isinstance(g, h5py.Group):
            raise DataError(f"{p}: group 'blocks/{key}' is missing ({n_blocks} blocks declared)")
        kind_s = _attr_str(g, "kind", where, p)
        if kind_s not in {k.value for k in SequenceKind}:
            raise DataError(f"{p}: attribute 'kind' of {where} must be 'reference' or 'interleaved'; "
                            f"got {kind_s!r:.60}")
        length = _attr_int(g, "length", where, p)
        first_id = _attr_int(g, "first_id", where, p)
        if length < 1 or first_id < 0:
            raise DataError(f"{p}: {where} has length {length} and first_id {first_id}; the length must "
                            "be positive and first_id non-negative")
        ds = g.get("cliffords")
        if not isinstance(ds, h5py.Dataset) or len(ds.shape) != 2:
            raise DataError(f"{p}: dataset 'cliffords' of {where} is missing or not 2-dimensional")
        k = ds.shape[0]
        total += k * ds.shape[1]
        if k < 1 or total > _MAX_CLIFFORDS:
            raise DataError(f"{p}: dataset 'cliffords' of {where} has shape {ds.shape}; expected (K, "
                            f"{length}) with 1 <= K and at most {_MAX_CLIFFORDS} indices in the plan")
        cl = _dataset(g, "cliffords", where, p, kinds="iu", shape=(k, length))[()]
        if cl.min() < 0 or cl.max() >= order:
            bad = np.argwhere((cl < 0) | (cl >= order))[0]
            raise DataError(f"{p}: dataset 'cliffords' of {where} row {bad[0]} column {bad[1]}: index "
                            f"{cl[tuple(bad)]} is outside 0..{order - 1} (the {n}-qubit Clifford group)")
        ids = _dataset(g, "sequence_ids", where, p, kinds="iu", shape=(k,))[()]
        if not np.array_equal(ids, first_id + np.arange(k)):
            row = int(np.argmax(ids != first_id + np.arange(k)))
            raise DataError(f"{p}: dataset 'sequence_ids' of {where} row {row} is {ids[row]}, expected "
                            f"first_id + row = {first_id + row}")
        circ = _dataset(g, "circuits", where, p, kinds="str", shape=(k, length)).asstr()[()]
        cl = cl.astype(np.int64)
        _check_circuits(cl, circ, n, where, p)
        blocks.append(SequenceBlock(kind=SequenceKind(kind_s), length=length, cliffords=cl, first_id=first_id))
    gate = None
    ig = f.get("interleave")
    if ig is not None:
        if not isinstance(ig, h5py.Group):
            raise DataError(f"{p}: 'interleave' must be a group")
        gate = _read_gate(ig, n, p)
    try:
        plan = Plan(n_qubits=n, shots=shots, seed=seed, blocks=tuple(blocks), interleave=gate)
    except (TypeError, ValueError) as exc:
        raise DataError(f"{p}: invalid plan content: {exc}") from None
    if plan.fingerprint != stored_fp:
        raise DataError(f"{p}: attribute 'fingerprint' is {stored_fp[:16]!r:.20}... but the content hashes to "
                        f"{plan.fingerprint[:16]}...; the file was modified or damaged")
    return plan


def _read_gate(ig: h5py.Group, n: int, p: Path) -> InterleavedGate:
    where = "group 'interleave'"
    label = _attr_str(ig, "label", where, p)
    name = _attr_str(ig, "name", where, p)
    qv = _attr(ig, "qubits", where, p)
    qa = np.asarray(qv)
    if qa.dtype.kind not in "iu" or qa.ndim != 1 or qa.size > 3:
        raise DataError(f"{p}: attribute 'qubits' of {where} must be a list of at most 3 integers; "
                        f"got {qv!r:.60}")
    d = 2**n
    u = _dataset(ig, "unitary", where, p, kinds="c", shape=(d, d))[()]
    try:
        if name == "":
            if qa.size:
                raise ValueError("a user unitary must have an empty 'qubits' attribute")
            return InterleavedGate(label=label, unitary=u)
        return InterleavedGate(label=label, unitary=u, name=name, qubits=tuple(int(v) for v in qa))
    except (TypeError, ValueError) as exc:
        raise DataError(f"{p}: {where}: {exc}") from None


def _check_circuits(cl: np.ndarray, circ: np.ndarray, n: int, where: str, p: Path) -> None:
    """Each stored circuit must run (up to phase) the Clifford its index names."""
    uniq, first, inv = np.unique(cl, return_index=True, return_inverse=True)
    flat = circ.reshape(-1)
    rep = flat[first]
    same = flat == rep[inv.reshape(-1)]
    if not np.all(same):
        pos = int(np.argmin(same))
        raise DataError(f"{p}: dataset 'circuits' of {where} row {pos // cl.shape[1]} column "
                        f"{pos % cl.shape[1]}: two different circuits for Clifford index {cl.reshape(-1)[pos]}")
    current = _circuit_table(n, uniq)
    # report the earliest (row-major) bad position
    differs = sorted((j for j in range(len(uniq)) if rep[j] != current[j]), key=lambda j: first[j])
    if not differs:
        return
    # Another compiler version wrote these circuits: accept them if they run the same unitary.
    us = np.asarray(_clifford.clifford_unitaries(n, uniq[differs]), dtype=complex)
    d = 2**n
    for u_ref, j in zip(us, differs):
        pos = int(first[j])
        loc = f"row {pos // cl.shape[1]} column {pos % cl.shape[1]}"
        parsed = _parse_circuit_text(str(rep[j]), n)
        if parsed is None:
            raise DataError(f"{p}: dataset 'circuits' of {where} {loc}: not a circuit of h, s, sdg, x, y, z, "
                            f"cx, cz on {n} qubit(s): {str(rep[j])!r:.80}")
        overlap = abs(np.trace(u_ref.conj().T @ _circuit_unitary(parsed, n))) / d
        if overlap < 1 - 1e-9:
            raise DataError(f"{p}: dataset 'circuits' of {where} {loc}: the circuit does not run Clifford "
                            f"index {int(uniq[j])}; the file was written with another Clifford index "
                            "convention or was modified")


# ---- OpenQASM 3 ---------------------------------------------------------------------------------
def _f(x: float) -> str:
    return repr(float(x) + 0.0)  # + 0.0 turns -0.0 into 0.0


def _u_angles(v: np.ndarray) -> tuple[float, float, float]:
    """``(theta, phi, lam)`` with ``v = exp(i g) U(theta, phi, lam)`` (OpenQASM 3 ``U``)."""
    a, b = abs(v[0, 0]), abs(v[1, 0])
    theta = 2 * math.atan2(b, a)
    g = np.angle(v[0, 0]) if a > 1e-12 else np.angle(v[1, 0])
    w = v * np.exp(-1j * g)
    if b <= 1e-12:
        return theta, 0.0, float(np.angle(w[1, 1]))
    if a <= 1e-12:
        return theta, 0.0, float(np.angle(-w[0, 1]))
    return theta, float(np.angle(w[1, 0])), float(np.angle(-w[0, 1]))


def _u_matrix(theta: float, phi: float, lam: float) -> np.ndarray:
    # OpenQASM 3 specification, built-in gate U(theta, phi, lambda)
    c, s = math.cos(theta / 2), math.sin(theta / 2)
    return np.array([[c, -np.exp(1j * lam) * s], [np.exp(1j * phi) * s, np.exp(1j * (phi + lam)) * c]])


def _two_level_body(u: np.ndarray, n: int) -> list[str]:
    """Gate-definition body running ``u`` (up to global phase) on formal qubits ``q0 .. q{n-1}``.

    Reduces ``u`` to a diagonal ``D`` by two-level rotations between basis states adjacent in
    Gray-code order (they differ in one qubit, so each rotation is a one-qubit ``U`` controlled
    by all other qubits through ``ctrl @`` / ``negctrl @``); ``G_N ... G_1 u = D`` gives
    ``u = G_1^dagger ... G_N^dagger D``.  The phases of ``D`` relative to ``D[0, 0]`` become
    controlled ``p`` gates.  Correct for any unitary, not optimized for hardware.
    """
    d = 2**n
    w = np.array(u, dtype=complex)
    gray = [k ^ (k >> 1) for k in range(d)]
    rots: list[tuple[int, int, float, float, float]] = []  # (i0, qubit, theta, phi, lam)
    for j in range(d - 1):
        col = gray[j]
        for k in range(d - 1, j, -1):
            lo, hi = gray[k - 1], gray[k]  # zero w[hi, col] by mixing in row lo
            if abs(w[hi, col]) < 1e-14:
                continue
            bit = lo ^ hi
            q = n - bit.bit_length()
            i0, i1 = (lo, hi) if not lo & bit else (hi, lo)
            v0, v1 = w[i0, col], w[i1, col]
            r = math.hypot(abs(v0), abs(v1))
            if hi == i1:  # make the |1> entry zero
                c, s, lam = abs(v0) / r, abs(v1) / r, np.angle(v0) - np.angle(v1) + np.pi
            else:  # make the |0> entry zero
                c, s, lam = abs(v1) / r, abs(v0) / r, np.angle(v0) - np.angle(v1)
            theta = 2 * math.atan2(s, c)
            g2 = _u_matrix(theta, 0.0, float(lam))
            w[[i0, i1]] = g2 @ w[[i0, i1]]
            rots.append((i0, q, theta, 0.0, float(lam)))
    lines = []
    diag = np.diag(w)

    def bit_of(x: int, qubit: int) -> int:
        return (x >> (n - 1 - qubit)) & 1

    for x in range(1, d):
        ph = float(np.angle(diag[x] / diag[0]))
        if abs(ph) < 1e-15:
            continue
        target = max(t for t in range(n) if bit_of(x, t))
        ctrls = [t for t in range(n) if t != target]
        mods = "".join(("ctrl @ " if bit_of(x, t) else "negctrl @ ") for t in ctrls)
        args = ", ".join(f"q{t}" for t in ctrls + [target])
        lines.append(f"{mods}p({_f(ph)}) {args};")
    for i0, q, theta, phi, lam in reversed(rots):
        ctrls = [t for t in range(n) if t != q]
        mods = "".join(("ctrl @ " if bit_of(i0, t) else "negctrl @ ") for t in ctrls)
        args = ", ".join(f"q{t}" for t in ctrls + [q])
        # U(theta, phi, lam)^dagger = U(-theta, -lam, -phi)  (OpenQASM 3 specification)
        lines.append(f"{mods}U({_f(-theta)}, {_f(-lam)}, {_f(-phi)}) {args};")
    return lines


def _xx_yy_body(alpha: float) -> list[str]:
    """``exp(i alpha (XX + YY))`` on formal qubits q0, q1 from stdgates.inc gates.

    ``exp(i a ZZ) = cx; rz(-2a) on q1; cx``; ``XX = (H H) ZZ (H H)`` and ``YY = (SH SH) ZZ
    (H Sdg H Sdg)``; the XX and YY parts commute.
    """
    zz = ["cx q0, q1;", f"rz({_f(-2 * alpha)}) q1;", "cx q0, q1;"]
    yy = ["sdg q0;", "h q0;", "sdg q1;", "h q1;", *zz, "h q0;", "s q0;", "h q1;", "s q1;"]
    xx = ["h q0;", "h q1;", *zz, "h q0;", "h q1;"]
    return yy + xx


def _gate_qasm(gate: InterleavedGate, n: int) -> tuple[list[str], str]:
    """(definition lines, call line) of the interleaved gate; no definition for stdgates names."""
    if gate.name is not None and gate.qubits is not None:
        args = ", ".join(f"q[{i}]" for i in gate.qubits)
        if gate.name in _QASM_STDGATES:
            return [], f"{gate.name} {args};"
        k = len(gate.qubits)
        if gate.name == "iswap":
            body = _xx_yy_body(math.pi / 4)
        elif gate.name == "sqrt_iswap":
            body = _xx_yy_body(math.pi / 8)
        else:  # a one-qubit gate outside stdgates.inc
            th, ph, la = _u_angles(_GATE_TABLE[gate.name])
            body = [f"U({_f(th)}, {_f(ph)}, {_f(la)}) q0;"]
    else:
        k = n
        args = ", ".join(f"q[{i}]" for i in range(n))
        if n == 1:
            th, ph, la = _u_angles(gate.unitary)
            body = [f"U({_f(th)}, {_f(ph)}, {_f(la)}) q0;"]
        else:
            body = _two_level_body(gate.unitary, n)
    formals = ", ".join(f"q{i}" for i in range(k))
    lines = [f"// interleaved gate {gate.label!r}, unitary up to a global phase",
             f"gate {_QASM_GATE_NAME} {formals} {{", *(f"  {ln}" for ln in body), "}"]
    return lines, f"{_QASM_GATE_NAME} {args};"


_BIT_ORDER_NOTE = ("c[k] holds qubit k; robusttomo bitstrings put c[0] (qubit 0, the most significant "
                   "bit) LEFTMOST; many toolchains print c[0] rightmost")


def _program(plan: Plan, block: SequenceBlock, row: int, circuits: dict[int, str],
             gate_lines: tuple[list[str], str] | None) -> str:
    n = plan.n_qubits
    sid = block.first_id + row
    interleaved = block.kind is SequenceKind.INTERLEAVED
    unit = "G C_m ... G C_1" if interleaved else "C_m ... C_1"
    lines = ["OPENQASM 3.0;", 'include "stdgates.inc";',
             f"// robusttomo plan {plan.fingerprint}",
             f"// sequence {sid}: {block.kind.value}, m = {block.length}, unitary {unit}",
             f"// {_BIT_ORDER_NOTE}"]
    if interleaved and gate_lines is not None:
        lines += gate_lines[0]
    lines += [f"qubit[{n}] q;", f"bit[{n}] c;"]
    for j, idx in enumerate(block.cliffords[row]):
        lines.append(f"// C_{j + 1}: Clifford index {int(idx)}")
        text = circuits[int(idx)]
        if text:
            lines += [f"{part};" for part in text.split("; ")]
        lines.append("barrier q;")
        if interleaved and gate_lines is not None:
            lines.append(gate_lines[1])
            lines.append("barrier q;")
    lines.append("c = measure q;")
    return "\n".join(lines) + "\n"


def export_qasm(plan: Plan, directory: str | os.PathLike[str], *, bundle: bool = False,
                force: bool = False) -> list[Path]:
    """Write every sequence of a plan as an OpenQASM 3 program.

    Each program starts ``OPENQASM 3.0; include "stdgates.inc";``, declares ``qubit[n] q;``
    and ``bit[n] c;``, runs the compiled gates of each Clifford (``h, s, sdg, x, y, z, cx, cz``
    of stdgates.inc) with ``barrier q;`` after every Clifford and after every interleaved gate
    (so a compiler cannot merge them), and ends ``c = measure q;``.  ``c[k]`` is qubit ``k``;
    robusttomo writes outcomes with ``c[0]`` leftmost (most significant), while many toolchains
    print ``c[0]`` rightmost (ingest with the matching ``bit_order``).

    The interleaved gate is written by its stdgates.inc name when it has one (``cz``, ``cx``,
    ``swap``, ``h``, ``t``, ...); otherwise as a gate definition ``rt_interleave``: ``iswap`` and
    ``sqrt_iswap`` from ``h, s, sdg, cx, rz``; a one-qubit unitary as one ``U(theta, phi,
    lambda)``; a user unitary on 2 or 3 qubits as controlled ``U`` and ``p`` gates (OpenQASM 3
    ``ctrl @`` / ``negctrl @`` modifiers), exact up to a global phase but not optimized.

    Parameters
    ----------
    plan : Plan
        The plan.
    directory : str or path-like
        Output directory (created if missing).
    bundle : bool
        False (default): one file ``sequence_<id>.qasm`` per sequence (ids zero-padded to at
        least 6 digits).  True: one file ``sequences.qasm`` holding all programs one after the
        other, plus ``sequences.index.json`` mapping each sequence id to its program's position
        and byte range (schema in ``docs/file-formats.md``).
    force : bool
        Overwrite existing files.  Default False: FileExistsError before anything is written.

    Returns
    -------
    list of Path
        The program files in sequence-id order, or ``[bundle, index]``.
    """
    if not isinstance(plan, Plan):
        raise TypeError(f"'plan' must be a Plan; got {type(plan).__name__}")
    out_dir = Path(directory)
    if out_dir.exists() and not out_dir.is_dir():
        raise ValueError(f"'directory' {str(out_dir)!r} exists and is not a directory")
    uniq = np.unique(np.concatenate([b.cliffords.reshape(-1) for b in plan.blocks]))
    circuits = dict(zip((int(i) for i in uniq), _circuit_table(plan.n_qubits, uniq)))
    gate_lines = _gate_qasm(plan.interleave, plan.n_qubits) if plan.interleave is not None else None
    width = max(6, len(str(int(plan.sequence_ids.max()))))
    rows = sorted(((b.first_id + r, b, r) for b in plan.blocks for r in range(b.n_sequences)),
                  key=lambda t: t[0])
    if bundle:
        targets = [out_dir / "sequences.qasm", out_dir / "sequences.index.json"]
    else:
        targets = [out_dir / f"sequence_{sid:0{width}d}.qasm" for sid, _, _ in rows]
    if not force:
        for t in targets:
            if t.exists():
                raise FileExistsError(f"{t}: output exists; choose another directory or pass force=True")
    out_dir.mkdir(parents=True, exist_ok=True)
    if not bundle:
        for t, (_, b, r) in zip(targets, rows):
            with _io.atomic_path(t, force=force) as tmp:
                tmp.write_text(_program(plan, b, r, circuits, gate_lines), encoding="utf-8")
        return targets
    chunks, entries, offset = [], [], 0
    for pos, (sid, b, r) in enumerate(rows):
        data = _program(plan, b, r, circuits, gate_lines).encode("utf-8")
        chunks.append(data)
        entries.append({"sequence_id": int(sid), "position": pos, "kind": b.kind.value, "length": b.length,
                        "byte_offset": offset, "byte_length": len(data)})
        offset += len(data)
    index = {"schema_version": 1, "kind": _INDEX_KIND, "plan_fingerprint": plan.fingerprint,
             "bundle": targets[0].name, "bit_order": _BIT_ORDER_NOTE, "programs": entries}
    with _io.atomic_path(targets[0], force=force) as tmp:
        tmp.write_bytes(b"".join(chunks))
    with _io.atomic_path(targets[1], force=force) as tmp:
        tmp.write_text(json.dumps(index, indent=1) + "\n", encoding="utf-8")
    return targets
