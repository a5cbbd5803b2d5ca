"""Station and event files (contract sections 3 and 4, /work/shared/spec/contract.md).

The reference for every check here is the fixed contract: which keys exist, which
are optional, what the values mean. Outside references: the TOML 1.0 spec (nan/inf
are valid floats, so the loader, not the parser, must reject them), ISO 8601 via
``astropy.time.Time`` for ``start_utc``, and ``scipy.interpolate.interp1d`` for the
linear, NaN-outside interpolation of the response curve. Station "TST1" and its
events are invented test data.
"""

from __future__ import annotations

import dataclasses
import re
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec.config import (
    Camera,
    Event,
    Grating,
    Lens,
    Pointing,
    ResponseCurve,
    Station,
    find_station_file,
    load_event,
    load_response,
    load_station,
)
from meteorspec.errors import InputError

# --------------------------------------------------------------------------- builders

DROP = object()  # marker: remove this key (or, with key None, the whole section)

# The contract's section 3 example, verbatim apart from the invented id "TST1".
# Values are TOML literals so that tests can put in any TOML type (nan, true, "x").
STATION_EXAMPLE: dict[str, dict[str, str]] = {
    "station": {"id": '"TST1"', "latitude_deg": "0.0", "longitude_deg": "0.0", "elevation_m": "0.0"},
    "camera": {
        "width": "1280", "height": "960", "bit_depth": "8", "gamma": "1.0", "black_level_adu": "0",
        "saturation_adu": "255", "interlaced": "false", "field_order": '"top"',
        "read_noise_adu": "2.0", "gain_e_per_adu": "1.0",
    },
    "lens": {"projection": '"equidistant"', "focal_px": "700.0", "cx": "639.5", "cy": "479.5",
             "k1": "0.0", "k2": "0.0"},
    "grating": {"grooves_per_mm": "600.0", "dispersion_angle_deg": "0.0", "tilt_deg": "0.0",
                "tilt_azimuth_deg": "0.0", "orders": "[1]"},
    "response": {"file": '"TST1_response.csv"'},
    "pointing": {"altitude_deg": "90.0", "azimuth_deg": "0.0", "roll_deg": "0.0"},
}

# Only the keys the contract does not mark optional.
STATION_MINIMAL: dict[str, dict[str, str]] = {
    "station": {"id": '"TST1"'},
    "camera": {"width": "1280", "height": "960", "bit_depth": "8", "gamma": "1.0",
               "saturation_adu": "255", "interlaced": "false"},
    "lens": {"projection": '"equidistant"', "focal_px": "700.0", "cx": "639.5", "cy": "479.5"},
    "grating": {"grooves_per_mm": "600.0", "dispersion_angle_deg": "0.0"},
}

# Contract section 4 example with the invented station.
EVENT_EXAMPLE: dict[str, dict[str, str]] = {
    "event": {"id": '"20261114T031522Z_TST1"', "station": '"TST1"',
              "start_utc": '"2026-11-14T03:15:22.120Z"', "fps": "25.0", "video": '"video.avi"'},
    "trajectory": {"speed_km_s": "34.5", "speed_err_km_s": "0.8"},
}

# Three rows whose linear interpolation can be checked by hand.
RESPONSE_CSV = "wavelength_nm,response\n400.0,0.5\n500.0,1.0\n600.0,0.8\n"


def render(base: dict[str, dict[str, str]], changes: dict | None = None) -> str:
    """TOML text of ``base`` with ``{(section, key): literal or DROP}`` applied."""
    doc = {sec: dict(table) for sec, table in base.items()}
    for (sec, key), value in (changes or {}).items():
        if key is None:
            assert value is DROP
            doc.pop(sec)
        elif value is DROP:
            doc[sec].pop(key)
        else:
            doc.setdefault(sec, {})[key] = value
    lines = []
    for sec, table in doc.items():
        lines.append(f"[{sec}]")
        lines.extend(f"{key} = {value}" for key, value in table.items())
        lines.append("")
    return "\n".join(lines)


def write_station(folder: Path, changes: dict | None = None, *, base=None,
                  response_csv: str | None = RESPONSE_CSV) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "TST1.toml"
    path.write_text(render(STATION_EXAMPLE if base is None else base, changes), encoding="utf-8")
    if response_csv is not None:
        (folder / "TST1_response.csv").write_text(response_csv, encoding="utf-8")
    return path


def write_event(folder: Path, changes: dict | None = None, *, video: bool = True) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "event.toml"
    path.write_text(render(EVENT_EXAMPLE, changes), encoding="utf-8")
    if video:
        (folder / "video.avi").write_bytes(b"")  # load_event only checks that it exists
    return path


def assert_one_line_error(excinfo, path: Path, key: str | None, problem: str) -> None:
    """The brief's rule: one line naming the file, the key and the problem."""
    err = excinfo.value
    msg = str(err)
    assert "\n" not in msg and "\r" not in msg, msg
    assert msg.startswith(f"{path}: "), msg
    assert err.path == str(path)
    assert err.key == key, msg
    if key is not None:
        assert f"{path}: {key}: " in msg, msg
    assert re.search(problem, msg), f"{problem!r} not in {msg!r}"


# --------------------------------------------------------------------------- valid station


