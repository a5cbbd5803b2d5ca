"""Zeroth-order tracker: detect the meteor in every frame, fit its trajectory, measure its light curve.

Method
------
1. **Detection** (one pass over all frames, 4x4-binned): background-subtracted
   binned residual, smoothed by a 2x2 box (an 8x8 px window), divided by its
   noise; local maxima above ``detect_sigma`` are candidates. Each candidate is
   scored by its significance and by the light found where
   :class:`~meteorspec.optics.SpectralGeometry` puts its first-order spectrum:
   a true zeroth order has its spectrum there, a line of its own spectrum or
   noise has not. Twinkling stars carry their scintillation in the noise map.
2. **Linking**: a seeded RANSAC over pairs of candidates finds the moving
   source with the most (score-weighted) support; a quadratic in time per axis
   then gathers one candidate per frame. If that source is a line of the
   spectrum, its zeroth order lies at ``SpectralGeometry.zeroth_pixel`` for
   some wavelength: a candidate track found there (in at least 3 frames and
   half the frames where it would be on the sensor) replaces it, repeatedly
   (a line's "parent" can be a bluer line) until the true zeroth order is reached.
3. **Centroids** (a second, partial pass over the luminous frames at full
   resolution): iterated windowed centroid with a window shaped like the
   motion streak, which converges to the streak's centre of symmetry (also
   for a saturated, clipped core). Interlaced fields are measured in
   full-frame y. Flux: background-removed sum in a streak-shaped aperture.
4. **Trajectory**: a great circle on the sky (a straight path seen from the
   station) through :meth:`LensModel.pixel_to_direction`: the pole by weighted
   SVD of the measured directions, the angle along it a polynomial in time
   (a straight first pass that rejects gross outliers, then degree 1-3 chosen
   by an F-test with about 6 points per term). A centroid is modelled as the
   light-weighted mean angle over its exposure, with an exponential light
   curve inside the exposure from the neighbouring frames' fluxes; outliers
   are rejected iteratively and the pole refitted until stable. The first and
   last luminous frames (lit for part of their exposure) get 20x their error.
5. **Spectrum location**: where the zeroth order is off the sensor or not
   seen, the residual sampled along the predicted first-order curve for trial
   positions along the great circle is compared with the spectrum template
   of the measured frames (matched filter for presence, normalised
   cross-correlation for position); located positions enter the fit with a
   2 px error. Frames are searched outward from the measured span until three
   in a row fail.

Returns an empty, falsy :class:`Track` with the reason when no meteor is found.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .background import BIN_PX, Background, BinnedFrames, bin_frames, bin_rows, frame_rows
from .config import Camera
from .optics import LensModel, SpectralGeometry

__all__ = ["Track", "GreatCircle", "find_track", "remeasure_light_curve", "light_near_source", "unless_a_line",
           "STATUSES", "FLAGS"]

STATUSES = ("measured", "saturated", "off_frame", "from_spectrum", "interpolated", "absent")
FLAGS = ("saturated", "zeroth_order_off_frame", "motion_parallel_to_dispersion", "low_snr",
         "zeroth_order_from_spectrum", "zeroth_order_not_found")

# Wavelengths sampled along a first-order spectrum (nm): the visible range a
# silicon sensor records well; meteor lines from Ca II 393 nm to O I 777 nm (common practice).
_SPECTRUM_NM = (400.0, 800.0)
# Samples for locating a zeroth order from its spectrum reach beyond it: the dark ends anchor the position.
_LOCATE_NM = (330.0, 950.0)
_PARALLEL_LIMIT_DEG = 20.0  # from the issue: streak within ~20 deg of the dispersion smears lines
# First-order light shorter than this does not reach the ground: the atmosphere's ozone cuts
# off below about 300 nm (common practice, from memory), and lens glass below about 350 nm.
_DARK_BELOW_NM = 300.0
# Median over the tracked frames of the light along the first-order curve within
# _DARK_BELOW_NM of the tracked source (both sides) over its light at 400-800 nm, above which
# the source is a line of its own spectrum and not a zeroth order (:func:`light_near_source`).
# On the 144 events of ``bench/plasma_end_to_end.py --seed 5|6|7|8``, with true and perturbed
# station files, the zeroth orders give |ratio| <= 0.04 against the final background (up to 1.1
# against a first one that holds a fireball's spectrum); a line taken for the zeroth order
# (seed-8 event 004) gave 2.4 and 16.
_NOT_ZEROTH_RATIO = 0.5
_LOW_SNR = 10.0             # median per-frame zeroth-order SNR below this: "low_snr"


# --------------------------------------------------------------------------- trajectory model


@dataclass(frozen=True, eq=False)
class GreatCircle:
    """Motion along a great circle: ``u(t) = cos(a) e1 + sin(a) e2``, ``a = poly(t - t_ref_s)``.

    Attributes
    ----------
    lens : LensModel
    e1, e2 : ndarray of shape (3,)
        Orthonormal basis of the circle's plane (camera frame); ``pole = e1 x e2``.
    coeffs : ndarray
        Angle polynomial in ``t - t_ref_s`` (rad), lowest power first.
    t_ref_s : float
    """

    lens: LensModel
    e1: np.ndarray
    e2: np.ndarray
    coeffs: np.ndarray
    t_ref_s: float

    @property
    def pole(self) -> np.ndarray:
        return np.cross(self.e1, self.e2)

    def angle(self, time_s) -> np.ndarray:
        return np.polynomial.polynomial.polyval(np.asarray(time_s, float) - self.t_ref_s, self.coeffs)

    def direction(self, time_s) -> np.ndarray:
        a = self.angle(time_s)
        return np.cos(a)[..., None] * self.e1 + np.sin(a)[..., None] * self.e2

    def pixel(self, time_s) -> tuple[np.ndarray, np.ndarray]:
        return self.lens.direction_to_pixel(self.direction(time_s))


# --------------------------------------------------------------------------- result


@dataclass(frozen=True, eq=False)
class Track:
    """The meteor's zeroth order in every frame (or field) of an event.

    Attributes
    ----------
    time_s : ndarray of shape (n,)
        Mid-exposure time of every frame or field (contract section 1).
    x_px, y_px : ndarray of shape (n,)
        Fitted zeroth-order position at ``time_s``; NaN outside the luminous span.
    x_meas_px, y_meas_px : ndarray of shape (n,)
        Measured centroid (exposure-averaged), or the position located from the
        spectrum; NaN where nothing was measured.
    flux_adu : ndarray of shape (n,)
        Zeroth-order light curve: background-removed aperture sum in linear ADU
        (per full-frame area: a field's sum is doubled); NaN where not measurable
        (saturated, off the sensor, outside the span).
    status : ndarray of str, shape (n,)
        One of :data:`STATUSES` per frame.
    flags : tuple of str
        From :data:`FLAGS`.
    reason : str
        ``""`` when a meteor was found, else why not.
    frame_index : ndarray of int, shape (n,)
        ``Frame.index`` of each entry.
    exposure_s : float
        Exposure of one frame (field).
    flux_err_adu, snr : ndarray of shape (n,)
        1-sigma error of ``flux_adu`` and the zeroth-order significance.
    trajectory : GreatCircle or None
        The fitted model behind :meth:`position`.
    """

    time_s: np.ndarray
    x_px: np.ndarray
    y_px: np.ndarray
    x_meas_px: np.ndarray
    y_meas_px: np.ndarray
    flux_adu: np.ndarray
    status: np.ndarray
    flags: tuple[str, ...] = ()
    reason: str = ""
    frame_index: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    exposure_s: float = float("nan")
    flux_err_adu: np.ndarray = field(default_factory=lambda: np.zeros(0))
    snr: np.ndarray = field(default_factory=lambda: np.zeros(0))
    trajectory: GreatCircle | None = None
    psf_sigma_px: float = float("nan")

    def __bool__(self) -> bool:
        return self.trajectory is not None and not self.reason

    @property
    def luminous(self) -> np.ndarray:
        """Boolean mask of the frames in the luminous span (first to last supported frame)."""
        return self.status != "absent"

    @property
    def first_frame(self) -> int:
        """Position (into the frame sequence) of the first luminous frame; -1 if none."""
        idx = np.flatnonzero(self.luminous)
        return int(idx[0]) if idx.size else -1

    @property
    def last_frame(self) -> int:
        """Position of the last luminous frame; -1 if none."""
        idx = np.flatnonzero(self.luminous)
        return int(idx[-1]) if idx.size else -1

    def position(self, time_s) -> tuple[np.ndarray, np.ndarray]:
        """Fitted zeroth-order pixel at any time (inside an exposure: a point of the motion streak).

        NaN more than one exposure outside the luminous span, or for an empty track.
        """
        t = np.asarray(time_s, float)
        if not self:
            nan = np.full(t.shape, np.nan)
            return nan, nan.copy()
        lum = self.time_s[self.luminous]
        lo, hi = lum.min() - 1.5 * self.exposure_s, lum.max() + 1.5 * self.exposure_s
        x, y = self.trajectory.pixel(t)
        inside = (t >= lo) & (t <= hi)
        return np.where(inside, x, np.nan), np.where(inside, y, np.nan)

    def velocity_px_s(self, time_s) -> tuple[np.ndarray, np.ndarray]:
        """Image velocity ``(dx/dt, dy/dt)`` in px/s (central difference of :meth:`position`)."""
        t = np.asarray(time_s, float)
        h = 1e-4 * (self.exposure_s if np.isfinite(self.exposure_s) else 0.04)
        xp, yp = self.position(t + h)
        xm, ym = self.position(t - h)
        return (xp - xm) / (2 * h), (yp - ym) / (2 * h)


def _empty_track(times, index, exposure, reason: str) -> Track:
    n = len(times)
    nan = np.full(n, np.nan)
    return Track(time_s=np.asarray(times, float), x_px=nan, y_px=nan.copy(), x_meas_px=nan.copy(),
                 y_meas_px=nan.copy(), flux_adu=nan.copy(), status=np.full(n, "absent", dtype="<U13"),
                 flags=(), reason=reason, frame_index=np.asarray(index, int), exposure_s=exposure,
                 flux_err_adu=nan.copy(), snr=nan.copy(), trajectory=None)


# --------------------------------------------------------------------------- detection (pass 1)


class _BinnedModel:
    """Binned background level and 2x2-box noise of one field parity, built on first use."""

    def __init__(self, background: Background, y_start_px: int, y_step_px: int, n_rows: int):
        by = max(BIN_PX // y_step_px, 1)
        self.by, self.bx = by, BIN_PX
        self.y0, self.step = y_start_px, y_step_px
        rows = slice(y_start_px, None, y_step_px)
        level = background.level_adu[rows][:n_rows]
        var = background.noise_adu[rows][:n_rows].astype(np.float32) ** 2
        self.level = bin_rows(level, by, BIN_PX)
        vb = bin_rows(var, by, BIN_PX) / (by * BIN_PX)  # variance of a block mean
        self.noise2 = np.sqrt(_box2(vb) / 4.0)            # of the mean of 2x2 block means

    def snr(self, binned_frame: np.ndarray) -> np.ndarray:
        """The frame's residual over the level, 2x2-box smoothed, in units of its noise."""
        return _box2(binned_frame - self.level) / (4.0 * self.noise2)

    def to_pixel(self, i, j):
        """Full-frame pixel of the centre of the 2x2 box at smoothed index (i, j)."""
        row = (np.asarray(i, float) + 1.0) * self.by - 0.5
        return (np.asarray(j, float) + 1.0) * self.bx - 0.5, self.y0 + self.step * row

    def to_index(self, x, y):
        """Nearest smoothed-map index of full-frame pixels (may be out of range)."""
        row = (np.asarray(y, float) - self.y0) / self.step
        i = np.rint((row + 0.5) / self.by - 1.0)
        j = np.rint((np.asarray(x, float) + 0.5) / self.bx - 1.0)
        return i, j


def _box2(a: np.ndarray) -> np.ndarray:
    return a[:-1, :-1] + a[1:, :-1] + a[:-1, 1:] + a[1:, 1:]


def _local_maxima(snr: np.ndarray, threshold: float, max_n: int) -> tuple[np.ndarray, np.ndarray]:
    """Indices (i, j) of the strongest local maxima above ``threshold`` (3x3 neighbourhood, NMS 2)."""
    flat = np.flatnonzero(snr > threshold)
    if flat.size == 0:
        return np.zeros(0, int), np.zeros(0, int)
    if flat.size > 4000:
        flat = flat[np.argpartition(snr.ravel()[flat], -4000)[-4000:]]
    h, w = snr.shape
    i, j = np.divmod(flat, w)
    v = snr.ravel()[flat]
    pad = np.pad(snr, 1, constant_values=-np.inf)
    is_max = np.ones(flat.size, bool)
    for di in (-1, 0, 1):
        for dj in (-1, 0, 1):
            if di or dj:
                is_max &= v >= pad[i + 1 + di, j + 1 + dj]
    i, j, v = i[is_max], j[is_max], v[is_max]
    order = np.argsort(-v, kind="stable")
    keep: list[int] = []
    for k in order:
        if all(abs(i[k] - i[m]) > 2 or abs(j[k] - j[m]) > 2 for m in keep):
            keep.append(k)
            if len(keep) >= max_n:
                break
    keep = np.array(keep, int)
    return i[keep], j[keep]


def _spectrum_support(geometry: SpectralGeometry, orders, x, y, snr_map, model: _BinnedModel,
                      wl_nm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean smoothed SNR along the predicted first-order curves of candidates, and the points used."""
    sums = np.zeros(x.size)
    counts = np.zeros(x.size)
    for m in orders:
        xs, ys = geometry.spectrum_pixel(x[:, None], y[:, None], wl_nm[None, :], m)
        i, j = model.to_index(xs, ys)
        ok = np.isfinite(i) & np.isfinite(j) & (i >= 0) & (i < snr_map.shape[0]) & (j >= 0) & (j < snr_map.shape[1])
        vals = np.where(ok, snr_map[np.where(ok, i, 0).astype(int), np.where(ok, j, 0).astype(int)], 0.0)
        sums += vals.sum(axis=1)
        counts += ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan), counts


# --------------------------------------------------------------------------- centroids (pass 2)


@dataclass
class _Measure:
    x: float = np.nan
    y: float = np.nan
    flux: float = np.nan
    flux_err: float = np.nan
    snr: float = np.nan
    saturated: bool = False
    edge: bool = False
    ok: bool = False


def _segment_distance(px, py, ax, ay, dx, dy):
    """Distance of points to the segment from (ax-dx, ay-dy) to (ax+dx, ay+dy)."""
    l2 = dx * dx + dy * dy
    if l2 < 1e-12:
        return np.hypot(px - ax, py - ay)
    s = np.clip(((px - ax) * dx + (py - ay) * dy) / l2, -1.0, 1.0)
    return np.hypot(px - ax - s * dx, py - ay - s * dy)


def _measure(frame, background: Background, x0: float, y0: float, half_dx: float, half_dy: float, *,
             window_px: float, aperture_px: float, width: int, height: int) -> _Measure:
    """Windowed centroid and aperture flux of a streak centred near (x0, y0) with half-extent (half_dx, half_dy)."""
    res = _Measure()
    reach = np.hypot(half_dx, half_dy) + aperture_px + 2.0
    if not (np.isfinite(x0) and np.isfinite(y0)):
        return res
    # a streak cut by the sensor edge has a biased centroid: mark it
    res.edge = (min(x0 - abs(half_dx), y0 - abs(half_dy)) < aperture_px - 0.5 or
                x0 + abs(half_dx) > width - 1 - aperture_px + 0.5 or
                y0 + abs(half_dy) > height - 1 - aperture_px + 0.5)
    x_lo, x_hi = int(np.floor(x0 - reach)) - 2, int(np.ceil(x0 + reach)) + 3
    y_lo, y_hi = int(np.floor(y0 - reach)) - 2, int(np.ceil(y0 + reach)) + 3
    x_lo, x_hi = max(x_lo, 0), min(x_hi, width)
    r_lo = max(int(np.floor(frame.row_of_y(y_lo))), 0)
    r_hi = min(int(np.ceil(frame.row_of_y(y_hi))) + 1, frame.shape[0])
    if x_hi - x_lo < 3 or r_hi - r_lo < 2:
        res.edge = True
        return res
    sig, sat = frame.pixels(slice(r_lo, r_hi), slice(x_lo, x_hi))
    rows = slice(frame.y_start_px + frame.y_step_px * r_lo, None, frame.y_step_px)
    level = background.level_adu[rows][: r_hi - r_lo, x_lo:x_hi]
    r = sig - level
    yy = (frame.y_start_px + frame.y_step_px * np.arange(r_lo, r_hi, dtype=float))[:, None]
    xx = np.arange(x_lo, x_hi, dtype=float)[None, :]
    cx, cy = float(x0), float(y0)
    inv2s2 = 1.0 / (2.0 * window_px**2)
    for _ in range(30):
        d = _segment_distance(xx, yy, cx, cy, half_dx, half_dy)
        wr = np.exp(-(d * d) * inv2s2) * r
        s = wr.sum()
        if not s > 0:
            return res
        nx, ny = float((wr * xx).sum() / s), float((wr * yy).sum() / s)
        step = np.hypot(nx - cx, ny - cy)
        # fixed point of the windowed centroid = centre of symmetry; damp a runaway start
        if step > 3.0:
            nx, ny = cx + 3.0 * (nx - cx) / step, cy + 3.0 * (ny - cy) / step
        cx, cy = nx, ny
        if step < 1e-3:
            break
    # a streak cut by the sensor edge has a biased centroid: judge from the converged centre
    res.edge = res.edge or bool(min(cx - abs(half_dx), cy - abs(half_dy)) < aperture_px - 0.5 or
                                cx + abs(half_dx) > width - 1 - aperture_px + 0.5 or
                                cy + abs(half_dy) > height - 1 - aperture_px + 0.5)
    d = _segment_distance(xx, yy, cx, cy, half_dx, half_dy)
    ap = d <= aperture_px
    var_rows = frame_rows(background.noise_adu, frame)[r_lo:r_hi, x_lo:x_hi].astype(np.float64) ** 2
    var = var_rows + np.maximum(r, 0.0) / background.gain_e_per_adu
    flux = float(r[ap].sum())
    err = float(np.sqrt(var[ap].sum()))
    res.x, res.y = cx, cy
    res.flux, res.flux_err = flux * frame.y_step_px, err * frame.y_step_px
    res.snr = flux / err if err > 0 else np.nan
    core = d <= max(aperture_px * 0.6, 1.5)
    res.saturated = bool(sat[core].any())
    res.ok = True
    return res


# --------------------------------------------------------------------------- fitting


def _exposure_powers(tau: np.ndarray, exposure: float, deg: int, slope: np.ndarray | None = None) -> np.ndarray:
    """Light-weighted mean of ``t^p`` over each exposure ``[tau - e/2, tau + e/2]``, p = 0..deg.

    A centroid is the light-weighted mean position over the exposure; within one
    exposure the light curve is taken as exponential, ``exp(slope (t - tau))``
    (``slope`` = d ln(flux)/dt in 1/s from the neighbouring frames' fluxes), which is
    exact for the steep rise and fall at the ends of a meteor's flight.
    """
    sub = (np.arange(16) + 0.5) / 16.0 - 0.5  # midpoints of 16 sub-intervals
    tt = tau[:, None] + exposure * sub[None, :]
    if slope is None:
        w = np.ones_like(tt)
    else:
        w = np.exp(slope[:, None] * exposure * sub[None, :])
    w /= w.sum(axis=1, keepdims=True)
    return np.stack([(w * tt**p).sum(axis=1) for p in range(deg + 1)], axis=1)


def _light_slope(t: np.ndarray, flux: np.ndarray, exposure: float, usable: np.ndarray) -> np.ndarray:
    """Relative rate of change of the light curve at each frame, d ln(flux)/dt in 1/s.

    Only ``usable`` frames (measured, positive flux) inform it: central
    differences where both neighbours are usable (exact for an exponential rise
    or fall), else a quadratic in ln(flux) through the nearest usable frames.
    Clipped at a factor e^8 per exposure.
    """
    ok = usable & np.isfinite(flux) & (flux > 0)
    lf = np.log(np.where(ok, flux, 1.0))
    out = np.zeros(t.size)
    idx = np.flatnonzero(ok)
    for k in range(t.size):
        if 0 < k < t.size - 1 and ok[k - 1] and ok[k + 1]:
            out[k] = (lf[k + 1] - lf[k - 1]) / (t[k + 1] - t[k - 1])
            continue
        if idx.size < 2:
            continue
        near = idx[np.argsort(np.abs(t[idx] - t[k]), kind="stable")[:5]]
        deg = 2 if near.size >= 4 else 1
        c = np.polynomial.polynomial.polyfit(t[near] - t[k], lf[near], deg)
        out[k] = c[1]
    return np.clip(out, -8.0 / exposure, 8.0 / exposure)


def _fit_great_circle(t, x, y, sigma_px, lens: LensModel, exposure: float, *, slope: np.ndarray | None = None,
                      max_deg: int = 3, reject: float = 4.0) -> tuple[GreatCircle | None, np.ndarray]:
    """Robust great-circle fit of centroids; returns the model and the inlier mask."""
    u = lens.pixel_to_direction(x, y)
    good = np.all(np.isfinite(u), axis=1) & np.isfinite(sigma_px)
    inl = good.copy()
    t_ref = float(np.median(t[good])) if good.any() else 0.0
    model = None
    for it in range(8):
        if inl.sum() < 2:
            return None, inl
        w = 1.0 / sigma_px[inl]
        _, _, vt = np.linalg.svd(u[inl] * w[:, None], full_matrices=False)
        pole = vt[-1]
        mid = u[inl][np.argsort(t[inl])[inl.sum() // 2]]
        e1 = mid - np.dot(mid, pole) * pole
        e1 /= np.linalg.norm(e1)
        e2 = np.cross(pole, e1)
        ang = np.arctan2(u @ e2, u @ e1)
        # local image scale (px per rad along the circle) to weight angles by pixel errors
        eps = 1e-5
        xa, ya = lens.direction_to_pixel(np.cos(ang + eps)[:, None] * e1 + np.sin(ang + eps)[:, None] * e2)
        xb, yb = lens.direction_to_pixel(np.cos(ang - eps)[:, None] * e1 + np.sin(ang - eps)[:, None] * e2)
        scale = np.hypot(xa - xb, ya - yb) / (2 * eps)
        wa = np.where(inl, scale / sigma_px, 0.0)
        tau = t - t_ref
        n_in = int(inl.sum())
        best = None
        # first pass straight (gross outliers must not be fitted by a curve); then a degree
        # the number of points supports (about 6 points per extra term)
        top = 1 if it == 0 else min(max_deg, max(1, (n_in - 2) // 6))
        for deg in range(1, top + 1):
            a_mat = _exposure_powers(tau, exposure, deg, slope)
            coef = np.linalg.lstsq(a_mat[inl] * wa[inl, None], ang[inl] * wa[inl], rcond=None)[0]
            ssr = float(np.sum(((a_mat[inl] @ coef - ang[inl]) * wa[inl]) ** 2))
            if best is not None:
                f_stat = (best[2] - ssr) / max(ssr / max(n_in - deg - 1, 1), 1e-12)
                if f_stat < 10.0:  # not a significant improvement (F(1, n) 99.8 % is ~10)
                    break
            best = (deg, coef, ssr)
        deg, coef, _ = best
        model = GreatCircle(lens=lens, e1=e1, e2=e2, coeffs=coef, t_ref_s=t_ref)
        # residuals in px at the exposure-averaged angle
        a_pred = _exposure_powers(tau, exposure, deg, slope) @ coef
        xp, yp = lens.direction_to_pixel(np.cos(a_pred)[:, None] * e1 + np.sin(a_pred)[:, None] * e2)
        dist = np.hypot(xp - x, yp - y)
        res = np.where(good, dist / sigma_px, np.inf)
        s_rob = max(1.4826 * float(np.median(res[inl])), 1.0)
        new = good & (res <= reject * s_rob)
        if it == 0:
            # a straight first pass over a curved path leaves px-level residuals: reject only gross ones
            new = good & (dist <= max(5.0, 5.0 * float(np.median(dist[inl]))))
        if np.array_equal(new, inl):
            break
        inl = new
    return model, inl


def _ransac_link(t, x, y, score, frame_pos, speed_min, tol_px, rng, n_iter=400):
    """Best constant-velocity consensus among candidates (one per frame); inlier candidate indices."""
    n = t.size
    if n < 2:
        return np.zeros(0, int)
    p = score / score.sum()
    best_val, best_idx = -1.0, np.zeros(0, int)
    a_all = rng.choice(n, size=n_iter, p=p)
    b_all = rng.choice(n, size=n_iter, p=p)
    for a, b in zip(a_all, b_all):
        dt = t[b] - t[a]
        if frame_pos[a] == frame_pos[b] or dt == 0:
            continue
        vx, vy = (x[b] - x[a]) / dt, (y[b] - y[a]) / dt
        px, py = x[a] + vx * (t - t[a]), y[a] + vy * (t - t[a])
        d = np.hypot(x - px, y - py)
        ok = d <= tol_px
        if np.hypot(vx, vy) < speed_min or ok.sum() < 3:
            continue
        idx = _one_per_frame(np.flatnonzero(ok), frame_pos, score)
        val = score[idx].sum()
        if val > best_val:
            best_val, best_idx = val, idx
    return best_idx


def _parent_link(link, c_pos, c_x, c_y, score, geometry, orders, width, height, frame_dt, *, tol_px=6.0,
                 angle_offsets_deg=tuple(np.arange(-6.0, 6.01, 1.0))):
    """Candidates that would be the zeroth order if the linked source were a line of its spectrum.

    If the linked source is order ``m`` at wavelength ``lam``, its zeroth order is at
    ``geometry.zeroth_pixel(x, y, lam, m)``. For each trial ``lam`` count the linked
    frames with a candidate there (within ``tol_px``); a parent seen in at least 3
    frames and in half of the frames where it would be on the sensor replaces the
    link. A line's parent may be a shorter-wavelength line (the grating shifts
    tangential direction cosines additively), so the caller repeats until none is found.
    Returns an empty array when there is no parent.
    """
    lx, ly, lpos = c_x[link], c_y[link], c_pos[link]
    step = np.hypot(np.diff(lx), np.diff(ly)) / np.maximum(np.diff(lpos), 1)
    streak = float(np.median(step)) if step.size else 0.0
    lam = np.arange(20.0, 1000.0, 2.0)
    starts = np.searchsorted(c_pos, lpos, side="left")
    ends = np.searchsorted(c_pos, lpos, side="right")
    best = (0, None)
    # the station's dispersion angle may be off by a few degrees: 3.5 deg puts a parent 130 px
    # away 8 px beside where the station values expect it, beyond ``tol_px`` (seed-5 events 008
    # and 018 of bench/plasma_end_to_end.py). The trial angles span the event calibration's own
    # search (calibrate_event's angle_range_deg, +-6 deg) in 1 deg steps, which keep a parent up
    # to ~680 px away within ``tol_px`` (half a step: 680 px x tan 0.5 deg = 5.9 px)
    trials = [(m, g) for g in [geometry] + [geometry.with_grating(
        dispersion_angle_deg=geometry.grating.dispersion_angle_deg + d) for d in angle_offsets_deg if d]
        for m in orders]
    for m, geo in trials:
        zx, zy = geo.zeroth_pixel(lx[:, None], ly[:, None], lam[None, :], m)
        on = (zx >= 2) & (zx <= width - 3) & (zy >= 2) & (zy <= height - 3)
        # a parent must be well away from the source itself (and from its own motion streak)
        far = np.hypot(zx - lx[:, None], zy - ly[:, None]) > streak + 2 * tol_px
        hit = np.zeros(zx.shape, bool)
        hit_idx = np.full(zx.shape, -1)
        for i in range(link.size):
            cidx = np.arange(starts[i], ends[i])
            cidx = cidx[cidx != link[i]]
            if cidx.size == 0:
                continue
            d = np.hypot(c_x[cidx][:, None] - zx[i][None, :], c_y[cidx][:, None] - zy[i][None, :])
            d = np.where(np.isfinite(d), d, np.inf)
            k = np.argmin(d, axis=0)
            hit[i] = d[k, np.arange(lam.size)] <= tol_px
            hit_idx[i] = cidx[k]
        hit &= on & far
        n_hit = hit.sum(axis=0)
        n_on = (on & far).sum(axis=0)
        ok = (n_hit >= 3) & (n_hit >= 0.5 * n_on)
        if ok.any():
            j = int(np.argmax(np.where(ok, n_hit, -1)))
            if n_hit[j] > best[0]:
                best = (int(n_hit[j]), hit_idx[hit[:, j], j])
    if best[1] is None:
        return np.zeros(0, int)
    return _one_per_frame(np.unique(best[1]), c_pos, score)


def _one_per_frame(idx, frame_pos, score):
    order = idx[np.argsort(-score[idx], kind="stable")]
    _, first = np.unique(frame_pos[order], return_index=True)
    return np.sort(order[first])


def _poly_predict(t, x, y, t_new, deg=2):
    deg = min(deg, max(t.size - 2, 0))
    cx = np.polynomial.polynomial.polyfit(t, x, deg)
    cy = np.polynomial.polynomial.polyfit(t, y, deg)
    return (np.polynomial.polynomial.polyval(t_new, cx), np.polynomial.polynomial.polyval(t_new, cy))


# --------------------------------------------------------------------------- main entry


def find_track(frames: Sequence, background: Background, geometry: SpectralGeometry, *, camera: Camera,
               orders: Sequence[int] = (1,), detect_sigma: float = 5.0, max_candidates: int = 24,
               psf_sigma_px: float | None = None, seed: int | None = 0,
               binned: BinnedFrames | None = None) -> Track:
    """Detect the meteor's zeroth order in every frame and fit its trajectory.

    Parameters
    ----------
    frames : sequence of Frame
        Every frame (or field) of the event, in time order; ``len()`` and
        indexing are used. Iterated once in full (unless ``binned`` is given); the luminous frames are then
        read once more by index (a frame whose zeroth order is not seen may be
        read a third time for the spectrum search).
    background : Background
        From :func:`~meteorspec.background.estimate_background` on the same frames.
    geometry : SpectralGeometry
        Lens and grating; decides where a zeroth order's spectrum must be.
    camera : Camera
        Sensor size.
    orders : sequence of int
        Diffraction orders recorded on the sensor (station ``[grating] orders``).
    detect_sigma : float
        Detection threshold of the binned, smoothed residual, in noise sigma.
    max_candidates : int
        Most candidates kept per frame (a saturated fireball spectrum holds many).
    psf_sigma_px : float, optional
        Gaussian PSF sigma, sets the centroid window (1.5 sigma) and the flux
        aperture (3 sigma); default 1.3 px, typical of meteor video (from memory).
    seed : int, optional
        Seed of the RANSAC sampling (deterministic by default).
    binned : BinnedFrames, optional
        :func:`~meteorspec.background.bin_frames` of the same frames (the one the
        background was built from); saves the full pass over the frames.

    Returns
    -------
    Track
        Falsy with ``reason`` set when no meteor is found; never raises for that.

    Raises
    ------
    ValueError
        A frame holding NaN or infinite values, or frames that do not fit the
        background (the video reader produces neither: this is a caller's bug,
        reported with the frame index).
    """
    rng = np.random.default_rng(seed)
    n = len(frames)
    width, height = camera.width, camera.height
    orders = tuple(int(m) for m in orders) or (1,)
    times = np.zeros(n)
    index = np.zeros(n, int)
    exposure = np.nan
    models: dict[tuple[int, int, int], _BinnedModel] = {}
    wl = np.linspace(*_SPECTRUM_NM, 48)
    c_pos, c_x, c_y, c_snr, c_sup = [], [], [], [], []
    # ---------------- pass 1: binned detection in every frame (the background's binned copy if given)
    if binned is None:
        binned = bin_frames(frames, camera=camera)
    elif len(binned) != n:
        raise ValueError(f"binned frames ({len(binned)}) do not match the {n} frames")
    h_bg, w_bg = background.shape
    for pos in range(n):
        times[pos], index[pos], exposure = binned.time_s[pos], binned.index[pos], binned.exposure_s[pos]
        key = (int(binned.y_start_px[pos]), int(binned.y_step_px[pos]), int(binned.n_rows[pos]))
        model = models.get(key)
        if model is None:
            last_row = key[0] + key[1] * (key[2] - 1)
            if key[0] < 0 or last_row >= h_bg or w_bg != width:
                raise ValueError(f"frame {index[pos]} ({key[2]} rows from y={key[0]} step {key[1]}) does "
                                 f"not fit the {w_bg}x{h_bg} background")
            model = models[key] = _BinnedModel(background, *key)
        binned_frame = binned.data[pos]
        if not np.isfinite(binned_frame.sum(dtype=np.float64)):
            raise ValueError(f"frame {index[pos]} holds NaN or infinite values")
        snr = model.snr(binned_frame)
        i, j = _local_maxima(snr, detect_sigma, max_candidates)
        if i.size == 0:
            continue
        x, y = model.to_pixel(i, j)
        sup, cnt = _spectrum_support(geometry, orders, x, y, snr, model, wl)
        c_pos.append(np.full(i.size, pos))
        c_x.append(x)
        c_y.append(y)
        c_snr.append(snr[i, j])
        c_sup.append(np.where(cnt >= 5, sup, np.nan))
    if n == 0:
        return _empty_track(times, index, exposure, "no frames")
    if not c_pos:
        return _empty_track(times, index, exposure, f"no source above {detect_sigma:g} sigma in any frame")
    c_pos, c_x, c_y = np.concatenate(c_pos), np.concatenate(c_x), np.concatenate(c_y)
    c_snr, c_sup = np.concatenate(c_snr), np.concatenate(c_sup)
    c_t = times[c_pos]
    # a zeroth order has light along its predicted spectrum; a spectral line or noise has not.
    # Unknown support (spectrum off the sensor) is neutral.
    spec_w = np.where(np.isnan(c_sup), 0.5, np.clip(c_sup, 0.05, 3.0))
    score = np.sqrt(c_snr) * spec_w
    frame_dt = float(np.median(np.diff(times))) if n > 1 else 1.0
    # ---------------- linking
    link = _ransac_link(c_t, c_x, c_y, score, c_pos, speed_min=0.5 / frame_dt, tol_px=6.0, rng=rng)
    if link.size < 3:
        return _empty_track(times, index, exposure, "no moving zeroth order (fewer than 3 frames with a "
                            "consistent moving source having its spectrum where the grating puts it)")
    for tol in (8.0, 5.0, 4.0):
        px, py = _poly_predict(c_t[link], c_x[link], c_y[link], c_t)
        near = np.flatnonzero(np.hypot(c_x - px, c_y - py) <= tol)
        link = _one_per_frame(near, c_pos, score)
        if link.size < 3:
            return _empty_track(times, index, exposure, "no moving zeroth order after linking")
    # the linked source may be a line of the spectrum: follow "parents" towards the zeroth order
    # each step moves to a bluer line, towards the zeroth order: a bright spectrum shows many
    # lines (seed-5 event 023 of bench/plasma_end_to_end.py: linked on O I 777, five steps to the
    # zeroth order; four were allowed before); 12 only bounds the loop
    for _ in range(12):
        parent = _parent_link(link, c_pos, c_x, c_y, score, geometry, orders, width, height, frame_dt)
        if parent.size < 3:
            break
        link = parent
        for tol in (8.0, 5.0, 4.0):
            px, py = _poly_predict(c_t[link], c_x[link], c_y[link], c_t)
            near = np.flatnonzero(np.hypot(c_x - px, c_y - py) <= tol)
            link = _one_per_frame(near, c_pos, score)
    link_pos = c_pos[link]
    first, last = int(link_pos.min()), int(link_pos.max())
    # preliminary motion per frame from the linked candidates (quadratic in time)
    lo, hi = max(first - 2, 0), min(last + 2, n - 1)
    span = np.arange(lo, hi + 1)
    px, py = _poly_predict(c_t[link], c_x[link], c_y[link], times[span])
    ph = _poly_predict(c_t[link], c_x[link], c_y[link], times[span] + exposure / 2)
    pl = _poly_predict(c_t[link], c_x[link], c_y[link], times[span] - exposure / 2)
    hdx, hdy = (ph[0] - pl[0]) / 2.0, (ph[1] - pl[1]) / 2.0
    psf = 1.3 if psf_sigma_px is None else float(psf_sigma_px)
    window = max(1.5 * psf, 1.5)
    aperture = max(3.0 * psf, 3.0)
    # ---------------- pass 2: full-resolution centroids and fluxes over the span
    meas: dict[int, _Measure] = {}
    for k, pos in enumerate(span):
        frame = frames[int(pos)]
        m = _measure(frame, background, px[k], py[k], hdx[k], hdy[k], window_px=window,
                     aperture_px=aperture, width=width, height=height)
        # a second round from the first centroid (starting far off can lock on a neighbour)
        if m.ok and np.hypot(m.x - px[k], m.y - py[k]) > 4.0:
            m = _Measure(edge=m.edge)
        meas[int(pos)] = m
    # ---------------- trajectory fit
    pos_all = np.array(sorted(meas))
    mx = np.array([meas[p].x for p in pos_all])
    my = np.array([meas[p].y for p in pos_all])
    msnr = np.array([meas[p].snr for p in pos_all])
    msat = np.array([meas[p].saturated for p in pos_all])
    medge = np.array([meas[p].edge for p in pos_all])
    usable = np.isfinite(mx) & ~medge & ((msnr >= detect_sigma) | msat)
    if usable.sum() < 3:
        return _empty_track(times, index, exposure, "zeroth order measured in fewer than 3 frames")
    streak = np.hypot(hdx, hdy) * 2.0
    streak_of = dict(zip(span.tolist(), streak.tolist()))
    spread = np.array([np.sqrt(psf**2 + streak_of[p] ** 2 / 12.0) for p in pos_all])
    # statistical error ~ image spread / SNR, plus a systematic floor for the in-exposure
    # light-curve model (grows with the streak length)
    floor = np.array([0.05 + 0.01 * streak_of[p] for p in pos_all])
    # a saturated streak's clipped core weights its light evenly along the streak,
    # unlike the light-weighted model: a looser error keeps it from pulling the fit
    sigma = np.where(msat, np.hypot(0.3 + 0.03 * np.array([streak_of[p] for p in pos_all]),
                                    2.0 * spread / np.maximum(msnr, 1.0)),
                     np.hypot(floor, 1.2 * spread / np.maximum(msnr, 1e-3)))
    sigma = np.where(usable, sigma, np.nan)
    # the first and last luminous frames are lit for part of the exposure only: their
    # centroids are off the mid-exposure point, so they only count when little else does
    use_idx = np.flatnonzero(usable)
    if use_idx.size >= 6:
        sigma[use_idx[0]] *= 20.0
        sigma[use_idx[-1]] *= 20.0
    mflux = np.array([meas[p].flux for p in pos_all])
    # clipped fluxes of saturated frames included: a clipped streak's centroid follows its clipped light
    slope = _light_slope(times[pos_all], mflux, exposure, usable & (msnr >= 3.0))
    gc, inl = _fit_great_circle(times[pos_all], mx, my, sigma, geometry.lens, exposure, slope=slope)
    if gc is None:
        return _empty_track(times, index, exposure, "trajectory fit failed")

    # ---------------- frames where the zeroth order is off the sensor or not seen: the spectrum
    status = np.full(n, "absent", dtype="<U13")
    x_meas, y_meas = np.full(n, np.nan), np.full(n, np.nan)
    flux, flux_err, snr_all = np.full(n, np.nan), np.full(n, np.nan), np.full(n, np.nan)
    for p, m in zip(pos_all, (meas[p] for p in pos_all)):
        snr_all[p] = m.snr
        if m.ok and not m.edge:
            flux[p], flux_err[p] = (np.nan, np.nan) if m.saturated else (m.flux, m.flux_err)
    supported = np.zeros(n, bool)
    for k, p in enumerate(pos_all):
        if usable[k]:
            x_meas[p], y_meas[p] = mx[k], my[k]
            if inl[k]:
                status[p] = "saturated" if msat[k] else "measured"
                supported[p] = True
    spec_located = _locate_from_spectrum(frames, background, geometry, gc, orders, times, exposure,
                                         status, supported, meas, width, height, window, psf)
    if spec_located:
        # refit with the spectrum-located points at low weight
        extra = np.array(sorted(spec_located))
        t_fit = np.concatenate([times[pos_all], times[extra]])
        x_fit = np.concatenate([mx, [spec_located[p][0] for p in extra]])
        y_fit = np.concatenate([my, [spec_located[p][1] for p in extra]])
        # a position from the spectrum is good to a pixel or two (template shape, streaking)
        s_fit = np.concatenate([np.where(inl, sigma, np.nan), np.full(extra.size, 2.0)])
        gc2, _ = _fit_great_circle(t_fit, x_fit, y_fit, s_fit, geometry.lens, exposure,
                                   slope=np.concatenate([slope, np.zeros(extra.size)]))
        if gc2 is not None:
            gc = gc2
        for p in extra:
            status[p] = "from_spectrum"
            x_meas[p], y_meas[p] = spec_located[p]
            supported[p] = True
    sup_idx = np.flatnonzero(supported)
    first, last = int(sup_idx[0]), int(sup_idx[-1])
    fx, fy = gc.pixel(times)
    on_sensor = (fx >= -0.5) & (fx <= width - 0.5) & (fy >= -0.5) & (fy <= height - 0.5)
    for p in range(first, last + 1):
        if status[p] == "absent":
            status[p] = "interpolated" if on_sensor[p] else "off_frame"
    lum = status != "absent"
    x_fit_all = np.where(lum, fx, np.nan)
    y_fit_all = np.where(lum, fy, np.nan)
    flux = np.where(lum, flux, np.nan)
    flux_err = np.where(lum, flux_err, np.nan)
    # ---------------- flags
    flags: list[str] = []
    if np.any(status == "saturated") or np.any(msat & usable):
        flags.append("saturated")
    if np.any(lum & ~on_sensor) or np.any(status == "off_frame"):
        flags.append("zeroth_order_off_frame")
    if np.any(status == "from_spectrum"):
        flags.append("zeroth_order_from_spectrum")
    t_mid = float(np.median(times[lum]))
    vx, vy = _central_velocity(gc, t_mid, exposure)
    xm, ym = gc.pixel(t_mid)
    ddx, ddy = geometry.direction(xm, ym, 600.0, orders[0])
    if np.isfinite(ddx) and np.hypot(vx, vy) > 0:
        cosang = abs(vx * ddx + vy * ddy) / np.hypot(vx, vy)
        if cosang >= np.cos(np.radians(_PARALLEL_LIMIT_DEG)):
            flags.append("motion_parallel_to_dispersion")
    # a saturated frame's SNR (clipped light over its noise) is a lower bound: it counts, else a
    # fireball saturated in every frame would be flagged as faint
    good_snr = snr_all[np.isin(status, ("measured", "saturated")) & np.isfinite(snr_all)]
    if good_snr.size == 0 or np.median(good_snr) < _LOW_SNR:
        flags.append("low_snr")
    return Track(time_s=times.copy(), x_px=x_fit_all, y_px=y_fit_all, x_meas_px=x_meas, y_meas_px=y_meas,
                 flux_adu=flux, status=status, flags=tuple(flags), reason="", frame_index=index,
                 exposure_s=float(exposure), flux_err_adu=flux_err, snr=np.where(lum, snr_all, np.nan),
                 trajectory=gc, psf_sigma_px=psf)


def _central_velocity(gc: GreatCircle, t: float, exposure: float) -> tuple[float, float]:
    h = 0.25 * exposure
    x1, y1 = gc.pixel(t + h)
    x0, y0 = gc.pixel(t - h)
    return float(x1 - x0) / (2 * h), float(y1 - y0) / (2 * h)


def _spectrum_profile(geometry, orders, frame, background, x0, y0, wl):
    """Residual sampled (bilinear) along the predicted spectra of zeroth positions (x0, y0) (k,) -> (k, n_wl).

    Only the pixels around the samples are read (``Background.sample``), not the whole frame.
    """
    out = []
    n_rows, width = frame.shape
    for m in orders:
        xs, ys = geometry.spectrum_pixel(np.asarray(x0)[:, None], np.asarray(y0)[:, None], wl[None, :], m)
        rows = frame.row_of_y(ys)
        ok = np.isfinite(xs) & np.isfinite(rows) & (xs >= 0) & (xs <= width - 1) & \
            (rows >= 0) & (rows <= n_rows - 1)
        xs_c = np.where(ok, xs, 0.0)
        r_c = np.where(ok, rows, 0.0)
        i0 = np.minimum(np.floor(r_c).astype(int), n_rows - 2)
        j0 = np.minimum(np.floor(xs_c).astype(int), width - 2)
        fi, fj = r_c - i0, xs_c - j0
        corners = background.sample(frame, np.stack([i0, i0 + 1, i0, i0 + 1]), np.stack([j0, j0, j0 + 1, j0 + 1]))[0]
        val = (corners[0] * (1 - fi) * (1 - fj) + corners[1] * fi * (1 - fj)
               + corners[2] * (1 - fi) * fj + corners[3] * fi * fj)
        out.append(np.where(ok, val, np.nan))
    return np.concatenate(out, axis=1)


def _locate_from_spectrum(frames, background, geometry, gc, orders, times, exposure, status, supported,
                          meas, width, height, window, psf) -> dict[int, tuple[float, float]]:
    """Zeroth-order positions located from the spectrum where the zeroth order itself is not usable.

    The template is the mean profile (residual along the predicted curve, per
    wavelength sample) over the measured frames, scaled by their fluxes. A frame is
    searched along the great circle (+-10 px) when its fitted zeroth order is off the
    sensor or was not measured; frames are visited outward from the measured span
    and the search stops after three frames in a row without a significant match.
    """
    n = times.size
    sup = np.flatnonzero(supported)
    if sup.size < 2:
        return {}
    # sample the spectrum at about 0.7 px steps along the curve
    xm, ym = gc.pixel(times[sup[sup.size // 2]])
    disp = float(np.nanmedian(geometry.dispersion_nm_per_px(xm, ym, np.linspace(*_SPECTRUM_NM, 5), orders[0])))
    if not np.isfinite(disp) or disp <= 0:
        return {}
    wl = np.arange(_LOCATE_NM[0], _LOCATE_NM[1], 0.7 * disp)
    # template from a few of the brightest measured frames (re-read: their profiles were not kept)
    good = [p for p in sup if status[p] in ("measured", "saturated")]
    if not good:
        return {}
    good = sorted(good, key=lambda p: -meas[p].snr)[:5]
    template = np.zeros(wl.size * len(orders))
    count = np.zeros_like(template)
    for p in good:
        frame = frames[int(p)]
        prof = _spectrum_profile(geometry, orders, frame, background, np.array([meas[p].x]), np.array([meas[p].y]),
                                 wl)[0]
        ok = np.isfinite(prof)
        norm = float(np.sum(np.clip(prof[ok], 0.0, None)))
        if norm <= 0:
            continue
        template[ok] += prof[ok] / norm  # each frame's spectrum shape, whatever its brightness
        count[ok] += 1
    template = np.where(count > 0, template / np.maximum(count, 1), np.nan)
    if not np.any(np.isfinite(template)):
        return {}
    # candidate frames: inside the span without support, and outward from it
    todo_inner = [p for p in range(sup[0], sup[-1] + 1) if not supported[p]]
    found: dict[int, tuple[float, float]] = {}
    fx, fy = gc.pixel(times)

    # outward from the span, predict straight on from the span end (a polynomial fitted to a
    # short span must not be extrapolated far), shifted by the offsets the last located frames had
    last: dict[str, float] = {}
    offsets: list[float] = []
    noise_of: dict[tuple[int, int, int], float] = {}

    def median_noise(frame) -> float:
        # the same for every frame of a field parity: one median of the whole noise map each
        key = (frame.y_start_px, frame.y_step_px, frame.shape[0])
        if key not in noise_of:
            noise_of[key] = float(np.median(frame_rows(background.noise_adu, frame)))
        return noise_of[key]

    def try_frame(p: int) -> bool:
        if not (np.isfinite(fx[p]) and np.isfinite(fy[p])):
            return False
        frame = frames[int(p)]
        if last:
            # straight extrapolation from the span end, shifted by the recent located offsets
            a_lin = last["a"] + last["w"] * (times[p] - last["t"])
            a0 = a_lin + (float(np.median(offsets[-3:])) if offsets else 0.0)
        else:
            a_lin = a0 = gc.angle(times[p])
        # angular step of ~0.25 px along the circle
        ua = np.cos(a0 + 1e-5) * gc.e1 + np.sin(a0 + 1e-5) * gc.e2
        ub = np.cos(a0 - 1e-5) * gc.e1 + np.sin(a0 - 1e-5) * gc.e2
        (xa, ya), (xb_, yb_) = gc.lens.direction_to_pixel(ua), gc.lens.direction_to_pixel(ub)
        px_per_rad = np.hypot(xa - xb_, ya - yb_) / 2e-5
        if not np.isfinite(px_per_rad) or px_per_rad <= 0:
            return False
        offs = np.arange(-10.0, 10.01, 0.25) / px_per_rad
        a = a0 + offs
        u = np.cos(a)[:, None] * gc.e1 + np.sin(a)[:, None] * gc.e2
        x0, y0 = gc.lens.direction_to_pixel(u)
        prof = _spectrum_profile(geometry, orders, frame, background, x0, y0, wl)
        # samples valid for every trial position, so that all trials compare the same wavelengths
        common = np.all(np.isfinite(prof), axis=0) & np.isfinite(template)
        if common.sum() < 10:
            return False
        pc, tc = prof[:, common], template[common]
        # significance of the spectrum's presence: matched filter against the background noise
        noise = median_noise(frame)
        z = (pc @ tc) / max(noise * float(np.sqrt(np.sum(tc**2))), 1e-12)
        # position: normalised cross-correlation (shape, not brightness, decides)
        pz = pc - pc.mean(axis=1, keepdims=True)
        tz = tc - tc.mean()
        corr = (pz @ tz) / np.maximum(np.linalg.norm(pz, axis=1) * np.linalg.norm(tz), 1e-12)
        k = int(np.argmax(corr))
        if z[k] < 8.0 or corr[k] < 0.6 or k == 0 or k == offs.size - 1:
            return False
        # parabola through the peak for sub-step precision
        c0, c1, c2 = corr[k - 1], corr[k], corr[k + 1]
        den = c0 - 2 * c1 + c2
        frac = 0.5 * (c0 - c2) / den if den < 0 else 0.0
        a_best = a[k] + frac * (offs[1] - offs[0])
        xb, yb = gc.lens.direction_to_pixel(np.cos(a_best) * gc.e1 + np.sin(a_best) * gc.e2)
        found[p] = (float(xb), float(yb))
        if last:
            offsets.append(float(a_best - a_lin))
        return True

    for p in todo_inner:
        off = not (-0.5 <= fx[p] <= width - 0.5 and -0.5 <= fy[p] <= height - 0.5)
        m = meas.get(p)
        if off or m is None or not m.ok or m.edge or not supported[p]:
            try_frame(p)
    for direction, start in ((-1, sup[0] - 1), (1, sup[-1] + 1)):
        misses, p = 0, start
        t_end = times[start - direction]
        h = 0.25 * exposure
        last.clear()
        offsets.clear()
        last.update(a=float(gc.angle(t_end)), t=float(t_end),
                    w=float((gc.angle(t_end + h) - gc.angle(t_end - h)) / (2 * h)))
        while 0 <= p < n and misses < 3:
            m = meas.get(p)
            on = -0.5 <= fx[p] <= width - 0.5 and -0.5 <= fy[p] <= height - 0.5
            # a zeroth order on the sensor that was not measured is not there: stop
            if on and m is not None and m.ok and not m.edge:
                break
            misses = 0 if try_frame(p) else misses + 1
            p += direction
    return found


def light_near_source(track: Track, background: Background, geometry: SpectralGeometry,
                      binned: BinnedFrames, *, order: int = 1) -> tuple[float, int]:
    """How much first-order light lies where a zeroth order's own spectrum must be dark.

    A zeroth order's first order starts beyond ``_DARK_BELOW_NM``: along its first-order
    curve, within that wavelength of the source on either side (order ``order`` ahead,
    ``-order`` behind), there is nothing. A line of the spectrum at ``lam0`` that was taken
    for the zeroth order has its neighbours there, since the grating adds ``order lam / d`` to
    the tangential direction cosines: the curve through the line at ``lam`` ahead or behind
    is the first order at ``lam0 + lam`` or ``lam0 - lam``. Per frame where the zeroth order was
    measured: the mean smoothed SNR (the tracker's binned maps, smoothed over 8 px) along that
    stretch, beyond the source's own image (12 px plus its streak), over the mean along its
    first order at 400-800 nm, or over 2 where that is below 2 sigma (a line at the red end of
    its spectrum has nothing ahead of it); frames where neither reaches 2 sigma are skipped.

    Returns
    -------
    ratio : float
        Median over the frames counted (NaN if none).
    n_frames : int
        Frames counted.
    """
    if not track:
        return float("nan"), 0
    ahead_nm = np.linspace(*_SPECTRUM_NM, 48)
    near_nm = np.linspace(10.0, _DARK_BELOW_NM, 59)
    models: dict[tuple[int, int, int], _BinnedModel] = {}
    seen = np.flatnonzero(np.isin(track.status, ("measured", "saturated"))
                          & np.isfinite(track.x_meas_px) & np.isfinite(track.y_meas_px))
    vx, vy = track.velocity_px_s(track.time_s[seen]) if seen.size else (np.zeros(0), np.zeros(0))
    streak = np.hypot(vx, vy) * (track.exposure_s if np.isfinite(track.exposure_s) else 0.0)
    ratios = []
    for k, pos in enumerate(seen):
        key = (int(binned.y_start_px[pos]), int(binned.y_step_px[pos]), int(binned.n_rows[pos]))
        model = models.get(key)
        if model is None:
            model = models[key] = _BinnedModel(background, *key)
        snr = model.snr(binned.data[pos])
        x0, y0 = float(track.x_meas_px[pos]), float(track.y_meas_px[pos])
        clear = 12.0 + float(streak[k]) if np.isfinite(streak[k]) else 12.0
        means = []
        for parts in (((order, ahead_nm),), ((order, near_nm), (-order, near_nm))):
            values = []
            for m, lam in parts:
                xs, ys = geometry.spectrum_pixel(x0, y0, lam, m)
                i, j = model.to_index(xs, ys)
                ok = (np.isfinite(i) & np.isfinite(j) & (i >= 0) & (i < snr.shape[0]) & (j >= 0)
                      & (j < snr.shape[1]) & (np.hypot(xs - x0, ys - y0) > clear))
                values.append(snr[i[ok].astype(int), j[ok].astype(int)])
            v = np.concatenate(values)
            means.append(float(np.mean(v)) if v.size >= 5 else float("nan"))
        ahead, near = means
        if not np.isfinite(near) or not max(ahead if np.isfinite(ahead) else 0.0, near) >= 2.0:
            continue
        # a line near the red end of its spectrum has nothing at 400-800 nm ahead of it
        ratios.append(near / max(ahead if np.isfinite(ahead) else 0.0, 2.0))
    return (float(np.median(ratios)) if ratios else float("nan")), len(ratios)


def unless_a_line(track: Track, background: Background, geometry: SpectralGeometry,
                  binned: BinnedFrames, *, order: int = 1) -> Track:
    """``track``, or an empty track when its source is a line of the spectrum (:func:`light_near_source`).

    Such a source is followed when the zeroth order never reaches the sensor and a bright
    line of the spectrum moves like one: its wavelength zero point is unknown, and a spectrum
    extracted from it would be shifted by that line's wavelength. The empty track carries the
    reason and the flag ``"zeroth_order_not_found"``; three measured frames at least decide.
    """
    ratio, n = light_near_source(track, background, geometry, binned, order=order)
    if n < 3 or not ratio >= _NOT_ZEROTH_RATIO:
        return track
    empty = _empty_track(track.time_s, track.frame_index, track.exposure_s,
                         f"the moving source is a line of its own spectrum, not a zeroth order (first-order "
                         f"light within {_DARK_BELOW_NM:.0f} nm of it, {ratio:.2f} times its 400-800 nm "
                         f"light, median of {n} frames); the zeroth order was not found on the sensor")
    return dataclasses.replace(empty, flags=("zeroth_order_not_found",))


def remeasure_light_curve(frames: Sequence, background: Background, track: Track) -> Track:
    """The track with its light curve measured again against another background model.

    Parameters
    ----------
    frames : sequence of Frame
        The frames the track was found in (same order); only the frames with a
        measured, unsaturated zeroth order are read.
    background : Background
        Typically :func:`~meteorspec.background.refine_background` of the track.
    track : Track

    Returns
    -------
    Track
        Same positions, statuses and trajectory; ``flux_adu``, ``flux_err_adu``
        and ``snr`` re-measured with the same aperture at the track's measured
        centroids. A falsy track is returned unchanged.

    Notes
    -----
    The first background of a faint meteor lit in most frames holds part of its
    light, so the aperture sums (the light curve the extraction uses as frame
    weights) come out low by a different amount in every frame.
    """
    if not track:
        return track
    psf = track.psf_sigma_px if np.isfinite(track.psf_sigma_px) else 1.3
    window = max(1.5 * psf, 1.5)
    aperture = max(3.0 * psf, 3.0)
    height, width = background.shape
    flux = track.flux_adu.copy()
    flux_err = track.flux_err_adu.copy()
    snr = track.snr.copy()
    h = 0.5 * track.exposure_s
    for p in np.flatnonzero(np.isfinite(track.flux_adu) & np.isfinite(track.x_meas_px)):
        t = track.time_s[p]
        (xa, ya), (xb, yb) = track.trajectory.pixel(t - h), track.trajectory.pixel(t + h)
        m = _measure(frames[int(p)], background, float(track.x_meas_px[p]), float(track.y_meas_px[p]),
                     float(xb - xa) / 2.0, float(yb - ya) / 2.0, window_px=window, aperture_px=aperture,
                     width=width, height=height)
        if m.ok and not m.edge and not m.saturated:
            flux[p], flux_err[p], snr[p] = m.flux, m.flux_err, m.snr
    return dataclasses.replace(track, flux_adu=flux, flux_err_adu=flux_err, snr=snr)
