"""Twinkling star light under a meteor's spectrum: its error, common to a frame's bins.

Star light that stays unmasked under the extraction band is subtracted as part of the
background level, but in each exposure it twinkles by one factor over the star's whole
spectrum, and the level holds that twinkle averaged over the frames it came from. The
checks: the stated covariance of whole-flight window sums against the scatter of seeded
noise draws of a scene rendered with that twinkle (error propagation checked by Monte
Carlo, common practice), and the bookkeeping of the whole flight against the same
propagation written out.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from meteorspec.extract import FrameSpectra, Spectrum, extract_spectra
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.video import Frame
from test_extract import FlatBackground, LinearTrack, camera, render, times

SKY_ADU, READ_ADU, GAIN = 20.0, 3.0, 2.0
SCINT, LEVEL_SAMPLES = 0.08, 9
WINDOWS_NM = ((505.0, 535.0), (545.0, 575.0))


@dataclasses.dataclass
class StarBackground(FlatBackground):
    """Flat sky plus one star's first-order spectrum, unmasked, in the level."""

    star_adu: np.ndarray = None
    scintillation: float = 0.0
    level_samples: int = 0

    def __post_init__(self):
        super().__post_init__()
        self.level_adu = (self.level_adu + self.star_adu).astype(np.float32)
        self.sky_adu = np.full(self.level_adu.shape, SKY_ADU, np.float32)


def _scene():
    cam = camera(320, 160)
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 159.5, 79.5), GratingModel(600.0, 5.0))
    n_frames = 4
    tr = LinearTrack(times(n_frames), 20.0, 60.0, 100.0, 200.0)
    meteor = render(geo, tr, cam, [(520.0, 2000.0), (560.0, 1500.0)], n_frames=n_frames)
    # a star whose spectrum lies under the meteor's in the middle frames: a continuum of
    # 60 ADU per 1 nm sample, unmasked (the background here masks no star)
    x0, y0 = tr.position(0.5 * (tr.time_s[1] + tr.time_s[2]))
    star_track = LinearTrack(times(1), float(x0), float(y0), 0.0, 0.0)
    lam = np.arange(495.0, 586.0, 1.0)
    star = render(geo, star_track, cam, [], n_frames=1, continuum=(lam, np.full(lam.size, 60.0)))[0].signal
    return cam, geo, tr, meteor, star.astype(float)


def _draws(n_draws: int, *, stated_scint: float, optimal: bool = False):
    cam, geo, tr, meteor, star = _scene()
    grid = np.arange(500.0, 580.0, 0.5)
    rng = np.random.default_rng(11)
    sums, cov = [], []
    for _ in range(n_draws):
        level_twinkle = SCINT * rng.standard_normal() / np.sqrt(LEVEL_SAMPLES)
        bg = StarBackground(cam.height, cam.width, sky_adu=SKY_ADU, read_noise_adu=READ_ADU,
                            gain_e_per_adu=GAIN, star_adu=star * (1.0 + level_twinkle),
                            scintillation=stated_scint, level_samples=LEVEL_SAMPLES)
        frames = []
        for m in meteor:
            light = m.signal + SKY_ADU + star * (1.0 + SCINT * rng.standard_normal())
            img = rng.poisson(light * GAIN) / GAIN + READ_ADU * rng.standard_normal(light.shape)
            frames.append(Frame(m.index, m.time_s, m.exposure_s, img.astype(np.float32), m.saturated))
        fs = extract_spectra(frames, bg, tr, geo, camera=cam, wavelength_grid_nm=grid, optimal=optimal,
                             floor_correction=False)
        s, c = window_sums(fs.whole_flight(), WINDOWS_NM)
        sums.append(s)
        cov.append(c)
    return np.array(sums), np.mean(cov, axis=0), fs


def window_sums(wf: Spectrum, windows_nm) -> tuple[list[float], np.ndarray]:
    """Energies of the whole flight's unmasked bins in each window and their stated covariance."""
    sel = [(wf.wavelength_nm >= lo) & (wf.wavelength_nm < hi) & ~wf.mask for lo, hi in windows_nm]
    g = np.stack([np.where(s, wf.bin_width_nm, 0.0) for s in sel])
    return [float(np.sum(wf.flux[s] * wf.bin_width_nm[s])) for s in sel], g @ np.nan_to_num(wf.covariance()) @ g.T


@pytest.mark.parametrize("optimal", [False, True])
def test_window_sums_scatter_as_stated_with_twinkling_star_light(optimal):
    # 150 seeded draws: the sample sd of a window sum has a 6 % standard error, so 0.82-1.18 is
    # a 3-sigma bar; a correlation coefficient near 0.5-0.9 has a standard error below 0.07.
    sums, cov, fs = _draws(150, stated_scint=SCINT, optimal=optimal)
    sd_emp = sums.std(axis=0, ddof=1)
    sd_stated = np.sqrt(np.diag(cov))
    assert np.all((sd_emp / sd_stated > 0.82) & (sd_emp / sd_stated < 1.18)), (sd_emp, sd_stated)
    # the two windows, 40 nm apart (beyond the stored lags), share the frames' twinkle
    assert fs.whole_flight().correlation.shape[1] < 40
    rho_emp = np.corrcoef(sums.T)[0, 1]
    rho_stated = cov[0, 1] / np.prod(sd_stated)
    assert rho_emp > 0.4
    assert abs(rho_emp - rho_stated) < 0.2, (rho_emp, rho_stated)
    # the twinkle is what sets this scatter: the frames carry it in their variances
    assert np.max(fs.twinkle_share) > 0.4
    assert fs.twinkle_level == 1.0 / LEVEL_SAMPLES


