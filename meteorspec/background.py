"""Per-pixel background and noise model of an event, from frames without the meteor.

The sky, the static stars and the stars' own first-order spectra do not move
during a clip of a few seconds, so a robust temporal statistic over frames
without the meteor gives the background level of every pixel. The noise model
is the one of a photon-counting sensor, read noise plus Poisson noise of the
collected charge (common practice, e.g. Janesick 2007, *Photon Transfer*, SPIE
PM170), plus the temporal excess of twinkling stars (scintillation), which is
measured on the star pixels.

Streaming: one pass over all frames builds a 4x4-binned copy (1/16 of the
data, :func:`bin_frames`, shared with the tracker's detection); its 8x8 blocks
choose the meteor-free frames, and only those (at most ``max_frames``) are then
read again at full resolution. After tracking, :func:`refine_background`
re-estimates the pixels the meteor reaches with its light masked frame by frame.
"""

from __future__ import annotations

from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .config import Camera

__all__ = ["Background", "BinnedFrames", "StoredFrameBinner", "bin_frames", "estimate_background", "refine_background", "meteor_mask", "bin_rows", "frame_rows",
           "BIN_PX"]

#: Block size (pixels, both axes, in image coordinates) of the binned copy used for selection and detection.
BIN_PX = 4
# Block size of the copy used to choose the meteor-free frames (kept for the whole clip).
_SELECT_BIN_PX = 8
# Threads for the per-pixel temporal statistics (row blocks); more gain nothing on the
# 2-core machine this is measured on, where a batch runs one event per core anyway.
_STATS_THREADS = 2
# MAD -> Gaussian sigma (common practice: 1 / Phi^-1(3/4)).
_MAD_TO_SIGMA = 1.4826


def frame_rows(full: np.ndarray, frame) -> np.ndarray:
    """Rows of a full-frame ``(height, width)`` array that ``frame.signal`` holds (a view)."""
    n_rows = frame.shape[0]
    return full[frame.y_start_px::frame.y_step_px][:n_rows]


def bin_rows(img: np.ndarray, by: int, bx: int) -> np.ndarray:
    """Block mean over ``by`` rows x ``bx`` columns; trailing partial blocks are dropped.

    Strided slice sums: about 7x faster than a reshape-mean on a 1280x960 frame. Stored
    8- and 16-bit values are summed in an integer type wide enough for the block (0.5 ms
    against 0.85 ms per 8-bit 1280x960 frame) and give the same float32 means: float32
    holds every such sum exactly.
    """
    hb, wb = img.shape[0] // by, img.shape[1] // bx
    a = img[: hb * by, : wb * bx]
    acc = np.float32
    if a.dtype.kind == "u" and a.dtype.itemsize <= 2 and by * bx * np.iinfo(a.dtype).max < 2**24:
        acc = np.uint16 if by * bx * np.iinfo(a.dtype).max <= np.iinfo(np.uint16).max else np.uint32
    rows = a[0::by].astype(acc, copy=True)
    for i in range(1, by):
        rows += a[i::by]
    out = rows[:, 0::bx].copy()
    for j in range(1, bx):
        out += rows[:, j::bx]
    if acc is not np.float32:
        out = out.astype(np.float32)
    out *= 1.0 / (by * bx)
    return out


@dataclass(frozen=True, eq=False)
class BinnedFrames:
    """Every frame (or field) of an event as ``BIN_PX`` x ``BIN_PX`` block means, with its frame data.

    One full pass over the video makes it (:func:`bin_frames`); the background's
    choice of meteor-free frames and the tracker's detection both work on it, so
    neither needs a full-resolution pass of its own. 1/16 of the linear data.

    Attributes
    ----------
    data : list of ndarray, float32
        Block means of ``BIN_PX`` image rows (``BIN_PX // y_step_px`` field rows)
        by ``BIN_PX`` columns, one array per frame.
    time_s, exposure_s : ndarray of float
    index, y_start_px, y_step_px, n_rows : ndarray of int
        ``Frame`` attributes (``n_rows``: rows of ``Frame.signal``).
    """

    data: list
    time_s: np.ndarray
    exposure_s: np.ndarray
    index: np.ndarray
    y_start_px: np.ndarray
    y_step_px: np.ndarray
    n_rows: np.ndarray

    def __len__(self) -> int:
        return len(self.data)


