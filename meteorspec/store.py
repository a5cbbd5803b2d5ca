"""HDF5 output, one file per event (contract section 5, schema ``meteorspec-event/1``).

Writes are atomic: the file is built under a temporary name in the same folder
and renamed over the old one only when complete, so a crash never leaves a
half-written file and never destroys the previous result. An existing
``/review`` group (manual decisions) is copied into the new file unchanged.
Reviews are appended to that group by :func:`append_review` with the same
discipline (copy, add, flush, rename), as numbered entries that are never
changed afterwards. h5py is used only in this module.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from .errors import InputError
from .result import EventResult

SCHEMA = "meteorspec-event/1"

def output_path(out_dir: str | Path, event_id: str) -> Path:
    """``<out_dir>/<event id>.h5``."""
    return Path(out_dir) / f"{event_id}.h5"


def _str_array(values: list[str]) -> np.ndarray:
    return np.array([v.encode("utf-8") for v in values], dtype=h5py.string_dtype("utf-8"))


def _set_attr(obj: h5py.HLObject, key: str, value: Any) -> None:
    if value is None:
        value = np.nan
    if isinstance(value, np.ndarray) and value.dtype.kind == "U":
        value = [str(v) for v in value.ravel()]
    if isinstance(value, str):
        obj.attrs[key] = value
    elif isinstance(value, (list, tuple)) and all(isinstance(v, str) for v in value):
        obj.attrs[key] = _str_array(list(value))
    else:
        obj.attrs[key] = value


def _write_dataset(group: h5py.Group, name: str, data: Any, unit: str) -> None:
    ds = group.create_dataset(name, data=data)
    ds.attrs["unit"] = unit


def _write_part(group: h5py.Group, part: dict[str, Any]) -> None:
    """A stage's output: ``{"attrs": {...}, "datasets": {name: (array, unit)}, "groups": {...}}``."""
    for key, value in part.get("attrs", {}).items():
        _set_attr(group, key, value)
    for name, (data, unit) in part.get("datasets", {}).items():
        _write_dataset(group, name, data, unit)
    for name, sub in part.get("groups", {}).items():
        _write_part(group.create_group(name), sub)


def _fill(f: h5py.File, result: EventResult) -> None:
    f.attrs["schema"] = SCHEMA
    f.attrs["event_id"] = result.event_id
    f.attrs["station"] = result.station
    f.attrs["start_utc"] = result.start_utc
    f.attrs["software_version"] = result.software_version
    f.attrs["status"] = result.status
    f.attrs["flags"] = _str_array(list(result.flags))
    f.attrs["error"] = result.error

    if result.frames is not None:
        g = f.create_group("frames")
        g.attrs["interlaced"] = result.frames.interlaced
        g.attrs["exposure_s"] = result.frames.exposure_s
        _write_dataset(g, "time_s", result.frames.time_s, "s")
        _write_dataset(g, "n_saturated_px", result.frames.n_saturated_px, "count")

    if result.inputs:
        g = f.create_group("inputs")
        for rec in result.inputs:
            sub = g.create_group(rec.role)
            sub.attrs["path"] = rec.path
            sub.attrs["sha256"] = rec.sha256
            sub.attrs["size_bytes"] = rec.size_bytes

    if result.station_values:
        g = f.create_group("station")
        for key, value in sorted(result.station_values.items()):
            _set_attr(g, key, value)

    for name, part in result.parts.items():
        if part is None:
            continue
        if "table" in part:  # a compound table at the root, e.g. /lines (contract section 5)
            records, unit = part["table"]
            ds = f.create_dataset(name, data=records)
            ds.attrs["unit"] = unit
            for key, value in part.get("attrs", {}).items():
                _set_attr(ds, key, value)
        else:
            _write_part(f.create_group(name), part)