def test_contract_example_station_loads(tmp_path):
    path = write_station(tmp_path)
    st = load_station(path)

    assert isinstance(st, Station)
    assert st.id == "TST1"
    assert st.path == path
    assert (st.latitude_deg, st.longitude_deg, st.elevation_m) == (0.0, 0.0, 0.0)
    assert st.camera == Camera(width=1280, height=960, bit_depth=8, gamma=1.0, saturation_adu=255.0,
                               interlaced=False, black_level_adu=0.0, field_order="top",
                               read_noise_adu=2.0, gain_e_per_adu=1.0)
    assert st.lens == Lens(projection="equidistant", focal_px=700.0, cx=639.5, cy=479.5, k1=0.0, k2=0.0)
    assert st.grating == Grating(grooves_per_mm=600.0, dispersion_angle_deg=0.0, tilt_deg=0.0,
                                 tilt_azimuth_deg=0.0, orders=(1,))
    assert st.pointing == Pointing(altitude_deg=90.0, azimuth_deg=0.0, roll_deg=0.0)
    assert isinstance(st.response, ResponseCurve)
    assert st.response.path == tmp_path / "TST1_response.csv"  # contract: relative to the station file
    # full scale = 2**8 - 1 - 0 (contract 3, "Pixel values")
    assert st.camera.full_scale_adu == 255.0
    # integers stay integers, numbers become floats (TOML "0" for black level)
    assert isinstance(st.camera.width, int) and isinstance(st.camera.black_level_adu, float)


def test_non_default_values_reach_the_dataclasses(tmp_path):
    changes = {
        ("station", "latitude_deg"): "-31.25", ("station", "longitude_deg"): "-70.5",
        ("station", "elevation_m"): "2100",
        ("camera", "bit_depth"): "12", ("camera", "gamma"): "0.45", ("camera", "black_level_adu"): "64",
        ("camera", "saturation_adu"): "4000", ("camera", "interlaced"): "true",
        ("camera", "field_order"): '"bottom"', ("camera", "height"): "576", ("camera", "width"): "720",
        ("camera", "read_noise_adu"): "3.2", ("camera", "gain_e_per_adu"): "0.6",
        ("lens", "projection"): '"stereographic"', ("lens", "focal_px"): "512",
        ("lens", "cx"): "359.5", ("lens", "cy"): "287.5", ("lens", "k1"): "-0.05", ("lens", "k2"): "0.01",
        ("grating", "grooves_per_mm"): "300", ("grating", "dispersion_angle_deg"): "-12.5",
        ("grating", "tilt_deg"): "3.5", ("grating", "tilt_azimuth_deg"): "270",
        ("grating", "orders"): "[1, 2, -1]",
        ("pointing", "altitude_deg"): "45.0", ("pointing", "azimuth_deg"): "135.0",
        ("pointing", "roll_deg"): "-2.0",
    }
    st = load_station(write_station(tmp_path, changes))
    assert (st.latitude_deg, st.longitude_deg, st.elevation_m) == (-31.25, -70.5, 2100.0)
    assert st.camera == Camera(width=720, height=576, bit_depth=12, gamma=0.45, saturation_adu=4000.0,
                               interlaced=True, black_level_adu=64.0, field_order="bottom",
                               read_noise_adu=3.2, gain_e_per_adu=0.6)
    assert st.camera.full_scale_adu == 4095.0 - 64.0  # contract 3: 2**bit_depth - 1 - black
    assert st.lens == Lens(projection="stereographic", focal_px=512.0, cx=359.5, cy=287.5, k1=-0.05, k2=0.01)
    assert st.grating == Grating(grooves_per_mm=300.0, dispersion_angle_deg=-12.5, tilt_deg=3.5,
                                 tilt_azimuth_deg=270.0, orders=(1, 2, -1))
    assert st.pointing == Pointing(altitude_deg=45.0, azimuth_deg=135.0, roll_deg=-2.0)


def test_optional_keys_take_their_defaults(tmp_path):
    st = load_station(write_station(tmp_path, base=STATION_MINIMAL, response_csv=None))
    assert st.latitude_deg is None and st.longitude_deg is None and st.elevation_m is None
    assert st.camera.black_level_adu == 0.0  # contract: "optional, default 0"
    assert st.camera.field_order == "top"
    assert st.camera.read_noise_adu is None and st.camera.gain_e_per_adu is None
    assert (st.lens.k1, st.lens.k2) == (0.0, 0.0)
    assert (st.grating.tilt_deg, st.grating.tilt_azimuth_deg) == (0.0, 0.0)
    assert st.grating.orders == (1,)
    assert st.response is None  # contract: without [response] flux is uncalibrated
    assert st.pointing is None


def test_pointing_roll_defaults_to_zero(tmp_path):
    st = load_station(write_station(tmp_path, {("pointing", "roll_deg"): DROP}))
    assert st.pointing == Pointing(altitude_deg=90.0, azimuth_deg=0.0, roll_deg=0.0)


def test_station_objects_are_frozen(tmp_path):
    st = load_station(write_station(tmp_path))
    for obj, name in ((st, "id"), (st.camera, "width"), (st.lens, "focal_px"),
                      (st.grating, "orders"), (st.pointing, "roll_deg"), (st.response, "path")):
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(obj, name, None)
    assert isinstance(st.grating.orders, tuple)  # a list would be mutable inside a frozen object


