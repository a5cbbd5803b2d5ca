"""Curved first-order extraction: frames -> per-frame spectra on one wavelength grid.

For every frame (or field) the first-order spectrum is sampled along the curve
that :class:`~meteorspec.optics.SpectralGeometry` predicts for that exposure's
zeroth-order position; nothing here assumes a straight spectrum or a constant
nm-per-pixel. The steps, per frame:

1. **Curve.** The zeroth order at the start, middle and end of the exposure
   (``track.position``) gives three spectrum curves, densely sampled in
   wavelength (half a pixel of arc per sample). The middle curve is the
   reference; the start-to-end difference at each wavelength is the motion
   streak of that wavelength during the exposure.
2. **Band.** Pixels within ``half_width_px + |streak across| / 2`` of the middle
   curve (including the ones off the sensor, so that their share of the light
   can be accounted for) get a wavelength and a cross offset by projecting on
   the densely sampled curve (Newton steps on its piecewise-linear
   interpolation; the interpolation error is below 1e-3 px for curves whose
   radius exceeds 30 px).
3. **Streak-aligned wavelength.** A line is a short streak parallel to the
   motion. The pixel's wavelength coordinate is taken along a direction
   sheared from the cross-dispersion axis towards the motion by
   ``kappa = m_N^2 / (m_N^2 + 12 sigma^2)`` of the full streak shear
   (``m_N``: streak component across the spectrum, ``sigma``: PSF). This
   minimises the line width: integrating exactly along the motion removes the
   along-dispersion smear ``m_T^2 / 12`` but stretches the PSF by the shear,
   ``sigma^2 (m_T / m_N)^2``; the variance sum is minimal at that ``kappa``.
   It is 0 (plain cross-dispersion integration) for motion along the
   dispersion, where no shear can help, and tends to 1 for long streaks
   across it. The part of the streak along the spectrum that the shear
   leaves, ``m_T 12 sigma^2 / (m_N^2 + 12 sigma^2)``, is light-weighted: a
   meteor brightening during the exposure puts a line's light past the
   streak's middle. Every pixel's wavelength is therefore taken from the
   streak's light-weighted centre (the exposure's light curve from the
   frame energies, :func:`_light_centroid_fraction`), so that each line's
   centroid stays on its wavelength (up to 0.7 nm of shift otherwise, for a
   5 nm/px spectrum and a meteor brightening by e per frame). In the first
   and last lit exposures, and next to a saturated zeroth order (whose
   energy is only a lower bound), the tracker's measured centroid of the
   zeroth order sets where the light falls instead.
4. **Exact fractional binning.** A unit pixel maps onto the wavelength axis as
   a trapezoid (the convolution of two boxes, ``|du/dx|`` and ``|du/dy|``
   wide); its flux is split over the common-grid bins in proportion to the
   exact area in each, so the sum over bins is the pixel's flux to round-off.
5. **Masks and variance.** Saturated, star-masked, non-finite and off-sensor
   pixels are bad, and so are pixels within the PSF reach (plus the streak) of
   a point where the spectrum leaves the lens field: that end sweeps along
   the spectrum during the exposure, so the wavelengths near it are recorded
   for only part of it. A bin loses the profile-weighted share of its bad pixels;
   it is masked when bad pixels other than saturated ones carry more than
   ``max_lost_fraction`` of it, otherwise the estimate is scaled up by the lost
   share (the profile comes from the data, see 6).
   **Saturated bins from their wings.** The pooled profile (6) is estimated
   without the cross-sections of the spectrum that hold a saturated pixel (a
   saturated core drops out of a mean per offset while its wings stay in,
   which widens the profile, and bins scaled up by it read low). When enough
   unsaturated cross-sections remain (``_MIN_CLEAN_SECTIONS``), saturated
   pixels count as lost light: a bin holding them is scaled up while all its
   bad pixels carry at most ``max_saturated_fraction`` (0.8) of it, and
   while its scaled-up light, through the profile, explains its saturated
   pixels (at least half their clipped value, :func:`_underlit_saturation`;
   a profile that lights the wrong part of the streak fails it). Its lost
   share is weighed by each pixel's own profile (the PSF refitted to the
   frame's unsaturated cross-sections, convolved with the frame's streak at
   its wavelength) times the frame's spectrum over the pixel's
   footprint (a line core's pixels carry more than a flat spectrum in the bin
   gives them). Such a bin is ``recovered`` (flag ``saturation_recovered``)
   and its variance carries the profile shape's share, a relative
   ``_LOST_SHARE_ERR / (1 - L)``. In a field of an interlaced camera the
   pixels are the field's own rows (every other one, each standing for
   ``band.scale`` rows), the streak that of the field's exposure and the PSF
   the flight's, fitted to the pixels of the unsaturated cross-sections
   against the boxcar spectra (:func:`_fit_psf`): a field's own refit, and a
   mean per offset over the flight, follow the spectrum's stretches that the
   row sampling puts at each offset (:func:`_frame_psf`; the pooled fit came
   out 1.30 px for a simulated PSF whose Gaussian equivalent is 1.23 px, and
   the recovered Na bins of seed-4 event 7 of bench/bench_calibration.py read
   5.0 % low against the noise-free truth, 1.0 % high with the pixel fit).
   With too few unsaturated cross-sections (a fireball on a coarse binned
   camera) a bin is masked as soon as
   saturated pixels carry 0.1 % of it. The shape error is common to the
   frames: :meth:`FrameSpectra.whole_flight` adds it coherently
   (``shape_rel_err``). A bin counts as saturated (flag ``saturated``)
   when saturated pixels carry more than 0.1 % of it, recovered or not. On
   noise-free truth (bench/saturation_wings.py --oracle) the recovered bins
   read 2-2.5 % low (median) up to a lost share of 0.7 and 5.7 % between 0.7
   and 0.9, within the stated error; in fields (events 5, 7, 8, 28 of --seed 5,
   interlaced) 1-3 % low up to 0.7 and 2-7 % between 0.7 and 0.9 (both with
   the pooled PSF, before the fields' pixel fit). Variance is
   propagated from ``background.variance`` pixel by pixel, and so is the
   covariance of bins that share pixels (a pixel spreads over two to several
   bins; adjacent bins correlate at ~0.9 on the default grid), kept as
   correlation coefficients per lag (``FrameSpectra.correlation``,
   ``Spectrum.correlation``, ``Spectrum.covariance``): sums and fits over
   several bins need it, their errors are 1.5-3x too small without it.
   **Black-level floor.** Linear pixel values stop at 0 (contract section
   3); on a dark sky with a black level close to 0 the noise's low tail is
   cut, less on a pixel the meteor lights than on the meteor-free samples
   the background level comes from, so a lit pixel's residual falls short of
   its light (by up to 0.05 ADU on a 4 ADU sky under 2.6 ADU of noise: 1.5-2.5
   % of a faint meteor's line energies). Each good pixel's residual is raised
   by that expected shortfall (:func:`_floor_deficit`, from the background's
   smooth sky and noise model) for the light a pixel model gives it (each
   frame's weight times the flight's mean spectrum, times the profile), and
   the frame is binned again; on a sky a few sigma above 0 the shortfall
   vanishes.
6. **Optimal extraction.** A cross-dispersion profile is estimated from the
   data, pooled over the flight (mean residual in 0.25 px offset bins, a
   Gaussian PSF convolved with the frames' streaks fitted to it); it weighs
   the bad pixels a bin loses (step 5). With ``optimal`` every pixel gets its
   own profile: the PSF convolved with its frame's streak across the spectrum
   at its wavelength, light-weighted by the light curve within the exposure
   (the streak differs from frame to frame and along the curved spectrum),
   with the PSF's width and centre fitted to the pixels against the boxcar
   spectra (:func:`_fit_psf`; a mean per offset follows the spectrum, not the
   profile, when the curve runs along the pixel rows or a field samples every
   other row). The estimate per bin is Horne's (1986, PASP 98, 609)
   profile-weighted mean, each pixel counting with its fractional area in the
   bin and, in a field, for the rows it stands for; the weights' variance is
   the sky's plus the shot noise of the frame's mean spectrum, the same
   function of offset for every bin (a streaked line is not separable into
   spectrum times profile, see :func:`_horne`). The black-level correction
   is redone with the pixels' own profiles. On noise-free renders it agrees
   with the boxcar sum to 0.1 % (bench/flux_ratio.py events 4, 12, 14 and
   the faint sample).
7. **Twinkling star light.** Star light that stays unmasked under the band
   (a star spectrum's wings and faint stars below the star mask's threshold:
   the background level above its smooth sky by more than 3 sigma of the
   level's own noise, ``_STAR_LIGHT_SIGMA``) is subtracted as the level, but
   in each exposure it twinkles by the background's measured ``scintillation``,
   the same factor over a star's whole spectrum, and the level itself holds
   that twinkle averaged over the frames it came from (each pixel's
   ``level_count``, else ``level_samples``). Per-pixel
   variances miss it: its error is common to every bin of a frame, its own
   part independent between frames and the level's part common to the frames
   of one field parity. The extraction weighs the pixels' twinkle (scintillation
   times star light) like their data, adds it to each bin's variance and
   correlation (``FrameSpectra.twinkle_share``), and the whole flight keeps it
   as common error components (``Spectrum.common_share``), which
   ``Spectrum.covariance`` uses beyond the stored lags. The stars of one frame
   share one twinkle here, an approximation: separate stars twinkle
   independently, so a sum over bins under two stars is given a little more
   error than it has, and two windows under different stars a covariance
   they do not have.
   Under a star spectrum carrying 0.6 of some bins' error (tests/test_twinkle.py,
   150 seeded draws) 30 nm window sums scatter by 0.96-0.99 (boxcar) and
   1.07-1.10 (optimal) times the error stated with it and 1.8 times the error
   stated without it. The background
   measures the scintillation only on stars above 20 sigma; without one it is
   0 and so is this term.
8. **The background level's noise.** The level subtracted from a pixel is the
   mean of the frames it was estimated from, ``Background.level_count`` of
   them: fewer where :func:`~meteorspec.background.refine_background`
   re-estimated the meteor's pixels from the frames in which they are dark
   (on a slow fireball half of them from 3 or fewer). Its error, the pixel's
   sky variance over that count (``Background.level_variance``), is part of
   every frame's residual and the same in every frame that subtracts that
   level. Each frame's variances and lag correlations include it; where the
   bands of two or more frames cover one pixel (a slow meteor, or one moving
   along its spectrum) the frames share it, and :meth:`FrameSpectra.whole_flight`
   adds it between them (``FrameSpectra.level_share``), at lags as far apart as
   the frames' spectra are shifted, beyond the pixels' own lags where needed.
   Six frames on the same pixels with a level from 4 dark frames
   (tests/test_level_noise.py, 100 seeded draws): window sums scatter by
   0.97 (boxcar) and 1.07-1.18 (optimal; 1.03-1.06 with a perfect level) times
   the stated error, 1.43 times the error stated without the level's noise.

Memory: a frame is used once, while it streams past; only the band pixels of
each frame (a few tens of thousands of numbers) are kept for the second pass.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from scipy import sparse
from scipy.optimize import least_squares
from scipy.special import erf, gammaln, ndtr

from .config import Camera
from .optics import SpectralGeometry

__all__ = ["FrameSpectra", "Spectrum", "extract_spectra", "default_wavelength_grid", "EXTRACTION_FLAGS",
           "SHEAR_PSF_SIGMA_PX"]

SHEAR_PSF_SIGMA_PX = 1.5
"""Default PSF sigma (px) of :func:`extract_spectra`: sets its shear towards the motion (module
notes, step 3), its band and its profile fits; the instrument width of its lines
(:func:`meteorspec.lines.line_streak_px`) takes the shear from it."""

#: Flags this stage can raise (contract vocabulary plus our own).
EXTRACTION_FLAGS = ("saturated", "saturation_recovered", "spectrum_off_frame", "motion_parallel_to_dispersion",
                    "low_snr", "no_luminous_frames", "optimal_extraction")

# Spectral range the tool looks at (the issue's "350-900 nm at most").
_WL_MIN_NM, _WL_MAX_NM = 350.0, 900.0
# A streak within this angle of the dispersion direction smears lines together (issue 3).
_PARALLEL_DEG = 20.0
# A bin whose saturated pixels carry more than this profile share counts as saturated (flag
# ``saturated``); without a clean profile (``_pooled_profile``) such a bin is masked.
_SAT_SHARE = 1e-3
# Cross-sections (pixel-sized wavelength steps per frame) without a saturated pixel and with light
# (> 3 sigma) in the central pixels that the pooled profile needs before saturated bins are scaled
# up (and a frame's own PSF refit, :func:`_frame_psf`). bench/saturation_wings.py --seed 5: the
# fireball on a binned camera (event 30) keeps none, the other saturated events 62-4700; 20 keeps
# a two-parameter (centre, width) fit well determined and any such fireball out.
_MIN_CLEAN_SECTIONS = 20
# Error of the lost share L of a bin holding saturated pixels, from the profile's shape: the bin,
# scaled up by 1 / (1 - L), carries a relative error _LOST_SHARE_ERR / (1 - L) on top of its noise.
# Measured: bench/saturation_wings.py --oracle --only 2 6 31 35 (seed 5; noise-free truth per bin,
# 3700 bins): the extraction's share falls short of the true one by 0.007-0.011 (median per class
# of L), and the scaled-up bins read low by 1.9, 2.5, 2.5 and 5.7 % (median) for L in (0.1, 0.3],
# (0.3, 0.5], (0.5, 0.7], (0.7, 0.9]; 0.015 / (1 - L) is 1.9, 2.5, 3.8 and 7.5 % at the classes'
# middles. (For a Gaussian core it is a 3 % error of the profile's width: |dL / d ln sigma| =
# 2 z exp(-z^2) / sqrt(pi) with L = erf(z), Abramowitz & Stegun 7.1.19, is 0.45-0.48 for
# L = 0.6-0.8.)
_LOST_SHARE_ERR = 0.015
# Bins losing up to this share give the spectral density that weighs the lost pixels
# (:func:`_spectral_loss_weights`); beyond it the density is interpolated.
_WEIGHT_MAX_LOST = 0.98
# A saturated pixel whose bin's scaled-up density, through the profile, gives it less than this
# share of its clipped value shows a misplaced profile (:func:`_underlit_saturation`); the
# bin is masked. A half: the density over a bin is an average (a line core's pixel holds more)
# and the profile's wing is known to a few per cent; a misplaced profile gives far less
# (seed-6 event 23: below 0.1).
_SAT_EXPLAINED = 0.5
# Shortest streak (px) whose measured zeroth-order centroid places the light within the
# exposure (:func:`_light_centroid_fraction`), two widths of the default 1.5 px PSF: the
# centroid of a shorter streak says little about where along it the light fell.
_MIN_STREAK_PX = 3.0
_PROFILE_STEP_PX = 0.25
# Star light under the band that twinkles (module notes, step 7): the background level above its
# smooth sky by more than this many sigma of the level's own noise. 3: a one-sided false alarm
# of 0.13 % per pixel (normal tail, common practice), whose twinkle is some 6 % of the pixel's
# noise (scintillation 0.07, a level from 13 frames).
_STAR_LIGHT_SIGMA = 3.0
# Correlations of whole-flight bins through the background level's noise shared by frames (module
# notes, step 8) below this do not lengthen the stored lags. Measured on seed-4 event 25 of
# bench/bench_calibration.py (moving along its dispersion: frames' spectra share pixels 43 bins
# apart): 43 lags at 1e-3, 46 with every value kept, and window errors (20-90 nm) equal to 0.1 ADU.
_LEVEL_CORR_TOL = 1e-3


# --------------------------------------------------------------------------- containers


@dataclass(frozen=True, eq=False)
class Spectrum:
    """One spectrum on a wavelength grid.

    Attributes
    ----------
    wavelength_nm : ndarray of shape (n_wl,)
        Bin centres, increasing, standard air.
    bin_width_nm : ndarray of shape (n_wl,)
    flux : ndarray of shape (n_wl,)
        Spectral density, linear ADU per nm (NaN where nothing is known).
    flux_err : ndarray of shape (n_wl,)
        1-sigma of ``flux``.
    mask : ndarray of shape (n_wl,), bool
        True = bad or absent.
    correlation : ndarray of shape (n_wl, n_lag)
        Correlation coefficient of ``flux`` in bin ``j`` with bin ``j + d``
        (column ``d - 1``); bins further apart are uncorrelated. Neighbouring
        bins share pixels (a pixel spreads over two to several bins), so
        their noise is strongly correlated: errors of sums and fits over
        several bins need it (see :meth:`covariance`). A correlation is
        unchanged by a per-bin rescaling (response, extinction), so it stays
        valid when those stages replace ``flux`` and ``flux_err``. Empty
        (shape ``(n_wl, 0)`` or ``(0, 0)``): treated as uncorrelated.
    common_share : ndarray of shape (n_wl, n_common)
        Errors common to bins far apart (the twinkle of star light under the
        spectrum, module notes step 7): column ``c`` is one independent error,
        as a share of each bin's 1-sigma, so bins ``j`` and ``l`` beyond the
        stored lags correlate by ``sum_c s_jc s_lc`` (within them
        ``correlation`` holds it already). Relative, so valid after a per-bin
        rescaling like ``correlation``. Empty: none.
    """

    wavelength_nm: np.ndarray
    bin_width_nm: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    mask: np.ndarray
    correlation: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    common_share: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))

    def covariance(self, index: np.ndarray | None = None) -> np.ndarray:
        """Covariance matrix of ``flux`` ((ADU/nm)^2) over the bins ``index`` (default all).

        Parameters
        ----------
        index : ndarray of int or bool, optional
            Bins to include (a boolean mask or indices).

        Returns
        -------
        ndarray of shape (n, n)
            ``rho_jl * err_j * err_l`` (``rho`` from ``correlation`` within the
            stored lags, from ``common_share`` beyond them; NaN where an error
            is NaN).
        """
        idx = np.arange(self.wavelength_nm.size) if index is None else np.asarray(index)
        if idx.dtype == bool:
            idx = np.flatnonzero(idx)
        err = np.asarray(self.flux_err, dtype=float)[idx]
        rho = np.eye(idx.size)
        common = np.asarray(self.common_share, dtype=float)
        if common.ndim == 2 and common.shape[0] == self.wavelength_nm.size and common.shape[1] > 0 and idx.size:
            sub = np.nan_to_num(common[idx])
            rho = sub @ sub.T
            np.fill_diagonal(rho, 1.0)
        corr = np.asarray(self.correlation, dtype=float)
        if corr.ndim == 2 and corr.shape[0] == self.wavelength_nm.size and corr.shape[1] > 0 and idx.size:
            lag = idx[None, :] - idx[:, None]
            ok = (lag >= 1) & (lag <= corr.shape[1])
            i, j = np.nonzero(ok)
            rho[i, j] = np.nan_to_num(corr[idx[i], lag[i, j] - 1])
            rho[j, i] = rho[i, j]
        return rho * err[:, None] * err[None, :]

    def integrate(self, lo_nm: float, hi_nm: float) -> tuple[float, float]:
        """Energy (linear ADU) and its 1-sigma in ``[lo_nm, hi_nm)`` (bin centres), unmasked bins only.

        The error includes the covariance of neighbouring bins (``correlation``).
        """
        sel = (self.wavelength_nm >= lo_nm) & (self.wavelength_nm < hi_nm) & ~self.mask
        e = float(np.sum(self.flux[sel] * self.bin_width_nm[sel]))
        w = self.bin_width_nm[sel]
        v = float(w @ self.covariance(sel) @ w)
        return e, float(np.sqrt(max(v, 0.0)))


@dataclass(frozen=True, eq=False)
class FrameSpectra:
    """Per-frame (or per-field) spectra on one common wavelength grid.

    Attributes
    ----------
    wavelength_nm, bin_width_nm : ndarray of shape (n_wl,)
        Common grid: bin centres (increasing, air) and widths.
    flux : ndarray of shape (n_frames, n_wl)
        Spectral density in linear ADU per nm; ``sum(flux * bin_width_nm)``
        over a line is its linear ADU in that frame. NaN where masked and
        nothing is known.
    variance : ndarray of shape (n_frames, n_wl)
        Of ``flux`` ((ADU/nm)^2).
    mask : ndarray of shape (n_frames, n_wl), bool
        True = bad or absent (frame not luminous, off the sensor, saturated,
        too many bad pixels).
    time_s : ndarray of shape (n_frames,)
        Middle of each exposure.
    flags : tuple of str
    frame_weight : ndarray of shape (n_frames,)
        Relative brightness of each frame: a rank-1 fit of the frames' unmasked
        bins to one mean spectrum, started (and scaled) by the track's
        zeroth-order flux; used by :meth:`whole_flight` to account for masked
        samples. NaN for a lit frame whose every bin was lost to saturation
        (its share is unknown); 0 for frames not lit or entirely off the sensor.
    optimal : bool
        Whether profile-weighted (Horne 1986) extraction was used.
    profile_offset_px, profile : ndarray
        The pooled cross-dispersion profile (density per px) used.
    correlation : ndarray of shape (n_frames, n_wl, n_lag)
        Per frame, the correlation coefficient of bin ``j`` with bin ``j + d``
        (column ``d - 1``), from the pixels the two bins share (see
        :class:`Spectrum`). Empty: uncorrelated.
    light_time_s : ndarray of shape (n_frames,)
        Light-weighted mean time of each exposure (estimated from the frame
        energies), where the extraction places the streak of every line;
        ``time_s`` where nothing is known. Empty: not computed.
    recovered : ndarray of shape (n_frames, n_wl), bool
        Unmasked bins holding saturated pixels, scaled up from their
        unsaturated wings by the pooled profile (module notes, step 5; flag
        ``saturation_recovered``). Their ``variance`` includes the profile
        shape's share. Empty: none recorded.
    shape_rel_err : ndarray of shape (n_frames, n_wl)
        The profile shape's share of a recovered bin's error, relative to its
        flux (0 elsewhere; already in ``variance``). It is the same profile in
        every frame, so :meth:`whole_flight` adds it coherently over frames
        rather than in quadrature. Relative, so it stays valid when later
        stages rescale ``flux`` and ``variance`` per bin. Empty: none.
    light_spread : ndarray of shape (n_frames,)
        RMS spread in time of each exposure's light about ``light_time_s``, in
        exposures: ``1 / sqrt(12)`` (0.289) for light even over the exposure,
        less where the meteor brightens or fades steeply in it or lights up or
        goes out inside it (the light curve within the exposure that places
        the lines). A line's motion streak, as the extraction records it, is
        this times ``sqrt(12)`` times the streak of the whole exposure. Empty:
        not computed.
    twinkle_share : ndarray of shape (n_frames, n_wl)
        Share of each bin's 1-sigma (already in ``variance`` and in
        ``correlation``) from the twinkle of star light in its unmasked pixels
        (module notes, step 7): common to all bins of the frame, its own part
        independent between frames, its part through the background level
        (``twinkle_level``) common to the frames of one ``twinkle_group``.
        Relative, so valid after a per-bin rescaling. Empty: none.
    twinkle_group : ndarray of int, shape (n_frames,)
        Frames whose background level is one estimate (field parity: first image row).
    twinkle_level : float
        The level's twinkle variance relative to a frame's own: ``1 / level_samples``, or
        with each pixel's sample count known (``Background.level_count``) its inverse averaged
        over the star light under the band, weighted by its twinkle variance.
    level_share : scipy.sparse.csr_matrix of shape (n_frames * n_wl, n_px), optional
        The background level's noise at image pixels seen by more than one frame
        (module notes, step 8): row ``k * n_wl + j`` holds bin ``j`` of frame ``k``'s
        weight of each such pixel times the level's 1-sigma there, as a share of
        the bin's 1-sigma (relative, like ``twinkle_share``). Its sum over a
        frame's pixels squared is already in the bin's variance; between frames
        it is an error they share, which :meth:`whole_flight` adds. None: none.
    """

    wavelength_nm: np.ndarray
    bin_width_nm: np.ndarray
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    time_s: np.ndarray
    flags: tuple[str, ...]
    frame_weight: np.ndarray = field(default_factory=lambda: np.zeros(0))
    optimal: bool = False
    profile_offset_px: np.ndarray = field(default_factory=lambda: np.zeros(0))
    profile: np.ndarray = field(default_factory=lambda: np.zeros(0))
    correlation: np.ndarray = field(default_factory=lambda: np.zeros((0, 0, 0)))
    light_time_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    recovered: np.ndarray = field(default_factory=lambda: np.zeros((0, 0), bool))
    shape_rel_err: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    light_spread: np.ndarray = field(default_factory=lambda: np.zeros(0))
    twinkle_share: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    twinkle_group: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    twinkle_level: float = 0.0
    level_share: sparse.csr_matrix | None = None

    @property
    def n_frames(self) -> int:
        return int(self.flux.shape[0])

    def select_frames(self, index: np.ndarray) -> FrameSpectra:
        """These spectra restricted to the frames ``index`` (integer positions or a boolean mask):
        every per-frame array sliced alike; the grid and the pooled profile kept."""
        n = self.n_frames
        per_frame = {}
        for name in ("flux", "variance", "mask", "time_s", "frame_weight", "light_time_s", "recovered",
                     "shape_rel_err", "correlation", "light_spread", "twinkle_share", "twinkle_group"):
            value = np.asarray(getattr(self, name))
            if value.ndim >= 1 and value.shape[0] == n:
                per_frame[name] = value[index]
        share = self.level_share
        if share is not None and share.shape[0] == n * self.wavelength_nm.size:
            pos = np.arange(n)[index]
            n_wl = self.wavelength_nm.size
            per_frame["level_share"] = share[(pos[:, None] * n_wl + np.arange(n_wl)).ravel()]
        return replace(self, **per_frame)

    def whole_flight(self, *, min_coverage: float = 0.1) -> Spectrum:
        """Sum over frames, with masked samples accounted for by the light curve.

        Parameters
        ----------
        min_coverage : float
            Smallest share of the light curve that the unmasked frames of a bin
            must carry; bins with less are masked. The scaled estimate stays
            unbiased at any coverage (its error grows as ``1 / c`` and is
            propagated); 0.1 keeps the strong lines of a fireball whose
            brightest frames are saturated, without letting a sliver of the
            flight stand for all of it.

        Notes
        -----
        For each bin the unmasked frame samples are summed and divided by the
        share ``c`` of the flight's light (``frame_weight``) that those frames
        carry, i.e. a masked sample is assumed to follow the light curve of the
        frames around it (exact when the spectral shape is constant in time,
        and ``c = 1``, a plain sum, when no frame is masked). Variance is the
        sum of the frame variances over ``c**2``, except for the errors common
        to frames: the profile shape's (``shape_rel_err``) and the twinkle of
        star light through the background level (``twinkle_share``), summed
        coherently over the frames that share them. The twinkle, common to all
        bins of a frame, gives the spectrum its ``common_share``.
        """
        n_wl = self.wavelength_nm.size
        if self.n_frames == 0 or n_wl == 0:
            nan = np.full(n_wl, np.nan)
            return Spectrum(self.wavelength_nm, self.bin_width_nm, nan, nan.copy(), np.ones(n_wl, bool))
        good = ~self.mask
        w = np.where(np.isfinite(self.frame_weight), np.clip(self.frame_weight, 0, None), 0.0)
        total_w = w.sum()
        flux = np.where(good, self.flux, 0.0).sum(axis=0)
        var = np.where(good, self.variance, 0.0).sum(axis=0)
        rel = np.asarray(self.shape_rel_err, dtype=float)
        if rel.shape == self.flux.shape and np.any(rel > 0):
            # the profile-shape error of recovered bins is common to the frames: summed coherently
            # (its quadrature share, already in the frames' variances, replaced by the coherent sum)
            sd = np.where(good, rel * np.abs(np.nan_to_num(self.flux)), 0.0)
            var = var - (sd**2).sum(axis=0) + sd.sum(axis=0) ** 2
        if total_w > 0:
            cover = (good * w[:, None]).sum(axis=0) / total_w
        else:
            cover = good.any(axis=0).astype(float)
        ok = (cover >= min_coverage) & good.any(axis=0)
        # a frame of unknown weight (NaN: lit, but every bin lost to saturation) makes the share
        # of the bins it lost unknown
        unknown = ~np.isfinite(self.frame_weight)
        if unknown.any():
            ok &= ~self.mask[unknown].any(axis=0)
        twinkle, common = self._twinkle(good)
        if common.shape[1]:
            var = var - (twinkle**2).sum(axis=0) + (common**2).sum(axis=1)
        cross = self._level_cross(good)
        if cross is not None:
            var = var + cross.diagonal()
        corr = self._whole_flight_correlation(good, var, twinkle, common, cross)
        with np.errstate(invalid="ignore", divide="ignore"):
            flux = np.where(ok, flux / cover, np.nan)
            err = np.where(ok, np.sqrt(var) / cover, np.nan)
            share = np.where(ok[:, None] & (var[:, None] > 0), common / np.sqrt(np.where(var > 0, var, 1.0))[:, None],
                             0.0)
        return Spectrum(self.wavelength_nm.copy(), self.bin_width_nm.copy(), flux, err, ~ok, corr,
                        _compress_columns(share))

    def _twinkle(self, good: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Each frame's twinkle per bin (1-sigma, level's share included; 0 where masked) and the
        independent twinkle errors of the frame sum as columns: each frame's own, and per
        ``twinkle_group`` the level's, common to its frames."""
        n_wl = self.wavelength_nm.size
        share = np.asarray(self.twinkle_share, dtype=float)
        if share.shape != self.flux.shape or not np.any(share > 0):
            return np.zeros((self.n_frames, n_wl)), np.zeros((n_wl, 0))
        t = np.where(good, share * np.sqrt(np.where(good, self.variance, 0.0)), 0.0)
        lam = max(float(self.twinkle_level), 0.0)
        own = t / np.sqrt(1.0 + lam)
        cols = [own[k] for k in range(self.n_frames) if np.any(own[k] > 0)]
        groups = np.asarray(self.twinkle_group, dtype=int)
        if lam > 0:
            if groups.shape != (self.n_frames,):
                groups = np.zeros(self.n_frames, int)
            cols += [np.sqrt(lam) * own[groups == g].sum(axis=0) for g in np.unique(groups)]
        return t, (np.stack(cols, axis=1) if cols else np.zeros((n_wl, 0)))

    def _level_cross(self, good: np.ndarray) -> sparse.csr_matrix | None:
        """Covariance (n_wl x n_wl, sparse) of the frame sum from the background level's noise
        shared by different frames (``level_share``; each frame's own part is in its variance and
        correlation already): ``A A^T - sum_k B_k B_k^T`` with ``B_k`` frame ``k``'s weights times
        the level's 1-sigma per pixel (its unmasked bins) and ``A`` their sum over frames."""
        share = self.level_share
        n_wl = self.wavelength_nm.size
        if share is None or share.shape[0] != self.n_frames * n_wl or share.nnz == 0:
            return None
        sd = np.sqrt(np.where(good & np.isfinite(self.variance), self.variance, 0.0)).ravel()
        b = sparse.csr_matrix(sparse.diags(sd) @ share)
        to_bin = sparse.csr_matrix((np.ones(b.shape[0]), (np.tile(np.arange(n_wl), self.n_frames),
                                                          np.arange(b.shape[0]))), shape=(n_wl, b.shape[0]))
        a = to_bin @ b
        cross = sparse.csr_matrix(a @ a.T)
        for k in range(self.n_frames):
            bk = b[k * n_wl:(k + 1) * n_wl]
            if bk.nnz:
                cross = cross - bk @ bk.T
        return cross

    def _whole_flight_correlation(self, good: np.ndarray, var_sum: np.ndarray, twinkle: np.ndarray,
                                  common: np.ndarray, cross: sparse.csr_matrix | None = None) -> np.ndarray:
        """Correlation of neighbouring bins of the frame sum (the coverage scale cancels in it): the
        frames' covariances with their twinkle (``twinkle``) replaced by the sum's (``common``), plus
        the level's noise shared by frames (``cross``, whose lags may reach beyond the frames')."""
        corr = np.asarray(self.correlation, dtype=float)
        n_wl = self.wavelength_nm.size
        if corr.ndim != 3 or corr.shape[:2] != (self.n_frames, n_wl):
            corr = np.zeros((self.n_frames, n_wl, 0))
        n_lag = corr.shape[2]
        diagonals: dict[int, np.ndarray] = {}
        if cross is not None:
            coo = cross.tocoo()
            lag = coo.col - coo.row
            with np.errstate(invalid="ignore", divide="ignore"):
                rho = np.abs(coo.data) / np.sqrt(var_sum[coo.row] * var_sum[coo.col])
            far = (lag > 0) & (rho > _LEVEL_CORR_TOL)
            if far.any():
                n_lag = max(n_lag, int(lag[far].max()))
            for d in range(1, n_lag + 1):
                diagonals[d] = cross.diagonal(d) if d < n_wl else np.zeros(0)
        if n_lag == 0:
            return np.zeros((n_wl, 0))
        sd = np.sqrt(np.where(good, self.variance, 0.0))
        out = np.zeros((n_wl, n_lag))
        for d in range(1, min(n_lag, n_wl - 1) + 1):
            both = good[:, :-d] & good[:, d:]
            cov = np.zeros(n_wl - d)
            if d <= corr.shape[2]:
                cov = np.where(both, np.nan_to_num(corr[:, :-d, d - 1]) * sd[:, :-d] * sd[:, d:], 0.0).sum(axis=0)
            elif common.shape[1]:
                # beyond a frame's stored lags its bins covary by its twinkle alone
                cov = (twinkle[:, :-d] * twinkle[:, d:]).sum(axis=0)
            if common.shape[1]:
                cov = cov - (twinkle[:, :-d] * twinkle[:, d:]).sum(axis=0) + (common[:-d] * common[d:]).sum(axis=1)
            if d in diagonals:
                cov = cov + diagonals[d]
            den = np.sqrt(var_sum[:-d] * var_sum[d:])
            with np.errstate(invalid="ignore", divide="ignore"):
                out[:-d, d - 1] = np.where(den > 0, cov / np.where(den > 0, den, 1.0), 0.0)
        return out


