"""The demo events of ``sample_events/`` and a seeded, varied random set.

All stations belong to the invented Quillmere network (``calibration/stations/``).
The sample events use binned (2 x 2) read-out modes of the larger cameras so
that the whole demo folder stays small; binning halves the focal length in
pixels and maps the optical centre to ``(c - 0.5) / 2``.
"""

from __future__ import annotations

import dataclasses
import math
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

from ..extinction import camera_to_horizon
from ..optics import PROJECTIONS, SpectralGeometry
from .emission import build_emission
from .render import FIRST_ORDER_SHARE, _altitude_deg, _response, _transmission
from .spec import EventSpec, NuisanceStrengths
from .writer import SimulatedEvent, simulate_event


def binned_overrides(station: str, factor: int = 2) -> dict[str, object]:
    """Camera and lens overrides of a ``factor`` x ``factor`` binned read-out of a base station."""
    base = EventSpec(station).base_station()
    c, ln = base.camera, base.lens
    return {
        "camera.width": c.width // factor, "camera.height": c.height // factor,
        "lens.focal_px": ln.focal_px / factor,
        "lens.cx": (ln.cx + 0.5) / factor - 0.5, "lens.cy": (ln.cy + 0.5) / factor - 0.5,
    }


# Modest perturbations of the written grating values of each sample station (the render
# uses the true values; the truth JSON lists both): grooves fraction, dispersion deg, tilt deg.
_SAMPLE_PERTURBATION = {
    "QM01": (0.004, 0.3, 0.5),
    "QM02": (-0.003, -0.4, 0.3),
    "QM03": (0.006, 0.2, 0.4),
    "QM04": (-0.005, 0.5, -0.4),
}


def _sample(station: str, **kw) -> EventSpec:
    dg, dpsi, dtilt = _SAMPLE_PERTURBATION[station]
    overrides = binned_overrides(station) if station in ("QM01", "QM02", "QM04") else {}
    return EventSpec(station=station, overrides=overrides, delta_grooves_frac=dg, delta_dispersion_deg=dpsi,
                     delta_tilt_deg=dtilt, **kw)


SAMPLE_SPECS: dict[str, EventSpec] = {
    # a bright normal meteor crossing a wide-field camera (binned 640 x 480), lossless AVI
    "bright_normal": _sample(
        "QM01", start_utc="2026-11-14T03:15:22.120Z", video_form="avi", fps=25.0, n_frames=30,
        meteor_start_s=0.14, meteor_duration_s=0.9, start_px=(70.0, 120.0), end_px=(190.0, 330.0),
        peak_energy_adu_s=2.5e7, peak_time_frac=0.55, na=0.22, mg=0.30, fe=0.48, speed_km_s=38.0,
        n_stars=30, sky_adu=4.0, seed=11),
    # a Na-free meteor low in the sky near the rim of an all-sky lens (binned 512 x 512), PNG frames
    "nafree_allsky_edge": _sample(
        "QM02", start_utc="2026-11-14T22:41:07.480Z", video_form="png", fps=25.0, n_frames=26,
        meteor_start_s=0.1, meteor_duration_s=0.75, start_px=(35.0, 300.0), direction_deg=-85.0,
        speed_deg_s=14.0, peak_energy_adu_s=6.0e7, peak_time_frac=0.5, na=0.0, mg=0.42, fe=0.58,
        speed_km_s=24.0, n_stars=40, sky_adu=5.0, seed=22),
    # interlaced PAL-like 8-bit camera with gamma 0.45 (720 x 576, 25 frames/s), AVI
    "interlaced_pal": _sample(
        "QM03", start_utc="2026-11-13T23:02:51.640Z", video_form="avi", fps=25.0, n_frames=16,
        meteor_start_s=0.08, meteor_duration_s=0.5, start_px=(60.0, 90.0), direction_deg=28.0,
        speed_deg_s=22.0, peak_energy_adu_s=2.5e7, peak_time_frac=0.6, na=0.28, mg=0.27, fe=0.45,
        speed_km_s=58.0, n_stars=25, sky_adu=3.0, seed=33),
    # a saturated fireball with a terminal flare on the 12-bit camera (binned 512 x 384), PNG
    "saturated_fireball": _sample(
        "QM04", start_utc="2026-10-03T04:27:13.000Z", video_form="png", fps=25.0, n_frames=30,
        meteor_start_s=0.1, meteor_duration_s=1.0, start_px=(40.0, 80.0), end_px=(200.0, 150.0),
        peak_energy_adu_s=4.0e9, light_curve="flare", flare_amplitude=1.5, peak_time_frac=0.5,
        na=0.15, mg=0.35, fe=0.50, speed_km_s=19.0, n_stars=30, sky_adu=30.0, seed=44),
    # a faint, fast meteor on the wide-field camera (strongest group line SNR ~10 at peak), FITS cube;
    # 4.0e6 (3.0e6 before the render had an atmosphere) keeps that SNR through airmass ~1.5
    "faint_fast": _sample(
        "QM01", start_utc="2026-08-12T01:58:40.360Z", video_form="fits", fps=25.0, n_frames=13,
        meteor_start_s=0.06, meteor_duration_s=0.4, start_px=(120.0, 330.0), direction_deg=-20.0,
        speed_deg_s=30.0, peak_energy_adu_s=4.0e6, peak_time_frac=0.5, na=0.30, mg=0.25, fe=0.45,
        speed_km_s=59.0, n_stars=20, sky_adu=4.0, seed=55),
}


