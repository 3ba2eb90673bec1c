"""Synthetic device and exact density-matrix simulation of a plan.

A :class:`Device` describes a noisy machine: one error channel after every Clifford, optional
gate-dependent noise on the native gates of each Clifford's compiled circuit, the error of the
interleaved gate, a faulty prepared state and a faulty readout.  :func:`simulate` runs every
sequence of a plan on it and returns :class:`~robusttomo.counts.Counts`, exactly as a hardware
run would produce them (multinomial shots), or the exact outcome probabilities times the
number of shots.

Conventions (see :mod:`robusttomo.channels`): qubit 0 is the leftmost tensor factor and the most
significant bit of an outcome ``x``; channels are held as Pauli transfer matrices in the
normalized Pauli basis; the readout confusion matrix is ``C[y, x] = P(read y | true x)``.
The device JSON schema is documented in ``docs/file-formats.md`` ("Device description").
"""

from __future__ import annotations

import json
import math
import os
import types
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from robusttomo import _io, _pauli
from robusttomo import channels as _ch
from robusttomo._version import __version__
from robusttomo.channels import Channel
from robusttomo.counts import Counts
from robusttomo.errors import DataError

__all__ = ["Device", "error_from_parts", "load_device", "save_device", "simulate"]

_KIND = "robusttomo-device"
_SCHEMAS = (1,)
_TOL = 1e-6  # CPTP and probability tolerance for user-supplied channels and matrices


# ---- device ----------------------------------------------------------------------------------
def _gate_arity(name: str) -> int:
    from robusttomo import clifford

    return int(np.asarray(clifford.gate_unitary(name)).shape[0]).bit_length() - 1


def _gate_names() -> tuple[str, ...]:
    from robusttomo import clifford

    return tuple(clifford.GATES)


def _check_channel(name: str, ch: object, n: int) -> Channel:
    if not isinstance(ch, Channel):
        raise TypeError(f"'{name}' must be a robusttomo Channel; got {type(ch).__name__}")
    if ch.n_qubits != n:
        raise ValueError(f"'{name}' must act on {n} qubit(s); got a {ch.n_qubits}-qubit channel")
    if not ch.is_tp(atol=_TOL):
        raise ValueError(f"'{name}' is not trace preserving (first PTM row != e_0 to {_TOL:g})")
    if not ch.is_cp(atol=_TOL):
        raise ValueError(f"'{name}' is not completely positive (negative Choi eigenvalue beyond {_TOL:g})")
    return ch


def _check_prep(prep_in: object, d: int, *, name: str) -> np.ndarray:
    prep = np.asarray(prep_in)
    if prep.shape != (d, d):
        raise ValueError(f"'{name}' must be a {d} x {d} density matrix; got shape {prep.shape}")
    if not np.issubdtype(prep.dtype, np.number) or not np.all(np.isfinite(prep)):
        raise ValueError(f"'{name}' must be a finite numeric matrix")
    prep = np.array(prep, dtype=complex)
    if np.max(np.abs(prep - prep.conj().T)) > _TOL:
        raise ValueError(f"'{name}' must be Hermitian")
    if abs(np.trace(prep).real - 1) > _TOL:
        raise ValueError(f"'{name}' must have trace 1; got {np.trace(prep).real:.6g}")
    if np.linalg.eigvalsh((prep + prep.conj().T) / 2).min() < -_TOL:
        raise ValueError(f"'{name}' must be positive semidefinite (it has a negative eigenvalue)")
    return prep


def _check_confusion(conf_in: object, d: int, *, name: str) -> np.ndarray:
    conf = np.asarray(conf_in)
    if conf.shape != (d, d):
        raise ValueError(f"'{name}' must be a {d} x {d} confusion matrix; got shape {conf.shape}")
    if np.iscomplexobj(conf) or not np.issubdtype(conf.dtype, np.number) or not np.all(np.isfinite(conf)):
        raise ValueError(f"'{name}' must be a finite real matrix")
    conf = np.array(conf, dtype=float)
    if np.any(conf < -_TOL) or np.any(conf > 1 + _TOL):
        raise ValueError(f"'{name}' entries are probabilities and must lie in [0, 1]")
    if np.max(np.abs(conf.sum(axis=0) - 1)) > _TOL:
        raise ValueError(f"'{name}' columns must sum to 1 (C[y, x] = P(read y | x)); "
                         f"got sums {conf.sum(axis=0).round(6).tolist()}")
    return conf