# --------------------------------------------------------------------------- grid


def _compress_columns(cols: np.ndarray, rel_tol: float = 1e-6) -> np.ndarray:
    """Fewest columns with the same ``cols @ cols.T`` (to ``rel_tol`` of its largest
    eigenvalue): the left singular vectors times the singular values."""
    if cols.ndim != 2 or cols.shape[1] == 0 or not np.any(cols):
        return np.zeros((cols.shape[0] if cols.ndim == 2 else 0, 0))
    u, sv, _ = np.linalg.svd(cols, full_matrices=False)
    keep = sv**2 > rel_tol * sv[0] ** 2
    return u[:, keep] * sv[keep]


def _grid_from_edges(edges: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return 0.5 * (edges[1:] + edges[:-1]), np.diff(edges)


def _edges_from_centres(centres: np.ndarray) -> np.ndarray:
    c = np.asarray(centres, dtype=float)
    if c.size == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[2 * c[0] - mid[0]], mid, [2 * c[-1] - mid[-1]]])


def _luminous_positions(track: Any, n_max: int = 64) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(track.x_px, dtype=float)
    y = np.asarray(track.y_px, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if x.size > n_max:
        pick = np.unique(np.linspace(0, x.size - 1, n_max).round().astype(int))
        x, y = x[pick], y[pick]
    return x, y


def default_wavelength_grid(geometry: SpectralGeometry, track: Any, *, camera: Camera, order: int = 1,
                            min_nm: float = _WL_MIN_NM, max_nm: float = _WL_MAX_NM,
                            bins_per_px: float = 2.0) -> np.ndarray:
    """Common wavelength grid (bin centres) for an event.

    Parameters
    ----------
    geometry : SpectralGeometry
    track : Track
        Luminous zeroth-order positions (``x_px``, ``y_px``; NaN = not luminous).
    camera : Camera
        Sensor size.
    min_nm, max_nm : float
        Outer limits (350-900 nm).
    bins_per_px : float
        Bins per pixel of arc at the finest dispersion seen (2: half a pixel).

    Returns
    -------
    ndarray of shape (n_wl,)
        Uniform, increasing bin centres spanning the wavelengths whose order
        ``order`` lands on the sensor for some luminous position; empty if none.
    """
    x0, y0 = _luminous_positions(track)
    if x0.size == 0 or not max_nm > min_nm:
        return np.zeros(0)
    lam = np.arange(min_nm, max_nm + 1e-9, 1.0)
    xs, ys = geometry.spectrum_pixel(x0[:, None], y0[:, None], lam[None, :], order)
    on = (xs >= -0.5) & (xs <= camera.width - 0.5) & (ys >= -0.5) & (ys <= camera.height - 0.5)
    hit = on.any(axis=0)
    if not hit.any():
        return np.zeros(0)
    lo = max(min_nm, lam[np.argmax(hit)] - 1.0)
    hi = min(max_nm, lam[len(hit) - 1 - np.argmax(hit[::-1])] + 1.0)
    disp = geometry.dispersion_nm_per_px(x0[:, None], y0[:, None], lam[None, :], order)
    disp = disp[on & np.isfinite(disp)]
    step = float(np.min(disp)) / bins_per_px if disp.size else 0.5
    n = max(int(np.ceil((hi - lo) / step)), 1)
    edges = np.linspace(lo, hi, n + 1)
    return _grid_from_edges(edges)[0]


# --------------------------------------------------------------------------- per-frame geometry


def _trapezoid_cdf(z: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """CDF of the sum of two centred uniform variables of widths ``a`` and ``b``.

    ``[R(z+s) - R(z+d) - R(z-d) + R(z-s)] / (2ab)``, ``R(t) = max(t, 0)^2``,
    ``s = (a+b)/2``, ``d = (a-b)/2``: the twice-integrated difference of the
    boxes' edge steps; it is the area fraction of a unit pixel below ``z``.
    """
    s = 0.5 * (a + b)
    d = 0.5 * (a - b)

    def r(t: np.ndarray) -> np.ndarray:
        return np.square(np.maximum(t, 0.0))

    out = (r(z + s) - r(z + d) - r(z - d) + r(z - s)) / (2.0 * a * b)
    return np.clip(out, 0.0, 1.0)


@dataclass
class _Band:
    """Band pixels of one frame, kept for the second pass (float32 where precision allows)."""

    frame: int
    u_nm: np.ndarray        # streak-aligned wavelength of the pixel centre (float64)
    a_nm: np.ndarray        # trapezoid widths along the wavelength axis
    b_nm: np.ndarray
    off_px: np.ndarray      # cross offset from the middle curve
    disp: np.ndarray        # nm per px of arc: pixel area in (wavelength, offset) is disp * scale
    data: np.ndarray        # residual, ADU, scaled to the pixel's footprint
    var_sky: np.ndarray     # variance without the source's own shot noise, scaled
    var: np.ndarray         # variance from the data, scaled
    gain_adu: np.ndarray    # ADU^2 of variance per ADU of source signal (scaled), for the model variance
    bad: np.ndarray         # bool
    sat: np.ndarray         # bool
    off_sensor: np.ndarray  # bool
    across_px: float = 0.0  # streak length across the spectrum
    drift_nm: np.ndarray = field(default_factory=lambda: np.zeros(0))  # u shift per streak fraction (float32)
    level_adu: np.ndarray = field(default_factory=lambda: np.zeros(0))  # background level (ADU, unscaled); empty: unknown
    scale: float = 1.0      # image rows a field row stands for (data and variances are scaled by it)
    streak_n_px: np.ndarray = field(default_factory=lambda: np.zeros(0))  # signed streak across, per pixel (float32)
    light_bc: tuple[float, float] = (0.0, 0.0)  # light curve within the exposure, exp(b s + c s^2)
    prof_px: np.ndarray = field(default_factory=lambda: np.zeros(0))  # profile density at each pixel (per px)
    floor_fix: np.ndarray = field(default_factory=lambda: np.zeros(0))  # black-level correction added to data (scaled)
    twinkle: np.ndarray = field(default_factory=lambda: np.zeros(0))  # 1-sigma twinkle of star light (scaled); empty: none
    level_var: np.ndarray = field(default_factory=lambda: np.zeros(0))  # variance of the background level (scaled)
    pixel_id: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int32))  # y * width + x of the image pixel


