"""Saturated first-order light as a position marker: the spectrum's profile from its wings.

In a fireball the first-order spectrum saturates over most of its length in the bright frames,
and its brightest lines (Na I D, Mg I b, O I 777, Ca II H and K) saturate deepest. A saturated
pixel says only "at least full well", but its unsaturated neighbours across the spectrum still
follow the cross-dispersion profile: each one, divided by that profile's value at its offset,
estimates the light per unit length of the spectrum there. Pooled per short step along the
curve, they give the spectrum's profile through the saturated stretch. Its absolute scale
depends on the assumed cross profile (the far wings of a real PSF), but the distortion is the
same on both sides of a line, so a line's *position* survives: what the wavelength calibration
needs.

:func:`fill_saturated` puts that profile back into a frame's saturated pixels (with an error
that says it is a model), so that the calibrator's line measurement can run on it unchanged.
Pure functions of arrays and a :class:`~meteorspec.optics.SpectralGeometry`.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray
from scipy import ndimage, optimize, special

from .optics import SpectralGeometry

__all__ = ["cross_profile", "fill_saturated", "fit_ridge_angle", "saturated_ridge", "wing_amplitudes"]


def cross_profile(offset_px: NDArray, *, sigma_px: float, box_px: float) -> NDArray:
    """Cross-dispersion profile of unit integral: a box of ``box_px`` convolved with a Gaussian.

    Parameters
    ----------
    offset_px : ndarray
        Distance from the profile's centre, across the spectrum.
    sigma_px : float
        Gaussian sigma (PSF and pixel).
    box_px : float
        Length of the exposure's motion streak across the spectrum (0: a Gaussian).

    Returns
    -------
    ndarray
        Profile values (1/px), same shape as ``offset_px``.

    Notes
    -----
    ``g(o) = [Phi((o + b/2)/s) - Phi((o - b/2)/s)] / b``, the closed form of a box convolved
    with a Gaussian (common practice); ``b -> 0`` is the Gaussian.
    """
    o = np.abs(np.asarray(offset_px, float))  # symmetric
    s = max(float(sigma_px), 1e-3)
    b = float(box_px)
    if b < 1e-3 * s:
        return np.exp(-0.5 * (o / s) ** 2) / (s * math.sqrt(2 * math.pi))
    # a difference of complementary error functions keeps the far wings accurate (no 1 - 1)
    hi, lo = (o + 0.5 * b) / (s * math.sqrt(2)), (o - 0.5 * b) / (s * math.sqrt(2))
    return 0.5 * (special.erfc(lo) - special.erfc(hi)) / b


def wing_amplitudes(along_nm: NDArray, offset_px: NDArray, value: NDArray, sigma: NDArray, *,
                    bin_edges_nm: NDArray, sigma_px: float, box_px: float, centre_px: float = 0.0
                    ) -> tuple[NDArray, NDArray]:
    """Light per unit length of the spectrum in each bin, from unsaturated pixels across it.

    Parameters
    ----------
    along_nm, offset_px : ndarray
        Wavelength of the nearest curve point and signed distance from the curve of each
        unsaturated pixel (:meth:`SpectralGeometry.locate`).
    value, sigma : ndarray
        The pixels' background-subtracted signal and its 1-sigma noise.
    bin_edges_nm : ndarray
        Edges of the steps along the spectrum.
    sigma_px, box_px : float
        Cross profile (:func:`cross_profile`).
    centre_px : float
        Offset of the profile's centre from the curve.

    Returns
    -------
    amplitude, amplitude_err : ndarray of shape (n_bins,)
        Weighted least-squares amplitude of the profile per bin and its 1-sigma; NaN where a
        bin has no pixel.

    Notes
    -----
    ``A = sum(v g / s^2) / sum(g^2 / s^2)``, ``var A = 1 / sum(g^2 / s^2)``: the optimal
    (profile-weighted) amplitude of a known profile (Horne 1986, PASP 98, 609).
    """
    g = cross_profile(np.asarray(offset_px, float) - centre_px, sigma_px=sigma_px, box_px=box_px)
    w = 1.0 / np.square(np.maximum(np.asarray(sigma, float), 1e-6))
    k = np.digitize(along_nm, bin_edges_nm) - 1
    n = len(bin_edges_nm) - 1
    ok = (k >= 0) & (k < n) & np.isfinite(value) & np.isfinite(g)
    num = np.bincount(k[ok], weights=(value * g * w)[ok], minlength=n)
    den = np.bincount(k[ok], weights=(g * g * w)[ok], minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        amp = np.where(den > 0, num / den, np.nan)
        err = np.where(den > 0, 1.0 / np.sqrt(den), np.nan)
    return amp, err


def fill_saturated(residual: NDArray, sigma: NDArray, *, geometry: SpectralGeometry, x0_px: float,
                   y0_px: float, psf_sigma_px: float, streak_dx_px: float = 0.0, streak_dy_px: float = 0.0,
                   y_start_px: int = 0, y_step_px: int = 1, order: int = 1,
                   wavelength_range_nm: tuple[float, float] = (330.0, 950.0), wing_px: int = 4,
                   max_offset_px: float = 12.0, model_frac: float = 0.1, min_wing_frac: float = 0.3,
                   max_gap_steps: float = 3.0, min_snr: float = 5.0
                   ) -> tuple[NDArray, NDArray, int]:
    """A frame's saturated first-order pixels replaced by the profile its wings imply.

    Parameters
    ----------
    residual : ndarray of shape (n_rows, width)
        Background-subtracted frame, NaN where saturated.
    sigma : ndarray of shape (n_rows, width)
        Its 1-sigma noise.
    geometry : SpectralGeometry
        Trial geometry: where the first-order curve of ``(x0_px, y0_px)`` runs.
    x0_px, y0_px : float
        Zeroth-order position of the frame.
    psf_sigma_px : float
        PSF sigma.
    streak_dx_px, streak_dy_px : float
        Motion of the zeroth order during the exposure (its component across the spectrum
        widens the cross profile).
    y_start_px, y_step_px : int
        Image row of the first array row and the row step (2 for a field of an interlaced frame).
    order : int
        Spectral order.
    wavelength_range_nm : (float, float)
        Only saturated pixels whose nearest curve point lies in this range are filled (the
        zeroth order and other orders stay saturated).
    wing_px : int
        Unsaturated pixels within this many array pixels of a saturated one are the wings (in
        a field of an interlaced frame, rows are two image rows apart).
    max_offset_px : float
        Saturated pixels farther from the curve are not this spectrum's (a star): left NaN.
    model_frac : float
        Error of a filled pixel, as a fraction of its value, for the cross profile model (the
        far wings of a real PSF are not Gaussian): 0.1 (from memory; it only has to keep the
        filled pixels from outweighing measured ones).
    min_wing_frac : float
        A filled value below this fraction of the frame's largest unsaturated value near the
        saturated pixels contradicts the saturation: the pixel gets that value (at least full
        well) with an error as large (it then adds noise, not a false dip).
    max_gap_steps : float
        Steps without wings (half a pixel each) bridged by interpolating the amplitude.
    min_snr : float
        A step's amplitude counts only at this significance (else it is bridged, or a hole).

    Returns
    -------
    filled : ndarray of shape (n_rows, width), float32
        ``residual`` with filled pixels; still NaN off the spectrum (zeroth order, stars).
    sigma_filled : ndarray of shape (n_rows, width), float32
        ``sigma`` with the filled pixels' errors (amplitude error times the profile, and
        ``model_frac`` of the value, in quadrature).
    n_filled : int
        Pixels filled.

    Notes
    -----
    The centre of the cross profile is the median offset of the saturated pixels from the
    trial curve (a saturated core is symmetric about it), so that a trial dispersion angle a
    pixel off does not tilt the amplitudes. Steps along the spectrum are half a pixel long.
    """
    res = np.asarray(residual, np.float32)
    sig = np.asarray(sigma, np.float32)
    sat = ~np.isfinite(res)
    if not sat.any():
        return res, sig, 0
    wing = ndimage.binary_dilation(sat, iterations=int(wing_px)) & ~sat
    rs, cs = np.nonzero(sat)
    rw, cw = np.nonzero(wing)
    xs_all = np.concatenate([cs, cw]).astype(float)
    ys_all = (y_start_px + y_step_px * np.concatenate([rs, rw])).astype(float)
    lam, off = geometry.locate(x0_px, y0_px, xs_all, ys_all, order=order)
    lam, off = np.asarray(lam, float), np.asarray(off, float)
    n_sat = rs.size
    lo_nm, hi_nm = wavelength_range_nm
    on = np.isfinite(lam) & (lam >= lo_nm) & (lam <= hi_nm) & np.isfinite(off) & (np.abs(off) <= max_offset_px)
    on_sat = on[:n_sat]
    if not on_sat.any():
        return res, sig, 0
    centre = float(np.median(off[:n_sat][on_sat]))
    tx, ty = geometry.direction(x0_px, y0_px, 589.0, order)
    box = abs(-streak_dx_px * float(ty) + streak_dy_px * float(tx))
    s_px = math.sqrt(max(psf_sigma_px, 0.3) ** 2 + 1.0 / 12.0)
    disp = float(geometry.dispersion_nm_per_px(x0_px, y0_px, 589.0, order))
    if not (np.isfinite(disp) and disp > 0):
        return res, sig, 0
    step_nm = 0.5 * disp
    edges = np.arange(lo_nm - step_nm, hi_nm + 2 * step_nm, step_nm)
    wl_w, off_w = lam[n_sat:], off[n_sat:]
    val_w = res[rw, cw].astype(float)
    sig_w = sig[rw, cw].astype(float)
    use_w = on[n_sat:]
    amp, amp_err = wing_amplitudes(wl_w[use_w], off_w[use_w], val_w[use_w], sig_w[use_w], bin_edges_nm=edges,
                                   sigma_px=s_px, box_px=box, centre_px=centre)
    centres = 0.5 * (edges[:-1] + edges[1:])
    # a step whose wings are all far out (the profile ~0 there) says nothing: noise over ~0
    good = np.isfinite(amp) & (amp > min_snr * amp_err)
    if not good.any():
        return res, sig, 0
    # amplitude at each saturated pixel's wavelength: its own step, else interpolated across a
    # gap of at most ``max_gap_steps`` steps without wings (longer holes stay holes)
    lam_s = lam[:n_sat]
    kg = np.flatnonzero(good)
    a = np.interp(lam_s, centres[kg], amp[kg])
    ae = np.interp(lam_s, centres[kg], amp_err[kg])
    j = np.clip(np.searchsorted(centres[kg], lam_s), 1, max(kg.size - 1, 1))
    gap = np.minimum(np.abs(lam_s - centres[kg][j - 1]), np.abs(lam_s - centres[kg][np.minimum(j, kg.size - 1)]))
    reach = on_sat & (gap <= max_gap_steps * step_nm)
    g = cross_profile(off[:n_sat] - centre, sigma_px=s_px, box_px=box)
    model = np.where(reach, a * g, np.nan)
    near = val_w[use_w]
    level = float(np.nanmax(near)) if near.size and np.isfinite(near).any() else math.inf
    ok = np.isfinite(model) & (model >= min_wing_frac * level)
    filled = res.copy()
    sig_f = sig.copy()
    filled[rs[ok], cs[ok]] = model[ok]
    sig_f[rs[ok], cs[ok]] = np.hypot(ae[ok] * g[ok], model_frac * model[ok])
    # the rest of the spectrum's saturated pixels: at least the saturation level, and no more
    # said (an error as large as the value), so that a stray one does not void a whole band
    rest = on_sat & ~ok & np.isfinite(level)
    filled[rs[rest], cs[rest]] = level
    sig_f[rs[rest], cs[rest]] = level
    return filled, sig_f, int(ok.sum())


def saturated_ridge(residual: NDArray, *, geometry: SpectralGeometry, x0_px: float, y0_px: float,
                    y_start_px: int = 0, y_step_px: int = 1, order: int = 1,
                    wavelength_range_nm: tuple[float, float] = (330.0, 950.0), max_offset_px: float = 12.0,
                    min_pixels: int = 3, sigma_floor_px: float = 0.15) -> tuple[NDArray, NDArray, NDArray, NDArray]:
    """Points on the real first-order curve: the middles of the saturated core, step by step.

    A core clipped at full well is symmetric about the curve (the cross profile is), so the
    mean position of its saturated pixels in a one-pixel step along the spectrum lies on the
    curve whatever the trial geometry; it fixes the dispersion angle (not the groove density:
    the curve does not depend on it).

    Parameters
    ----------
    residual : ndarray of shape (n_rows, width)
        Background-subtracted frame, NaN where saturated.
    geometry : SpectralGeometry
        Trial geometry (only to tell which saturated pixels belong to which step).
    x0_px, y0_px : float
        Zeroth-order position.
    y_start_px, y_step_px, order, wavelength_range_nm, max_offset_px
        As :func:`fill_saturated`.
    min_pixels : int
        Steps with fewer saturated pixels give no point.
    sigma_floor_px : float
        Smallest error of a point (pixel quantisation of a core a few pixels wide).

    Returns
    -------
    wavelength_nm, x_px, y_px, sigma_px : ndarray
        Trial wavelength of each step (a label), the point, and its 1-sigma across the
        spectrum: the scatter of the step's pixels across it over sqrt(n), with the floor.
        Empty when the frame has no saturated first-order core.
    """
    sat = ~np.isfinite(np.asarray(residual, float))
    empty = (np.zeros(0),) * 4
    if not sat.any():
        return empty
    r, c = np.nonzero(sat)
    x = c.astype(float)
    y = (y_start_px + y_step_px * r).astype(float)
    lam, off = (np.asarray(v, float) for v in geometry.locate(x0_px, y0_px, x, y, order=order))
    lo_nm, hi_nm = wavelength_range_nm
    on = np.isfinite(lam) & (lam >= lo_nm) & (lam <= hi_nm) & np.isfinite(off) & (np.abs(off) <= max_offset_px)
    if on.sum() < min_pixels:
        return empty
    disp = float(geometry.dispersion_nm_per_px(x0_px, y0_px, 589.0, order))
    if not (np.isfinite(disp) and disp > 0):
        return empty
    k = np.floor((lam[on] - lo_nm) / disp).astype(int)
    n = np.bincount(k)
    keep = np.flatnonzero(n >= min_pixels)
    if keep.size == 0:
        return empty
    def step_mean(v: NDArray) -> NDArray:
        return np.bincount(k, weights=v, minlength=n.size)[keep] / n[keep]

    wl, xm, ym, om = (step_mean(v[on]) for v in (lam, x, y, off))
    spread = np.sqrt(np.maximum(step_mean(off[on] ** 2) - om**2, 0.0))
    sigma = np.hypot(spread / np.sqrt(n[keep]), sigma_floor_px)
    return wl, xm, ym, sigma


def fit_ridge_angle(geometry: SpectralGeometry, x0_px: NDArray, y0_px: NDArray, x_px: NDArray, y_px: NDArray,
                    sigma_px: NDArray, *, order: int = 1,
                    max_change_deg: float = 6.0) -> tuple[SpectralGeometry, float]:
    """Dispersion angle that puts the curves through ridge points (:func:`saturated_ridge`).

    Parameters
    ----------
    geometry : SpectralGeometry
        Start; everything but the dispersion angle is kept.
    x0_px, y0_px : ndarray
        Zeroth-order position of each point's frame.
    x_px, y_px, sigma_px : ndarray
        Ridge points and their 1-sigma across the spectrum.
    order : int
        Spectral order.
    max_change_deg : float
        Bound of the change from the start.

    Returns
    -------
    geometry : SpectralGeometry
        With the fitted angle (the start when there are fewer than 3 points).
    angle_err_deg : float
        1-sigma (robust least squares covariance, scaled by the reduced chi-square when above
        1); NaN when not fitted.
    """
    if len(x_px) < 3:
        return geometry, math.nan
    a0 = geometry.grating.dispersion_angle_deg
    sig = np.maximum(np.asarray(sigma_px, float), 1e-3)

    def resid(p: NDArray) -> NDArray:
        g = geometry.with_grating(dispersion_angle_deg=float(p[0]))
        _, off = g.locate(x0_px, y0_px, x_px, y_px, order=order)
        r = np.asarray(off, float) / sig
        return np.where(np.isfinite(r), r, 1e3)

    res = optimize.least_squares(resid, [a0], bounds=([a0 - max_change_deg], [a0 + max_change_deg]),
                                 loss="soft_l1", f_scale=3.0, diff_step=1e-6, x_scale=[0.1])
    if not res.success:
        return geometry, math.nan
    dof = max(res.fun.size - 1, 1)
    chi2 = float(np.sum(res.fun**2))
    jtj = float(res.jac[:, 0] @ res.jac[:, 0])
    err = math.sqrt(max(1.0, chi2 / dof) / jtj) if jtj > 0 else math.nan
    return geometry.with_grating(dispersion_angle_deg=float(res.x[0])), err
