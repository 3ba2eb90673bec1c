"""Channel files for simulators: Kraus operators, Choi matrix, PTM, error generator, Pauli twirl.

:func:`export_channel` writes one :class:`~robusttomo.channels.Channel` in one of
:data:`FORMATS`; :func:`export_reconstruction` does the same for the result of an analysis
(the estimated error channel, or the whole noisy gate) and records where it came from;
:func:`load_channel` reads any of these files back.  The layouts and their conventions are in
``docs/exports.md``.

Conventions (the package's, repeated in every file under ``"conventions"``):

* Qubit 0 is the leftmost tensor factor and the most significant bit of a basis index:
  basis state ``|q0 q1 ...>`` has index ``x = sum_k q_k 2**(n-1-k)``.
* Complex numbers in JSON are ``[real, imag]`` pairs.
* Kraus operators ``K_k`` act as ``rho -> sum_k K_k rho K_k^dagger`` with
  ``sum_k K_k^dagger K_k = I``.
* Vectorization is row-major, ``vec(A)[a*d + b] = A[a, b]``.
* The Choi matrix has trace 1 with the input factor first:
  ``J = (1/d) sum_ij |i><j| (x) L(|i><j|)``, entry ``J[i*d + a, j*d + b] = L(|i><j|)[a, b] / d``.
* The PTM is ``R[i, j] = tr(P_i L(P_j)) / d`` in Pauli order ``II, IX, IY, IZ, XI, ...``
  (character k of a label acts on qubit k).
* The error generator and the Pauli twirl describe the error *after* the ideal gate:
  the noisy gate is ``E o U`` with ``E = exp(G)``.
"""

from __future__ import annotations

import json
import math
import os
import zipfile
import zlib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import scipy.linalg

from robusttomo import _io, _pauli
from robusttomo._version import __version__
from robusttomo.channels import Channel
from robusttomo.errors import DataError

__all__ = ["FORMATS", "OPERATIONS", "export_channel", "export_reconstruction", "load_channel"]

#: Export formats: name -> (what the file holds).
FORMATS: Mapping[str, str] = {
    "kraus-json": "Kraus operators, JSON, complex entries as [real, imag] pairs",
    "kraus-npz": "Kraus operators, NumPy .npz archive (complex128 array 'kraus', shape (r, d, d))",
    "choi": "trace-1 Choi matrix, JSON, input factor first",
    "ptm": "Pauli transfer matrix, JSON, real rows in Pauli order",
    "generator": "error generator: Hamiltonian and stochastic rates by Pauli label, plus the full generator",
    "pauli": "Pauli-twirled approximation: probability of each Pauli error, for stabilizer simulators",
}
#: What :func:`export_reconstruction` can write: the error channel after the ideal gate, or
#: the whole noisy operation ``error o target``.
OPERATIONS = ("error", "noisy-gate")

_KIND = "robusttomo-channel"
_SCHEMAS = (1,)
_MAX_BYTES = 64 * 2**20  # the largest honest file (3 qubits, Choi) is well under 1 MB
_TP_TOL = 1e-6  # trace preservation and probability tolerance on reading (the simulator's)
_CP_TOL = 1e-6  # Choi eigenvalues this far below zero are solver round-off, clipped on export
_FORMAT_OF_FIELD = {"kraus-json": "kraus", "kraus-npz": "kraus", "choi": "choi", "ptm": "ptm",
                    "generator": "generator", "pauli": "pauli"}

_CONVENTIONS = {
    "qubit_order": "qubit 0 is the leftmost tensor factor and the most significant bit of a basis index",
    "complex": "complex numbers in JSON are [real, imag] pairs",
    "kraus": "rho -> sum_k K_k rho K_k^dagger, sum_k K_k^dagger K_k = I",
    "vectorization": "row-major: vec(A)[a*d + b] = A[a, b]",
    "choi": "trace 1, input factor first: J[i*d + a, j*d + b] = L(|i><j|)[a, b] / d",
    "ptm": "R[i, j] = tr(P_i L(P_j)) / d, Pauli order II, IX, IY, IZ, XI, ... (label character k acts on qubit k)",
    "error_side": "generator and Pauli twirl describe the error E after the ideal gate U: noisy gate = E o U",
}


