"""Station and event files (contract sections 3 and 4) as validated, frozen dataclasses.

All checks happen here, once, at the edge: later stages trust these objects.
Every problem raises :class:`meteorspec.errors.InputError` with a one-line
message naming the file, the key and the problem.
"""

from __future__ import annotations

import csv
import difflib
import math
import re
import tomllib
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError

PROJECTIONS = ("equidistant", "equisolid", "stereographic", "orthographic", "rectilinear")
BIT_DEPTHS = (8, 10, 12, 16)
# Frame rates a meteor camera records at, from 10 s time-lapse stills to fast high-speed video; a
# rate outside is a slip of unit or digits (1e9 passed before and gave exposures of a nanosecond).
FPS_RANGE = (0.1, 1.0e5)
_ID_RE = re.compile(r"[A-Za-z0-9_-]+\Z")  # \Z: "$" would let a trailing newline through
# Event ids become file names: allow what is safe on every file system (no ':',
# which Windows forbids and NTFS reads as an alternate-data-stream separator),
# and an alphanumeric first character (no hidden ".x" files, no "-x" option look-alikes).
_EVENT_ID_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.+-]*\Z")


@dataclass(frozen=True)
class Camera:
    """Sensor and encoding of the stored pixel values (contract section 3)."""

    width: int
    height: int
    bit_depth: int
    gamma: float
    saturation_adu: float
    interlaced: bool
    black_level_adu: float = 0.0
    field_order: str = "top"
    read_noise_adu: float | None = None
    gain_e_per_adu: float | None = None

    @property
    def full_scale_adu(self) -> float:
        """Largest linear signal above black, ``2**bit_depth - 1 - black_level_adu``."""
        return float(2**self.bit_depth - 1 - self.black_level_adu)


@dataclass(frozen=True)
class Lens:
    """Lens projection and distortion (contract section 2.1)."""

    projection: str
    focal_px: float
    cx: float
    cy: float
    k1: float = 0.0
    k2: float = 0.0


@dataclass(frozen=True)
class Grating:
    """Transmission grating in front of the lens (contract section 2.2)."""

    grooves_per_mm: float
    dispersion_angle_deg: float
    tilt_deg: float = 0.0
    tilt_azimuth_deg: float = 0.0
    orders: tuple[int, ...] = (1,)


@dataclass(frozen=True)
class Pointing:
    """Orientation of the optical axis on the sky."""

    altitude_deg: float
    azimuth_deg: float
    roll_deg: float = 0.0


@dataclass(frozen=True, eq=False)
class ResponseCurve:
    """Relative system sensitivity to energy flux, linear between rows.

    Outside ``[wavelength_nm[0], wavelength_nm[-1]]`` the response is unknown (NaN).
    """

    wavelength_nm: np.ndarray
    response: np.ndarray
    path: Path

    def __call__(self, wavelength_nm: np.ndarray) -> np.ndarray:
        """Response at ``wavelength_nm``; NaN outside the tabulated range."""
        wl = np.asarray(wavelength_nm, dtype=float)
        return np.interp(wl, self.wavelength_nm, self.response, left=np.nan, right=np.nan)


@dataclass(frozen=True)
class Station:
    """One camera of the network, as read from ``<id>.toml``."""

    id: str
    camera: Camera
    lens: Lens
    grating: Grating
    path: Path
    latitude_deg: float | None = None
    longitude_deg: float | None = None
    elevation_m: float | None = None
    response: ResponseCurve | None = field(default=None, compare=False)
    pointing: Pointing | None = None


@dataclass(frozen=True)
class Event:
    """One recorded event: ``event.toml`` and the video it names."""

    id: str
    station: str
    start_utc: datetime
    fps: float
    video: Path
    path: Path
    speed_km_s: float | None = None
    speed_err_km_s: float | None = None

    @property
    def folder(self) -> Path:
        return self.path.parent


# --------------------------------------------------------------------------- reading helpers


