"""Tests of the stars' first-order ridges (meteorspec.startrace).

The backgrounds are painted here: a star's zeroth order and its first-order light as
Gaussian spots (sigma 1.2 px, a typical video PSF) along a curve, plus sky and Gaussian noise
of a 16-frame mean. Where the curve comes from the grating equation written out in the test
(not from :class:`SpectralGeometry`), the check is external to the project's optics.
"""

import math

import numpy as np
import pytest

from meteorspec import atomic
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.startrace import StarTraces, find_stars, measure_star_traces, trace_offsets_px

SKY_ADU = 6.0
NOISE_ADU = 2.9  # per-frame noise of one pixel: read noise and sky photon noise of a video camera
N_FRAMES = 16


def _splat(img, xs, ys, flux, psf_px=1.2):
    h, w = img.shape
    for x, y, f in zip(xs, ys, flux):
        ix, iy = int(round(x)), int(round(y))
        if not (4 <= ix < w - 4 and 4 <= iy < h - 4):
            continue
        yy, xx = np.mgrid[iy - 4:iy + 5, ix - 4:ix + 5]
        g = np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * psf_px**2))
        img[iy - 4:iy + 5, ix - 4:ix + 5] += f * g / g.sum()


def _star(img, x0, y0, curve, *, zeroth_adu, first_adu, temperature_k=6000.0):
    """Paint one star: ``curve(wl) -> (x, y)`` gives its first order."""
    wl = np.arange(370.0, 900.0, 0.5)
    xs, ys = curve(wl)
    b = atomic.planck_radiance(wl, temperature_k)
    ok = np.isfinite(xs) & np.isfinite(ys)
    _splat(img, [x0], [y0], [zeroth_adu])
    _splat(img, xs[ok], ys[ok], (first_adu * b / b.sum())[ok])


def _noisy(img, rng):
    return img + rng.normal(0.0, NOISE_ADU / math.sqrt(N_FRAMES), img.shape)


def _measure(level, geometry, **kw):
    shape = level.shape
    return measure_star_traces(level, np.full(shape, NOISE_ADU), geometry, n_frames=N_FRAMES,
                               sky_adu=np.full(shape, SKY_ADU), **kw)


def test_ridge_of_a_star_on_axis_follows_the_grating_equation():
    # Grating equation at normal incidence, sin(theta) = m lambda / d (any optics handbook),
    # through a rectilinear (pinhole) lens, r = f tan(theta), along the dispersion direction:
    # written out here, independent of SpectralGeometry. The search starts from a geometry
    # 3 deg off (the station error is up to 4 deg).
    f_px, cx, cy, grooves, angle_deg = 800.0, 320.0, 240.0, 600.0, 5.0
    rng = np.random.default_rng(7)

    def curve(wl):
        theta = np.arcsin(wl * 1e-6 * grooves)
        r = f_px * np.tan(theta)
        a = math.radians(angle_deg)
        return cx + r * math.cos(a), cy + r * math.sin(a)

    img = np.full((480, 900), SKY_ADU)
    _star(img, cx, cy, curve, zeroth_adu=1500.0, first_adu=4000.0)
    start = SpectralGeometry(LensModel("rectilinear", f_px, cx, cy), GratingModel(grooves * 1.02, angle_deg - 3.0))
    traces = _measure(_noisy(img, rng), start)
    assert traces.n_stars == 1 and len(traces) >= 8
    # every ridge point lies on the line from the zeroth order at the dispersion angle;
    # 0.3 px: a few times the centroids' own errors (median ~0.1 px here)
    dx, dy = traces.x_px - cx, traces.y_px - cy
    across = -dx * math.sin(math.radians(angle_deg)) + dy * math.cos(math.radians(angle_deg))
    assert np.all(np.abs(across) < 0.3)
    # the same check through the project's optics at the true values
    true = SpectralGeometry(LensModel("rectilinear", f_px, cx, cy), GratingModel(grooves, angle_deg))
    assert np.all(np.abs(trace_offsets_px(true, traces)) < 0.3)
    # and the starting geometry is rejected by its offsets (3 deg at 200-500 px: 10-26 px)
    assert np.median(np.abs(trace_offsets_px(start, traces))) > 5.0


