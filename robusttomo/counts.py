"""Outcome counts: the data of a run, their HDF5 file, and ingest of hardware results.

Conventions
-----------
* An outcome is an integer ``x`` in ``0 .. d-1`` (``d = 2**n_qubits``); qubit 0 is the most
  significant bit of ``x`` (textbook order ``|q0 q1 ...>``), as everywhere in robusttomo.
* ``counts[s, x]`` is the number of times outcome ``x`` was read for sequence
  ``sequence_ids[s]``.  Measured data are integer-valued; a simulation in exact-probabilities
  mode stores ``shots * probability`` (real-valued) and says so with ``exact=True``.
* Hardware files name an outcome by a bitstring.  ``bit_order="q0-left"`` means the first
  character is qubit 0 (our order); ``bit_order="q0-right"`` means the last character is
  qubit 0, as many toolchains print their classical registers.

The file layouts are documented in ``docs/file-formats.md`` ("Counts files").
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from robusttomo import _io, _pauli
from robusttomo._version import __version__
from robusttomo.errors import DataError

__all__ = ["Counts", "ingest", "load_counts", "save_counts", "BIT_ORDERS", "MAX_COUNT"]

#: Accepted values of the ``bit_order`` option of :func:`ingest`.
BIT_ORDERS = ("q0-left", "q0-right")
#: Largest count accepted for one (sequence, outcome) entry; larger values are taken as garbage.
MAX_COUNT = 1e12

_KIND = "robusttomo-counts"
_SCHEMAS = (1,)
_BIT_ORDER_NOTE = "outcome index x: qubit 0 is the most significant bit (bitstring q0 first)"
_HEX64 = re.compile(r"[0-9a-f]{64}")
_DIGITS = re.compile(r"[0-9]+")
# Refuse HDF5 datasets whose declared size could only be garbage (keeps a corrupt header from
# making the reader allocate gigabytes): 2**26 entries is far beyond any real experiment.
_MAX_ENTRIES = 2**26
_MAX_ATTR_BYTES = 2**16


def _empty_ids() -> np.ndarray:
    return np.zeros(0, dtype=np.int64)


@dataclass(frozen=True, eq=False)
class Counts:
    """Outcome counts of every sequence of a plan (one row per sequence).

    Compare two ``Counts`` by their :attr:`fingerprint`.

    Attributes
    ----------
    n_qubits : int
        Number of qubits (1..3); ``d = 2**n_qubits``.
    plan_fingerprint : str
        Fingerprint (64 hex characters) of the plan the sequences come from.
    sequence_ids : ndarray, shape (S,), int64
        Plan sequence ids, strictly increasing.
    counts : ndarray, shape (S, d), float64
        ``counts[s, x]`` = times outcome ``x`` (qubit 0 = most significant bit) was read for
        sequence ``sequence_ids[s]``.  Integer-valued unless ``exact``; every row has a
        positive total.
    exact : bool
        True for exact-probabilities simulation (``counts = shots * probabilities``).
    source : str
        Where the data came from (simulation settings or the ingested file), free text.
    missing_ids : ndarray, shape (M,), int64
        Plan sequences with no data (only when ingest was told ``allow_missing=True``);
        strictly increasing and disjoint from ``sequence_ids``.

    Examples
    --------
    >>> import numpy as np
    >>> c = Counts(n_qubits=1, plan_fingerprint="0" * 64, sequence_ids=np.array([0, 1]),
    ...            counts=np.array([[90.0, 10.0], [55.0, 45.0]]), exact=False, source="example")
    >>> c.shots.tolist()
    [100.0, 100.0]
    """

    n_qubits: int
    plan_fingerprint: str
    sequence_ids: np.ndarray
    counts: np.ndarray
    exact: bool
    source: str
    missing_ids: np.ndarray = field(default_factory=_empty_ids)

    def __post_init__(self) -> None:
        n = _pauli.check_n_qubits(self.n_qubits)
        d = 2**n
        if not isinstance(self.plan_fingerprint, str) or not _HEX64.fullmatch(self.plan_fingerprint):
            raise ValueError(f"'plan_fingerprint' must be 64 lowercase hex characters; got {self.plan_fingerprint!r}")
        if not isinstance(self.exact, (bool, np.bool_)):
            raise TypeError(f"'exact' must be a bool; got {self.exact!r}")
        if not isinstance(self.source, str):
            raise TypeError(f"'source' must be a string; got {type(self.source).__name__}")
        ids = _id_array("sequence_ids", self.sequence_ids)
        missing = _id_array("missing_ids", self.missing_ids)
        if np.intersect1d(ids, missing).size:
            raise ValueError(f"'missing_ids' overlaps 'sequence_ids': {np.intersect1d(ids, missing)[:5].tolist()}")
        c = np.asarray(self.counts)
        if c.dtype == object or not (np.issubdtype(c.dtype, np.integer) or np.issubdtype(c.dtype, np.floating)):
            raise TypeError(f"'counts' must be a real numeric array; got dtype {c.dtype}")
        if c.shape != (ids.size, d):
            raise ValueError(f"'counts' must have shape (len(sequence_ids), d) = {(ids.size, d)}; got {c.shape}")
        c = np.array(c, dtype=np.float64)
        if not np.all(np.isfinite(c)) or np.any(c < 0):
            raise ValueError("'counts' must be finite and non-negative")
        if not self.exact and np.any(c != np.round(c)):
            raise ValueError("'counts' must be integer-valued for measured data (exact=False)")
        if c.size and np.any(c.sum(axis=1) <= 0):
            bad = ids[c.sum(axis=1) <= 0][:5].tolist()
            raise ValueError(f"every sequence needs a positive number of shots; sequences {bad} have none")
        for name, arr in (("sequence_ids", ids), ("missing_ids", missing), ("counts", c)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "n_qubits", n)
        object.__setattr__(self, "exact", bool(self.exact))

    # ---- views --------------------------------------------------------------------------
    @property
    def dim(self) -> int:
        """Hilbert-space dimension ``d = 2**n_qubits``."""
        return 2**self.n_qubits

    @property
    def n_sequences(self) -> int:
        """Number ``S`` of sequences with data."""
        return int(self.sequence_ids.size)

    @property
    def shots(self) -> np.ndarray:
        """Total count of each sequence, shape ``(S,)``, float64."""
        return self.counts.sum(axis=1)

    @property
    def fingerprint(self) -> str:
        """SHA-256 of the content (qubits, plan fingerprint, ids, counts, exact, missing ids)."""
        return _io.fingerprint(_KIND, self.n_qubits, self.plan_fingerprint, self.sequence_ids,
                               self.counts, self.exact, self.missing_ids)

    def for_block(self, plan: Any, block: Any) -> np.ndarray:
        """Counts of one plan block's sequences, in the block's order.

        Parameters
        ----------
        plan : Plan
            The plan these counts belong to (its fingerprint must match).
        block : int or SequenceBlock
            Index into ``plan.blocks``, or one of its blocks.

        Returns
        -------
        ndarray, shape (K, d), float64
            Row ``k`` holds the counts of sequence ``block.first_id + k``.

        Raises
        ------
        DataError
            If the counts belong to another plan or a sequence of the block has no data.
        """
        _check_plan_like(plan)
        if plan.fingerprint != self.plan_fingerprint:
            raise DataError(f"counts ({self.source}) belong to plan {self.plan_fingerprint[:12]}..., "
                            f"not to plan {plan.fingerprint[:12]}...; load the matching plan")
        if isinstance(block, (int, np.integer)) and not isinstance(block, bool):
            if not 0 <= int(block) < len(plan.blocks):
                raise ValueError(f"'block' index must be in 0..{len(plan.blocks) - 1}; got {block}")
            block = plan.blocks[int(block)]
        elif not (hasattr(block, "first_id") and hasattr(block, "cliffords")):
            raise TypeError(f"'block' must be a block index or a SequenceBlock; got {type(block).__name__}")
        k = int(np.shape(block.cliffords)[0])
        first = int(block.first_id)
        ids = self.sequence_ids
        i0 = int(np.searchsorted(ids, first))
        # ids are strictly increasing: matching ends of a window of k ids mean every id is there
        if k and i0 + k <= ids.size and ids[i0] == first and ids[i0 + k - 1] == first + k - 1:
            return self.counts[i0:i0 + k]
        wanted = first + np.arange(k, dtype=np.int64)
        found = np.isin(wanted, ids)
        if not np.all(found):
            miss = wanted[~found]
            raise DataError(f"counts ({self.source}) have no data for {miss.size} sequence(s) of this block, "
                            f"e.g. ids {miss[:5].tolist()}; re-run or ingest them")
        return self.counts[np.searchsorted(self.sequence_ids, wanted)]


def _id_array(name: str, ids: object) -> np.ndarray:
    a = np.asarray(ids)
    if a.dtype == bool or not (np.issubdtype(a.dtype, np.integer) or (a.size == 0 and a.ndim == 1)):
        raise TypeError(f"'{name}' must be an integer array; got dtype {a.dtype}")
    if a.ndim != 1:
        raise ValueError(f"'{name}' must be one-dimensional; got shape {a.shape}")
    a = np.array(a, dtype=np.int64)
    if a.size and (np.any(a < 0) or np.any(np.diff(a) <= 0)):
        raise ValueError(f"'{name}' must be non-negative and strictly increasing (sorted, no duplicates)")
    return a


def _check_plan_like(plan: Any) -> None:
    for attr in ("fingerprint", "sequence_ids", "n_qubits", "blocks"):
        if not hasattr(plan, attr):
            raise TypeError(f"'plan' must be a robusttomo Plan; got {type(plan).__name__} without '{attr}'")


# ---- HDF5 ----------------------------------------------------------------------------------
def save_counts(counts: Counts, path: str | os.PathLike[str], *, force: bool = False) -> Path:
    """Write counts to an HDF5 file (schema in ``docs/file-formats.md``, "Counts files").

    The write is atomic (temporary file, then rename).

    Parameters
    ----------
    counts : Counts
        The data to write.
    path : str or path-like
        Output file; its directory must exist.
    force : bool, default False
        Overwrite an existing file.  Without it an existing file raises ``FileExistsError``.

    Returns
    -------
    Path
        The written path.
    """
    import h5py

    if not isinstance(counts, Counts):
        raise TypeError(f"'counts' must be a Counts; got {type(counts).__name__}")
    with _io.atomic_path(path, force=force) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["schema_version"] = 1
            f.attrs["n_qubits"] = counts.n_qubits
            f.attrs["exact"] = counts.exact
            for key, text in (("kind", _KIND), ("package_version", __version__),
                              ("plan_fingerprint", counts.plan_fingerprint), ("fingerprint", counts.fingerprint),
                              ("bit_order", _BIT_ORDER_NOTE), ("source", counts.source)):
                _write_fixed_string(f, key, text)
            f.create_dataset("sequence_ids", data=counts.sequence_ids)
            f.create_dataset("counts", data=counts.counts)
            f.create_dataset("missing_ids", data=counts.missing_ids)
    return Path(path)


def _write_fixed_string(f: Any, key: str, text: str) -> None:
    import h5py

    raw = text.encode("utf-8")
    f.attrs.create(key, np.array(raw, dtype=h5py.string_dtype("utf-8", max(len(raw), 1))))


def _read_counts_h5(path: Path) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Read the raw attributes and datasets; any library failure becomes a DataError."""
    import h5py

    if not path.is_file():
        raise DataError(f"{path}: no such counts file")
    attrs: dict[str, Any] = {}
    data: dict[str, np.ndarray] = {}
    try:
        with h5py.File(path, "r") as f:
            for key in f.attrs:
                aid = f.attrs.get_id(key)
                # Variable-length strings live in the file's global heap, and a corrupt heap can
                # make the HDF5 library loop forever; the schema therefore stores fixed-length
                # strings only, and anything else is refused before it is read.
                if aid.dtype.kind not in "iufbS" or aid.get_storage_size() > _MAX_ATTR_BYTES:
                    raise DataError(f"{path}: attribute '{key}' has an unsupported type {aid.dtype} or size; "
                                    "is this a robusttomo counts file?")
                attrs[str(key)] = f.attrs[key]
            for name in ("sequence_ids", "counts", "missing_ids"):
                obj = f.get(name)
                if obj is None:
                    raise DataError(f"{path}: dataset '{name}' is missing; is this a robusttomo counts file?")
                if not isinstance(obj, h5py.Dataset):
                    raise DataError(f"{path}: '{name}' is not a dataset")
                if obj.size is None or obj.size > _MAX_ENTRIES:
                    raise DataError(f"{path}: dataset '{name}' has an implausible size {obj.shape}")
                if obj.dtype.kind not in "iuf":
                    raise DataError(f"{path}: dataset '{name}' must be numeric; got dtype {obj.dtype}")
                data[name] = np.array(obj[()])
    except DataError:
        raise
    except Exception as err:  # h5py surfaces corrupt files as many exception types
        raise DataError(f"{path}: not a readable HDF5 counts file ({type(err).__name__}: {err})") from None
    return attrs, data