def test_response_curve_interpolates_linearly_and_is_nan_outside(tmp_path):
    scipy_interpolate = pytest.importorskip("scipy.interpolate")
    st = load_station(write_station(tmp_path))
    resp = st.response
    assert_allclose(resp.wavelength_nm, [400.0, 500.0, 600.0], rtol=0, atol=0)
    assert_allclose(resp.response, [0.5, 1.0, 0.8], rtol=0, atol=0)

    wl = np.array([399.999, 400.0, 450.0, 500.0, 575.0, 600.0, 600.001, 250.0, 1000.0])
    got = resp(wl)
    # By hand: 450 nm is halfway 0.5 -> 1.0 = 0.75; 575 nm is 3/4 of 1.0 -> 0.8 = 0.85.
    assert_allclose(got[1:6], [0.5, 0.75, 1.0, 0.85, 0.8], rtol=0, atol=1e-12)  # float rounding only
    # Contract 3 "Response file": outside the range the response is unknown.
    assert np.all(np.isnan(got[[0, 6, 7, 8]]))
    # Outside reference: scipy's linear interp1d with NaN fill gives the same everywhere.
    ref = scipy_interpolate.interp1d([400.0, 500.0, 600.0], [0.5, 1.0, 0.8], kind="linear",
                                     bounds_error=False, fill_value=np.nan)(wl)
    assert_allclose(got, ref, rtol=0, atol=1e-12, equal_nan=True)
    # Scalars and empty arrays keep their shape.
    assert np.ndim(resp(450.0)) == 0
    assert resp(np.array([])).shape == (0,)


def test_response_file_relative_to_station_file_not_cwd(tmp_path, monkeypatch):
    folder = tmp_path / "cal" / "stations"
    write_station(folder)
    monkeypatch.chdir(tmp_path)
    st = load_station(Path("cal/stations/TST1.toml"))
    assert st.response(np.array([500.0]))[0] == 1.0


def test_load_response_direct(tmp_path):
    p = tmp_path / "r.csv"
    p.write_text("wavelength_nm,response\n380,2\n720,4\n", encoding="utf-8")
    curve = load_response(p)
    assert_allclose(curve([380.0, 550.0, 720.0]), [2.0, 3.0, 4.0], rtol=0, atol=1e-12)


# --------------------------------------------------------------------------- invalid station

