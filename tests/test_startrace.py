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