def _attr_str(path: Path, attrs: Mapping[str, Any], key: str) -> str:
    val = attrs.get(key)
    if isinstance(val, np.ndarray) and val.shape == ():
        val = val.item()
    if isinstance(val, bytes):
        try:
            val = val.decode("utf-8")
        except UnicodeDecodeError:
            raise DataError(f"{path}: attribute '{key}' is not UTF-8 text") from None
    if not isinstance(val, str):
        raise DataError(f"{path}: attribute '{key}' is missing or not a string")
    return val


def _attr_int(path: Path, attrs: Mapping[str, Any], key: str) -> int:
    val = attrs.get(key)
    if isinstance(val, np.ndarray) and val.shape == ():
        val = val.item()
    if isinstance(val, (bool, np.bool_)) or not isinstance(val, (int, np.integer)):
        raise DataError(f"{path}: attribute '{key}' is missing or not an integer; got {val!r}")
    return int(val)


def _attr_bool(path: Path, attrs: Mapping[str, Any], key: str) -> bool:
    val = attrs.get(key)
    if isinstance(val, np.ndarray) and val.shape == ():
        val = val.item()
    if not isinstance(val, (bool, np.bool_)):
        raise DataError(f"{path}: attribute '{key}' is missing or not a boolean; got {val!r}")
    return bool(val)