# (test id, changes, key named in the message, regex for the problem)
STATION_ERRORS = [
    # missing sections
    ("no-station-section", {("station", None): DROP}, "[station]", "missing section"),
    ("no-camera-section", {("camera", None): DROP}, "[camera]", "missing section"),
    ("no-lens-section", {("lens", None): DROP}, "[lens]", "missing section"),
    ("no-grating-section", {("grating", None): DROP}, "[grating]", "missing section"),
    # missing required keys
    ("no-id", {("station", "id"): DROP}, "[station] id", "missing key"),
    ("no-width", {("camera", "width"): DROP}, "[camera] width", "missing key"),
    ("no-height", {("camera", "height"): DROP}, "[camera] height", "missing key"),
    ("no-bit-depth", {("camera", "bit_depth"): DROP}, "[camera] bit_depth", "missing key"),
    ("no-gamma", {("camera", "gamma"): DROP}, "[camera] gamma", "missing key"),
    ("no-saturation", {("camera", "saturation_adu"): DROP}, "[camera] saturation_adu", "missing key"),
    ("no-interlaced", {("camera", "interlaced"): DROP}, "[camera] interlaced", "missing key"),
    ("no-projection", {("lens", "projection"): DROP}, "[lens] projection", "missing key"),
    ("no-focal", {("lens", "focal_px"): DROP}, "[lens] focal_px", "missing key"),
    ("no-cx", {("lens", "cx"): DROP}, "[lens] cx", "missing key"),
    ("no-cy", {("lens", "cy"): DROP}, "[lens] cy", "missing key"),
    ("no-grooves", {("grating", "grooves_per_mm"): DROP}, "[grating] grooves_per_mm", "missing key"),
    ("no-dispersion-angle", {("grating", "dispersion_angle_deg"): DROP},
     "[grating] dispersion_angle_deg", "missing key"),
    ("no-response-file", {("response", "file"): DROP}, "[response] file", "missing key"),
    ("no-altitude", {("pointing", "altitude_deg"): DROP}, "[pointing] altitude_deg", "missing key"),
    ("no-azimuth", {("pointing", "azimuth_deg"): DROP}, "[pointing] azimuth_deg", "missing key"),
    # mistyped keys
    ("focal-string", {("lens", "focal_px"): '"700"'}, "[lens] focal_px", "must be a number"),
    ("cx-string", {("lens", "cx"): '"middle"'}, "[lens] cx", "must be a number"),
    ("gamma-bool", {("camera", "gamma"): "true"}, "[camera] gamma", "must be a number"),
    ("grooves-bool", {("grating", "grooves_per_mm"): "false"}, "[grating] grooves_per_mm", "must be a number"),
    ("latitude-array", {("station", "latitude_deg"): "[1.0]"}, "[station] latitude_deg", "must be a number"),
    ("width-float", {("camera", "width"): "1280.0"}, "[camera] width", "must be an integer"),
    ("height-float", {("camera", "height"): "960.5"}, "[camera] height", "must be an integer"),
    ("width-bool", {("camera", "width"): "true"}, "[camera] width", "must be an integer"),
    ("width-string", {("camera", "width"): '"1280"'}, "[camera] width", "must be an integer"),
    ("bit-depth-float", {("camera", "bit_depth"): "8.0"}, "[camera] bit_depth", "must be an integer"),
    ("interlaced-string", {("camera", "interlaced"): '"no"'}, "[camera] interlaced", "true or false"),
    ("interlaced-int", {("camera", "interlaced"): "0"}, "[camera] interlaced", "true or false"),
    ("projection-number", {("lens", "projection"): "1"}, "[lens] projection", "must be a string"),
    ("id-number", {("station", "id"): "17"}, "[station] id", "must be a string"),
    ("field-order-bool", {("camera", "field_order"): "true"}, "[camera] field_order", "must be a string"),
    ("response-file-number", {("response", "file"): "3"}, "[response] file", "must be a string"),
    # NaN / inf (valid TOML floats, nonsense here)
    ("focal-nan", {("lens", "focal_px"): "nan"}, "[lens] focal_px", "must be finite"),
    ("cx-inf", {("lens", "cx"): "inf"}, "[lens] cx", "must be finite"),
    ("k1-neg-inf", {("lens", "k1"): "-inf"}, "[lens] k1", "must be finite"),
    ("gamma-nan", {("camera", "gamma"): "nan"}, "[camera] gamma", "must be finite"),
    ("saturation-inf", {("camera", "saturation_adu"): "inf"}, "[camera] saturation_adu", "must be finite"),
    ("black-nan", {("camera", "black_level_adu"): "nan"}, "[camera] black_level_adu", "must be finite"),
    ("read-noise-nan", {("camera", "read_noise_adu"): "nan"}, "[camera] read_noise_adu", "must be finite"),
    ("grooves-nan", {("grating", "grooves_per_mm"): "+nan"}, "[grating] grooves_per_mm", "must be finite"),
    ("dispersion-inf", {("grating", "dispersion_angle_deg"): "inf"},
     "[grating] dispersion_angle_deg", "must be finite"),
    ("latitude-nan", {("station", "latitude_deg"): "nan"}, "[station] latitude_deg", "must be finite"),
    ("altitude-nan", {("pointing", "altitude_deg"): "nan"}, "[pointing] altitude_deg", "must be finite"),
    ("width-nan", {("camera", "width"): "nan"}, "[camera] width", "must be an integer"),
    # nonsense values
    ("focal-zero", {("lens", "focal_px"): "0.0"}, "[lens] focal_px", "must be positive"),
    ("focal-negative", {("lens", "focal_px"): "-700.0"}, "[lens] focal_px", "must be positive"),
    ("grooves-zero", {("grating", "grooves_per_mm"): "0"}, "[grating] grooves_per_mm", "must be positive"),
    ("grooves-negative", {("grating", "grooves_per_mm"): "-600.0"}, "[grating] grooves_per_mm",
     "must be positive"),
    ("projection-unknown", {("lens", "projection"): '"fisheye"'}, "[lens] projection", "unknown projection"),
    ("projection-case", {("lens", "projection"): '"Equidistant"'}, "[lens] projection", "unknown projection"),
    ("bit-depth-14", {("camera", "bit_depth"): "14"}, "[camera] bit_depth", "must be one of 8, 10, 12, 16"),
    ("bit-depth-0", {("camera", "bit_depth"): "0"}, "[camera] bit_depth", "must be one of"),
    ("bit-depth-32", {("camera", "bit_depth"): "32"}, "[camera] bit_depth", "must be one of"),
    ("saturation-above-8bit", {("camera", "saturation_adu"): "256"}, "[camera] saturation_adu",
     "above the 8-bit maximum 255"),
    ("saturation-above-12bit", {("camera", "bit_depth"): "12", ("camera", "saturation_adu"): "4096"},
     "[camera] saturation_adu", "above the 12-bit maximum 4095"),
    ("saturation-at-black", {("camera", "black_level_adu"): "16", ("camera", "saturation_adu"): "16"},
     "[camera] saturation_adu", "not above the black level"),
    ("saturation-below-black", {("camera", "black_level_adu"): "16", ("camera", "saturation_adu"): "10"},
     "[camera] saturation_adu", "not above the black level"),
    ("saturation-zero", {("camera", "saturation_adu"): "0"}, "[camera] saturation_adu",
     "not above the black level"),
    ("black-negative", {("camera", "black_level_adu"): "-1"}, "[camera] black_level_adu", "must be within"),
    ("black-at-max", {("camera", "black_level_adu"): "255"}, "[camera] black_level_adu", "must be within"),
    ("gamma-zero", {("camera", "gamma"): "0.0"}, "[camera] gamma", "positive exponent"),
    ("gamma-negative", {("camera", "gamma"): "-2.2"}, "[camera] gamma", "positive exponent"),
    ("width-zero", {("camera", "width"): "0"}, "[camera] width", "must be positive"),
    ("height-negative", {("camera", "height"): "-960"}, "[camera] height", "must be positive"),
    ("field-order-invalid", {("camera", "field_order"): '"upper"'}, "[camera] field_order",
     "must be 'top' or 'bottom'"),
    ("interlaced-odd-height", {("camera", "interlaced"): "true", ("camera", "height"): "575"},
     "[camera] height", "even height"),
    ("read-noise-negative", {("camera", "read_noise_adu"): "-0.5"}, "[camera] read_noise_adu",
     "must not be negative"),
    ("gain-zero", {("camera", "gain_e_per_adu"): "0.0"}, "[camera] gain_e_per_adu", "must be positive"),
    ("gain-negative", {("camera", "gain_e_per_adu"): "-1.5"}, "[camera] gain_e_per_adu", "must be positive"),
    ("tilt-negative", {("grating", "tilt_deg"): "-1.0"}, "[grating] tilt_deg", r"must be within \[0, 90\)"),
    ("tilt-90", {("grating", "tilt_deg"): "90.0"}, "[grating] tilt_deg", r"must be within \[0, 90\)"),
    ("tilt-large", {("grating", "tilt_deg"): "135"}, "[grating] tilt_deg", r"must be within \[0, 90\)"),
    ("orders-empty", {("grating", "orders"): "[]"}, "[grating] orders", "non-empty list of non-zero integers"),
    ("orders-zero", {("grating", "orders"): "[0]"}, "[grating] orders", "non-zero integers"),
    ("orders-with-zero", {("grating", "orders"): "[1, 0]"}, "[grating] orders", "non-zero integers"),
    ("orders-float", {("grating", "orders"): "[1.0]"}, "[grating] orders", "non-zero integers"),
    ("orders-string", {("grating", "orders"): '["1"]'}, "[grating] orders", "non-zero integers"),
    ("orders-bool", {("grating", "orders"): "[true]"}, "[grating] orders", "non-zero integers"),
    ("orders-scalar", {("grating", "orders"): "1"}, "[grating] orders", "non-zero integers"),
    ("id-space", {("station", "id"): '"TST 1"'}, "[station] id", "only letters, digits"),
    ("id-slash", {("station", "id"): '"../TST1"'}, "[station] id", "only letters, digits"),
    ("id-dot", {("station", "id"): '"TST.1"'}, "[station] id", "only letters, digits"),
    ("id-empty", {("station", "id"): '""'}, "[station] id", "only letters, digits"),
    ("id-trailing-newline", {("station", "id"): r'"TST1\n"'}, "[station] id", "only letters, digits"),
    ("id-non-ascii", {("station", "id"): '"TSTé"'}, "[station] id", "only letters, digits"),
    ("latitude-range", {("station", "latitude_deg"): "91.0"}, "[station] latitude_deg", "must be within"),
    ("longitude-range", {("station", "longitude_deg"): "-181.0"}, "[station] longitude_deg", "must be within"),
    ("altitude-high", {("pointing", "altitude_deg"): "90.5"}, "[pointing] altitude_deg",
     r"must be within \[-90, 90\]"),
    ("altitude-low", {("pointing", "altitude_deg"): "-91"}, "[pointing] altitude_deg",
     r"must be within \[-90, 90\]"),
    # a slip in an optional key would leave its default in force without a word
    ("slip-k1", {("lens", "k_1"): "-0.2", ("lens", "k1"): DROP},
     "[lens] k_1", "not a key of \\[lens\\]; did you mean 'k1'"),
    ("slip-unit-dropped", {("grating", "tilt"): "1.5", ("grating", "tilt_deg"): DROP},
     "[grating] tilt", "did you mean 'tilt_deg'"),
    ("slip-unit-dropped-camera", {("camera", "read_noise"): "2.0", ("camera", "read_noise_adu"): DROP},
     "[camera] read_noise", "did you mean 'read_noise_adu'"),
    ("slip-station", {("station", "latitude"): "45.0", ("station", "latitude_deg"): DROP},
     "[station] latitude", "did you mean 'latitude_deg'"),
    # an empty optional section is a forgotten key, not an absent section
    ("response-empty", {("response", "file"): DROP}, "[response] file", "missing key"),
    ("pointing-empty", {("pointing", "altitude_deg"): DROP, ("pointing", "azimuth_deg"): DROP,
                        ("pointing", "roll_deg"): DROP}, "[pointing] altitude_deg", "missing key"),
]