@dataclass(frozen=True, eq=False)
class Device:
    """A synthetic noisy device (use :meth:`build` for the common cases).

    The device implements Clifford ``C`` as ``error o N(C)``, where ``N(C)`` is the ideal
    ``C`` if ``gate_errors`` is empty, and otherwise the compiled circuit of ``C`` with each
    native gate ``g`` followed by ``gate_errors[g]`` on the gate's qubits (gates without an
    entry are perfect), so the error of a Clifford depends on how it compiles.  The
    interleaved gate ``G`` of an interleaved block is implemented as
    ``interleaved_error o G`` (``G`` perfect if ``interleaved_error`` is None).  A sequence
    starts in ``prep`` and ends with a computational-basis readout distorted by ``readout``.

    Compare two devices by their :attr:`fingerprint`.

    Attributes
    ----------
    n_qubits : int
        Number of qubits (1..3); ``d = 2**n_qubits``.
    error : Channel
        Error channel after every Clifford (``n_qubits`` qubits, CPTP; identity allowed).
    gate_errors : Mapping[str, Channel]
        Native gate name (``h, s, sdg, x, y, z, cx, cz``) to its error channel: one-qubit for
        one-qubit gates, two-qubit for two-qubit gates (qubit order ``(control, target)`` for
        ``cx``, the gate's own qubit order in general), applied after the gate on its qubits.
        Read-only; empty for gate-independent noise.
    interleaved_error : Channel or None
        Error after the interleaved gate ``G``; None means a perfect ``G``.
    prep : ndarray, shape (d, d), complex128
        Prepared density matrix (Hermitian, PSD, trace 1; ideally ``|0..0><0..0|``).  Read-only.
    readout : ndarray, shape (d, d), float64
        Confusion matrix ``C[y, x] = P(read y | true x)``; columns sum to 1.  Read-only.

    Examples
    --------
    >>> from robusttomo import channels
    >>> dev = Device.build(1, error=channels.depolarizing(1, 0.99), readout=[(0.02, 0.05)])
    >>> dev.readout.round(2).tolist()
    [[0.98, 0.05], [0.02, 0.95]]
    """

    n_qubits: int
    error: Channel
    gate_errors: Mapping[str, Channel]
    interleaved_error: Channel | None
    prep: np.ndarray
    readout: np.ndarray

    def __post_init__(self) -> None:
        n = _pauli.check_n_qubits(self.n_qubits)
        d = 2**n
        _check_channel("error", self.error, n)
        if not isinstance(self.gate_errors, Mapping):
            raise TypeError(f"'gate_errors' must be a mapping from gate name to Channel; got {type(self.gate_errors).__name__}")
        names = _gate_names()
        gates: dict[str, Channel] = {}
        for name, ch in self.gate_errors.items():
            if name not in names:
                raise ValueError(f"'gate_errors' key must be a native gate name {list(names)}; got {name!r}")
            gates[name] = _check_channel(f"gate_errors[{name!r}]", ch, _gate_arity(name))
        if self.interleaved_error is not None:
            _check_channel("interleaved_error", self.interleaved_error, n)
        prep = _check_prep(self.prep, d, name="prep")
        conf = _check_confusion(self.readout, d, name="readout")
        prep.setflags(write=False)
        conf.setflags(write=False)
        object.__setattr__(self, "n_qubits", n)
        object.__setattr__(self, "gate_errors", types.MappingProxyType(gates))
        object.__setattr__(self, "prep", prep)
        object.__setattr__(self, "readout", conf)

    @classmethod
    def build(
        cls,
        n_qubits: int,
        *,
        error: Channel | None = None,
        gate_errors: Mapping[str, Channel] | None = None,
        interleaved_error: Channel | None = None,
        prep_flip: Sequence[float] | None = None,
        prep: np.ndarray | None = None,
        readout: Sequence[Sequence[float]] | None = None,
        confusion: np.ndarray | None = None,
    ) -> Device:
        """Device from the usual parts; everything not given is perfect.

        Parameters
        ----------
        n_qubits : int
            Number of qubits (1..3).
        error : Channel, optional
            Error after every Clifford; default the identity.
        gate_errors : Mapping[str, Channel], optional
            Gate-dependent noise, see the class docstring; default none.
        interleaved_error : Channel, optional
            Error after the interleaved gate; default a perfect gate.
        prep_flip : sequence of float, length n_qubits, optional
            Per-qubit probability of preparing ``|1>`` instead of ``|0>``; the prepared state
            is the product ``(x)_q diag(1 - f_q, f_q)``.  Exclusive with ``prep``.
        prep : ndarray, shape (d, d), optional
            Prepared density matrix.  Default ``|0..0><0..0|``.
        readout : sequence of (float, float), one pair per qubit, optional
            ``(P(read 1 | 0), P(read 0 | 1))`` for each qubit; the confusion matrix is the
            tensor product of ``[[1 - a, b], [a, 1 - b]]`` (qubit 0 leftmost).  Exclusive
            with ``confusion``.
        confusion : ndarray, shape (d, d), optional
            Full confusion matrix ``C[y, x] = P(read y | x)``.  Default the identity.

        Returns
        -------
        Device
        """
        n = _pauli.check_n_qubits(n_qubits)
        d = 2**n
        if prep_flip is not None and prep is not None:
            raise ValueError("give either 'prep_flip' or 'prep', not both")
        if readout is not None and confusion is not None:
            raise ValueError("give either 'readout' (per-qubit pairs) or 'confusion' (full matrix), not both")
        if prep_flip is not None:
            prep = _product_prep(_prob_list("prep_flip", prep_flip, n))
        elif prep is None:
            prep = np.zeros((d, d), dtype=complex)
            prep[0, 0] = 1.0
        if readout is not None:
            confusion = _product_confusion(_pair_list("readout", readout, n))
        elif confusion is None:
            confusion = np.eye(d)
        return cls(n_qubits=n, error=_ch.identity(n) if error is None else error,
                   gate_errors={} if gate_errors is None else gate_errors,
                   interleaved_error=interleaved_error, prep=prep, readout=confusion)

    @property
    def dim(self) -> int:
        """Hilbert-space dimension ``d = 2**n_qubits``."""
        return 2**self.n_qubits

    @property
    def fingerprint(self) -> str:
        """SHA-256 of the device content (all channels as PTMs, prep, readout)."""
        parts: list[object] = [_KIND, self.n_qubits, np.asarray(self.error.ptm)]
        for name in sorted(self.gate_errors):
            parts += [name, np.asarray(self.gate_errors[name].ptm)]
        parts.append(None if self.interleaved_error is None else np.asarray(self.interleaved_error.ptm))
        parts += [self.prep, self.readout]
        return _io.fingerprint(*parts)