def _dense_curves(geometry: SpectralGeometry, p: np.ndarray, lam: np.ndarray, order: int):
    x, y = geometry.spectrum_pixel(p[:, 0:1], p[:, 1:2], lam[None, :], order)
    return x, y


def _frame_band(geometry: SpectralGeometry, p_start, p_mid, p_end, edges: np.ndarray, *, order: int,
                half_width_px: float, psf_sigma_px: float, lam_step_nm: float):
    """Band pixel coordinates of one exposure; None when no part of the curve exists.

    Returns image x, y (int), streak-aligned wavelength u, trapezoid widths,
    offsets and dispersion for every pixel of the band (on or off the sensor),
    the median streak angle to the dispersion (deg), streak length and its
    component across the spectrum (px), and a per-pixel flag for the part of
    the band near a point where the spectrum leaves the lens field (the light
    there is only partly recorded).
    """
    pad = 4.0 * lam_step_nm * 2
    lam = np.arange(edges[0] - pad, edges[-1] + pad + lam_step_nm, lam_step_nm)
    pts = np.array([p_start, p_mid, p_end], dtype=float)
    xs, ys = _dense_curves(geometry, pts, lam, order)
    ok = np.all(np.isfinite(xs) & np.isfinite(ys), axis=0)
    if np.count_nonzero(ok) < 4:
        return None
    # keep the longest contiguous finite stretch (the curve leaves the lens field at most at its ends)
    idx = np.flatnonzero(ok)
    breaks = np.flatnonzero(np.diff(idx) > 1)
    starts = np.concatenate([[0], breaks + 1])
    stops = np.concatenate([breaks + 1, [idx.size]])
    longest = np.argmax(stops - starts)
    sel = idx[starts[longest]:stops[longest]]
    lam_all = lam
    lam = lam[sel]
    cx, cy = xs[1, sel], ys[1, sel]
    mx, my = xs[2, sel] - xs[0, sel], ys[2, sel] - ys[0, sel]
    dxl = np.gradient(cx, lam)
    dyl = np.gradient(cy, lam)
    speed = np.hypot(dxl, dyl)  # px per nm
    tx, ty = dxl / speed, dyl / speed
    m_t = mx * tx + my * ty
    m_n = -mx * ty + my * tx
    hw_max = half_width_px + 0.5 * float(np.max(np.abs(m_n))) + 1.0
    r = int(np.ceil(hw_max))
    # paint squares around curve samples about one pixel apart; each pixel
    # remembers a nearby sample as the start of its projection on the curve
    arc = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(cx), np.diff(cy)))])
    keep = np.unique(np.searchsorted(arc, np.arange(0.0, arc[-1] + 1.0, 1.0)).clip(0, arc.size - 1))
    ix = np.rint(cx[keep]).astype(np.int64)
    iy = np.rint(cy[keep]).astype(np.int64)
    x_lo, y_lo = ix.min() - r, iy.min() - r
    box = np.full((iy.max() - y_lo + r + 1, ix.max() - x_lo + r + 1), -1, dtype=np.int64)
    for j, xi, yi in zip(keep, ix - x_lo, iy - y_lo):
        box[yi - r:yi + r + 1, xi - r:xi + r + 1] = j
    by, bx = np.nonzero(box >= 0)
    start = box[by, bx]
    px = (bx + x_lo).astype(float)
    py = (by + y_lo).astype(float)
    # Newton on the piecewise-linear curve: nearest point of the middle curve
    lp = lam[start]
    for _ in range(4):
        qx = np.interp(lp, lam, cx)
        qy = np.interp(lp, lam, cy)
        gx = np.interp(lp, lam, dxl)
        gy = np.interp(lp, lam, dyl)
        lp = np.clip(lp + ((px - qx) * gx + (py - qy) * gy) / (gx * gx + gy * gy), lam[0], lam[-1])
    qx, qy = np.interp(lp, lam, cx), np.interp(lp, lam, cy)
    t_x, t_y = np.interp(lp, lam, tx), np.interp(lp, lam, ty)
    off = (px - qx) * (-t_y) + (py - qy) * t_x
    disp = 1.0 / np.interp(lp, lam, speed)
    mt = np.interp(lp, lam, m_t)
    mn = np.interp(lp, lam, m_n)
    inside = (np.abs(off) <= half_width_px + 0.5 * np.abs(mn)) & (lp > lam[0]) & (lp < lam[-1])
    # shear towards the motion (module notes, step 3)
    shear = disp * mt * mn / (mn * mn + 12.0 * psf_sigma_px**2)
    u = lp - shear * off
    # gradient of u in the image: disp * T - shear * N, N = (-t_y, t_x)
    gux = disp * t_x + shear * t_y
    guy = disp * t_y - shear * t_x
    a = np.abs(gux)
    b = np.abs(guy)
    reach = 0.5 * (a + b)
    inside &= (u + reach > edges[0]) & (u - reach < edges[-1])
    ang = np.degrees(np.arctan2(np.abs(m_n), np.abs(m_t)))
    streak_len = np.hypot(m_t, m_n)
    angle = float(np.median(ang)) if np.any(streak_len > 0) else np.nan
    # Where the spectrum leaves the lens field (no light beyond: |w_t| >= 1 or outside the lens
    # model), the curve ends inside the wavelength range and its end sweeps along the spectrum
    # during the exposure. Wavelengths near the end are recorded for only part of the exposure,
    # and pixels near it hold light of wavelengths the band cannot follow: within the PSF reach
    # (3 sigma, plus the pixel and the exposure's streak) of the end, the band is incomplete.
    reach_px = 3.0 * psf_sigma_px + 1.0 + float(np.max(streak_len))
    cut_lo = np.interp(arc[0] + reach_px, arc, lam) if sel[0] > 0 else -np.inf
    cut_hi = np.interp(arc[-1] - reach_px, arc, lam) if sel[-1] < lam_all.size - 1 else np.inf
    incomplete = (lp < cut_lo) | (lp > cut_hi)
    # the part of the streak along the spectrum that the shear leaves in u: if the light's centroid
    # sits a fraction eps of the streak past the middle, every pixel's u is eps * drift too high
    drift = disp * mt * 12.0 * psf_sigma_px**2 / (mn * mn + 12.0 * psf_sigma_px**2)
    s = inside
    return (px[s].astype(np.int64), py[s].astype(np.int64), u[s], a[s], b[s], off[s], disp[s], angle,
            float(np.median(streak_len)), float(np.median(np.abs(m_n))), incomplete[s],
            drift[s].astype(np.float32), mn[s].astype(np.float32))


def _bin_fractions(u: np.ndarray, a: np.ndarray, b: np.ndarray, edges: np.ndarray):
    """Exact area fractions of each pixel's trapezoid in the grid bins.

    Returns (bin index array (N, K), fraction array (N, K)); indices outside the
    grid are clipped and carry zero fraction.
    """
    n_wl = edges.size - 1
    if u.size == 0:
        return np.zeros((0, 1), np.int64), np.zeros((0, 1))
    floor = 1e-3 * (a + b) + 1e-12
    a = np.maximum(a, floor)
    b = np.maximum(b, floor)
    reach = 0.5 * (a + b)
    first = np.searchsorted(edges, u - reach, side="right") - 1
    last = np.searchsorted(edges, u + reach, side="left") - 1
    k = int(np.max(last - first)) + 1
    j = first[:, None] + np.arange(k + 1)[None, :]
    e = edges[np.clip(j, 0, n_wl)]
    # beyond the grid: edges far enough out that the CDF is exactly 0 or 1 there
    far = (reach + 1.0)[:, None]
    e = np.where(j < 0, u[:, None] - far, np.where(j > n_wl, u[:, None] + far, e))
    cdf = _trapezoid_cdf(e - u[:, None], a[:, None], b[:, None])
    frac = np.diff(cdf, axis=1)
    jj = j[:, :-1]
    valid = (jj >= 0) & (jj < n_wl)
    frac = np.where(valid, frac, 0.0)
    return np.clip(jj, 0, n_wl - 1), frac


# --------------------------------------------------------------------------- extraction


def _track_index(track: Any, time_s: float, exposure_s: float) -> int | None:
    t = np.asarray(track.time_s, dtype=float)
    if t.size == 0:
        return None
    i = int(np.argmin(np.abs(t - time_s)))
    return i if abs(t[i] - time_s) <= 0.25 * exposure_s else None