@pytest.mark.parametrize("changes, key, problem", [c[1:] for c in STATION_ERRORS],
                         ids=[c[0] for c in STATION_ERRORS])
def test_invalid_station_raises_one_line_error(tmp_path, changes, key, problem):
    path = write_station(tmp_path, changes)
    with pytest.raises(InputError) as excinfo:
        load_station(path)
    assert_one_line_error(excinfo, path, key, problem)


def test_keys_nobody_reads_are_left_alone_unless_a_slip(tmp_path):
    # a network's own notes load, and a near name is no slip while the key it resembles is given
    path = write_station(tmp_path, {("camera", "model"): '"invented cam"', ("lens", "focal_mm"): "4.0",
                                    ("station", "operator"): '"night shift"', ("notes", "text"): '"ok"',
                                    ("lens", "k_1"): "-0.2"})
    assert load_station(path).lens.focal_px == 700.0


def test_section_that_is_not_a_table(tmp_path):
    path = tmp_path / "TST1.toml"
    path.write_text("camera = 5\n" + render(STATION_MINIMAL, {("camera", None): DROP}), encoding="utf-8")
    with pytest.raises(InputError) as excinfo:
        load_station(path)
    assert_one_line_error(excinfo, path, "[camera]", "must be a table")


def test_saturation_at_bit_depth_maximum_is_allowed(tmp_path):
    # Boundary of the check above: 2**16 - 1 is a legal saturation level.
    st = load_station(write_station(tmp_path, {("camera", "bit_depth"): "16",
                                               ("camera", "saturation_adu"): "65535"}))
    assert st.camera.saturation_adu == 65535.0


