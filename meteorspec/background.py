"""Per-pixel background and noise model of an event, from frames without the meteor.

The sky, the static stars and the stars' own first-order spectra do not move
during a clip of a few seconds, so a robust temporal statistic over frames
without the meteor gives the background level of every pixel. The noise model
is the one of a photon-counting sensor, read noise plus Poisson noise of the
collected charge (common practice, e.g. Janesick 2007, *Photon Transfer*, SPIE
PM170), plus the temporal excess of twinkling stars (scintillation), which is
measured on the star pixels.

Streaming: one pass over all frames builds an 8x8-binned copy (1/64 of the
data) to choose the meteor-free frames; only those (at most ``max_frames``)
are then read again at full resolution.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .config import Camera

__all__ = ["Background", "estimate_background", "bin_rows", "frame_rows", "BIN_PX"]

#: Block size (pixels, both axes, in image coordinates) of the binned copy used for selection and detection.
BIN_PX = 4
# Block size of the copy used to choose the meteor-free frames (kept for the whole clip).
_SELECT_BIN_PX = 8
# MAD -> Gaussian sigma (common practice: 1 / Phi^-1(3/4)).
_MAD_TO_SIGMA = 1.4826


def frame_rows(full: np.ndarray, frame) -> np.ndarray:
    """Rows of a full-frame ``(height, width)`` array that ``frame.signal`` holds (a view)."""
    n_rows = frame.signal.shape[0]
    return full[frame.y_start_px::frame.y_step_px][:n_rows]


def bin_rows(img: np.ndarray, by: int, bx: int) -> np.ndarray:
    """Block mean over ``by`` rows x ``bx`` columns; trailing partial blocks are dropped.

    Strided slice sums: about 7x faster than a reshape-mean on a 1280x960 frame.
    """
    hb, wb = img.shape[0] // by, img.shape[1] // bx
    a = img[: hb * by, : wb * bx]
    rows = a[0::by].astype(np.float32, copy=True)
    for i in range(1, by):
        rows += a[i::by]
    out = rows[:, 0::bx].copy()
    for j in range(1, bx):
        out += rows[:, j::bx]
    out *= 1.0 / (by * bx)
    return out


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

    def _check(self, frame) -> None:
        h, w = self.level_adu.shape
        n_rows, width = frame.signal.shape
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
                        star_sigma: float = 5.0) -> Background:
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
    # ---- pass 1: binned copy of every frame, grouped by field parity (rows differ between fields)
    groups: dict[tuple[int, int], list[tuple[int, np.ndarray]]] = {}
    for pos, frame in enumerate(frames):
        _check_frame(frame, h, w)
        # 8x8 blocks: 1/64 of the data, enough to see a meteor light up many blocks
        by = max(_SELECT_BIN_PX // frame.y_step_px, 1)
        groups.setdefault((frame.y_start_px, frame.y_step_px), []).append(
            (pos, bin_rows(frame.signal, by, _SELECT_BIN_PX)))
    # ---- choose quiet frames per parity, then pass 2 over them at full resolution
    level = np.zeros((h, w), np.float32)
    var = np.zeros((h, w), np.float32)
    covered = np.zeros(h, bool)
    used: list[int] = []
    dof = []
    per_group = max(max_frames // len(groups), 3)
    for (y0, step), items in groups.items():
        stack = np.stack([b for _, b in items])
        positions = np.array([p for p, _ in items])
        chosen = positions[select_quiet_frames(stack, max_frames=per_group)]
        del stack
        full = [frames[int(p)] for p in chosen]
        used.extend(int(f.index) for f in full)
        dof.append(len(full) - 1)
        lv, vr = _clipped_stats([f.signal for f in full], clip_sigma)
        del full
        rows = np.arange(y0, h, step)[: lv.shape[0]]
        level[rows] = lv
        var[rows] = vr
        covered[rows] = True
    if not covered.all():
        # fields cover all rows by construction; guard against a partial set of fields
        missing = np.flatnonzero(~covered)
        src = np.flatnonzero(covered)
        nearest = src[np.clip(np.searchsorted(src, missing), 0, src.size - 1)]
        level[missing], var[missing] = level[nearest], var[nearest]

    sky = _smooth_sky(level)
    # a first star mask from the level alone (variance model not known yet): 5 x local robust scatter
    excess = level - sky
    prelim_star = excess > star_sigma * np.sqrt(np.maximum(_smooth_sky(var), 1e-6))
    quiet_px = ~ndimage.binary_dilation(prelim_star, iterations=2)
    read, gain, read_est, gain_est = _fit_photon_transfer(level[quiet_px], var[quiet_px], camera, dof=min(dof))

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
                      frames_used=np.array(sorted(used), dtype=int), scintillation=scint,
                      sky_adu=sky, gain_estimated=gain_est, read_noise_estimated=read_est)


def _check_frame(frame, h: int, w: int) -> None:
    n_rows, width = frame.signal.shape
    if width != w or frame.y_start_px + frame.y_step_px * (n_rows - 1) >= h:
        raise ValueError(f"frame {frame.index} is {width} px wide with {n_rows} rows (step "
                         f"{frame.y_step_px}); the camera is {w}x{h}")
    # cheap NaN test on the sum: one pass, no temporary mask
    if not np.isfinite(np.sum(frame.signal, dtype=np.float64)):
        raise ValueError(f"frame {frame.index} holds NaN or infinite values")


def _clipped_stats(data: list[np.ndarray], clip_sigma: float, *, block_rows: int = 96) -> tuple[np.ndarray, np.ndarray]:
    """Per-pixel sigma-clipped temporal mean and variance of ``n`` images (rows, width), in row blocks.

    The samples are sorted along time (the fastest robust route in numpy): the
    median and the interquartile range (sigma = IQR / 1.349 for a Gaussian, common
    practice) set the clipping limits. Row blocks keep temporaries small.
    """
    n = len(data)
    rows, width = data[0].shape
    mean = np.empty((rows, width), np.float32)
    var = np.empty((rows, width), np.float32)
    q1, q3 = (n - 1) * 0.25, (n - 1) * 0.75
    for r0 in range(0, rows, block_rows):
        d = np.sort(np.stack([a[r0:r0 + block_rows] for a in data]), axis=0)
        med = _order_stat(d, (n - 1) * 0.5)
        sig = (_order_stat(d, q3) - _order_stat(d, q1)) * np.float32(1.0 / 1.349)
        # the IQR of ~16 samples scatters by ~25 %: never clip inside the quantisation floor
        lim = clip_sigma * np.maximum(sig, np.float32(0.3))
        keep = np.abs(d - med) <= lim
        cnt = np.maximum(keep.sum(axis=0), 1).astype(np.float32)
        dk = np.where(keep, d, np.float32(0.0))
        m = dk.sum(axis=0) / cnt
        dev = np.where(keep, d - m, np.float32(0.0))
        v = (dev * dev).sum(axis=0) / np.maximum(cnt - 1, 1)
        mean[r0:r0 + block_rows] = m
        var[r0:r0 + block_rows] = v
    return mean, var


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