def extract_spectra(frames: Iterable[Any], background: Any, track: Any, geometry: SpectralGeometry, *,
                    camera: Camera, wavelength_grid_nm: np.ndarray | None = None, order: int = 1,
                    optimal: bool | None = None, half_width_px: float | None = None,
                    psf_sigma_px: float = SHEAR_PSF_SIGMA_PX, max_lost_fraction: float = 0.1,
                    max_saturated_fraction: float = 0.8,
                    optimal_snr_threshold: float = 30.0, low_snr_threshold: float = 10.0,
                    floor_correction: bool = True) -> FrameSpectra:
    """Extract the order-``order`` spectrum of every frame onto one wavelength grid.

    Parameters
    ----------
    frames : iterable of Frame
        Frames or fields in time order, each used once. A sequence (``len()`` and
        indexing) with one frame per track entry is read only where the track is
        luminous; any other iterable is streamed in full.
    background : Background
        ``sample(frame, rows, cols)`` (or ``residual(frame)`` and
        ``variance(frame, residual)``), ``star_mask``, ``gain_e_per_adu``.
    track : Track
        Zeroth-order path: ``time_s``, ``x_px``/``y_px`` (NaN where not
        luminous), ``flux_adu``, ``position(time_s)``.
    geometry : SpectralGeometry
        Lens and grating values to use (the station's, or refined ones).
    camera : Camera
        Sensor size.
    wavelength_grid_nm : ndarray, optional
        Bin centres of the common grid (increasing); default
        :func:`default_wavelength_grid`.
    order : int
        Diffraction order to extract.
    optimal : bool, optional
        Profile-weighted (Horne 1986) extraction; ``None`` chooses it when the
        boxcar whole-flight SNR is below ``optimal_snr_threshold``.
    half_width_px : float, optional
        Aperture half-width across the spectrum, added to half the streak's
        cross component; default ``max(6, 4 psf_sigma_px)``.
    psf_sigma_px : float
        PSF Gaussian sigma, used only for the streak shear (resolution, not
        flux) and the default half-width.
    max_lost_fraction : float
        Largest profile share of bad or off-sensor pixels other than saturated
        ones that a bin may lose and still be scaled up instead of masked.
    max_saturated_fraction : float
        Largest profile share of all bad pixels, saturated ones included, that
        a bin holding saturated pixels may lose and still be scaled up from its
        unsaturated wings (only with a clean profile, module notes step 5).
    optimal_snr_threshold, low_snr_threshold : float
        On the whole-flight total SNR (sum of flux over its error).
    floor_correction : bool
        Correct the meteor's pixels for the black-level floor of the pixel
        values (module notes, step 5); needs the background's ``level_adu``,
        ``read_noise_adu`` and ``gain_e_per_adu``.

    Returns
    -------
    FrameSpectra
        One row per frame; frames where the track is not luminous are masked.

    Raises
    ------
    ValueError
        If the wavelength grid is not 1-D, finite and strictly increasing.
    """
    if wavelength_grid_nm is None:
        centres = default_wavelength_grid(geometry, track, camera=camera, order=order)
    else:
        centres = np.asarray(wavelength_grid_nm, dtype=float)
        if centres.ndim != 1 or not np.all(np.isfinite(centres)) or np.any(np.diff(centres) <= 0):
            raise ValueError("wavelength_grid_nm must be 1-D, finite and strictly increasing")
    hw = max(6.0, 4.0 * psf_sigma_px) if half_width_px is None else float(half_width_px)
    if not (np.isfinite(hw) and hw > 0 and np.isfinite(psf_sigma_px) and psf_sigma_px > 0):
        raise ValueError("half_width_px and psf_sigma_px must be positive and finite")
    n_wl = centres.size
    edges = _edges_from_centres(centres) if n_wl else np.zeros(0)
    widths = np.diff(edges) if n_wl else np.zeros(0)

    bands: list[_Band] = []
    times: list[float] = []
    weights: list[float] = []
    angles: list[float] = []
    lengths: list[float] = []
    any_sat = any_off = False
    star_mask = getattr(background, "star_mask", None)
    gain = getattr(background, "gain_e_per_adu", None)
    # the black-level floor correction (module notes, step 5) needs the level and the noise model
    # the smooth sky (block medians) rather than the per-pixel level: that carries the noise of a few
    # samples, and the floor's excess is convex in it (a noisy level overstates the mean deficit)
    level_full = getattr(background, "level_adu", None)
    sky_full = getattr(background, "sky_adu", None)
    # star light in the band's unmasked pixels (level above the smooth sky) twinkles coherently
    # (module notes, step 7)
    scint = float(getattr(background, "scintillation", 0.0) or 0.0)
    twinkle_ok = (np.isfinite(scint) and scint > 0 and isinstance(level_full, np.ndarray)
                  and isinstance(sky_full, np.ndarray) and level_full.ndim == 2 and sky_full.shape == level_full.shape)
    star_level = level_full if twinkle_ok else None
    n_level = int(getattr(background, "level_samples", 0) or 0)
    level_twinkle = 1.0 / n_level if n_level > 0 else 0.0  # the level's share of a frame's twinkle variance
    # with each pixel's sample count known, that share is 1 / count averaged over the star light
    # (weighted by its twinkle variance) and the star-light threshold uses the level's own variance
    level_count = getattr(background, "level_count", None)
    if not (star_level is not None and isinstance(level_count, np.ndarray) and level_count.shape == star_level.shape):
        level_count = None
    twinkle_by_count = [0.0, 0.0]  # sums of twinkle variance / count and of twinkle variance
    if isinstance(sky_full, np.ndarray) and sky_full.shape == np.shape(level_full):
        level_full = sky_full
    if level_full is not None and np.ndim(level_full) != 2:
        level_full = None
    read_noise = getattr(background, "read_noise_adu", None)
    floor_ok = (floor_correction and level_full is not None and read_noise is not None and gain is not None
                and np.isfinite(read_noise) and np.isfinite(gain) and gain > 0)
    flux_track = np.asarray(getattr(track, "flux_adu", np.full(np.size(track.time_s), np.nan)), dtype=float)
    x_track = np.asarray(track.x_px, dtype=float)
    y_track = np.asarray(track.y_px, dtype=float)
    x_meas = np.asarray(getattr(track, "x_meas_px", np.full(x_track.shape, np.nan)), dtype=float)
    y_meas = np.asarray(getattr(track, "y_meas_px", np.full(y_track.shape, np.nan)), dtype=float)
    centroid_frac: dict[int, float] = {}  # measured light centroid along the streak (exposures from its middle)
    lam_step = None
    zeros_cache: dict[tuple[int, int], np.ndarray] = {}
    exposures: dict[int, float] = {}
    band_sums: dict[int, float] = {}
    field_rows: dict[int, int] = {}  # first image row of each frame: fields of one parity share a level

    # a sequence of the track's length is read only where the track is luminous (each read of a
    # FrameStack linearises a whole frame); any other iterable is streamed in full
    t_track = np.asarray(track.time_s, dtype=float)
    if hasattr(frames, "__getitem__") and hasattr(frames, "__len__") and len(frames) == t_track.size:
        lit = np.isfinite(x_track) & np.isfinite(y_track)
        frame_iter: Iterable[Any] = (frames[k] if lit[k] else None for k in range(t_track.size))
    else:
        frame_iter = frames
    for k, frame in enumerate(frame_iter):
        if frame is None:
            times.append(float(t_track[k]))
            weights.append(0.0)
            continue
        times.append(float(frame.time_s))
        i = _track_index(track, frame.time_s, frame.exposure_s) if n_wl else None
        if i is None or not (np.isfinite(x_track[i]) and np.isfinite(y_track[i])):
            weights.append(0.0)
            continue
        weights.append(float(flux_track[i]) if np.isfinite(flux_track[i]) else np.nan)
        t0 = frame.time_s - 0.5 * frame.exposure_s
        t1 = frame.time_s + 0.5 * frame.exposure_s
        p = [np.array(track.position(t), dtype=float).ravel()[:2] for t in (t0, frame.time_s, t1)]
        if not all(np.all(np.isfinite(q)) for q in p):
            weights[-1] = 0.0
            continue
        streak = p[2] - p[0]
        if float(streak @ streak) >= _MIN_STREAK_PX**2 and x_meas.shape == x_track.shape:
            moved = np.array([x_meas[i], y_meas[i]]) - p[1]
            if np.all(np.isfinite(moved)):
                centroid_frac[k] = float(moved @ streak / (streak @ streak))
        if lam_step is None:
            d = geometry.dispersion_nm_per_px(p[1][0], p[1][1], centres, order)
            d = d[np.isfinite(d)]
            lam_step = 0.5 * float(np.min(d)) if d.size else 0.25
        band = _frame_band(geometry, p[0], p[1], p[2], edges, order=order, half_width_px=hw,
                           psf_sigma_px=psf_sigma_px, lam_step_nm=lam_step)
        if band is None:
            continue
        px, py, u, a, b, off, disp, angle, length, across, incomplete, drift, streak_n = band
        angles.append(angle)
        lengths.append(length)
        scale = float(frame.y_step_px)  # a field row stands for y_step image rows
        h, w = camera.height, camera.width
        on_grid = ((py - frame.y_start_px) % frame.y_step_px) == 0
        px, py, u, a, b, off, disp, incomplete, drift, streak_n = (
            v[on_grid] for v in (px, py, u, a, b, off, disp, incomplete, drift, streak_n))
        b = b * scale
        rows = (py - frame.y_start_px) // frame.y_step_px
        off_sensor = (px < 0) | (px >= w) | (py < 0) | (py >= h) | (rows < 0) | (rows >= frame.shape[0])
        off_sensor |= incomplete  # beyond the lens field for part of the exposure: not recorded
        on = ~off_sensor
        n = px.size
        data = np.zeros(n)
        var = np.zeros(n)
        var_sky = np.zeros(n)
        sat = np.zeros(n, dtype=bool)
        star = np.zeros(n, dtype=bool)
        r_on, x_on = rows[on], px[on]
        if hasattr(background, "sample"):
            # only the band's pixels: a whole-frame residual and two variances cost far more
            data[on], var[on], var_sky[on] = background.sample(frame, r_on, x_on)
        else:
            resid = np.asarray(background.residual(frame), dtype=np.float32)
            var_full = np.asarray(background.variance(frame, resid), dtype=np.float32)
            zkey = resid.shape
            if zkey not in zeros_cache:
                zeros_cache.clear()
                zeros_cache[zkey] = np.zeros(zkey, dtype=np.float32)
            var_sky_full = np.asarray(background.variance(frame, zeros_cache[zkey]), dtype=np.float32)
            data[on] = resid[r_on, x_on]
            var[on] = var_full[r_on, x_on]
            var_sky[on] = var_sky_full[r_on, x_on]
        sat[on] = frame.pixels(r_on, x_on)[1]
        level_px = np.zeros(0)
        if floor_ok:
            level_px = np.zeros(n, np.float32)
            level_px[on] = np.asarray(level_full, dtype=np.float32)[py[on], x_on]
        if star_mask is not None:
            star[on] = np.asarray(star_mask)[py[on], x_on]
        finite = np.isfinite(data) & np.isfinite(var) & np.isfinite(var_sky) & (var > 0)
        bad = off_sensor | sat | star | ~finite
        lvar = np.zeros(n, np.float32)
        if hasattr(background, "level_variance"):
            lvar[on] = background.level_variance(py[on], x_on)
        twk = np.zeros(0)
        if star_level is not None:
            # star light: the level above the smooth sky by more than 3 sigma of the level's own
            # noise (from each pixel's sample count, else a frame's sky noise over
            # sqrt(level_samples)); the level's noise elsewhere, counted as star light, would
            # twinkle coherently over every bin
            excess = star_level[py[on], x_on] - sky_full[py[on], x_on]
            if level_count is not None:
                level_sd = np.sqrt(np.maximum(lvar[on], 0.0))
            else:
                level_sd = np.sqrt(np.maximum(var_sky[on], 0.0) * level_twinkle) if n_level > 0 else 0.0
            twk = np.zeros(n)
            twk[on] = scint * np.where(excess > _STAR_LIGHT_SIGMA * level_sd, excess, 0.0)
            twk = np.where(bad | ~np.isfinite(twk), 0.0, twk) * scale
            if level_count is not None:
                cnt = np.zeros(n)
                cnt[on] = level_count[py[on], x_on]
                t2 = twk**2
                use = (cnt > 0) & (t2 > 0)
                twinkle_by_count[0] += float(np.sum(t2[use] / cnt[use]))
                twinkle_by_count[1] += float(np.sum(t2[use]))
        data = np.where(finite, data, 0.0) * scale
        lvar = (np.where(bad | ~np.isfinite(lvar), 0.0, lvar) * scale**2).astype(np.float32)
        var = np.where(finite, var, np.inf) * scale**2
        var_sky = np.where(finite, np.maximum(var_sky, 1e-12), np.inf) * scale**2
        g_adu = (1.0 / gain if gain else 0.0) * scale  # var per ADU of scaled signal: scale^2 / (g scale)
        bands.append(_Band(k, u, a, b, off.astype(np.float32), disp, data, var_sky, var,
                           np.full(n, g_adu), bad, sat, off_sensor, across, drift, level_px, scale,
                           streak_n, twinkle=twk, level_var=lvar, pixel_id=(py * w + px).astype(np.int32)))
        exposures[k] = float(frame.exposure_s)
        band_sums[k] = float(np.sum(data[~bad]))
        field_rows[k] = int(frame.y_start_px)

    if twinkle_by_count[1] > 0:
        level_twinkle = twinkle_by_count[0] / twinkle_by_count[1]
    n_frames = len(times)
    time_s = np.asarray(times, dtype=float)
    frame_weight = np.asarray(weights, dtype=float)
    flux = np.full((n_frames, n_wl), np.nan)
    variance = np.full((n_frames, n_wl), np.nan)
    mask = np.ones((n_frames, n_wl), dtype=bool)
    flags: list[str] = []
    if not bands:
        flags.append("no_luminous_frames")
        return FrameSpectra(centres, widths, flux, variance, mask, time_s, tuple(flags), frame_weight)

    # each pixel's wavelength from the streak's middle to its light's centroid (module notes, step 3)
    # frames without a zeroth-order flux (saturated): their energies are rough, and so are the slopes
    # that rest on them; the measured centroid places the light there instead
    known = np.isfinite(frame_weight)
    eps, light_b, light_c = _light_centroid_fraction(time_s, _rough_energies(frame_weight, band_sums), exposures,
                                                     shape=True, measured=centroid_frac, energy_known=known)
    for band in bands:
        band.light_bc = (float(light_b[band.frame]), float(light_c[band.frame]))
        if eps[band.frame] != 0.0:
            band.u_nm = band.u_nm - eps[band.frame] * band.drift_nm

    pooled = _pooled_profile(bands, hw, psf_sigma_px)
    prof_x, prof = pooled.offset_px, pooled.density
    # Saturated pixels count as lost light when the profile is clean (module notes, step 5).
    # The default limit 0.8 is measured: per bin against noise-free truth
    # (bench/saturation_wings.py --oracle --only 2 6 31 35) the scaled-up bins read 2.5 % low
    # (median) for lost shares 0.5-0.7, 5.7 % for 0.7-0.9 and 10 % beyond 0.9 (all within their
    # stated error, _LOST_SHARE_ERR); per event (bench/plasma_end_to_end.py --n 36 --seed 5
    # --modes true, limits 0.7 / 0.8 / 0.9): events without composition 3 / 2 / 2, events with a
    # component off by more than 0.05 8 / 6 / 9, Na peak within one exposure 8 / 9 / 11 of 29.
    sat_limit = max(max_saturated_fraction, max_lost_fraction) if pooled.clean else None
    # the PSF that weighs a field's saturated pixels: the pooled one until it is fitted to the pixels
    field_psf = pooled.psf
    for band in bands:
        _set_band_profile(band, None, prof_x, prof)

    # boxcar pass (always; it also sets the automatic choice of optimal)
    box_flux, box_var, lost_ok, sat_share, lost_share, frac_cache = {}, {}, {}, {}, {}, {}
    shape_var: dict[int, np.ndarray] = {}  # relative variance of each bin's scale-up from the profile shape
    box_corr: dict[int, np.ndarray] = {}
    box_twk: dict[int, np.ndarray] = {}  # the frame's own twinkle of star light per bin (1 sigma, ADU/nm)
    # each pixel's weight in a bin is its fraction (frac_cache) times a per-pixel factor (None: 1)
    # times a per-bin factor: kept in that form, a few numbers per pixel for every frame
    level_weight: dict[int, tuple[np.ndarray | None, np.ndarray]] = {}

    def boxcar(band: _Band) -> tuple[bool, bool]:
        """Bin one frame's band (boxcar); returns whether it has saturated and off-sensor bins."""
        jj, fr = _bin_fractions(band.u_nm, band.a_nm, band.b_nm, edges)
        frac_cache[band.frame] = (jj, fr)
        good = ~band.bad
        s = np.bincount(jj.ravel(), (fr * np.where(good, band.data, 0.0)[:, None]).ravel(), n_wl)
        psf = field_psf if band.scale != 1.0 else pooled.psf
        wprof = _loss_weights(band, jj, fr, s, widths, psf, sat_limit)
        all_w = np.bincount(jj.ravel(), wprof.ravel(), n_wl)
        bad_w = np.bincount(jj.ravel(), (wprof * band.bad[:, None]).ravel(), n_wl)
        sat_w = np.bincount(jj.ravel(), (wprof * band.sat[:, None]).ravel(), n_wl)
        other_w = bad_w - sat_w if sat_limit is not None else bad_w
        # the background level's noise is the pixel's too (module notes, step 8)
        pix_var = np.where(good, band.var + band.level_var if band.level_var.size else band.var, 0.0)
        v = np.bincount(jj.ravel(), (fr**2 * pix_var[:, None]).ravel(), n_wl)
        box_corr[band.frame] = _lag_correlation(jj, fr, pix_var, v, n_wl)
        cover = np.bincount(jj.ravel(), fr.ravel(), n_wl)
        with np.errstate(invalid="ignore", divide="ignore"):
            lost = np.where(all_w > 0, bad_w / all_w, 1.0)
            sshare = np.where(all_w > 0, sat_w / all_w, 0.0)
            other = np.where(all_w > 0, other_w / all_w, 1.0)
        present = (cover > 0) & (all_w > 0)
        if sat_limit is None:
            ok = present & (lost <= max_lost_fraction) & (sshare <= _SAT_SHARE)
        else:
            ok = present & (other <= max_lost_fraction) & (lost <= sat_limit)
        corr = 1.0 / np.clip(1.0 - lost, 1e-6, None)
        box_flux[band.frame] = s / widths * corr
        level_weight[band.frame] = (None, corr / widths)
        box_twk[band.frame] = (np.bincount(jj.ravel(), (fr * band.twinkle[:, None]).ravel(), n_wl) / widths * corr
                               if band.twinkle.size else np.zeros(n_wl))
        if sat_limit is not None and np.any(band.sat & ~band.off_sensor):
            ok &= ~_underlit_saturation(band, jj, fr, box_flux[band.frame], psf, n_wl)
        # the scale-up of a bin holding saturated pixels rests on the profile's shape: relative error
        # _LOST_SHARE_ERR / (1 - L) (module constant). The stored correlation (from shared pixels)
        # is kept, so neighbours covary by it: the shape error of neighbouring bins is shared too.
        # Bins losing only off-sensor or star pixels (at most max_lost_fraction) keep their noise.
        shape_var[band.frame] = np.where(ok & (sshare > _SAT_SHARE), (_LOST_SHARE_ERR * corr) ** 2, 0.0)
        # (it is the same profile in every frame: the whole flight adds it coherently, see
        # FrameSpectra.shape_rel_err)
        box_var[band.frame] = (v / widths**2 * corr**2
                               + shape_var[band.frame] * np.clip(box_flux[band.frame], 0.0, None) ** 2
                               + box_twk[band.frame] ** 2 * (1.0 + level_twinkle))
        lost_ok[band.frame] = ok
        sat_share[band.frame] = sshare
        lost_share[band.frame] = (present, lost, band)
        off_w = np.bincount(jj.ravel(), (wprof * band.off_sensor[:, None]).ravel(), n_wl)
        return (bool(np.any(present & (sshare > _SAT_SHARE))),
                bool(np.any(present & (off_w > max_lost_fraction * all_w))))

    def boxcar_add(band: _Band, extra: np.ndarray) -> None:
        """Add ``extra`` (per pixel, scaled like the data) to a binned band: the boxcar is linear in
        the data and the pixels' fractions, losses and variances do not change."""
        jj, fr = frac_cache[band.frame]
        s = np.bincount(jj.ravel(), (fr * np.where(band.bad, 0.0, extra)[:, None]).ravel(), n_wl)
        _, lost, _ = lost_share[band.frame]
        box_flux[band.frame] = box_flux[band.frame] + s / widths / np.clip(1.0 - lost, 1e-6, None)

    for band in bands:
        sat_k, off_k = boxcar(band)
        any_sat |= sat_k
        any_off |= off_k

    for fidx in box_flux:
        ok = lost_ok[fidx]
        flux[fidx] = np.where(ok, box_flux[fidx], np.nan)
        variance[fidx] = np.where(ok, box_var[fidx], np.nan)
        mask[fidx] = ~ok

    # frames whose track flux is unknown take their extracted total as weight
    frame_sat = np.zeros(n_frames, bool)
    for fidx, (present, _, _) in lost_share.items():
        frame_sat[fidx] = bool(np.any(present & (sat_share[fidx] > _SAT_SHARE)))
    measured = np.isfinite(frame_weight)
    _fill_weights(frame_weight, flux, mask, widths, frame_sat)
    # then the weights of frames without a zeroth-order flux from a rank-1 fit of all the spectra
    # bins scaled up for lost pixels carry the profile model's approximation: left out of this fit
    rescaled = np.zeros((n_frames, n_wl), bool)
    for fidx, (present, lost, _) in lost_share.items():
        rescaled[fidx] = present & (lost > 1e-3)
    _spectral_weights(frame_weight, flux, variance, mask | rescaled, widths, fixed=measured)
    # Fields: a mean residual per offset over every other row follows the spectrum as well as the
    # profile, and the pooled fit comes out wide (seed-4 event 7: sigma 1.30 px where the simulated
    # PSF's Gaussian equivalent is 1.23), which gives a saturated core too small a share and the
    # recovered bins read 5-6 % low. The PSF that weighs a field's saturated pixels is fitted to the
    # pixels of the unsaturated cross-sections against the boxcar spectra (:func:`_fit_psf`; the bins
    # scaled up for lost pixels left out of the spectrum model), and the saturated fields binned again.
    sat_fields = [b for b in bands if b.scale != 1.0 and np.any(b.sat)]
    if sat_limit is not None and sat_fields:
        fit_f = _fit_psf(bands, frac_cache, _rank1_model(frame_weight, flux, mask | rescaled, widths, box_flux),
                         psf_sigma_px, hw)
        if fit_f is not None:
            field_psf = fit_f
            for band in sat_fields:
                boxcar(band)
                k = band.frame
                ok = lost_ok[k]
                flux[k] = np.where(ok, box_flux[k], np.nan)
                variance[k] = np.where(ok, box_var[k], np.nan)
                mask[k] = ~ok
    # The light curve within the exposures again, now from these weights: a saturated frame's
    # first estimate counts only its unsaturated pixels and tilts its neighbours' light curves.
    # Frames whose streak centre moves by more than a twentieth of a bin are binned again.
    rough = _rough_energies(frame_weight, band_sums)
    eps_new, b_new, c_new = _light_centroid_fraction(
        time_s, np.where(np.isfinite(frame_weight), frame_weight, rough), exposures, shape=True,
        measured=centroid_frac, energy_known=known)
    for band in bands:
        k = band.frame
        band.light_bc = (float(b_new[k]), float(c_new[k]))
        step = (eps_new[k] - eps[k]) * band.drift_nm
        if step.size and float(np.max(np.abs(step))) > 0.05 * float(np.min(widths)):
            band.u_nm = band.u_nm - step
            eps[k] = eps_new[k]
            boxcar(band)
            ok = lost_ok[k]
            flux[k] = np.where(ok, box_flux[k], np.nan)
            variance[k] = np.where(ok, box_var[k], np.nan)
            mask[k] = ~ok
    if floor_ok:
        model = _rank1_model(frame_weight, flux, mask, widths, box_flux)
        for band in bands:
            if band.level_adu.size and band.frame in model:
                jj, fr = frac_cache[band.frame]
                p = band.prof_px
                scale = band.scale
                # a (1 x 1 px) pixel of the image holds F p disp; the scale only enters the scaled data
                s_px = (fr * model[band.frame][jj]).sum(axis=1) * p * band.disp
                fix = _floor_deficit(band.level_adu.astype(float), np.clip(s_px, 0.0, None), float(read_noise),
                                     float(gain))
                if not np.any(fix[~band.bad] > 1e-4):
                    continue
                band.floor_fix = np.where(band.bad, 0.0, fix) * scale
                band.data = band.data + band.floor_fix
                k = band.frame
                boxcar_add(band, band.floor_fix)
                ok = lost_ok[k]
                flux[k] = np.where(ok, box_flux[k], np.nan)
                variance[k] = np.where(ok, box_var[k], np.nan)
                mask[k] = ~ok
    snr_total = _total_snr(FrameSpectra(centres, widths, flux, variance, mask, time_s, (), frame_weight))
    use_optimal = (snr_total < optimal_snr_threshold) if optimal is None else bool(optimal)
    if use_optimal:
        # every pixel's own profile (its frame's streak at its wavelength), its PSF fitted against the
        # boxcar spectra (module notes, step 6). The black-level correction went in with the pooled
        # profile's shape; the boxcar sum is indifferent to where across the band it sits, the
        # weighted estimate is not (a correction narrower than the light it restores would be
        # over-counted): it is undone for the fit and then redone with the pixels' own profiles.
        model = _rank1_model(frame_weight, flux, mask, widths, box_flux)
        for band in bands:
            if band.floor_fix.size:
                band.data = band.data - band.floor_fix
        prof_fit = _fit_psf(bands, frac_cache, model, psf_sigma_px, hw)
        for band in bands:
            _set_band_profile(band, prof_fit, prof_x, prof)
            if band.floor_fix.size:
                jj, fr = frac_cache[band.frame]
                s_px = (fr * model[band.frame][jj]).sum(axis=1) * band.prof_px * band.disp
                fix = _floor_deficit(band.level_adu.astype(float), np.clip(s_px, 0.0, None), float(read_noise),
                                     float(gain))
                band.data = band.data + np.where(band.bad, 0.0, fix) * band.scale
        for band in bands:
            jj, fr = frac_cache[band.frame]
            ok = lost_ok[band.frame]
            f_opt, v_opt, box_corr[band.frame], box_twk[band.frame], eff = _horne(
                band, jj, fr, box_flux[band.frame], widths, n_wl)
            level_weight[band.frame] = eff
            v_opt = (v_opt + shape_var[band.frame] * np.clip(np.nan_to_num(f_opt), 0.0, None) ** 2
                     + box_twk[band.frame] ** 2 * (1.0 + level_twinkle))
            flux[band.frame] = np.where(ok & np.isfinite(f_opt), f_opt, np.nan)
            variance[band.frame] = np.where(ok & np.isfinite(v_opt), v_opt, np.nan)
            mask[band.frame] = ~(ok & np.isfinite(f_opt) & np.isfinite(v_opt))
        flags.append("optimal_extraction")
        snr_total = _total_snr(FrameSpectra(centres, widths, flux, variance, mask, time_s, (), frame_weight))

    # bins holding saturated pixels that were scaled up from their unsaturated wings
    recovered = np.zeros((n_frames, n_wl), bool)
    shape_rel = np.zeros((n_frames, n_wl))
    for fidx, (present, _, _) in lost_share.items():
        recovered[fidx] = present & (sat_share[fidx] > _SAT_SHARE) & ~mask[fidx]
        shape_rel[fidx] = np.where(recovered[fidx], np.sqrt(shape_var[fidx]), 0.0)
    if any_sat:
        flags.append("saturated")
    if recovered.any():
        flags.append("saturation_recovered")
    if any_off:
        flags.append("spectrum_off_frame")
    ang = np.asarray(angles)
    lens_ = np.asarray(lengths)
    moving = np.isfinite(ang) & (lens_ > 0.5)
    if np.any(moving) and float(np.median(ang[moving])) < _PARALLEL_DEG:
        flags.append("motion_parallel_to_dispersion")
    if not snr_total >= low_snr_threshold:
        flags.append("low_snr")
    n_lag = max((c.shape[1] for c in box_corr.values()), default=0)
    correlation = np.zeros((n_frames, n_wl, n_lag), dtype=np.float32)
    twinkle_share = np.zeros((n_frames, n_wl))
    for fidx, c in box_corr.items():
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.sqrt(variance[fidx])
            t = np.sqrt(1.0 + level_twinkle) * box_twk.get(fidx, np.zeros(n_wl))
            share = np.where(~mask[fidx] & (sd > 0), np.clip(t / np.where(sd > 0, sd, 1.0), 0.0, 1.0), 0.0)
        twinkle_share[fidx] = share
        correlation[fidx, :, :c.shape[1]] = _with_common(c, share)
    twinkle_group = np.array([field_rows.get(k, 0) for k in range(n_frames)], dtype=int)
    t_exp = np.array([exposures.get(k, 0.0) for k in range(n_frames)])
    spread = np.full(n_frames, _EVEN_LIGHT_SPREAD)
    for band in bands:
        spread[band.frame] = _light_spread(*band.light_bc)
    level_share = _level_shares(bands, frac_cache, level_weight, variance, mask)
    return FrameSpectra(centres, widths, flux, variance, mask, time_s, tuple(flags), frame_weight,
                        use_optimal, prof_x, prof, correlation, time_s + eps * t_exp, recovered, shape_rel,
                        spread, twinkle_share, twinkle_group, level_twinkle, level_share)