def load_counts(path: str | os.PathLike[str]) -> Counts:
    """Read a counts file written by :func:`save_counts`, validating everything.

    Parameters
    ----------
    path : str or path-like
        HDF5 counts file.

    Returns
    -------
    Counts

    Raises
    ------
    DataError
        For a missing, unreadable, altered or malformed file (unsupported ``schema_version``,
        wrong ``kind``, bad shapes or values, or content that does not match the stored
        fingerprint); the message names the file and the field.
    """
    p = Path(path)
    attrs, data = _read_counts_h5(p)
    if "schema_version" not in attrs:
        raise DataError(f"{p}: attribute 'schema_version' is missing; is this a robusttomo counts file?")
    sv = attrs["schema_version"]
    if isinstance(sv, np.ndarray) and sv.shape == ():
        sv = sv.item()
    if isinstance(sv, (bool, np.bool_)) or not isinstance(sv, (int, np.integer)):
        raise DataError(f"{p}: attribute 'schema_version' must be an integer; got {sv!r}")
    _io.check_schema(p, sv, kind="counts", supported=_SCHEMAS)
    kind = _attr_str(p, attrs, "kind")
    if kind != _KIND:
        raise DataError(f"{p}: attribute 'kind' is {kind!r}, expected {_KIND!r}; this is not a counts file")
    n = _attr_int(p, attrs, "n_qubits")
    if not 1 <= n <= 3:
        raise DataError(f"{p}: attribute 'n_qubits' must be 1, 2 or 3; got {n}")
    plan_fp = _attr_str(p, attrs, "plan_fingerprint")
    stored_fp = _attr_str(p, attrs, "fingerprint")
    exact = _attr_bool(p, attrs, "exact")
    source = _attr_str(p, attrs, "source")
    ids, missing, c = data["sequence_ids"], data["missing_ids"], data["counts"]
    for name, arr in (("sequence_ids", ids), ("missing_ids", missing)):
        if arr.ndim != 1 or (arr.size and arr.dtype.kind not in "iu"):
            raise DataError(f"{p}: dataset '{name}' must be a 1-D integer array; got shape {arr.shape}, dtype {arr.dtype}")
    _check_count_values(p, c, exact=exact, n=n, n_rows=ids.size)
    try:
        out = Counts(n_qubits=n, plan_fingerprint=plan_fp, sequence_ids=ids.astype(np.int64),
                     counts=c, exact=exact, source=source, missing_ids=missing.astype(np.int64))
    except (TypeError, ValueError) as err:
        raise DataError(f"{p}: {err}") from None
    if out.fingerprint != stored_fp:
        raise DataError(f"{p}: content does not match attribute 'fingerprint' (the file was altered or is "
                        "corrupt); re-create it from the original data")
    return out


