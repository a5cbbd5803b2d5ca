"""Ridges of the stars' first-order spectra in an event's background, for the night geometry fit.

Every star in the field draws a static first-order spectrum: a streak from its zeroth order
along the dispersion direction, slightly curved. The streak has no lines a calibration could
use (a star's continuum is smooth at these resolutions), but its *ridge* — where the streak
lies across the dispersion — depends only on the dispersion angle, the tilt and the lens,
all over the field, at no cost: the background model already holds it (the stars' light,
averaged over the meteor-free frames). A night of events thus adds tens of such ridges at
field positions no meteor crossed, which pin the angle and the tilt that a few meteor
tracks leave loose; the groove density still comes from the meteors' lines.

Measurement
-----------
Stars are the brightest compact peaks of ``level - sky``. For each, the ridge is sampled at
fixed wavelengths of the *starting* geometry: a profile across the predicted curve (the
star light averaged over a short stretch along it), a first guess of where the ridge lies
from all samples together (a wrong angle moves it in proportion to the distance from the
zeroth order), then a light-weighted centroid within a few pixels of that guess with the
local floor removed. Samples too faint (signal below ``min_snr`` times its noise), touching
the search edge or off the robust smooth curve of their star are dropped, as are stars with
fewer than ``min_points`` samples. The error of each centroid is propagated from the
background's per-pixel noise divided by the number of frames averaged.

The fit uses the perpendicular distance of each measured ridge point from the curve a trial
geometry predicts (:func:`trace_offsets_px`), so the wavelength a point was sampled at does
not matter: a wrong groove density slides the ridge along itself, not across.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import ndimage, optimize

from .optics import SpectralGeometry

SIGMA_FLOOR_PX = 0.05
"""Added in quadrature to each ridge centroid's noise error: the centroid of a sampled PSF on a
curved ridge (bilinear samples, averaged along a straight tangent) carries about this much
systematic error, found on painted stars in tests/test_startrace.py; it also keeps one very
bright sample from outweighing a whole streak."""

TRACE_WAVELENGTHS_NM = (430.0, 760.0)
"""Where the ridge is sampled (starting geometry): inside the usual response of an uncooled
video sensor behind glass, where a star's first order is bright (common practice)."""


@dataclass(frozen=True, eq=False)
class StarTraces:
    """Measured ridge points of stars' first-order spectra (one row per point).

    Attributes
    ----------
    event : ndarray of str
        Event the background came from.
    star : ndarray of int
        Star number within its event.
    x0_px, y0_px : ndarray
        The star's zeroth-order pixel.
    wavelength_nm : ndarray
        Wavelength the point was sampled at under the starting geometry (a label only).
    x_px, y_px : ndarray
        Measured ridge point.
    sigma_px : ndarray
        1-sigma error of the ridge position across the spectrum.
    """

    event: NDArray[np.str_]
    star: NDArray[np.int64]
    x0_px: NDArray[np.float64]
    y0_px: NDArray[np.float64]
    wavelength_nm: NDArray[np.float64]
    x_px: NDArray[np.float64]
    y_px: NDArray[np.float64]
    sigma_px: NDArray[np.float64]

    def __len__(self) -> int:
        return int(self.x_px.size)

    @property
    def n_stars(self) -> int:
        return len(set(zip(self.event.tolist(), self.star.tolist())))

    @classmethod
    def empty(cls) -> StarTraces:
        f = np.zeros(0)
        return cls(np.zeros(0, dtype=str), np.zeros(0, dtype=np.int64), f, f, f, f, f, f)

    @classmethod
    def concat(cls, parts: Sequence[StarTraces]) -> StarTraces:
        parts = [p for p in parts if len(p)]
        if not parts:
            return cls.empty()
        return cls(*(np.concatenate([getattr(p, k) for p in parts]) for k in
                     ("event", "star", "x0_px", "y0_px", "wavelength_nm", "x_px", "y_px", "sigma_px")))

    def select(self, keep: NDArray[np.bool_]) -> StarTraces:
        return StarTraces(*(getattr(self, k)[keep] for k in
                            ("event", "star", "x0_px", "y0_px", "wavelength_nm", "x_px", "y_px", "sigma_px")))