def test_many_stars_over_the_field_tell_the_angle_and_tilt():
    # an all-sky-like equisolid lens with a tilted grating; stars painted with the true
    # geometry, searched with a geometry off by -3 deg and a different tilt
    true = SpectralGeometry(LensModel("equisolid", 355.0, 511.5, 512.0, 0.008), GratingModel(600.0, -15.0, 0.8, 120.0))
    start = true.with_grating(grooves_per_mm=612.0, dispersion_angle_deg=-18.0, tilt_deg=1.8)
    rng = np.random.default_rng(11)
    img = np.full((1024, 1024), SKY_ADU)
    x0 = rng.uniform(150, 870, 14)
    y0 = rng.uniform(150, 870, 14)
    for x, y in zip(x0, y0):
        _star(img, x, y, lambda wl, x=x, y=y: true.spectrum_pixel(x, y, wl), zeroth_adu=1200.0,
              first_adu=float(rng.uniform(1500.0, 4000.0)), temperature_k=float(rng.uniform(4000, 10000)))
    traces = _measure(_noisy(img, rng), start)
    assert traces.n_stars >= 8
    off = trace_offsets_px(true, traces)
    # within 4 sigma of each point's own error (a few points per star may be pulled by a
    # neighbour's light; the fit downweights them), median well inside
    assert np.median(np.abs(off / traces.sigma_px)) < 1.5
    assert np.mean(np.abs(off / traces.sigma_px) < 4.0) > 0.9


def test_crossing_star_and_faint_star_are_not_measured():
    true = SpectralGeometry(LensModel("rectilinear", 800.0, 320.0, 240.0), GratingModel(600.0, 0.0))
    rng = np.random.default_rng(3)
    img = np.full((480, 900), SKY_ADU)
    _star(img, 100.0, 240.0, lambda wl: true.spectrum_pixel(100.0, 240.0, wl), zeroth_adu=1500.0, first_adu=4000.0)
    # a bright star sitting on the ridge: its zeroth order must not be taken as ridge light
    xs, ys = true.spectrum_pixel(100.0, 240.0, np.array([600.0]))
    _splat(img, [xs[0]], [ys[0] + 1.5], [1500.0])
    # a star too faint for its first order to be seen
    _star(img, 200.0, 100.0, lambda wl: true.spectrum_pixel(200.0, 100.0, wl), zeroth_adu=60.0, first_adu=60.0)
    traces = _measure(_noisy(img, rng), true.with_grating(dispersion_angle_deg=2.0))
    assert traces.n_stars == 1
    near = np.hypot(traces.x_px - xs[0], traces.y_px - ys[0]) < 8.0
    assert not near.any() or np.all(np.abs(trace_offsets_px(true, traces.select(near))) < 0.5)
    assert np.all(np.abs(trace_offsets_px(true, traces)) < 0.5)


def test_empty_sky_and_bad_input():
    geo = SpectralGeometry(LensModel("rectilinear", 800.0, 320.0, 240.0), GratingModel(600.0, 0.0))
    rng = np.random.default_rng(5)
    traces = _measure(_noisy(np.full((480, 640), SKY_ADU), rng), geo)
    assert len(traces) == 0 and traces.n_stars == 0
    assert trace_offsets_px(geo, traces).size == 0
    assert len(StarTraces.concat([traces, traces])) == 0
    with pytest.raises(ValueError, match="n_frames"):
        measure_star_traces(np.zeros((10, 10)), np.ones((10, 10)), geo, n_frames=0)


def test_find_stars_centroids():
    rng = np.random.default_rng(2)
    img = np.full((100, 120), SKY_ADU)
    _splat(img, [40.3, 80.7], [30.6, 70.2], [2000.0, 800.0])
    x, y = find_stars(_noisy(img, rng) - SKY_ADU, np.full(img.shape, NOISE_ADU / math.sqrt(N_FRAMES)))
    assert x.size == 2
    # brightest first; 5x5 centroid of a 1.2 px Gaussian: within 0.1 px (truncation bias < 0.05 px)
    assert abs(x[0] - 40.3) < 0.1 and abs(y[0] - 30.6) < 0.1
    assert abs(x[1] - 80.7) < 0.1 and abs(y[1] - 70.2) < 0.1


