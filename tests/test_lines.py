"""Tests of meteorspec.lines: instrument width, peak finding and line identification.

Sources named beside each check: the grating equation at normal incidence with the lens
model of contract section 2 (worked by hand), the variance of a uniform distribution
(L^2 / 12, any statistics text), NIST ASD air wavelengths of strong meteor lines (shared
extract; Ca II 393.366 / 396.847 nm, Na D 588.995 / 589.592 nm also from memory), and the
optimal-extraction noise of a matched filter (Horne 1986, PASP 98, 609).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec import atomic
from meteorspec.lines import LineTable, find_peaks, identify_lines, instrument_fwhm_nm
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry


@pytest.fixture(scope="module")
def line_list() -> atomic.LineList:
    return atomic.load_line_list()


def _spectrum(wl, flux, err):
    bw = np.gradient(wl) if wl.size > 1 else np.ones(wl.size)
    return SimpleNamespace(wavelength_nm=wl, bin_width_nm=bw, flux=flux,
                           flux_err=err, mask=np.zeros(wl.size, bool))


def _gauss_bins(wl, bw, centre, energy, fwhm):
    """Bin-averaged Gaussian by a fine midpoint sum (independent of the module's erf)."""
    sigma = fwhm / (2 * math.sqrt(2 * math.log(2)))
    sub = (np.arange(200) + 0.5) / 200 - 0.5
    x = wl[:, None] + sub[None, :] * bw[:, None]
    g = np.exp(-0.5 * ((x - centre) / sigma) ** 2) / (sigma * math.sqrt(2 * math.pi))
    return energy * g.mean(axis=1)


# ------------------------------------------------------------------------------------------
# Instrument width from the geometry
# ------------------------------------------------------------------------------------------

def test_instrument_fwhm_on_axis_by_grating_equation():
    # Normal incidence on an untilted grating (contract 2.2): sin(theta) = m lambda N, and an
    # equidistant lens (2.1) puts it at r = f theta, so dr/dlambda = f N / cos(theta). By hand:
    f, n = 1000.0, 600.0
    geo = SpectralGeometry(LensModel("equidistant", f, 639.5, 479.5), GratingModel(n, 0.0))
    lam = np.array([400.0, 550.0, 800.0])
    s = lam * 1e-6 * n
    disp = np.sqrt(1 - s**2) / (f * n * 1e-6)  # nm per px
    got = instrument_fwhm_nm(geo, 639.5, 479.5, lam, psf_fwhm_px=2.5)
    assert_allclose(got, 2.5 * disp, rtol=1e-6)  # central-difference derivative in optics.py
    # a streak of L px along the dispersion is a box of variance L^2 / 12: its Gaussian
    # equivalent FWHM sqrt(8 ln 2 / 12) L adds in quadrature
    got = instrument_fwhm_nm(geo, 639.5, 479.5, lam, psf_fwhm_px=2.5, streak_px=6.0)
    assert_allclose(got, np.hypot(2.5, math.sqrt(8 * math.log(2) / 12) * 6.0) * disp, rtol=1e-6)


@pytest.mark.parametrize("kwargs", [dict(psf_fwhm_px=0.0), dict(psf_fwhm_px=np.nan),
                                    dict(psf_fwhm_px=2.0, streak_px=-1.0)])
def test_instrument_fwhm_rejects_nonsense(kwargs):
    geo = SpectralGeometry(LensModel("equidistant", 1000.0, 639.5, 479.5), GratingModel(600, 0))
    with pytest.raises(ValueError, match="psf_fwhm_px|streak_px"):
        instrument_fwhm_nm(geo, 639.5, 479.5, 500.0, **kwargs)


# ------------------------------------------------------------------------------------------
# Peaks
# ------------------------------------------------------------------------------------------

def test_single_line_position_intensity_and_snr():
    wl = np.arange(500.0, 600.0, 0.8)
    bw = np.full(wl.size, 0.8)
    true = _gauss_bins(wl, bw, 553.37, 500.0, 2.4) + 20.0  # flat continuum
    err = np.full(wl.size, 2.0)
    rng = np.random.default_rng(2)
    peaks = find_peaks(_spectrum(wl, true + rng.normal(0, err), err), fwhm_nm=2.4)
    assert len(peaks) == 1
    # optimal (matched-filter) amplitude error 1 / sqrt(sum p^2 / sigma^2) (Horne 1986);
    # fitting a local constant too costs a little: 1.0-1.3 times that
    sigma = 2.4 / (2 * math.sqrt(2 * math.log(2)))
    expected_err = 2.0 / math.sqrt(np.sum((_gauss_bins(wl, bw, 553.37, 1.0, 2.4)) ** 2))
    assert expected_err * 0.99 < peaks.intensity_err[0] < 1.3 * expected_err
    assert abs(peaks.intensity[0] - 500.0) < 4 * expected_err
    # centroid precision ~ sigma / SNR; allow 4x
    assert abs(peaks.position_nm[0] - 553.37) < 4 * sigma / peaks.snr[0] + 0.02
    assert_allclose(peaks.snr, peaks.intensity / peaks.intensity_err)


def test_two_lines_closer_than_fwhm_are_one_peak_and_far_lines_two():
    wl = np.arange(500.0, 600.0, 0.5)
    bw = np.full(wl.size, 0.5)
    err = np.full(wl.size, 0.5)
    close = _gauss_bins(wl, bw, 540.0, 300.0, 3.0) + _gauss_bins(wl, bw, 541.0, 300.0, 3.0)
    assert len(find_peaks(_spectrum(wl, close, err), fwhm_nm=3.0)) == 1
    far = _gauss_bins(wl, bw, 530.0, 300.0, 3.0) + _gauss_bins(wl, bw, 560.0, 300.0, 3.0)
    peaks = find_peaks(_spectrum(wl, far, err), fwhm_nm=3.0)
    assert_allclose(peaks.position_nm, [530.0, 560.0], atol=0.05)


def test_no_peaks_in_noise_flat_empty_nan_masked():
    wl = np.arange(400.0, 700.0, 1.0)
    err = np.ones(wl.size)
    rng = np.random.default_rng(0)
    # pure noise: a 6-sigma threshold over ~300 trials is essentially never passed
    assert len(find_peaks(_spectrum(wl, rng.normal(0, 1, wl.size), err), fwhm_nm=2.0,
                          min_snr=6.0)) == 0
    assert len(find_peaks(_spectrum(wl, np.full(wl.size, np.nan), err), fwhm_nm=2.0)) == 0
    spec = _spectrum(wl, 100 * np.exp(-0.5 * ((wl - 500) / 1.0) ** 2), err)
    spec.mask = np.ones(wl.size, bool)
    assert len(find_peaks(spec, fwhm_nm=2.0)) == 0
    empty = _spectrum(np.zeros(0), np.zeros(0), np.zeros(0))
    assert len(find_peaks(empty, fwhm_nm=2.0)) == 0
    assert len(identify_lines(empty, fwhm_nm=2.0)) == 0


def test_find_peaks_rejects_bad_shapes():
    wl = np.arange(400.0, 500.0)
    with pytest.raises(ValueError, match="spectrum"):
        find_peaks(_spectrum(wl, np.ones(3), np.ones(wl.size)), fwhm_nm=2.0)


# ------------------------------------------------------------------------------------------
# Identification
# ------------------------------------------------------------------------------------------

def _meteor_like(line_list, fwhm, extra_nm=None):
    """Ca II H and K, Na D and Mg b at plausible strengths, plus an optional foreign peak."""
    wl = np.arange(370.0, 720.0, 0.5)
    bw = np.full(wl.size, 0.5)
    flux = np.full(wl.size, 5.0)
    for species, lam, e in [("Ca II", 393.366, 3000), ("Ca II", 396.847, 1500),
                            ("Na I", 588.995, 4000), ("Na I", 589.592, 2000),
                            ("Mg I", 516.732, 500), ("Mg I", 517.268, 1400),
                            ("Mg I", 518.360, 2300)]:
        flux += _gauss_bins(wl, bw, lam, e, fwhm)
    if extra_nm is not None:
        flux += _gauss_bins(wl, bw, extra_nm, 2000.0, fwhm)
    err = np.full(wl.size, 2.0)
    return _spectrum(wl, flux, err)


def test_identify_strong_meteor_lines_with_nist_wavelengths(line_list):
    table = identify_lines(_meteor_like(line_list, 1.2), fwhm_nm=1.2)
    ca_k = table.lab_nm[(table.status == "identified") & (table.species == "Ca II")]
    # NIST ASD air wavelengths, Ca II K and H
    assert_allclose(np.sort(ca_k), [393.366, 396.847], atol=1e-3)
    # Na D at 1.2 nm FWHM: D2 and D1 (0.6 nm apart) make one peak, a blend of Na I lines
    na = table.status[np.abs(table.measured_nm - 589.2) < 0.6]
    assert list(na) == ["blend"]
    row = np.flatnonzero(np.abs(table.measured_nm - 589.2) < 0.6)[0]
    assert table.species[row] == "Na I" and table.multiplet[row].startswith("blend: ")
    assert "589.00" in table.multiplet[row] and "589.59" in table.multiplet[row]
    assert 588.995 < table.lab_nm[row] < 589.592


def test_unidentified_peak_far_from_any_line(line_list):
    # a narrow test list with only the lines drawn; the foreign peak at 650 nm has no
    # candidate within 0.6 FWHM
    keep = np.zeros(len(line_list), bool)
    for lam in (393.366, 396.847, 588.995, 589.592, 516.732, 517.268, 518.360):
        keep |= (np.abs(line_list.wavelength_nm - lam) < 1e-3) & (line_list.transition_type == "E1")
    small = line_list.select(keep)
    table = identify_lines(_meteor_like(line_list, 1.2, extra_nm=650.0), fwhm_nm=1.2,
                           line_list=small)
    row = np.flatnonzero(np.abs(table.measured_nm - 650.0) < 0.3)
    assert row.size == 1
    assert table.status[row[0]] == "unidentified" and table.species[row[0]] == ""
    assert np.isnan(table.lab_nm[row[0]])


def test_line_table_records_follow_contract_columns(line_list):
    table = identify_lines(_meteor_like(line_list, 2.0), fwhm_nm=2.0)
    rec = table.to_records()
    # contract section 5 /lines columns, plus status
    assert rec.dtype.names == ("species", "multiplet", "lab_nm", "measured_nm", "intensity",
                               "intensity_err", "snr", "status")
    assert len(rec) == len(table) > 0
    assert rec["species"][0].decode() == table.species[0]
    assert np.all(np.diff(table.measured_nm) > 0)
    assert LineTable.empty().to_records().shape == (0,)
    with pytest.raises(ValueError, match="status"):
        LineTable(["Na I"], [""], [1.0], [1.0], [1.0], [1.0], [1.0], ["maybe"])


def test_plasma_fit_with_unconstrained_lines_weighs_nothing(line_list):
    # a fit that left some line energies non-finite (an unconstrained, very blended model)
    # must not poison the weights: those lines count as zero, the rest still identify peaks
    spec = _meteor_like(line_list, 1.2)
    keep = np.flatnonzero(np.isin(np.round(line_list.wavelength_nm, 3),
                                  [393.366, 396.847, 588.995, 589.592])
                          & (line_list.transition_type == "E1"))
    lam = line_list.wavelength_nm[keep]
    strength = np.where(np.abs(lam - 393.366) < 1e-3, np.nan,
                        np.where(np.abs(lam - 396.847) < 1e-3, np.inf, 1.0e3))

    class _Fit:  # the attributes identify_lines reads from a PlasmaFit
        line_index, line_intensity, shift_nm = keep, strength, 0.0

        def __bool__(self):
            return True

        def line_position_nm(self, lab_nm):
            return np.asarray(lab_nm, float) + self.shift_nm

    table = identify_lines(spec, fwhm_nm=1.2, plasma_fit=_Fit())  # filterwarnings=error: no warning
    ca = np.abs(table.measured_nm - 393.37) < 0.6
    assert ca.sum() == 1 and table.status[ca][0] == "unidentified"
    na = np.abs(table.measured_nm - 589.2) < 0.6
    assert table.species[na][0] == "Na I"
