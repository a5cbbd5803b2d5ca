"""Zeroth-order positions of frames whose zeroth order is saturated (calibrate._cuts).

A frame's lines sit at the light-weighted mean of its exposure's streak. Where the zeroth
order's flux is saturated the light curve's slope there comes from the first order
(``calibrate._first_order_slopes``), for the whole-spectrum fit (``_FrameCut.x0_light_px``).
The truth is the quadrature (scipy) of the emitted rate over each exposure, independent of
the calibrator's linear-light-curve model.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
from scipy import ndimage

from meteorspec.calibrate import _cuts, _first_order_slopes, meteor_template
from test_calibrate import WIDE, _exposure_light, _FlatBackground, _Frame


def _event(seed=3):
    # a meteor moving 6 px per exposure along x whose light rises and falls as a Gaussian in
    # time (sigma 4 exposures, peak at frame 12); frames 2-21 lit, contiguous exposures. Its
    # zeroth order is saturated in frames 5-18 (no flux); the brightest line core is saturated
    # too in frames 9 and 14 only (holes that the neighbouring frames do not share)
    n, lit = 24, np.arange(2, 22)
    t_mid = np.arange(n) + 0.5
    v_px = 6.0

    def rate(t):
        return math.exp(-0.5 * ((t - 12.5) / 4.0) ** 2) if 2.0 <= t <= 22.0 else 0.0

    energy = np.zeros(n)
    centre = np.full(n, np.nan)
    for k in lit:
        energy[k], centre[k] = _exposure_light(rate, float(k))
    x = np.where(np.isin(np.arange(n), lit), 60.0 + v_px * t_mid, np.nan)
    y = np.where(np.isfinite(x), 150.0, np.nan)
    flux = energy.copy()
    flux[5:19] = np.nan
    fps = 25.0

    def position(t_s):
        ok = np.isfinite(x)
        return np.interp(np.asarray(t_s) * fps, t_mid[ok], x[ok]), np.interp(np.asarray(t_s) * fps, t_mid[ok], y[ok])

    track = SimpleNamespace(x_px=x, y_px=y, flux_adu=flux, time_s=t_mid / fps, exposure_s=1.0 / fps,
                            position=position, psf_sigma_px=1.3)
    rng = np.random.default_rng(seed)
    shape = (300, 640)
    wl = np.arange(370.0, 900.0, 0.25)
    spec = meteor_template(wl, 0.3)
    frames = []
    for k in range(n):
        img = np.zeros(shape)
        sat = np.zeros(shape, bool)
        if k in lit:
            xs, ys = WIDE.spectrum_pixel(x[k], y[k], wl)
            ok = np.isfinite(xs) & (xs > 0) & (xs < shape[1] - 1) & (ys > 0) & (ys < shape[0] - 1)
            assert ok.mean() > 0.95  # the first order on the sensor
            img, _, _ = np.histogram2d(ys[ok], xs[ok], bins=shape,
                                       range=[[-0.5, shape[0] - 0.5], [-0.5, shape[1] - 0.5]], weights=spec[ok])
            # the frame's light in proportion to its exposure's energy (the brightest frame's line
            # cores reach a few hundred times the noise)
            img = ndimage.gaussian_filter(img, 1.3) * 3e4 * energy[k] / energy[lit].max() / img.sum()
            if k in (9, 14):
                sat = img > 0.5 * img.max()
        frames.append(_Frame(k, (img + rng.normal(0.0, 1.0, shape)).astype(np.float32), sat))
    return frames, track, energy, 60.0 + v_px * centre


def test_first_order_light_curve_places_saturated_frames():
    frames, track, energy, true_x = _event()
    with_first = {c.position: c for c in _cuts(frames, _FlatBackground(1.0), track, max_frames=40, geometry=WIDE)}
    zeroth_only = {c.position: c for c in _cuts(frames, _FlatBackground(1.0), track, max_frames=40)}
    # frames around the saturated stretch (whose slope needs a missing zeroth-order flux): the
    # first order's light curve puts them at their light within 0.05 px, 0.5 nm at 10 nm/px
    # (the line accuracy); the slope is the same central difference of exposure energies
    # as elsewhere, so what is left is its second-order error and the noise
    inner = range(4, 20)
    for k in inner:
        assert abs(with_first[k].x0_light_px - true_x[k]) < 0.05, (k, with_first[k].x0_light_px, true_x[k])
    # from the zeroth order alone (a log-linear curve between its measured ends, frames 4 and 19)
    # the rising frames lag their light and the fading ones lead it, by 0.1 px and more near the
    # ends of the stretch: in opposite directions along the track
    lag = [with_first[k].x0_light_px - zeroth_only[k].x0_light_px for k in inner]
    assert max(lag) > 0.1 and min(lag) < -0.1
    # the centroids the feature method uses (x0_px on fine spectra, x0_linear_px on coarse ones)
    # are not changed
    for k in with_first:
        assert with_first[k].x0_px == zeroth_only[k].x0_px
        assert with_first[k].x0_linear_px == zeroth_only[k].x0_linear_px == zeroth_only[k].x0_light_px


def test_first_order_slopes_ignore_holes_of_saturated_lines():
    frames, track, energy, _ = _event()
    x, y = np.asarray(track.x_px), np.asarray(track.y_px)
    lum = np.isfinite(x)
    measured = lum & np.isfinite(track.flux_adu)
    slopes = _first_order_slopes(frames, _FlatBackground(1.0), x, y, lum, measured, WIDE, order=1, psf_px=1.3)
    # only frames whose own or neighbours' zeroth-order flux is missing
    assert sorted(slopes) == list(range(4, 20))
    for k, g in slopes.items():
        truth = (energy[k + 1] - energy[k - 1]) / (2.0 * energy[k])
        # frames 8-10 and 13-15 compare the light of frames with saturated line cores (9, 14) only
        # on the wavelengths all three can use; 0.02 in g is 0.002 of the streak (noise ~0.005)
        assert abs(g - truth) < 0.02, (k, g, truth)
