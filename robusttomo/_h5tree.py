"""Type-driven HDF5 storage of the package's frozen result dataclasses.

A dataclass becomes an HDF5 group: arrays are datasets, numbers/strings/booleans/enums are
attributes, nested dataclasses and mappings are subgroups, ``None`` is recorded by an
attribute ``<field>.__none__``.  Reading is driven by the dataclass's own type hints, so every
value read back is checked against the type the code expects; anything else raises
:class:`robusttomo.errors.DataError` naming the file and the field.  Nothing is ever
evaluated or unpickled.
"""

from __future__ import annotations

import dataclasses
import enum
import types
import typing
from collections.abc import Mapping

import h5py
import numpy as np

from robusttomo import _io
from robusttomo.channels import Channel
from robusttomo.errors import DataError

_NONE = ".__none__"


def _origin(tp: object) -> object:
    return typing.get_origin(tp)


def _strip_optional(tp: object) -> tuple[object, bool]:
    if _origin(tp) in (typing.Union, types.UnionType):
        args = [a for a in typing.get_args(tp) if a is not type(None)]
        if len(args) == 1 and len(typing.get_args(tp)) == 2:
            return args[0], True
    return tp, False


def write(group: h5py.Group, obj: object) -> None:
    """Store a dataclass instance into ``group``."""
    hints = typing.get_type_hints(type(obj))
    for f in dataclasses.fields(obj):  # type: ignore[arg-type]
        _write_value(group, f.name, getattr(obj, f.name), hints[f.name])


def _write_value(group: h5py.Group, name: str, value: object, tp: object) -> None:
    tp, _ = _strip_optional(tp)
    if value is None:
        group.attrs[name + _NONE] = True
        return
    if isinstance(value, Channel):
        group.create_dataset(name, data=value.ptm)
    elif isinstance(value, np.ndarray):
        group.create_dataset(name, data=value)
    elif isinstance(value, enum.Enum):
        group.attrs[name] = _io.fixed_text(str(value.value))
    elif isinstance(value, str):
        group.attrs[name] = _io.fixed_text(value)
    elif isinstance(value, (bool, np.bool_)):
        group.attrs[name] = bool(value)
    elif isinstance(value, (int, np.integer, float, np.floating)):
        group.attrs[name] = value
    elif dataclasses.is_dataclass(value):
        write(group.create_group(name), value)
    elif isinstance(value, Mapping):
        sub = group.create_group(name)
        args = typing.get_args(tp)
        vtp = args[1] if len(args) == 2 else object
        sub.attrs["__keys__"] = _io.fixed_text_array([str(k) for k in value])
        sub.attrs["__len__"] = len(value)
        for i, (k, v) in enumerate(value.items()):
            _write_value(sub, f"v{i}", v, vtp)
    elif isinstance(value, tuple):
        args = typing.get_args(tp)
        etp = args[0] if args else object
        if etp is str:  # by the declared element type: an empty tuple must round-trip too
            group.create_dataset(name, data=_io.fixed_text_array(list(value)), shape=(len(value),))
        else:
            sub = group.create_group(name)
            sub.attrs["__len__"] = len(value)
            for i, v in enumerate(value):
                _write_value(sub, f"v{i}", v, etp)
    else:
        raise TypeError(f"cannot store field {name!r} of type {type(value).__name__}")


def read(group: h5py.Group, cls: type, *, path: object) -> object:
    """Rebuild a dataclass of type ``cls`` from ``group``; DataError on anything unexpected."""
    hints = typing.get_type_hints(cls)
    kwargs = {}
    for f in dataclasses.fields(cls):
        if f.default is not dataclasses.MISSING and not _present(group, f.name):
            continue  # a field added later, with a default: files written before it still load
        kwargs[f.name] = _read_value(group, f.name, hints[f.name], path=path)
    try:
        return cls(**kwargs)
    except (TypeError, ValueError) as exc:
        raise DataError(f"{path}: group '{group.name}' does not hold a valid {cls.__name__}: {exc}") from None


def _present(group: h5py.Group, name: str) -> bool:
    """Whether ``group`` stores field ``name`` in any form (dataset, group, attribute, empty mark)."""
    return name in group or name in group.attrs or (name + _NONE) in group.attrs


def _where(group: h5py.Group, name: str) -> str:
    return f"{group.name.rstrip('/')}/{name}"