def _read_toml(path: Path) -> dict[str, Any]:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(path, "file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"cannot read file ({exc.__class__.__name__})") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(path, f"not valid TOML ({exc})") from None


def _slip_of(key: str, names: list[str]) -> str | None:
    """The name in ``names`` that ``key`` most likely misspells, or None.

    A unit suffix left off or added (``tilt`` / ``tilt_deg``), or a spelling close enough
    that difflib's ratio reaches 0.8 (``k_1`` / ``k1``: one character in three).
    """
    prefixed = [n for n in names if n.startswith(key + "_") or key.startswith(n + "_")]
    close = difflib.get_close_matches(key, prefixed or names, n=1, cutoff=0.0 if prefixed else 0.8)
    return close[0] if close else None


class _Section:
    """Typed access to one TOML table with file/key-naming errors."""

    def __init__(self, path: Path, doc: dict[str, Any], name: str, *, required: bool = True):
        self.path = path
        self.name = name
        # An optional section counts as given when its header is written, even if
        # empty: an empty [response] is a forgotten key, not "no response curve".
        self.given = name in doc
        value = doc.get(name)
        if value is None:
            if required:
                raise InputError(path, "missing section", key=f"[{name}]")
            value = {}
        if not isinstance(value, dict):
            raise InputError(path, "must be a table", key=f"[{name}]")
        self.table = value
        self.asked: set[str] = set()  # every key the parser looked for, given or not

    def present(self) -> bool:
        return self.given

    def _key(self, key: str) -> str:
        return f"[{self.name}] {key}"

    def fail(self, key: str, problem: str) -> InputError:
        return InputError(self.path, problem, key=self._key(key))

    def _raw(self, key: str, required: bool) -> Any:
        self.asked.add(key)
        if key not in self.table:
            if required:
                raise self.fail(key, "missing key")
            return None
        return self.table[key]

    def number(self, key: str, *, required: bool = True, default: float | None = None) -> float | None:
        raw = self._raw(key, required)
        if raw is None:
            return default
        if isinstance(raw, bool) or not isinstance(raw, (int, float)):
            raise self.fail(key, f"must be a number, got {type(raw).__name__} {raw!r}")
        value = float(raw)
        if not math.isfinite(value):
            raise self.fail(key, f"must be finite, got {raw!r}")
        return value

    def integer(self, key: str, *, required: bool = True, default: int | None = None) -> int | None:
        raw = self._raw(key, required)
        if raw is None:
            return default
        if isinstance(raw, bool) or not isinstance(raw, int):
            raise self.fail(key, f"must be an integer, got {type(raw).__name__} {raw!r}")
        return int(raw)

    def string(self, key: str, *, required: bool = True, default: str | None = None) -> str | None:
        raw = self._raw(key, required)
        if raw is None:
            return default
        if not isinstance(raw, str):
            raise self.fail(key, f"must be a string, got {type(raw).__name__} {raw!r}")
        return raw

    def check_slips(self, *read: str) -> None:
        """Refuse a key the parser did not read that nearly names an optional key left out.

        A slip in an optional key (``k_1`` for ``k1``, ``tilt`` for ``tilt_deg``) would leave
        that key's default in force without a word. Other keys nobody reads (a network's own
        notes, a camera's model) are left alone. ``read``: keys read without the typed getters.
        """
        known = self.asked | set(read)
        absent = sorted(k for k in known if k not in self.table)
        for key in self.table:
            if key not in known and (guess := _slip_of(key, absent)) is not None:
                raise self.fail(key, f"not a key of [{self.name}]; did you mean {guess!r}?")

    def boolean(self, key: str, *, required: bool = True, default: bool | None = None) -> bool | None:
        raw = self._raw(key, required)
        if raw is None:
            return default
        if not isinstance(raw, bool):
            raise self.fail(key, f"must be true or false, got {raw!r}")
        return raw


# --------------------------------------------------------------------------- station


def load_response(path: Path) -> ResponseCurve:
    """Read a response CSV (header ``wavelength_nm,response``), checking every row.

    Raises
    ------
    InputError
        Unreadable file, wrong header, non-numeric, non-finite or non-positive
        values, wavelengths not strictly increasing, or fewer than two rows.
    """
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = [r for r in csv.reader(fh) if r and not r[0].lstrip().startswith("#")]
    except FileNotFoundError:
        raise InputError(path, "response file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"cannot read response file ({exc.__class__.__name__})") from None
    if not rows or [c.strip() for c in rows[0]] != ["wavelength_nm", "response"]:
        raise InputError(path, "header must be 'wavelength_nm,response'")
    wl, resp = [], []
    for line_no, row in enumerate(rows[1:], start=2):
        if len(row) != 2:
            raise InputError(path, f"expected 2 columns, got {len(row)}", key=f"row {line_no}")
        try:
            w, r = float(row[0]), float(row[1])
        except ValueError:
            raise InputError(path, f"not a number: {','.join(row)!r}", key=f"row {line_no}") from None
        if not (math.isfinite(w) and math.isfinite(r)):
            raise InputError(path, "values must be finite", key=f"row {line_no}")
        if r <= 0:
            raise InputError(path, f"response must be positive, got {r}", key=f"row {line_no}")
        wl.append(w)
        resp.append(r)
    if len(wl) < 2:
        raise InputError(path, "needs at least two rows")
    wl_arr = np.array(wl)
    if np.any(np.diff(wl_arr) <= 0):
        raise InputError(path, "wavelength_nm must increase strictly")
    return ResponseCurve(wavelength_nm=wl_arr, response=np.array(resp), path=Path(path))


def load_station(path: str | Path) -> Station:
    """Read and validate a station file (contract section 3).

    Parameters
    ----------
    path : str or Path
        The ``<id>.toml`` file.

    Returns
    -------
    Station

    Raises
    ------
    InputError
        For any missing or mistyped key or nonsense value; the message names the
        file, the key and the problem.
    """
    path = Path(path)
    doc = _read_toml(path)

    st = _Section(path, doc, "station")
    sid = st.string("id")
    if not _ID_RE.match(sid):
        raise st.fail("id", f"only letters, digits, '-' and '_' allowed, got {sid!r}")
    lat = st.number("latitude_deg", required=False)
    lon = st.number("longitude_deg", required=False)
    elev = st.number("elevation_m", required=False)
    if lat is not None and not -90 <= lat <= 90:
        raise st.fail("latitude_deg", f"must be within [-90, 90], got {lat}")
    if lon is not None and not -180 <= lon <= 360:
        raise st.fail("longitude_deg", f"must be within [-180, 360], got {lon}")
    st.check_slips()

    cam = _Section(path, doc, "camera")
    width = cam.integer("width")
    height = cam.integer("height")
    for key, val in (("width", width), ("height", height)):
        if val <= 0:
            raise cam.fail(key, f"must be positive, got {val}")
    bit_depth = cam.integer("bit_depth")
    if bit_depth not in BIT_DEPTHS:
        raise cam.fail("bit_depth", f"must be one of 8, 10, 12, 16, got {bit_depth}")
    max_adu = 2**bit_depth - 1
    gamma = cam.number("gamma")
    if not 0.05 <= gamma <= 20:
        raise cam.fail("gamma", f"must be a positive exponent within [0.05, 20], got {gamma}")
    black = cam.number("black_level_adu", required=False, default=0.0)
    if not 0 <= black < max_adu:
        raise cam.fail("black_level_adu", f"must be within [0, {max_adu}), got {black}")
    saturation = cam.number("saturation_adu")
    if saturation > max_adu:
        raise cam.fail("saturation_adu", f"{saturation} is above the {bit_depth}-bit maximum {max_adu}")
    if saturation <= black:
        raise cam.fail("saturation_adu", f"{saturation} is not above the black level {black}")
    interlaced = cam.boolean("interlaced")
    field_order = cam.string("field_order", required=False, default="top")
    if field_order not in ("top", "bottom"):
        raise cam.fail("field_order", f"must be 'top' or 'bottom', got {field_order!r}")
    if interlaced and height % 2:
        raise cam.fail("height", f"an interlaced frame needs an even height, got {height}")
    read_noise = cam.number("read_noise_adu", required=False)
    if read_noise is not None and read_noise < 0:
        raise cam.fail("read_noise_adu", f"must not be negative, got {read_noise}")
    gain = cam.number("gain_e_per_adu", required=False)
    if gain is not None and gain <= 0:
        raise cam.fail("gain_e_per_adu", f"must be positive, got {gain}")
    camera = Camera(
        width=width, height=height, bit_depth=bit_depth, gamma=gamma, saturation_adu=saturation,
        interlaced=interlaced, black_level_adu=black, field_order=field_order,
        read_noise_adu=read_noise, gain_e_per_adu=gain,
    )
    cam.check_slips()

    ln = _Section(path, doc, "lens")
    projection = ln.string("projection")
    if projection not in PROJECTIONS:
        raise ln.fail("projection", f"unknown projection {projection!r}; use one of {', '.join(PROJECTIONS)}")
    focal = ln.number("focal_px")
    if focal <= 0:
        raise ln.fail("focal_px", f"must be positive, got {focal}")
    lens = Lens(
        projection=projection, focal_px=focal, cx=ln.number("cx"), cy=ln.number("cy"),
        k1=ln.number("k1", required=False, default=0.0), k2=ln.number("k2", required=False, default=0.0),
    )
    ln.check_slips()

    gr = _Section(path, doc, "grating")
    grooves = gr.number("grooves_per_mm")
    if grooves <= 0:
        raise gr.fail("grooves_per_mm", f"must be positive, got {grooves}")
    tilt = gr.number("tilt_deg", required=False, default=0.0)
    if not 0 <= tilt < 90:
        raise gr.fail("tilt_deg", f"must be within [0, 90), got {tilt}")
    orders_raw = gr.table.get("orders", [1])
    if (
        not isinstance(orders_raw, list)
        or not orders_raw
        or any(isinstance(o, bool) or not isinstance(o, int) or o == 0 for o in orders_raw)
    ):
        raise gr.fail("orders", f"must be a non-empty list of non-zero integers, got {orders_raw!r}")
    grating = Grating(
        grooves_per_mm=grooves, dispersion_angle_deg=gr.number("dispersion_angle_deg"), tilt_deg=tilt,
        tilt_azimuth_deg=gr.number("tilt_azimuth_deg", required=False, default=0.0),
        orders=tuple(orders_raw),
    )
    gr.check_slips("orders")

    response = None
    rs = _Section(path, doc, "response", required=False)
    if rs.present():
        response = load_response(path.parent / rs.string("file"))
        rs.check_slips()

    pointing = None
    pt = _Section(path, doc, "pointing", required=False)
    if pt.present():
        alt = pt.number("altitude_deg")
        if not -90 <= alt <= 90:
            raise pt.fail("altitude_deg", f"must be within [-90, 90], got {alt}")
        pointing = Pointing(altitude_deg=alt, azimuth_deg=pt.number("azimuth_deg"),
                            roll_deg=pt.number("roll_deg", required=False, default=0.0))
        pt.check_slips()

    return Station(id=sid, camera=camera, lens=lens, grating=grating, path=path, latitude_deg=lat,
                   longitude_deg=lon, elevation_m=elev, response=response, pointing=pointing)


# --------------------------------------------------------------------------- event


def _parse_utc(text: str) -> datetime:
    value = datetime.fromisoformat(text.replace("Z", "+00:00") if text.endswith("Z") else text)
    if value.tzinfo is None:
        raise ValueError("no time zone")
    return value.astimezone(timezone.utc)


def load_event(path: str | Path) -> Event:
    """Read and validate ``event.toml`` (contract section 4).

    ``path`` may be the TOML file or the event folder holding it. The video
    file is checked for existence here; its content is checked by the reader.

    Raises
    ------
    InputError
        For any missing or mistyped key or nonsense value.
    """
    path = Path(path)
    if path.is_dir():
        path = path / "event.toml"
    doc = _read_toml(path)
    ev = _Section(path, doc, "event")
    eid = ev.string("id")
    if not _EVENT_ID_RE.match(eid):
        raise ev.fail("id", "must start with a letter or digit and hold only letters, digits and "
                            f"'_.+-', got {eid!r}")
    station = ev.string("station")
    if not _ID_RE.match(station):
        raise ev.fail("station", f"only letters, digits, '-' and '_' allowed, got {station!r}")
    start_text = ev.string("start_utc")
    try:
        start = _parse_utc(start_text)
    except ValueError:
        raise ev.fail("start_utc", f"not an ISO 8601 UTC time: {start_text!r}") from None
    fps = ev.number("fps")
    if fps <= 0:
        raise ev.fail("fps", f"must be positive, got {fps}")
    if not FPS_RANGE[0] <= fps <= FPS_RANGE[1]:
        raise ev.fail("fps", f"must be within [{FPS_RANGE[0]:g}, {FPS_RANGE[1]:g}] frames per second, got {fps:g}")
    video_name = ev.string("video")
    video = path.parent / video_name
    if not video.exists():
        raise ev.fail("video", f"{video_name!r} not found next to event.toml")
    ev.check_slips()

    speed = speed_err = None
    tr = _Section(path, doc, "trajectory", required=False)
    if tr.present():
        speed = tr.number("speed_km_s", required=False)
        if speed is not None and not 5.0 <= speed <= 80.0:
            # Bound meteoroids enter between about 11 and 72 km/s (common practice); leave margin.
            raise tr.fail("speed_km_s", f"must be within [5, 80] km/s, got {speed}")
        speed_err = tr.number("speed_err_km_s", required=False)
        if speed_err is not None and speed_err < 0:
            raise tr.fail("speed_err_km_s", f"must not be negative, got {speed_err}")
        tr.check_slips()
    return Event(id=eid, station=station, start_utc=start, fps=fps, video=video, path=path,
                 speed_km_s=speed, speed_err_km_s=speed_err)


def find_station_file(event: Event, *, stations_dir: str | Path | None = None,
                      run_root: str | Path | None = None) -> Path:
    """Locate ``<station>.toml`` for an event (contract section 3).

    With ``stations_dir`` only that folder is searched. Otherwise the event's own
    folder and then each parent up to ``run_root`` (default: the file-system
    root); at each level both ``<id>.toml`` and ``stations/<id>.toml`` are tried.

    Raises
    ------
    InputError
        If no file is found; the message says where the search looked.
    """
    name = f"{event.station}.toml"
    if stations_dir is not None:
        cand = Path(stations_dir) / name
        if cand.is_file():
            return cand
        raise InputError(event.path, f"station file {name} not found in {stations_dir}", key="[event] station")
    folder = event.folder.resolve()
    root = Path(run_root).resolve() if run_root is not None else None
    while True:
        for cand in (folder / name, folder / "stations" / name):
            if cand.is_file():
                return cand
        if folder == root or folder.parent == folder:
            break
        folder = folder.parent
    raise InputError(event.path, f"station file {name} not found in the event folder or its parents",
                     key="[event] station")