# ---- writing --------------------------------------------------------------------------------
def _pairs(a: np.ndarray) -> Any:
    """Complex array -> nested lists ending in [real, imag] pairs."""
    a = np.asarray(a, dtype=complex)
    return np.stack([a.real, a.imag], axis=-1).tolist()


def _cptp_kraus(channel: Channel) -> tuple[np.ndarray, float]:
    """Kraus operators of a channel that is CPTP up to solver round-off.

    Choi eigenvalues in ``[-1e-6, 0)`` (a convex solver's tolerance) are set to zero and the
    operators re-normalized, ``K_k -> K_k S^(-1/2)`` with ``S = sum_k K_k^dagger K_k``, so the
    written set is trace preserving to machine precision.  Returns the operators, shape
    ``(r, d, d)``, and the Frobenius norm of the change of the Choi matrix.
    """
    d = channel.dim
    choi = channel.choi
    w, v = np.linalg.eigh((choi + choi.conj().T) / 2)
    if w.min() < -_CP_TOL:
        raise ValueError(f"the channel is not completely positive (Choi eigenvalue {w.min():.3g} < "
                         f"-{_CP_TOL:g}); only CPTP channels have Kraus operators")
    keep = w > 1e-12 * max(float(w.max()), 1e-300)
    ks = np.sqrt(d * w[keep])[:, None, None] * v[:, keep].T.reshape(-1, d, d).transpose(0, 2, 1)
    ks = ks[::-1]  # largest weight first
    s = np.einsum("kba,kbc->ac", ks.conj(), ks)
    sw, sv = np.linalg.eigh((s + s.conj().T) / 2)
    ks = ks @ (sv @ np.diag(sw ** -0.5) @ sv.conj().T)
    change = float(np.linalg.norm(Channel.from_kraus(ks).choi - choi))
    return ks, change


def _pauli_twirl(channel: Channel) -> tuple[dict[str, float], float]:
    """Pauli error probabilities of the twirled channel (clipped at 0, renormalized).

    From :func:`robusttomo.metrics.pauli_error_rates` (the twirl of ``E`` has PTM ``diag(E)``).
    Returns the probabilities and the largest clipped negative part (round-off of a CP fit).
    """
    from robusttomo.metrics import pauli_error_rates

    rates = pauli_error_rates(channel)
    p = np.array(list(rates.values()))
    clipped = float(max(0.0, -p.min()))
    if clipped > _CP_TOL:
        raise ValueError(f"the twirled channel has a negative Pauli probability ({p.min():.3g}); "
                         "the channel is not completely positive")
    p = np.clip(p, 0.0, None)
    p = p / p.sum()
    return {lab: float(x) for lab, x in zip(rates, p)}, clipped


def _payload(channel: Channel, fmt: str) -> dict[str, Any]:
    n = channel.n_qubits
    if fmt in ("kraus-json", "kraus-npz"):
        ks, change = _cptp_kraus(channel)
        return {"kraus": ks, "cp_correction": change}
    if fmt == "choi":
        return {"choi": _pairs(channel.choi)}
    if fmt == "ptm":
        return {"basis": list(_pauli.pauli_labels(n)), "ptm": np.asarray(channel.ptm).tolist()}
    if fmt == "generator":
        from robusttomo.generators import rates_from_channel

        gen = rates_from_channel(channel)
        return {"hamiltonian": dict(gen.hamiltonian), "stochastic": dict(gen.stochastic),
                "residual": gen.residual, "basis": list(_pauli.pauli_labels(n)),
                "generator": np.asarray(gen.generator).tolist(),
                "rates": "h_P for H_P[rho] = -i[P, rho], s_P for S_P[rho] = P rho P - rho "
                         "(unnormalized Paulis); the error channel is exp(generator) in the PTM basis"}
    probs, clipped = _pauli_twirl(channel)
    return {"probabilities": probs, "clipped_negative": clipped}