def _read_value(group: h5py.Group, name: str, tp: object, *, path: object) -> object:
    tp, optional = _strip_optional(tp)
    where = _where(group, name)
    if name + _NONE in group.attrs and bool(_io.safe_attr(group, name + _NONE, path)):
        if not optional:
            raise DataError(f"{path}: field '{where}' is empty but required")
        return None
    try:
        if tp is Channel:
            return Channel.from_ptm(_dataset(group, name, path))
        if tp is np.ndarray:
            return _dataset(group, name, path)
        if isinstance(tp, type) and issubclass(tp, enum.Enum):
            v = _attr(group, name, path)
            return tp(v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v))
        if tp is bool:
            v = _attr(group, name, path)
            if not isinstance(v, (bool, np.bool_)):
                raise DataError(f"{path}: field '{where}' must be a boolean; got {v!r}")
            return bool(v)
        if tp is int:
            v = _attr(group, name, path)
            if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer)):
                raise DataError(f"{path}: field '{where}' must be an integer; got {v!r}")
            return int(v)
        if tp is float:
            v = _attr(group, name, path)
            if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, float, np.integer, np.floating)):
                raise DataError(f"{path}: field '{where}' must be a number; got {v!r}")
            return float(v)
        if tp is str:
            v = _attr(group, name, path)
            if isinstance(v, bytes):
                v = v.decode("utf-8", "replace")
            if not isinstance(v, str):
                raise DataError(f"{path}: field '{where}' must be a string; got {v!r}")
            return v
        if dataclasses.is_dataclass(tp):
            return read(_group(group, name, path), tp, path=path)  # type: ignore[arg-type]
        origin = _origin(tp)
        if origin in (Mapping, dict, typing.Mapping) or (isinstance(origin, type) and issubclass(origin, Mapping)):
            sub = _group(group, name, path)
            n_keys = int(_attr(sub, "__len__", path))
            raw = _attr(sub, "__keys__", path) if n_keys else []
            keys = [k.decode("utf-8", "replace") if isinstance(k, bytes) else str(k) for k in np.ravel(raw)]
            if len(keys) != n_keys:
                raise DataError(f"{path}: field '{where}' has {len(keys)} keys; expected {n_keys}")
            args = typing.get_args(tp)
            vtp = args[1] if len(args) == 2 else object
            return {k: _read_value(sub, f"v{i}", vtp, path=path) for i, k in enumerate(keys)}
        if origin is tuple:
            args = typing.get_args(tp)
            etp = args[0] if args else object
            if etp is str:
                obj = group.get(name)
                if isinstance(obj, h5py.Dataset):
                    _io.check_fixed_strings(obj, where, path)
                data = _dataset(group, name, path)
                return tuple(x.decode() if isinstance(x, bytes) else str(x) for x in data.tolist())
            sub = _group(group, name, path)
            n = int(_attr(sub, "__len__", path))
            return tuple(_read_value(sub, f"v{i}", etp, path=path) for i in range(n))
        if tp is object:
            if name in group.attrs:
                v = _io.safe_attr(group, name, path)
                if isinstance(v, np.generic):
                    v = v.item()
                return v.decode("utf-8", "replace") if isinstance(v, bytes) else v
            return _dataset(group, name, path)
    except DataError:
        raise
    except (KeyError, TypeError, ValueError, OSError) as exc:
        raise DataError(f"{path}: field '{where}' is missing or malformed ({exc})") from None
    raise DataError(f"{path}: field '{where}' has a type this reader does not know")


def _attr(group: h5py.Group, name: str, path: object) -> object:
    if name not in group.attrs:
        raise DataError(f"{path}: field '{_where(group, name)}' is missing")
    v = _io.safe_attr(group, name, path)
    if isinstance(v, np.ndarray) and v.shape == ():
        v = v[()]
    return v


def _dataset(group: h5py.Group, name: str, path: object) -> np.ndarray:
    obj = group.get(name)
    if not isinstance(obj, h5py.Dataset):
        raise DataError(f"{path}: field '{_where(group, name)}' is missing (expected a dataset)")
    data = obj[()]
    arr = np.array(data, copy=True)
    arr.setflags(write=False)
    return arr


def _group(group: h5py.Group, name: str, path: object) -> h5py.Group:
    obj = group.get(name)
    if not isinstance(obj, h5py.Group):
        raise DataError(f"{path}: field '{_where(group, name)}' is missing (expected a group)")
    return obj