def _prob_list(name: str, values: object, n: int) -> list[float]:
    try:
        vals = [float(v) for v in values]  # type: ignore[union-attr]
    except (TypeError, ValueError):
        raise TypeError(f"'{name}' must be a list of {n} probabilities; got {values!r}") from None
    if len(vals) != n:
        raise ValueError(f"'{name}' needs one probability per qubit ({n}); got {len(vals)}")
    if not all(0.0 <= v <= 1.0 for v in vals):
        raise ValueError(f"'{name}' entries are probabilities and must lie in [0, 1]; got {vals}")
    return vals


def _pair_list(name: str, values: object, n: int) -> list[tuple[float, float]]:
    try:
        pairs = [tuple(float(v) for v in pair) for pair in values]  # type: ignore[union-attr]
    except (TypeError, ValueError):
        raise TypeError(f"'{name}' must be a list of {n} pairs (P(read 1|0), P(read 0|1)); got {values!r}") from None
    if len(pairs) != n or any(len(p) != 2 for p in pairs):
        raise ValueError(f"'{name}' needs one pair (P(read 1|0), P(read 0|1)) per qubit ({n}); got {values!r}")
    if not all(0.0 <= v <= 1.0 for p in pairs for v in p):
        raise ValueError(f"'{name}' entries are probabilities and must lie in [0, 1]; got {values!r}")
    return pairs  # type: ignore[return-value]


def _product_prep(flips: Sequence[float]) -> np.ndarray:
    rho = np.ones((1, 1), dtype=complex)
    for f in flips:
        rho = np.kron(rho, np.diag([1.0 - f, f]))
    return rho


def _product_confusion(pairs: Sequence[tuple[float, float]]) -> np.ndarray:
    c = np.ones((1, 1))
    for a, b in pairs:
        c = np.kron(c, np.array([[1.0 - a, b], [a, 1.0 - b]]))
    return c


# ---- named error parts ---------------------------------------------------------------------
_PART_FIELDS = {
    "rotation": ("pauli", "angle"),
    "depolarizing": ("p",),
    "dephasing": ("prob",),
    "amplitude_damping": ("gamma",),
}