def _check_format(fmt: object) -> str:
    if not isinstance(fmt, str) or fmt not in FORMATS:
        raise ValueError(f"'format' must be one of {list(FORMATS)}; got {fmt!r}")
    return fmt


def _write(path: str | os.PathLike[str], fmt: str, header: dict[str, Any], payload: dict[str, Any],
           *, force: bool) -> Path:
    doc = {**header, **{k: v for k, v in payload.items() if k != "kraus"}}
    with _io.atomic_path(path, force=force) as tmp:
        if fmt == "kraus-npz":
            # No pickle: strings go in as unicode arrays, metadata as one JSON string.
            with open(tmp, "wb") as fh:
                np.savez(fh, kraus=np.asarray(payload["kraus"], dtype=np.complex128),
                         schema_version=np.int64(1), kind=np.array(_KIND), format=np.array("kraus"),
                         n_qubits=np.int64(header["n_qubits"]), metadata=np.array(json.dumps(doc)))
        else:
            if "kraus" in payload:
                doc["kraus"] = _pairs(payload["kraus"])
            tmp.write_text(json.dumps(doc, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    return Path(path)


def _header(channel: Channel, fmt: str, description: str, extra: Mapping[str, Any] | None) -> dict[str, Any]:
    if not isinstance(description, str):
        raise TypeError(f"'description' must be a string; got {type(description).__name__}")
    head: dict[str, Any] = {
        "schema_version": 1,
        "kind": _KIND,
        "format": _FORMAT_OF_FIELD[fmt],
        "n_qubits": channel.n_qubits,
        "description": description,
        "package_version": __version__,
        "conventions": dict(_CONVENTIONS),
    }
    if extra:
        head.update(extra)
    return head


def export_channel(channel: Channel, path: str | os.PathLike[str], *, format: str,  # noqa: A002
                   description: str = "", force: bool = False) -> Path:
    """Write a channel for a simulator in one of :data:`FORMATS`.

    Parameters
    ----------
    channel : Channel
        A CPTP channel (a convex-fit result may violate complete positivity by round-off: Choi
        eigenvalues down to -1e-6 are clipped for the Kraus and Pauli formats, and the clipped
        amount is recorded).
    path : str or path-like
        Output file (``.json`` for the JSON formats, ``.npz`` for ``kraus-npz`` by
        convention).  Written atomically; an existing file is kept unless ``force``.
    format : str
        One of :data:`FORMATS`.  ``"generator"`` and ``"pauli"`` read ``channel`` as an error
        channel (relative to the identity).
    description : str
        Free text stored in the file.
    force : bool, default False
        Overwrite an existing file.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    ValueError
        For an unknown format, a channel that is not completely positive (Kraus, Pauli), or one
        without a real logarithm (generator).
    FileExistsError
        If ``path`` exists and not ``force``.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from robusttomo.channels import amplitude_damping
    >>> from robusttomo.export import export_channel, load_channel
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "ad.json"
    >>> _ = export_channel(amplitude_damping(0.1), out, format="kraus-json")
    >>> load_channel(out).allclose(amplitude_damping(0.1))
    True
    """
    if not isinstance(channel, Channel):
        raise TypeError(f"'channel' must be a robusttomo Channel; got {type(channel).__name__}")
    fmt = _check_format(format)
    _io.check_output_path(path, force=force)
    return _write(path, fmt, _header(channel, fmt, description, None), _payload(channel, fmt), force=force)


def export_reconstruction(rec: Any, path: str | os.PathLike[str], *, format: str,  # noqa: A002
                          operation: str = "error", force: bool = False) -> Path:
    """Write the channel estimated by an analysis (a :class:`robusttomo.assess.Reconstruction`).

    Parameters
    ----------
    rec : Reconstruction
        The analysis result.
    path : str or path-like
        Output file; see :func:`export_channel`.
    format : str
        One of :data:`FORMATS`.
    operation : {"error", "noisy-gate"}, default "error"
        ``"error"``: the estimated error channel ``E`` (``L`` of a reference run, ``L_G`` of an
        interleaved one), to apply after the ideal gate in a simulation.  ``"noisy-gate"``: the
        whole noisy operation ``E o U`` with ``U`` the target (only the Kraus, Choi and PTM
        formats; the generator and Pauli formats always describe the error after ``U``).
    force : bool, default False
        Overwrite an existing file.

    Returns
    -------
    Path
        The written file.  Besides the channel it records the target's label and unitary, the
        operation, the input fingerprints and the package version of the analysis.
    """
    from robusttomo.assess import Reconstruction

    if not isinstance(rec, Reconstruction):
        raise TypeError(f"'rec' must be a Reconstruction; got {type(rec).__name__}")
    fmt = _check_format(format)
    if operation not in OPERATIONS:
        raise ValueError(f"'operation' must be one of {list(OPERATIONS)}; got {operation!r}")
    if operation == "noisy-gate" and fmt in ("generator", "pauli"):
        raise ValueError(f"format {fmt!r} describes the error after the ideal gate; use operation 'error' "
                         "(or a kraus, choi or ptm format for the whole noisy gate)")
    _io.check_output_path(path, force=force)
    channel = rec.error_channel if operation == "error" else rec.noisy_gate
    what = ("error channel after the ideal gate" if operation == "error"
            else "noisy gate (error o target)")
    extra = {
        "operation": operation,
        "target": rec.target_label,
        "target_unitary": _pairs(rec.target_unitary),
        "source": {"mode": rec.mode.value, "plan_fingerprint": rec.plan_fingerprint,
                   "counts_fingerprint": rec.counts_fingerprint,
                   "analysis_package_version": rec.package_version},
    }
    desc = f"robusttomo estimate: {what}, target {rec.target_label}"
    return _write(path, fmt, _header(channel, fmt, desc, extra), _payload(channel, fmt), force=force)


# ---- reading --------------------------------------------------------------------------------
def _fail(p: Path, field: str, msg: str) -> DataError:
    return DataError(f"{p}: field '{field}': {msg}")


def _numbers(p: Path, field: str, obj: object, shape: tuple[int, ...]) -> np.ndarray:
    """Strict nested list of finite numbers with an exact shape (no coercion of strings or bools)."""
    def walk(o: object, depth: int) -> Any:
        if depth == len(shape):
            if isinstance(o, bool) or not isinstance(o, (int, float)) or not math.isfinite(o):
                raise _fail(p, field, f"entries must be finite numbers; got {str(o)[:40]}")
            return o
        if not isinstance(o, list) or len(o) != shape[depth]:
            got = f"length {len(o)}" if isinstance(o, list) else type(o).__name__
            raise _fail(p, field, f"expected a nested list of shape {shape}; got {got} at depth {depth}")
        return [walk(e, depth + 1) for e in o]

    return np.array(walk(obj, 0), dtype=float)


def _check_tp_kraus(p: Path, field: str, ks: np.ndarray) -> Channel:
    d = ks.shape[1]
    dev = float(np.max(np.abs(np.einsum("kba,kbc->ac", ks.conj(), ks) - np.eye(d))))
    if dev > _TP_TOL:
        raise _fail(p, field, f"Kraus operators are not trace preserving (max |sum K^dag K - I| = {dev:.3g} "
                              f"> {_TP_TOL:g})")
    return Channel.from_kraus(ks)


def _n_qubits(p: Path, doc: Mapping[str, Any]) -> int:
    n = doc.get("n_qubits")
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or not 1 <= int(n) <= 3:
        raise _fail(p, "n_qubits", f"must be 1, 2 or 3; got {str(n)[:40]}")
    return int(n)


def _from_doc(p: Path, doc: Mapping[str, Any], kraus: np.ndarray | None) -> Channel:
    sv = doc.get("schema_version")
    if isinstance(sv, bool) or not isinstance(sv, (int, np.integer)):
        raise _fail(p, "schema_version", f"missing or not an integer; got {str(sv)[:40]}; "
                                         "is this a robusttomo channel file?")
    _io.check_schema(p, int(sv), kind="channel", supported=_SCHEMAS)
    if doc.get("kind") != _KIND:
        raise _fail(p, "kind", f"must be {_KIND!r}; got {str(doc.get('kind'))[:40]!r}")
    n = _n_qubits(p, doc)
    d = 2**n
    fmt = doc.get("format")
    if fmt == "kraus":
        if kraus is None:
            obj = doc.get("kraus")
            if not isinstance(obj, list) or not obj or len(obj) > d * d:
                raise _fail(p, "kraus", f"must be a list of 1 to {d * d} Kraus matrices of size {d} x {d}")
            arr = _numbers(p, "kraus", obj, (len(obj), d, d, 2))
            kraus = arr[..., 0] + 1j * arr[..., 1]
        return _check_tp_kraus(p, "kraus", kraus)
    if fmt == "choi":
        arr = _numbers(p, "choi", doc.get("choi"), (d * d, d * d, 2))
        j = arr[..., 0] + 1j * arr[..., 1]
        if np.max(np.abs(j - j.conj().T)) > _TP_TOL:
            raise _fail(p, "choi", "the Choi matrix must be Hermitian")
        tr_out = np.einsum("iaja->ij", j.reshape(d, d, d, d))
        if np.max(np.abs(tr_out - np.eye(d) / d)) > _TP_TOL:
            raise _fail(p, "choi", "partial trace over the output is not I/d: the channel is not trace "
                                   "preserving (or the Choi matrix is not normalized to trace 1)")
        if np.linalg.eigvalsh(j).min() < -_CP_TOL:
            raise _fail(p, "choi", "the Choi matrix has a negative eigenvalue: the map is not completely positive")
        return Channel.from_choi(j)
    if fmt == "ptm":
        r = _numbers(p, "ptm", doc.get("ptm"), (d * d, d * d))
        _check_tp_row(p, "ptm", r)
        return Channel.from_ptm(r)
    if fmt == "generator":
        g = _numbers(p, "generator", doc.get("generator"), (d * d, d * d))
        if np.max(np.abs(g[0])) > _TP_TOL:
            raise _fail(p, "generator", "row 0 must vanish (a trace-preserving generator)")
        if np.max(np.abs(g)) > 50:
            raise _fail(p, "generator", "entries larger than 50 are not the generator of a channel near a gate")
        r = scipy.linalg.expm(g)
        _check_tp_row(p, "generator", r)
        return Channel.from_ptm(r)
    if fmt == "pauli":
        probs = doc.get("probabilities")
        labels = _pauli.pauli_labels(n)
        if not isinstance(probs, dict) or not probs:
            raise _fail(p, "probabilities", "must be an object mapping Pauli labels to probabilities")
        vals: dict[str, float] = {}
        for lab, v in probs.items():
            if lab not in labels:
                raise _fail(p, "probabilities", f"unknown Pauli label {str(lab)[:20]!r} for {n} qubit(s)")
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
                raise _fail(p, "probabilities", f"entry {lab!r} must be a non-negative number; got {str(v)[:40]}")
            vals[lab] = float(v)
        total = sum(vals.values())
        if abs(total - 1.0) > _TP_TOL:
            raise _fail(p, "probabilities", f"probabilities must sum to 1; got {total:.9g}")
        from robusttomo.channels import pauli_channel

        full = {lab: vals.get(lab, 0.0) / total for lab in labels}
        return pauli_channel(full)
    raise _fail(p, "format", f"must be one of ['kraus', 'choi', 'ptm', 'generator', 'pauli']; got {str(fmt)[:40]!r}")


def _check_tp_row(p: Path, field: str, r: np.ndarray) -> None:
    e0 = np.zeros(r.shape[0])
    e0[0] = 1.0
    if np.max(np.abs(r[0] - e0)) > _TP_TOL:
        raise _fail(p, field, "row 0 of the PTM must be (1, 0, ..., 0): the channel is not trace preserving")


def _read_npz(p: Path) -> tuple[dict[str, Any], np.ndarray]:
    try:
        with np.load(p, allow_pickle=False) as z:
            names = set(z.files)
            need = {"kraus", "schema_version", "kind", "format", "n_qubits"}
            missing = sorted(need - names)
            if missing:
                raise _fail(p, missing[0], "missing from the archive; is this a robusttomo channel file?")
            arrays = {k: z[k] for k in need}
    except DataError:
        raise
    except (OSError, ValueError, KeyError, EOFError, TypeError, zipfile.BadZipFile, zlib.error,
            NotImplementedError, RuntimeError) as err:  # the failures a damaged zip archive can raise
        raise DataError(f"{p}: not a readable .npz archive ({str(err)[:80]})") from None
    doc: dict[str, Any] = {}
    for k in ("schema_version", "n_qubits"):
        a = arrays[k]
        if a.shape != () or a.dtype.kind not in "iu":
            raise _fail(p, k, f"must be an integer scalar; got dtype {a.dtype}, shape {a.shape}")
        doc[k] = int(a)
    for k in ("kind", "format"):
        a = arrays[k]
        if a.shape != () or a.dtype.kind != "U":
            raise _fail(p, k, f"must be a string scalar; got dtype {a.dtype}, shape {a.shape}")
        doc[k] = str(a)
    ks = arrays["kraus"]
    n = _n_qubits(p, doc)
    d = 2**n
    if ks.ndim != 3 or ks.shape[1:] != (d, d) or not 1 <= ks.shape[0] <= d * d or ks.dtype.kind not in "fc":
        raise _fail(p, "kraus", f"must be a float or complex array of shape (r, {d}, {d}) with 1 <= r <= {d * d}; "
                                f"got dtype {ks.dtype}, shape {ks.shape}")
    if not np.all(np.isfinite(ks)):
        raise _fail(p, "kraus", "entries must be finite")
    if doc["format"] != "kraus":
        raise _fail(p, "format", f"an .npz channel file holds Kraus operators ('kraus'); got {doc['format']!r}")
    return doc, ks.astype(np.complex128)


def load_channel(path: str | os.PathLike[str]) -> Channel:
    """Read a channel file written by :func:`export_channel` or :func:`export_reconstruction`.

    Every format gives back the channel it describes: Kraus, Choi and PTM files the channel
    itself; a generator file ``exp(generator)``; a Pauli file the Pauli channel
    ``rho -> sum_P p_P P rho P`` (the twirled approximation, not the original channel).

    Parameters
    ----------
    path : str or path-like
        A ``.npz`` file (``kraus-npz``) or a JSON file (every other format).

    Returns
    -------
    Channel

    Raises
    ------
    DataError
        For a missing or unreadable file, invalid JSON, an unsupported ``schema_version``,
        a wrong ``kind`` or ``format``, wrong shapes or non-finite entries, or a channel that
        is not trace preserving (to 1e-6) or, for Choi and Pauli files, not completely
        positive; the message names the file and the field.
    """
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"'path' must be a path; got {type(path).__name__}")
    p = Path(path)
    if not p.is_file():
        raise DataError(f"{p}: no such channel file")
    try:
        size = p.stat().st_size
        if size > _MAX_BYTES:
            raise DataError(f"{p}: {size} bytes is far larger than any channel file; is this the right file?")
        raw = p.read_bytes()
    except OSError as err:
        raise DataError(f"{p}: cannot read the file ({err.strerror})") from None
    if raw[:4] == b"PK\x03\x04":  # a zip archive: the .npz form
        doc, ks = _read_npz(p)
        return _from_doc(p, doc, ks)
    try:
        doc = json.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError as err:
        raise DataError(f"{p}: not UTF-8 text (byte {err.start}) nor an .npz archive") from None
    except (ValueError, RecursionError) as err:
        raise DataError(f"{p}: not valid JSON ({str(err)[:80]})") from None
    if not isinstance(doc, dict):
        raise DataError(f"{p}: top level must be a JSON object; got {type(doc).__name__}")
    try:
        return _from_doc(p, doc, None)
    except DataError:
        raise
    except (TypeError, ValueError) as err:  # e.g. a label or channel the constructors reject
        raise DataError(f"{p}: {str(err)[:200]}") from None
