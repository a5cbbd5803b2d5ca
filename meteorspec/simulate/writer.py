"""Write a simulated event per the contract, and its truth beside it (never inside it).

Layout written by :func:`simulate_event`::

    out_dir/<event id>/event.toml + video (video.avi | video.fits | frames/)
    out_dir/stations/<station id>.toml + <station id>_response.csv
    truth_dir/<event id>.json

Every file is written under a temporary name and renamed into place, and an
event folder is assembled aside and swapped in whole, so an interrupted run
leaves no half-written output under a final name. Identical specs give
identical bytes.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .. import __version__
from ..config import Grating, Station
from ..extinction import airmass_kasten_young
from ..video import write_video
from .emission import EmissionModel
from .render import FIRST_ORDER_SHARE, ZEROTH_ORDER_SHARE, Rendered, render_event
from .spec import EventSpec, written_grating

if TYPE_CHECKING:
    from ..optics import SpectralGeometry

TRUTH_SCHEMA = "meteorspec-simulation-truth/1"
_VIDEO_NAME = {"avi": "video.avi", "fits": "video.fits", "png": "frames", "tiff": "frames",
               "fits-frames": "frames"}
_FRAME_FORMAT = {"png": "png", "tiff": "tiff", "fits-frames": "fits"}
# Lines whose whole-flight energy is at least this share of the strongest line also get
# their per-frame energies written explicitly (all others: energy x frame_fraction).
_PER_FRAME_LINE_SHARE = 1e-2


@dataclass(frozen=True, eq=False)
class SimulatedEvent:
    """What :func:`simulate_event` wrote, and the truth it wrote."""

    event_id: str
    event_dir: Path
    event_toml: Path
    video: Path
    station_toml: Path
    response_csv: Path
    truth_json: Path
    truth: dict[str, Any]
    spec: EventSpec


# --------------------------------------------------------------------------- formatting


def _num(value: float, digits: int = 6) -> float | None:
    """Round to ``digits`` significant digits; NaN/inf -> None (JSON null)."""
    v = float(value)
    if not math.isfinite(v):
        return None
    return float(f"{v:.{digits}g}")


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(round(value, 9))
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {value!r} to TOML")


def _toml(sections: dict[str, dict[str, Any]], header: str) -> str:
    out = [f"# {line}" for line in header.splitlines()]
    for name, table in sections.items():
        out += ["", f"[{name}]"]
        out += [f"{k} = {_toml_value(v)}" for k, v in table.items() if v is not None]
    return "\n".join(out) + "\n"


def _atomic_write(path: Path, data: str | bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.parent / f".{path.name}.partial-{os.getpid()}"
    try:
        if isinstance(data, str):
            tmp.write_text(data, encoding="utf-8")
        else:
            tmp.write_bytes(data)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _camera_dict(station: Station) -> dict[str, Any]:
    c = station.camera
    return {"width": c.width, "height": c.height, "bit_depth": c.bit_depth, "gamma": float(c.gamma),
            "black_level_adu": float(c.black_level_adu), "saturation_adu": float(c.saturation_adu),
            "interlaced": c.interlaced, "field_order": c.field_order,
            "read_noise_adu": None if c.read_noise_adu is None else float(c.read_noise_adu),
            "gain_e_per_adu": None if c.gain_e_per_adu is None else float(c.gain_e_per_adu)}


def _lens_dict(station: Station) -> dict[str, Any]:
    ln = station.lens
    return {"projection": ln.projection, "focal_px": float(ln.focal_px), "cx": float(ln.cx),
            "cy": float(ln.cy), "k1": float(ln.k1), "k2": float(ln.k2)}


def _grating_dict(g: Grating) -> dict[str, Any]:
    return {"grooves_per_mm": float(g.grooves_per_mm), "dispersion_angle_deg": float(g.dispersion_angle_deg),
            "tilt_deg": float(g.tilt_deg), "tilt_azimuth_deg": float(g.tilt_azimuth_deg),
            "orders": [int(o) for o in g.orders]}


def station_toml_text(station: Station, grating: Grating, response_name: str | None, *,
                      note: str = "") -> str:
    """The station file (contract section 3) for ``station`` with ``grating`` written in."""
    sections: dict[str, dict[str, Any]] = {
        "station": {"id": station.id, "elevation_m": station.elevation_m},
        "camera": _camera_dict(station),
        "lens": _lens_dict(station),
        "grating": _grating_dict(grating),
    }
    if response_name is not None:
        sections["response"] = {"file": response_name}
    if station.pointing is not None:
        p = station.pointing
        sections["pointing"] = {"altitude_deg": float(p.altitude_deg), "azimuth_deg": float(p.azimuth_deg),
                                "roll_deg": float(p.roll_deg)}
    header = (f"Station {station.id} of the Quillmere Meteor Spectra Network (invented for the demo).\n"
              "Written by meteorspec.simulate; the grating values may be perturbed from the truth.")
    if note:
        header += "\n" + note
    return _toml(sections, header)


def response_csv_text(spec: EventSpec, station: Station) -> str:
    """The station's response curve as written (flat 1.0 if ``spec.flat_response``)."""
    if spec.flat_response or station.response is None:
        wl = np.arange(340.0, 920.0 + 1e-9, 10.0)
        resp = np.ones_like(wl)
    else:
        wl, resp = station.response.wavelength_nm, station.response.response
        resp = resp / resp.max()
    rows = ["wavelength_nm,response"] + [f"{w:.3f},{r:.6g}" for w, r in zip(wl, resp)]
    return "\n".join(rows) + "\n"