def _part_qubits(part: Mapping[str, Any], n: int, where: str) -> list[int]:
    if "qubits" not in part:
        return list(range(n))
    qs = part["qubits"]
    if not isinstance(qs, (list, tuple)) or not qs or any(
            isinstance(q, bool) or not isinstance(q, (int, np.integer)) for q in qs):
        raise ValueError(f"{where}: 'qubits' must be a non-empty list of qubit indices; got {qs!r}")
    qs = [int(q) for q in qs]
    if len(set(qs)) != len(qs) or any(not 0 <= q < n for q in qs):
        raise ValueError(f"{where}: 'qubits' must be distinct indices in 0..{n - 1}; got {qs}")
    return qs


def _part_number(part: Mapping[str, Any], key: str, where: str) -> float:
    v = part[key]
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) or not math.isfinite(v):
        raise ValueError(f"{where}: '{key}' must be a finite number; got {v!r}")
    return float(v)


def error_from_parts(n_qubits: int, parts: Sequence[Mapping[str, Any]]) -> Channel:
    """Error channel composed of named parts, applied in list order (first part acts first).

    Parameters
    ----------
    n_qubits : int
        Register size (1..3).
    parts : sequence of mappings
        Each part has a ``"type"`` and its fields:

        * ``{"type": "rotation", "pauli": "ZZ", "angle": 0.05}``: ``exp(-i angle/2 P)``; the
          label has one letter per qubit of ``"qubits"`` (default all qubits), e.g.
          ``{"type": "rotation", "pauli": "X", "angle": 0.1, "qubits": [1]}``; a ``"ZZ"``
          label is a ZZ coupling.
        * ``{"type": "depolarizing", "p": 0.99, "qubits": [0, 1]}``: joint depolarizing with
          PTM ``diag(1, p, ..., p)`` on the listed qubits (default all).
        * ``{"type": "dephasing", "prob": 0.01, "qubits": [1]}``: ``rho -> (1-prob) rho +
          prob Z rho Z`` on each listed qubit independently (default all).
        * ``{"type": "amplitude_damping", "gamma": 0.02, "qubits": [0]}``: amplitude damping
          ``|1> -> |0>`` with probability ``gamma`` on each listed qubit (default all).

        Angles in radians; qubit 0 is the leftmost tensor factor.  An empty list gives the
        identity.

    Returns
    -------
    Channel
        ``n_qubits``-qubit CPTP channel.

    Raises
    ------
    ValueError, TypeError
        Naming the part (``parts[i]``) and the field.

    Examples
    --------
    >>> ch = error_from_parts(2, [{"type": "rotation", "pauli": "ZZ", "angle": 0.05},
    ...                           {"type": "dephasing", "prob": 0.01, "qubits": [1]}])
    >>> ch.n_qubits, ch.is_cptp()
    (2, True)
    """
    n = _pauli.check_n_qubits(n_qubits)
    if isinstance(parts, (str, bytes, Mapping)) or not isinstance(parts, Sequence):
        raise TypeError(f"'parts' must be a list of part mappings; got {type(parts).__name__}")
    total = _ch.identity(n)
    for i, part in enumerate(parts):
        where = f"parts[{i}]"
        if not isinstance(part, Mapping):
            raise TypeError(f"{where} must be a mapping with a 'type'; got {type(part).__name__}")
        kind = part.get("type")
        if kind not in _PART_FIELDS:
            raise ValueError(f"{where}: 'type' must be one of {sorted(_PART_FIELDS)}; got {kind!r}")
        allowed = {"type", "qubits", *_PART_FIELDS[kind]}
        extra = sorted(str(k) for k in part if k not in allowed)
        if extra:
            raise ValueError(f"{where}: unknown field {extra[0]!r} for a {kind} part; allowed {sorted(allowed)}")
        for key in _PART_FIELDS[kind]:
            if key not in part:
                raise ValueError(f"{where}: a {kind} part needs field '{key}'")
        if kind == "rotation":
            label = part["pauli"]
            if not isinstance(label, str) or not label or any(c not in "IXYZ" for c in label):
                raise ValueError(f"{where}: 'pauli' must be a label over 'IXYZ' such as 'ZZ'; got {label!r}")
            qs = _part_qubits(part, n, where)
            if len(label) != len(qs):
                raise ValueError(f"{where}: 'pauli' {label!r} needs one letter per qubit of 'qubits' "
                                 f"(default all {n}); got {len(label)} letters for qubits {qs}")
            angle = _part_number(part, "angle", where)
            ch = _ch.embed(_ch.rotation(label, angle), qs, n)
        elif kind == "depolarizing":
            qs = _part_qubits(part, n, where)
            p = _part_number(part, "p", where)
            d2 = 4 ** len(qs)
            if not -1.0 / (d2 - 1) <= p <= 1.0:
                raise ValueError(f"{where}: 'p' must lie in [-1/{d2 - 1}, 1] for a CP depolarizing channel; got {p!r}")
            ch = _ch.embed(_ch.depolarizing(len(qs), p), qs, n)
        else:
            key = _PART_FIELDS[kind][0]
            qs = _part_qubits(part, n, where)
            v = _part_number(part, key, where)
            if not 0.0 <= v <= 1.0:
                raise ValueError(f"{where}: '{key}' must lie in [0, 1]; got {v!r}")
            one = _ch.dephasing(v) if kind == "dephasing" else _ch.amplitude_damping(v)
            ch = _ch.identity(n)
            for q in qs:
                ch = _ch.embed(one, [q], n) @ ch
        total = ch @ total
    return total


