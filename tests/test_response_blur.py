"""Undoing a response the camera applied before the instrument blur (calibrate.apply_response).

A camera weighs light by its response at each wavelength, then the PSF and motion streak
blur it: the recorded flux is ``K * (S R)`` (common practice: the response multiplies the
incident spectrum; the instrument profile is a convolution). The references here are
independent of meteorspec: the Planck law from astropy's ``BlackBody`` as a strongly curved
response, scipy's ``gaussian_filter1d`` and ``scipy.stats.norm`` for the blur.
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
from astropy.modeling.models import BlackBody
from numpy.testing import assert_allclose
from scipy.ndimage import gaussian_filter1d
from scipy.stats import norm

from meteorspec.calibrate import apply_response
from meteorspec.config import ResponseCurve
from meteorspec.extract import FrameSpectra, Spectrum

FWHM_PER_SIGMA = 2.3548200450309493  # sqrt(8 ln 2)
SIGMA_NM = 13.0  # a binned camera at ~10 nm/px: PSF 1.2 px and streak, ~31 nm FWHM
BIN_NM = 5.0


def _planck_curve(temperature_k: float = 2800.0) -> ResponseCurve:
    """A 2800 K Planck curve (astropy) on 1-nm rows, as a steep, curved response."""
    rows = np.arange(300.0, 1001.0, 1.0)
    unit = u.Unit("W m-2 nm-1 sr-1")
    bb = BlackBody(temperature=temperature_k * u.K, scale=1.0 * unit)
    r = bb(rows * u.nm).to_value(unit, u.spectral_density(rows * u.nm))
    return ResponseCurve(rows, r / r.max(), path=None)


def _spectrum(wl, flux):
    return Spectrum(wl, np.full(wl.size, BIN_NM), flux, 0.01 * np.abs(flux) + 1e-12, np.zeros(wl.size, bool))


def test_blurred_planck_divided_by_itself_is_flat():
    # A flat spectrum seen through a Planck response and blurred: F = K * R. Corrected, it must
    # be flat (K * 1 = 1). Plain division leaves (K * R) / R - 1 = s^2 R'' / (2 R) ~ 1 % here.
    # The blur-aware form is exact for a locally exponential R; what is left is the bend of
    # ln R to second order and the interpolation between 5-nm bins: measured 1e-4 inside
    # (bound 3e-4); the two end bins take a one-bin Taylor step off the grid (1.1e-3, bound 3e-3).
    curve = _planck_curve()
    fine = np.arange(300.0, 1000.0, 0.05)
    blurred = gaussian_filter1d(curve(fine), SIGMA_NM / 0.05, mode="nearest")
    wl = np.arange(450.0, 850.1, BIN_NM)  # > 5 sigma from the curve's ends
    spec = _spectrum(wl, np.interp(wl, fine, blurred))
    plain, _ = apply_response(spec, curve)
    aware, flags = apply_response(spec, curve, fwhm_nm=FWHM_PER_SIGMA * SIGMA_NM)
    assert np.max(np.abs(plain.flux - 1.0)) > 5e-3  # the check can see the effect
    assert_allclose(aware.flux[1:-1], 1.0, atol=3e-4)
    assert_allclose(aware.flux[[0, -1]], 1.0, atol=3e-3)
    assert flags == ("response_corrected",)


def test_line_energy_and_wing_across_a_window_edge():
    # One line of energy 1 at lambda0, weighted by R(lambda0), blurred by a Gaussian and
    # integrated over 5-nm bins (scipy.stats.norm). Its whole energy must come back (plain
    # division: off by s^2 (1/R)'' R / 2, up to 1.2 % at 520 nm; measured < 1e-5, bound 1e-3),
    # and so must the share of its red wing beyond +2 sigma: plain division puts
    # R(lambda0)/R(bin) on it (-7 % to -24 %); the blur-aware form: < 0.6 % (bound 2 %), the
    # bin interpolation on a strongly curved wing.
    curve = _planck_curve()
    wl = np.arange(380.0, 900.1, BIN_NM)  # every line > 6 sigma from the grid's ends
    edges = np.append(wl - 0.5 * BIN_NM, wl[-1] + 0.5 * BIN_NM)
    # the bin-level profile: the optical Gaussian and the 5-nm bin box (variance w^2 / 12)
    fwhm_nm = FWHM_PER_SIGMA * np.hypot(SIGMA_NM, BIN_NM / np.sqrt(12.0))
    for lam0 in (470.0, 520.0, 600.0, 760.0):  # R(470) / R(600) = 0.33: steep
        share = np.diff(norm.cdf(edges, lam0, SIGMA_NM))
        spec = _spectrum(wl, curve(np.array([lam0]))[0] * share / BIN_NM)
        plain, _ = apply_response(spec, curve)
        aware, _ = apply_response(spec, curve, fwhm_nm=fwhm_nm)
        wing = wl >= lam0 + 2.0 * SIGMA_NM
        assert_allclose(np.sum(aware.flux) * BIN_NM, 1.0, atol=1e-3)
        assert_allclose(np.sum(aware.flux[wing]) * BIN_NM / share[wing].sum(), 1.0, atol=0.02)
        assert abs(np.sum(plain.flux[wing]) * BIN_NM / share[wing].sum() - 1.0) > 0.05


def test_frames_masks_and_plain_division_unchanged():
    # Per-frame spectra: the same operation frame by frame; bins outside the curve masked;
    # without a FWHM the result is the plain division (flux / R, variance / R^2).
    curve = ResponseCurve(np.arange(400.0, 801.0, 5.0), np.linspace(0.5, 1.0, 81), path=None)
    wl = np.arange(380.0, 820.1, BIN_NM)
    rng = np.random.default_rng(3)
    flux = rng.uniform(1.0, 2.0, (3, wl.size))
    fs = FrameSpectra(wl, np.full(wl.size, BIN_NM), flux, 0.01 * flux, np.zeros((3, wl.size), bool),
                      np.arange(3.0), ())
    plain, _ = apply_response(fs, curve)
    inside = (wl >= 400.0) & (wl <= 800.0)
    assert_allclose(plain.flux[:, inside], flux[:, inside] / curve(wl[inside]))
    assert_allclose(plain.variance[:, inside], 0.01 * flux[:, inside] / curve(wl[inside]) ** 2)
    aware, flags = apply_response(fs, curve, fwhm_nm=30.0)
    assert np.all(aware.mask[:, ~inside]) and np.all(np.isnan(aware.flux[:, ~inside]))
    assert flags == ("response_corrected", "response_partial")
    # each frame corrected alone gives the same rows: the operation is per frame and linear
    one, _ = apply_response(_spectrum(wl, flux[1]), curve, fwhm_nm=30.0)
    assert_allclose(aware.flux[1], one.flux, equal_nan=True)


def test_bins_the_correction_cannot_reach_are_masked_not_plainly_divided():
    # Where a bin's profile runs off the response curve (its blue end here: rows from 340 nm,
    # a 33-nm FWHM, s = 14 nm) or a masked neighbour enters its interpolation, the blur-aware
    # form cannot be made. Plainly divided instead, such a bin would carry the full skew of
    # plain division while passing for corrected (a strong blue line's wing 2-4 x too bright
    # where R falls steeply), so it must be masked and the spectrum flagged response_partial.
    rows = np.arange(340.0, 1001.0, 1.0)
    curve = ResponseCurve(rows, np.exp(-((rows - 650.0) / 180.0) ** 2), path=None)  # steep in the blue
    wl = np.arange(350.0, 900.1, BIN_NM)
    flux = np.ones(wl.size)
    fwhm_nm = 33.0
    s = fwhm_nm / FWHM_PER_SIGMA
    aware, flags = apply_response(_spectrum(wl, flux), curve, fwhm_nm=fwhm_nm)
    off_curve = wl - s < rows[0]
    assert np.all(aware.mask[off_curve]) and np.all(np.isnan(aware.flux[off_curve]))
    assert not np.any(aware.mask[wl > 450.0])
    assert "response_partial" in flags
    # a masked bin in the middle: its neighbours within the interpolation are masked too,
    # bins far from it are corrected
    mask = np.zeros(wl.size, bool)
    k = int(np.argmin(np.abs(wl - 600.0)))
    mask[k] = True
    spec = Spectrum(wl, np.full(wl.size, BIN_NM), np.where(mask, np.nan, flux), np.full(wl.size, 0.01), mask)
    holed, _ = apply_response(spec, curve, fwhm_nm=fwhm_nm)
    far = np.abs(wl - 600.0) > 6 * BIN_NM
    assert holed.mask[k] and not np.any(holed.mask[far & (wl > 450.0)])
    assert np.all(np.isnan(holed.flux[holed.mask]))
    plain, _ = apply_response(spec, curve)
    near = ~holed.mask & ~far
    # what is kept near the hole is the blur-aware value, not the plain division
    assert_allclose(holed.flux[near], aware.flux[near], rtol=1e-9)
    assert not np.allclose(plain.flux[near], holed.flux[near], rtol=1e-6)