def test_night_fit_takes_angle_and_tilt_from_star_ridges(tmp_path):
    # One faint meteor low in a corner of an all-sky field: three lines in a few frames pin the
    # groove density but leave the angle and tilt loose. Ridges of 12 stars over the field (0.1 px
    # across, a typical ridge centroid error above) fix them. Station file off by the issue's
    # -3 deg angle and 2 deg tilt. The geometry is the project's optics (checked against the
    # grating equation and the lens formulas in test_optics.py and the first test here).
    from meteorspec.calibrate import _solution_from_fit, calibrate_night, fit_geometry
    from meteorspec.config import load_station
    from meteorspec.wavesol import LineMeasurements

    true = SpectralGeometry(LensModel("equisolid", 355.0, 511.5, 512.0, 0.008), GratingModel(600.0, -15.0, 0.8, 120.0))
    text = ("[station]\nid = \"QX8\"\n\n[camera]\nwidth = 1024\nheight = 1024\nbit_depth = 8\ngamma = 1.0\n"
            "saturation_adu = 255\ninterlaced = false\n\n[lens]\nprojection = \"equisolid\"\nfocal_px = 355.0\n"
            "cx = 511.5\ncy = 512.0\nk1 = 0.008\n\n[grating]\ngrooves_per_mm = 600.0\ndispersion_angle_deg = -18.0\n"
            "tilt_deg = 2.8\ntilt_azimuth_deg = 120.0\norders = [1]\n")
    (tmp_path / "QX8.toml").write_text(text)
    station = load_station(tmp_path / "QX8.toml")
    start = SpectralGeometry.from_station(station)
    rng = np.random.default_rng(21)
    x0 = np.linspace(300.0, 330.0, 5)
    y0 = np.linspace(700.0, 712.0, 5)
    labs = np.array([517.268, 588.995, 777.194])
    X0, Y0, L = np.repeat(x0, 3), np.repeat(y0, 3), np.tile(labs, 5)
    xs, ys = true.spectrum_pixel(X0, Y0, L)
    tx, ty = true.direction(X0, Y0, L)
    a, c = rng.normal(0.0, 0.4, (2, L.size))
    m = LineMeasurements(event=np.full(L.size, "EV1"), frame=np.repeat(np.arange(5), 3), x0_px=X0, y0_px=Y0,
                         x_px=xs + a * tx - c * ty, y_px=ys + a * ty + c * tx, lab_nm=L, species=np.full(L.size, "X"),
                         tangent_x=tx, tangent_y=ty, sigma_along_px=np.full(L.size, 0.4),
                         sigma_cross_px=np.full(L.size, 0.4))
    sol = _solution_from_fit(fit_geometry(m, start), m, "event")
    sx, sy = rng.uniform(200.0, 820.0, (2, 12))
    wl = np.linspace(430.0, 760.0, 10)
    SX, SY, W = np.repeat(sx, wl.size), np.repeat(sy, wl.size), np.tile(wl, sx.size)
    px, py = true.spectrum_pixel(SX, SY, W)
    qx, qy = true.direction(SX, SY, W)
    e = rng.normal(0.0, 0.1, W.size)
    ok = np.isfinite(px)
    traces = StarTraces(np.full(W.size, "EV1"), np.repeat(np.arange(sx.size), wl.size), SX, SY, W,
                        px - e * qy, py + e * qx, np.full(W.size, 0.1)).select(ok)
    lines_only = calibrate_night([sol], station, fit_lens=False, write=False)
    with_stars = calibrate_night([sol], station, fit_lens=False, write=False, traces=traces)
    err = {name: abs(n.solution.values["dispersion_angle_deg"] + 15.0) for name, n in
           (("lines", lines_only), ("stars", with_stars))}
    # issue 4's 0.3 deg; the ridges' own precision gives far better (0.1 px over ~300 px: ~0.02 deg)
    assert err["stars"] < 0.05 and err["stars"] < err["lines"]
    g = with_stars.solution.values
    tilt = np.array([g["tilt_deg"] * math.cos(math.radians(g["tilt_azimuth_deg"])),
                     g["tilt_deg"] * math.sin(math.radians(g["tilt_azimuth_deg"]))])
    tilt_true = 0.8 * np.array([math.cos(math.radians(120.0)), math.sin(math.radians(120.0))])
    assert np.hypot(*(tilt - tilt_true)) < 0.15
    assert with_stars.stars["kept"] >= 0.9 * len(traces) and with_stars.stars["rms_px"] < 0.15
    assert "star ridges" in with_stars.report()