def _level_shares(bands: list[_Band], frac_cache: dict[int, tuple[np.ndarray, np.ndarray]],
                  weights: dict[int, tuple[np.ndarray | None, np.ndarray]], variance: np.ndarray,
                  mask: np.ndarray) -> sparse.csr_matrix | None:
    """``FrameSpectra.level_share``: each unmasked bin's weight of the pixels seen by more than one
    frame times the level's 1-sigma there, over the bin's 1-sigma."""
    n_frames, n_wl = variance.shape

    def shares(band: _Band) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        # (bin index per pixel, share per pixel and bin, pixel kept) of one frame
        k = band.frame
        if not band.level_var.size or k not in weights or k not in frac_cache:
            return None
        jj, fr = frac_cache[k]
        per_px, per_bin = weights[k]
        px_sd = np.sqrt(np.clip(band.level_var, 0.0, None))
        if per_px is not None:
            px_sd = px_sd * per_px
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.sqrt(variance[k])
            ok = ~mask[k] & np.isfinite(sd) & (sd > 0)
            val = fr * px_sd[:, None] * (per_bin / np.where(ok, sd, np.inf))[jj]
        val = np.where(np.isfinite(val), val, 0.0)
        return jj, val, np.any(val != 0, axis=1)

    # only pixels in two or more frames carry an error common to frames: found first from the
    # pixels alone (a long fireball's bands hold millions of pixel-bin pairs, few of them shared)
    seen = [band.pixel_id[s[2]] for band in bands if (s := shares(band)) is not None]
    if len(seen) < 2:
        return None
    ids, n_seen = np.unique(np.concatenate(seen), return_counts=True)
    shared_ids = ids[n_seen >= 2]
    del seen, ids, n_seen
    if not shared_ids.size:
        return None
    # one frame's block at a time (float32 values, int32 indices): the whole never exists as triplets
    blocks: dict[int, sparse.csr_matrix] = {}
    for band in bands:
        s = shares(band)
        if s is None:
            continue
        jj, val, _ = s
        col = np.searchsorted(shared_ids, band.pixel_id)
        hit = (col < shared_ids.size) & (shared_ids[np.minimum(col, shared_ids.size - 1)] == band.pixel_id)
        keep = hit[:, None] & (val != 0)
        if keep.any():
            blocks[band.frame] = sparse.csr_matrix(
                (val[keep].astype(np.float32), (jj[keep].astype(np.int32),
                                                np.broadcast_to(col[:, None], jj.shape)[keep].astype(np.int32))),
                shape=(n_wl, shared_ids.size))
    empty = sparse.csr_matrix((n_wl, shared_ids.size), dtype=np.float32)
    return sparse.vstack([blocks.get(k, empty) for k in range(n_frames)], format="csr", dtype=np.float32)