# ---- device JSON ---------------------------------------------------------------------------
_DEVICE_KEYS = {
    "schema_version", "kind", "n_qubits", "description", "package_version",
    "error_kraus", "error_parts", "gate_errors", "interleaved_error_kraus", "interleaved_error_parts",
    "readout", "prep_flip", "confusion", "prep_density",
}


def _nested_numbers(obj: object, shape: tuple[int, ...], where: str) -> np.ndarray:
    """Strictly typed nested list of finite numbers with an exact shape."""
    def walk(o: object, depth: int) -> list[Any]:
        if depth == len(shape):
            if isinstance(o, bool) or not isinstance(o, (int, float)) or not math.isfinite(o):
                raise ValueError(f"entries must be finite numbers; got {str(o)[:40]}")
            return o  # type: ignore[return-value]
        if not isinstance(o, list) or len(o) != shape[depth]:
            got = f"length {len(o)}" if isinstance(o, list) else type(o).__name__
            raise ValueError(f"expected a nested list of shape {shape}; got {got} at depth {depth}")
        return [walk(e, depth + 1) for e in o]

    try:
        return np.array(walk(obj, 0), dtype=float)
    except ValueError as err:
        raise ValueError(f"{where}: {err}") from None


def _kraus_from_json(obj: object, d: int, where: str) -> Channel:
    if not isinstance(obj, list) or not obj:
        raise ValueError(f"{where}: must be a non-empty list of {d} x {d} Kraus matrices of [real, imag] pairs")
    if len(obj) > d * d * 4:
        raise ValueError(f"{where}: {len(obj)} Kraus operators is more than any {d}-dimensional channel needs")
    arr = _nested_numbers(obj, (len(obj), d, d, 2), where)
    ks = arr[..., 0] + 1j * arr[..., 1]
    dev = np.max(np.abs(np.einsum("kba,kbc->ac", ks.conj(), ks) - np.eye(d)))
    if dev > _TOL:
        raise ValueError(f"{where}: Kraus operators are not trace preserving (max |sum K^dag K - I| = {dev:.3g} "
                         f"> {_TOL:g}); fix the matrices")
    return Channel.from_kraus(ks)


def _kraus_to_json(ch: Channel) -> list[Any]:
    ks = ch.kraus()
    return [[[[float(z.real), float(z.imag)] for z in row] for row in k] for k in ks]


def _channel_spec(doc: Mapping[str, Any], kraus_key: str, parts_key: str, n: int, prefix: str = "") -> Channel | None:
    """Channel from ``doc[kraus_key]`` (Kraus list) or ``doc[parts_key]`` (named parts)."""
    kf, pf = f"field '{prefix}{kraus_key}'", f"field '{prefix}{parts_key}'"
    if kraus_key in doc and parts_key in doc:
        raise ValueError(f"give either {kf} or {pf}, not both")
    if kraus_key in doc:
        return _kraus_from_json(doc[kraus_key], 2**n, kf)
    if parts_key in doc:
        parts = doc[parts_key]
        if not isinstance(parts, list):
            raise ValueError(f"{pf}: must be a list of parts; got {type(parts).__name__}")
        try:
            return error_from_parts(n, parts)
        except (TypeError, ValueError) as err:
            raise ValueError(f"{pf}: {err}") from None
    return None


