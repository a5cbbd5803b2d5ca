"""The wavelength error a feature fit states for itself (meteorspec.calibrate._wavelength_sigma_nm).

Reference: the scatter of the same fit repeated on freshly drawn noise (Monte Carlo). For a
least-squares fit with Gaussian errors the parameter covariance (J^T J)^-1 describes that
scatter to first order (Press et al., Numerical Recipes, 3rd ed., section 15.6, from memory),
and so does its propagation to any derived quantity. Positions come from
:class:`SpectralGeometry` (the contract's optics, tested against external references in
test_optics.py).
"""

import numpy as np

from meteorspec.calibrate import (UNCERTAIN_RANGE_NM, _FrameCut, _MAX_WAVELENGTH_SIGMA_NM, _wavelength_sigma_nm,
                                  fit_geometry)
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.wavesol import LineMeasurements

# the wide-field camera of the demo (QM01 binned 2x2, 640 x 480): rectilinear, f = 575 px
WIDE = SpectralGeometry(LensModel("rectilinear", 575.0, 320.1, 238.9, -0.012),
                        GratingModel(600.0, 4.0, 1.5, 30.0))
SHAPE = (480, 640)
# NIST air wavelengths (nm): Fe I 404.6, Fe I 438.4, Mg I b2, Na I D2; and with O I 777.2 / 844.6
BLUE_NM = np.array([404.581, 438.355, 517.268, 588.995])
WIDE_NM = np.array([393.366, 422.673, 517.268, 588.995, 777.194, 844.636])


def _measurements(geo, x0, y0, labs, *, sigma_px, rng):
    X0, Y0 = np.repeat(x0, labs.size), np.repeat(y0, labs.size)
    L = np.tile(labs, x0.size)
    xs, ys = geo.spectrum_pixel(X0, Y0, L)
    tx, ty = geo.direction(X0, Y0, L)
    a, c = rng.normal(0, sigma_px, (2, L.size)) if rng is not None else np.zeros((2, L.size))
    return LineMeasurements(
        event=np.full(L.size, "E1"), frame=np.repeat(np.arange(x0.size), labs.size), x0_px=X0, y0_px=Y0,
        x_px=xs + a * tx - c * ty, y_px=ys + a * ty + c * tx, lab_nm=L, species=np.full(L.size, "X"),
        tangent_x=tx, tangent_y=ty, sigma_along_px=np.full(L.size, sigma_px),
        sigma_cross_px=np.full(L.size, sigma_px))


def _cuts():
    z = np.zeros(SHAPE, np.float32)
    return [_FrameCut(0, 0.0, 0.0, 0.0, 0.0, z, z, 0, 1)]


def _wavelength_scatter_nm(fits, x0, y0):
    """Largest standard deviation over the refits of where they put the true scale's wavelengths."""
    wl = np.linspace(*UNCERTAIN_RANGE_NM, 24)
    xs, ys = WIDE.spectrum_pixel(x0[:, None], y0[:, None], wl[None, :])
    on = (xs >= 0) & (xs <= SHAPE[1] - 1) & (ys >= 0) & (ys <= SHAPE[0] - 1)
    lam = np.stack([f.geometry.locate(x0[:, None], y0[:, None], xs, ys)[0] for f in fits])
    return float(np.nanmax(np.where(on, lam.std(axis=0, ddof=1), np.nan)))


def test_stated_wavelength_error_matches_refits_on_fresh_noise():
    # a faint event's features, 0.4 px, on a short track and from the blue to Na D only:
    # the red end is extrapolated by a free tilt, as on seeded bench event 019 of seed 4
    x0 = np.linspace(170.0, 200.0, 5)
    y0 = np.linspace(300.0, 330.0, 5)
    exact = fit_geometry(_measurements(WIDE, x0, y0, BLUE_NM, sigma_px=0.4, rng=None), WIDE)
    assert exact
    stated = _wavelength_sigma_nm(exact, x0, y0, _cuts(), fit_lens=False, order=1)
    rng = np.random.default_rng(4)
    fits = [fit_geometry(_measurements(WIDE, x0, y0, BLUE_NM, sigma_px=0.4, rng=rng), WIDE) for _ in range(60)]
    assert all(fits)
    scatter = _wavelength_scatter_nm(fits, x0, y0)
    # 60 refits fix a standard deviation to 1/sqrt(2 * 59) = 9 %: 30 % is 3 sigma and the
    # linearisation's share
    assert 0.7 < stated / scatter < 1.3, (stated, scatter)
    # and this case is one the flag is for: the red end known worse than issue 4's 1 nm
    assert stated > _MAX_WAVELENGTH_SIGMA_NM


def test_features_across_the_spectrum_and_track_state_a_small_error():
    # bright features from Ca II K to O I 845 on a long track: the scale is pinned everywhere
    x0 = np.linspace(120.0, 260.0, 8)
    y0 = np.linspace(380.0, 300.0, 8)
    exact = fit_geometry(_measurements(WIDE, x0, y0, WIDE_NM, sigma_px=0.2, rng=None), WIDE)
    stated = _wavelength_sigma_nm(exact, x0, y0, _cuts(), fit_lens=False, order=1)
    rng = np.random.default_rng(5)
    fits = [fit_geometry(_measurements(WIDE, x0, y0, WIDE_NM, sigma_px=0.2, rng=rng), WIDE) for _ in range(60)]
    scatter = _wavelength_scatter_nm(fits, x0, y0)
    assert 0.7 < stated / scatter < 1.3, (stated, scatter)  # as above
    assert stated < _MAX_WAVELENGTH_SIGMA_NM