def _rank1_model(weight: np.ndarray, flux: np.ndarray, mask: np.ndarray, widths: np.ndarray,
                 box_flux: dict[int, np.ndarray]) -> dict[int, np.ndarray]:
    """Each extracted frame's spectrum as its weight times the flight's mean spectrum (ADU/nm), for a pixel model.

    ``T_j = sum_k f_kj / sum_k w_k`` over the frames of known positive weight
    unmasked in bin ``j`` (as :func:`_fill_weights` forms it); frame ``k``'s
    model is ``w_k T_j``, far less noisy than its own spectrum. Where ``T`` or
    the weight is unknown the frame's own (boxcar) spectrum stands in.
    """
    good = ~mask & np.isfinite(flux)
    w = np.where(np.isfinite(weight) & (weight > 0), weight, 0.0)
    wk = np.where(good, w[:, None], 0.0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        template = np.where(wk > 0, np.where(good & (w[:, None] > 0), flux, 0.0).sum(axis=0) / wk, np.nan)
    out = {}
    for k, own in box_flux.items():
        own = np.where(np.isfinite(own), own, 0.0)
        out[k] = np.where(np.isfinite(template) & (w[k] > 0), w[k] * template, own) if w[k] > 0 else own
    return out


def _floor_excess(mu: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """``E[max(X, 0)] - mu`` for ``X ~ N(mu, sigma^2)``: the mean a floor at 0 adds (>= 0)."""
    z = mu / sigma
    return sigma * np.exp(-0.5 * z * z) / np.sqrt(2.0 * np.pi) - mu * ndtr(-z)


@functools.lru_cache(maxsize=8)
def _floor_table(read: float, gain: float) -> tuple[np.ndarray, np.ndarray]:
    """``(mu, e(mu))`` of :func:`_floor_deficit` on a grid, for one camera noise model (cached:
    every band of every frame of an event uses the same table)."""
    mu_max = 8.0 * read + 64.0 / gain + 1.0  # beyond: mu > 8 sigma, the floor is out of reach
    mu_grid = np.linspace(0.0, mu_max, 513)
    k = np.arange(int(np.ceil(mu_max * gain + 10.0 * np.sqrt(mu_max * gain) + 10.0)) + 1, dtype=float)
    # Poisson probabilities from scipy.special (importing scipy.stats costs 0.3-0.5 s per process)
    lam = mu_grid[:, None] * gain
    with np.errstate(divide="ignore", invalid="ignore"):  # lam = 0 (row 0) is set below
        pk = np.exp(k[None, :] * np.log(lam) - lam - gammaln(k[None, :] + 1.0))
    pk[0] = (k == 0).astype(float)  # lam = 0: all the mass at k = 0
    excess = pk @ _floor_excess(k / gain, np.full(k.size, read))
    excess = np.clip(excess, 0.0, None)
    excess[-1] = 0.0
    mu_grid.setflags(write=False)
    excess.setflags(write=False)
    return mu_grid, excess


def _floor_deficit(level: np.ndarray, signal: np.ndarray, read_noise: float, gain: float) -> np.ndarray:
    """Mean a pixel's residual falls short of its meteor ``signal`` because pixel values stop at the black level.

    Linear pixel values are ``max(stored - black, 0)`` (contract section 3):
    with a dark sky and a black level close to 0, the noise's low tail is cut
    and the background level ``B`` (mean of meteor-free samples) sits above
    the sky's mean ``mu`` by the floor's excess ``e(mu)``. A pixel with meteor
    light ``s`` is cut less, ``e(mu + s) < e(mu)``, so its residual averages
    ``s - (e(mu) - e(mu + s))``; the difference is returned (>= 0, at most
    ``e(mu)``: 0.05 ADU for a 4 ADU sky under 2.6 ADU of noise, which summed
    over a faint meteor's spectrum band is 1.5 % of its Na, Mg and Fe
    energies, bench/extract_acceptance.py). The noise is the camera model's,
    Poisson electrons plus Gaussian read noise (common practice, Janesick
    2007): ``e(mu) = sum_k Pois(k; mu g) E[max(k / g + read Z, 0)] - mu``,
    tabulated, and ``mu`` solves ``mu + e(mu) = B`` (monotone). 0 where
    ``level`` is not finite or below ``e(0)`` (not a floor-cut level).
    """
    mu_grid, excess = _floor_table(max(float(read_noise), 1e-3), float(gain))
    b = np.asarray(level, dtype=float)
    # a level below the floor's own excess at zero sky cannot come from floor-cut values (frames not cut
    # at the black level, or a level set by hand): nothing to correct there
    ok = np.isfinite(b) & (b >= excess[0])
    mu = np.interp(np.where(ok, b, excess[0]), mu_grid + excess, mu_grid, right=np.nan)
    mu = np.where(np.isfinite(mu), mu, b)  # above the table: no floor effect, mu = B
    sig = np.clip(np.asarray(signal, dtype=float), 0.0, None)
    out = np.interp(mu, mu_grid, excess, right=0.0) - np.interp(mu + sig, mu_grid, excess, right=0.0)
    return np.where(ok, np.clip(out, 0.0, None), 0.0)


def _rough_energies(weight: np.ndarray, band_sums: dict[int, float]) -> np.ndarray:
    """Relative energy of every frame before the spectra exist: the track's zeroth-order flux, else
    the frame's band sum (unsaturated pixels) scaled to it by the median ratio of the frames with both."""
    energy = np.asarray(weight, dtype=float).copy()
    k = np.array(sorted(band_sums), dtype=int)
    if k.size == 0:
        return np.where(np.isfinite(energy), energy, 0.0)
    sums = np.array([band_sums[i] for i in k])
    both = np.isfinite(energy[k]) & (energy[k] > 0) & (sums > 0)
    ratio = float(np.median(energy[k][both] / sums[both])) if both.any() else 1.0
    fill = ~np.isfinite(energy[k])
    energy[k[fill]] = sums[fill] * ratio
    return np.where(np.isfinite(energy), energy, 0.0)


#: RMS of a time spread evenly over one exposure, in exposures (a uniform distribution).
_EVEN_LIGHT_SPREAD = 1.0 / math.sqrt(12.0)


def _light_spread(b: float, c: float) -> float:
    """RMS spread (in exposures) of light ``exp(b s + c s^2)`` over ``s`` in [-1/2, 1/2].

    The light curve within an exposure as :func:`_light_centroid_fraction` sets it (16-point
    Gauss-Legendre quadrature, as there); ``b = c = 0``: even light, ``1 / sqrt(12)``.
    """
    if b == 0.0 and c == 0.0:
        return _EVEN_LIGHT_SPREAD
    x, w = np.polynomial.legendre.leggauss(16)
    s = 0.5 * x
    lr = b * s + c * s * s
    r = w * np.exp(lr - lr.max())
    mean = float(np.sum(r * s) / np.sum(r))
    return float(math.sqrt(max(float(np.sum(r * s * s) / np.sum(r)) - mean * mean, 0.0)))


def _slope_for_centroid(centroid: float) -> float:
    """Slope ``b`` (per exposure) of a light ``exp(b s)`` over ``s`` in [-1/2, 1/2] whose mean is ``centroid``.

    The mean, ``coth(b / 2) / 2 - 1 / b``, rises monotonically from -1/2 to 1/2; the centroid
    is clipped to +-0.49 (``b`` within +-50, the clip of :func:`_light_centroid_fraction`) and
    the root found by bisection.
    """
    target = float(np.clip(centroid, -0.49, 0.49))

    def mean(b: float) -> float:
        return b / 12.0 if abs(b) < 1e-4 else 0.5 / np.tanh(0.5 * b) - 1.0 / b

    lo, hi = -50.0, 50.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if mean(mid) < target else (lo, mid)
    return 0.5 * (lo + hi)


def _light_centroid_fraction(time_s: np.ndarray, energy: np.ndarray, exposure_s: dict[int, float], *,
                             shape: bool = False, measured: dict[int, float] | None = None,
                             energy_known: np.ndarray | None = None,
                             ) -> np.ndarray | tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Light-weighted mean time of each exposure, from its middle, in units of the exposure.

    A meteor brightens or fades during an exposure, so the light of a line is
    not spread evenly along its streak. Within exposure ``k`` the light curve
    is taken as ``L(s) ~ exp(b s + c s^2)`` (``s``: time from the middle), the
    log-quadratic through the mean rates of the exposure and its two
    neighbours (one lit neighbour: ``c = 0`` and the one-sided slope; none:
    nothing is known and 0 is returned). It is exact for the exponential rise
    and fade of a meteor over a few frame times and close for a Gaussian
    light curve (within 0.01 of an exposure for one lasting 4 exposures,
    1 sigma); its mean time is integrated by Gauss-Legendre quadrature. The
    first and last lit exposures, where the meteor starts or ends inside the
    exposure, are only roughly known (one-sided slope); they hold little
    light. Energies of saturated frames come from their unsaturated pixels
    (``_rough_energies``), an underestimate that biases their neighbours'
    slopes. So in the first and last lit exposures, and wherever the slope
    rests on an energy not measured (``energy_known`` False: a saturated
    zeroth order), the zeroth order's measured centroid (``measured``: along
    the streak, in exposures from its middle), where known, sets the light's
    centroid instead, and ``b`` (with ``c = 0``) is the slope that puts it
    there. The tracker's centroid of a saturated zeroth order is within
    0.1 px of the truth's light centroid on the sample events and seed-6
    event 23 (exposures of 7-9 px). A fireball lighting up inside
    its first exposure (seed-6 event 23 of bench/plasma_end_to_end.py: light
    rising 17-fold to the next exposure, whose saturated pixels gave a falling
    slope) has its light at the end of the streak, 3.3 px from its middle
    (truth), where the centroid puts it (3.0 px) and the slope did not (0.3 px
    the other way).

    Returns
    -------
    ndarray of shape (n_frames,)
        Between -0.5 and 0.5; 0 where nothing is known. With ``shape``, also
        the light curve's ``b`` and ``c`` per exposure (0 where nothing is
        known: even light), for the cross-dispersion profile of its streak.
    """
    n = time_s.size
    eps = np.zeros(n)
    bb = np.zeros(n)
    cc = np.zeros(n)
    e = np.asarray(energy, dtype=float)
    x, w = np.polynomial.legendre.leggauss(16)
    def lit(j: int, k: int, t_exp: float) -> bool:
        # an adjacent exposure (one exposure away in time) with light
        return bool(0 <= j < n and np.isfinite(e[j]) and e[j] > 0
                    and abs(abs(time_s[j] - time_s[k]) - t_exp) < 0.25 * t_exp)

    for k, t_exp in exposure_s.items():
        if not (t_exp > 0 and np.isfinite(e[k]) and e[k] > 0):
            continue
        prev, nxt = lit(k - 1, k, t_exp), lit(k + 1, k, t_exp)
        rough = energy_known is not None and not all(bool(energy_known[j]) for j, use in
                                                      ((k - 1, prev), (k, True), (k + 1, nxt)) if use)
        # b, c in units of the exposure (s = x T / 2, x in [-1, 1])
        if (rough or not (prev and nxt)) and (prev or nxt) and np.isfinite(
                measured.get(k, np.nan) if measured else np.nan):
            b, c = _slope_for_centroid(float(measured[k])), 0.0
        elif prev and nxt:
            lm, l0, lp = np.log(e[k - 1]), np.log(e[k]), np.log(e[k + 1])
            dm, dp = (time_s[k] - time_s[k - 1]) / t_exp, (time_s[k + 1] - time_s[k]) / t_exp
            b = ((lp - l0) * dm / dp + (l0 - lm) * dp / dm) / (dm + dp)
            c = ((lp - l0) / dp - (l0 - lm) / dm) / (dm + dp)
        elif nxt:
            b, c = np.log(e[k + 1] / e[k]) * t_exp / (time_s[k + 1] - time_s[k]), 0.0
        elif prev:
            b, c = np.log(e[k] / e[k - 1]) * t_exp / (time_s[k] - time_s[k - 1]), 0.0
        else:
            continue
        b, c = float(np.clip(b, -50.0, 50.0)), float(np.clip(c, -50.0, 50.0))
        bb[k], cc[k] = b, c
        s = 0.5 * x
        lr = b * s + c * s * s
        r = w * np.exp(lr - lr.max())
        eps[k] = float(np.clip(np.sum(r * s) / np.sum(r), -0.5, 0.5))
    return (eps, bb, cc) if shape else eps


def _fill_weights(weight: np.ndarray, flux: np.ndarray, mask: np.ndarray, widths: np.ndarray,
                  saturated: np.ndarray | None = None) -> None:
    """Replace unknown (NaN) frame weights, in place, by a fit of the frame to the flight's mean spectrum.

    The tracker gives no zeroth-order flux where that order is saturated or cut
    by the sensor edge, which is where a fireball is brightest. The frame's own
    extracted total is no substitute: its saturated (masked) bins are exactly
    the strongest lines, so it would understate the frame and, through the
    coverage of :meth:`FrameSpectra.whole_flight`, the whole flight. Instead
    the mean spectrum per unit weight ``T`` is formed from the frames of known
    weight, and an unknown frame's weight is ``sum(f) / sum(T)`` over the bins
    unmasked in that frame (exact for a spectrum of constant shape, which the
    coverage correction assumes anyway). Without any known weight the frames'
    extracted totals over the bins unmasked in every luminous frame are used.
    """
    unknown = ~np.isfinite(weight)
    if not unknown.any():
        return
    good = ~mask
    energy = np.where(good, flux, 0.0) * widths
    known = ~unknown & (weight > 0) & good.any(axis=1)
    template = None
    if known.any():
        wk = np.where(good[known], weight[known][:, None], 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            template = np.where(wk.sum(axis=0) > 0, energy[known].sum(axis=0) / wk.sum(axis=0), np.nan)
    for k in np.flatnonzero(unknown):
        if not good[k].any():
            # nothing measured: a frame lost to saturation was bright, its share is unknown (NaN, and
            # :meth:`FrameSpectra.whole_flight` masks the bins it lost); one whose spectrum left the
            # sensor is left out (weight 0: the whole-flight spectrum covers the frames seen)
            weight[k] = np.nan if saturated is not None and saturated[k] else 0.0
            continue
        if template is not None:
            use = good[k] & np.isfinite(template)
            den = float(np.sum(template[use]))
            if den > 0:
                weight[k] = max(float(np.sum(energy[k, use])) / den, 0.0)
                continue
        lum = good.any(axis=1)
        common = good[lum].all(axis=0)
        weight[k] = max(float(np.sum(energy[k, common] if common.any() else energy[k])), 0.0)


def _spectral_weights(weight: np.ndarray, flux: np.ndarray, variance: np.ndarray, mask: np.ndarray,
                      widths: np.ndarray, *, fixed: np.ndarray | None = None, n_iter: int = 50) -> None:
    """Frame weights, in place, from a rank-1 fit of the per-frame spectra: ``E[k, j] ~ w_k T_j``.

    The whole-flight coverage (:meth:`FrameSpectra.whole_flight`) needs each
    frame's share of the flight's light. The zeroth-order aperture sum is a poor
    measure of it exactly where it matters: it is missing where that order is
    saturated or cut by the sensor edge, and in a faint frame it is a handful of
    noisy pixels. The first-order spectrum carries far more light, so every frame
    with unmasked bins and without a ``fixed`` (measured) weight gets the weight
    that best explains its unmasked bins as a multiple of one mean spectrum
    ``T``, found by alternating least squares over all frames, finished by
    :func:`_rank1_polish` (unweighted, so
    that the bright bins decide, as they decide the coverage correction; exact
    for a spectrum of constant shape, which that correction assumes anyway). ``T`` is estimated from every frame, so a
    frame's weight rests on the whole flight's spectrum rather than on the few
    frames whose zeroth order was measured. The incoming weights start the
    iteration; the fixed ones (or, without any, the total) set the scale.
    Frames without unmasked bins keep theirs.
    """
    good = ~mask & np.isfinite(flux) & np.isfinite(variance) & (variance > 0)
    rows = good.any(axis=1) & np.isfinite(weight)
    if np.count_nonzero(rows) < 2:
        return
    e = np.where(good, flux, 0.0)[rows] * widths
    # plain least squares on the energies: the bright bins (lines, strong continuum) decide, as
    # they do the coverage correction; 1/variance weights would hand the fit to the faint bins
    iv = good[rows].astype(float)
    w = np.clip(weight[rows], 0.0, None).astype(float)
    keep = np.zeros(w.size, bool) if fixed is None else np.asarray(fixed, bool)[rows]
    if keep.all():
        return
    scale = float(w.sum())
    if not scale > 0:
        return

    def sweeps(w: np.ndarray, keep: np.ndarray) -> np.ndarray | None:
        for _ in range(n_iter):
            den_t = (iv * w[:, None] ** 2).sum(axis=0)
            t = np.where(den_t > 0, (iv * w[:, None] * e).sum(axis=0) / np.where(den_t > 0, den_t, 1.0), 0.0)
            den_w = (iv * t[None, :] ** 2).sum(axis=1)
            w_new = np.where(den_w > 0, (iv * t[None, :] * e).sum(axis=1) / np.where(den_w > 0, den_w, 1.0), w)
            w_new = np.where(keep, w, np.clip(w_new, 0.0, None))
            if not keep.any():
                total = float(w_new.sum())
                if not total > 0:
                    return None
                w_new *= scale / total
            done = np.allclose(w_new, w, rtol=1e-6, atol=1e-12 * scale)
            w = w_new
            if done:
                break
        return w

    w = sweeps(w, keep)
    if w is None:
        return
    weight[rows] = _rank1_polish(w, e, good[rows], keep, scale)


def _rank1_polish(w: np.ndarray, e: np.ndarray, good: np.ndarray, keep: np.ndarray,
                  scale: float) -> np.ndarray:
    """The rank-1 least squares ``e[k, j] ~ w_k t_j`` over the ``good`` entries, solved to convergence.

    Alternating steps converge slowly wherever the bins that tie the frames together are few:
    a saturated frame keeps few bins, and the faint frames that see its masked lines are
    linked to the bright ones only through the bins both keep. After the 50 alternating steps
    of :func:`_spectral_weights` the saturated frames of bench/plasma_end_to_end.py --seed 5
    events 35 and 17 stood 3.4 and 2.8 times too high against the unsaturated ones (after 2000
    steps event 35's were within 9 %, after 5000 event 17's still 1.6 times too high), and
    :meth:`FrameSpectra.whole_flight` scaled their masked bins by as much.
    From those steps' result a Gauss-Newton solver (scipy.optimize.least_squares, trust-region
    reflective) finishes the same least squares; the fixed weights keep their values, or
    without any the largest weight is held and the total set to ``scale`` afterwards.
    """
    kk, jj = np.nonzero(good)
    if kk.size == 0:
        return w
    cols = np.flatnonzero(good.any(axis=0))
    col_of = np.full(good.shape[1], -1)
    col_of[cols] = np.arange(cols.size)
    held = keep.copy()
    if not held.any():
        held[int(np.argmax(w))] = True
    free = np.flatnonzero(~held)
    if free.size == 0:
        return w
    slot = np.full(w.size, -1)
    slot[free] = np.arange(free.size)
    data = e[kk, jj]
    den = np.zeros(cols.size)
    np.add.at(den, col_of[jj], w[kk] ** 2)
    num = np.zeros(cols.size)
    np.add.at(num, col_of[jj], w[kk] * data)
    t0 = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    n_free = free.size
    on_free = slot[kk] >= 0
    rows_all = np.arange(kk.size)

    def unpack(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        w_x = w.copy()
        w_x[free] = x[:n_free]
        return w_x, x[n_free:]

    def residuals(x: np.ndarray) -> np.ndarray:
        w_x, t_x = unpack(x)
        return w_x[kk] * t_x[col_of[jj]] - data

    def jacobian(x: np.ndarray) -> sparse.csr_matrix:
        w_x, t_x = unpack(x)
        r = np.concatenate([rows_all[on_free], rows_all])
        c = np.concatenate([slot[kk[on_free]], n_free + col_of[jj]])
        v = np.concatenate([t_x[col_of[jj[on_free]]], w_x[kk]])
        return sparse.csr_matrix((v, (r, c)), shape=(kk.size, n_free + cols.size))

    x0 = np.concatenate([w[free], t0])
    lo = np.concatenate([np.zeros(n_free), np.full(cols.size, -np.inf)])
    try:
        res = least_squares(residuals, np.maximum(x0, lo), jac=jacobian, bounds=(lo, np.inf),
                            method="trf", x_scale="jac", tr_solver="lsmr", max_nfev=200,
                            xtol=1e-10, ftol=1e-12, gtol=1e-12)
    except (ValueError, np.linalg.LinAlgError):  # pragma: no cover - defensive
        return w
    if not np.all(np.isfinite(res.x)):  # pragma: no cover - defensive
        return w
    out, _ = unpack(res.x)
    if not keep.any():
        total = float(out.sum())
        if total > 0:
            out = out * (scale / total)
    return out


def _total_snr(fs: FrameSpectra) -> float:
    wf = fs.whole_flight()
    ok = ~wf.mask
    if not ok.any():
        return 0.0
    e = np.sum(wf.flux[ok] * wf.bin_width_nm[ok])
    s = np.sqrt(np.sum((wf.flux_err[ok] * wf.bin_width_nm[ok]) ** 2))
    return float(e / s) if s > 0 else 0.0


_N_LIGHT_STEPS = 16
# Step edges over the exposure and, per step, 8 Gauss-Legendre nodes and weights of the light's
# rate; fixed, so computed once (numpy solves an eigenproblem for them at every call).
_STEP_EDGES = np.linspace(-0.5, 0.5, _N_LIGHT_STEPS + 1)
_GL8_NODES, _GL8_WEIGHTS = np.polynomial.legendre.leggauss(8)
_STEP_NODES = (0.5 * (_STEP_EDGES[:-1, None] + _STEP_EDGES[1:, None])
               + 0.5 * (_STEP_EDGES[1:, None] - _STEP_EDGES[:-1, None]) * _GL8_NODES[None, :])


def _streak_profile(x: np.ndarray, centre: float, sigma: float, streak_n: np.ndarray | float,
                    light_b: float = 0.0, light_c: float = 0.0) -> np.ndarray:
    """Cross-dispersion profile (density per px, integral 1) of a line streaked during one exposure.

    The light of a wavelength sits at ``centre + s m_N`` at time ``s`` of the
    exposure (``s`` in [-1/2, 1/2] from its middle, ``m_N = streak_n``: the
    streak's signed component across the spectrum), with the rate
    ``exp(b s + c s^2)`` of :func:`_light_centroid_fraction`, blurred by a
    Gaussian PSF plus the pixel's own 1/12 px^2. The exposure is cut into
    ``_N_LIGHT_STEPS`` steps of constant rate (each step's light exact), each
    a Gaussian convolved with its box exactly (error functions): exact for
    even light, and for a meteor brightening by e per exposure the rate
    varies by 6 % across a step, whose centroid then sits 0.03 % of the
    streak off (1e-4 of the profile).
    """
    x = np.asarray(x, dtype=float)
    m = np.broadcast_to(np.asarray(streak_n, dtype=float), x.shape)
    se = np.sqrt(sigma**2 + 1.0 / 12.0)
    edges = _STEP_EDGES
    # light of each step: 8-point Gauss-Legendre of the rate (exact enough for |b|, |c| <= 50)
    ss = _STEP_NODES
    lr = light_b * ss + light_c * ss * ss
    rate = np.exp(lr - lr.max())
    wstep = (rate * _GL8_WEIGHTS[None, :]).sum(axis=1)
    wstep = wstep / wstep.sum()
    moving = np.abs(m) > 1e-3
    out = np.exp(-0.5 * ((x - centre) / se) ** 2) / (np.sqrt(2.0 * np.pi) * se)
    if np.any(moving):
        xm, mm = x[moving], m[moving]
        cdf = ndtr((xm[:, None] - centre - edges[None, :] * mm[:, None]) / se)
        # per step: (Phi(a_i) - Phi(a_i+1)) / (m ds); for m < 0 both signs flip
        step = (cdf[:, :-1] - cdf[:, 1:]) / (mm[:, None] * np.diff(edges)[None, :])
        out = out.copy()
        out[moving] = step @ wstep
    return out


def _profile_model(x: np.ndarray, centre: float, sigma: float, across: np.ndarray,
                   weight: np.ndarray) -> np.ndarray:
    """Gaussian PSF (plus the pixel's 1/12 px^2) convolved with each frame's streak box, weighted mean."""
    s = np.sqrt(sigma**2 + 1.0 / 12.0) * np.sqrt(2.0)
    out = np.zeros_like(x)
    for length, w in zip(across, weight):
        if length < 1e-3:
            out += w * np.exp(-((x - centre) / s) ** 2) / (np.sqrt(np.pi) * s)
        else:
            out += w * 0.5 * (erf((x - centre + 0.5 * length) / s) - erf((x - centre - 0.5 * length) / s)) / length
    return out / max(float(np.sum(weight)), 1e-300)


def _saturated_sections(band: _Band) -> np.ndarray:
    """Pixels of the band whose wavelength footprint meets that of a saturated pixel of its frame.

    These are the cross-sections of the spectrum that hold a saturated pixel: a
    saturated line core drops out of a mean residual per offset while its wings
    stay in, which widens a profile estimated over them (and a wider profile
    gives the core too small a share, so bins scaled up by ``1 / (1 - lost)``
    read low). Leaving out the whole cross-section keeps every offset alike.
    """
    if not np.any(band.sat):
        return np.zeros(band.sat.shape, bool)
    half = 0.5 * (np.abs(band.a_nm) + np.abs(band.b_nm))
    su = np.sort(band.u_nm[band.sat])
    reach = half + float(np.max(half[band.sat]))
    i = np.clip(np.searchsorted(su, band.u_nm), 1, su.size) - 1
    near = np.minimum(np.abs(band.u_nm - su[i]), np.abs(band.u_nm - su[np.clip(i + 1, 0, su.size - 1)]))
    return near <= reach


@dataclass(frozen=True)
class _PooledProfile:
    """The flight's cross-dispersion profile (:func:`_pooled_profile`).

    ``clean``: estimated from cross-sections without a saturated pixel, from
    enough of them to weigh a saturated core by (module notes, step 5);
    otherwise saturated bins are masked, not scaled up.
    """

    offset_px: np.ndarray
    density: np.ndarray
    clean: bool
    n_sections: int = 0
    psf: tuple[float, float] | None = None  # fitted PSF centre and sigma (px); None: not fitted


def _pooled_profile(bands: list[_Band], hw: float, sigma0: float) -> _PooledProfile:
    """Cross-dispersion profile of the flight: density per px of offset, integral 1.

    The mean residual per 0.25 px offset bin (every good pixel counts once) is
    proportional to the profile whatever the spectral content. A smooth model
    is fitted to it by weighted least squares: a Gaussian PSF of free width
    and centre, convolved with each frame's streak across the spectrum (known
    from the track), averaged over frames. A fitted smooth profile is what
    keeps Horne's estimator unbiased: a profile carrying its own noise is
    correlated with the data and biases the flux low by the profile's noise
    power (Horne 1986, section III).

    Cross-sections of the spectrum that hold a saturated pixel are left out
    (:func:`_saturated_sections`). The profile counts as ``clean`` (fit for
    scaling up saturated bins) when the cross-sections left carry light at
    ``_MIN_CLEAN_SECTIONS`` distinct wavelengths at least (per frame, in units
    of a pixel's footprint) and the fit succeeds; with no saturated pixel at
    all it is clean whenever the fit succeeds.
    """
    reach = hw + max(b.across_px for b in bands)
    nb = int(np.ceil(reach / _PROFILE_STEP_PX))
    x_edges = np.arange(-nb, nb + 1) * _PROFILE_STEP_PX
    centres = 0.5 * (x_edges[1:] + x_edges[:-1])
    flat = (np.abs(centres) <= hw).astype(float)
    flat /= flat.sum() * _PROFILE_STEP_PX
    any_sat = any(bool(np.any(b.sat)) for b in bands)
    use_bad = [(b.bad | _saturated_sections(b)) if np.any(b.sat) else b.bad for b in bands]
    n_sections = 0
    if any_sat:
        for b, bad in zip(bands, use_bad):
            keep = ~bad & (np.abs(b.off_px) <= 1.5)
            if not keep.any():
                continue
            # distinct pixel-sized wavelength steps whose central pixels are kept and lit (> 3 sigma)
            step = float(np.median(0.5 * (np.abs(b.a_nm[keep]) + np.abs(b.b_nm[keep])))) + 1e-12
            lit = keep & (b.data > 3.0 * np.sqrt(b.var_sky))
            n_sections += int(np.unique(np.floor(b.u_nm[lit] / step)).size)
    fitted = _fit_pooled(bands, use_bad, centres, x_edges, hw, sigma0)
    clean = fitted is not None and ((not any_sat) or n_sections >= _MIN_CLEAN_SECTIONS)
    if any_sat and not clean:
        # too few unsaturated cross-sections to weigh a saturated core by: the profile over every
        # good pixel (wider, but from more light), and the saturated bins are masked
        alt = _fit_pooled(bands, [b.bad for b in bands], centres, x_edges, hw, sigma0)
        fitted = fitted if alt is None else alt
    if fitted is None:
        return _PooledProfile(centres, flat, False, n_sections)
    return _PooledProfile(centres, fitted[0], clean, n_sections, fitted[1])


def _fit_pooled(bands: list[_Band], bads: list[np.ndarray], centres: np.ndarray, x_edges: np.ndarray,
                hw: float, sigma0: float) -> tuple[np.ndarray, tuple[float, float]] | None:
    """The model of :func:`_pooled_profile` fitted to the pixels not in ``bads``: the profile and the
    PSF's centre and sigma (px); None if it fails."""
    s = np.zeros(centres.size)
    s2 = np.zeros(centres.size)
    n = np.zeros(centres.size)
    across = np.array([b.across_px for b in bands])
    weight = np.zeros(len(bands))
    for i, (b, bad) in enumerate(zip(bands, bads)):
        good = ~bad
        idx = np.clip(np.searchsorted(x_edges, b.off_px[good]) - 1, 0, centres.size - 1)
        s += np.bincount(idx, b.data[good], centres.size)
        s2 += np.bincount(idx, b.data[good] ** 2, centres.size)
        n += np.bincount(idx, None, centres.size)
        weight[i] = max(float(np.sum(b.data[good])), 0.0)
    if not weight.sum() > 0:
        weight[:] = 1.0
    use = n >= 3
    if np.count_nonzero(use) < 5:
        return None
    m = s[use] / n[use]
    err = np.sqrt(np.clip(s2[use] / n[use] - m * m, 0.0, None) / (n[use] - 1)) + 1e-12
    x = centres[use]

    def resid(p: np.ndarray) -> np.ndarray:
        return (p[0] * _profile_model(x, p[1], p[2], across, weight) - m) / err

    amp0 = max(float(np.sum(np.clip(m, 0, None)) * _PROFILE_STEP_PX), 1e-6)
    try:
        fit = least_squares(resid, [amp0, 0.0, sigma0], bounds=([0.0, -hw, 0.3], [np.inf, hw, 3.0 * hw]))
    except ValueError:
        return None
    if not (fit.success and fit.x[0] > 0):
        return None
    prof = _profile_model(centres, fit.x[1], fit.x[2], across, weight)
    return prof / (prof.sum() * _PROFILE_STEP_PX), (float(fit.x[1]), float(fit.x[2]))


def _loss_weights(band: _Band, jj: np.ndarray, fr: np.ndarray, s: np.ndarray, widths: np.ndarray,
                  psf: tuple[float, float] | None, sat_limit: float | None) -> np.ndarray:
    """Weight of each pixel's share of each bin (shape of ``fr``) in the share of the bin's light lost.

    ``fr p disp`` with the pooled profile ``p`` (``band.prof_px``). For a band
    holding saturated pixels that are to be recovered (``sat_limit`` not None),
    each pixel's own profile (:func:`_loss_profile`) and the spectrum over its
    footprint (:func:`_spectral_loss_weights`): a pixel's light follows the
    spectrum as well as the profile, and next to a line core the saturated
    pixels (the core) carry more than a flat spectrum in the bin gives them
    (``s``: the frame's boxcar sums of the good pixels per bin).
    """
    n_wl = widths.size
    if sat_limit is None or not np.any(band.sat):
        return fr * (band.prof_px * band.disp)[:, None]
    wprof = fr * (_loss_profile(band, psf) * band.disp)[:, None]
    return _spectral_loss_weights(wprof, jj, fr, s, band, widths, _WEIGHT_MAX_LOST, n_wl)


def _underlit_saturation(band: _Band, jj: np.ndarray, fr: np.ndarray, density: np.ndarray,
                         psf: tuple[float, float] | None, n_wl: int) -> np.ndarray:
    """Bins whose scale-up cannot explain their own saturated pixels.

    A saturated pixel holds at least its clipped value. The bin's density scaled up by the
    lost share, times the pixel's profile (:func:`_loss_profile`) and area, is what the model
    expects there; less than ``_SAT_EXPLAINED`` of the clipped value means the profile puts
    the light where the saturated pixels are not, and the lost share, hence the scale-up,
    is far too small. It happens in a fireball's first exposure, where the meteor lights
    up inside the exposure and the light curve rises by orders of magnitude: the smooth
    ``exp(b s + c s^2)`` from the neighbours' rough energies (saturated frames count only
    their unsaturated pixels) lights the wrong end of the streak. Seed-6 event 23 of
    bench/plasma_end_to_end.py (frame 1): saturated pixels 4-8 px from the profile's
    light, lost share 0.12 where the light was 50 times the extracted flux, and every
    bin of the frame read as a featureless continuum.

    Returns
    -------
    ndarray of bool, shape (n_wl,)
        True for bins holding such a pixel.
    """
    sat = band.sat & ~band.off_sensor
    dens = np.where(np.isfinite(density), np.clip(density, 0.0, None), 0.0)
    p = _loss_profile(band, psf)
    expected = (fr[sat] * dens[jj[sat]]).sum(axis=1) * p[sat] * band.disp[sat] * band.scale
    short = expected < _SAT_EXPLAINED * band.data[sat]
    if not np.any(short):
        return np.zeros(n_wl, bool)
    j, f = jj[sat][short], fr[sat][short]
    return np.bincount(j.ravel(), (f > 0).ravel().astype(float), n_wl) > 0


def _spectral_loss_weights(wprof: np.ndarray, jj: np.ndarray, fr: np.ndarray, s: np.ndarray, band: _Band,
                           widths: np.ndarray, limit: float, n_wl: int, n_pass: int = 3) -> np.ndarray:
    """Loss weights ``fr p disp`` times each pixel's expected spectral density over its footprint.

    The density comes from the frame's boxcar sums ``s`` scaled up by the lost
    share, on bins losing at most ``limit`` (the others interpolated from
    their neighbours), averaged over each pixel's footprint (its bin
    fractions); ``n_pass`` passes, each from the previous pass's shares.
    ``limit`` is not the masking limit: a line core beyond it still gives the
    weights its (noisier) scaled-up density, since a core interpolated from
    its wings would weigh the saturated pixels too low and leave the shares
    of the bins beside it short (by 0.03-0.06 at a share of 0.3-0.6 on a
    seeded simulator event).
    """
    base = wprof
    idx = np.arange(n_wl)
    for _ in range(n_pass):
        all_w = np.bincount(jj.ravel(), wprof.ravel(), n_wl)
        bad_w = np.bincount(jj.ravel(), (wprof * band.bad[:, None]).ravel(), n_wl)
        with np.errstate(invalid="ignore", divide="ignore"):
            lost = np.where(all_w > 0, bad_w / all_w, 1.0)
            dens = s / widths / (1.0 - lost)
        use = (lost <= limit) & np.isfinite(dens)
        if np.count_nonzero(use) < 2:
            return wprof
        dens = np.clip(np.interp(idx, idx[use], dens[use]), 0.0, None)
        top = float(np.max(dens))
        if not top > 0:
            return wprof
        # a floor keeps a dark stretch from weighing nothing (its share then stays the profile's)
        px_dens = np.clip((fr * dens[jj]).sum(axis=1), 0.01 * top, None)
        wprof = base * px_dens[:, None]
    return wprof


def _loss_profile(band: _Band, psf: tuple[float, float] | None) -> np.ndarray:
    """Profile density at each band pixel (per px) that weighs the share of a bin its bad pixels lose.

    Each pixel's own profile: the PSF (refitted to its frame, :func:`_frame_psf`)
    convolved with its frame's streak at its wavelength (:func:`_streak_profile`);
    the pooled profile is a mixture over frames and misplaces a bright frame's
    light (a fireball's saturated frames have their own streak). The streak is
    lit by the light curve within the exposure (``band.light_bc``, as the
    pixels' own profiles, :func:`_set_band_profile`): along a long streak across
    the spectrum the light follows the meteor's brightening, the bright end is
    where pixels saturate, and an evenly lit streak gives them too little of
    the light. Seed-4 event 15 of bench/bench_calibration.py (10.6 px across,
    the O I 777 core saturated): its recovered O I bins read 5.0 % low evenly
    lit, 2.8 % low light-weighted, against the noise-free truth; on seed-5
    events 2, 6, 31, 35 (bench/saturation_wings.py --oracle), whose light
    changes little within an exposure, it changes nothing. A light curve
    uneven within one exposure (a flare) is not followed by the smooth
    ``exp(b s + c s^2)``: there either model misplaces the light. ``band.prof_px``
    (the pooled profile) where no PSF was fitted or the band loses nothing.
    """
    if psf is None or band.streak_n_px.size != band.off_px.size or not np.any(band.bad):
        return band.prof_px
    psf = _frame_psf(band, psf)
    return _streak_profile(band.off_px.astype(float), psf[0], psf[1], band.streak_n_px, *band.light_bc)


def _frame_psf(band: _Band, psf: tuple[float, float]) -> tuple[float, float]:
    """The PSF's centre and sigma (px) refitted to one frame's cross-sections without a saturated pixel.

    A frame's light sits a little off the flight's mean (the track's
    interpolation, a light curve uneven within the exposure), and a bin that
    loses most of its light to a saturated core is scaled up by
    ``1 / (1 - L)``: a model
    profile off-centre by a fraction of a pixel gives the core too little of
    the light (``L`` too small) and the bin reads low. The flight's ``psf``
    where the frame has fewer than ``_MIN_CLEAN_SECTIONS`` such cross-sections
    or the fit fails, and in a field (see the comment below).
    """
    if band.scale != 1.0:
        # A field samples every other row: the pixels at a given offset come from a few stretches
        # of the spectrum only, and a mean per offset follows the spectrum as well as the profile.
        # bench/saturation_wings.py --oracle --only 7 5 8 (seed 5, interlaced; PSF 1.2 px
        # simulated): refitted so, the fields' PSF widened to 1.3-1.5 px (pooled 1.25-1.27) and
        # their scaled-up bins read 5-12 % low; refitted to the pixels with one free amplitude per
        # cross-section (so that the spectrum drops out) it came out 1.07-1.23 px and the bins
        # read up to 11 % high; with the flight's PSF, 1-3 % low up to a lost share of 0.7.
        return psf
    keep = ~band.bad & ~_saturated_sections(band)
    core = keep & (np.abs(band.off_px) <= 1.5)
    if not core.any():
        return psf
    step = float(np.median(0.5 * (np.abs(band.a_nm[core]) + np.abs(band.b_nm[core])))) + 1e-12
    lit = core & (band.data > 3.0 * np.sqrt(band.var_sky))
    if np.unique(np.floor(band.u_nm[lit] / step)).size < _MIN_CLEAN_SECTIONS:
        return psf
    off = band.off_px[keep].astype(float)
    idx = np.rint(off / _PROFILE_STEP_PX).astype(np.int64)
    idx -= idx.min()
    n = np.bincount(idx)
    use = n >= 3
    if np.count_nonzero(use) < 5:
        return psf
    x = np.bincount(idx, off)[use] / n[use]
    d = band.data[keep]
    m = np.bincount(idx, d)[use] / n[use]
    m2 = np.bincount(idx, d * d)[use] / n[use]
    err = np.sqrt(np.clip(m2 - m * m, 0.0, None) / (n[use] - 1)) + 1e-12
    mn = float(np.median(band.streak_n_px))

    def resid(p: np.ndarray) -> np.ndarray:
        # lit as the loss profile lights it (band.light_bc): an evenly lit fit would move the
        # centre to the light, and the loss profile would then move it once more
        return (p[0] * _streak_profile(x, p[1], p[2], mn, *band.light_bc) - m) / err

    amp0 = max(float(np.sum(np.clip(m, 0.0, None)) * _PROFILE_STEP_PX), 1e-6)
    try:
        fit = least_squares(resid, [amp0, psf[0], psf[1]],
                            bounds=([0.0, psf[0] - 2.0, 0.3], [np.inf, psf[0] + 2.0, 3.0 * psf[1] + 1.0]))
    except ValueError:
        return psf
    if not (fit.success and fit.x[0] > 0):
        return psf
    return float(fit.x[1]), float(fit.x[2])


def _set_band_profile(band: _Band, fit: tuple[float, float] | None, prof_x: np.ndarray,
                      prof: np.ndarray) -> None:
    """Each pixel's profile density: the PSF convolved with its own frame's streak at its wavelength.

    The streak across the spectrum differs from frame to frame (the meteor's
    speed and the spectrum's direction change along the track) and along the
    spectrum (the curve turns); one pooled profile puts a frame's light at
    the wrong offsets, and Horne's weights then no longer sum the light (its
    estimate is ``F sum(p P / V) / sum(p^2 / V)`` for a true profile ``P``).
    """
    if fit is None or band.streak_n_px.size != band.off_px.size:
        band.prof_px = np.interp(band.off_px, prof_x, prof, left=0.0, right=0.0)
        return
    band.prof_px = _streak_profile(band.off_px.astype(float), fit[0], fit[1], band.streak_n_px, *band.light_bc)


def _fit_psf(bands: list[_Band], frac_cache: dict[int, tuple[np.ndarray, np.ndarray]],
             model: dict[int, np.ndarray], sigma0: float, hw: float) -> tuple[float, float] | None:
    """PSF centre and width (px) across the spectrum, fitted to the pixels against the boxcar spectra.

    A pixel's expected value is ``M_p P_p(off)``: ``M_p`` the frame's spectrum
    model (:func:`_rank1_model`, from the boxcar pass, which conserves flux
    whatever the profile) at the pixel's wavelength times its area
    (``disp * scale``), ``P_p`` the PSF convolved with the pixel's own streak
    (:func:`_streak_profile`). Fitting the pixels, not a mean residual per
    offset, matters: a spectrum nearly along the pixel rows (and the
    every-other-row sampling of a field) puts different stretches of the
    spectrum, lines or gaps, at different offsets, and the mean per offset
    then follows the spectrum instead of the profile (on interlaced events
    the pooled fit gave sigma 0.8 px for a 1.2 px PSF; Horne's estimate was
    10-20 % low). Pixels are grouped per frame by offset and streak (0.05 px)
    to keep the fit small; only two parameters come from the whole flight,
    so the profile's own noise is negligible (Horne 1986, section III).
    Returns None when there is too little light to fit.
    """
    off_g, mn_g, m_g, d_g, v_g, light_g = [], [], [], [], [], []
    for band in bands:
        if band.frame not in model or band.streak_n_px.size != band.off_px.size:
            continue
        jj, fr = frac_cache[band.frame]
        mp = (fr * model[band.frame][jj]).sum(axis=1) * band.disp * band.scale
        # model variance (sky plus the model's shot noise): a variance from the data would weight
        # each pixel by its own noise and bias the fit
        var_m = _smooth_sky_variance(band) + band.gain_adu * np.clip(mp * band.prof_px, 0.0, None)
        # cross-sections holding a saturated pixel are left out, as in the pooled profile
        good = ~band.bad & ~_saturated_sections(band) & np.isfinite(var_m) & (var_m > 0) & np.isfinite(mp)
        if not good.any():
            continue
        ko = np.rint(band.off_px[good] / 0.05).astype(np.int64)
        km = np.rint(band.streak_n_px[good] / 0.05).astype(np.int64)
        key = (ko - ko.min()) * (km.max() - km.min() + 1) + (km - km.min())
        uk, inv = np.unique(key, return_inverse=True)
        cnt = np.bincount(inv, None, uk.size)
        off_g.append(np.bincount(inv, band.off_px[good], uk.size) / cnt)
        mn_g.append(np.bincount(inv, band.streak_n_px[good], uk.size) / cnt)
        m_g.append(np.bincount(inv, mp[good], uk.size))
        d_g.append(np.bincount(inv, band.data[good], uk.size))
        v_g.append(np.bincount(inv, var_m[good], uk.size))
        light_g.append((band.light_bc, uk.size))
    if not off_g:
        return None
    off, mn, m, d, v = (np.concatenate(a) for a in (off_g, mn_g, m_g, d_g, v_g))
    if not (np.sum(m) > 0 and np.sum(d) > 0):
        return None
    sd = np.sqrt(v)

    def prof(c0: float, sig: float) -> np.ndarray:
        out, i = [], 0
        for (lb, lc), n in light_g:
            out.append(_streak_profile(off[i:i + n], c0, sig, mn[i:i + n], lb, lc))
            i += n
        return np.concatenate(out)

    def resid(p: np.ndarray) -> np.ndarray:
        return (p[0] * m * prof(p[1], p[2]) - d) / sd

    try:
        fit = least_squares(resid, [1.0, 0.0, sigma0], bounds=([0.0, -hw, 0.3], [np.inf, hw, 3.0 * hw]),
                            x_scale=[0.1, 0.1, 0.1])
    except ValueError:
        return None
    if not (fit.success and fit.x[0] > 0):
        return None
    return float(fit.x[1]), float(fit.x[2])


def _smooth_sky_variance(band: _Band) -> float:
    """The band's median sky variance (scaled), for weights that do not follow a pixel's own noise."""
    v = band.var_sky[~band.bad & np.isfinite(band.var_sky)]
    return float(np.median(v)) if v.size else 1.0


def _horne(band: _Band, jj: np.ndarray, fr: np.ndarray, first_guess: np.ndarray, widths: np.ndarray,
           n_wl: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, tuple[np.ndarray, np.ndarray]]:
    """Horne (1986) profile-weighted estimate per bin, with fractional pixel membership.

    Each pixel estimates the local spectral density as ``D / (p disp s)``
    (``s``: image rows a field row stands for) with variance
    ``V / (p disp s)^2``; a bin combines them with inverse-variance weights
    times the pixel's area fraction in the bin:
    ``F = sum f p disp s D / V / sum f (p disp s)^2 / V``.

    The weights' variance is the sky's plus the shot noise of the frame's
    *mean* spectral density (``first_guess``, the boxcar spectrum, averaged
    over its bins), not of each bin's own estimate as in Horne's recipe. A
    line streaked across the spectrum is not separable into spectrum times
    profile: the shear that sharpens it (module notes, step 3) leaves its
    light at each offset a little displaced along the wavelength axis. Its
    bins then mix offsets in different proportions, which is harmless only
    when every bin weights the offsets alike; weights following the bin's
    own brightness took 1.5-3 % off the Na and O I windows of bright
    interlaced events (bench/flux_ratio.py 4, 14, noise-free). Weights that
    are the same function of offset over the frame keep the sum over a
    line's bins exact; near a bright line they are slightly off the optimum,
    where the line's own shot noise dominates and no weighting helps much.
    The sky variance in the weights is the band's median
    (:func:`_smooth_sky_variance`), not each pixel's: that one comes from the
    pixel's background level, whose noise is the residual's with the opposite
    sign, and weights that favour pixels with a low level favour high
    residuals (+1.7 to +2.5 % on the faint sample's groups against the
    boxcar sum, 10 fresh-noise renders). The estimate's variance uses the
    local model (each pixel's sky variance plus the shot noise of the
    estimate itself, and the background level's, ``band.level_var``), so the
    stated errors stay right.

    Returns the estimate, its variance and lag correlations, the same weighted
    sum of the pixels' twinkle of star light (``band.twinkle``: one coherent
    error per bin, module notes step 7), and each pixel's weight in its bins
    as a per-pixel and a per-bin factor of ``fr`` (the estimate is the sum
    over pixels of ``fr`` times both factors times the data).
    """
    p = band.prof_px
    good = ~band.bad
    # a field row stands for ``scale`` image rows: its (scaled) value is F p disp scale
    pd = p * band.disp * band.scale
    f0 = np.where(np.isfinite(first_guess), first_guess, 0.0)
    seen = np.isfinite(first_guess) & (widths > 0)
    f_mean = float(np.sum(np.clip(f0[seen], 0.0, None) * widths[seen]) / np.sum(widths[seen])) if seen.any() else 0.0
    v_w = _smooth_sky_variance(band) + band.gain_adu * f_mean * pd
    w = np.where(good & np.isfinite(v_w) & (v_w > 0), pd / np.where(v_w > 0, v_w, 1.0), 0.0)
    num = np.bincount(jj.ravel(), (fr * (w * band.data)[:, None]).ravel(), n_wl)
    den = np.bincount(jj.ravel(), (fr * (w * pd)[:, None]).ravel(), n_wl)
    with np.errstate(invalid="ignore", divide="ignore"):
        f_new = np.where(den > 0, num / den, np.nan)
    model = (fr * np.where(np.isfinite(f_new), f_new, 0.0)[jj]).sum(axis=1) * pd
    v = band.var_sky + band.gain_adu * np.clip(model, 0.0, None)
    if band.level_var.size:
        v = v + band.level_var
    w2v = w**2 * np.where(w > 0, v, 0.0)
    var_num = np.bincount(jj.ravel(), (fr**2 * w2v[:, None]).ravel(), n_wl)
    with np.errstate(invalid="ignore", divide="ignore"):
        var_f = np.where(den > 0, var_num / den**2, np.nan)
    twk = np.zeros(n_wl)
    if band.twinkle.size:
        with np.errstate(invalid="ignore", divide="ignore"):
            twk = np.where(den > 0, np.bincount(jj.ravel(), (fr * (w * band.twinkle)[:, None]).ravel(), n_wl)
                           / np.where(den > 0, den, 1.0), 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        per_bin = 1.0 / np.where(den > 0, den, np.inf)
    # bins share pixels: their estimates are correlated (the 1 / den scales cancel in the coefficient)
    return f_new, var_f, _lag_correlation(jj, fr, w2v, var_num, n_wl), twk, (w, per_bin)


def _lag_correlation(jj: np.ndarray, fr: np.ndarray, pixel_var: np.ndarray, bin_var: np.ndarray,
                     n_wl: int) -> np.ndarray:
    """Correlation of bin ``j`` with bin ``j + d`` of a sum of pixels split over bins.

    A bin's estimate is (up to a per-bin scale, which cancels) ``sum_p f_pj X_p``
    with independent pixel values of variance ``pixel_var``; two bins that
    share pixels covary by ``sum_p f_pj f_p(j+d) var_p``. ``jj`` holds
    consecutive bin indices per pixel (as from :func:`_bin_fractions`), so the
    pair of columns ``(i, i + d)`` is a pair of bins ``d`` apart.

    Returns
    -------
    ndarray of shape (n_wl, K - 1), float32
        Column ``d - 1``: the coefficient for lag ``d``; 0 where a bin has no variance.
    """
    k = jj.shape[1]
    out = np.zeros((n_wl, max(k - 1, 0)), dtype=np.float32)
    for d in range(1, k):
        cov = np.bincount(jj[:, :-d].ravel(), (fr[:, :-d] * fr[:, d:] * pixel_var[:, None]).ravel(), n_wl)
        den = np.sqrt(bin_var[: n_wl - d] * bin_var[d:]) if d < n_wl else np.zeros(0)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[: n_wl - d, d - 1] = np.where(den > 0, cov[: n_wl - d] / np.where(den > 0, den, 1.0), 0.0)
    return out


def _with_common(corr: np.ndarray, share: np.ndarray) -> np.ndarray:
    """Lag correlations (as :func:`_lag_correlation`) of bins that also carry one error common
    to all of them, ``share`` of each bin's 1-sigma: ``rho sqrt((1 - q_j)(1 - q_l)) + s_j s_l``
    with ``q = s^2`` (the other errors' coefficient ``rho`` applies to their share of the variance)."""
    out = np.array(corr, dtype=np.float32, copy=True)
    if not np.any(share > 0):
        return out
    rest = np.sqrt(np.clip(1.0 - share**2, 0.0, None))
    n = share.size
    for d in range(1, min(out.shape[1], n - 1) + 1):
        out[: n - d, d - 1] = out[: n - d, d - 1] * rest[: n - d] * rest[d:] + share[: n - d] * share[d:]
    return out