def _device_from_doc(doc: Any) -> Device:
    if not isinstance(doc, dict):
        raise ValueError(f"top level must be a JSON object; got {type(doc).__name__}")
    extra = sorted(set(doc) - _DEVICE_KEYS)
    if extra:
        raise ValueError(f"unknown field {extra[0][:40]!r}; allowed fields are {sorted(_DEVICE_KEYS)}")
    sv = doc.get("schema_version")
    if isinstance(sv, bool) or not isinstance(sv, int):
        raise ValueError(f"field 'schema_version' is missing or not an integer; got {str(sv)[:40]}")
    if "kind" in doc and doc["kind"] != _KIND:
        raise ValueError(f"field 'kind' must be {_KIND!r}; got {str(doc['kind'])[:40]!r}")
    n = doc.get("n_qubits")
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 3:
        raise ValueError(f"field 'n_qubits' must be 1, 2 or 3; got {str(n)[:40]}")
    d = 2**n
    error = _channel_spec(doc, "error_kraus", "error_parts", n)
    inter = _channel_spec(doc, "interleaved_error_kraus", "interleaved_error_parts", n)
    gates: dict[str, Channel] = {}
    if "gate_errors" in doc:
        ge = doc["gate_errors"]
        if not isinstance(ge, dict):
            raise ValueError("field 'gate_errors': must be an object {\"<gate>\": {\"kraus\": [...]} or {\"parts\": [...]}}")
        names = _gate_names()
        for name, spec in ge.items():
            if name not in names:
                raise ValueError(f"field 'gate_errors': unknown native gate {name[:20]!r}; use one of {list(names)}")
            if not isinstance(spec, dict) or not spec or set(spec) - {"kraus", "parts"}:
                raise ValueError(f"field 'gate_errors.{name}': must be an object with 'kraus' or 'parts'")
            ch = _channel_spec(spec, "kraus", "parts", _gate_arity(name), prefix=f"gate_errors.{name}.")
            assert ch is not None  # spec holds one of the two keys
            gates[name] = ch
    if "prep_flip" in doc and "prep_density" in doc:
        raise ValueError("give either field 'prep_flip' or field 'prep_density', not both")
    if "readout" in doc and "confusion" in doc:
        raise ValueError("give either field 'readout' or field 'confusion', not both")
    prep = None
    if "prep_flip" in doc:
        flips = _nested_numbers(doc["prep_flip"], (n,), "field 'prep_flip'")
        if np.any(flips < 0) or np.any(flips > 1):
            raise ValueError(f"field 'prep_flip': entries are probabilities in [0, 1]; got {flips.tolist()}")
        prep = _product_prep(flips.tolist())
    elif "prep_density" in doc:
        arr = _nested_numbers(doc["prep_density"], (d, d, 2), "field 'prep_density'")
        prep = _check_prep(arr[..., 0] + 1j * arr[..., 1], d, name="prep_density")
    confusion = None
    if "readout" in doc:
        pairs = _nested_numbers(doc["readout"], (n, 2), "field 'readout'")
        if np.any(pairs < 0) or np.any(pairs > 1):
            raise ValueError(f"field 'readout': entries are probabilities in [0, 1]; got {pairs.tolist()}")
        confusion = _product_confusion([tuple(p) for p in pairs.tolist()])
    elif "confusion" in doc:
        confusion = _check_confusion(_nested_numbers(doc["confusion"], (d, d), "field 'confusion'"), d,
                                     name="confusion")
    return Device.build(n, error=error, gate_errors=gates, interleaved_error=inter, prep=prep, confusion=confusion)


def load_device(path: str | os.PathLike[str]) -> Device:
    """Read a device description (JSON, schema in ``docs/file-formats.md``, "Device description").

    Parameters
    ----------
    path : str or path-like
        JSON file with at least ``schema_version`` and ``n_qubits``.

    Returns
    -------
    Device

    Raises
    ------
    DataError
        For an unreadable file, invalid JSON, an unsupported ``schema_version``, an unknown
        field, wrong shapes, probabilities outside [0, 1] or Kraus sets that are not trace
        preserving to 1e-6; the message names the file and the field.
    """
    p = Path(path)
    if not p.is_file():
        raise DataError(f"{p}: no such device file")
    try:
        text = p.read_bytes().decode("utf-8-sig")
        doc = json.loads(text)
    except UnicodeDecodeError as err:
        raise DataError(f"{p}: not UTF-8 text (byte {err.start})") from None
    except (ValueError, RecursionError) as err:
        raise DataError(f"{p}: not valid JSON ({str(err)[:80]})") from None
    except OSError as err:
        raise DataError(f"{p}: cannot read the file ({err.strerror})") from None
    if isinstance(doc, dict) and isinstance(doc.get("schema_version"), int) and not isinstance(doc["schema_version"], bool):
        _io.check_schema(p, doc["schema_version"], kind="device", supported=_SCHEMAS)
    try:
        return _device_from_doc(doc)
    except (TypeError, ValueError) as err:
        raise DataError(f"{p}: {err}") from None


