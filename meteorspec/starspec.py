"""First-order spectrum of a static star, for the station response curve.

A star of known effective temperature seen through the grating is the network's
flux standard: its first-order spectrum divided by a Planck curve is the
relative response of the whole system (contract section 3). This module turns a
clip (an event's video, or a dedicated recording in any form the reader takes)
into that spectrum; :func:`meteorspec.calibrate.derive_response` turns the
spectrum into the response curve.

Steps (:func:`stack_clip`, then :func:`measure_star`)
-----------------------------------------------------
1. **Stack.** Only the region the star and its spectrum can reach is kept
   (:func:`star_region`); every frame is linearised (:func:`meteorspec.video.linearize`)
   and the frames are combined per pixel by a clipped mean (default: a meteor or
   a plane crossing the star in a few frames is ignored), the mean or the
   median. The error of the stack comes from the frames' own scatter, so
   scintillation is in it.
2. **Zeroth order.** Found near the position given (peak of the lightly
   smoothed, locally sky-subtracted image) and refined by an iterated
   intensity-weighted centroid; its second moment gives the PSF width.
3. **Sky from the sidebands.** The star does not move, so the sky under its
   spectrum cannot come from other frames (:mod:`meteorspec.background` would
   take the spectrum itself for background). It comes from two bands beside the
   spectrum instead: every pixel near the curve that
   :class:`~meteorspec.optics.SpectralGeometry` predicts gets a wavelength and a
   cross offset (:meth:`SpectralGeometry.locate`), and in each short stretch of
   wavelength a straight line in the offset is fitted to the sideband pixels
   (with 3-sigma clipping, which drops other stars) and evaluated under the
   spectrum. A straight line across keeps a sky gradient from leaking in.
4. **Extraction.** The stacked, sky-subtracted image is handed to
   :func:`meteorspec.extract.extract_spectra` as one exposure of a source that
   does not move, so the star's spectrum is sampled along the same curved
   geometry and binned with the same exact pixel fractions as a meteor's, in
   linear ADU per nm (the local dispersion comes from the geometry). A plain
   aperture sum (no profile weighting) is used: a profile pooled over
   wavelength would turn a small error of the predicted curve into a
   wavelength-dependent flux error, which is exactly what a response must not
   have.

:func:`star_response` then keeps the stretch where the spectrum, smoothed, has a
useful SNR (deciding it per bin would keep only the upward noise at the faint
ends), masks bins that stand out from the smooth continuum (another star's
zeroth order on the spectrum, a hot pixel: :func:`compact_outliers`), divides
by the atmosphere when asked (:mod:`meteorspec.extinction`), hands the rest to
:func:`~meteorspec.calibrate.derive_response` (division by the Planck curve,
smoothing, normalisation to a maximum of 1) and cuts rows known to worse than
5 % from the ends (:func:`trim_response`).

Limits: the star is taken as a black body (real stars have absorption lines,
which the 25 nm smoothing and the outlier mask soften but do not remove; pick
stars with few strong lines), and its neighbourhood should be free of stars
brighter than a few percent of it within about 20 px of its spectrum (the
sidebands' clipping drops faint ones).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from numpy.typing import NDArray
from scipy import ndimage

from .calibrate import DerivedResponse, derive_response
from .config import Camera, Station, find_station_file, load_event, load_station
from .errors import InputError
from .extinction import ExtinctionModel, pixel_altaz, transmission
from .extract import Spectrum, extract_spectra
from .optics import SpectralGeometry
from .video import Frame, linearize, read_raw_frames

__all__ = [
    "STACK_METHODS",
    "StarStack",
    "StarSpectrum",
    "SidebandSky",
    "StarResponse",
    "open_clip",
    "star_region",
    "stack_clip",
    "refine_zeroth_order",
    "fit_sideband_sky",
    "extract_star_spectrum",
    "measure_star",
    "star_response",
    "trim_response",
    "CombinedResponse",
    "combine_responses",
    "compact_outliers",
    "TEMPERATURE_RANGE_K",
]

STACK_METHODS = ("clipped", "mean", "median")
#: Effective temperatures accepted for a flux-standard star (stars lie far inside; common practice).
TEMPERATURE_RANGE_K = (1000.0, 100000.0)
#: Wavelength range searched for the star's spectrum (the extraction's own outer limits).
DEFAULT_RANGE_NM = (350.0, 900.0)
# Large-sample variance of the median of Gaussian data relative to the mean's (common practice).
_MEDIAN_VAR_FACTOR = math.pi / 2.0
# Frames further than this many sigma from a pixel's median are left out of the clipped mean.
_CLIP_SIGMA = 4.0
# MAD -> Gaussian sigma (common practice: 1 / Phi^-1(3/4)).
_MAD_TO_SIGMA = 1.4826
# Noise values assumed when the station file gives none (a typical small video camera; invented).
_DEFAULT_READ_NOISE_ADU, _DEFAULT_GAIN_E_PER_ADU = 1.5, 1.0


# --------------------------------------------------------------------------- stacking


@dataclass(frozen=True, eq=False)
class StarStack:
    """A clip combined into one linear image (full sensor size, NaN outside the region read).

    Attributes
    ----------
    signal : ndarray of shape (height, width), float32
        Per-frame linear signal (clipped mean, mean or median over the frames), ADU.
    variance : ndarray of shape (height, width), float32
        Variance of ``signal``.
    saturated : ndarray of shape (height, width), bool
        True where a frame that entered the combination was saturated.
    n_frames : int
    method : str
        One of :data:`STACK_METHODS`.
    source : Path
        The video the stack came from.
    """

    signal: NDArray[np.float32]
    variance: NDArray[np.float32]
    saturated: NDArray[np.bool_]
    n_frames: int
    method: str
    source: Path


def open_clip(source: str | Path, *, station_file: str | Path | None = None,
              stations_dir: str | Path | None = None) -> tuple[Path, Station]:
    """The video and the station of an event folder (or its ``event.toml``) or of a bare clip.

    Parameters
    ----------
    source : str or Path
        An event folder or ``event.toml`` (contract section 4), or a clip: any video form
        the reader takes (a file, or a folder of numbered frames).
    station_file : str or Path, optional
        The station file; required for a clip. For an event, default: the search of
        :func:`meteorspec.config.find_station_file` (``stations_dir``, else beside the event).
    stations_dir : str or Path, optional

    Raises
    ------
    InputError
        Unreadable event or station file, no station file found, a station file of
        another station, or a clip without a station file.
    """
    source = Path(source)
    if (source / "event.toml").is_file() or source.suffix.lower() == ".toml":
        event = load_event(source)
        if station_file is None:
            station_file = find_station_file(event, stations_dir=stations_dir)
        station = load_station(station_file)
        if station.id != event.station:
            raise InputError(event.path, f"event is from station {event.station!r} but {station.path} is "
                             f"{station.id!r}", key="[event] station")
        return event.video, station
    if station_file is None:
        raise InputError(source, "not an event folder; a clip needs --station FILE")
    return source, load_station(station_file)


def star_region(geometry: SpectralGeometry, x_px: float, y_px: float, *, camera: Camera, order: int = 1,
                range_nm: tuple[float, float] = DEFAULT_RANGE_NM,
                margin_px: float = 30.0) -> tuple[slice, slice]:
    """Rows and columns (slices into ``img[y, x]``) holding a star's zeroth order and spectrum.

    The bounding box of the zeroth order and of the order-``order`` curve over
    ``range_nm``, grown by ``margin_px`` (room for the sidebands and for an
    imprecise position) and cut to the sensor.
    """
    lam = np.linspace(range_nm[0], range_nm[1], 221)
    xs, ys = geometry.spectrum_pixel(x_px, y_px, lam, order)
    finite = np.isfinite(xs) & np.isfinite(ys)
    xs = np.concatenate([[x_px], xs[finite]])
    ys = np.concatenate([[y_px], ys[finite]])
    x0 = int(np.clip(np.floor(xs.min() - margin_px), 0, camera.width))
    x1 = int(np.clip(np.ceil(xs.max() + margin_px) + 1, 0, camera.width))
    y0 = int(np.clip(np.floor(ys.min() - margin_px), 0, camera.height))
    y1 = int(np.clip(np.ceil(ys.max() + margin_px) + 1, 0, camera.height))
    return slice(y0, y1), slice(x0, x1)


def stack_clip(video: str | Path, *, camera: Camera, region: tuple[slice, slice] | None = None,
               method: str = "clipped", max_frames: int | None = None) -> StarStack:
    """Combine the frames of a clip of a static scene into one linear image.

    Parameters
    ----------
    video : str or Path
        Any video form :func:`meteorspec.video.read_raw_frames` reads.
    camera : Camera
        Frame size, bit depth, gamma, black level, saturation and noise values.
    region : (slice, slice), optional
        Rows and columns to keep (default the whole frame); the rest is NaN.
    method : {"clipped", "mean", "median"}
        ``"clipped"``: the mean of the frames within 4 sigma of the pixel's median
        (sigma from the median absolute deviation, at least the camera noise),
        which drops a meteor or a plane crossing the pixel in a few frames;
        ``"mean"``: all frames; ``"median"``: robust but, on integer pixel values
        a few ADU above the sky, biased by up to a quarter of an ADU per pixel
        depending on the level (too much for a faint spectrum).
    max_frames : int, optional
        Use only the first ``max_frames`` frames.

    Returns
    -------
    StarStack

    Raises
    ------
    InputError
        Any problem reading the video (named with the file).
    ValueError
        Unknown ``method``.

    Notes
    -----
    Interlaced video is stacked as whole frames: both fields of a static scene
    hold the same sky. With three or more frames the variance of the stack is
    the sample variance of the frames used over their number (times pi/2 for the
    median, its large-sample efficiency), but never below the camera's read and
    photon noise (station values; 1.5 ADU and 1 e-/ADU when the station gives
    none), which alone is used for fewer frames.
    """
    if method not in STACK_METHODS:
        raise ValueError(f"stack method must be one of {', '.join(STACK_METHODS)}, got {method!r}")
    rows, cols = (slice(0, camera.height), slice(0, camera.width)) if region is None else region
    cube, sat_cube = [], []
    for raw in read_raw_frames(video, camera=camera):
        sig, sat = linearize(raw[rows, cols], camera)
        cube.append(sig)
        sat_cube.append(sat)
        if max_frames is not None and len(cube) >= max_frames:
            break
    data = np.stack(cube)  # read_raw_frames raises on an empty video, so at least one frame
    n = data.shape[0]
    read = _DEFAULT_READ_NOISE_ADU if camera.read_noise_adu is None else camera.read_noise_adu
    gain = _DEFAULT_GAIN_E_PER_ADU if camera.gain_e_per_adu is None else camera.gain_e_per_adu
    median = np.median(data, axis=0)
    # one frame's read and photon noise: a floor for every scatter estimate (a smaller scatter
    # is chance, or a noise-free test clip)
    frame_var = read**2 + np.maximum(median, 0.0) / gain
    if method == "median":
        level, keep = median, np.ones(data.shape, bool)
    elif method == "mean" or n < 3:
        level, keep = data.mean(axis=0), np.ones(data.shape, bool)
    else:
        sigma = np.maximum(_MAD_TO_SIGMA * np.median(np.abs(data - median), axis=0), np.sqrt(frame_var))
        keep = np.abs(data - median) <= _CLIP_SIGMA * sigma
        # never empty: the values next to the median lie within one MAD of it
        level = np.sum(data * keep, axis=0) / np.sum(keep, axis=0)
    n_used = np.sum(keep, axis=0)
    var = frame_var / n_used
    if n >= 3:
        scatter = np.sum(keep * (data - level) ** 2, axis=0) / np.maximum(n_used - 1, 1)
        var = np.maximum(var, scatter / n_used)
    if method == "median":
        var = var * _MEDIAN_VAR_FACTOR
    signal = np.full((camera.height, camera.width), np.nan, dtype=np.float32)
    variance = np.full((camera.height, camera.width), np.nan, dtype=np.float32)
    sat_full = np.zeros((camera.height, camera.width), dtype=bool)
    signal[rows, cols] = level
    variance[rows, cols] = var
    # saturated in a frame that counts (a saturated meteor crossing in one frame is clipped away)
    sat_full[rows, cols] = np.any(np.stack(sat_cube) & keep, axis=0)
    return StarStack(signal, variance, sat_full, n, method, Path(video))


# --------------------------------------------------------------------------- zeroth order


def refine_zeroth_order(stack: StarStack, x_px: float, y_px: float, *, search_px: float = 8.0,
                        min_snr: float = 5.0) -> tuple[float, float, float]:
    """Zeroth-order centroid and PSF width of a star near ``(x_px, y_px)``.

    Parameters
    ----------
    stack : StarStack
    x_px, y_px : float
        Approximate position (e.g. from a star chart or a first look at the clip).
    search_px : float
        The star's peak is looked for within this distance.
    min_snr : float
        Smallest peak height over the local sky noise accepted as a star.

    Returns
    -------
    x_px, y_px : float
        Intensity-weighted centroid above the local sky.
    sigma_px : float
        PSF Gaussian sigma from the second moment (within 0.5-5 px).

    Raises
    ------
    ValueError
        No star brighter than ``min_snr`` sky sigma within ``search_px``.
    """
    img = stack.signal
    h, w = img.shape
    outer = search_px + 8.0
    r = int(math.ceil(outer))
    xi, yi = int(round(x_px)), int(round(y_px))
    y0, y1 = max(yi - r, 0), min(yi + r + 1, h)
    x0, x1 = max(xi - r, 0), min(xi + r + 1, w)
    if y1 - y0 < 3 or x1 - x0 < 3:
        raise ValueError(f"position ({x_px:.1f}, {y_px:.1f}) is outside the {w}x{h} frame")
    cut = img[y0:y1, x0:x1].astype(float)
    yy, xx = np.mgrid[y0:y1, x0:x1]
    dist = np.hypot(xx - x_px, yy - y_px)
    ring = (dist > search_px + 3.0) & (dist <= outer) & np.isfinite(cut)
    if np.count_nonzero(ring) < 10:
        raise ValueError(f"too little sky around ({x_px:.1f}, {y_px:.1f}) to find the star")
    sky = float(np.median(cut[ring]))
    noise = float(_MAD_TO_SIGMA * np.median(np.abs(cut[ring] - sky)))
    resid = np.where(np.isfinite(cut), cut - sky, 0.0)
    smooth = ndimage.gaussian_filter(resid, 1.0)
    inside = dist <= search_px
    if not np.any(inside):
        raise ValueError(f"position ({x_px:.1f}, {y_px:.1f}) is outside the frame")
    k = np.argmax(np.where(inside, smooth, -np.inf))
    peak = float(resid.flat[k])
    # the peak pixel against the sky noise of one pixel (noise 0: a noise-free image)
    if not (peak > 0 and peak > min_snr * noise):
        raise ValueError(f"no star within {search_px:g} px of ({x_px:.1f}, {y_px:.1f}) "
                         f"(brightest pixel {peak:.1f} ADU over the sky, noise {noise:.1f} ADU)")
    cx, cy = float(xx.flat[k]), float(yy.flat[k])
    sigma = 1.5
    for _ in range(10):
        rad = max(3.0, 3.0 * sigma)
        sel = (np.hypot(xx - cx, yy - cy) <= rad) & np.isfinite(cut)
        wgt = np.clip(resid[sel], 0.0, None)
        total = wgt.sum()
        if not total > 0:
            break
        nx = float(np.sum(wgt * xx[sel]) / total)
        ny = float(np.sum(wgt * yy[sel]) / total)
        m2 = float(np.sum(wgt * ((xx[sel] - nx) ** 2 + (yy[sel] - ny) ** 2)) / (2.0 * total))
        # a window of radius 3 sigma keeps 99 % of a Gaussian; the pixel adds 1/12 px^2
        sigma = float(np.clip(math.sqrt(max(m2 - 1.0 / 12.0, 0.0)), 0.5, 5.0))
        done = math.hypot(nx - cx, ny - cy) < 1e-3
        cx, cy = nx, ny
        if done:
            break
    return cx, cy, sigma


# --------------------------------------------------------------------------- sky beside the spectrum


@dataclass(frozen=True, eq=False)
class SidebandSky:
    """Sky under a static star's spectrum, from the bands beside it.

    Duck-types the part of :class:`meteorspec.background.Background` that
    :func:`meteorspec.extract.extract_spectra` uses: :meth:`sample` (or
    :meth:`residual` and :meth:`variance`), ``star_mask`` and ``gain_e_per_adu``. Pixels that are not
    within ``inner_px`` of the curve are NaN (not part of the star's band).

    Attributes
    ----------
    residual_adu : ndarray of shape (height, width), float32
        Stack minus sky.
    variance_adu2 : ndarray of shape (height, width), float32
        Variance of the stack plus that of the fitted sky.
    wavelength_nm, level_adu, slope_adu_px : ndarray of shape (n_bins,)
        The sky fit per wavelength stretch: level on the curve and slope across it.
    trace_wavelength_nm, trace_offset_px, trace_err_px : ndarray
        Where the star's light actually runs: its light-weighted cross offset from the
        predicted curve per stretch, and its 1-sigma (stretches where that light is
        10 sigma or more).
    """

    residual_adu: NDArray[np.float32]
    variance_adu2: NDArray[np.float32]
    wavelength_nm: NDArray[np.float64]
    level_adu: NDArray[np.float64]
    slope_adu_px: NDArray[np.float64]
    trace_wavelength_nm: NDArray[np.float64] = dataclasses.field(default_factory=lambda: np.zeros(0))
    trace_offset_px: NDArray[np.float64] = dataclasses.field(default_factory=lambda: np.zeros(0))
    trace_err_px: NDArray[np.float64] = dataclasses.field(default_factory=lambda: np.zeros(0))
    star_mask: None = None
    gain_e_per_adu: None = None

    def residual(self, frame: Frame) -> NDArray[np.float32]:
        return self.residual_adu

    def variance(self, frame: Frame, residual: NDArray | None = None) -> NDArray[np.float32]:
        return self.variance_adu2

    def sample(self, frame: Frame, rows: NDArray, cols: NDArray) -> tuple[NDArray, NDArray, NDArray]:
        """Residual, variance and sky-only variance at some pixels (the star's shot noise is in the
        stack's scatter and cannot be told apart: both variances are the same)."""
        var = self.variance_adu2[rows, cols]
        return self.residual_adu[rows, cols], var, var


def _clipped_line(off: NDArray, val: NDArray, *, two_sided: bool) -> tuple[float, float, float, int]:
    """Robust ``val = a + b off`` (3-sigma clipping, MAD scale): a, b, var(a), n used."""
    keep = np.ones(val.size, bool)
    a = b = 0.0
    scale = 0.0
    for _ in range(5):
        o, v = off[keep], val[keep]
        if two_sided:
            design = np.stack([np.ones_like(o), o], axis=1)
            (a, b), *_ = np.linalg.lstsq(design, v, rcond=None)
        else:
            a, b = float(np.median(v)), 0.0
        res = val - a - b * off
        scale = _MAD_TO_SIGMA * float(np.median(np.abs(res[keep])))
        new = np.abs(res) <= 3.0 * max(scale, 1e-6)
        if np.array_equal(new, keep) or np.count_nonzero(new) < 6:
            break
        keep = new
    n = int(np.count_nonzero(keep))
    o = off[keep]
    # variance of the line's value at offset 0 (for a one-sided median: of a mean, to first order)
    spread = float(np.sum((o - o.mean()) ** 2)) if two_sided else np.inf
    var_a = scale**2 * (1.0 / n + (o.mean() ** 2 / spread if spread > 0 else 0.0))
    return float(a), float(b), float(var_a), n


def fit_sideband_sky(stack: StarStack, geometry: SpectralGeometry, x_px: float, y_px: float, *,
                     wavelength_range_nm: tuple[float, float], order: int = 1, inner_px: float = 9.0,
                     outer_px: float = 21.0, bin_px: float = 8.0,
                     aperture_px: float | None = None) -> SidebandSky:
    """Sky under the star's spectrum from two bands beside it.

    Parameters
    ----------
    stack : StarStack
    geometry : SpectralGeometry
    x_px, y_px : float
        Zeroth-order centroid.
    wavelength_range_nm : (float, float)
        Part of the spectrum to cover.
    order : int
    inner_px, outer_px : float
        The sidebands are the pixels whose cross offset from the curve is
        between these two distances, on both sides; the band under the spectrum
        is ``|offset| < inner_px``.
    bin_px : float
        Length along the spectrum of each stretch with its own sky line.
    aperture_px : float, optional
        Half-width of the aperture the extraction will sum (default ``inner_px``):
        sets how much of the sky fit's error each pixel carries (see the code).

    Returns
    -------
    SidebandSky
        Residual and variance over the band; NaN elsewhere and where no
        sideband stretch was usable.

    Raises
    ------
    ValueError
        The curve does not reach the sensor, or no stretch has sideband pixels.
    """
    if not 0 < inner_px < outer_px:
        raise ValueError(f"need 0 < inner_px < outer_px, got {inner_px}, {outer_px}")
    h, w = stack.signal.shape
    lo, hi = wavelength_range_nm
    disp = geometry.dispersion_nm_per_px(x_px, y_px, np.linspace(lo, hi, 32), order)
    step = 0.5 * float(np.nanmin(disp))  # half a pixel of arc per curve sample
    lam = np.arange(lo, hi + step, step)
    cx, cy = geometry.spectrum_pixel(x_px, y_px, lam, order)
    ok = np.isfinite(cx) & np.isfinite(cy) & (cx > -outer_px) & (cx < w + outer_px) & \
        (cy > -outer_px) & (cy < h + outer_px)
    if np.count_nonzero(ok) < 2:
        raise ValueError("the spectrum curve does not reach the sensor")
    lam, cx, cy = lam[ok], cx[ok], cy[ok]
    # pixels near the curve: a distance transform of the painted curve inside its bounding box
    r = int(math.ceil(outer_px)) + 2
    bx0, by0 = max(int(np.floor(cx.min())) - r, 0), max(int(np.floor(cy.min())) - r, 0)
    bx1, by1 = min(int(np.ceil(cx.max())) + r + 1, w), min(int(np.ceil(cy.max())) + r + 1, h)
    if bx1 <= bx0 or by1 <= by0:
        raise ValueError("the spectrum curve does not reach the sensor")
    painted = np.ones((by1 - by0, bx1 - bx0), bool)
    ix = np.clip(np.rint(cx).astype(int) - bx0, 0, bx1 - bx0 - 1)
    iy = np.clip(np.rint(cy).astype(int) - by0, 0, by1 - by0 - 1)
    painted[iy, ix] = False
    near = ndimage.distance_transform_edt(painted) <= outer_px + 1.0
    py, px = np.nonzero(near)
    px, py = px + bx0, py + by0
    pl, off = geometry.locate(x_px, y_px, px.astype(float), py.astype(float), order=order)
    val = stack.signal[py, px].astype(float)
    var = stack.variance[py, px].astype(float)
    usable = np.isfinite(pl) & np.isfinite(off) & np.isfinite(val) & np.isfinite(var) & \
        ~stack.saturated[py, px]
    side = usable & (np.abs(off) >= inner_px) & (np.abs(off) <= outer_px)
    # stretches of about bin_px pixels of arc along the spectrum
    disp_mid = float(np.nanmedian(disp))
    edges = np.arange(lam[0], lam[-1] + bin_px * disp_mid, bin_px * disp_mid)
    centres, levels, slopes, var_levels = [], [], [], []
    which = np.searchsorted(edges, pl[side]) - 1
    off_s, val_s = off[side], val[side]
    for j in range(edges.size - 1):
        sel = which == j
        n_left = np.count_nonzero(off_s[sel] < 0)
        n_right = np.count_nonzero(off_s[sel] > 0)
        if n_left + n_right < 8:
            continue
        a, b, va, _ = _clipped_line(off_s[sel], val_s[sel], two_sided=min(n_left, n_right) >= 4)
        centres.append(0.5 * (edges[j] + edges[j + 1]))
        levels.append(a)
        slopes.append(b)
        var_levels.append(va)
    if not centres:
        raise ValueError("no sky beside the spectrum (the sidebands are off the sensor or saturated)")
    c = np.asarray(centres)
    lev, slo, vlev = np.asarray(levels), np.asarray(slopes), np.asarray(var_levels)
    band = usable & (np.abs(off) < inner_px) & (pl >= c[0]) & (pl <= c[-1])
    if c.size == 1:
        band &= np.abs(pl - c[0]) <= 0.5 * bin_px * disp_mid
    sky = np.interp(pl[band], c, lev) + np.interp(pl[band], c, slo) * off[band]
    residual = np.full((h, w), np.nan, np.float32)
    variance = np.full((h, w), np.nan, np.float32)
    residual[py[band], px[band]] = val[band] - sky
    trace_wl, trace_off, trace_err = _trace(pl[band], off[band], val[band] - sky, var[band], edges)
    # the fitted sky's error is common to every pixel across the aperture, but the extraction adds
    # pixel variances as if independent: n pixels across then carry n * var instead of n^2 * var,
    # so each pixel gets n times the sky variance (exact for the aperture sum)
    n_across = 2.0 * (inner_px if aperture_px is None else aperture_px) + 1.0
    variance[py[band], px[band]] = var[band] + n_across * np.interp(pl[band], c, vlev)
    return SidebandSky(residual, variance, c, lev, slo, trace_wl, trace_off, trace_err)


def _trace(lam: NDArray, off: NDArray, resid: NDArray, var: NDArray,
           edges: NDArray) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Light-weighted cross offset of the star's light and its 1-sigma, per stretch where that
    light is 10 sigma or more."""
    which = np.searchsorted(edges, lam) - 1
    n = edges.size - 1
    ok = (which >= 0) & (which < n)
    w, r, o, v = which[ok], resid[ok], off[ok], var[ok]
    total = np.bincount(w, r, n)
    noise = np.sqrt(np.bincount(w, v, n))
    bright = total > 10.0 * np.maximum(noise, 1e-12)
    mean = np.bincount(w, r * o, n) / np.where(bright, total, 1.0)
    # centroid error: sum var (o - mean)^2 / total^2
    err = np.sqrt(np.bincount(w, v * (o - mean[w]) ** 2, n)) / np.where(bright, total, 1.0)
    centres = 0.5 * (edges[1:] + edges[:-1])
    return centres[bright], mean[bright], err[bright]


def _largest_drift(lam: NDArray, offset: NDArray, err: NDArray) -> float:
    """Largest offset, at either end, of a weighted straight line through the trace, less 2 sigma.

    A grating turned or tilted a little moves the spectrum sideways in proportion to the
    distance from the zeroth order, so a straight line in wavelength is the drift's shape;
    the 2 sigma keep noise from widening the aperture. 0 with fewer than three stretches.
    """
    if lam.size < 3:
        return 0.0
    x = lam - lam.mean()
    design = np.stack([np.ones_like(x), x], axis=1) / err[:, None]
    coef, *_ = np.linalg.lstsq(design, offset / err, rcond=None)
    cov = np.linalg.inv(design.T @ design)
    ends = np.array([[1.0, x[0]], [1.0, x[-1]]])
    pred = ends @ coef
    sig = np.sqrt(np.einsum("ij,jk,ik->i", ends, cov, ends))
    return float(np.max(np.clip(np.abs(pred) - 2.0 * sig, 0.0, None)))


# --------------------------------------------------------------------------- extraction


@dataclass(frozen=True, eq=False)
class _StaticTrack:
    """A zeroth order that does not move: the track interface of :func:`extract_spectra`."""

    x: float
    y: float
    t: float

    @property
    def time_s(self) -> NDArray:
        return np.array([self.t])

    @property
    def x_px(self) -> NDArray:
        return np.array([self.x])

    @property
    def y_px(self) -> NDArray:
        return np.array([self.y])

    @property
    def flux_adu(self) -> NDArray:
        return np.array([np.nan])

    def position(self, time_s: float) -> tuple[float, float]:
        return self.x, self.y


@dataclass(frozen=True, eq=False)
class StarSpectrum:
    """The first-order spectrum of a static star and how it was measured.

    Attributes
    ----------
    spectrum : Spectrum
        Linear ADU per nm per frame (``flux``, ``flux_err``, ``mask``).
    x_px, y_px : float
        Refined zeroth-order centroid.
    psf_sigma_px : float
        PSF width measured on the zeroth order.
    half_width_px : float
        Aperture half-width across the spectrum (widened by ``trace_offset_px``).
    flags : tuple of str
        From the extraction (e.g. ``"saturated"``, ``"spectrum_off_frame"``), and
        ``"star_trace_offset"`` when the light runs more than 1 px beside the predicted
        curve (the station's grating values are off: refine them with ``meteorspec calibrate``).
    trace_offset_px : float
        Largest cross offset of the star's light from the predicted curve.
    """

    spectrum: Spectrum
    x_px: float
    y_px: float
    psf_sigma_px: float
    half_width_px: float
    flags: tuple[str, ...]
    trace_offset_px: float = 0.0

    @property
    def snr(self) -> float:
        """Whole-spectrum SNR: summed flux over its error, unmasked bins."""
        s = self.spectrum
        ok = ~s.mask
        err = float(np.sqrt(np.sum((s.flux_err[ok] * s.bin_width_nm[ok]) ** 2)))
        return float(np.sum(s.flux[ok] * s.bin_width_nm[ok]) / err) if err > 0 else 0.0


def _star_grid(geometry: SpectralGeometry, x_px: float, y_px: float, *, camera: Camera, order: int,
               range_nm: tuple[float, float], edge_px: float, bin_px: float) -> NDArray[np.float64]:
    """Uniform bin centres over the part of the spectrum that lies on the sensor (``edge_px`` inside)."""
    lam = np.arange(range_nm[0], range_nm[1] + 1e-9, 1.0)
    xs, ys = geometry.spectrum_pixel(x_px, y_px, lam, order)
    on = (xs >= edge_px) & (xs <= camera.width - 1 - edge_px) & (ys >= edge_px) & \
        (ys <= camera.height - 1 - edge_px)
    if np.count_nonzero(on) < 2:
        return np.zeros(0)
    lo, hi = lam[on][0], lam[on][-1]
    disp = geometry.dispersion_nm_per_px(x_px, y_px, lam[on], order)
    width = bin_px * float(np.nanmedian(disp))
    n = max(int((hi - lo) // width), 1)
    return lo + width * (np.arange(n) + 0.5)


def extract_star_spectrum(stack: StarStack, geometry: SpectralGeometry, x_px: float, y_px: float, *,
                          camera: Camera, order: int = 1, psf_sigma_px: float = 1.5,
                          range_nm: tuple[float, float] = DEFAULT_RANGE_NM, bin_px: float = 2.0,
                          half_width_px: float | None = None) -> StarSpectrum:
    """The first-order spectrum of a star whose zeroth order is at ``(x_px, y_px)``.

    Parameters
    ----------
    stack : StarStack
    geometry : SpectralGeometry
        Station (or refined) lens and grating.
    x_px, y_px : float
        Zeroth-order centroid (:func:`refine_zeroth_order`).
    camera : Camera
    order : int
    psf_sigma_px : float
        Sets the default aperture, ``max(4, 3 psf_sigma_px)`` px either side.
    range_nm : (float, float)
        Outer wavelength limits; the grid covers the part on the sensor.
    bin_px : float
        Bin width in pixels of arc at the median dispersion (the response is
        smoothed over tens of nm later, so fine bins only add noise).
    half_width_px : float, optional
        Aperture half-width across the spectrum before widening (see the code: by the
        light's largest measured offset from the curve, at most 6 px).

    Returns
    -------
    StarSpectrum

    Raises
    ------
    ValueError
        The spectrum is not on the sensor or has no sky beside it.
    """
    hw = max(4.0, 3.0 * psf_sigma_px) if half_width_px is None else float(half_width_px)
    grid = _star_grid(geometry, x_px, y_px, camera=camera, order=order, range_nm=range_nm,
                      edge_px=hw + 1.0, bin_px=bin_px)
    if grid.size < 2:
        raise ValueError(f"the order-{order} spectrum of the star at ({x_px:.1f}, {y_px:.1f}) "
                         "is not on the sensor")
    half_bin = 0.5 * (grid[1] - grid[0])
    span = (grid[0] - half_bin - 5.0, grid[-1] + half_bin + 5.0)
    # A station geometry slightly off (a grating turned by a few tenths of a degree) moves the
    # far end of the spectrum sideways by pixels, and an aperture that clips it loses a
    # wavelength-dependent share of the light: a first pass with a wide band measures where the
    # light runs, and the aperture is widened by the largest offset (not narrowed: the
    # extraction still follows the predicted curve).
    probe = fit_sideband_sky(stack, geometry, x_px, y_px, order=order, inner_px=hw + 6.0, outer_px=hw + 18.0,
                             aperture_px=hw + 6.0, wavelength_range_nm=span)
    shift = _largest_drift(probe.trace_wavelength_nm, probe.trace_offset_px, probe.trace_err_px)
    hw_used = hw + min(shift, 6.0)
    # sidebands: a gap of 3 px beyond the aperture (PSF wings), then 12 px of sky on each side
    sky = fit_sideband_sky(stack, geometry, x_px, y_px, order=order, inner_px=hw_used + 3.0,
                           outer_px=hw_used + 15.0, aperture_px=hw_used, wavelength_range_nm=span)
    # one exposure of a source at rest: the time and exposure only pair the frame with the track
    frame = Frame(index=0, time_s=0.5, exposure_s=1.0, signal=stack.signal, saturated=stack.saturated)
    fs = extract_spectra([frame], sky, _StaticTrack(x_px, y_px, 0.5), geometry, camera=camera,
                         wavelength_grid_nm=grid, order=order, optimal=False, half_width_px=hw_used,
                         psf_sigma_px=psf_sigma_px, low_snr_threshold=0.0)
    flux, var = fs.flux[0], fs.variance[0]
    bad = fs.mask[0] | ~np.isfinite(flux) | ~np.isfinite(var) | (var <= 0)
    spec = Spectrum(fs.wavelength_nm, fs.bin_width_nm, np.where(bad, np.nan, flux),
                    np.where(bad, np.nan, np.sqrt(np.where(bad, 1.0, var))), bad,
                    fs.correlation[0] if fs.correlation.size else np.zeros((0, 0)))
    flags = tuple(f for f in fs.flags if f not in ("optimal_extraction", "low_snr"))
    if shift > 1.0:
        flags += ("star_trace_offset",)
    return StarSpectrum(spec, float(x_px), float(y_px), float(psf_sigma_px), hw_used, flags, shift)


def measure_star(stack: StarStack, geometry: SpectralGeometry, x_px: float, y_px: float, *,
                 camera: Camera, order: int = 1, search_px: float = 8.0,
                 range_nm: tuple[float, float] = DEFAULT_RANGE_NM, bin_px: float = 2.0) -> StarSpectrum:
    """Refine the zeroth order near ``(x_px, y_px)`` and extract the star's spectrum (module steps 2-4)."""
    x, y, sigma = refine_zeroth_order(stack, x_px, y_px, search_px=search_px)
    return extract_star_spectrum(stack, geometry, x, y, camera=camera, order=order, psf_sigma_px=sigma,
                                 range_nm=range_nm, bin_px=bin_px)


# --------------------------------------------------------------------------- response


@dataclass(frozen=True, eq=False)
class StarResponse:
    """A response curve from one star, with what it was derived from.

    Attributes
    ----------
    response : DerivedResponse
        Smoothed, normalised to a maximum of 1 (contract section 3: any positive scale).
    star : StarSpectrum
    temperature_k : float
    altitude_deg : float
        Of the star (NaN without ``[pointing]``).
    flags : tuple of str
        ``"extinction_corrected"`` when the atmosphere was divided out,
        ``"star_spectrum_outliers_masked"`` when :func:`compact_outliers` removed
        bins, plus the extraction's flags (``"saturated"``, ``"spectrum_off_frame"``).
    """

    response: DerivedResponse
    star: StarSpectrum
    temperature_k: float
    altitude_deg: float
    flags: tuple[str, ...]


def star_response(stack: StarStack, station: Station, x_px: float, y_px: float, temperature_k: float, *,
                  geometry: SpectralGeometry | None = None, order: int | None = None,
                  extinction: ExtinctionModel | None = None, search_px: float = 8.0,
                  range_nm: tuple[float, float] = DEFAULT_RANGE_NM, bin_px: float = 2.0,
                  smooth_nm: float = 25.0, step_nm: float = 5.0, min_snr: float = 5.0,
                  max_rel_err: float = 0.05) -> StarResponse:
    """Relative response of a station from one star of known effective temperature.

    Parameters
    ----------
    stack : StarStack
        The clip, stacked (:func:`stack_clip`).
    station : Station
    x_px, y_px : float
        Approximate zeroth-order position of the star.
    temperature_k : float
        Effective temperature; the star is taken as a black body.
    geometry : SpectralGeometry, optional
        Default: the station's.
    order : int, optional
        Default: the first order listed in the station's ``[grating] orders``.
    extinction : ExtinctionModel, optional
        Divide out the atmosphere along the line of sight to the star
        (needs the station's ``[pointing]``).
    search_px, range_nm, bin_px
        See :func:`refine_zeroth_order` and :func:`extract_star_spectrum`.
    smooth_nm, step_nm
        See :func:`meteorspec.calibrate.derive_response`.
    min_snr : float
        The curve covers the stretch where the star's spectrum, smoothed over
        ``smooth_nm``, has at least this SNR per bin.
    max_rel_err : float
        Rows of the curve whose relative 1-sigma exceeds this are cut from
        the ends (:func:`trim_response`).

    Returns
    -------
    StarResponse

    Raises
    ------
    ValueError
        Nonsense temperature, no star at the position, spectrum off the sensor,
        too few usable bins, or extinction asked for without ``[pointing]``.

    Notes
    -----
    ``R(lambda) = F(lambda) / (B_lambda(T_eff) T_atm(lambda))`` with
    ``F`` the star's spectrum in ADU per nm (contract section 3: response to
    energy flux), smoothed and normalised by :func:`derive_response`.
    """
    lo_k, hi_k = TEMPERATURE_RANGE_K
    if not (math.isfinite(temperature_k) and lo_k <= temperature_k <= hi_k):
        raise ValueError(f"star temperature must be within {lo_k:.0f}-{hi_k:.0f} K, got {temperature_k}")
    geometry = SpectralGeometry.from_station(station) if geometry is None else geometry
    order = station.grating.orders[0] if order is None else order
    star = measure_star(stack, geometry, x_px, y_px, camera=station.camera, order=order,
                        search_px=search_px, range_nm=range_nm, bin_px=bin_px)
    flags = list(star.flags)
    altitude = float("nan")
    trans = None
    if station.pointing is not None:
        altitude = float(pixel_altaz(geometry.lens, station.pointing, star.x_px, star.y_px)[0])
    if extinction is not None:
        if station.pointing is None:
            raise ValueError("extinction needs the station's [pointing] section")
        if not altitude > 0:
            raise ValueError(f"the star is below the horizon (altitude {altitude:.1f} deg)")
        trans = transmission(star.spectrum.wavelength_nm, altitude, model=extinction)
        flags.append("extinction_corrected")
    # The usable range is decided on the smoothed spectrum, then every bin inside it is used
    # whatever its own SNR: a per-bin cut keeps only the upward noise where the star fades and
    # biases the ends of the curve high.
    usable, best_snr = _well_exposed(star.spectrum, min_snr=min_snr, smooth_nm=smooth_nm)
    if np.count_nonzero(usable) < 5:
        raise ValueError(f"the star is too faint: its spectrum reaches {best_snr:.1f} sigma per bin "
                         f"(smoothed), {min_snr:g} needed; use a brighter star or a longer clip")
    compact = compact_outliers(star.spectrum)
    if np.any(compact & usable):
        flags.append("star_spectrum_outliers_masked")
    spectrum = dataclasses.replace(star.spectrum, mask=star.spectrum.mask | ~usable | compact)
    response = derive_response(spectrum, temperature_k, smooth_nm=smooth_nm, step_nm=step_nm,
                               min_snr=-np.inf, transmission=trans)
    response = trim_response(response, max_rel_err=max_rel_err)
    return StarResponse(response, star, float(temperature_k), altitude, tuple(flags))


def compact_outliers(spectrum: Spectrum, *, step_bins: int = 3, n_sigma: float = 4.0,
                     rel_floor: float = 0.05) -> NDArray[np.bool_]:
    """Bins that stand out from the star's smooth spectrum: other stars' zeroth orders, hot pixels.

    A black body times a response is smooth over tens of nm, while another star's zeroth
    order on the spectrum is a bump about three two-pixel bins wide. Each bin is compared
    with the straight line through the bins ``step_bins`` away on either side (or, at an end
    or a gap, the two beyond it on one side): exact for a linear continuum, and the bump
    itself is not in the prediction. A bin further than ``n_sigma`` of the difference's error
    plus ``rel_floor`` of the level (room for the continuum's curvature) is left out, the
    most significant first, and the test repeated without it; the bins found and their
    neighbours (the bump's wings) are returned.

    Returns
    -------
    ndarray of bool, shape (n_wl,)
        True for the bins to leave out.
    """
    ok = ~spectrum.mask & np.isfinite(spectrum.flux) & np.isfinite(spectrum.flux_err)
    k = int(step_bins)
    core = np.zeros(ok.size, bool)
    # greedy: the most significant bin first, then again without it, so that a bump does not
    # also condemn the bins whose prediction it entered
    for _ in range(max(ok.size // 4, 1)):
        use = ok & ~core
        f = np.where(use, spectrum.flux, np.nan)
        v = np.where(use, spectrum.flux_err, np.nan) ** 2
        pred, pvar = _line_prediction(f, v, k)
        with np.errstate(invalid="ignore"):
            excess = (np.abs(f - pred) - rel_floor * np.abs(pred)) / np.sqrt(v + pvar)
        excess = np.where(use & np.isfinite(excess), excess, -np.inf)
        j = int(np.argmax(excess))
        if not excess[j] > n_sigma:
            break
        core[j] = True
    return ndimage.binary_dilation(core) & ok


def _line_prediction(f: NDArray, v: NDArray, k: int) -> tuple[NDArray, NDArray]:
    """Value and variance at each bin of the straight line through bins ``k`` away (NaN = missing).

    Both sides when possible, else the two bins ``k`` and ``2k`` away on one side.
    """

    def shifted(a: NDArray, by: int) -> NDArray:
        out = np.full(a.size, np.nan)
        if by > 0:
            out[:-by] = a[by:]
        else:
            out[-by:] = a[:by]
        return out

    options = [(0.5 * (shifted(f, -k) + shifted(f, k)), 0.25 * (shifted(v, -k) + shifted(v, k))),
               (2 * shifted(f, k) - shifted(f, 2 * k), 4 * shifted(v, k) + shifted(v, 2 * k)),
               (2 * shifted(f, -k) - shifted(f, -2 * k), 4 * shifted(v, -k) + shifted(v, -2 * k))]
    pred = np.full(f.size, np.nan)
    pvar = np.full(f.size, np.nan)
    for p, pv in options:
        take = np.isnan(pred) & np.isfinite(p) & np.isfinite(pv)
        pred[take], pvar[take] = p[take], pv[take]
    return pred, pvar


def _well_exposed(spectrum: Spectrum, *, min_snr: float, smooth_nm: float) -> tuple[NDArray[np.bool_], float]:
    """The contiguous stretch around the best bin where the local typical SNR per bin is ``min_snr`` or more.

    Returns the mask of those bins and the best local SNR.

    The local typical SNR is the Gaussian-smoothed flux over the smoothed error (sigma
    ``smooth_nm``), which unlike a bin's own flux over error does not follow the bin's noise.
    """
    ok = ~spectrum.mask & np.isfinite(spectrum.flux) & np.isfinite(spectrum.flux_err)
    out = np.zeros(ok.size, bool)
    if np.count_nonzero(ok) < 2:
        return out, 0.0
    width = float(np.median(spectrum.bin_width_nm))
    sigma_bins = max(smooth_nm / width, 0.5)
    w = ndimage.gaussian_filter1d(ok.astype(float), sigma_bins, mode="constant")
    f = ndimage.gaussian_filter1d(np.where(ok, spectrum.flux, 0.0), sigma_bins, mode="constant")
    e = ndimage.gaussian_filter1d(np.where(ok, spectrum.flux_err, 0.0), sigma_bins, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = np.where(ok & (w > 0) & (e > 0), f / e, -np.inf)
    good = snr >= min_snr
    k = int(np.argmax(snr))
    if not good.any():
        return out, max(float(snr[k]), 0.0)
    run = _run_around(good, k)
    out[run] = ok[run]
    return out, float(snr[k])


def _run_around(good: NDArray[np.bool_], k: int) -> slice:
    """The contiguous stretch of True values holding index ``k`` (which must be True)."""
    lo = hi = k
    while lo > 0 and good[lo - 1]:
        lo -= 1
    while hi < good.size - 1 and good[hi + 1]:
        hi += 1
    return slice(lo, hi + 1)


def trim_response(response: DerivedResponse, *, max_rel_err: float = 0.05) -> DerivedResponse:
    """Keep the contiguous stretch around the best-measured row where the relative error is small.

    Where a star fades (blue end of a cool star, the sensor's red cut-off) the curve is noisy,
    and its first and last rows rest on a one-sided smoothing kernel. Rows whose 1-sigma exceeds
    ``max_rel_err`` of their value are dropped from each end inwards; the rest is renormalised
    to a maximum of 1.

    Raises
    ------
    ValueError
        Fewer than two rows meet the limit.
    """
    resp = response.response
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = response.response_err / resp
    good = np.isfinite(rel) & (resp > 0) & (rel <= max_rel_err)
    if np.count_nonzero(good) < 2:
        best = float(np.nanmin(rel)) if np.any(np.isfinite(rel)) else float("nan")
        raise ValueError(f"the star is too faint: no stretch of its response is known to {max_rel_err:.0%} "
                         f"(best {best:.0%}); use a brighter star or a longer clip")
    sel = _run_around(good, int(np.nanargmin(np.where(good, rel, np.nan))))
    if sel.stop - sel.start < 2:
        raise ValueError("the star is too faint: its well-measured response is a single row")
    scale = float(np.max(resp[sel]))
    return DerivedResponse(response.wavelength_nm[sel].copy(), resp[sel] / scale,
                           response.response_err[sel] / scale, response.temperature_k)



@dataclass(frozen=True, eq=False)
class CombinedResponse:
    """One response curve from several stars, with how each star agrees with the others.

    Attributes
    ----------
    response : DerivedResponse
        Inverse-variance mean of the used stars' curves, each scaled by ``scale``;
        normalised to a maximum of 1. ``temperature_k`` is NaN (several stars).
    scale : ndarray
        Factor applied to each star's curve (each arrives normalised to its own
        maximum); for a star left out, the factor that best matches it to the curve.
    used : ndarray of bool
        Stars in the combination (a star that disagrees with the rest is left out,
        see :func:`combine_responses`).
    n_rows : ndarray of int
        Rows each star covers.
    agreement_rms, agreement_max : ndarray
        RMS and largest absolute normalised deviation of each star's scaled curve
        from the combination of the *other used* stars, over the rows they share
        (``(s_i r_i - R_others) / sqrt((s_i e_i)**2 + e_others**2)``); NaN for a
        star that shares no row with them. Neighbouring rows are correlated by
        the smoothing, so these are indicators, not chi-square statistics.
    """

    response: DerivedResponse
    scale: NDArray[np.float64]
    used: NDArray[np.bool_]
    n_rows: NDArray[np.int64]
    agreement_rms: NDArray[np.float64]
    agreement_max: NDArray[np.float64]

    def disagreeing(self, *, max_sigma: float = 4.0) -> NDArray[np.bool_]:
        """Stars whose largest deviation from the other used stars exceeds ``max_sigma``."""
        return np.nan_to_num(self.agreement_max, nan=0.0) > max_sigma


def _weighted_mean(values: NDArray, errors: NDArray) -> tuple[NDArray, NDArray]:
    """Row-wise inverse-variance mean over stars (axis 0) ignoring NaN; NaN where no star covers a row."""
    ok = np.isfinite(values) & np.isfinite(errors) & (errors > 0)
    w = np.where(ok, 1.0 / np.where(ok, errors, 1.0) ** 2, 0.0)
    total = w.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(total > 0, (w * np.where(ok, values, 0.0)).sum(axis=0) / total, np.nan)
        err = np.where(total > 0, 1.0 / np.sqrt(total), np.nan)
    return mean, err


def _tied(covered: NDArray[np.bool_]) -> bool:
    """Whether every star is linked to the first by a chain of shared rows."""
    overlap = (covered[:, None, :] & covered[None, :, :]).any(axis=2)
    reached = np.zeros(covered.shape[0], bool)
    reached[0] = True
    for _ in range(covered.shape[0]):
        reached |= overlap[reached].any(axis=0)
    return bool(reached.all())


def _fit_scales(val: NDArray, err: NDArray, covered: NDArray[np.bool_], used: NDArray[np.bool_],
                n_iter: int) -> NDArray:
    """Scales of every star against the combination of the used ones (log-space weighted means)."""
    scale = np.ones(val.shape[0])
    first = int(np.flatnonzero(used)[0])
    for _ in range(n_iter):
        comb, _ = _weighted_mean(val[used] * scale[used, None], err[used] * scale[used, None])
        new = np.ones_like(scale)
        for i in range(val.shape[0]):
            take = covered[i] & np.isfinite(comb) & (comb > 0)
            if np.any(take):  # log r_i carries the relative error e_i / r_i
                wgt = (val[i, take] / err[i, take]) ** 2
                new[i] = math.exp(float(np.sum(wgt * np.log(comb[take] / val[i, take])) / np.sum(wgt)))
        new /= new[first]  # the overall scale is free; the caller normalises
        done = np.max(np.abs(new / scale - 1.0)) < 1e-12
        scale = new
        if done:
            break
    return scale


def _agreement(val: NDArray, err: NDArray, covered: NDArray[np.bool_], used: NDArray[np.bool_],
               scale: NDArray) -> tuple[NDArray, NDArray]:
    n = val.shape[0]
    rms, worst = np.full(n, np.nan), np.full(n, np.nan)
    for i in range(n):
        others = used & (np.arange(n) != i)
        if not np.any(others):
            continue
        rest, rest_err = _weighted_mean(val[others] * scale[others, None], err[others] * scale[others, None])
        both = covered[i] & np.isfinite(rest)
        if np.any(both):
            z = (val[i, both] * scale[i] - rest[both]) / np.hypot(err[i, both] * scale[i], rest_err[both])
            rms[i] = float(np.sqrt(np.mean(z * z)))
            worst[i] = float(np.max(np.abs(z)))
    return rms, worst


def combine_responses(responses: Sequence[DerivedResponse], *, reject_sigma: float | None = 4.0,
                      n_iter: int = 100) -> CombinedResponse:
    """Combine response curves of several stars (same station, same row spacing) into one.

    Each curve is known only up to a scale (contract section 3; every star is
    normalised to its own maximum), so the scales are fitted with the curve:
    the combination is the inverse-variance mean of ``s_i r_i``, and each
    ``s_i`` is the weighted mean ratio (in logarithm) of the combination to
    ``r_i`` over the rows it covers, iterated to a fixed point. Stars covering
    different ranges extend the curve; where they share rows they tie each
    other's scale.

    A star given the wrong temperature has a tilted curve, one with a neighbour's
    light on its spectrum a bump. Each star is compared with the combination of
    the others; with three or more stars, the worst one (largest RMS deviation) is
    left out while its largest deviation exceeds ``reject_sigma`` and at least two tied stars stay
    (with two stars there is no telling which is wrong: both stay, and both show
    the deviation).

    Parameters
    ----------
    responses : sequence of DerivedResponse
        Curves on rows that are multiples of one spacing (as
        :func:`meteorspec.calibrate.derive_response` writes them).
    reject_sigma : float or None
        Leave-out threshold on a star's largest normalised deviation; None keeps every star.
    n_iter : int
        Iterations of the scale fit (it converges in a few when the stars overlap well).

    Returns
    -------
    CombinedResponse

    Raises
    ------
    ValueError
        No curve, curves whose rows do not share one spacing, or stars not tied
        together by shared rows (a star's scale would be arbitrary).
    """
    curves = list(responses)
    if not curves:
        raise ValueError("no response curve to combine")
    steps = {round(float(np.median(np.diff(c.wavelength_nm))), 6) for c in curves if c.wavelength_nm.size > 1}
    if len(steps) != 1:
        raise ValueError(f"the curves have different row spacings ({sorted(steps)} nm); derive them with one --step-nm")
    step = steps.pop()
    keys = [np.rint(c.wavelength_nm / step).astype(np.int64) for c in curves]
    if any(np.any(np.abs(k * step - c.wavelength_nm) > 1e-6 * step) for k, c in zip(keys, curves)):
        raise ValueError("the curves' rows are not on one grid of their spacing")
    grid = np.arange(min(k[0] for k in keys), max(k[-1] for k in keys) + 1)
    n = len(curves)
    val = np.full((n, grid.size), np.nan)
    err = np.full((n, grid.size), np.nan)
    for i, (k, c) in enumerate(zip(keys, curves)):
        val[i, k - grid[0]] = c.response
        err[i, k - grid[0]] = c.response_err
    covered = np.isfinite(val) & np.isfinite(err) & (err > 0) & (val > 0)
    val = np.where(covered, val, np.nan)
    if not _tied(covered):
        raise ValueError("some stars share no wavelength with the others (directly or through other stars); "
                         "their scale is unknown")
    used = np.ones(n, bool)
    while True:
        scale = _fit_scales(val, err, covered, used, n_iter)
        rms, worst = _agreement(val, err, covered, used, scale)
        if reject_sigma is None or used.sum() < 3:
            break
        # the worst star by its RMS deviation (a star's largest deviation can sit where only the
        # odd star covers the others' side, and then two stars look equally bad)
        i = int(np.argmax(np.where(used, np.nan_to_num(rms, nan=0.0), -np.inf)))
        trial = used.copy()
        trial[i] = False
        if not np.nan_to_num(worst[i], nan=0.0) > reject_sigma or not _tied(covered[trial]):
            break
        used = trial
    comb, comb_err = _weighted_mean(val[used] * scale[used, None], err[used] * scale[used, None])
    peak = float(np.nanmax(comb))
    keep = np.isfinite(comb)
    response = DerivedResponse((grid[keep] * step).astype(float), comb[keep] / peak, comb_err[keep] / peak,
                               float("nan"))
    return CombinedResponse(response, scale / peak, used, covered.sum(axis=1), rms, worst)