def _check_count_values(p: Path, c: np.ndarray, *, exact: bool, n: int, n_rows: int) -> None:
    d = 2**n
    if c.shape != (n_rows, d):
        raise DataError(f"{p}: dataset 'counts' must have shape (len(sequence_ids), {d}) = {(n_rows, d)}; got {c.shape}")
    c = c.astype(np.float64)
    if not np.all(np.isfinite(c)):
        raise DataError(f"{p}: dataset 'counts' holds NaN or infinite values")
    if np.any(c < 0):
        raise DataError(f"{p}: dataset 'counts' holds negative values")
    if np.any(c > MAX_COUNT):
        raise DataError(f"{p}: dataset 'counts' holds values above {MAX_COUNT:.0e}")
    if not exact and np.any(c != np.round(c)):
        raise DataError(f"{p}: dataset 'counts' holds fractional values but attribute 'exact' is false")
    if c.size and np.any(c.sum(axis=1) <= 0):
        raise DataError(f"{p}: dataset 'counts' has a sequence (row {int(np.argmax(c.sum(axis=1) <= 0))}) with zero shots")


# ---- ingest --------------------------------------------------------------------------------
def ingest(plan: Any, path: str | os.PathLike[str], *, bit_order: str = "q0-left",
           allow_missing: bool = False) -> Counts:
    """Read hardware (or any external) results for ``plan`` and validate them.

    The format follows the file suffix: ``.csv`` (long form with a header row
    ``sequence_id,bitstring,count`` in any column order), ``.json`` (the robusttomo counts
    JSON schema) or ``.h5`` / ``.hdf5`` (a file from :func:`save_counts`).  Both text formats
    are documented in ``docs/file-formats.md`` ("Counts files").  Outcomes that do not appear
    count zero.

    Parameters
    ----------
    plan : Plan
        The plan the sequences were drawn from.  Its fingerprint must match the file's
        (JSON and HDF5 carry one; CSV does not).
    path : str or path-like
        The results file.
    bit_order : {"q0-left", "q0-right"}, default "q0-left"
        How bitstrings order the qubits: "q0-left" means the first character is qubit 0;
        "q0-right" means the last character is qubit 0.  A JSON file may state its own
        ``bit_order``, which must then agree with this option.
    allow_missing : bool, default False
        Accept plan sequences with no data and list them in ``Counts.missing_ids``.

    Returns
    -------
    Counts
        ``exact=False``; rows for the sequences with data, in increasing id order.

    Raises
    ------
    DataError
        With a one-line message naming the file, the row (CSV line number, header = 1) or JSON
        key, and the field, for: unknown or duplicated (sequence id, bitstring) entries, missing
        sequences (unless ``allow_missing``), bitstrings of the wrong width or with characters
        other than 0/1, negative, fractional, NaN, non-numeric or too large (> 1e12) counts,
        sequences with zero shots, a plan-fingerprint mismatch, an unsupported
        ``schema_version``, or a file that cannot be parsed at all.
    """
    _check_plan_like(plan)
    if bit_order not in BIT_ORDERS:
        raise ValueError(f"'bit_order' must be one of {list(BIT_ORDERS)}; got {bit_order!r}")
    if not isinstance(allow_missing, bool):
        raise TypeError(f"'allow_missing' must be a bool; got {allow_missing!r}")
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix in (".h5", ".hdf5"):
        return _ingest_h5(plan, p, allow_missing=allow_missing)
    if suffix not in (".csv", ".json"):
        raise DataError(f"{p}: unknown results format {p.suffix!r}; use a .csv, .json or .h5 file")
    if not p.is_file():
        raise DataError(f"{p}: no such results file")
    try:
        text = p.read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise DataError(f"{p}: not UTF-8 text (byte {err.start}); save the results as UTF-8") from None
    except OSError as err:
        raise DataError(f"{p}: cannot read the file ({err.strerror})") from None
    ctx = _Ingest(plan, p, bit_order)
    if suffix == ".csv":
        ctx.read_csv(text)
        fmt = "CSV"
    else:
        ctx.read_json(text)
        fmt = "JSON"
    return ctx.finish(allow_missing=allow_missing, source=f"ingested {fmt} {p.name} (bit_order={bit_order})")


