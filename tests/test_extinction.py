"""Tests of meteorspec.extinction against published formulas and geometry checkable by hand."""

from dataclasses import dataclass

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec.config import Pointing
from meteorspec.extinction import (ExtinctionModel, airmass_kasten_young, camera_to_horizon,
                                   extinction_correction, pixel_altaz, pressure_at_elevation_hpa,
                                   rayleigh_optical_depth_bucholtz, transmission)
from meteorspec.optics import LensModel


def test_kasten_young_zenith_and_horizon():
    # Kasten & Young (1989, Appl. Opt. 28, 4735) eq. 3 gives 0.99971 at the zenith (the
    # fit, not exactly 1) and 37.92 at the horizon (their ray-traced table says 38.09; both
    # from memory of the paper). Tolerances: 1e-5 and 0.05 (the printed precision).
    assert_allclose(airmass_kasten_young(90.0), 0.99971, atol=1e-5)
    assert_allclose(airmass_kasten_young(0.0), 37.92, atol=0.05)


def test_kasten_young_plane_parallel_limit():
    # Above ~30 deg the atmosphere is nearly plane-parallel: X ~ 1/sin(h) within 0.5 %
    # (common practice; the curvature correction at 30 deg is ~0.3 %).
    h = np.array([30.0, 45.0, 60.0, 75.0])
    assert_allclose(airmass_kasten_young(h), 1 / np.sin(np.radians(h)), rtol=5e-3)
    # below the horizon there is no airmass
    assert np.isnan(airmass_kasten_young(-1.0))


def test_bucholtz_rayleigh_550nm_sea_level():
    # Bucholtz (1995, Appl. Opt. 34, 2765): vertical Rayleigh optical depth ~0.097 at 550 nm
    # for the US Standard Atmosphere at sea level (from the paper, as remembered; 1 % tolerance).
    assert_allclose(rayleigh_optical_depth_bucholtz(550.0), 0.097, rtol=1e-2)


def test_bucholtz_sets_join_and_scale():
    # the two coefficient sets meet at 500 nm (within 0.1 %), tau falls roughly as lambda^-4,
    # and the depth scales with the surface pressure (column of air)
    lo, hi = rayleigh_optical_depth_bucholtz([499.999, 500.001])
    assert_allclose(lo, hi, rtol=1e-3)
    t400, t800 = rayleigh_optical_depth_bucholtz([400.0, 800.0])
    assert 14 < t400 / t800 < 20  # 2^4 = 16 plus the dispersion of the refractive index
    assert_allclose(rayleigh_optical_depth_bucholtz(550.0, 506.625), 0.5 * rayleigh_optical_depth_bucholtz(550.0))


def test_pressure_standard_atmosphere():
    # ISO 2533: 898.7 hPa at 1000 m, 795.0 hPa at 2000 m (handbook table values, from memory)
    assert_allclose(pressure_at_elevation_hpa(1000.0), 898.75, atol=0.5)
    assert_allclose(pressure_at_elevation_hpa(2000.0), 795.0, atol=0.5)


def test_transmission_ranges():
    model = ExtinctionModel()
    t = transmission(np.array([400.0, 550.0, 800.0]), 90.0, model=model)
    assert np.all((t > 0) & (t < 1)) and t[0] < t[1] < t[2]  # blue is lost more
    assert_allclose(transmission(550.0, 90.0, model=model),
                    np.exp(-airmass_kasten_young(90.0) * model.optical_depth(550.0)))
    assert transmission(550.0, 10.0) < transmission(550.0, 60.0)


LENS = LensModel("equidistant", 700.0, 359.5, 287.5)


@pytest.mark.parametrize("alt,az", [(40.0, 95.0), (90.0, 0.0), (60.0, 330.0), (10.0, 200.0)])
def test_optical_axis_maps_to_pointing(alt, az):
    a, z = pixel_altaz(LENS, Pointing(alt, az, 0.0), LENS.cx, LENS.cy)
    assert_allclose(a, alt, atol=1e-9)
    if alt < 90:
        assert_allclose(z, az, atol=1e-9)


def test_plus_y_runs_down_the_meridian_for_roll_zero():
    # contract section 3: roll 0 = image +y "down the meridian": moving along +y lowers the
    # altitude at the same azimuth; along x the altitude stays (to first order).
    p = Pointing(40.0, 95.0, 0.0)
    alt, az = pixel_altaz(LENS, p, LENS.cx, LENS.cy + np.array([50.0, 100.0]))
    assert_allclose(az, 95.0, atol=1e-9)
    assert_allclose(alt, 40.0 - np.degrees(np.array([50.0, 100.0]) / 700.0), atol=1e-9)  # equidistant
    alt_x, az_x = pixel_altaz(LENS, p, LENS.cx + 1.0, LENS.cy)
    assert abs(alt_x - 40.0) < 1e-4 and az_x > 95.0  # facing east, right is south: azimuth grows


def test_roll_turns_y_axis_and_rotation_is_proper():
    r = camera_to_horizon(Pointing(30.0, 10.0, 25.0))
    assert_allclose(r.T @ r, np.eye(3), atol=1e-12)
    assert_allclose(np.linalg.det(r), 1.0, atol=1e-12)
    r0 = camera_to_horizon(Pointing(30.0, 10.0, 0.0))
    assert_allclose(r[:, 2], r0[:, 2], atol=1e-12)  # roll keeps the optical axis
    assert_allclose(np.degrees(np.arccos(r[:, 1] @ r0[:, 1])), 25.0, atol=1e-9)


@dataclass(frozen=True)
class _Spec:
    wavelength_nm: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    mask: np.ndarray


@dataclass(frozen=True)
class _Frames:
    wavelength_nm: np.ndarray
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    flags: tuple = ()


def test_extinction_correction_undoes_transmission():
    wl = np.linspace(390.0, 850.0, 47)
    true = np.ones_like(wl)
    alt = 25.0
    obs = true * transmission(wl, alt)
    spec = _Spec(wl, obs, 0.01 * obs, np.zeros(wl.size, bool))
    out, flags = extinction_correction(spec, alt)
    assert_allclose(out.flux, true, rtol=1e-12)
    assert flags == ("extinction_corrected",)
    frames = _Frames(wl, np.vstack([obs, obs]), np.ones((2, wl.size)), np.zeros((2, wl.size), bool))
    out2, flags2 = extinction_correction(frames, np.array([alt, -5.0]))
    assert_allclose(out2.flux[0], true, rtol=1e-12)
    assert np.all(out2.mask[1]) and "below_horizon" in flags2 and "extinction_corrected" in out2.flags