def write_samples(out_dir: str | Path, names: list[str] | None = None) -> list[SimulatedEvent]:
    """Write the sample events (all, or ``names``) into ``out_dir``, truth into ``out_dir/truth``.

    Raises
    ------
    KeyError
        An unknown preset name.
    """
    out_dir = Path(out_dir)
    chosen = list(SAMPLE_SPECS) if names is None else list(names)
    for n in chosen:
        if n not in SAMPLE_SPECS:
            raise KeyError(f"unknown sample preset {n!r}; known: {', '.join(SAMPLE_SPECS)}")
    return [simulate_event(SAMPLE_SPECS[n], out_dir, truth_dir=out_dir / "truth") for n in chosen]


# --------------------------------------------------------------------------- random set


def peak_for_line_snr(spec: EventSpec, snr: float) -> float:
    """``peak_energy_adu_s`` that gives the strongest group line about ``snr`` at the light-curve peak.

    Noise per pixel from sky, photon and read noise; the line's aperture is the
    motion trail in one frame plus 6 px, by 6 px across (an estimate, not a fit).
    The line is seen through the atmosphere at ``start_px`` when the render applies one,
    so the SNR is the one recorded.
    """
    station = spec.true_station()
    cam = station.camera
    geo = SpectralGeometry.from_station(station)
    model = build_emission(spec)
    resp = _response(spec, station, model.wavelength_nm)
    group = model.group != ""
    atmosphere = spec.atmosphere_model(station)
    if atmosphere is not None:
        alt = _altitude_deg(geo.lens.pixel_to_direction(*spec.start_px), camera_to_horizon(station.pointing))
        resp = resp * _transmission(model.wavelength_nm, alt, atmosphere)
    line_share = float(np.max(model.share[group] * resp[group]))
    if not line_share > 0:
        raise ValueError(f"peak_for_line_snr: no group line reaches the camera from start_px {spec.start_px} "
                         "(below the horizon, or a composition without group lines)")
    gain = 1.0 if cam.gain_e_per_adu is None else cam.gain_e_per_adu
    rn = 1.5 if cam.read_noise_adu is None else cam.read_noise_adu
    var_px = spec.sky_adu / gain + rn**2
    exposure_s = 1.0 / spec.fps / (2.0 if cam.interlaced else 1.0)
    trail_px = math.radians(spec.speed_deg_s) * geo.lens.focal_px * exposure_s
    n_px = (trail_px + 6.0) * 6.0
    # solve E / sqrt(n var + E / gain) = snr for the line energy E per exposure
    a = snr**2 / gain
    e_line = 0.5 * (a + math.sqrt(a * a + 4.0 * snr**2 * n_px * var_px))
    return e_line / (line_share * FIRST_ORDER_SHARE * exposure_s)


