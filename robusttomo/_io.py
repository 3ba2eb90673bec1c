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
        raise FileExistsError(f"{p}: output exists; choose another name or pass --force (force=True) to overwrite")
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