def test_interlaced_even_height_is_allowed(tmp_path):
    st = load_station(write_station(tmp_path, {("camera", "interlaced"): "true", ("camera", "height"): "576"}))
    assert st.camera.interlaced and st.camera.height == 576


# (test id, CSV content or None for "no file", key, problem)
RESPONSE_ERRORS = [
    ("missing", None, None, "response file not found"),
    ("empty", "", None, "header must be 'wavelength_nm,response'"),
    ("wrong-header", "wl,resp\n400,1\n500,1\n", None, "header must be"),
    ("no-header", "400,1\n500,1\n", None, "header must be"),
    ("three-header-columns", "wavelength_nm,response,err\n400,1,0\n500,1,0\n", None, "header must be"),
    ("non-numeric-response", "wavelength_nm,response\n400,high\n500,1\n", "row 2", "not a number"),
    ("non-numeric-wavelength", "wavelength_nm,response\n400,1\nfive hundred,1\n", "row 3", "not a number"),
    ("empty-cell", "wavelength_nm,response\n400,\n500,1\n", "row 2", "not a number"),
    ("three-columns", "wavelength_nm,response\n400,1,2\n500,1\n", "row 2", "expected 2 columns"),
    ("nan", "wavelength_nm,response\n400,nan\n500,1\n", "row 2", "must be finite"),
    ("inf-wavelength", "wavelength_nm,response\ninf,1\n500,1\n", "row 2", "must be finite"),
    ("zero-response", "wavelength_nm,response\n400,0\n500,1\n", "row 2", "must be positive"),
    ("negative-response", "wavelength_nm,response\n400,1\n500,-0.2\n", "row 3", "must be positive"),
    ("decreasing", "wavelength_nm,response\n500,1\n400,1\n", None, "increase strictly"),
    ("repeated-wavelength", "wavelength_nm,response\n400,1\n500,1\n500,2\n", None, "increase strictly"),
    ("single-row", "wavelength_nm,response\n400,1\n", None, "at least two rows"),
    ("header-only", "wavelength_nm,response\n", None, "at least two rows"),
]


@pytest.mark.parametrize("content, key, problem", [c[1:] for c in RESPONSE_ERRORS],
                         ids=[c[0] for c in RESPONSE_ERRORS])
def test_invalid_response_file_raises_one_line_error(tmp_path, content, key, problem):
    station = write_station(tmp_path, response_csv=content)
    with pytest.raises(InputError) as excinfo:
        load_station(station)
    assert_one_line_error(excinfo, tmp_path / "TST1_response.csv", key, problem)


def test_response_file_not_utf8(tmp_path):
    station = write_station(tmp_path, response_csv=None)
    (tmp_path / "TST1_response.csv").write_bytes(b"\xff\xfe\x00w\x00a\x00v\x00e")
    with pytest.raises(InputError) as excinfo:
        load_station(station)
    assert_one_line_error(excinfo, tmp_path / "TST1_response.csv", None, "cannot read response file")


# --------------------------------------------------------------------------- unreadable files


def test_station_file_not_toml(tmp_path):
    path = tmp_path / "TST1.toml"
    path.write_text("[station\nid = TST1 = 3\n", encoding="utf-8")
    with pytest.raises(InputError) as excinfo:
        load_station(path)
    assert_one_line_error(excinfo, path, None, "not valid TOML")


def test_station_file_binary(tmp_path):
    path = tmp_path / "TST1.toml"
    path.write_bytes(b"\x89PNG\r\n\x1a\n\xff\xff")
    with pytest.raises(InputError) as excinfo:
        load_station(path)
    assert_one_line_error(excinfo, path, None, "cannot read file")


def test_station_file_does_not_exist(tmp_path):
    path = tmp_path / "nowhere" / "TST1.toml"
    with pytest.raises(InputError) as excinfo:
        load_station(path)
    assert_one_line_error(excinfo, path, None, "file not found")


def test_event_file_not_toml(tmp_path):
    path = tmp_path / "event.toml"
    path.write_text('[event]\nid = "x"\nid = "y"\n', encoding="utf-8")  # duplicate key: invalid TOML
    with pytest.raises(InputError) as excinfo:
        load_event(path)
    assert_one_line_error(excinfo, path, None, "not valid TOML")


def test_event_folder_without_event_toml(tmp_path):
    with pytest.raises(InputError) as excinfo:
        load_event(tmp_path)
    assert_one_line_error(excinfo, tmp_path / "event.toml", None, "file not found")


def test_event_path_does_not_exist(tmp_path):
    path = tmp_path / "missing" / "event.toml"
    with pytest.raises(InputError) as excinfo:
        load_event(path)
    assert_one_line_error(excinfo, path, None, "file not found")


# --------------------------------------------------------------------------- valid event


def test_contract_example_event_loads(tmp_path):
    astropy_time = pytest.importorskip("astropy.time")
    path = write_event(tmp_path)
    ev = load_event(path)
    assert isinstance(ev, Event)
    assert ev.id == "20261114T031522Z_TST1"
    assert ev.station == "TST1"
    assert ev.fps == 25.0
    assert ev.video == tmp_path / "video.avi"  # contract: relative to event.toml
    assert ev.path == path and ev.folder == tmp_path
    assert (ev.speed_km_s, ev.speed_err_km_s) == (34.5, 0.8)
    # start_utc is an aware UTC datetime, to the microsecond
    assert ev.start_utc == datetime(2026, 11, 14, 3, 15, 22, 120000, tzinfo=timezone.utc)
    assert ev.start_utc.utcoffset().total_seconds() == 0
    # Outside reference: astropy's ISO 8601 parser on the same UTC time.
    ref = astropy_time.Time("2026-11-14T03:15:22.120", format="isot", scale="utc").to_datetime(timezone.utc)
    assert abs((ev.start_utc - ref).total_seconds()) < 1e-6  # datetime resolution
    with pytest.raises(dataclasses.FrozenInstanceError):
        ev.fps = 30.0