def trace_offsets_px(geometry: SpectralGeometry, traces: StarTraces, *, order: int = 1) -> NDArray[np.float64]:
    """Signed distance (px) of each measured ridge point from the curve ``geometry`` predicts.

    Positive along the tangent turned by +90 deg (:meth:`SpectralGeometry.locate`); NaN where
    the predicted curve does not reach the point's neighbourhood.
    """
    if not len(traces):
        return np.zeros(0)
    _, offset = geometry.locate(traces.x0_px, traces.y0_px, traces.x_px, traces.y_px, order=order)
    return np.asarray(offset, float)


def _star_light(level_adu: NDArray, sky_adu: NDArray | None) -> NDArray[np.float64]:
    """Background level minus the smooth sky (or a wide median where no sky model exists)."""
    level = np.asarray(level_adu, float)
    sky = ndimage.median_filter(level, size=31, mode="nearest") if sky_adu is None else np.asarray(sky_adu, float)
    return level - sky


def find_stars(light_adu: NDArray, sigma_adu: NDArray, *, max_stars: int = 40,
               min_snr: float = 30.0, edge_px: int = 4) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Centroids of the brightest compact peaks of a star-light image, brightest first.

    Parameters
    ----------
    light_adu : ndarray (H, W)
        Star light (background level minus sky).
    sigma_adu : ndarray (H, W)
        1-sigma noise of ``light_adu`` per pixel.
    max_stars : int
        At most this many peaks.
    min_snr : float
        A 3x3 sum at least this many times its noise: bright enough for the first order
        (a few tens of per cent of the light, spread over hundreds of pixels) to be measurable.
    edge_px : int
        Peaks closer than this to the sensor edge are skipped (centroid box incomplete).

    Returns
    -------
    x_px, y_px : ndarray
    """
    box = ndimage.uniform_filter(light_adu, 3, mode="nearest") * 9.0
    box_sigma = np.sqrt(ndimage.uniform_filter(sigma_adu**2, 3, mode="nearest") * 9.0)
    peak = (box == ndimage.maximum_filter(box, size=7, mode="nearest")) & (box > min_snr * box_sigma)
    h, w = light_adu.shape
    peak[:edge_px] = peak[-edge_px:] = False
    peak[:, :edge_px] = peak[:, -edge_px:] = False
    ys, xs = np.nonzero(peak)
    order = np.argsort(-box[ys, xs])[: 3 * max_stars]
    ys, xs = ys[order], xs[order]
    cx, cy = [], []
    for y, x in zip(ys, xs):
        patch = np.clip(light_adu[y - 2:y + 3, x - 2:x + 3], 0.0, None)
        total = patch.sum()
        if total <= 0:
            continue
        yy, xx = np.mgrid[-2:3, -2:3]
        cx.append(x + float((patch * xx).sum() / total))
        cy.append(y + float((patch * yy).sum() / total))
    return np.array(cx[:max_stars]), np.array(cy[:max_stars])


def _profiles(light: NDArray, sigma2: NDArray, xs: NDArray, ys: NDArray, tx: NDArray, ty: NDArray, *,
              half_along_px: float, cross_px: NDArray) -> tuple[NDArray, NDArray]:
    """Mean star light (and its variance) across the curve at each sample: (n_samples, n_cross)."""
    along = np.arange(-half_along_px, half_along_px + 0.5, 1.0)
    nx, ny = -ty, tx
    px = xs[:, None, None] + along[None, :, None] * tx[:, None, None] + cross_px[None, None, :] * nx[:, None, None]
    py = ys[:, None, None] + along[None, :, None] * ty[:, None, None] + cross_px[None, None, :] * ny[:, None, None]
    coords = np.stack([py.ravel(), px.ravel()])
    val = ndimage.map_coordinates(light, coords, order=1, mode="constant", cval=np.nan).reshape(px.shape)
    var = ndimage.map_coordinates(sigma2, coords, order=1, mode="constant", cval=np.nan).reshape(px.shape)
    n = along.size
    # neighbouring samples share pixels (bilinear, 1 px steps): treat the mean's variance as
    # that of n independent pixels, a slight underestimate absorbed by the robust rejection
    return np.mean(val, axis=1), np.mean(var, axis=1) / n


def _ridge(profile: NDArray, var: NDArray, cross_px: NDArray, centre_px: float, *,
           half_px: float, floor_px: float) -> tuple[float, float, float]:
    """Light-weighted centroid within ``half_px`` of ``centre_px`` above the floor outside it.

    Returns ``(offset_px, sigma_px, snr)``; NaN offset when the window leaves the profile.
    """
    d = cross_px - centre_px
    inner = np.abs(d) <= half_px
    outer = (np.abs(d) > half_px + 1.0) & (np.abs(d) <= half_px + 1.0 + floor_px)
    if not inner.any() or outer.sum() < 3 or not np.all(np.isfinite(profile[inner | outer])):
        return math.nan, math.nan, 0.0
    floor = float(np.median(profile[outer]))
    s = profile[inner] - floor
    v = var[inner]
    total = float(s.sum())
    noise = float(np.sqrt(v.sum()))
    if total <= 0:
        return math.nan, math.nan, 0.0
    c = float((s * d[inner]).sum() / total)
    sigma = float(np.sqrt((v * (d[inner] - c) ** 2).sum()) / total)
    return centre_px + c, sigma, total / max(noise, 1e-12)


def measure_star_traces(level_adu: NDArray, noise_adu: NDArray, geometry: SpectralGeometry, *,
                        n_frames: int, sky_adu: NDArray | None = None, order: int = 1, event: str = "",
                        max_stars: int = 40, n_samples: int = 14, max_angle_error_deg: float = 6.0,
                        min_snr: float = 8.0, min_points: int = 5,
                        exclude: Sequence[tuple[float, float, float]] = ()) -> StarTraces:
    """Ridge points of the first-order spectra of the stars in a background model.

    Parameters
    ----------
    level_adu, noise_adu : ndarray (H, W)
        Background level and the per-frame noise of one pixel (:class:`Background`).
    geometry : SpectralGeometry
        Starting geometry (the station file): where to look.
    n_frames : int
        Frames averaged into ``level_adu`` (its noise is ``noise_adu / sqrt(n_frames)``).
    sky_adu : ndarray (H, W), optional
        Smooth sky without stars; default a 31 px median of the level.
    order : int
        The recorded order sampled.
    event : str
        Label of every row.
    max_stars : int
        Brightest peaks examined.
    n_samples : int
        Sample wavelengths over :data:`TRACE_WAVELENGTHS_NM`.
    max_angle_error_deg : float
        How far the true dispersion direction may lie from the starting one: sets the width
        searched across the curve (the issue's +-4 deg station error plus a tilt's turn).
    min_snr : float
        A sample's summed ridge light must exceed this many times its noise.
    min_points : int
        Stars with fewer good samples are dropped.
    exclude : sequence of (x_px, y_px, radius_px)
        Discs whose samples are ignored (for example the meteor's path when the background
        was not re-estimated with it masked).

    Returns
    -------
    StarTraces
        Empty when no star is bright enough.
    """
    if n_frames < 1:
        raise ValueError(f"n_frames must be >= 1, got {n_frames}")
    light = _star_light(level_adu, sky_adu)
    sigma = np.asarray(noise_adu, float) / math.sqrt(n_frames)
    x0s, y0s = find_stars(light, sigma, max_stars=max_stars)
    h, w = light.shape
    sigma2 = sigma**2
    wl = np.linspace(*TRACE_WAVELENGTHS_NM, n_samples)
    rows: list[tuple] = []
    tan_max = math.tan(math.radians(max_angle_error_deg))
    for k, (x0, y0) in enumerate(zip(x0s, y0s)):
        xs, ys = geometry.spectrum_pixel(x0, y0, wl, order)
        tx, ty = geometry.direction(x0, y0, wl, order)
        dist = np.hypot(xs - x0, ys - y0)
        ok = np.isfinite(xs) & np.isfinite(ys) & (xs > 2) & (xs < w - 3) & (ys > 2) & (ys < h - 3)
        for cx, cy, r in exclude:
            ok &= np.hypot(xs - cx, ys - cy) > r
        if ok.sum() < min_points:
            continue
        xs, ys, tx, ty, dist, lam = xs[ok], ys[ok], tx[ok], ty[ok], dist[ok], wl[ok]
        step = float(np.median(np.hypot(np.diff(xs), np.diff(ys)))) if xs.size > 1 else 10.0
        search = float(np.ceil(dist.max() * tan_max + 4.0))
        cross = np.arange(-search - 8.0, search + 8.5, 1.0)
        prof, var = _profiles(light, sigma2, xs, ys, tx, ty, half_along_px=max(1.0, min(6.0, 0.4 * step)),
                              cross_px=cross)
        # first guess: a turn of the whole streak about the zeroth order, offset = dist * tan(da),
        # scored on the profiles summed along the streak; then each sample near its own guess
        slopes = np.linspace(-tan_max, tan_max, int(2 * max_angle_error_deg / 0.1) + 1)
        scores = np.array([np.nansum([np.interp(s * d, cross, p, left=np.nan, right=np.nan)
                                      for d, p in zip(dist, prof)]) for s in slopes])
        if not np.any(np.isfinite(scores)):
            continue
        slope = float(slopes[int(np.nanargmax(scores))])
        pts = []
        for i in range(xs.size):
            c, s, snr = _ridge(prof[i], var[i], cross, slope * dist[i], half_px=3.0, floor_px=4.0)
            if np.isfinite(c) and snr >= min_snr and abs(c - slope * dist[i]) < 2.5:
                pts.append((i, c, s))
        if len(pts) < min_points:
            continue
        idx = np.array([p[0] for p in pts])
        c = np.array([p[1] for p in pts])
        s = np.hypot(np.array([p[2] for p in pts]), SIGMA_FLOOR_PX)
        keep = _smooth_inliers(dist[idx], c, s)
        if keep.sum() < min_points:
            continue
        idx, c, s = idx[keep], c[keep], s[keep]
        mx, my = xs[idx] - c * ty[idx], ys[idx] + c * tx[idx]
        for j in range(idx.size):
            rows.append((event, k, x0, y0, lam[idx[j]], mx[j], my[j], s[j]))
    if not rows:
        return StarTraces.empty()
    cols = list(zip(*rows))
    return StarTraces(np.array(cols[0], dtype=str), np.array(cols[1], dtype=np.int64),
                      *(np.array(c, float) for c in cols[2:]))


def _smooth_inliers(dist: NDArray, offset: NDArray, sigma: NDArray, *, n_sigma: float = 4.0) -> NDArray[np.bool_]:
    """Samples within ``n_sigma`` (robustly scaled) of a robust weighted quadratic in distance.

    The ridge of a real streak is smooth: a rotation and a tilt move it by a low-order curve
    in the distance from the zeroth order; another star's light crossing a sample is not.
    The quadratic is fitted with a soft-L1 loss so that one such sample cannot drag it.
    """
    if dist.size < 4:
        return np.ones(dist.size, bool)
    u = (dist - dist.mean()) / max(float(np.ptp(dist)), 1.0)

    def resid(c: NDArray) -> NDArray:
        return (offset - np.polyval(c, u)) / sigma

    c0 = np.polyfit(u, offset, 2)
    c = optimize.least_squares(resid, c0, loss="soft_l1", f_scale=2.0).x
    r = resid(c)
    scale = max(1.0, 1.4826 * float(np.median(np.abs(r))))
    return np.abs(r) <= n_sigma * scale
