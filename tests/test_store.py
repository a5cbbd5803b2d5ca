"""HDF5 store: schema, atomic writes, and the /review log that survives re-processing."""

import h5py
import numpy as np
import pytest

from meteorspec.errors import InputError
from meteorspec.result import EventResult, FrameTimes, InputRecord
from meteorspec.store import SCHEMA, output_path, read_root, write_event


def _result(**changes):
    base = dict(event_id="20261114T031522Z_TST1", station="TST1", start_utc="2026-11-14T03:15:22.120Z",
                software_version="0.1.0", status="partial", flags=["calibration_from_station"],
                frames=FrameTimes(time_s=np.array([0.02, 0.06]), exposure_s=0.04,
                                  n_saturated_px=np.array([0, 3]), interlaced=False),
                inputs=[InputRecord("event", "/x/event.toml", "ab" * 32, 120)],
                station_values={"lens.focal_px": 700.0, "lens.projection": "equidistant", "grating.orders": [1]})
    base.update(changes)
    return EventResult(**base)


def test_root_attributes_follow_the_contract(tmp_path):
    path = write_event(output_path(tmp_path, "20261114T031522Z_TST1"), _result())
    assert path.name == "20261114T031522Z_TST1.h5"
    root = read_root(path)
    # contract section 5, root attributes
    assert root["schema"] == SCHEMA == "meteorspec-event/1"
    for key in ("event_id", "station", "start_utc", "software_version", "status", "flags", "error"):
        assert key in root
    assert root["flags"] == ["calibration_from_station"]
    with h5py.File(path) as f:
        assert "review" in f
        for name, obj in f.items():
            if isinstance(obj, h5py.Group):
                for ds in obj.values():
                    if isinstance(ds, h5py.Dataset):
                        assert "unit" in ds.attrs, ds.name  # style guide: a unit on every dataset


def test_parts_are_written_with_units(tmp_path):
    part = {"attrs": {"n": 3, "names": ["a", "b"]},
            "datasets": {"time_s": (np.arange(3.0), "s")},
            "groups": {"sub": {"attrs": {"z": 1.5}}}}
    path = write_event(tmp_path / "e.h5", _result(parts={"track": part}))
    with h5py.File(path) as f:
        assert f["track/time_s"].attrs["unit"] == "s"
        assert f["track"].attrs["n"] == 3
        assert f["track/sub"].attrs["z"] == 1.5


def test_review_group_is_carried_over(tmp_path):
    path = write_event(tmp_path / "e.h5", _result())
    with h5py.File(path, "a") as f:
        entry = f["review"].create_group("0001")
        entry.attrs["who"] = "an operator"
        entry.attrs["what"] = "class set to iron"
    write_event(path, _result(status="ok", flags=[]))
    with h5py.File(path) as f:
        assert f["review/0001"].attrs["what"] == "class set to iron"
        assert f.attrs["status"] == "ok"


def test_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path):
    path = write_event(tmp_path / "e.h5", _result())
    before = path.read_bytes()
    bad = _result(parts={"track": {"datasets": {"x": (object(), "px")}}})  # h5py cannot store this
    with pytest.raises(TypeError):
        write_event(path, bad)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["e.h5"]


def test_unreadable_old_file_is_not_overwritten(tmp_path):
    path = tmp_path / "e.h5"
    path.write_bytes(b"not hdf5 at all")
    with pytest.raises(InputError, match="e.h5"):
        write_event(path, _result())
    assert path.read_bytes() == b"not hdf5 at all"
    assert [p.name for p in tmp_path.iterdir()] == ["e.h5"]


def test_read_root_of_a_bad_file_is_one_line(tmp_path):
    path = tmp_path / "x.h5"
    path.write_bytes(b"\x00" * 10)
    with pytest.raises(InputError) as info:
        read_root(path)
    assert "x.h5" in str(info.value) and "\n" not in str(info.value)
