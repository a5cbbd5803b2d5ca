"""Tests of the blend-window measurement of the self-calibration (meteorspec.calibrate).

Line positions come from :class:`SpectralGeometry` (the contract's optics, tested against
external references in test_optics.py); lab wavelengths and weights from the NIST line list.
"""

import numpy as np
from numpy.testing import assert_allclose
from test_calibrate import WIDE, _FlatBackground, _render_event

from meteorspec import calibrate as C


def test_profile_table_matches_direct_line_sum():
    # the deposit-and-convolve table must equal the direct sum of streaked profiles: lines split
    # between grid nodes 1/20 of the width apart move nothing and broaden a line by < 0.2 %
    # (variance h^2/4 at most against a width^2 of 400 h^2), so the tables agree to 0.1 % of
    # the peak
    comps = C._window_components(500.0, 560.0)
    assert [c[0] for c in comps][:3] and all(abs(c[2].sum() - 1) < 1e-12 for c in comps)
    for sigma, box in ((1.0, 0.0), (2.5, 8.0), (0.7, 0.2)):
        h = min(sigma, np.hypot(sigma, box / np.sqrt(12))) / 20
        u = np.arange(505.0, 555.0, h)
        fast = C._profile_table(u, comps, sigma, box)
        direct = np.stack([C._model_sum(u, c, w, sigma, box) for _, c, w in comps], axis=1)
        assert_allclose(fast, direct, rtol=0, atol=1e-3 * np.abs(direct).max())


def test_window_positions_unbiased_at_the_true_geometry():
    # a meteor rendered from the NIST line template on the wide-field camera; sampled along the
    # true curves, every window's pattern shift must be zero within its own error: normalised
    # residuals below 4 (the geometry fit's rejection level) and the error-weighted mean below
    # 0.05 px (1/20 of the line width: the template floor of the measurement)
    n = 6
    x0 = np.linspace(60.0, 220.0, n)
    y0 = np.linspace(300.0, 200.0, n)
    frames, track = _render_event(WIDE, x0, y0)
    cuts = C._cuts(frames, _FlatBackground(1.0), track, max_frames=40)
    m = C.measure_lines(cuts, WIDE, psf_px=1.3, n_bins=2, method="windows", max_shift_nm=2.0)
    assert len(np.unique(m.lab_nm)) >= 8
    assert all(s.startswith("blend ") for s in m.species)
    along, _ = C._model_residuals(WIDE, m)
    norm = along / m.sigma_along_px
    assert np.all(np.abs(norm) < 4.0)
    w = 1.0 / m.sigma_along_px**2
    assert abs(np.sum(w * along) / np.sum(w)) < 0.05
    # the same frames with no light: nothing found, an empty table (not None)
    dark = [type(f)(f.index, f.signal * 0.0 + np.random.default_rng(1).normal(0, 1, f.signal.shape).astype(np.float32),
                    f.saturated) for f in frames]
    cuts0 = C._cuts(dark, _FlatBackground(1.0), track, max_frames=40)
    m0 = C.measure_lines(cuts0, WIDE, psf_px=1.3, n_bins=2, method="windows", max_shift_nm=2.0, min_snr=8.0)
    assert len(m0) <= 1