# --------------------------------------------------------------------------- truth


def _spec_dict(spec: EventSpec) -> dict[str, Any]:
    d = dataclasses.asdict(spec)
    d["overrides"] = {k: v for k, v in spec.overrides}
    return json.loads(json.dumps(d))


def build_truth(spec: EventSpec, rendered: Rendered, *, event_id: str, written: Grating) -> dict[str, Any]:
    """The truth document of one event (see the module docstring of :mod:`meteorspec.simulate`)."""
    model: EmissionModel = rendered.emission
    station = rendered.station
    truths = rendered.truths
    emitted = np.array([t.emitted_energy_adu for t in truths])
    total_emitted = float(emitted.sum())
    frame_fraction = emitted / total_emitted if total_emitted > 0 else emitted
    # energy = first-order linear ADU for a response of 1 (the unit of the truth file)
    energy = FIRST_ORDER_SHARE * model.share * total_emitted
    lines = model.is_line
    idx = np.flatnonzero(lines)
    e_lines = energy[idx]
    # the same after the atmosphere: what reaches the camera (equal to energy without one)
    observed = FIRST_ORDER_SHARE * model.share * (emitted @ rendered.transmission)
    strong = (e_lines >= _PER_FRAME_LINE_SHARE * e_lines.max()) | (model.group[idx] != "")
    groups = {}
    for g in ("na", "mg", "fe"):
        m = model.group == g
        groups[g] = {"energy": _num(energy[m].sum()),
                     "energy_observed": _num(observed[m].sum()),
                     "per_frame": [_num(energy[m].sum() * f) for f in frame_fraction],
                     "n_lines": int(m.sum()),
                     "lab_nm": [_num(v, 8) for v in model.wavelength_nm[m]]}
    per_frame = {}
    for i, s in zip(idx, strong):
        if s:
            per_frame[f"{model.species[i]} {model.wavelength_nm[i]:.3f}"] = [_num(energy[i] * f, 5)
                                                                              for f in frame_fraction]
    bands = model.kind == "band"
    band_totals = {}
    for label in dict.fromkeys(model.multiplet[bands].tolist()):
        m = bands & (model.multiplet == label)
        band_totals[label] = {"head_nm": _num(model.wavelength_nm[m].max(), 5), "energy": _num(energy[m].sum())}
    cont = model.kind == "continuum"
    comp_energy = {c: _num(energy[model.component == c].sum()) for c in ("main", "hot", "air")}
    grating_true = station.grating
    atm = rendered.atmosphere
    atmosphere: dict[str, Any] = {"applied": atm is not None}
    if atm is not None:
        atmosphere.update(dataclasses.asdict(atm))
        atmosphere["model"] = ("meteorspec.extinction.transmission: Kasten & Young (1989) airmass, "
                               "Bucholtz (1995) Rayleigh depth, Angstrom aerosol, ozone; "
                               "ExtinctionModel.for_station")
    altitude = np.array([t.altitude_deg for t in truths], float)
    airmass = airmass_kasten_young(altitude)
    return {
        "schema": TRUTH_SCHEMA,
        "software_version": __version__,
        "event_id": event_id,
        "station": station.id,
        "note": ("Simulated event of an invented network. energy = linear ADU summed over the "
                 "first-order image for a response of 1.0 and no noise; the rendered first order "
                 "holds energy * T(lambda, altitude) * response(lambda), response = the written CSV "
                 "normalised to max 1, T = the atmosphere's transmission towards the meteor (1 when "
                 "atmosphere.applied is false): energy is above the atmosphere, energy_observed after "
                 "it. Zeroth order holds zeroth_order_share / first_order_share times the transmitted "
                 "response-weighted energy. Pixel (x, y) per contract section 1."),
        "first_order_share": FIRST_ORDER_SHARE,
        "zeroth_order_share": ZEROTH_ORDER_SHARE,
        "psf_sigma_px": spec.psf_sigma_px,
        "spec": _spec_dict(spec),
        "geometry_true": {"camera": _camera_dict(station), "lens": _lens_dict(station),
                          "grating": _grating_dict(grating_true)},
        "geometry_written": {"grating": _grating_dict(written),
                             "perturbed": written != grating_true,
                             "delta": {"grooves_frac": spec.delta_grooves_frac,
                                       "dispersion_angle_deg": spec.delta_dispersion_deg,
                                       "tilt_deg": spec.delta_tilt_deg}},
        "composition": spec.composition,
        "temperature_k": model.temperature_k,
        "hot_temperature_k": model.hot_temperature_k,
        "hot_fraction": _num(model.hot_fraction),
        "air_fraction": _num(model.air_fraction),
        "speed_km_s": spec.speed_km_s,
        "atmosphere": atmosphere,
        "trajectory": {"u0": [_num(v, 10) for v in rendered.trajectory.u0],
                       "tangent": [_num(v, 10) for v in rendered.trajectory.e],
                       "omega_deg_s": _num(np.degrees(rendered.trajectory.omega_rad_s), 8),
                       "t0_s": spec.meteor_start_s, "duration_s": spec.meteor_duration_s},
        "frames": {
            "kind": "field" if station.camera.interlaced else "frame",
            "index": [t.index for t in truths],
            "time_s": [_num(t.time_s, 8) for t in truths],
            "x_mid_px": [_num(t.x_mid_px, 8) if t.emitted_energy_adu > 0 else None for t in truths],
            "y_mid_px": [_num(t.y_mid_px, 8) if t.emitted_energy_adu > 0 else None for t in truths],
            "x_centroid_px": [_num(t.x_centroid_px, 8) for t in truths],
            "y_centroid_px": [_num(t.y_centroid_px, 8) for t in truths],
            "zeroth_flux_adu": [_num(t.zeroth_flux_adu) for t in truths],
            "energy_fraction": [_num(f, 8) for f in frame_fraction],
            "saturated": [t.saturated for t in truths],
            "off_frame": [t.off_frame for t in truths],
            "first_order_on_sensor": [_num(t.first_order_on_sensor, 4) for t in truths],
            "n_substeps": [t.n_substeps for t in truths],
            "altitude_deg": [_num(v, 7) for v in altitude],
            "airmass": [_num(v, 7) for v in airmass],
        },
        "groups": groups,
        "energy_total": {"all": _num(energy.sum()), "lines": _num(energy[lines].sum()),
                         "all_observed": _num(observed.sum()), "lines_observed": _num(observed[lines].sum()),
                         "bands": _num(energy[bands].sum()), "continuum": _num(energy[cont].sum()),
                         **{f"component_{k}": v for k, v in comp_energy.items()}},
        "lines": {
            "species": model.species[idx].tolist(),
            "lab_nm": [_num(v, 8) for v in model.wavelength_nm[idx]],
            "multiplet": model.multiplet[idx].tolist(),
            "group": model.group[idx].tolist(),
            "component": model.component[idx].tolist(),
            "energy": [_num(v, 5) for v in e_lines],
            "energy_observed": [_num(v, 5) for v in observed[idx]],
        },
        "lines_per_frame": per_frame,
        "n2_bands": band_totals,
        "stars": {"x_px": [_num(v, 7) for v in rendered.stars.x_px],
                  "y_px": [_num(v, 7) for v in rendered.stars.y_px],
                  "temperature_k": [_num(v, 5) for v in rendered.stars.temperature_k],
                  "altitude_deg": [_num(v, 7) for v in rendered.star_altitude_deg],
                  "zeroth_flux_adu_s": [_num(v, 5) for v in rendered.star_zeroth_adu_s]},
    }