def test_event_folder_path_is_accepted(tmp_path):
    write_event(tmp_path)
    assert load_event(tmp_path) == load_event(tmp_path / "event.toml")


def test_event_without_trajectory(tmp_path):
    ev = load_event(write_event(tmp_path, {("trajectory", None): DROP}))
    assert ev.speed_km_s is None and ev.speed_err_km_s is None


def test_event_integer_fps_and_speed_only(tmp_path):
    ev = load_event(write_event(tmp_path, {("event", "fps"): "30", ("trajectory", "speed_err_km_s"): DROP}))
    assert ev.fps == 30.0 and isinstance(ev.fps, float)
    assert ev.speed_km_s == 34.5 and ev.speed_err_km_s is None


@pytest.mark.parametrize("text, expected", [
    # ISO 8601 offsets convert to UTC (2026-11-14 04:15:22.12+01:00 is 03:15:22.12Z)
    ('"2026-11-14T04:15:22.120+01:00"', datetime(2026, 11, 14, 3, 15, 22, 120000, tzinfo=timezone.utc)),
    ('"2026-11-13T22:15:22-05:00"', datetime(2026, 11, 14, 3, 15, 22, tzinfo=timezone.utc)),
    ('"2026-11-14T03:15:22+00:00"', datetime(2026, 11, 14, 3, 15, 22, tzinfo=timezone.utc)),
])
def test_start_utc_with_offset_is_converted_to_utc(tmp_path, text, expected):
    ev = load_event(write_event(tmp_path, {("event", "start_utc"): text}))
    assert ev.start_utc == expected
    assert ev.start_utc.tzinfo == timezone.utc


# --------------------------------------------------------------------------- invalid event

EVENT_ERRORS = [
    ("no-event-section", {("event", None): DROP}, "[event]", "missing section"),
    ("no-id", {("event", "id"): DROP}, "[event] id", "missing key"),
    ("no-station", {("event", "station"): DROP}, "[event] station", "missing key"),
    ("no-start", {("event", "start_utc"): DROP}, "[event] start_utc", "missing key"),
    ("no-fps", {("event", "fps"): DROP}, "[event] fps", "missing key"),
    ("no-video", {("event", "video"): DROP}, "[event] video", "missing key"),
    ("fps-zero", {("event", "fps"): "0.0"}, "[event] fps", "must be positive"),
    ("fps-huge", {("event", "fps"): "1e9"}, "[event] fps", r"within \[0.1, 100000\] frames per second"),
    ("fps-tiny", {("event", "fps"): "0.01"}, "[event] fps", r"within \[0.1, 100000\]"),
    ("slip-speed", {("trajectory", "speed"): "30.0", ("trajectory", "speed_km_s"): DROP},
     "[trajectory] speed", "did you mean 'speed_km_s'"),
    ("fps-negative", {("event", "fps"): "-25"}, "[event] fps", "must be positive"),
    ("fps-nan", {("event", "fps"): "nan"}, "[event] fps", "must be finite"),
    ("fps-inf", {("event", "fps"): "inf"}, "[event] fps", "must be finite"),
    ("fps-string", {("event", "fps"): '"25"'}, "[event] fps", "must be a number"),
    ("fps-bool", {("event", "fps"): "true"}, "[event] fps", "must be a number"),
    ("start-garbage", {("event", "start_utc"): '"last night"'}, "[event] start_utc", "not an ISO 8601 UTC time"),
    ("start-no-zone", {("event", "start_utc"): '"2026-11-14T03:15:22.120"'}, "[event] start_utc",
     "not an ISO 8601 UTC time"),
    ("start-date-only", {("event", "start_utc"): '"2026-11-14"'}, "[event] start_utc", "not an ISO 8601"),
    ("start-impossible-date", {("event", "start_utc"): '"2026-02-30T03:15:22Z"'}, "[event] start_utc",
     "not an ISO 8601"),
    ("start-hour-25", {("event", "start_utc"): '"2026-11-14T25:15:22Z"'}, "[event] start_utc",
     "not an ISO 8601"),
    ("start-number", {("event", "start_utc"): "1794712522"}, "[event] start_utc", "must be a string"),
    ("video-number", {("event", "video"): "1"}, "[event] video", "must be a string"),
    ("video-missing-file", {("event", "video"): '"other.avi"'}, "[event] video", "'other.avi' not found"),
    ("station-bad-chars", {("event", "station"): '"TST/1"'}, "[event] station", "only letters, digits"),
    ("id-slash", {("event", "id"): '"../x"'}, "[event] id", "only letters, digits"),
    ("id-colon", {("event", "id"): '"2026-11-14T03:15:22Z"'}, "[event] id", "only letters, digits"),
    ("id-leading-dot", {("event", "id"): '".hidden"'}, "[event] id", "start with a letter or digit"),
    ("id-leading-dash", {("event", "id"): '"-rf"'}, "[event] id", "start with a letter or digit"),
    ("id-empty", {("event", "id"): '""'}, "[event] id", "only letters, digits"),
    ("speed-low", {("trajectory", "speed_km_s"): "3.0"}, "[trajectory] speed_km_s", r"within \[5, 80\]"),
    ("speed-high", {("trajectory", "speed_km_s"): "100.0"}, "[trajectory] speed_km_s", r"within \[5, 80\]"),
    ("speed-negative", {("trajectory", "speed_km_s"): "-34.5"}, "[trajectory] speed_km_s", "within"),
    ("speed-nan", {("trajectory", "speed_km_s"): "nan"}, "[trajectory] speed_km_s", "must be finite"),
    ("speed-string", {("trajectory", "speed_km_s"): '"fast"'}, "[trajectory] speed_km_s", "must be a number"),
    ("speed-err-negative", {("trajectory", "speed_err_km_s"): "-0.8"}, "[trajectory] speed_err_km_s",
     "must not be negative"),
    ("speed-err-inf", {("trajectory", "speed_err_km_s"): "inf"}, "[trajectory] speed_err_km_s",
     "must be finite"),
]