def test_window_sums_scatter_beyond_pixel_noise_without_the_twinkle():
    # the same scene with the twinkle left out of the noise model: the stated errors miss it
    # (1.8 times over 150 draws; 40 draws give the sample sd to 11 %, so 1.4 is a 3-sigma bar)
    sums, cov, fs = _draws(40, stated_scint=0.0)
    assert not np.any(fs.twinkle_share)
    assert np.all(sums.std(axis=0, ddof=1) / np.sqrt(np.diag(cov)) > 1.4)


def test_whole_flight_adds_the_twinkle_per_frame_and_the_levels_per_field_parity():
    # two field parities, two frames each; bins 0-3, one frame with a masked bin. Written out:
    # var_j = sum_f p_fj + sum_f t_fj^2 + lam sum_g (sum_{f in g} t_fj)^2, where p is a frame's
    # pixel variance and t its own twinkle (stored as share s = t sqrt(1 + lam) / sd).
    lam = 0.25
    t = np.array([[1.0, 2.0, 0.5, 0.0], [0.5, 1.0, 1.0, 0.2], [2.0, 0.0, 1.0, 1.0], [1.0, 1.0, 1.0, 1.0]])
    p = np.array([[4.0, 4.0, 4.0, 4.0], [1.0, 2.0, 3.0, 4.0], [2.0, 2.0, 2.0, 2.0], [3.0, 1.0, 2.0, 5.0]])
    mask = np.zeros((4, 4), bool)
    mask[3, 2] = True
    var_f = p + t**2 * (1.0 + lam)
    share = np.where(mask, 0.0, t * np.sqrt(1.0 + lam) / np.sqrt(var_f))
    fs = FrameSpectra(np.arange(4.0) + 500.0, np.ones(4), np.ones((4, 4)), var_f, mask, np.arange(4.0), (),
                      frame_weight=np.ones(4), correlation=np.zeros((4, 4, 0)), twinkle_share=share,
                      twinkle_group=np.array([0, 1, 0, 1]), twinkle_level=lam)
    wf = fs.whole_flight(min_coverage=0.5)
    good = ~mask
    own = np.where(good, t, 0.0)
    levels = [own[[0, 2]].sum(axis=0), own[[1, 3]].sum(axis=0)]
    cover = good.mean(axis=0)
    expect = (own.T @ own + lam * sum(np.outer(v, v) for v in levels)
              + np.diag(np.where(good, p, 0.0).sum(axis=0))) / np.outer(cover, cover)
    np.testing.assert_allclose(wf.covariance(), expect, rtol=1e-10)
    # a per-bin rescaling (a response) rescales the covariance alike: the shares are relative
    r = np.array([1.0, 2.0, 0.5, 3.0])
    scaled = Spectrum(wf.wavelength_nm, wf.bin_width_nm, wf.flux * r, wf.flux_err * r, wf.mask, wf.correlation,
                      wf.common_share)
    np.testing.assert_allclose(scaled.covariance(), expect * np.outer(r, r), rtol=1e-10)
    # a subset of the frames keeps its own twinkle and levels
    sub = fs.select_frames(np.array([0, 1])).whole_flight()
    np.testing.assert_allclose(np.diag(sub.covariance()),
                               (t[0] ** 2 + t[1] ** 2) * (1.0 + lam) + p[0] + p[1], rtol=1e-10)


def test_event_file_part_carries_the_common_errors():
    from meteorspec.pipeline import spectrum_part

    _, _, fs = _draws(1, stated_scint=SCINT)
    part = spectrum_part(fs, flux_unit="ADU")["datasets"]
    wf = fs.whole_flight()
    assert wf.common_share.shape[1] > 0
    np.testing.assert_array_equal(part["flux_common_share"][0], wf.common_share)
    np.testing.assert_array_equal(part["per_frame_twinkle_share"][0], fs.twinkle_share)
    # and a review's corrected wavelength scale keeps them
    from meteorspec.review.rework import regrid

    moved = regrid(wf, shift_nm=0.3, stretch=1.01)
    np.testing.assert_allclose(moved.covariance(), wf.covariance() / 1.01**2, rtol=1e-12)


