"""The background level's noise: an error each frame's spectrum carries, shared by frames.

The level subtracted from every pixel is the mean of a few meteor-free frames, so its noise
is the pixel's sky noise over the number of samples (the variance of a mean, common
practice), and every frame that subtracts it carries the same error. Where a slow meteor's
spectrum covers the same pixels in several frames, the whole-flight sum holds that error
once per frame, coherently. The checks: the stated covariance of whole-flight window sums
against the scatter of seeded noise draws of a scene whose level is estimated from its own
dark frames in every draw (error propagation checked by Monte Carlo, common practice), and
the whole flight's bookkeeping against the same propagation written out.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import sparse

from meteorspec.background import Background
from meteorspec.extract import FrameSpectra, extract_spectra
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.video import Frame
from test_extract import LinearTrack, camera, render, times
from test_twinkle import window_sums

SKY_ADU, READ_ADU, GAIN = 20.0, 3.0, 2.0
DARK_FRAMES = 4  # samples of the level: its variance is a quarter of a frame's sky variance
N_FRAMES = 6
WINDOWS_NM = ((505.0, 535.0), (545.0, 575.0))


def _scene():
    cam = camera(320, 160)
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 159.5, 79.5), GratingModel(600.0, 5.0))
    # a slow meteor: 0.6 px per frame across, so all six frames' spectra cover the same pixels
    tr = LinearTrack(times(N_FRAMES), 30.0, 70.0, 15.0, 5.0)
    meteor = render(geo, tr, cam, [(520.0, 600.0), (560.0, 450.0)], n_frames=N_FRAMES)
    return cam, geo, tr, meteor


def _noisy(light: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """CCD noise (Poisson photo-electrons plus Gaussian read noise, common practice)."""
    return (rng.poisson(light * GAIN) / GAIN + READ_ADU * rng.standard_normal(light.shape)).astype(np.float32)


def _background(cam, rng: np.random.Generator, *, with_count: bool) -> Background:
    """The level as the mean of ``DARK_FRAMES`` dark frames drawn now (the meteor's frames' noise is
    independent of it), with the noise model the background stage would fit."""
    shape = (cam.height, cam.width)
    level = np.mean([_noisy(np.full(shape, SKY_ADU), rng) for _ in range(DARK_FRAMES)], axis=0).astype(np.float32)
    noise = np.full(shape, np.sqrt(READ_ADU**2 + SKY_ADU / GAIN), np.float32)
    return Background(level_adu=level, noise_adu=noise, read_noise_adu=READ_ADU, gain_e_per_adu=GAIN,
                      star_mask=np.zeros(shape, bool), frames_used=np.arange(DARK_FRAMES),
                      sky_adu=np.full(shape, SKY_ADU, np.float32), level_samples=DARK_FRAMES,
                      level_count=np.full(shape, DARK_FRAMES, np.uint16) if with_count else None)


def _draws(n_draws: int, *, with_count: bool = True, optimal: bool = False):
    cam, geo, tr, meteor = _scene()
    grid = np.arange(500.0, 580.0, 0.5)
    rng = np.random.default_rng(21)
    sums, cov = [], []
    for _ in range(n_draws):
        bg = _background(cam, rng, with_count=with_count)
        frames = [Frame(m.index, m.time_s, m.exposure_s, _noisy(m.signal + SKY_ADU, rng), m.saturated)
                  for m in meteor]
        fs = extract_spectra(frames, bg, tr, geo, camera=cam, wavelength_grid_nm=grid, optimal=optimal,
                             floor_correction=False)
        s, c = window_sums(fs.whole_flight(), WINDOWS_NM)
        sums.append(s)
        cov.append(c)
    return np.array(sums), np.mean(cov, axis=0), fs


@pytest.mark.parametrize("optimal", [False, True])
def test_window_sums_scatter_as_stated_with_the_levels_noise(optimal):
    # 100 seeded draws: the sample sd of a window sum has a 7 % standard error, so 0.79-1.21 is
    # a 3-sigma bar
    sums, cov, fs = _draws(100, optimal=optimal)
    ratio = sums.std(axis=0, ddof=1) / np.sqrt(np.diag(cov))
    assert np.all((ratio > 0.79) & (ratio < 1.21)), ratio
    # the frames share the level's noise: it reaches the whole flight through level_share
    assert fs.level_share is not None and fs.level_share.nnz > 0


def test_window_sums_scatter_beyond_the_stated_error_without_the_levels_noise():
    # the same scene with the level's sample count unknown: the stated errors hold the frames'
    # own noise only. Expected ratio sqrt(1 + 6 / 4) = 1.58 for six frames on the same pixels
    # (each frame's sky variance s: 6 s stated, 6 s + 36 s / 4 true; the meteor's own shot noise
    # lowers it a little); 40 draws give the sample sd to 11 %, so 1.25 is a 3-sigma bar
    sums, cov, fs = _draws(40, with_count=False)
    assert fs.level_share is None
    assert np.all(sums.std(axis=0, ddof=1) / np.sqrt(np.diag(cov)) > 1.25)


def test_whole_flight_adds_the_level_shared_by_frames():
    # three frames, four bins, three shared pixels; frame 2 has a masked bin. Written out:
    # cov = sum_k P_k + A A^T - sum_k B_k B_k^T with B_k[j, p] = share * sd_kj, A = sum_k B_k,
    # where each frame's own level part B_k B_k^T sits in its variance (diagonal here: no lags)
    n_wl = 4
    var = np.array([[4.0, 4.0, 4.0, 4.0], [1.0, 2.0, 3.0, 4.0], [2.0, 2.0, 2.0, 2.0]])
    mask = np.zeros((3, n_wl), bool)
    mask[2, 1] = True
    rng = np.random.default_rng(3)
    share = rng.uniform(0.0, 0.4, (3 * n_wl, 3)) * (rng.random((3 * n_wl, 3)) < 0.6)
    share[2 * n_wl + 1] = 0.0  # a masked bin holds no weights
    fs = FrameSpectra(np.arange(n_wl) + 500.0, np.ones(n_wl), np.ones((3, n_wl)), var, mask, np.arange(3.0), (),
                      frame_weight=np.ones(3), correlation=np.zeros((3, n_wl, 0)),
                      level_share=sparse.csr_matrix(share))
    wf = fs.whole_flight(min_coverage=0.5)
    sd = np.sqrt(np.where(mask, 0.0, var))
    b = [share[k * n_wl:(k + 1) * n_wl] * sd[k][:, None] for k in range(3)]
    a = sum(b)
    cover = (~mask).mean(axis=0)
    expect = (np.diag(np.where(mask, 0.0, var).sum(axis=0)) + a @ a.T - sum(x @ x.T for x in b)) / np.outer(cover,
                                                                                                          cover)
    np.testing.assert_allclose(wf.covariance(), expect, rtol=1e-6)
    # a subset of the frames shares only its own pixels' level
    sub = fs.select_frames(np.array([0, 1])).whole_flight()
    a2 = b[0] + b[1]
    expect2 = np.diag(var[0] + var[1]) + a2 @ a2.T - b[0] @ b[0].T - b[1] @ b[1].T
    np.testing.assert_allclose(sub.covariance(), expect2, rtol=1e-6)


def test_level_variance_is_the_sky_variance_over_the_samples():
    shape = (4, 5)
    count = np.full(shape, 9, np.uint16)
    count[1, 2] = 3
    bg = Background(level_adu=np.full(shape, 20.0, np.float32), noise_adu=np.ones(shape, np.float32),
                    read_noise_adu=READ_ADU, gain_e_per_adu=GAIN, star_mask=np.zeros(shape, bool),
                    frames_used=np.arange(9), level_count=count)
    got = bg.level_variance(np.array([0, 1]), np.array([0, 2]))
    np.testing.assert_allclose(got, (READ_ADU**2 + 20.0 / GAIN) / np.array([9.0, 3.0]), rtol=1e-6)