def save_device(device: Device, path: str | os.PathLike[str], *, force: bool = False) -> Path:
    """Write a device as JSON (atomic; never overwrites unless ``force``).

    Channels are written as Kraus operators (``error_kraus``, ``gate_errors.<g>.kraus``,
    ``interleaved_error_kraus``), the readout as the full ``confusion`` matrix and the
    prepared state as ``prep_density``, so :func:`load_device` restores the same device to
    floating-point accuracy.

    Returns
    -------
    Path
        The written path.
    """
    if not isinstance(device, Device):
        raise TypeError(f"'device' must be a Device; got {type(device).__name__}")
    doc: dict[str, Any] = {
        "schema_version": 1,
        "kind": _KIND,
        "package_version": __version__,
        "n_qubits": device.n_qubits,
        "error_kraus": _kraus_to_json(device.error),
    }
    if device.gate_errors:
        doc["gate_errors"] = {name: {"kraus": _kraus_to_json(ch)} for name, ch in sorted(device.gate_errors.items())}
    if device.interleaved_error is not None:
        doc["interleaved_error_kraus"] = _kraus_to_json(device.interleaved_error)
    doc["confusion"] = device.readout.tolist()
    doc["prep_density"] = [[[float(z.real), float(z.imag)] for z in row] for row in device.prep]
    with _io.atomic_path(path, force=force) as tmp:
        tmp.write_text(json.dumps(doc, indent=1) + "\n", encoding="utf-8")
    return Path(path)


# ---- simulation ----------------------------------------------------------------------------
def _z_readout_map(n: int) -> np.ndarray:
    """``M[x, i] = <x|P_i|x> / sqrt(d)``: diagonal of rho from its normalized Pauli vector."""
    d = 2**n
    p = _pauli.pauli_stack(n)
    return np.real(np.einsum("ixx->xi", p)) / np.sqrt(d)


def _noisy_gate_ptm(name: str, qubits: tuple[int, ...], n: int, device: Device) -> np.ndarray:
    from robusttomo import clifford

    g = Channel.from_unitary(np.asarray(clifford.gate_unitary(name), dtype=complex))
    if name in device.gate_errors:
        g = device.gate_errors[name] @ g
    return np.asarray(_ch.embed(g, list(qubits), n).ptm)


def _clifford_channels(n: int, indices: np.ndarray, device: Device) -> np.ndarray:
    """Noisy PTMs ``R_error @ N(C_i)`` for the given Clifford indices, ``(u, d*d, d*d)``."""
    from robusttomo import clifford

    if not device.gate_errors:
        ideal = np.asarray(clifford.clifford_ptms(n, indices), dtype=float)
    else:
        circuits = clifford.clifford_circuits(n, indices)
        cache: dict[tuple[str, tuple[int, ...]], np.ndarray] = {}
        ideal = np.empty((len(indices), 4**n, 4**n))
        for k, circuit in enumerate(circuits):
            r = np.eye(4**n)
            for name, qubits in circuit:
                key = (name, tuple(int(q) for q in qubits))
                g = cache.get(key)
                if g is None:
                    g = cache[key] = _noisy_gate_ptm(name, key[1], n, device)
                r = g @ r
            ideal[k] = r
    return np.matmul(np.asarray(device.error.ptm), ideal)