# --------------------------------------------------------------------------- event


def _swap_in_folder(tmp: Path, final: Path) -> None:
    old = final.parent / f".{final.name}.old-{os.getpid()}"
    if final.exists():
        os.replace(final, old)
    try:
        os.replace(tmp, final)
    except BaseException:
        if old.exists():
            os.replace(old, final)
        raise
    if old.exists():
        shutil.rmtree(old)


def true_geometry(base: SpectralGeometry, truth: dict) -> SpectralGeometry:
    """The geometry a truth JSON says the event was rendered with.

    Parameters
    ----------
    base : SpectralGeometry
        Any geometry of the event's camera (e.g. from the written station file): its grating and
        lens values are replaced by the truth's ``geometry_true``.
    truth : dict
        The parsed truth JSON of :func:`simulate_event`.
    """
    g = truth["geometry_true"]["grating"]
    ln = truth["geometry_true"]["lens"]
    geo = base.with_grating(grooves_per_mm=g["grooves_per_mm"], dispersion_angle_deg=g["dispersion_angle_deg"],
                            tilt_deg=g["tilt_deg"], tilt_azimuth_deg=g["tilt_azimuth_deg"])
    return geo.with_lens(focal_px=ln["focal_px"], k1=ln.get("k1", 0.0) or 0.0)