@pytest.mark.parametrize("changes, key, problem", [c[1:] for c in EVENT_ERRORS],
                         ids=[c[0] for c in EVENT_ERRORS])
def test_invalid_event_raises_one_line_error(tmp_path, changes, key, problem):
    path = write_event(tmp_path, changes)
    with pytest.raises(InputError) as excinfo:
        load_event(path)
    assert_one_line_error(excinfo, path, key, problem)


def test_event_video_file_missing(tmp_path):
    path = write_event(tmp_path, video=False)
    with pytest.raises(InputError) as excinfo:
        load_event(path)
    assert_one_line_error(excinfo, path, "[event] video", "'video.avi' not found")


def test_input_error_is_a_value_error():
    # Callers that only know ValueError still catch bad input.
    err = InputError("a/b.toml", "bad\nthing   here", key="[lens] cx")
    assert isinstance(err, ValueError)
    assert str(err) == "a/b.toml: [lens] cx: bad thing here"
    assert str(InputError("a/b.toml", "gone")) == "a/b.toml: gone"


# --------------------------------------------------------------------------- find_station_file


@pytest.fixture
def run_tree(tmp_path):
    """``tmp/run/2026-11-14/ev1/event.toml`` with its (empty) video."""
    run = tmp_path / "run"
    event_dir = run / "2026-11-14" / "ev1"
    write_event(event_dir)
    return tmp_path, run, event_dir, load_event(event_dir)


def _station_at(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "TST1.toml"
    path.write_text(render(STATION_MINIMAL), encoding="utf-8")
    return path


def test_find_in_stations_dir(run_tree):
    tmp, run, event_dir, ev = run_tree
    wanted = _station_at(tmp / "stations_elsewhere")
    _station_at(event_dir)  # ignored: --stations DIR means only that folder
    found = find_station_file(ev, stations_dir=tmp / "stations_elsewhere", run_root=run)
    assert found == wanted
    assert load_station(found).id == "TST1"


def test_stations_dir_without_the_file(run_tree):
    tmp, run, event_dir, ev = run_tree
    (tmp / "empty_dir").mkdir()
    _station_at(event_dir)  # must not be used as a fallback
    with pytest.raises(InputError) as excinfo:
        find_station_file(ev, stations_dir=tmp / "empty_dir")
    assert_one_line_error(excinfo, ev.path, "[event] station", r"TST1\.toml not found in .*empty_dir")


def test_find_in_event_folder(run_tree):
    tmp, run, event_dir, ev = run_tree
    wanted = _station_at(event_dir)
    _station_at(run)  # a farther copy loses to the nearer one
    assert find_station_file(ev, run_root=run) == wanted.resolve()
    assert find_station_file(ev) == wanted.resolve()  # no run_root: same, nearest first


def test_find_in_parent_folder(run_tree):
    tmp, run, event_dir, ev = run_tree
    wanted = _station_at(event_dir.parent)
    assert find_station_file(ev, run_root=run) == wanted.resolve()


def test_find_in_run_root(run_tree):
    tmp, run, event_dir, ev = run_tree
    wanted = _station_at(run)
    assert find_station_file(ev, run_root=run) == wanted.resolve()


def test_find_in_stations_subfolder_of_a_parent(run_tree):
    tmp, run, event_dir, ev = run_tree
    wanted = _station_at(run / "stations")
    assert find_station_file(ev, run_root=run) == wanted.resolve()


def test_search_stops_at_run_root(run_tree):
    tmp, run, event_dir, ev = run_tree
    _station_at(tmp)  # above the run root: out of bounds
    _station_at(tmp / "stations")
    with pytest.raises(InputError) as excinfo:
        find_station_file(ev, run_root=run)
    assert_one_line_error(excinfo, ev.path, "[event] station", r"TST1\.toml not found")
    # the same tree with the root one level higher finds it
    assert find_station_file(ev, run_root=tmp) == (tmp / "TST1.toml").resolve()


def test_other_station_ids_are_not_matched(run_tree):
    tmp, run, event_dir, ev = run_tree
    (event_dir / "TST2.toml").write_text(render(STATION_MINIMAL), encoding="utf-8")
    (event_dir / "TST1.toml").mkdir()  # a folder with the right name is not a station file
    with pytest.raises(InputError):
        find_station_file(ev, run_root=run)
