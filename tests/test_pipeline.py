"""Tests of meteorspec.pipeline's own logic: the composition of fireballs whose group lines
saturate in the bright frames, and keeping the station geometry.

The synthetic meteor is an optically thin LTE spectrum from the NIST line data of the shared
extract (Boltzmann populations with NIST partition functions, :mod:`meteorspec.atomic`),
rendered here with exact Gaussian bin integrals (``scipy.special.ndtr``), independently of the
plasma module's profile code; its group energies (contract section 6) are the truth.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.special import ndtr

from meteorspec import atomic, pipeline, plasma
from meteorspec.extract import FrameSpectra

SAMPLES = Path(__file__).resolve().parents[1] / "sample_events"
COLUMNS = {"Na I": 3e16, "Mg I": 3e17, "Fe I": 1e18, "Ca I": 3e16, "Cr I": 1e16, "Mn I": 1e16}
FWHM_NM = 3.0


def _thin_meteor(step_nm: float = 1.0, lo_nm: float = 370.0, hi_nm: float = 880.0, scale: float = 0.0):
    """Shape (flux density per unit frame weight) of a thin 4500 K meteor and its group energies;
    the lines at ``(1 + scale)`` times their NIST wavelengths (a grating's groove density that
    many times the station's)."""
    lines = atomic.load_line_list()
    index, component = plasma.select_model_lines(lines, lo_nm - 10, hi_nm + 10)
    main = lines.select(index[component == "main"])
    energy = atomic.line_energy_rate(main, 4500.0, {s: COLUMNS[s] for s in set(main.species.tolist())})
    energy = energy / energy.max()
    wl = np.arange(lo_nm, hi_nm, step_nm) + step_nm / 2
    edges = np.append(wl - step_nm / 2, wl[-1] + step_nm / 2)
    sigma = FWHM_NM / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    cdf = ndtr((edges[None, :] - main.wavelength_nm[:, None] * (1.0 + scale)) / sigma)
    shape = (energy[:, None] * np.diff(cdf, axis=1)).sum(axis=0) / step_nm
    truth = np.array([energy[main.group == g].sum() for g in plasma.GROUPS])
    return wl, np.full(wl.size, step_nm), shape, truth / truth.sum()


def _fireball_frames(seed: int = 3, scale: float = 0.0) -> tuple[FrameSpectra, np.ndarray]:
    """Ten frames; frames 3-6 saturate every group line (their weight unknown, as the extraction
    reports a lit frame it lost), frames 2 and 7 saturate only Na I (``scale``: _thin_meteor's)."""
    wl, bw, shape, truth = _thin_meteor(scale=scale)
    weight = np.array([0.0, 0.3, 1.0, 3.0, 6.0, 8.0, 5.0, 1.5, 0.6, 0.0])
    rng = np.random.default_rng(seed)
    peak = shape.max()
    var = np.tile((0.004 * peak) ** 2 + 0.002 * peak * np.clip(shape, 0, None), (weight.size, 1))
    flux = weight[:, None] * shape[None, :] + rng.normal(0.0, np.sqrt(var))
    mask = np.zeros(flux.shape, bool)
    mask[[0, 9]] = True  # not lit
    groups = pipeline.group_windows_nm(np.full(wl.size, FWHM_NM), wl, margin_fwhm=0.5)
    for k in (3, 4, 5, 6):
        for lo, hi in groups:  # with a scale: from the NIST window to the lines (a wide blot)
            mask[k, (wl >= min(lo, lo * (1.0 + scale))) & (wl <= max(hi, hi * (1.0 + scale)))] = True
    na_lo, na_hi = groups[0]
    mask[[2, 7], :] |= (wl >= min(na_lo, na_lo * (1.0 + scale))) & (wl <= max(na_hi, na_hi * (1.0 + scale)))
    frame_weight = weight.copy()
    frame_weight[[3, 4, 5, 6]] = np.nan
    flux = np.where(mask, np.nan, flux)
    spectra = FrameSpectra(wavelength_nm=wl, bin_width_nm=bw, flux=flux, variance=var, mask=mask,
                           time_s=(np.arange(weight.size) + 0.5) / 25.0, flags=("saturated",),
                           frame_weight=frame_weight)
    return spectra, truth


def test_group_windows_cover_contract_lines():
    # contract section 6 (wavelengths to 0.001 nm, as the contract rounds them): Na I
    # 588.995/589.592, Mg I 516.732-518.360, Fe I multiplet 15 within 526-546 nm
    wl = np.linspace(350.0, 900.0, 551)
    (na_lo, na_hi), (mg_lo, mg_hi), (fe_lo, fe_hi) = pipeline.group_windows_nm(np.full(wl.size, 2.0), wl)
    tol = 1e-3
    assert na_lo <= 588.995 - 2.0 + tol and na_hi >= 589.592 + 2.0 - tol
    assert mg_lo <= 516.732 - 2.0 + tol and mg_hi >= 518.360 + 2.0 - tol
    assert 524.0 - tol <= fe_lo <= 526.0 - 2.0 + 2.0 and 546.0 - 2.0 <= fe_hi <= 548.0 + tol


def test_unsaturated_frames_are_those_with_every_group():
    spectra, _ = _fireball_frames()
    fwhm = np.full(spectra.wavelength_nm.size, FWHM_NM)
    # frames 1 and 8 keep all groups; 2 and 7 lost Na; 3-6 lost all; 0 and 9 are dark
    assert pipeline.unsaturated_frames(spectra, fwhm).tolist() == [1, 8]


def test_unsaturated_frames_empty_when_a_group_is_outside_the_grid():
    spectra, _ = _fireball_frames()
    red = spectra.wavelength_nm > 560.0  # a grid that starts red of Mg and Fe
    cut = FrameSpectra(wavelength_nm=spectra.wavelength_nm[red], bin_width_nm=spectra.bin_width_nm[red],
                       flux=spectra.flux[:, red], variance=spectra.variance[:, red],
                       mask=spectra.mask[:, red], time_s=spectra.time_s, flags=(),
                       frame_weight=spectra.frame_weight)
    out = pipeline.unsaturated_frames(cut, np.full(red.sum(), FWHM_NM))
    assert out.dtype.kind == "i" and out.size == 0


def test_fireball_composition_from_unsaturated_frames():
    spectra, truth = _fireball_frames()
    fwhm = np.full(spectra.wavelength_nm.size, FWHM_NM)
    whole = spectra.whole_flight()
    fit = plasma.fit_plasma(whole, fwhm_nm=fwhm, speed_km_s=20.0)
    # the whole-flight sum has lost the group lines of the bright frames
    assert not fit or min(fit.group_coverage.values()) < 0.5
    out = pipeline.fit_unsaturated_frames(spectra, fwhm_nm=fwhm, speed_km_s=20.0)
    assert out is not None
    summed, fit, attrs = out
    assert attrs["frames"].tolist() == [1, 8]
    # light share of the frames of known brightness: (0.3 + 0.6) / (0.3 + 1 + 1.5 + 0.6)
    assert_allclose(attrs["light_share"], 0.9 / 3.4, rtol=1e-12)
    g = np.array([fit.group_intensity[k] for k in plasma.GROUPS])
    # the spectral shape is the same in every frame, so the subset's composition is the
    # meteor's; 0.02 is the acceptance-scale tolerance at these frames' S/N (~100 per line)
    assert_allclose(g / g.sum(), truth, atol=0.02)


def test_fit_unsaturated_frames_scans_the_wavelength_scale_of_a_station_fallback():
    # The fireball's lines sit 2 % redder than their NIST wavelengths on the axis (a station
    # groove density 2 % low, inside the +-3 % the calibration issue allows) and its whole-flight
    # sum has lost the group lines: the frames' own fit must find the scale (the plasma fit's
    # shift and stretch cannot reach 2 %, tests/test_plasma.py). Within the scan grid's step of
    # the truth, and the composition within the acceptance-scale 0.02 as on the right axis.
    spectra, truth = _fireball_frames(scale=0.02)
    fwhm = np.full(spectra.wavelength_nm.size, FWHM_NM)
    plain = pipeline.fit_unsaturated_frames(spectra, fwhm_nm=fwhm, speed_km_s=20.0)
    out = pipeline.fit_unsaturated_frames(spectra, fwhm_nm=fwhm, speed_km_s=20.0, scale_search=0.06)
    assert out is not None
    _, fit, attrs = out
    scan = fit.config["wavelength_scale_scan"]
    assert scan.reason == "" and abs(scan.best - 0.02) <= float(np.diff(scan.scales)[0])
    g = np.array([fit.group_intensity[k] for k in plasma.GROUPS])
    assert_allclose(g / g.sum(), truth, atol=0.02)
    if plain is not None:  # without the scan: na 0.00 against 0.98 when this test was written
        p = np.array([plain[1].group_intensity[k] for k in plasma.GROUPS])
        assert np.max(np.abs(p / p.sum() - truth)) > 0.1


def test_fit_unsaturated_frames_none_without_qualifying_frames():
    spectra, _ = _fireball_frames()
    mask = spectra.mask.copy()
    mask[[1, 8]] = True
    blind = FrameSpectra(wavelength_nm=spectra.wavelength_nm, bin_width_nm=spectra.bin_width_nm,
                         flux=spectra.flux, variance=spectra.variance, mask=mask, time_s=spectra.time_s,
                         flags=(), frame_weight=spectra.frame_weight)
    # the least saturated frames (2 and 7) keep only the far wings of Na I D, ~13 % of its model
    # light (below the 25 % that fit_unsaturated_frames asks of a saturated group), which
    # unsaturated_frames' lost-share estimate already rules out (it keeps >= 15 %)
    why: list[str] = []
    assert pipeline.fit_unsaturated_frames(blind, fwhm_nm=np.full(blind.wavelength_nm.size, FWHM_NM),
                                           speed_km_s=None, why=why) is None
    # the event's report says why there is no composition
    assert why == ["no lit frame records every group line unsaturated, nor keeps 15% of each group's light "
                   "(saturated or masked bins)"]


def test_fit_unsaturated_frames_reason_names_frames_and_failing_group(monkeypatch):
    # the reasons of the two fit outcomes that leave no composition (pipeline logic only: the
    # plasma fit itself is tested in tests/test_plasma*.py): a failed fit, and one whose weakest
    # group has too little model light on measured bins
    spectra, _ = _fireball_frames()
    fwhm = np.full(spectra.wavelength_nm.size, FWHM_NM)
    monkeypatch.setattr(pipeline, "fit_plasma", lambda *a, **k: plasma.PlasmaFit.failed("optimiser stopped"))
    why: list[str] = []
    assert pipeline.fit_unsaturated_frames(spectra, fwhm_nm=fwhm, speed_km_s=20.0, why=why) is None
    assert why == ["unsaturated frames [1, 8]: optimiser stopped"]
    fit = plasma.fit_plasma(spectra.whole_flight(), fwhm_nm=fwhm, speed_km_s=20.0)
    assert fit
    low = dataclasses.replace(fit, group_coverage={"na": 0.9, "mg": 0.3, "fe": 0.8})
    monkeypatch.setattr(pipeline, "fit_plasma", lambda *a, **k: low)
    why.clear()
    assert pipeline.fit_unsaturated_frames(spectra, fwhm_nm=fwhm, speed_km_s=20.0, why=why) is None
    # frames that record every group in full are held to one half (pipeline flag threshold)
    assert why == ["unsaturated frames [1, 8]: only 0.30 of the mg group's model light on measured bins (< 0.50)"]


def _saturating_fireball(seed: int = 5) -> tuple[FrameSpectra, np.ndarray]:
    """Ten frames of a fireball whose Na I D cores saturate from its first lit frame.

    A bin is masked where the frame's noise-free flux density exceeds one level (the sensor's
    full well), so the brighter a frame the more of the D profile it loses, and every lit frame
    loses some: frames 1 and 8 (the faintest) the top of the D lines, 2 and 7 more, 3-6 most.
    """
    wl, bw, shape, truth = _thin_meteor()
    weight = np.array([0.0, 0.5, 1.0, 3.0, 6.0, 8.0, 5.0, 1.5, 0.5, 0.0])
    rng = np.random.default_rng(seed)
    peak = shape.max()  # at Na I D
    var = np.tile((0.004 * peak) ** 2 + 0.002 * peak * np.clip(shape, 0, None), (weight.size, 1))
    flux = weight[:, None] * shape[None, :] + rng.normal(0.0, np.sqrt(var))
    mask = (weight[:, None] * shape[None, :] > 0.375 * peak) | (weight[:, None] == 0)
    spectra = FrameSpectra(wavelength_nm=wl, bin_width_nm=bw, flux=np.where(mask, np.nan, flux), variance=var,
                           mask=mask, time_s=(np.arange(weight.size) + 0.5) / 25.0, flags=("saturated",),
                           frame_weight=weight)
    return spectra, truth


def test_least_saturated_frames_when_every_frame_saturates():
    spectra, _ = _saturating_fireball()
    fwhm = np.full(spectra.wavelength_nm.size, FWHM_NM)
    assert pipeline.unsaturated_frames(spectra, fwhm).size == 0
    # frames 1 and 8 lose the same (fewest) bins; the brighter frames lose more and would mask
    # in the sum what frames 1 and 8 keep
    assert pipeline.unsaturated_frames(spectra, fwhm, least_saturated=True).tolist() == [1, 8]
    # with a frame that records every group, the option changes nothing
    frames, _ = _fireball_frames()
    assert pipeline.unsaturated_frames(frames, fwhm, least_saturated=True).tolist() == [1, 8]


def test_fireball_composition_from_least_saturated_frames():
    spectra, truth = _saturating_fireball()
    fwhm = np.full(spectra.wavelength_nm.size, FWHM_NM)
    na_lo, na_hi = pipeline.group_windows_nm(fwhm, spectra.wavelength_nm, margin_fwhm=0.0)[0]
    core = (spectra.wavelength_nm >= na_lo) & (spectra.wavelength_nm <= na_hi)
    assert spectra.whole_flight().mask[core].all()  # the whole-flight sum has lost the D cores
    out = pipeline.fit_unsaturated_frames(spectra, fwhm_nm=fwhm, speed_km_s=20.0)
    assert out is not None
    _, fit, attrs = out
    assert attrs["frames"].tolist() == [1, 8] and attrs["group_lines_saturated"]
    # Na I D measured from the wings of its profile: less than half of its light on measured bins
    assert 0.25 <= attrs["group_coverage"][0] < 0.5
    g = np.array([fit.group_intensity[k] for k in plasma.GROUPS])
    # the frames' spectral shape is the meteor's and the line profile the one the fit models, so
    # the wings give the group energies; 0.03 is the acceptance-scale tolerance (the fit's own
    # 1-sigma is ~0.01 here, at S/N ~100 per unsaturated line)
    assert_allclose(g / g.sum(), truth, atol=0.03)


@pytest.mark.skipif(not (SAMPLES / "20261114T031522Z_QM01").is_dir(), reason="sample events absent")
def test_refine_geometry_false_keeps_station_values():
    event = SAMPLES / "20261114T031522Z_QM01"
    result = pipeline.process_event(event, refine_geometry=False)
    assert result.status in ("ok", "partial")
    assert "calibration_from_station" in result.flags
    attrs = result.parts["calibration"]["attrs"]
    # the sample station file's grating value, as written (sample_events/stations/QM01.toml)
    station = pipeline.load_station(pipeline.find_station_file(pipeline.load_event(event)))
    assert attrs["grooves_per_mm"] == pytest.approx(station.grating.grooves_per_mm, rel=0, abs=1e-9)


def _na_peak_frames(recovered: np.ndarray | None) -> FrameSpectra:
    """Twelve bright frames of the thin meteor (no bin masked), with the given scaled-up bins."""
    wl, bw, shape, _ = _thin_meteor()
    weight = 1.0 + np.exp(-0.5 * ((np.arange(12) - 6.0) / 2.5) ** 2)
    flux = weight[:, None] * shape[None, :]
    kw = {} if recovered is None else {"recovered": recovered}
    return FrameSpectra(wavelength_nm=wl, bin_width_nm=bw, flux=flux, variance=np.full(flux.shape, 1e-6),
                        mask=np.zeros(flux.shape, bool), time_s=(np.arange(12) + 0.5) / 25.0,
                        flags=("saturated",), frame_weight=weight, **kw)


def test_na_peak_saturated_counts_d_bins_scaled_up_from_their_wings():
    # Na I D2 / D1 at 588.995 / 589.592 nm (NIST ASD, air; contract section 6); the D window is
    # pipeline.group_windows_nm with half an instrument FWHM of margin (3 nm here)
    wl = _na_peak_frames(None).wavelength_nm
    fwhm = np.full(wl.size, FWHM_NM)
    d_bins = np.abs(wl - 589.3) < 1.0
    other = np.abs(wl - 656.3) < 1.0  # H-alpha region, outside the D window
    peak_s = (6 + 0.5) / 25.0
    assert not pipeline.na_peak_saturated(_na_peak_frames(None), fwhm, peak_s)
    # no saturated bins recorded (an empty array, the FrameSpectra default)
    assert not pipeline.na_peak_saturated(_na_peak_frames(np.zeros((0, 0), bool)), fwhm, peak_s)
    rec = np.zeros((12, wl.size), bool)
    rec[7, d_bins] = True  # the frame after the peak: its D bins rest on the cross profile's wings
    assert pipeline.na_peak_saturated(_na_peak_frames(rec), fwhm, peak_s)
    far = np.zeros((12, wl.size), bool)
    far[2, d_bins] = True  # four frames before the peak: the top is measured in full
    far[6, other] = True   # the peak frame, but away from the D lines
    assert not pipeline.na_peak_saturated(_na_peak_frames(far), fwhm, peak_s)
    # a frame without meteor light (weight 0) does not count, as for masked bins
    dark = _na_peak_frames(rec)
    dark.frame_weight[7] = 0.0
    assert not pipeline.na_peak_saturated(dark, fwhm, peak_s)
    assert not pipeline.na_peak_saturated(_na_peak_frames(rec), fwhm, math.nan)


class _LineTrack:
    """A zeroth order moving at constant velocity (the attributes _instrument_fwhm reads)."""

    def __init__(self, x0_px: float, vx_px_s: float, n: int = 9, exposure_s: float = 0.04,
                 vy_px_s: float = 0.0) -> None:
        self.time_s = (np.arange(n) + 0.5) * exposure_s
        self.x_px = x0_px + vx_px_s * (self.time_s - self.time_s.mean())
        self.y_px = 240.0 + vy_px_s * (self.time_s - self.time_s.mean())
        self.luminous = np.ones(n, bool)
        self.exposure_s, self.psf_sigma_px, self._v = exposure_s, 1.0, (vx_px_s, vy_px_s)

    def velocity_px_s(self, time_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return np.full(np.shape(time_s), self._v[0]), np.full(np.shape(time_s), self._v[1])


def test_instrument_fwhm_when_550_nm_lies_beyond_the_lens_field():
    from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
    # orthographic lens, f = 300 px: the field ends 300 px from the centre (theta = 90 deg).
    # 600 grooves/mm dispersing along +x: the first order at 550 nm lands ~99 px from the zeroth
    # order, beyond the field for a zeroth order at x = 525 px, while 500 nm (~90 px) is recorded
    geo = SpectralGeometry(LensModel("orthographic", 300.0, 320.0, 240.0), GratingModel(600.0, 0.0))
    wl = np.arange(400.0, 620.0, 2.0)
    track = _LineTrack(525.0, 300.0)
    assert not np.isfinite(geo.direction(525.0, 240.0, 550.0, 1)[0])
    fwhm = pipeline._instrument_fwhm(geo, track, wl, order=1)
    disp = geo.dispersion_nm_per_px(525.0, 240.0, wl, 1)
    # lines.instrument_fwhm_nm: PSF FWHM (2.3548 sigma) and the streak along the dispersion
    # (300 px/s x 0.04 s = 12 px, a box of equal variance: FWHM 0.680 L) in quadrature,
    # times the local dispersion (common practice: independent blurs add in variance)
    expected = math.hypot(2.3548 * 1.0, 0.680 * 12.0) * disp
    ok = np.isfinite(disp)
    assert ok.any() and not ok.all()
    assert_allclose(fwhm[ok], expected[ok], rtol=2e-3)  # 0.680 is sqrt(8 ln 2 / 12) to 3 digits


def test_instrument_fwhm_streak_of_each_line_image_off_axis_on_a_rectilinear_lens():
    # A zeroth order on the x axis of a rectilinear lens (r = f tan theta, contract 2.1), 100 px
    # off the centre, moving 6 px along +x per exposure through an untilted 600 grooves/mm
    # grating (normal incidence, contract 2.2: sin theta = sin theta_0 + m lambda N). Worked by
    # hand from those two formulas: the image of a wavelength lies at x = cx + f tan theta, so
    # it moves by f (tan theta(b) - tan theta(a)) between the streak's ends a and b, which is
    # about cos^3(theta_0) / cos^3(theta) times the zeroth order's 6 px (8.9, 11.5 and 23.2 px
    # at 400, 550 and 800 nm), and the local dispersion is cos^3(theta) / (f N) nm per px.
    from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
    f, cx, n_mm = 300.0, 320.0, 600.0
    geo = SpectralGeometry(LensModel("rectilinear", f, cx, 240.0), GratingModel(n_mm, 0.0))
    lam = np.array([400.0, 550.0, 800.0])
    track = _LineTrack(420.0, 150.0)  # 150 px/s x 0.04 s = 6 px per exposure, PSF sigma 1 px
    fwhm = pipeline._instrument_fwhm(geo, track, lam, order=1)

    def image_x(x0_px: float) -> np.ndarray:
        sin_theta = math.sin(math.atan((x0_px - cx) / f)) + lam * 1e-6 * n_mm
        return cx + f * np.tan(np.arcsin(sin_theta))

    streak = image_x(423.0) - image_x(417.0)
    theta = np.arcsin(math.sin(math.atan(100.0 / f)) + lam * 1e-6 * n_mm)
    disp = np.cos(theta) ** 3 / (f * n_mm * 1e-6)
    # PSF and the streak's box (variance L^2 / 12, Gaussian-equivalent FWHM sqrt(8 ln 2 / 12) L)
    # in quadrature (common practice: independent blurs add in variance)
    expected = np.hypot(2.3548, math.sqrt(8 * math.log(2) / 12) * streak) * disp
    assert_allclose(fwhm, expected, rtol=1e-4)  # 2.3548 for sqrt(8 ln 2) is good to 2e-5
    # the zeroth order's own 6 px would have given lines 1.4-3.4x too narrow here
    zeroth = np.hypot(2.3548, math.sqrt(8 * math.log(2) / 12) * 6.0) * disp
    assert np.all(fwhm > 1.3 * zeroth)
    # the review's width for a file without a stored one (/calibration and /track) follows the
    # same line images
    from meteorspec.review.rework import _fwhm_from_geometry
    ev = {"groups": {"calibration": {"attrs": {"projection": "rectilinear", "focal_px": f, "cx": cx, "cy": 240.0,
                                               "grooves_per_mm": n_mm, "dispersion_angle_deg": 0.0}},
                     "track": {"datasets": {"x": track.x_px, "y": track.y_px, "time_s": track.time_s},
                               "attrs": {"exposure_s": 0.04, "psf_sigma_px": 1.0}}}}
    assert_allclose(_fwhm_from_geometry(ev, lam), expected, rtol=1e-4)
    # motion along the dispersion: the whole line-image streak stays a box (the plasma fit's
    # line profile, lines.line_smear_px), and the PSF is the rest of the width
    fwhm_b, box = pipeline._instrument_fwhm(geo, track, lam, order=1, with_box=True)
    assert_allclose(fwhm_b, fwhm)
    assert_allclose(box, streak * disp, rtol=1e-4)
    assert_allclose(np.sqrt(fwhm**2 - (math.sqrt(8 * math.log(2) / 12) * box) ** 2), 2.3548 * disp, rtol=1e-4)


def test_instrument_box_is_the_smear_that_the_shear_leaves():
    # An oblique streak (5 px along x, 4 px along y per exposure) through a grating dispersing
    # along x. The extraction integrates along a direction sheared towards the motion by
    # kappa = m_N^2 / (m_N^2 + 12 s^2) (meteorspec.extract, module notes, step 3; s = 1.5 px,
    # extract.SHEAR_PSF_SIGMA_PX): (1 - kappa) m_T of the streak stays a box along the spectrum,
    # and the PSF (sigma 1 px) is stretched by kappa m_T / m_N, a Gaussian. m_T and m_N, the
    # line image's motion along and across the spectrum, come from the optics (its own tests).
    from meteorspec.extract import SHEAR_PSF_SIGMA_PX
    from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
    geo = SpectralGeometry(LensModel("rectilinear", 300.0, 320.0, 240.0), GratingModel(600.0, 0.0))
    lam = np.array([420.0, 589.0, 777.0])
    track = _LineTrack(330.0, 125.0, vy_px_s=100.0)
    fwhm, box = pipeline._instrument_fwhm(geo, track, lam, order=1, with_box=True)
    xa, ya = geo.spectrum_pixel(330.0 - 2.5, 240.0 - 2.0, lam, 1)
    xb, yb = geo.spectrum_pixel(330.0 + 2.5, 240.0 + 2.0, lam, 1)
    dx, dy = geo.direction(330.0, 240.0, lam, 1)
    m_t = np.abs((xb - xa) * dx + (yb - ya) * dy)
    m_n = (xb - xa) * -dy + (yb - ya) * dx
    kappa = m_n**2 / (m_n**2 + 12 * SHEAR_PSF_SIGMA_PX**2)
    disp = geo.dispersion_nm_per_px(330.0, 240.0, lam, 1)
    assert np.all(kappa > 0.2) and np.all(kappa < 0.8)  # a real split between box and stretch
    assert_allclose(box, (1 - kappa) * m_t * disp, rtol=1e-9)
    stretch_px = kappa * m_t * 1.0 / np.abs(m_n)
    gauss = np.sqrt(fwhm**2 - (math.sqrt(8 * math.log(2) / 12) * box) ** 2)
    # the rest of the variance is the PSF's and the stretch's (2.3548 ~ sqrt(8 ln 2) to 2e-5)
    assert_allclose(gauss, 2.3548 * np.hypot(1.0, stretch_px) * disp, rtol=1e-4)


def test_clean_light_compares_apertures_on_the_bins_both_record_unsaturated():
    # _clean_light decides whether the ridge's aperture records more of the spectrum than the
    # station's (aperture_from_light). Two extractions on grids one bin apart (the grid moves a
    # little with the angle): the light on the bins both record unsaturated, by each one's own
    # bins; a bin masked or recovered in either counts in neither (saturation handling, not
    # the aperture's place). Exact sums of constant densities (flux x width).
    n_frames = 3
    wa = np.arange(400.0, 500.0, 1.0) + 0.5
    wb = np.arange(400.0, 501.0, 1.0) + 0.5  # one bin more
    def frames(wl, density, recovered=None, mask=None):
        shape = (n_frames, wl.size)
        return FrameSpectra(wavelength_nm=wl, bin_width_nm=np.ones(wl.size), flux=np.full(shape, density),
                            variance=np.ones(shape), mask=np.zeros(shape, bool) if mask is None else mask,
                            time_s=np.arange(n_frames) * 0.04, flags=(), frame_weight=np.ones(n_frames),
                            recovered=np.zeros(shape, bool) if recovered is None else recovered)
    a, b = frames(wa, 1.0), frames(wb, 30.0)
    la, lb = pipeline._clean_light(a, b)
    assert la == pytest.approx(n_frames * 100 * 1.0) and lb == pytest.approx(n_frames * 100 * 30.0)
    rec = np.zeros((n_frames, wb.size), bool)
    rec[:, 40:50] = True  # 440-450 nm recovered in b: out of both sums
    mask = np.zeros((n_frames, wa.size), bool)
    mask[1, 60:70] = True  # 460-470 nm masked in a's frame 1: out of both
    la, lb = pipeline._clean_light(frames(wa, 1.0, mask=mask), frames(wb, 30.0, recovered=rec))
    kept = n_frames * 90 - 10
    assert la == pytest.approx(kept * 1.0) and lb == pytest.approx(kept * 30.0)
    assert all(math.isnan(v) for v in pipeline._clean_light(a, frames(wb, 1.0).select_frames(np.arange(2))))


def test_aperture_angle_from_light_only_where_the_station_aperture_misses():
    # A seeded simulator event (QM03, interlaced) bright enough that its group lines saturate,
    # extracted with the truth track. Station angle 3.4 deg off (as the perturbed station file of
    # the seed-5 fireball 027 of bench/plasma_end_to_end.py, -11.64 against -15.0 deg): the
    # aperture runs beside the spectrum, no clean profile is left and the saturated bins are
    # masked. The middles of the saturated cores put the angle back on the simulator's (the
    # forward model's known truth) within 0.05 deg (a point 100 px from the zeroth order then
    # lies within 0.09 px of the curve), and the extraction along it recovers the saturated bins.
    from meteorspec.calibrate import station_solution
    from meteorspec.simulate import EventSpec, peak_for_line_snr, render_event
    from test_extract import FlatBackground
    from test_flux_ratio import _truth_track

    spec = EventSpec("QM03", n_frames=8, meteor_start_s=0.02, meteor_duration_s=0.2, start_px=(300.0, 250.0),
                     direction_deg=70.0, speed_deg_s=10.0, na=0.5, mg=0.2, fe=0.3, flat_response=True,
                     atmosphere=False, n_stars=0, seed=3)
    r = render_event(dataclasses.replace(spec, peak_energy_adu_s=peak_for_line_snr(spec, 2000.0)))
    stack, cam, track = r.frame_stack(), r.station.camera, _truth_track(r)
    bg = FlatBackground(cam.height, cam.width, sky_adu=spec.sky_adu, read_noise_adu=cam.read_noise_adu,
                        gain_e_per_adu=cam.gain_e_per_adu)
    true_deg = r.geometry.grating.dispersion_angle_deg
    for off_deg in (3.4, -3.4):
        station = r.geometry.with_grating(dispersion_angle_deg=true_deg + off_deg)
        fs = pipeline.extract_spectra(stack, bg, track, station, camera=cam)
        assert "saturated" in fs.flags and "saturation_recovered" not in fs.flags
        moved = pipeline.aperture_from_light(stack, bg, track, station_solution(station), fs, camera=cam, order=1)
        assert moved is not None
        solution, spectra = moved
        assert solution.source == "station" and "calibration_from_station" in solution.flags
        assert solution.geometry.grating.dispersion_angle_deg == pytest.approx(true_deg, abs=0.05)
        assert solution.values["dispersion_angle_deg"] == solution.geometry.grating.dispersion_angle_deg
        # the wavelength scale stays the station's
        assert solution.geometry.grating.grooves_per_mm == station.grating.grooves_per_mm
        assert "saturation_recovered" in spectra.flags
    # the station's own aperture on the spectrum (a clean profile): left as it is
    fs = pipeline.extract_spectra(stack, bg, track, r.geometry, camera=cam)
    assert "saturation_recovered" in fs.flags
    assert pipeline.aperture_from_light(stack, bg, track, station_solution(r.geometry), fs, camera=cam,
                                        order=1) is None


def test_unsaturated_frames_summed_on_the_bins_every_frame_records(monkeypatch):
    # The subset (frames 1 and 8) is summed without the light-curve scaling of
    # FrameSpectra.whole_flight: where both record a bin the sum is the plain sum of the two
    # (an identity: scaling by a share of 1), a bin masked in one of them is left out rather
    # than scaled up by the other's share, and so the sum does not depend on the frame weights.
    spectra, _ = _fireball_frames()
    wl = spectra.wavelength_nm
    lost = (wl > 400.0) & (wl < 410.0)  # no group line within one FWHM of 400-410 nm
    mask = spectra.mask.copy()
    mask[1] |= lost
    spectra = dataclasses.replace(spectra, mask=mask, flux=np.where(mask, np.nan, spectra.flux))
    fwhm = np.full(wl.size, FWHM_NM)
    assert pipeline.unsaturated_frames(spectra, fwhm).tolist() == [1, 8]
    seen = []

    def record(spectrum, **_):
        seen.append(spectrum)
        return plasma.PlasmaFit.failed("recorded only", spectrum.wavelength_nm.size)

    monkeypatch.setattr(pipeline, "fit_plasma", record)
    heavier = spectra.frame_weight.copy()
    heavier[1] *= 2.0
    for weights in (spectra.frame_weight, heavier):
        assert pipeline.fit_unsaturated_frames(dataclasses.replace(spectra, frame_weight=weights),
                                               fwhm_nm=fwhm, speed_km_s=20.0) is None
    first, second = seen
    assert np.array_equal(first.mask, lost)
    keep = ~lost
    assert_allclose(first.flux[keep], spectra.flux[1, keep] + spectra.flux[8, keep], rtol=1e-12)
    assert_allclose(first.flux_err[keep], np.sqrt(spectra.variance[1, keep] + spectra.variance[8, keep]),
                    rtol=1e-12)
    assert np.array_equal(second.mask, first.mask)
    assert_allclose(second.flux[keep], first.flux[keep], rtol=1e-12)


def test_scaled_solution_corrects_the_station_groove_density():
    # lab wavelengths read (1 + s) times longer on the station's axis when the grating has
    # (1 + s) times the station's grooves (grating equation, contract 2.2; checked in
    # tests/test_optics.py): the scan's scale goes into the groove density, nothing else moves
    from meteorspec.calibrate import station_solution
    from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
    geo = SpectralGeometry(LensModel("equidistant", 560.0, 319.5, 239.5), GratingModel(492.5, 1.7, 1.3, 180.0))
    sol = station_solution(geo, flags=("calibration_few_lines",))
    scan = plasma.ScaleScan(scales=np.array([0.0, 0.018]), chi2=np.array([9.0, 1.0]), centre=0.0, best=0.018,
                            best_err=2e-4, gain_sigma2=100.0, chosen=0.018, reason="")
    out = pipeline.scaled_solution(sol, scan)
    assert out.source == "station" and out.flags == sol.flags
    assert out.geometry.grating.grooves_per_mm == pytest.approx(492.5 * 1.018, rel=1e-12)
    assert out.values["grooves_per_mm"] == pytest.approx(492.5 * 1.018, rel=1e-12)
    assert out.errors["grooves_per_mm"] == pytest.approx(492.5 * 1.018 * 2e-4, rel=1e-12)
    for k in ("dispersion_angle_deg", "tilt_deg", "tilt_azimuth_deg", "focal_px"):
        assert out.values[k] == sol.values[k]


def test_group_with_no_line_in_the_fitted_range_counts_as_poorly_covered():
    # coverage is the share of a group's model light on usable bins; NaN when none of its lines
    # lies in the fitted range (a fireball whose whole-flight sum keeps only a few unsaturated
    # bins). It must send the pipeline to the frames that record every group, as a share below
    # one half does; NaN compares false, so a plain "< 0.5" let such a fit through with no group.
    fit = dataclasses.replace(plasma.PlasmaFit.failed("x"), success=True,
                              group_coverage={"na": math.nan, "mg": 1.0, "fe": 0.4})
    assert pipeline.poorly_covered_groups(fit) == ["na", "fe"]
    whole = dataclasses.replace(fit, group_coverage={"na": 1.0, "mg": 0.99, "fe": 0.5})
    assert pipeline.poorly_covered_groups(whole) == []