def write_event(path: str | Path, result: EventResult) -> Path:
    """Write ``result`` to ``path`` atomically, keeping any existing ``/review`` group.

    Parameters
    ----------
    path : str or Path
        Final file name (``<event id>.h5``).
    result : EventResult

    Returns
    -------
    Path
        The written file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        with h5py.File(tmp, "w") as f:
            _fill(f, result)
            if path.exists():
                _carry_review(path, f)
            elif "review" not in f:
                f.create_group("review")
        with open(tmp, "rb+") as fh:  # data on disk before the rename makes it visible
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; outputs are meant to be shared
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _carry_review(old: Path, new: h5py.File) -> None:
    """Copy ``/review`` from the previous file; a previous file we cannot read is an error.

    Refusing to overwrite an unreadable old file keeps manual decisions safe:
    the operator sees the problem instead of losing the review log.
    """
    try:
        with h5py.File(old, "r") as f:
            if "review" in f:
                f.copy(f["review"], new, name="review")
            else:
                new.create_group("review")
    except OSError as exc:
        raise InputError(old, f"existing output cannot be read, not overwriting it ({exc})") from None


# --------------------------------------------------------------------------- review log


def _next_entry_name(review: h5py.Group) -> str:
    numbers = [int(name) for name in review if name.isdigit()]
    return f"{max(numbers, default=0) + 1:04d}"


def append_review(path: str | Path, entry: dict[str, Any]) -> str:
    """Add one manual review to the event's ``/review`` log, atomically; return the entry's name.

    The log is append-only: entries are subgroups ``0001``, ``0002``, ... in the order they
    were made, and nothing already in the file is changed. The new file is the old one
    copied under a temporary name in the same folder, with the entry added, flushed and
    renamed over the old one, so a crash leaves either the old file or the new one, never a
    half-written one (the discipline of :func:`write_event`).

    Parameters
    ----------
    path : str or Path
        An event file (schema ``meteorspec-event/1``).
    entry : dict
        ``{"attrs": {...}, "datasets": {name: (array, unit)}, "groups": {...}}`` as a stage
        part (see ``_write_part``).

    Raises
    ------
    InputError
        If the file is missing, unreadable or not an event file, or cannot be written.
    """
    path = Path(path)
    root = read_root(path)
    if root.get("schema") != SCHEMA:
        raise InputError(path, f"not a meteorspec event file (schema {root.get('schema')!r}, expected {SCHEMA!r})")
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as exc:
        raise InputError(path, f"cannot write beside the file ({exc.strerror or exc})") from None
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        with _exclusive(path):  # two reviewers at once: the second copies the first one's result
            shutil.copyfile(path, tmp)
            with h5py.File(tmp, "a") as f:
                review = f.require_group("review")
                name = _next_entry_name(review)
                _write_part(review.create_group(name), entry)
            with open(tmp, "rb+") as fh:  # data on disk before the rename makes it visible
                os.fsync(fh.fileno())
            os.chmod(tmp, path.stat().st_mode & 0o777)
            os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return name


class _exclusive:
    """Advisory lock on the event's folder while a review is appended (POSIX ``flock``; none elsewhere).

    Only reviews take it: it orders reviewers, each of whom copies the file as the previous
    one left it. The folder, not the file, is locked: HDF5 takes its own ``flock`` on the
    files it opens, and the file is replaced by every append.
    """

    def __init__(self, path: Path):
        self.folder = path.parent
        self.fd: int | None = None

    def __enter__(self) -> _exclusive:
        try:
            import fcntl
        except ImportError:  # not POSIX: no lock
            return self
        self.fd = os.open(self.folder, os.O_RDONLY)
        fcntl.flock(self.fd, fcntl.LOCK_EX)
        return self

    def __exit__(self, *exc: object) -> bool:
        if self.fd is not None:
            os.close(self.fd)  # releases the lock
        return False


def read_reviews(path: str | Path) -> list[dict[str, Any]]:
    """The ``/review`` log of an event file, oldest first: ``[{"name", "attrs", "datasets", "groups"}]``."""
    with _open(path) as f:
        if "review" not in f:
            return []
        return [{"name": name, **_group(f["review"][name])} for name in sorted(f["review"])
                if isinstance(f["review"][name], h5py.Group)]


# --------------------------------------------------------------------------- reading


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
    with _open(path) as f:
        return _group(f)


def read_inputs(path: str | Path) -> tuple[str, dict[str, str]]:
    """``(software_version, {role: sha256})`` of an event file, reading nothing else."""
    with _open(path) as f:
        version = _value(f.attrs.get("software_version", ""))
        inputs = {role: _value(g.attrs["sha256"]) for role, g in f["inputs"].items()
                  if "sha256" in g.attrs} if "inputs" in f else {}
    return str(version), inputs


def read_summary(path: str | Path) -> dict[str, Any]:
    """Root attributes plus ``composition`` (the ``/composition`` attributes, empty if absent)."""
    with _open(path) as f:
        out = {k: _value(v) for k, v in f.attrs.items()}
        out["composition"] = ({k: _value(v) for k, v in f["composition"].attrs.items()}
                              if "composition" in f else {})
    return out


def read_root(path: str | Path) -> dict[str, Any]:
    """Root attributes of an event file as plain Python values."""
    with _open(path) as f:
        return {k: _value(v) for k, v in f.attrs.items()}


def _open(path: str | Path) -> h5py.File:
    if not Path(path).is_file():  # h5py's message for it is a page of its internals
        raise InputError(path, "no such file")
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise InputError(path, f"not a readable HDF5 file ({exc})") from None