def random_specs(n: int, *, seed: int, perturb: bool = False) -> list[EventSpec]:
    """A seeded, varied set of ``n`` event specs for tests and benchmarks.

    Cycles through all five lens projections (overriding the base lens),
    and mixes: placements near the edge of the field (moving into it), interlaced cameras,
    saturated fireballs, faint events (strongest group line SNR ~10),
    compositions uniform over the whole ternary, speeds 11-72 km/s and video
    forms the camera can hold. With ``perturb`` the written grating values
    differ from the true ones by up to 1 % (grooves) and 1 deg (angles).

    Each event gets its own station id (``<base>-S<seed>-<k>``) because its
    camera differs from the base.
    """
    rng = np.random.default_rng([seed, 909])
    start = datetime(2026, 11, 14, 0, 0, 0, tzinfo=timezone.utc) + timedelta(seconds=int(rng.integers(0, 3600)))
    bases = ("QM01", "QM02", "QM03", "QM04")
    specs = []
    for k in range(n):
        base = bases[int(rng.integers(0, len(bases)))]
        overrides = dict(binned_overrides(base)) if base != "QM03" else {}
        overrides["lens.projection"] = PROJECTIONS[k % len(PROJECTIONS)]
        if base == "QM02" and overrides["lens.projection"] in ("orthographic", "rectilinear"):
            overrides["lens.focal_px"] = 240.0  # keep a useful field with these projections
        kind = ("normal", "edge", "fireball", "faint", "interlaced")[int(rng.integers(0, 5))]
        if kind == "interlaced" and base != "QM03":
            overrides["camera.interlaced"] = True
        probe = EventSpec(base, overrides=overrides)
        st = probe.true_station()
        w, h = st.camera.width, st.camera.height
        fps = 25.0
        duration = float(rng.uniform(0.4, 1.2))
        n_frames = int(min(36, math.ceil((duration + 0.3) * fps)))
        inward_deg = None
        if kind == "edge":
            margin = 0.06
            side = int(rng.integers(0, 4))
            along = float(rng.uniform(0.2, 0.8))
            sx = (margin * w, (1 - margin) * w, along * w, along * w)[side]
            sy = (along * h, along * h, margin * h, (1 - margin) * h)[side]
            inward_deg = (0.0, 180.0, 90.0, -90.0)[side]
            sx, sy = _spectrum_inside(st, sx, sy, margin)
        else:
            sx, sy = float(rng.uniform(0.15, 0.5) * w), float(rng.uniform(0.2, 0.8) * h)
        u = probe_geometry_ok(st, sx, sy)
        if not u:
            sx, sy = st.lens.cx, st.lens.cy
        a, b, _ = rng.dirichlet([1.0, 1.0, 1.0])
        na, mg = round(float(a), 3), round(float(b), 3)
        fe = round(1.0 - na - mg, 3)  # sum is 1 to round-off (EventSpec checks 1e-9)
        if fe < 0.0:
            fe, mg = 0.0, round(1.0 - na, 3)
        gdelta = (float(rng.uniform(-0.01, 0.01)), float(rng.uniform(-1, 1)), float(rng.uniform(-1, 1)))
        when = start + timedelta(seconds=97 * k + int(rng.integers(0, 60)))
        form = ("avi", "fits", "png", "tiff", "fits-frames")[int(rng.integers(0, 5))]
        if st.camera.bit_depth != 8 and form == "avi":
            form = "png"
        spec = EventSpec(
            station=base, station_id=f"{base}-S{seed}-{k:03d}", overrides=overrides,
            start_utc=when.strftime("%Y-%m-%dT%H:%M:%S.") + f"{int(rng.integers(0, 1000)):03d}Z",
            video_form=form, fps=fps, n_frames=n_frames, meteor_start_s=float(rng.uniform(0.05, 0.2)),
            meteor_duration_s=duration, start_px=(float(sx), float(sy)),
            direction_deg=_direction_deg(float(rng.uniform(-180, 180)), inward_deg),
            speed_deg_s=float(rng.uniform(5.0, 30.0)),
            peak_energy_adu_s=1.0, peak_time_frac=float(rng.uniform(0.3, 0.8)),
            light_curve="flare" if kind == "fireball" else "classic",
            flare_amplitude=1.0 if kind == "fireball" else 0.0,
            na=na, mg=mg, fe=fe, temperature_k=float(rng.uniform(4000.0, 5000.0)),
            speed_km_s=float(rng.uniform(11.0, 72.0)),
            nuisance=NuisanceStrengths(**{f.name: float(rng.uniform(0.5, 1.5))
                                          for f in dataclasses.fields(NuisanceStrengths)}),
            n_stars=int(rng.integers(5, 40)), sky_adu=float(rng.uniform(2.0, 8.0))
            * (16.0 if st.camera.bit_depth == 12 else 1.0),
            delta_grooves_frac=gdelta[0] if perturb else 0.0,
            delta_dispersion_deg=gdelta[1] if perturb else 0.0,
            delta_tilt_deg=gdelta[2] if perturb else 0.0,
            seed=int(seed) * 100003 + k,
        )
        snr = {"faint": 10.0, "fireball": 3000.0}.get(kind, float(rng.uniform(40.0, 150.0)))
        specs.append(dataclasses.replace(spec, peak_energy_adu_s=peak_for_line_snr(spec, snr)))
    return specs


