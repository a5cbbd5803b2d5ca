"""Optics checked against outside facts (each source named beside its check)."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec.optics import PROJECTIONS, GratingModel, LensModel, SpectralGeometry, projection_radius

# Round trips are exact maths, so only float64 round-off is allowed; 1e-6 px is
# the acceptance bar of the foundation issue and ~1e6 times the round-off seen.
ROUND_TRIP_PX = 1e-6

# focal lengths that put the sensor corner (800 px off axis) within each lens's
# field: all-sky fisheyes for the four fisheye projections, a wide lens otherwise.
FOCAL_PX = {"equidistant": 560.0, "equisolid": 600.0, "stereographic": 420.0,
            "orthographic": 900.0, "rectilinear": 900.0}


def test_plane_grating_equation_normal_incidence():
    # Plane grating equation sin(beta) = m * lambda * N at normal incidence
    # (any optics handbook, e.g. Hecht, Optics, ch. 10): 600 grooves/mm at 500 nm
    # gives sin(beta) = 0.3, beta = 17.4576 deg.
    g = GratingModel(600.0, 0.0)
    u1 = g.diffract([0.0, 0.0, 1.0], 500.0, 1)
    beta_deg = np.degrees(np.arccos(u1[2]))
    assert_allclose(beta_deg, 17.4576, atol=5e-5)  # the handbook value is given to 4 decimals
    assert u1[0] > 0 and abs(u1[1]) < 1e-15  # order +1 towards +psi (psi = 0 -> +x), contract 2.2


@pytest.mark.parametrize("alpha_deg", [-30.0, -10.0, 0.0, 15.0, 40.0])
@pytest.mark.parametrize("order", [-1, 1])
def test_plane_grating_equation_oblique_in_plane(alpha_deg, order):
    # In-plane incidence: sin(beta) = sin(alpha) + m * lambda * N (grating equation,
    # transmission form with angles on the same side; any optics handbook).
    g = GratingModel(300.0, 0.0)
    a = np.radians(alpha_deg)
    lam = 656.28
    u1 = g.diffract([np.sin(a), 0.0, np.cos(a)], lam, order)
    assert_allclose(u1[0], np.sin(a) + order * lam * 1e-6 * 300.0, atol=1e-14)
    assert abs(u1[1]) < 1e-14


def test_tilted_grating_obeys_grating_equation_about_its_own_normal():
    # The grating equation refers to the grating normal: a source along a tilted
    # normal is at normal incidence (any optics handbook).
    g = GratingModel(600.0, 30.0, tilt_deg=5.0, tilt_azimuth_deg=70.0)
    u1 = g.diffract(g.normal, 500.0, 1)
    sin_beta = np.linalg.norm(np.cross(u1, g.normal))
    assert_allclose(sin_beta, 0.3, atol=1e-14)
    assert_allclose(np.dot(g.groove_vector, g.normal), 0.0, atol=1e-15)


def test_evanescent_order_is_nan():
    # |m lambda N| > 1 has no propagating order (grating equation, handbook).
    g = GratingModel(1200.0, 0.0)
    assert np.all(np.isnan(g.diffract([0, 0, 1.0], 900.0, 1)))


def test_conical_diffraction_orders_lie_on_a_line_equally_spaced():
    # Harvey & Vernold 1998, Appl. Opt. 37, 8158: for arbitrary (off-plane)
    # incidence the diffracted direction cosines of all orders lie on one
    # straight line in direction-cosine space, equally spaced by lambda/d.
    g = GratingModel(600.0, 25.0, tilt_deg=3.0, tilt_azimuth_deg=-40.0)
    inc = np.array([0.35, -0.42, 0.0])
    inc[2] = np.sqrt(1 - inc[0] ** 2 - inc[1] ** 2)
    orders = np.arange(-2, 3)
    out = g.diffract(np.tile(inc, (5, 1)), 550.0, orders)
    assert np.all(np.isfinite(out))
    n = g.normal
    cosines = out - (out @ n)[:, None] * n  # projection on the grating plane
    steps = np.diff(cosines, axis=0)
    assert_allclose(steps, np.tile(steps[0], (4, 1)), atol=1e-14)  # collinear and equal
    assert_allclose(np.linalg.norm(steps[0]), 550e-6 * 600.0, rtol=1e-13)
    # the zeroth order is the incident direction itself
    assert_allclose(out[2], inc, atol=1e-15)
    # and the diffracted rays are not in the plane of incidence (conical)
    assert abs(np.dot(np.cross(inc, n), out[4])) > 1e-3


@pytest.mark.parametrize(
    "projection, theta_deg, expected",
    [
        # Standard fisheye projection formulas (Kannala & Brandt 2006, IEEE TPAMI 28, 1335;
        # common practice in all-sky camera work): r/f at the given angle.
        ("equidistant", 90.0, np.pi / 2),
        ("equisolid", 90.0, np.sqrt(2.0)),
        ("stereographic", 90.0, 2.0),
        ("orthographic", 30.0, 0.5),
        ("rectilinear", 45.0, 1.0),
        ("equisolid", 180.0, 2.0),
        ("stereographic", 60.0, 2.0 / np.sqrt(3.0)),
    ],
)
def test_projection_formulas(projection, theta_deg, expected):
    assert_allclose(projection_radius(projection, np.radians(theta_deg)), expected, rtol=1e-14)


@pytest.mark.parametrize("projection", PROJECTIONS)
@pytest.mark.parametrize("k1, k2", [(0.0, 0.0), (0.02, -0.004), (-0.03, 0.001)])
def test_pixel_direction_round_trip_whole_sensor(projection, k1, k2):
    lens = LensModel(projection, FOCAL_PX[projection], 639.5, 479.5, k1=k1, k2=k2)
    y, x = np.mgrid[0:960:3.0, 0:1280:3.0]
    x = x + 0.37  # off the half-pixel grid on purpose
    u = lens.pixel_to_direction(x, y)
    ok = np.isfinite(u[..., 0])
    if projection != "orthographic":  # an orthographic lens images at most a hemisphere
        assert ok.all()
    assert ok.mean() > 0.5
    assert_allclose(np.linalg.norm(u[ok], axis=-1), 1.0, atol=1e-14)
    xx, yy = lens.direction_to_pixel(u)
    assert np.nanmax(np.hypot(xx - x, yy - y)) < ROUND_TRIP_PX


@pytest.mark.parametrize("projection", PROJECTIONS)
def test_direction_pixel_round_trip_to_89_deg(projection):
    lens = LensModel(projection, 300.0, 0.0, 0.0)
    theta = np.radians(np.linspace(0.0, 89.0, 891))
    phi = np.radians(np.linspace(-180.0, 180.0, 891))
    u = np.stack([np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi), np.cos(theta)], axis=-1)
    x, y = lens.direction_to_pixel(u)
    assert np.all(np.isfinite(x))
    back = lens.pixel_to_direction(x, y)
    # angle error translated to pixels through the local scale dr/dtheta
    x2, y2 = lens.direction_to_pixel(back)
    assert np.max(np.hypot(x2 - x, y2 - y)) < ROUND_TRIP_PX
    assert_allclose(np.arctan2(np.hypot(back[:, 0], back[:, 1]), back[:, 2]), theta, atol=1e-10)


def test_orthographic_beyond_its_hemisphere_is_nan():
    lens = LensModel("orthographic", 500.0, 0.0, 0.0)
    assert np.isnan(lens.pixel_to_direction(600.0, 0.0)).all()
    assert np.isnan(lens.direction_to_pixel([1.0, 0.0, -0.1])[0])


@pytest.mark.parametrize("psi_deg", [0.0, 37.0, -120.0])
def test_near_axis_dispersion_equidistant(psi_deg):
    # On the axis of an equidistant lens with an untilted grating the first order
    # lies at r = f * beta with sin(beta) = lambda N, so dr/dlambda = f N / cos(beta)
    # (differentiate the grating equation; any optics handbook).
    f, N, lam = 1000.0, 600.0, 500.0
    geo = SpectralGeometry(LensModel("equidistant", f, 639.5, 479.5), GratingModel(N, psi_deg))
    beta = np.arcsin(lam * 1e-6 * N)
    x, y = geo.spectrum_pixel(639.5, 479.5, lam)
    assert_allclose(np.hypot(x - 639.5, y - 479.5), f * beta, rtol=1e-13)
    expected_nm_per_px = 1.0 / (f * N * 1e-6 / np.cos(beta))
    # central difference over +-0.05 nm: truncation error ~ (0.05 nm)^2 * r'''/6, < 1e-8 relative
    assert_allclose(geo.dispersion_nm_per_px(639.5, 479.5, lam), expected_nm_per_px, rtol=1e-8)
    dx, dy = geo.direction(639.5, 479.5, lam)
    assert_allclose([dx, dy], [np.cos(np.radians(psi_deg)), np.sin(np.radians(psi_deg))], atol=1e-9)


def test_spectra_are_curved_away_from_the_axis():
    # Conical diffraction curves the spectrum of an off-axis source (Harvey &
    # Vernold 1998); the tool must not assume a straight line.
    # source 420 px (about 40 deg) off axis, perpendicular to the dispersion
    geo = SpectralGeometry(LensModel("equisolid", 600.0, 639.5, 479.5), GratingModel(600.0, 0.0))
    lam = np.linspace(380.0, 850.0, 3)
    x, y = geo.spectrum_pixel(639.5, 60.0, lam)
    chord = np.array([x[2] - x[0], y[2] - y[0]])
    mid = np.array([x[1] - x[0], y[1] - y[0]])
    sagitta = abs(chord[0] * mid[1] - chord[1] * mid[0]) / np.linalg.norm(chord)
    assert sagitta > 2.0  # px; a straight-line aperture would miss the lines
    disp = geo.dispersion_nm_per_px(639.5, 60.0, lam)
    assert np.ptp(disp) / disp.mean() > 0.02  # dispersion varies along the spectrum


GEOMETRIES = [
    SpectralGeometry(LensModel("equidistant", 1000.0, 639.5, 479.5, k1=0.01), GratingModel(600.0, 3.0)),
    SpectralGeometry(LensModel("equisolid", 600.0, 639.5, 479.5, k1=-0.01, k2=0.001),
                     GratingModel(300.0, -20.0, tilt_deg=2.0, tilt_azimuth_deg=50.0)),
    SpectralGeometry(LensModel("rectilinear", 1400.0, 399.5, 299.5), GratingModel(1000.0, 90.0, 1.0, 10.0)),
    SpectralGeometry(LensModel("stereographic", 420.0, 511.5, 511.5), GratingModel(500.0, 135.0)),
    SpectralGeometry(LensModel("orthographic", 900.0, 639.5, 479.5), GratingModel(300.0, 45.0)),
]


@pytest.mark.parametrize("geo", GEOMETRIES, ids=[g.lens.projection for g in GEOMETRIES])
def test_spectrum_pixel_locate_and_zeroth_round_trips(geo):
    rng = np.random.default_rng(3)
    x0 = rng.uniform(100, 700, 50)
    y0 = rng.uniform(100, 500, 50)
    lam = rng.uniform(380.0, 850.0, 50)
    x, y = geo.spectrum_pixel(x0, y0, lam)
    ok = np.isfinite(x)
    assert ok.sum() > 30
    lam_back, off = geo.locate(x0, y0, x, y)
    assert_allclose(lam_back[ok], lam[ok], atol=1e-6)  # nm; exact maths, float round-off only
    assert np.max(np.abs(off[ok])) < ROUND_TRIP_PX
    xz, yz = geo.zeroth_pixel(x, y, lam)
    assert np.nanmax(np.hypot(xz - x0, yz - y0)) < ROUND_TRIP_PX
    # a pixel displaced across the spectrum by d reports offset d and the same wavelength
    tx, ty = geo.direction(x0, y0, lam)
    d = 2.5
    lam2, off2 = geo.locate(x0, y0, x - d * ty, y + d * tx)
    # curvature moves the nearest point slightly; 1e-3 px is far below any extraction need
    assert_allclose(off2[ok], d, atol=1e-3)
    assert np.nanmax(np.abs(lam2 - lam)[ok] / geo.dispersion_nm_per_px(x0, y0, lam)[ok]) < 1e-2


@pytest.mark.parametrize("geo", GEOMETRIES, ids=[g.lens.projection for g in GEOMETRIES])
def test_orders_chain_through_a_line_of_the_spectrum(geo):
    # Harvey & Vernold 1998, Appl. Opt. 37, 8158: diffraction adds m lambda / d to the
    # direction cosines in the grating plane, so from the first-order image of lambda0 the
    # order -1 at lambda lands where the first order of lambda0 - lambda does, and the
    # order +1 at lambda where the first order of lambda0 + lambda does. The tracker's test
    # of a line taken for a zeroth order (meteorspec.track.light_near_source) rests on it.
    rng = np.random.default_rng(5)
    x0, y0 = rng.uniform(200, 600, 40), rng.uniform(150, 450, 40)
    lam0 = rng.uniform(450.0, 800.0, 40)
    lam = rng.uniform(10.0, 300.0, 40)
    xl, yl = geo.spectrum_pixel(x0, y0, lam0)
    for order, sign in ((-1, -1.0), (1, 1.0)):
        xc, yc = geo.spectrum_pixel(xl, yl, lam, order)
        xe, ye = geo.spectrum_pixel(x0, y0, lam0 + sign * lam)
        ok = np.isfinite(xc) & np.isfinite(xe)
        assert ok.sum() > 20
        assert np.max(np.hypot(xc - xe, yc - ye)[ok]) < ROUND_TRIP_PX


def test_zeroth_order_is_order_zero():
    geo = GEOMETRIES[1]
    x, y = geo.spectrum_pixel(320.0, 240.0, 600.0, order=0)
    assert_allclose([x, y], [320.0, 240.0], atol=ROUND_TRIP_PX)


def test_broadcasting_frames_against_wavelengths():
    geo = GEOMETRIES[0]
    x0 = np.array([500.0, 600.0, 700.0])
    lam = np.linspace(400.0, 800.0, 7)[:, None]
    x, y = geo.spectrum_pixel(x0, 480.0, lam)
    assert x.shape == (7, 3) and y.shape == (7, 3)
    x1, _ = geo.spectrum_pixel(600.0, 480.0, lam[:, 0])
    assert_allclose(x[:, 1], x1, atol=1e-12)


def test_invalid_lens_values_rejected():
    with pytest.raises(ValueError, match="projection"):
        LensModel("fisheye", 100.0, 0.0, 0.0)
    with pytest.raises(ValueError, match="focal_px"):
        LensModel("equidistant", 0.0, 0.0, 0.0)


def test_component_normalisation_is_the_vector_one_to_the_last_bit():
    # The curve evaluations normalise directions held as three component arrays; their
    # results stay bit-identical to the (..., 3) form only if (x*x + y*y) + z*z is the order
    # numpy's sum over a length-3 last axis takes. Magnitudes over 16 decades expose any
    # other summation order.
    from meteorspec.optics import _normalise, _unit_components
    rng = np.random.default_rng(11)
    for shape in [(3,), (200, 3), (3, 40, 3), (5, 1, 7, 3)]:
        v = rng.normal(size=shape) * 10.0 ** rng.integers(-8, 8, size=shape)
        got = np.stack(_unit_components(v[..., 0], v[..., 1], v[..., 2]), axis=-1)
        assert np.array_equal(got, _normalise(v))


@pytest.mark.parametrize("geo", GEOMETRIES, ids=[g.lens.projection for g in GEOMETRIES])
def test_locate_equals_newton_on_public_curve_evaluations(geo):
    # locate batches lambda, lambda + h, lambda - h in one call and splits the source's
    # direction once; the result must equal, to the last bit, the same Newton steps written
    # with separate public calls (central difference with the class's step), and every
    # element must equal its own single-point call (the batching mixes no elements).
    rng = np.random.default_rng(12)
    x0 = rng.uniform(100, 700, 40)
    y0 = rng.uniform(100, 500, 40)
    xs, ys = geo.spectrum_pixel(x0, y0, rng.uniform(380.0, 850.0, 40))
    x, y = xs + rng.normal(0, 3, 40), ys + rng.normal(0, 3, 40)
    h = geo._DLAM_NM
    lam_ref = geo.locate(x0, y0, x, y, iterations=0)[0]  # the exact start (tested above)
    for _ in range(4):
        xc, yc = geo.spectrum_pixel(x0, y0, lam_ref)
        xp, yp = geo.spectrum_pixel(x0, y0, lam_ref + h)
        xm, ym = geo.spectrum_pixel(x0, y0, lam_ref - h)
        dx, dy = (xp - xm) / (2 * h), (yp - ym) / (2 * h)
        lam_ref = lam_ref + ((x - xc) * dx + (y - yc) * dy) / (dx * dx + dy * dy)
    xc, yc = geo.spectrum_pixel(x0, y0, lam_ref)
    tx, ty = geo.direction(x0, y0, lam_ref)
    off_ref = (x - xc) * (-ty) + (y - yc) * tx
    lam, off = geo.locate(x0, y0, x, y)
    assert np.array_equal(lam, lam_ref, equal_nan=True)
    assert np.array_equal(off, off_ref, equal_nan=True)
    for k in range(0, 40, 7):
        one = geo.locate(x0[k], y0[k], x[k], y[k])
        assert one[0] == lam[k] or np.isnan(lam[k]) and np.isnan(one[0])
        assert np.array_equal(geo.direction(x0[k], y0[k], lam[k]),
                              (geo.direction(x0, y0, lam)[0][k], geo.direction(x0, y0, lam)[1][k]), equal_nan=True)


@pytest.mark.parametrize("geo", GEOMETRIES, ids=[g.lens.projection for g in GEOMETRIES])
def test_groove_density_scales_every_wavelength_by_the_same_factor(geo):
    # Grating equation (contract 2.2; Fraunhofer's, common practice): the diffracted direction
    # cosines move by m * lambda * G, so a groove density (1 + s) times larger puts lambda where
    # the old one put lambda (1 + s), on every curve and at every wavelength, whatever the lens
    # and tilt. The pipeline's station-fallback scale correction (pipeline.scaled_solution)
    # rests on this.
    rng = np.random.default_rng(8)
    x0, y0 = rng.uniform(150, 650, 40), rng.uniform(150, 450, 40)
    lam = rng.uniform(380.0, 800.0, 40)
    for s in (-0.03, 0.021):
        scaled = geo.with_grating(grooves_per_mm=geo.grating.grooves_per_mm * (1.0 + s))
        x1, y1 = scaled.spectrum_pixel(x0, y0, lam)
        x2, y2 = geo.spectrum_pixel(x0, y0, lam * (1.0 + s))
        ok = np.isfinite(x1) & np.isfinite(x2)
        assert ok.sum() > 20
        assert np.max(np.hypot(x1 - x2, y1 - y2)[ok]) < ROUND_TRIP_PX