def bin_frames(frames, *, camera: Camera) -> BinnedFrames:
    """One pass over all frames: ``BIN_PX`` x ``BIN_PX`` block means and frame data.

    Raises
    ------
    ValueError
        Frames that do not fit the camera or hold NaN or infinite values.
    """
    h, w = camera.height, camera.width
    stored = getattr(frames, "stored", None)
    if isinstance(stored, np.ndarray) and stored.ndim == 3 and stored.dtype.kind == "u":
        return _bin_stored(frames, stored, camera)
    data, meta = [], []
    for frame in frames:
        _check_frame(frame, h, w)
        by = max(BIN_PX // frame.y_step_px, 1)
        data.append(bin_rows(frame.signal, by, BIN_PX))
        meta.append((frame.time_s, frame.exposure_s, frame.index, frame.y_start_px, frame.y_step_px,
                     frame.signal.shape[0]))
    cols = list(zip(*meta)) if meta else [()] * 6
    return BinnedFrames(data=data, time_s=np.array(cols[0], float), exposure_s=np.array(cols[1], float),
                        index=np.array(cols[2], int), y_start_px=np.array(cols[3], int),
                        y_step_px=np.array(cols[4], int), n_rows=np.array(cols[5], int))


def _robust_sigma(x: np.ndarray, axis=None) -> np.ndarray:
    med = np.median(x, axis=axis, keepdims=True)
    return _MAD_TO_SIGMA * np.median(np.abs(x - med), axis=axis)


@dataclass(frozen=True, eq=False)
class Background:
    """Background level and noise of every pixel of an event (full-frame rows).

    Attributes
    ----------
    level_adu : ndarray of shape (height, width), float32
        Background level, linear ADU (sky, stars and the stars' spectra).
    noise_adu : ndarray of shape (height, width), float32
        1-sigma temporal noise of a meteor-free frame: read, photon and scintillation noise.
    read_noise_adu : float
        Read noise (station value, or estimated from the data).
    gain_e_per_adu : float
        Electrons per linear ADU (station value, or estimated from the data).
    star_mask : ndarray of shape (height, width), bool
        Static stars, their first-order streaks and twinkling pixels.
    frames_used : ndarray of int
        ``Frame.index`` of the frames (fields) the model came from.
    scintillation : float
        Fractional scintillation of star light: the excess temporal sigma of a
        star pixel divided by its level above the local sky.
    sky_adu : ndarray of shape (height, width), float32
        Smooth sky level without stars (the level's large-scale part).
    gain_estimated, read_noise_estimated : bool
        True where the value was estimated from the data rather than read from the station.
    level_samples : int
        Frames (of one field parity) whose mean gives a pixel's level: the first estimate's
        count, or where :func:`refine_background` re-estimated pixels from fewer, their median
        count. A star's twinkle averages down in the level by ``1 / sqrt(level_samples)`` and
        is then common to every frame the level is subtracted from. 0: unknown.
    level_count : ndarray of shape (height, width), uint16, optional
        Samples each pixel's level is the mean of (after clipping): the level's
        noise is the pixel's sky noise over this count, and it is common to every
        frame the level is subtracted from (see :meth:`level_variance`). None: unknown.
    """

    level_adu: np.ndarray
    noise_adu: np.ndarray
    read_noise_adu: float
    gain_e_per_adu: float
    star_mask: np.ndarray
    frames_used: np.ndarray
    scintillation: float = 0.0
    sky_adu: np.ndarray | None = None
    gain_estimated: bool = False
    read_noise_estimated: bool = False
    level_samples: int = 0
    level_count: np.ndarray | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return self.level_adu.shape

    def residual(self, frame) -> np.ndarray:
        """``frame.signal`` minus the background level on the frame's rows, float32.

        Raises
        ------
        ValueError
            If the frame's width or rows do not fit the model.
        """
        self._check(frame)
        return frame.signal - frame_rows(self.level_adu, frame)

    def variance(self, frame, residual: np.ndarray | None = None) -> np.ndarray:
        """Per-pixel variance (ADU^2) of the frame's rows.

        ``read^2 + max(level + residual, 0) / gain + (scintillation * star light)^2``:
        the photon term uses the frame's own signal, so it includes the meteor's
        light. ``residual`` may be passed to save recomputing it.
        """
        self._check(frame)
        if residual is None:
            residual = self.residual(frame)
        level = frame_rows(self.level_adu, frame)
        var = np.maximum(level + residual, 0.0)
        var *= np.float32(1.0 / self.gain_e_per_adu)
        var += np.float32(self.read_noise_adu**2)
        if self.scintillation > 0 and self.sky_adu is not None:
            star = np.where(frame_rows(self.star_mask, frame),
                            np.maximum(level - frame_rows(self.sky_adu, frame), 0.0), 0.0)
            var += (np.float32(self.scintillation) * star) ** 2
        return var.astype(np.float32, copy=False)

    def sample(self, frame, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Residual, variance and sky-only variance at some pixels of a frame, float32.

        The values of :meth:`residual`, :meth:`variance` (with the frame's residual)
        and :meth:`variance` with a zero residual at ``frame.signal[rows, cols]``,
        without computing them for the whole frame.
        """
        self._check(frame)
        y = frame.y_start_px + frame.y_step_px * np.asarray(rows)
        level = self.level_adu[y, cols]
        resid = frame.pixels(rows, cols)[0] - level
        inv_gain = np.float32(1.0 / self.gain_e_per_adu)
        read2 = np.float32(self.read_noise_adu**2)
        var = np.maximum(level + resid, 0.0) * inv_gain + read2
        var_sky = np.maximum(level, np.float32(0.0)) * inv_gain + read2
        if self.scintillation > 0 and self.sky_adu is not None:
            star = np.where(self.star_mask[y, cols], np.maximum(level - self.sky_adu[y, cols], 0.0), 0.0)
            extra = (np.float32(self.scintillation) * star) ** 2
            var, var_sky = var + extra, var_sky + extra
        return (resid.astype(np.float32, copy=False), var.astype(np.float32, copy=False),
                var_sky.astype(np.float32, copy=False))

    def level_variance(self, y_px: np.ndarray, x_px: np.ndarray) -> np.ndarray:
        """Variance (ADU^2) of the level at full-frame pixels ``(y_px, x_px)``, float32.

        The level is a (clipped) mean of ``level_count`` samples, each with the
        pixel's read and photon noise: ``(read^2 + max(level, 0) / gain) / count``.
        Star scintillation is left out (a star's twinkle is one factor over all
        its pixels; the extraction carries it on its own). 0 where the count is
        unknown.
        """
        if self.level_count is None or self.level_count.shape != self.level_adu.shape:
            return np.zeros(np.shape(y_px), np.float32)
        level = self.level_adu[y_px, x_px]
        count = self.level_count[y_px, x_px].astype(np.float32)
        var = np.maximum(level, np.float32(0.0)) * np.float32(1.0 / self.gain_e_per_adu) + np.float32(
            self.read_noise_adu**2)
        return np.where(count > 0, var / np.maximum(count, np.float32(1.0)), np.float32(0.0)).astype(np.float32)

    def _check(self, frame) -> None:
        h, w = self.level_adu.shape
        n_rows, width = frame.shape
        last = frame.y_start_px + frame.y_step_px * (n_rows - 1)
        if width != w or frame.y_start_px < 0 or last >= h:
            raise ValueError(f"frame {frame.index} ({n_rows} rows from y={frame.y_start_px} step "
                             f"{frame.y_step_px}, width {width}) does not fit the {w}x{h} background")


def _model_var(level: np.ndarray, read_noise: float, gain: float) -> np.ndarray:
    return read_noise**2 + np.maximum(level, 0.0) / gain


def _fit_photon_transfer(level: np.ndarray, var: np.ndarray, camera: Camera, *,
                         dof: int) -> tuple[float, float, bool, bool]:
    """Read noise and gain from the station, or from var = read^2 + level / gain over many pixels.

    Notes
    -----
    The photon-transfer relation (Janesick 2007). Pixels are grouped in level
    quantiles; each group's median variance (robust to stars and outliers) is fitted
    with a weighted straight line. With too narrow a range of levels only one of the
    two terms can be measured: then the station's value of the other is used, or
    when both are absent the read noise is taken as the 8-bit quantisation floor
    ``sqrt(1/12)`` ADU and the gain from the rest (documented assumption).
    """
    read, gain = camera.read_noise_adu, camera.gain_e_per_adu
    if read is not None and gain is not None:
        return float(read), float(gain), False, False
    # a few hundred thousand pixels are plenty and keep this cheap
    stride = max(1, level.size // 300_000)
    lv, vv = level.ravel()[::stride], var.ravel()[::stride]
    ok = np.isfinite(lv) & np.isfinite(vv)
    lv, vv = lv[ok], vv[ok]
    n_groups = 24
    trim_factor = _trimmed_mean_factor(0.9, dof)
    edges = np.quantile(lv, np.linspace(0, 1, n_groups + 1))
    idx = np.clip(np.searchsorted(edges, lv, side="right") - 1, 0, n_groups - 1)
    xs, ys, ws = [], [], []
    for g in range(n_groups):
        sel = idx == g
        if sel.sum() < 50:
            continue
        # trim the top tail (stars, outliers) and undo the trimming's bias on a chi-square sample
        v = np.sort(vv[sel])
        v = v[: int(0.9 * v.size)]
        xs.append(np.median(lv[sel]))
        ys.append(v.mean() / trim_factor)
        ws.append(np.sqrt(sel.sum()))
    xs, ys, ws = np.array(xs), np.array(ys), np.array(ws)
    span = xs.max() - xs.min() if xs.size else 0.0
    slope = np.nan
    if xs.size >= 3 and span > 0.2 * max(np.median(xs), 1.0):
        a = np.stack([np.ones_like(xs), xs], axis=1) * ws[:, None]
        intercept, slope = np.linalg.lstsq(a, ys * ws, rcond=None)[0]
    var_mid = float(np.median(ys)) if ys.size else 1.0
    lev_mid = float(np.median(xs)) if xs.size else 0.0
    read_est, gain_est = read is None, gain is None
    if gain is None and read is not None:
        # known intercept: one-parameter weighted fit of (var - read^2) = level / gain
        photon = ys - read**2
        den = float(np.sum(ws * xs * xs)) if xs.size else 0.0
        slope_fixed = float(np.sum(ws * xs * photon)) / den if den > 0 else np.nan
        gain = 1.0 / slope_fixed if np.isfinite(slope_fixed) and slope_fixed > 0 else 1.0
    elif read is None and gain is not None:
        read = float(np.sqrt(max(var_mid - lev_mid / gain, 1.0 / 12.0)))
    else:
        if np.isfinite(slope) and slope > 0 and intercept > 0:
            gain, read = 1.0 / slope, float(np.sqrt(intercept))
        else:
            read = float(np.sqrt(1.0 / 12.0))
            photon = var_mid - read**2
            gain = lev_mid / photon if photon > 0 and lev_mid > 0 else 1.0
    return float(read), float(gain), read_est, gain_est


def _trimmed_mean_factor(keep: float, dof: int) -> float:
    """Mean of the lowest ``keep`` fraction of a chi-square(dof)/dof sample (whose mean is 1).

    A per-pixel sample variance from ``n`` frames follows ``sigma^2 chi2(n-1)/(n-1)``
    (common practice); trimming the top tail (stars, outliers) lowers the mean by this
    factor, computed from a fixed seeded sample.
    """
    rng = np.random.default_rng(0)
    s = np.sort(rng.chisquare(max(dof, 1), 200_000) / max(dof, 1))
    return float(s[: int(keep * s.size)].mean())


def select_quiet_frames(binned: np.ndarray, *, max_frames: int, min_frames: int = 5) -> np.ndarray:
    """Positions (into ``binned``) of frames without transient light, spread over the clip.

    Parameters
    ----------
    binned : ndarray of shape (n_frames, hb, wb)
        Binned frames of one field parity (or all frames).

    Notes
    -----
    A frame's activity is the number of bins more than 5 robust sigma above the
    temporal median of that bin; a meteor (zeroth order and spectrum) lights many
    bins, noise and twinkling almost none. Frames at or below a robust threshold
    of the activity, and not within two frames of an active one (the meteor fades
    in and out below the threshold there), are quiet. With fewer than ``min_frames`` quiet frames the
    least active ones are used and the per-pixel sigma clipping removes what
    remains of the meteor.
    """
    n = binned.shape[0]
    # reference from at most 31 frames spread over the clip (a sort is the fast robust route)
    ref = np.sort(binned[np.unique(np.linspace(0, n - 1, min(n, 31)).round().astype(int))], axis=0)
    m = ref.shape[0]
    med = _order_stat(ref, (m - 1) * 0.5)
    sig = (_order_stat(ref, (m - 1) * 0.75) - _order_stat(ref, (m - 1) * 0.25)) * np.float32(1.0 / 1.349)
    del ref
    floor = max(float(np.median(sig)), 1e-3)
    sig = np.maximum(sig, floor)
    limit = med + 5.0 * sig
    activity = np.array([np.count_nonzero(b > limit) for b in binned])
    a_med = np.median(activity)
    a_sig = _MAD_TO_SIGMA * np.median(np.abs(activity - a_med))
    is_quiet = activity <= a_med + 5.0 * a_sig + 0.5
    # guard frames: a meteor fades in and out below the detection limit next to its active frames
    guarded = is_quiet.copy()
    for shift in (1, 2):
        guarded[shift:] &= is_quiet[:-shift]
        guarded[:-shift] &= is_quiet[shift:]
    quiet = np.flatnonzero(guarded if guarded.sum() >= min(min_frames, n) else is_quiet)
    if quiet.size < min(min_frames, n):
        quiet = np.sort(np.argsort(activity, kind="stable")[: min(min_frames, n)])
    if quiet.size > max_frames:
        pick = np.unique(np.round(np.linspace(0, quiet.size - 1, max_frames)).astype(int))
        quiet = quiet[pick]
    return quiet


def estimate_background(frames: Sequence, *, camera: Camera, seed: int | None = None,
                        max_frames: int = 16, clip_sigma: float = 4.0,
                        star_sigma: float = 5.0, binned: BinnedFrames | None = None) -> Background:
    """Robust per-pixel background, noise model and star mask of an event.

    Parameters
    ----------
    frames : sequence of Frame
        All frames (or fields) of the event; ``len()`` and indexing are used. The
        sequence is iterated once in full, then only the chosen frames are read again.
    camera : Camera
        Frame size; ``read_noise_adu`` and ``gain_e_per_adu`` when known.
    seed : int, optional
        Unused by the current deterministic method; accepted for a uniform API.
    max_frames : int
        Most meteor-free frames (per field parity) read at full resolution.
    clip_sigma : float
        Per-pixel temporal clipping threshold, in robust sigma.
    star_sigma : float
        A pixel above the local sky by this many noise sigma is a star pixel.
    binned : BinnedFrames, optional
        :func:`bin_frames` of the same frames, when the caller has it (saves the
        full pass; the tracker uses the same copy).

    Returns
    -------
    Background

    Raises
    ------
    ValueError
        No frames, frames that do not fit the camera, or frames holding NaN or
        infinite values (the video reader never produces them; a caller that
        does is told which frame).

    Notes
    -----
    Level: mean of the per-pixel samples within ``clip_sigma`` robust sigma of
    their median (sigma-clipped temporal mean, common practice). Noise: read +
    photon model fitted to the clipped temporal variances (photon transfer,
    Janesick 2007), plus scintillation ``s * (level - sky)`` on star pixels with
    ``s`` the median excess over the star pixels.
    """
    del seed  # deterministic: no random sampling needed
    n = len(frames)
    if n == 0:
        raise ValueError("no frames to estimate the background from")
    h, w = camera.height, camera.width
    # ---- pass 1 (or the caller's): binned copy of every frame, grouped by field parity
    if binned is None:
        binned = bin_frames(frames, camera=camera)
    elif len(binned) != n:
        raise ValueError(f"binned frames ({len(binned)}) do not match the {n} frames")
    groups: dict[tuple[int, int], list[tuple[int, np.ndarray]]] = {}
    f = _SELECT_BIN_PX // BIN_PX
    for pos, b in enumerate(binned.data):
        # 8x8 blocks: 1/64 of the data, enough to see a meteor light up many blocks
        groups.setdefault((int(binned.y_start_px[pos]), int(binned.y_step_px[pos])), []).append(
            (pos, bin_rows(b, f, f)))
    # ---- choose quiet frames per parity, then pass 2 over them at full resolution
    level = np.zeros((h, w), np.float32)
    var = np.zeros((h, w), np.float32)
    count = np.zeros((h, w), np.uint16)
    covered = np.zeros(h, bool)
    used: list[int] = []
    dof = []
    per_group = max(max_frames // len(groups), 3)
    for (y0, step), items in groups.items():
        stack = np.stack([b for _, b in items])
        positions = np.array([p for p, _ in items])
        chosen = positions[select_quiet_frames(stack, max_frames=per_group)]
        del stack
        items.clear()  # the 8x8 copies are no longer needed
        # the frames themselves: each row block is linearised as the statistics read it, so a
        # frame of stored values never needs a whole-frame float copy
        quiet = [frames[int(p)] for p in chosen]
        used.extend(int(f.index) for f in quiet)
        dof.append(len(quiet) - 1)
        lv, vr, cnt = _clipped_stats(quiet, clip_sigma, read_noise_adu=camera.read_noise_adu,
                                     gain_e_per_adu=camera.gain_e_per_adu)
        del quiet
        rows = np.arange(y0, h, step)[: lv.shape[0]]
        level[rows] = lv
        var[rows] = vr
        count[rows] = cnt
        covered[rows] = True
    if not covered.all():
        # fields cover all rows by construction; guard against a partial set of fields
        missing = np.flatnonzero(~covered)
        src = np.flatnonzero(covered)
        nearest = src[np.clip(np.searchsorted(src, missing), 0, src.size - 1)]
        level[missing], var[missing], count[missing] = level[nearest], var[nearest], count[nearest]

    return _model_from_stats(level, var, camera, dof=min(dof), star_sigma=star_sigma,
                             frames_used=np.array(sorted(used), dtype=int), level_count=count)


def _model_from_stats(level: np.ndarray, var: np.ndarray, camera: Camera, *, dof: int, star_sigma: float,
                      frames_used: np.ndarray, level_count: np.ndarray | None = None) -> Background:
    """Noise model, star mask and scintillation from per-pixel temporal level and variance."""
    sky = _smooth_sky(level)
    # a first star mask from the level alone (variance model not known yet): 5 x local robust scatter
    excess = level - sky
    prelim_star = excess > star_sigma * np.sqrt(np.maximum(_smooth_sky(var), 1e-6))
    quiet_px = ~ndimage.binary_dilation(prelim_star, iterations=2)
    read, gain, read_est, gain_est = _fit_photon_transfer(level[quiet_px], var[quiet_px], camera, dof=dof)

    model = _model_var(level, read, gain).astype(np.float32)
    star = excess > star_sigma * np.sqrt(_model_var(sky, read, gain))
    # twinkling: temporal variance well above the model (~1 % false alarms for ~15 samples)
    twinkle = var > 3.0 * model
    star_mask = ndimage.binary_dilation(star | (twinkle & ndimage.binary_dilation(star, iterations=3)),
                                        iterations=1)
    scint = 0.0
    sel = star & (excess > 20.0 * np.sqrt(model))
    if sel.sum() >= 5:
        frac = np.sqrt(np.maximum(var[sel] - model[sel], 0.0)) / excess[sel]
        scint = float(np.median(frac))
    noise_var = model.copy()
    if scint > 0:
        noise_var += np.where(star_mask, (scint * np.maximum(excess, 0.0)) ** 2, 0.0).astype(np.float32)
    return Background(level_adu=level, noise_adu=np.sqrt(noise_var).astype(np.float32),
                      read_noise_adu=read, gain_e_per_adu=gain, star_mask=star_mask,
                      frames_used=frames_used, scintillation=scint,
                      sky_adu=sky, gain_estimated=gain_est, read_noise_estimated=read_est,
                      level_samples=dof + 1, level_count=level_count)


def _check_frame(frame, h: int, w: int) -> None:
    n_rows, width = frame.signal.shape
    if width != w or frame.y_start_px + frame.y_step_px * (n_rows - 1) >= h:
        raise ValueError(f"frame {frame.index} is {width} px wide with {n_rows} rows (step "
                         f"{frame.y_step_px}); the camera is {w}x{h}")
    # cheap NaN test on the sum: one pass, no temporary mask
    if not np.isfinite(np.sum(frame.signal, dtype=np.float64)):
        raise ValueError(f"frame {frame.index} holds NaN or infinite values")


def _clipped_stats(frames: list, clip_sigma: float, *, read_noise_adu: float | None = None,
                   gain_e_per_adu: float | None = None,
                   block_rows: int = 96) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-pixel sigma-clipped temporal mean, variance and count of kept samples (uint16) of ``n``
    frames' signals, in row blocks.

    The samples are sorted along time (the fastest robust route in numpy): the
    median and the interquartile range (sigma = IQR / 1.349 for a Gaussian, common
    practice) set the clipping limits, never tighter than the noise floor of
    :func:`_clip_floor` (the camera's read and photon noise when both are known,
    else the pooled interquartile sigma of the frame). Row blocks keep
    temporaries small; ``frames`` are :class:`~meteorspec.video.Frame` objects, read
    one row block at a time through ``Frame.pixels``.
    """
    n = len(frames)
    rows, width = frames[0].shape

    def block(r0: int) -> np.ndarray:
        return np.stack([f.pixels(slice(r0, r0 + block_rows), slice(None))[0] for f in frames])

    med = np.empty((rows, width), np.float32)
    sig = np.empty((rows, width), np.float32)
    mean = np.empty((rows, width), np.float32)
    var = np.empty((rows, width), np.float32)
    kept = np.empty((rows, width), np.uint16)
    q1, q3 = (n - 1) * 0.25, (n - 1) * 0.75
    # with the camera's noise model the floor is per pixel: one pass; otherwise the floor pools
    # the whole frame's interquartile sigma, known only after a first pass
    per_pixel = read_noise_adu is not None and gain_e_per_adu is not None and gain_e_per_adu > 0

    def clipped(d: np.ndarray, m0: np.ndarray, lim: np.ndarray, r0: int) -> None:
        keep = np.abs(d - m0) <= lim
        n_keep = keep.sum(axis=0)
        cnt = np.maximum(n_keep, 1).astype(np.float32)
        m = np.where(keep, d, np.float32(0.0)).sum(axis=0) / cnt
        dev = np.where(keep, d - m, np.float32(0.0))
        kept[r0:r0 + block_rows] = n_keep
        mean[r0:r0 + block_rows] = m
        var[r0:r0 + block_rows] = (dev * dev).sum(axis=0) / np.maximum(cnt - 1, 1)

    def ordered(r0: int) -> None:
        d = np.sort(block(r0), axis=0)
        m0 = med[r0:r0 + block_rows] = _order_stat(d, (n - 1) * 0.5)
        s0 = sig[r0:r0 + block_rows] = (_order_stat(d, q3) - _order_stat(d, q1)) * np.float32(1.0 / 1.349)
        if per_pixel:  # the mean and variance of the kept samples do not need them in order
            clipped(d, m0, clip_sigma * np.maximum(s0, _clip_floor(m0, s0, n, read_noise_adu=read_noise_adu,
                                                                   gain_e_per_adu=gain_e_per_adu)), r0)

    # Row blocks are independent and numpy's sort and sums release the GIL: two threads
    # halve the wall time on an otherwise idle machine (each writes its own rows).
    with ThreadPoolExecutor(max_workers=_STATS_THREADS) as pool:
        list(pool.map(ordered, range(0, rows, block_rows)))
    if not per_pixel:
        lim_all = clip_sigma * np.maximum(sig, _clip_floor(med, sig, n, read_noise_adu=read_noise_adu,
                                                           gain_e_per_adu=gain_e_per_adu))
        for r0 in range(0, rows, block_rows):
            clipped(block(r0), med[r0:r0 + block_rows],
                    lim_all[r0:r0 + block_rows], r0)
    return mean, var, kept


def _clip_floor(med: np.ndarray, sig: np.ndarray, n: int | np.ndarray, *, read_noise_adu: float | None,
                gain_e_per_adu: float | None) -> np.ndarray:
    """Smallest noise sigma (ADU) a per-pixel temporal clip may assume, float32.

    The interquartile sigma of a handful of samples scatters widely (for 5
    samples its median is 0.67 of the true sigma, and a third of the pixels
    get less than half of it). A clip at ``clip_sigma`` times that estimate
    cuts into the noise itself, and since sky noise (Poisson, and cut at the
    sensor's black level) has a longer upper tail and the clip is centred on
    the median, it removes more high samples than low ones: the clipped mean
    of a 4-5 ADU sky sampled 5-13 times came out 0.03-0.05 ADU below the true
    mean, which every pixel of a spectrum band adds to the meteor (+2.5 to
    +3 % on the Na, Mg and Fe groups of a faint event,
    bench/extract_acceptance.py). The floor is the camera's noise model
    ``sqrt(read^2 + level / gain)`` at the median when both are known (common
    practice: photon transfer, Janesick 2007), else the interquartile sigma
    pooled over 16 px blocks (:func:`_smooth_sky`, a block median) divided by
    the median of that estimator for ``n`` Gaussian samples (a pooled sigma is
    unbiased where one pixel's is not); never below the quantisation floor 0.3 ADU.
    """
    if read_noise_adu is not None and gain_e_per_adu is not None and gain_e_per_adu > 0:
        floor = np.sqrt(np.float32(read_noise_adu) ** 2 + np.maximum(med, 0.0) * np.float32(1.0 / gain_e_per_adu))
    else:
        n_arr = np.asarray(n)
        if n_arr.ndim == 0:
            floor = _smooth_sky(np.where(np.isfinite(sig), sig, 0.0).astype(np.float32)) / _iqr_sigma_median(int(n))
        else:
            # per-pixel counts (masked samples): one pooled level, scaled by each count's factor
            ok = np.isfinite(sig) & (n_arr >= 4)
            if not ok.any():
                return np.full(np.shape(med), np.float32(0.3))
            fac = np.array([_iqr_sigma_median(int(k)) for k in range(int(n_arr.max()) + 1)])
            floor = np.full(np.shape(med), float(np.median(sig[ok] / fac[n_arr[ok]])))
    return np.maximum(floor, np.float32(0.3)).astype(np.float32)


_IQR_MEDIAN_CACHE: dict[int, float] = {}


def _iqr_sigma_median(n: int) -> float:
    """Median of the interquartile sigma (interpolated order statistics, IQR / 1.349) of ``n`` unit-Gaussian samples.

    From a fixed seeded sample (20000 sets), cached; 1 for ``n < 4`` (the
    clip of so few samples is set by the floor alone).
    """
    if n < 4:
        return 1.0
    if n not in _IQR_MEDIAN_CACHE:
        d = np.sort(np.random.default_rng(0).standard_normal((n, 20_000)), axis=0)
        q1, q3 = (n - 1) * 0.25, (n - 1) * 0.75
        est = (_order_stat(d, q3) - _order_stat(d, q1)) / 1.349
        _IQR_MEDIAN_CACHE[n] = float(np.median(est))
    return _IQR_MEDIAN_CACHE[n]


def _order_stat(sorted_data: np.ndarray, q: float) -> np.ndarray:
    """Linear interpolation between order statistics ``floor(q)`` and ``ceil(q)`` of sorted samples."""
    lo = int(np.floor(q))
    hi = min(lo + 1, sorted_data.shape[0] - 1)
    f = np.float32(q - lo)
    return sorted_data[lo] * (1 - f) + sorted_data[hi] * f


def _smooth_sky(level: np.ndarray, *, block_px: int = 16) -> np.ndarray:
    """Large-scale sky: block medians (stars are few per block), median-smoothed, interpolated back."""
    h, w = level.shape
    hb, wb = max(h // block_px, 1), max(w // block_px, 1)
    cut = level[: hb * block_px, : wb * block_px] if h >= block_px and w >= block_px else level
    bh, bw = cut.shape[0] // hb, cut.shape[1] // wb
    blocks = cut[: hb * bh, : wb * bw].reshape(hb, bh, wb, bw).transpose(0, 2, 1, 3).reshape(hb, wb, -1)
    med = np.median(blocks, axis=2)
    med = ndimage.median_filter(med, size=3, mode="nearest")
    # bilinear back to full size (separable: two small interpolation matrices);
    # block centres at (i + 0.5) * bh - 0.5
    wy = _interp_matrix(h, hb, bh)
    wx = _interp_matrix(w, wb, bw)
    out = wy @ med @ wx.T
    return out.astype(np.float32)


def _interp_matrix(n: int, nb: int, block: int) -> np.ndarray:
    """(n, nb) linear-interpolation weights from block centres to pixels, constant beyond the ends."""
    pos = np.clip((np.arange(n) + 0.5) / block - 0.5, 0.0, nb - 1.0)
    lo = np.minimum(np.floor(pos).astype(int), max(nb - 2, 0))
    f = pos - lo
    mat = np.zeros((n, nb))
    mat[np.arange(n), lo] += 1.0 - f
    if nb > 1:
        mat[np.arange(n), lo + 1] += f
    return mat


# --------------------------------------------------------------------------- meteor-free refinement

# Wavelengths (nm) whose first-order light is masked: beyond the 350-900 nm the tool extracts, so
# that the band's ends (and the N2/O I light around them) stay out of the background (common practice:
# meteor spectra show lines from Ca II 393 nm to O I 845 nm).
_MASK_NM = (330.0, 950.0)


def meteor_mask(frame, track, geometry, *, orders: Sequence[int] = (1,), height: int, width: int,
                zeroth_radius_px: float = 10.0, band_radius_px: float = 9.0) -> np.ndarray:
    """Pixels of one frame (full-frame ``(height, width)``) that the meteor may light during its exposure.

    The zeroth-order streak (the track's position over the exposure) and, for each
    diffraction order, the band swept by the spectrum curve of every point of the
    streak (330-950 nm), each widened by a square of the given half-size. Frames
    up to two exposures outside the track's luminous span are covered too (a
    faint start or end the tracker did not see); the trajectory is extrapolated there.

    Returns an all-False mask when the frame is far from the luminous span.
    """
    mask = np.zeros((height, width), bool)
    traj = getattr(track, "trajectory", None)
    lum = np.asarray(track.luminous) if hasattr(track, "luminous") else np.isfinite(track.x_px)
    if traj is None or not lum.any():
        return mask
    t_lum = np.asarray(track.time_s, float)[lum]
    t0 = frame.time_s - 0.5 * frame.exposure_s
    t1 = frame.time_s + 0.5 * frame.exposure_s
    margin = 2.0 * frame.exposure_s
    if t1 < t_lum.min() - margin or t0 > t_lum.max() + margin:
        return mask
    xa, ya = (float(v) for v in traj.pixel(t0))
    xb, yb = (float(v) for v in traj.pixel(t1))
    if not np.all(np.isfinite([xa, ya, xb, yb])):
        return mask
    # sub-positions along the streak no further apart than the band radius: the squares overlap
    n_sub = int(np.ceil(np.hypot(xb - xa, yb - ya) / max(0.8 * band_radius_px, 1.0))) + 1
    f = np.linspace(0.0, 1.0, n_sub)
    sx, sy = xa + f * (xb - xa), ya + f * (yb - ya)
    _paint(mask, sx, sy, zeroth_radius_px)
    lam = np.arange(_MASK_NM[0], _MASK_NM[1], 2.0)
    for m in orders:
        if m == 0:
            continue
        cx, cy = geometry.spectrum_pixel(sx[:, None], sy[:, None], lam[None, :], m)
        ok = np.isfinite(cx) & np.isfinite(cy)
        cx, cy = cx[ok], cy[ok]
        if cx.size == 0:
            continue
        # thin to about one point per pixel before painting
        key = np.unique(np.rint(cy).astype(np.int64) * (4 * width + 1) + np.rint(cx).astype(np.int64))
        iy, ix = np.divmod(key + 2 * width, 4 * width + 1)
        _paint(mask, ix - 2 * width, iy, band_radius_px)
    return mask


def _paint(mask: np.ndarray, x: np.ndarray, y: np.ndarray, radius: float) -> None:
    """Set squares of half-size ``radius`` around points (x, y) in ``mask`` (clipped to it)."""
    h, w = mask.shape
    r = int(np.ceil(radius))
    ix = np.rint(np.asarray(x, float)).astype(np.int64)
    iy = np.rint(np.asarray(y, float)).astype(np.int64)
    keep = (ix >= -r) & (ix < w + r) & (iy >= -r) & (iy < h + r)
    if not keep.any():
        return
    ix, iy = ix[keep], iy[keep]
    # rows of points: mark the columns hit, then spread along x and y by cumulative sums
    x_lo, x_hi = max(int(ix.min()) - r, 0), min(int(ix.max()) + r + 1, w)
    y_lo, y_hi = max(int(iy.min()) - r, 0), min(int(iy.max()) + r + 1, h)
    bw, bh = x_hi - x_lo, y_hi - y_lo
    if bw <= 0 or bh <= 0:
        return
    seed = np.zeros((bh + 2 * r + 1, bw + 2 * r + 1), np.int32)
    np.add.at(seed, (iy - y_lo + r, ix - x_lo + r), 1)
    # box filter of size 2r+1 along both axes via cumulative sums (exact, O(area))
    k = 2 * r + 1
    c = np.cumsum(seed, axis=0)
    c[k:] = c[k:] - c[:-k]
    c = np.cumsum(c, axis=1)
    c[:, k:] = c[:, k:] - c[:, :-k]
    # c[i, j] counts seeds in rows i-2r..i and cols j-2r..j: pixel (y, x) sits at i = y - y_lo + 2r
    mask[y_lo:y_hi, x_lo:x_hi] |= c[2 * r:2 * r + bh, 2 * r:2 * r + bw] > 0


def refine_background(frames: Sequence, background: Background, track, geometry, *, camera: Camera,
                      orders: Sequence[int] = (1,), max_frames: int = 24, clip_sigma: float = 4.0,
                      star_sigma: float = 5.0, min_samples: int = 3) -> Background:
    """Background re-estimated with the meteor's light excluded frame by frame.

    Parameters
    ----------
    frames : sequence of Frame
        The event's frames (fields), as given to :func:`estimate_background`.
    background : Background
        The first estimate (its ``frames_used`` are read again).
    track : Track
        The zeroth-order track (``trajectory``, ``time_s``, ``luminous``); a falsy
        track returns ``background`` unchanged.
    geometry : SpectralGeometry
        Where each order's spectrum of a zeroth-order position lies.
    camera : Camera
    orders : sequence of int
        Diffraction orders recorded on the sensor.
    max_frames : int
        Frames per field parity read, spread evenly over the clip, besides the
        first estimate's frames.
    min_samples : int
        Fewest meteor-free samples a pixel needs to be re-estimated; pixels with
        fewer keep the first estimate.

    Returns
    -------
    Background

    Notes
    -----
    A faint meteor lit in most frames leaves no meteor-free frame to choose, and
    a per-pixel clip at 4 sigma cannot reject light at 1-3 sigma: the first
    estimate then holds part of the meteor, which the extraction subtracts from
    the spectrum. The track and the grating geometry say where the meteor's
    light is in each frame (:func:`meteor_mask`); every pixel the meteor reaches
    in a read frame is re-estimated from the read frames in which it is dark,
    with the same clipped temporal statistics. Only those pixels are touched,
    so a frame read here costs its linearisation and a gather.
    """
    if not track or getattr(track, "trajectory", None) is None:
        return background
    n = len(frames)
    h, w = camera.height, camera.width
    times = np.asarray(track.time_s, float)
    used = set(int(i) for i in background.frames_used)
    index_of = np.asarray(getattr(track, "frame_index", np.arange(n)), int)
    pos_used = [p for p in range(min(n, index_of.size)) if int(index_of[p]) in used]
    # the first estimate's frames all far from the meteor: that estimate is already meteor-free
    # (the usual case for a long clip); deciding this reads no frame
    if not any(meteor_mask(_FrameTimes(float(times[p]), float(track.exposure_s)), track, geometry,
                           orders=orders, height=h, width=w).any() for p in pos_used):
        return background
    # positions: first estimate's frames plus an even spread over the clip
    n_par = 2 if camera.interlaced else 1
    per_parity = max(max_frames // n_par, min_samples + 2)
    spread = np.unique(np.round(np.linspace(0, n - 1, min(n, per_parity * n_par))).astype(int))
    chosen = sorted(set(spread.tolist()) | set(pos_used))
    first_row = 0 if camera.field_order == "top" else 1

    def parity(p: int) -> tuple[int, int]:
        # rows of frame position p, as the video reader splits fields (contract section 1)
        if not camera.interlaced:
            return (0, 1)
        return (first_row if p % 2 == 0 else 1 - first_row, 2)

    # ---- masks of the chosen frames (from the track alone), and their union per parity
    masks: dict[int, np.ndarray] = {}
    union: dict[tuple[int, int], np.ndarray] = {}
    by_parity: dict[tuple[int, int], list[int]] = {}
    for p in chosen:
        key = parity(p)
        by_parity.setdefault(key, []).append(p)
        m = meteor_mask(_FrameTimes(float(times[p]), float(track.exposure_s)), track, geometry,
                        orders=orders, height=h, width=w)[key[0]::key[1]]
        if m.any():
            masks[p] = m
            union[key] = m.copy() if key not in union else (union[key] | m)
    del times
    if not union:
        return background
    level = background.level_adu.copy()
    var = np.square(background.noise_adu, dtype=np.float32)  # replaced below where re-estimated
    # the stored temporal variance is not kept; the refit needs a per-pixel variance: use the model's
    # noise where nothing changes (it is what the fit sees at those pixels anyway)
    var_changed = np.zeros((h, w), bool)
    level_count = None if background.level_count is None else background.level_count.copy()
    counts: list[int] = []
    for key, pos_list in by_parity.items():
        if key not in union:
            continue
        y0, step = key
        rr, cc = np.nonzero(union[key])
        samples = np.empty((len(pos_list), rr.size), np.float32)
        for i, p in enumerate(pos_list):
            f = frames[p]
            if (f.y_start_px, f.y_step_px) != key or f.shape[0] != union[key].shape[0]:
                raise ValueError(f"frame {f.index} does not have the rows of field parity {key}")
            samples[i] = f.pixels(rr, cc)[0]
            if p in masks:
                samples[i][masks[p][rr, cc]] = np.nan
        lv, vr, cnt, n_kept = _clipped_stats_masked(samples, clip_sigma, read_noise_adu=background.read_noise_adu,
                                                    gain_e_per_adu=background.gain_e_per_adu)
        ok = cnt >= min_samples
        if ok.any():
            counts.append(int(np.median(cnt[ok])))
        yy = y0 + step * rr[ok]
        level[yy, cc[ok]] = lv[ok]
        var[yy, cc[ok]] = vr[ok]
        var_changed[yy, cc[ok]] = True
        if level_count is not None:
            level_count[yy, cc[ok]] = n_kept[ok]
    # noise and star mask where the level changed: the first estimate's read noise, gain and
    # scintillation (fitted over the whole frame, hardly touched by the meteor) on the new level
    read, gain, scint = background.read_noise_adu, background.gain_e_per_adu, background.scintillation
    # the re-estimated pixels' levels rest on their own counts of dark samples
    n_level = min([background.level_samples or np.iinfo(np.int32).max] + counts) if counts else \
        background.level_samples
    sky = _smooth_sky(level)
    excess = level - sky
    model = _model_var(level, read, gain).astype(np.float32)
    star = excess > star_sigma * np.sqrt(_model_var(sky, read, gain))
    twinkle = var_changed & (var > 3.0 * model)
    new_star = ndimage.binary_dilation(star | (twinkle & ndimage.binary_dilation(star, iterations=3)),
                                       iterations=1)
    near = ndimage.binary_dilation(var_changed, iterations=2)
    star_mask = np.where(near, new_star, background.star_mask)
    noise_var = model
    if scint > 0:
        noise_var = noise_var + np.where(star_mask, (scint * np.maximum(excess, 0.0)) ** 2, 0.0).astype(np.float32)
    noise = np.where(var_changed, np.sqrt(noise_var), background.noise_adu).astype(np.float32)
    return Background(level_adu=level, noise_adu=noise, read_noise_adu=read, gain_e_per_adu=gain,
                      star_mask=star_mask, frames_used=background.frames_used, scintillation=scint,
                      sky_adu=sky, gain_estimated=background.gain_estimated,
                      read_noise_estimated=background.read_noise_estimated, level_samples=int(n_level),
                      level_count=level_count)


def _bin_stored(stack, stored: np.ndarray, camera: Camera) -> BinnedFrames:
    """:func:`bin_frames` of a decoded stack of stored integer values (``FrameStack``), faster."""
    h, w = camera.height, camera.width
    if stored.shape[1:] != (h, w):
        raise ValueError(f"stored frames are {stored.shape[2]}x{stored.shape[1]}; the camera is {w}x{h}")
    binner = StoredFrameBinner(camera, float(stack.fps))
    for k in range(stored.shape[0]):
        binner.add(k, stored[k])
    return binner.result()  # never None: the shape is checked above, the caller checked the type


class StoredFrameBinner:
    """:func:`bin_frames` one stored frame at a time, as the video reader delivers them.

    Fed by :func:`meteorspec.video.read_stack` (``on_frame``) while the decoder
    works on the next frames, so the binned copy costs no pass of its own.

    A linear camera (``gamma = 1``) needs no lookup: the block mean of
    ``stored - black`` is the block mean of the stored values minus the black
    level whenever no value of the frame lies below black (the usual case; else
    the frame goes through the lookup table like any other). Otherwise the
    stored values are linearised through a table of all possible values; the
    saturation mask is not needed here. Fields are split as the video reader
    does (contract section 1: ``field_order = "top"``: even rows first).

    Parameters
    ----------
    camera : Camera
    fps : float
        Stored frames per second (the event's ``fps``).
    """

    def __init__(self, camera: Camera, fps: float) -> None:
        self.camera = camera
        self.fps = float(fps)
        self._fpf = 2 if camera.interlaced else 1
        if self._fpf == 2:
            first_row = 0 if camera.field_order == "top" else 1
            self._starts: tuple[int, ...] = (first_row, 1 - first_row)
        else:
            self._starts = (0,)
        self._by = max(BIN_PX // self._fpf, 1)
        self._lut: dict[np.dtype, np.ndarray] = {}
        self._data: list[np.ndarray] = []
        self._meta: list[tuple] = []
        self._next = 0
        self.usable = True

    def add(self, k: int, raw: np.ndarray) -> None:
        """Bin stored frame ``k`` (frames must come in order 0, 1, 2, ...).

        A frame that is not of stored integer values in the camera's size ends the
        binning (:meth:`result` then returns None, and :func:`bin_frames` does the
        pass with its own checks and messages).

        Raises
        ------
        ValueError
            A frame out of order.
        """
        cam = self.camera
        if k != self._next:
            raise ValueError(f"stored frame {k} arrived, expected frame {self._next}")
        self._next += 1
        if not self.usable or raw.shape != (cam.height, cam.width) or raw.dtype.kind != "u":
            self.usable = False
            return
        lut = self._lut.get(raw.dtype)
        if lut is None:
            from .video import linearize  # the one definition of the pixel-value transfer (contract section 3)

            lut = self._lut[raw.dtype] = linearize(np.arange(2 ** (8 * raw.dtype.itemsize)), cam)[0]
        black = cam.black_level_adu
        step = self._fpf
        for half, y0 in enumerate(self._starts):
            rows = raw[y0::step]
            if cam.gamma == 1.0 and int(rows.min()) >= black:
                b = bin_rows(rows, self._by, BIN_PX)
                b -= np.float32(black)
            else:
                b = bin_rows(np.take(lut, rows), self._by, BIN_PX)
            self._data.append(b)
            j = step * k + half
            self._meta.append(((j + 0.5) / (step * self.fps), 1.0 / (step * self.fps), j, y0, step,
                               rows.shape[0]))

    def __len__(self) -> int:
        """Frames (or fields) binned so far."""
        return len(self._data)

    def result(self) -> BinnedFrames | None:
        """Hand over the binned copy of every frame added so far; None if a frame could not be binned here.

        The binner keeps no reference afterwards (it is empty), so the copy is freed as soon as
        its new owner drops it.
        """
        if not self.usable:
            return None
        cols = list(zip(*self._meta)) if self._meta else [()] * 6
        data, self._data, self._meta = self._data, [], []
        return BinnedFrames(data=data, time_s=np.array(cols[0], float),
                            exposure_s=np.array(cols[1], float), index=np.array(cols[2], int),
                            y_start_px=np.array(cols[3], int), y_step_px=np.array(cols[4], int),
                            n_rows=np.array(cols[5], int))


@dataclass(frozen=True)
class _FrameTimes:
    """Exposure of a frame without its pixels (for :func:`meteor_mask`)."""

    time_s: float
    exposure_s: float


def _clipped_stats_masked(d: np.ndarray, clip_sigma: float, *, read_noise_adu: float | None = None,
                          gain_e_per_adu: float | None = None
                          ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per-column sigma-clipped mean, variance, sample count and kept (unclipped) count of ``d``
    (samples, n) with NaN = absent.

    As :func:`_clipped_stats` (the same noise floor on the clip, :func:`_clip_floor`),
    with a count of its own per column: NaN sort to the end, so the order
    statistics of column ``j`` are rows ``0 .. count_j - 1``.
    """
    s = np.sort(d, axis=0)
    cnt = np.count_nonzero(np.isfinite(s), axis=0)
    cols = np.arange(s.shape[1])

    def stat(q: float) -> np.ndarray:
        pos = np.clip((cnt - 1) * q, 0.0, None)
        lo = np.floor(pos).astype(int)
        hi = np.minimum(lo + 1, np.maximum(cnt - 1, 0))
        f = (pos - lo).astype(np.float32)
        return s[lo, cols] * (1 - f) + s[hi, cols] * f

    med = stat(0.5)
    sig = (stat(0.75) - stat(0.25)) * np.float32(1.0 / 1.349)
    lim = clip_sigma * np.maximum(sig, _clip_floor(med, sig, cnt, read_noise_adu=read_noise_adu,
                                                   gain_e_per_adu=gain_e_per_adu))
    with np.errstate(invalid="ignore"):
        keep = np.isfinite(s) & (np.abs(s - med) <= lim)
    k = np.maximum(keep.sum(axis=0), 1).astype(np.float32)
    m = np.where(keep, s, np.float32(0.0)).sum(axis=0) / k
    dev = np.where(keep, s - m, np.float32(0.0))
    v = (dev * dev).sum(axis=0) / np.maximum(k - 1, 1)
    return m, v, cnt, keep.sum(axis=0)