def _direction_deg(draw_deg: float, inward_deg: float | None) -> float:
    """Direction of motion from a uniform draw in [-180, 180) deg.

    A meteor that starts at the edge of the field moves into it (within +-60 deg of the
    inward normal): one that left at once would put almost none of its light, and often none
    of its spectrum, on the sensor. The same draw is mapped, so the random stream and every
    other event of a seed stay as they were.
    """
    if inward_deg is None:
        return draw_deg
    return (inward_deg + draw_deg * (60.0 / 180.0) + 180.0) % 360.0 - 180.0


def _spectrum_inside(station, x_px: float, y_px: float, margin: float,
                     red_nm: float = 800.0) -> tuple[float, float]:
    """Shift an edge start so that the first order up to ``red_nm`` begins on the sensor.

    An edge placement means the zeroth order or the red end of its spectrum at the margin;
    where the spectrum would start beyond the sensor or the lens field (a start on the side
    the grating disperses towards), the start moves back by the overhang.
    """
    geo = SpectralGeometry.from_station(station)
    w, h = station.camera.width, station.camera.height
    for _ in range(12):  # the overhang shrinks about linearly; a few passes settle it
        xr, yr = (float(v) for v in geo.spectrum_pixel(x_px, y_px, red_nm))
        if not (math.isfinite(xr) and math.isfinite(yr)):  # red end beyond the lens field
            x_px, y_px = x_px + 0.2 * (station.lens.cx - x_px), y_px + 0.2 * (station.lens.cy - y_px)
            continue
        dx = min(xr - margin * w, 0.0) + max(xr - (1 - margin) * w, 0.0)
        dy = min(yr - margin * h, 0.0) + max(yr - (1 - margin) * h, 0.0)
        if abs(dx) < 0.5 and abs(dy) < 0.5:
            break
        x_px, y_px = x_px - dx, y_px - dy
    return x_px, y_px


def probe_geometry_ok(station, x_px: float, y_px: float) -> bool:
    """True if the pixel is inside the lens field and looks above the lens's 90-degree circle."""
    geo = SpectralGeometry.from_station(station)
    u = geo.lens.pixel_to_direction(x_px, y_px)
    return bool(np.all(np.isfinite(u)) and u[2] > 0.05)