def _ingest_h5(plan: Any, p: Path, *, allow_missing: bool) -> Counts:
    c = load_counts(p)
    if c.plan_fingerprint != plan.fingerprint:
        raise DataError(f"{p}: attribute 'plan_fingerprint' is {c.plan_fingerprint[:12]}..., but the plan's "
                        f"fingerprint is {plan.fingerprint[:12]}...; these counts belong to another plan")
    if c.n_qubits != int(plan.n_qubits):
        raise DataError(f"{p}: attribute 'n_qubits' is {c.n_qubits}, but the plan has {plan.n_qubits} qubits")
    plan_ids = np.sort(np.asarray(plan.sequence_ids, dtype=np.int64))
    unknown = np.setdiff1d(c.sequence_ids, plan_ids)
    if unknown.size:
        raise DataError(f"{p}: dataset 'sequence_ids' holds ids not in the plan, e.g. {unknown[:5].tolist()}")
    missing = np.setdiff1d(plan_ids, c.sequence_ids)
    if missing.size and not allow_missing:
        raise DataError(f"{p}: {missing.size} plan sequence(s) have no data, e.g. ids {missing[:5].tolist()}; "
                        "pass --allow-missing (in Python allow_missing=True) to accept partial data")
    if missing.size == c.missing_ids.size and np.array_equal(missing, c.missing_ids):
        return c
    return Counts(n_qubits=c.n_qubits, plan_fingerprint=c.plan_fingerprint, sequence_ids=c.sequence_ids,
                  counts=c.counts, exact=c.exact, source=c.source, missing_ids=missing)