def simulate_event(spec: EventSpec, out_dir: str | Path, *, truth_dir: str | Path) -> SimulatedEvent:
    """Render ``spec`` and write the event, its station file, response curve and truth.

    Parameters
    ----------
    spec : EventSpec
    out_dir : str or Path
        Receives ``<event id>/`` and ``stations/``. An existing event folder of
        the same id is replaced whole.
    truth_dir : str or Path
        Receives ``<event id>.json``; keep it outside the event folders.

    Returns
    -------
    SimulatedEvent
    """
    out_dir, truth_dir = Path(out_dir), Path(truth_dir)
    station = spec.true_station()
    if spec.video_form == "avi" and station.camera.bit_depth != 8:
        raise ValueError(f"{spec.station}: AVI holds 8-bit video; a {station.camera.bit_depth}-bit camera "
                         "needs video_form 'fits', 'png', 'tiff' or 'fits-frames'")
    rendered = render_event(spec, station=station)
    event_id = spec.event_id(station.id)
    written = written_grating(spec, station.grating)
    truth = build_truth(spec, rendered, event_id=event_id, written=written)

    stations_dir = out_dir / "stations"
    response_name = f"{station.id}_response.csv"
    station_toml = stations_dir / f"{station.id}.toml"
    _atomic_write(stations_dir / response_name, response_csv_text(spec, station))
    note = ""
    if spec.overrides:
        note = f"Base station {spec.station} with " + ", ".join(f"{k} = {v}" for k, v in spec.overrides) + "."
    _atomic_write(station_toml, station_toml_text(station, written, response_name, note=note))

    out_dir.mkdir(parents=True, exist_ok=True)
    final = out_dir / event_id
    tmp = out_dir / f".{event_id}.partial-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    try:
        video_name = _VIDEO_NAME[spec.video_form]
        target = tmp / video_name
        if spec.video_form in _FRAME_FORMAT:
            write_video(str(target) + os.sep, rendered.stored, camera=station.camera, fps=spec.fps,
                        frame_format=_FRAME_FORMAT[spec.video_form])
        else:
            write_video(target, rendered.stored, camera=station.camera, fps=spec.fps)
        event = {"id": event_id, "station": station.id, "start_utc": spec.start_utc, "fps": float(spec.fps),
                 "video": video_name}
        sections = {"event": event}
        if spec.write_speed:
            sections["trajectory"] = {"speed_km_s": round(float(spec.speed_km_s), 1), "speed_err_km_s": 0.5}
        _atomic_write(tmp / "event.toml", _toml(sections, "Simulated event (meteorspec.simulate); "
                                                          "invented demo data."))
        _swap_in_folder(tmp, final)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp)
    truth_json = truth_dir / f"{event_id}.json"
    _atomic_write(truth_json, json.dumps(truth, separators=(",", ":"), allow_nan=False) + "\n")
    return SimulatedEvent(event_id=event_id, event_dir=final, event_toml=final / "event.toml",
                          video=final / video_name, station_toml=station_toml,
                          response_csv=stations_dir / response_name, truth_json=truth_json, truth=truth,
                          spec=spec)