def _plasma_problem(rng):
    """A plasma-fit problem's noise model only: 12 bins with 2 lags of correlation, of which the
    common errors (two columns) hold their share, as extract writes them."""
    from meteorspec import plasma

    n = 12
    s = rng.uniform(0.0, 0.5, (n, 2)) / np.sqrt(2.0)
    rho_pix = np.column_stack([np.full(n, 0.5), np.full(n, 0.1)])
    # the total lag correlation, as extract._with_common forms it for one column
    rest = np.sqrt(1.0 - np.sum(s**2, axis=1))
    total = np.zeros_like(rho_pix)
    for d in (1, 2):
        total[: n - d, d - 1] = rho_pix[: n - d, d - 1] * rest[: n - d] * rest[d:] + np.sum(s[: n - d] * s[d:], axis=1)
    good = np.ones(n, bool)
    problem = plasma._Problem.__new__(plasma._Problem)
    problem.good = good
    problem.pairs = plasma._bin_pairs(total, good)
    problem.common = plasma._common_columns(s, good)
    # the full correlation matrix written out
    r = s @ s.T
    for d in (1, 2):
        for j in range(n - d):
            r[j, j + d] = r[j + d, j] = total[j, d - 1]
    np.fill_diagonal(r, 1.0)
    return plasma, problem, r


def test_plasma_covariance_and_bootstrap_noise_carry_the_common_errors():
    rng = np.random.default_rng(5)
    plasma, problem, r = _plasma_problem(rng)
    g = rng.standard_normal((3, 12))
    # the sandwich's correlated share, g (R - I) g^T, against the matrix written out
    got = plasma._pair_term(g, problem.pairs) + plasma._common_term(g, problem)
    np.testing.assert_allclose(got, g @ (r - np.eye(12)) @ g.T, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(plasma._pair_term(g, problem.pairs, diagonal=True)
                               + plasma._common_term(g, problem, diagonal=True), np.diag(got), rtol=1e-10)
    # the bootstrap's noise has that correlation: 40000 draws, sample correlations to ~0.005
    # (standard error (1 - rho^2) / sqrt(n)); 0.02 is a 4-sigma bar
    z = np.array([plasma._noise_with_common(rng, problem) for _ in range(40000)])
    np.testing.assert_allclose(np.cov(z.T), r, atol=0.02)


def test_the_levels_own_noise_is_not_taken_for_star_light():
    # No star, but a level with its own noise (a mean of LEVEL_SAMPLES frames): above the smooth
    # sky by noise alone, 3 sigma of the level's noise at most but for 0.13 % of the pixels
    # (normal tail), so almost nothing twinkles; counted in full (every positive excess) it would
    # give the bins a share of up to 0.10 here (median 0.05), common to all of them.
    cam, geo, tr, meteor, _ = _scene()
    rng = np.random.default_rng(3)
    level_sd = np.sqrt((SKY_ADU / GAIN + READ_ADU**2) / LEVEL_SAMPLES)
    bg = StarBackground(cam.height, cam.width, sky_adu=SKY_ADU, read_noise_adu=READ_ADU, gain_e_per_adu=GAIN,
                        star_adu=level_sd * rng.standard_normal((cam.height, cam.width)),
                        scintillation=SCINT, level_samples=LEVEL_SAMPLES)
    frames = []
    for m in meteor:
        light = m.signal + SKY_ADU
        img = rng.poisson(light * GAIN) / GAIN + READ_ADU * rng.standard_normal(light.shape)
        frames.append(Frame(m.index, m.time_s, m.exposure_s, img.astype(np.float32), m.saturated))
    fs = extract_spectra(frames, bg, tr, geo, camera=cam, wavelength_grid_nm=np.arange(500.0, 580.0, 0.5),
                         optimal=False, floor_correction=False)
    assert np.max(fs.twinkle_share) < 0.03


def test_the_levels_twinkle_share_follows_each_pixels_sample_count():
    # a background that knows each pixel's sample count: the level's share of the twinkle variance
    # is 1 / count over the star light (here 3 under the star's spectrum, 9 elsewhere), not the
    # event's single level_samples
    from meteorspec.background import Background

    cam, geo, tr, meteor, star = _scene()
    shape = (cam.height, cam.width)
    count = np.full(shape, LEVEL_SAMPLES, np.uint16)
    count[star > 1.0] = 3
    sky = np.full(shape, SKY_ADU, np.float32)
    bg = Background(level_adu=(sky + star).astype(np.float32), noise_adu=np.ones(shape, np.float32),
                    read_noise_adu=READ_ADU, gain_e_per_adu=GAIN, star_mask=np.zeros(shape, bool),
                    frames_used=np.arange(LEVEL_SAMPLES), scintillation=SCINT, sky_adu=sky,
                    level_samples=LEVEL_SAMPLES, level_count=count)
    frames = [Frame(m.index, m.time_s, m.exposure_s, (m.signal + sky + star).astype(np.float32), m.saturated)
              for m in meteor]
    fs = extract_spectra(frames, bg, tr, geo, camera=cam, wavelength_grid_nm=np.arange(500.0, 580.0, 0.5),
                         floor_correction=False)
    assert np.max(fs.twinkle_share) > 0.1
    # star light counts above 3 sigma of the level's own noise, sqrt((9 + 20 / 2) / 3) = 2.5 ADU
    # where the count is 3: all of it lies where the count is 3
    assert fs.twinkle_level == pytest.approx(1.0 / 3.0, rel=1e-9)
