"""File helpers shared by every reader and writer: atomic writes, schema checks, fingerprints."""

from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from robusttomo.errors import DataError


def check_output_path(path: str | os.PathLike[str], *, force: bool) -> Path:
    """Refuse to overwrite an existing file unless ``force``; return the path."""
    p = Path(path)
    if p.exists() and not force:
        raise FileExistsError(f"{p}: output exists; choose another name or pass --force (in Python force=True) to overwrite")
    if not p.parent.exists():
        raise DataError(f"{p}: directory {p.parent} does not exist; create it first")
    return p


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike[str], *, force: bool = False) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it onto ``path``.

    Nothing is written at ``path`` if the body raises, and an existing file is kept unless
    ``force`` (checked before any work is done).
    """
    target = check_output_path(path, force=force)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        if target.exists() and not force:  # appeared meanwhile: keep it
            raise FileExistsError(f"{target}: output appeared while writing; pass --force to overwrite")
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp_path, 0o666 & ~umask)  # mkstemp's 0600 would survive the rename
        os.replace(tmp_path, target)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def fingerprint(*parts: object) -> str:
    """SHA-256 hex digest of a canonical byte encoding of numbers, strings and arrays."""
    h = hashlib.sha256()
    for part in parts:
        if isinstance(part, np.ndarray):
            a = np.ascontiguousarray(part)
            h.update(f"<array {a.dtype.str} {a.shape}>".encode())
            h.update(a.tobytes())
        elif isinstance(part, (bytes, bytearray)):
            h.update(b"<bytes>" + bytes(part))
        else:
            h.update(f"<{type(part).__name__} {part!r}>".encode())
    return h.hexdigest()


def check_schema(path: object, found: object, *, kind: str, supported: tuple[int, ...]) -> int:
    """Validate a ``schema_version`` attribute read from a file; return it as ``int``."""
    try:
        version = int(found)  # type: ignore[call-overload]
    except (TypeError, ValueError):
        raise DataError(f"{path}: field 'schema_version' of the {kind} file is missing or not an integer; "
                        f"is this a robusttomo {kind} file?") from None
    if version not in supported:
        raise DataError(f"{path}: {kind} file has schema_version {version}; this robusttomo reads "
                        f"{', '.join(map(str, supported))}; upgrade robusttomo or rewrite the file")
    return version


# ---- HDF5 text and attribute safety ---------------------------------------------------------
# Variable-length strings live in the file's global heap, and a corrupt heap can make the HDF5
# library loop forever while reading them.  Our files therefore store fixed-length UTF-8 text
# only, and readers refuse any other attribute or string type before touching its data.
MAX_ATTR_BYTES = 1 << 20


def fixed_text(text: str) -> np.ndarray:
    """A scalar fixed-length UTF-8 value for an HDF5 attribute or dataset."""
    import h5py

    raw = str(text).encode("utf-8")
    return np.array(raw, dtype=h5py.string_dtype("utf-8", max(len(raw), 1)))


def fixed_text_array(texts: object) -> np.ndarray:
    """An array of fixed-length UTF-8 strings (same shape as ``texts``)."""
    import h5py

    arr = np.asarray(texts, dtype=object)
    raw = [str(t).encode("utf-8") for t in arr.reshape(-1)]
    width = max([len(r) for r in raw] + [1])
    return np.array(raw, dtype=h5py.string_dtype("utf-8", width)).reshape(arr.shape)


def safe_attr(obj: object, name: str, path: object) -> object:
    """Read attribute ``name`` of an h5py object after checking its type and size.

    Raises DataError for variable-length or other unsupported types (see the note above).
    """
    aid = obj.attrs.get_id(name)  # type: ignore[attr-defined]
    if aid.dtype.kind not in "iufbcS" or (aid.shape != (0,) and aid.get_storage_size() > MAX_ATTR_BYTES):
        raise DataError(f"{path}: attribute '{name}' has an unsupported type {aid.dtype} or size; "
                        "is this a robusttomo file?")
    return obj.attrs[name]  # type: ignore[attr-defined]


def check_fixed_strings(dataset: object, name: str, path: object) -> None:
    """Refuse a string dataset that is not fixed-length UTF-8/ASCII (before reading it)."""
    import h5py

    info = h5py.check_string_dtype(dataset.dtype)  # type: ignore[attr-defined]
    if info is None or info.length is None:
        raise DataError(f"{path}: dataset '{name}' must hold fixed-length strings; got dtype "
                        f"{dataset.dtype}")  # type: ignore[attr-defined]