def _block_probabilities(plan: Any, block: Any, device: Device) -> np.ndarray:
    """Exact outcome probabilities ``(K, d)`` of one block's sequences."""
    from robusttomo.plan import SequenceKind

    n = device.n_qubits
    d = 2**n
    cl = np.asarray(block.cliffords, dtype=np.int64)
    k_seq, m = cl.shape
    r0 = _pauli.pauli_vector(device.prep) / np.sqrt(d)
    g_ptm = None
    if block.kind == SequenceKind.INTERLEAVED:
        g = Channel.from_unitary(np.asarray(plan.interleave.unitary, dtype=complex))
        if device.interleaved_error is not None:
            g = device.interleaved_error @ g
        g_ptm = np.asarray(g.ptm)
    # Sequences are processed in chunks whose distinct Cliffords fit in memory (a concern only
    # for three qubits, where one PTM is 32 kB and the group is huge).
    per_chunk = max(1, (2**27 // (8 * 16**n)) // max(m, 1))
    out = np.empty((k_seq, d))
    zmap = _z_readout_map(n)
    for start in range(0, k_seq, per_chunk):
        sub = cl[start:start + per_chunk]
        uniq, inv = np.unique(sub, return_inverse=True)
        inv = inv.reshape(sub.shape)
        noisy = _clifford_channels(n, uniq, device)
        r = np.repeat(r0[None, :], sub.shape[0], axis=0)
        for t in range(m):
            # Batched matrix-vector product over every sequence of the chunk at time step t.
            r = np.matmul(noisy[inv[:, t]], r[:, :, None])[:, :, 0]
            if g_ptm is not None:
                r = r @ g_ptm.T
        out[start:start + sub.shape[0]] = r @ zmap.T
    p = out @ device.readout.T
    # Round-off can leave tiny negative probabilities; they are clipped and rows renormalized.
    p = np.clip(p, 0.0, None)
    return p / p.sum(axis=1, keepdims=True)


def simulate(plan: Any, device: Device, *, seed: int | np.random.Generator | None = None,
             exact: bool = False) -> Counts:
    """Run every sequence of ``plan`` on ``device`` by exact density-matrix simulation.

    Each sequence starts in ``device.prep``, runs its Cliffords ``C_1 .. C_m`` (column 0 of
    the block first), each implemented as ``device.error o N(C)`` (see :class:`Device`),
    with ``interleaved_error o G`` after every Clifford in interleaved blocks, and ends with a
    computational-basis measurement of every qubit.  The outcome probabilities are
    ``p = C @ diag(rho_final)`` with the confusion matrix ``C = device.readout``.

    The state is held as a real Pauli vector and advanced by batched PTM products over all
    sequences of a block at once, one time step after another; with gate-dependent noise the
    noisy PTM of every distinct Clifford used is composed once from its compiled circuit.

    Parameters
    ----------
    plan : Plan
        The experiment plan.
    device : Device
        The synthetic device (same number of qubits as the plan).
    seed : int, numpy Generator or None, default None
        Seed of ``numpy.random.default_rng`` for the shots; blocks draw in plan order.
    exact : bool, default False
        Return ``plan.shots * p`` (real-valued, ``Counts.exact = True``) instead of
        multinomial samples of ``plan.shots`` shots per sequence.

    Returns
    -------
    Counts
        One row per plan sequence (increasing id), ``counts[s, x]`` with outcome ``x``
        (qubit 0 the most significant bit); ``plan_fingerprint = plan.fingerprint``.

    Examples
    --------
    >>> from robusttomo import channels
    >>> from robusttomo.plan import make_plan
    >>> plan = make_plan(n_qubits=1, lengths=[1, 2, 4], sequences=5, shots=100, seed=1)
    >>> dev = Device.build(1, error=channels.depolarizing(1, 0.98), readout=[(0.01, 0.02)])
    >>> counts = simulate(plan, dev, seed=7)
    >>> counts.counts.shape, bool((counts.shots == 100).all())
    ((15, 2), True)
    """
    from robusttomo.plan import Plan

    if not isinstance(plan, Plan):
        raise TypeError(f"'plan' must be a robusttomo Plan; got {type(plan).__name__}")
    if not isinstance(device, Device):
        raise TypeError(f"'device' must be a Device; got {type(device).__name__}")
    if device.n_qubits != plan.n_qubits:
        raise ValueError(f"device has {device.n_qubits} qubit(s) but the plan has {plan.n_qubits}; "
                         "build the device for the plan's qubits")
    if not isinstance(exact, (bool, np.bool_)):
        raise TypeError(f"'exact' must be a bool; got {exact!r}")
    if not (seed is None or isinstance(seed, np.random.Generator)
            or (isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0)):
        raise TypeError(f"'seed' must be a non-negative integer, a numpy Generator or None; got {seed!r}")
    rng = np.random.default_rng(seed)
    shots = int(plan.shots)
    ids_parts, rows = [], []
    for block in plan.blocks:
        p = _block_probabilities(plan, block, device)
        rows.append(shots * p if exact else rng.multinomial(shots, p).astype(np.float64))
        ids_parts.append(int(block.first_id) + np.arange(p.shape[0], dtype=np.int64))
    d = device.dim
    ids = np.concatenate(ids_parts) if ids_parts else np.zeros(0, dtype=np.int64)
    data = np.concatenate(rows) if rows else np.zeros((0, d))
    order = np.argsort(ids, kind="stable")
    seed_txt = "a Generator" if isinstance(seed, np.random.Generator) else repr(seed)
    source = (f"simulated on device {device.fingerprint[:12]} "
              f"({'exact probabilities' if exact else f'{shots} shots, seed {seed_txt}'})")
    return Counts(n_qubits=device.n_qubits, plan_fingerprint=plan.fingerprint, sequence_ids=ids[order],
                  counts=data[order], exact=bool(exact), source=source)
