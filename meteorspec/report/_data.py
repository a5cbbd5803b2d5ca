"""Read a whole event file back into plain Python values.

TO BE MOVED to :mod:`meteorspec.store` (the project keeps h5py in the store
only); kept here, private, until the store offers a full reader. Nothing else
in the package imports h5py.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import h5py
import numpy as np

from ..errors import InputError


def _value(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.dtype.kind in "OS":
        return [v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v) for v in value.ravel()]
    if isinstance(value, np.generic):
        return value.item()
    return value


def _dataset(ds: h5py.Dataset) -> Any:
    data = ds[()]
    if ds.dtype.names:  # compound table -> dict of columns
        return {name: np.array([_value(v) for v in data[name]]) if data.dtype[name].kind in "OS"
                else np.asarray(data[name]) for name in ds.dtype.names}
    if ds.dtype.kind in "OS":
        return _value(data if isinstance(data, np.ndarray) else np.array([data]))
    return np.asarray(data)


def _group(g: h5py.Group) -> dict[str, Any]:
    out: dict[str, Any] = {"attrs": {k: _value(v) for k, v in g.attrs.items()}, "datasets": {}, "groups": {},
                           "units": {}}
    for name, obj in g.items():
        if isinstance(obj, h5py.Group):
            out["groups"][name] = _group(obj)
        else:
            out["datasets"][name] = _dataset(obj)
            if "unit" in obj.attrs:
                out["units"][name] = _value(obj.attrs["unit"])
    return out


def read_event(path: str | Path) -> dict[str, Any]:
    """Everything in an event file as nested dicts.

    Returns
    -------
    dict
        ``{"attrs": {...}, "datasets": {name: ndarray or dict of columns}, "units": {name: str},
        "groups": {name: <same shape>}}`` for the root and every group.

    Raises
    ------
    InputError
        If the file cannot be read as HDF5.
    """
    try:
        with h5py.File(path, "r") as f:
            return _group(f)
    except OSError as exc:
        raise InputError(path, f"not a readable HDF5 file ({exc})") from None


def read_inputs(path: str | Path) -> tuple[str, dict[str, str]]:
    """``(software_version, {role: sha256})`` of an event file, reading nothing else."""
    with h5py.File(path, "r") as f:
        version = _value(f.attrs.get("software_version", ""))
        inputs = {role: _value(g.attrs["sha256"]) for role, g in f["inputs"].items()
                  if "sha256" in g.attrs} if "inputs" in f else {}
    return str(version), inputs


def read_summary(path: str | Path) -> dict[str, Any]:
    """Root attributes plus ``composition`` (the ``/composition`` attributes, empty if absent)."""
    with h5py.File(path, "r") as f:
        out = {k: _value(v) for k, v in f.attrs.items()}
        out["composition"] = ({k: _value(v) for k, v in f["composition"].attrs.items()}
                              if "composition" in f else {})
    return out