class _DuplicateKey(Exception):
    pass


def _pairs_no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in pairs:
        if k in out:
            raise _DuplicateKey(k)
        out[k] = v
    return out


class _Ingest:
    """Accumulates validated (sequence id, outcome, count) entries from one file."""

    def __init__(self, plan: Any, path: Path, bit_order: str) -> None:
        self.path = path
        self.n = int(plan.n_qubits)
        self.plan_fp = str(plan.fingerprint)
        self.plan_ids = np.sort(np.asarray(plan.sequence_ids, dtype=np.int64))
        self.id_set = set(self.plan_ids.tolist())
        self.bit_order = bit_order
        self.entries: dict[tuple[int, int], tuple[float, str]] = {}  # -> (count, where)
        self.seen_ids: dict[int, str] = {}

    def fail(self, where: str, msg: str) -> DataError:
        return DataError(f"{self.path}: {where}: {msg}")

    # -- field parsers, shared by both formats
    def seq_id(self, raw: str, where: str) -> int:
        if not _DIGITS.fullmatch(raw):
            raise self.fail(where, f"field 'sequence_id' must be a non-negative integer; got {raw[:40]!r}")
        if len(raw) > 18 or int(raw) not in self.id_set:
            lo, hi = (int(self.plan_ids[0]), int(self.plan_ids[-1])) if self.plan_ids.size else (0, -1)
            raise self.fail(where, f"field 'sequence_id': unknown sequence id {raw[:40]} (the plan has ids {lo}..{hi}); "
                                   "is this the right plan?")
        return int(raw)

    def outcome(self, raw: str, where: str) -> int:
        if len(raw) != self.n or any(ch not in "01" for ch in raw):
            raise self.fail(where, f"field 'bitstring' must be {self.n} characters 0/1 (one per qubit); got {raw[:40]!r}")
        bits = raw if self.bit_order == "q0-left" else raw[::-1]
        return int(bits, 2)

    def count(self, value: object, where: str, *, text: bool) -> float:
        if isinstance(value, str) and not text:
            raise self.fail(where, f"field 'count' must be a JSON number, not a string; got {value[:40]!r}")
        if isinstance(value, str):
            try:
                v = float(value.strip())
            except ValueError:
                raise self.fail(where, f"field 'count' must be a number; got {value[:40]!r}") from None
        elif isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.fail(where, f"field 'count' must be a number; got {type(value).__name__} {str(value)[:40]}")
        elif isinstance(value, int):
            if value < 0:
                raise self.fail(where, f"field 'count' must be a non-negative integer; got {str(value)[:40]}")
            if value > MAX_COUNT:  # before float(): a huge JSON integer would overflow it
                raise self.fail(where, f"field 'count' is absurdly large (above {MAX_COUNT:.0e}); got {str(value)[:40]}")
            v = float(value)
        else:
            v = value
        if math.isnan(v):
            raise self.fail(where, "field 'count' is NaN; give a non-negative integer")
        if v < 0:
            raise self.fail(where, f"field 'count' must be a non-negative integer; got {v:g}")
        if v > MAX_COUNT:
            raise self.fail(where, f"field 'count' is absurdly large (above {MAX_COUNT:.0e}); got {v:g}")
        if v != math.floor(v):
            raise self.fail(where, f"field 'count' must be an integer number of shots; got {v:g}")
        return v

    def add(self, sid: int, x: int, v: float, where: str, raw_bits: str) -> None:
        key = (sid, x)
        if key in self.entries:
            raise self.fail(where, f"duplicated entry for sequence {sid}, bitstring {raw_bits!r} "
                                   f"(first given at {self.entries[key][1]}); merge the two counts")
        self.entries[key] = (v, where)
        self.seen_ids.setdefault(sid, where)

    # -- formats
    def read_csv(self, text: str) -> None:
        if "\x00" in text:
            raise DataError(f"{self.path}: contains NUL bytes; not a CSV text file")
        reader = csv.reader(io.StringIO(text, newline=""), strict=True)
        header: list[str] | None = None
        cols: dict[str, int] = {}
        try:
            for row in reader:
                line = reader.line_num
                if not row or all(not cell.strip() for cell in row):
                    continue
                if header is None:
                    header = [cell.strip().lower() for cell in row]
                    want = ("sequence_id", "bitstring", "count")
                    if sorted(header) != sorted(want):
                        raise self.fail(f"row {line} (header)",
                                        f"columns must be exactly sequence_id, bitstring, count; got {','.join(row)[:80]!r}")
                    cols = {name: header.index(name) for name in want}
                    continue
                where = f"row {line}"
                if len(row) != len(header):
                    raise self.fail(where, f"expected {len(header)} fields (sequence_id, bitstring, count); got {len(row)}")
                sid = self.seq_id(row[cols["sequence_id"]].strip(), where)
                raw_bits = row[cols["bitstring"]].strip()
                x = self.outcome(raw_bits, where)
                v = self.count(row[cols["count"]], where, text=True)
                self.add(sid, x, v, where, raw_bits)
        except csv.Error as err:
            raise DataError(f"{self.path}: row {reader.line_num}: malformed CSV ({err})") from None
        if header is None:
            raise DataError(f"{self.path}: empty file; expected a header row sequence_id,bitstring,count")

    def read_json(self, text: str) -> None:
        try:
            doc = json.loads(text, object_pairs_hook=_pairs_no_duplicates)
        except _DuplicateKey as err:
            raise DataError(f"{self.path}: duplicated JSON key {str(err)[:40]!r}; every sequence id and "
                            "bitstring may appear once") from None
        except (ValueError, RecursionError) as err:
            raise DataError(f"{self.path}: not valid JSON ({str(err)[:80]})") from None
        if not isinstance(doc, dict):
            raise DataError(f"{self.path}: top level must be a JSON object; got {type(doc).__name__}")
        allowed = {"schema_version", "kind", "plan_fingerprint", "bit_order", "counts", "metadata"}
        extra = sorted(set(doc) - allowed)
        if extra:
            raise DataError(f"{self.path}: unknown field {extra[0][:40]!r}; allowed fields are {sorted(allowed)}")
        sv = doc.get("schema_version")
        if isinstance(sv, bool) or not isinstance(sv, int):
            raise DataError(f"{self.path}: field 'schema_version' is missing or not an integer; got {sv!r:.40}")
        _io.check_schema(self.path, sv, kind="counts", supported=_SCHEMAS)
        if "kind" in doc and doc["kind"] != _KIND:
            raise DataError(f"{self.path}: field 'kind' must be {_KIND!r}; got {doc['kind']!r:.40}")
        fp = doc.get("plan_fingerprint")
        if not isinstance(fp, str):
            raise DataError(f"{self.path}: field 'plan_fingerprint' is missing or not a string; copy it from the plan")
        if fp != self.plan_fp:
            raise DataError(f"{self.path}: field 'plan_fingerprint' is {fp[:12]!r}..., but the plan's fingerprint is "
                            f"{self.plan_fp[:12]}...; these counts belong to another plan")
        if "bit_order" in doc:
            order = doc["bit_order"]
            if order not in BIT_ORDERS:
                raise DataError(f"{self.path}: field 'bit_order' must be one of {list(BIT_ORDERS)}; got {order!r:.40}")
            if order != self.bit_order:
                raise DataError(f"{self.path}: field 'bit_order' is {order!r} but bit_order={self.bit_order!r} was "
                                f"requested; pass bit_order={order!r} or fix the file")
        data = doc.get("counts")
        if not isinstance(data, dict):
            raise DataError(f"{self.path}: field 'counts' is missing or not an object "
                            "{\"<sequence id>\": {\"<bitstring>\": count}}")
        seen: dict[int, str] = {}
        for sid_raw, outcomes in data.items():
            where = f"counts[{sid_raw[:40]!r}]"
            sid = self.seq_id(sid_raw, where)
            if sid in seen:
                raise self.fail(where, f"duplicated sequence id {sid} (also given as {seen[sid]!r})")
            seen[sid] = sid_raw
            if not isinstance(outcomes, dict):
                raise self.fail(where, f"must be an object {{\"<bitstring>\": count}}; got {type(outcomes).__name__}")
            if not outcomes:
                self.seen_ids.setdefault(sid, where)
            for bits, value in outcomes.items():
                w = f"counts[{sid_raw[:40]!r}][{bits[:40]!r}]"
                x = self.outcome(bits, w)
                self.add(sid, x, self.count(value, w, text=False), w, bits)

    def finish(self, *, allow_missing: bool, source: str) -> Counts:
        d = 2**self.n
        ids = np.array(sorted(self.seen_ids), dtype=np.int64)
        row = {sid: k for k, sid in enumerate(ids.tolist())}
        c = np.zeros((ids.size, d))
        for (sid, x), (v, _) in self.entries.items():
            c[row[sid], x] = v
        if ids.size:
            totals = c.sum(axis=1)
            if np.any(totals <= 0):
                sid = int(ids[np.argmax(totals <= 0)])
                raise DataError(f"{self.path}: {self.seen_ids[sid]}: sequence {sid} has zero shots in total; "
                                "drop it or give its counts")
        missing = np.setdiff1d(self.plan_ids, ids)
        if missing.size and not allow_missing:
            raise DataError(f"{self.path}: {missing.size} plan sequence(s) have no data, e.g. ids "
                            f"{missing[:5].tolist()}; pass --allow-missing (in Python allow_missing=True) to accept partial data")
        if ids.size == 0:
            raise DataError(f"{self.path}: the file holds no counts at all")
        if missing.size:
            source += f"; {missing.size} sequence(s) missing"
        return Counts(n_qubits=self.n, plan_fingerprint=self.plan_fp, sequence_ids=ids, counts=c,
                      exact=False, source=source, missing_ids=missing)
