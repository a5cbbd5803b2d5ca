"""Tests of the wavelength and flux calibration (meteorspec.calibrate, meteorspec.wavesol).

Line positions come from :class:`SpectralGeometry` (the contract's optics, itself tested
against external references in test_optics.py); lab wavelengths from the NIST line list.
"""

import math
import tomllib
from dataclasses import dataclass
from types import SimpleNamespace

import numpy as np
import pytest
from astropy import units as u
from astropy.modeling.physical_models import BlackBody
from numpy.testing import assert_allclose
from scipy import ndimage

from meteorspec import atomic
from meteorspec import calibrate as cal
from meteorspec.calibrate import (apply_response, calibrate_event, calibrate_night, derive_response,
                                  fit_geometry, meteor_template)
from meteorspec.config import ResponseCurve, load_station
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.wavesol import LineMeasurements

# the demo all-sky camera (QM02): equisolid, f = 355 px, 600 grooves/mm, tilted grating
ALLSKY = SpectralGeometry(LensModel("equisolid", 355.0, 511.5, 512.0, 0.008),
                          GratingModel(600.0, -15.0, 0.8, 120.0))
# the wide-field camera (QM01 binned 2x2): rectilinear, f = 575 px
WIDE = SpectralGeometry(LensModel("rectilinear", 575.0, 320.1, 238.9, -0.012),
                        GratingModel(600.0, 4.0, 1.5, 30.0))
# bright meteor features (NIST air wavelengths, nm): Ca II K, Ca I, Mg I b2, Na I D2, O I, O I
LABS_NM = np.array([393.366, 422.673, 517.268, 588.995, 777.194, 844.636])


def _track_allsky(n, off_axis_deg=(20.0, 70.0)):
    th = np.radians(np.linspace(*off_axis_deg, n))
    ph = np.radians(200.0) + th / 3
    uvec = np.stack([np.sin(th) * np.cos(ph), np.sin(th) * np.sin(ph), np.cos(th)], -1)
    return ALLSKY.lens.direction_to_pixel(uvec)


def _measurements(geo, x0, y0, labs, *, sigma_px, rng):
    X0, Y0 = np.repeat(x0, labs.size), np.repeat(y0, labs.size)
    L = np.tile(labs, x0.size)
    xs, ys = geo.spectrum_pixel(X0, Y0, L)
    tx, ty = geo.direction(X0, Y0, L)
    a, c = rng.normal(0, sigma_px, (2, L.size))
    ok = np.isfinite(xs)
    return LineMeasurements(
        event=np.full(L.size, "E1"), frame=np.repeat(np.arange(x0.size), labs.size), x0_px=X0, y0_px=Y0,
        x_px=xs + a * tx - c * ty, y_px=ys + a * ty + c * tx, lab_nm=L, species=np.full(L.size, "X"),
        tangent_x=tx, tangent_y=ty, sigma_along_px=np.full(L.size, sigma_px),
        sigma_cross_px=np.full(L.size, sigma_px)).select(ok)


@pytest.mark.parametrize("dg,da,dt", [(0.03, 4.0, 2.0), (-0.03, -4.0, -0.8), (0.02, -3.0, 2.0)])
def test_fit_recovers_allsky_geometry_to_70_deg(dg, da, dt):
    # positions with 0.1 px noise along a track 20-70 deg off axis; start from a station file
    # wrong by the issue's +-3 % grooves, +-4 deg angle, +-2 deg tilt
    rng = np.random.default_rng(1)
    x0, y0 = _track_allsky(30)
    m = _measurements(ALLSKY, x0, y0, LABS_NM, sigma_px=0.1, rng=rng)
    g = ALLSKY.grating
    start = ALLSKY.with_grating(grooves_per_mm=g.grooves_per_mm * (1 + dg),
                                dispersion_angle_deg=g.dispersion_angle_deg + da,
                                tilt_deg=abs(g.tilt_deg + dt))
    fit = fit_geometry(m, start)
    assert fit
    # acceptance of issue 4: 0.3 % grooves, 0.3 deg angle; noise alone allows far less
    assert abs(fit.values["grooves_per_mm"] / 600.0 - 1) < 0.003 / 3
    assert abs(fit.values["dispersion_angle_deg"] + 15.0) < 0.1
    # the stated 1-sigma errors are honest: truth within 4 sigma
    assert abs(fit.values["grooves_per_mm"] - 600.0) < 4 * fit.errors["grooves_per_mm"] + 1e-6
    wl = np.linspace(390.0, 850.0, 24)
    xs, ys = ALLSKY.spectrum_pixel(x0[:, None], y0[:, None], wl)
    lam, _ = fit.geometry.locate(x0[:, None], y0[:, None], xs, ys)
    err = np.abs(lam - wl)[np.isfinite(lam)]
    assert np.median(err) < 0.5 and err.max() < 1.0


def test_fit_with_lens_terms_and_outliers():
    rng = np.random.default_rng(2)
    x0, y0 = _track_allsky(30, (5.0, 70.0))
    m = _measurements(ALLSKY, x0, y0, LABS_NM, sigma_px=0.1, rng=rng)
    # three gross misidentifications must be rejected, not bend the fit
    x = np.array(m.x_px)
    x[[3, 50, 100]] += 15.0
    m = LineMeasurements(**{**{f: getattr(m, f) for f in m.__dataclass_fields__}, "x_px": x})
    start = ALLSKY.with_lens(focal_px=362.0, k1=0.0).with_grating(grooves_per_mm=612.0)
    fit = fit_geometry(m, start, fit_lens=True)
    assert not fit.used[[3, 50, 100]].any()
    assert_allclose(fit.values["focal_px"], 355.0, rtol=2e-3)
    assert_allclose(fit.values["grooves_per_mm"], 600.0, rtol=2e-3)


# --------------------------------------------------------------------------- image-level


@dataclass(frozen=True, eq=False)
class _Frame:
    index: int
    signal: np.ndarray
    saturated: np.ndarray
    y_start_px: int = 0
    y_step_px: int = 1


class _FlatBackground:
    """Zero sky, Gaussian read noise: residual = signal."""

    def __init__(self, sigma):
        self.sigma = sigma

    def residual(self, frame):
        return frame.signal.astype(np.float32)

    def variance(self, frame, residual=None):
        return np.full(frame.signal.shape, self.sigma**2, np.float32)


def _render_event(geo, x0, y0, *, shape=(480, 640), peak=400.0, noise=1.0, seed=0, psf=1.3, emission=None,
                  step_nm=0.25, peak_of_image=False):
    """Frames holding a first-order spectrum at every zeroth order: ``emission(wl)`` (default the
    meteor template) scaled so that its maximum (or, with ``peak_of_image``, the image's) is ``peak``."""
    rng = np.random.default_rng(seed)
    wl = np.arange(360.0, 900.0, step_nm)
    spec = meteor_template(wl, 0.3) if emission is None else emission(wl)
    frames = []
    for k, (x, y) in enumerate(zip(x0, y0)):
        xs, ys = geo.spectrum_pixel(x, y, wl)
        ok = np.isfinite(xs) & (xs > 0) & (xs < shape[1] - 1) & (ys > 0) & (ys < shape[0] - 1)
        img, _, _ = np.histogram2d(ys[ok], xs[ok], bins=shape, range=[[-0.5, shape[0] - 0.5], [-0.5, shape[1] - 0.5]],
                                   weights=spec[ok])
        img = ndimage.gaussian_filter(img, psf) * peak / max(img.max() if peak_of_image else spec.max(), 1e-30)
        img += rng.normal(0, noise, shape)
        frames.append(_Frame(k, img.astype(np.float32), np.zeros(shape, bool)))
    # the frames are rendered without motion smear: a track whose exposures are short against
    # the frame interval (1 ms of 40 ms) says so to the calibrator, which models the smear
    t = (np.arange(len(x0)) + 0.5) / 25.0
    xa, ya = np.asarray(x0, float), np.asarray(y0, float)

    def position(time_s):
        return np.interp(time_s, t, xa), np.interp(time_s, t, ya)

    track = SimpleNamespace(x_px=xa, y_px=ya, psf_sigma_px=psf, flux_adu=np.ones(len(x0)), time_s=t,
                            exposure_s=1e-3, position=position)
    return frames, track


@pytest.mark.parametrize("dg,da,dt", [(0.03, 4.0, 2.0), (-0.03, -4.0, 0.0), (0.0, 3.0, -1.5)])
def test_calibrate_event_from_wrong_station_values(dg, da, dt):
    # a meteor crossing the wide-field camera; the station file is off by the bounds
    n = 12
    x0 = np.linspace(60.0, 220.0, n)
    y0 = np.linspace(300.0, 200.0, n)
    frames, track = _render_event(WIDE, x0, y0)
    g = WIDE.grating
    station = WIDE.with_grating(grooves_per_mm=g.grooves_per_mm * (1 + dg),
                                dispersion_angle_deg=g.dispersion_angle_deg + da, tilt_deg=g.tilt_deg + dt)
    sol = calibrate_event(frames, _FlatBackground(1.0), track, station, n_bins=4)  # 4 bins: test time
    assert sol.source == "event", sol.flags
    assert type(sol.geometry.lens) is LensModel  # the internal direction memo does not leave the module
    assert abs(sol.values["grooves_per_mm"] / 600.0 - 1) < 0.003
    assert abs(sol.values["dispersion_angle_deg"] - 4.0) < 0.3
    assert sol.n_lines >= 3 and np.isfinite(sol.rms_nm)
    attrs = sol.to_attrs()
    for key in ("grooves_per_mm", "dispersion_angle_deg", "tilt_deg", "tilt_azimuth_deg", "focal_px",
                "rms_nm", "n_lines", "grooves_per_mm_err"):
        assert key in attrs


def test_fallback_to_station_with_too_few_lines():
    n = 8
    x0 = np.linspace(60.0, 220.0, n)
    y0 = np.linspace(300.0, 200.0, n)
    frames, track = _render_event(WIDE, x0, y0, peak=0.0)  # noise only: no lines
    sol = calibrate_event(frames, _FlatBackground(1.0), track, WIDE.with_grating(grooves_per_mm=610.0))
    assert sol.source == "station"
    assert "calibration_from_station" in sol.flags
    assert sol.values["grooves_per_mm"] == 610.0 and sol.n_lines == 0
    assert np.isnan(sol.errors["grooves_per_mm"])
    empty = SimpleNamespace(x_px=np.full(n, np.nan), y_px=np.full(n, np.nan))
    assert calibrate_event(frames, _FlatBackground(1.0), empty, WIDE).source == "station"
    # a spectrum coarser than the limit (WIDE has ~2.6 nm/px at 589 nm) is not refined
    coarse = calibrate_event(frames, _FlatBackground(1.0), track, WIDE, max_dispersion_nm_per_px=2.0)
    assert coarse.source == "station" and "calibration_unresolved" in coarse.flags


# --------------------------------------------------------------------------- response


@dataclass(frozen=True)
class _Spec:
    wavelength_nm: np.ndarray
    bin_width_nm: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    mask: np.ndarray


def _resp(wl):
    return np.exp(-0.5 * ((wl - 560.0) / 140.0) ** 2)  # smooth invented system response


def test_apply_response_divides_masks_and_flags():
    wl = np.linspace(350.0, 900.0, 56)
    curve = ResponseCurve(np.linspace(380.0, 880.0, 51), _resp(np.linspace(380.0, 880.0, 51)), path=None)
    spec = _Spec(wl, np.gradient(wl), _resp(wl) * 10.0, _resp(wl), np.zeros(wl.size, bool))
    out, flags = apply_response(spec, curve)
    inside = (wl >= 380.0) & (wl <= 880.0)
    assert_allclose(out.flux[inside], 10.0, rtol=2e-3)  # linear interpolation of a smooth curve
    assert np.all(out.mask[~inside]) and np.all(np.isnan(out.flux[~inside]))
    assert flags == ("response_corrected", "response_partial")
    same, flags = apply_response(spec, None)
    assert same is spec and flags == ("uncalibrated_flux",)


def test_derive_response_from_black_body_star():
    # A 9500 K star (an A0 dwarf, common practice) seen through the invented response with
    # 1 % noise; the recovered curve must match within 2 % (5 x the noise averaged over the
    # 25-nm smoothing kernel, plus the smoothing bias of the curvature, < 0.5 %).
    rng = np.random.default_rng(5)
    wl = np.arange(380.0, 880.0, 2.0)
    # the star's energy flux per nm, from astropy's BlackBody (an independent Planck law)
    bb = BlackBody(temperature=9500 * u.K, scale=1.0 * u.Unit("W m-2 nm-1 sr-1"))
    star = bb(wl * u.nm).to_value(u.Unit("W m-2 nm-1 sr-1"), u.spectral_density(wl * u.nm))
    obs = star * _resp(wl) * 1e12
    spec = _Spec(wl, np.full(wl.size, 2.0), obs * (1 + 0.01 * rng.normal(size=wl.size)), 0.01 * obs,
                 np.zeros(wl.size, bool))
    der = derive_response(spec, 9500.0)
    truth = _resp(der.wavelength_nm) / _resp(der.wavelength_nm).max()
    inner = (der.wavelength_nm > 420) & (der.wavelength_nm < 840)  # edges: one-sided kernel
    assert_allclose(der.response[inner], truth[inner], rtol=0.02)
    curve = der.to_curve()
    out, _ = apply_response(spec, curve)
    ratio = out.flux / star
    ok = np.isfinite(ratio) & (wl > 420) & (wl < 840)
    assert np.std(ratio[ok]) / np.mean(ratio[ok]) < 0.02  # flux now follows the star's shape


def test_planck_peak_obeys_wien():
    # Wien's displacement constant b = 2.897771955e-3 m K (CODATA 2018): the response
    # derivation divides by atomic.planck_radiance, whose peak must sit at b / T.
    for t in (3500.0, 5772.0, 9500.0):
        wl = np.linspace(200.0, 1200.0, 200001)
        peak = wl[np.argmax(atomic.planck_radiance(wl, t))]
        assert_allclose(peak, 2.897771955e-3 / t * 1e9, atol=0.01)


def test_derived_response_csv_round_trip(tmp_path):
    wl = np.arange(380.0, 880.0, 2.0)
    obs = atomic.planck_radiance(wl, 6000.0) * _resp(wl)
    spec = _Spec(wl, np.full(wl.size, 2.0), obs, 1e-3 * obs, np.zeros(wl.size, bool))
    der = derive_response(spec, 6000.0)
    path = der.write_csv(tmp_path / "R.csv")
    from meteorspec.config import load_response
    back = load_response(path)
    assert_allclose(back.response, der.response, rtol=1e-5)
    with pytest.raises(FileExistsError):
        der.write_csv(path)


# --------------------------------------------------------------------------- night


def test_calibrate_night_writes_beside_and_never_overwrites(tmp_path):
    from meteorspec.calibrate import _solution_from_fit
    text = (
        "# demo station\n[station]\nid = \"QX9\"\n\n[camera]\nwidth = 1024\nheight = 1024\nbit_depth = 8\n"
        "gamma = 1.0\nsaturation_adu = 255\ninterlaced = false\n\n[lens]\nprojection = \"equisolid\"\n"
        "focal_px = 355.0\ncx = 511.5\ncy = 512.0\nk1 = 0.008\n\n[grating]\ngrooves_per_mm = 612.0  # nominal\n"
        "dispersion_angle_deg = -13.0\ntilt_deg = 0.0\ntilt_azimuth_deg = 0.0\norders = [1]\n")
    path = tmp_path / "QX9.toml"
    path.write_text(text)
    station = load_station(path)
    rng = np.random.default_rng(3)
    sols = []
    for k, band in enumerate([(10.0, 40.0), (30.0, 70.0)]):
        x0, y0 = _track_allsky(15, band)
        m = _measurements(ALLSKY, x0, y0, LABS_NM, sigma_px=0.1, rng=rng)
        m = LineMeasurements(**{**{f: getattr(m, f) for f in m.__dataclass_fields__},
                                "event": np.full(len(m), f"EV{k}")})
        fit = fit_geometry(m, SpectralGeometry.from_station(station))
        sols.append(_solution_from_fit(fit, m, "event"))
    night = calibrate_night(sols, station, fit_lens=False, date="20261114")
    assert night.path == tmp_path / "QX9.refined-20261114.toml"
    assert path.read_text() == text  # the old file is untouched
    refined = load_station(night.path)
    assert_allclose(refined.grating.grooves_per_mm, 600.0, rtol=1e-3)
    assert_allclose(refined.grating.dispersion_angle_deg, -15.0, atol=0.05)
    assert "# nominal" in night.path.read_text()  # comments kept
    again = calibrate_night(sols, station, fit_lens=False, date="20261114")
    assert again.path.name == "QX9.refined-20261114-2.toml"
    assert "EV0" in night.report() and set(night.per_event) == {"EV0", "EV1"}
    with pytest.raises(ValueError, match="no event"):
        calibrate_night([], station)


def test_refined_file_in_another_folder_finds_the_same_response(tmp_path):
    from meteorspec.calibrate import _solution_from_fit, write_refined_station
    text = (
        "[station]\nid = \"QX8\"\n\n[camera]\nwidth = 1024\nheight = 1024\nbit_depth = 8\ngamma = 1.0\n"
        "saturation_adu = 255\ninterlaced = false\n\n[lens]\nprojection = \"equisolid\"\nfocal_px = 355.0\n"
        "cx = 511.5\ncy = 512.0\n\n[grating]\ngrooves_per_mm = 612.0\ndispersion_angle_deg = -13.0\n\n"
        "[response]\nfile = \"curves/QX8 response.csv\"  # measured on a star\n")
    (tmp_path / "stations" / "curves").mkdir(parents=True)
    (tmp_path / "stations" / "curves" / "QX8 response.csv").write_text(
        "wavelength_nm,response\n400.0,0.5\n500.0,1.0\n600.0,0.8\n")
    path = tmp_path / "stations" / "QX8.toml"
    path.write_text(text)
    station = load_station(path)
    rng = np.random.default_rng(5)
    x0, y0 = _track_allsky(15, (10.0, 40.0))
    m = _measurements(ALLSKY, x0, y0, LABS_NM, sigma_px=0.1, rng=rng)
    sol = _solution_from_fit(fit_geometry(m, SpectralGeometry.from_station(station)), m, "event")
    for out_dir in (tmp_path / "refined", None):  # elsewhere, and beside the original
        if out_dir is not None:
            out_dir.mkdir()
        refined = load_station(write_refined_station(station, sol, date="20261205", out_dir=out_dir))
        assert refined.response.path.resolve() == station.response.path.resolve()
        assert_allclose(refined.response.response, station.response.response)
    assert "# measured on a star" in (tmp_path / "refined" / "QX8.refined-20261205.toml").read_text()


# --------------------------------------------------------------------------- simulator


@pytest.mark.slow
@pytest.mark.parametrize("name,dg,da,dt", [
    ("bright_normal", 0.03, 4.0, 2.0),   # motion nearly along the dispersion: lines smeared ~20 nm
    ("interlaced_pal", -0.02, -3.0, 1.0),
])
def test_simulated_event_self_calibrates(tmp_path, name, dg, da, dt):
    # The small version of bench/bench_calibration.py: a simulator event whose station file is
    # written wrong; the zeroth-order positions are the simulator's (the tracker is tested
    # elsewhere), everything else runs as in the pipeline. Tolerances: the acceptance.
    import dataclasses
    import json

    from meteorspec.background import estimate_background
    from meteorspec.config import load_event
    from meteorspec.simulate import SAMPLE_SPECS, simulate_event
    from meteorspec.video import read_stack

    spec = dataclasses.replace(SAMPLE_SPECS[name], delta_grooves_frac=dg, delta_dispersion_deg=da,
                               delta_tilt_deg=dt)
    simulate_event(spec, tmp_path / "ev", truth_dir=tmp_path / "truth")
    event = load_event(tmp_path / "ev" / spec.event_id(spec.true_station().id))
    station = load_station(tmp_path / "ev" / "stations" / f"{event.station}.toml")
    truth = json.loads((tmp_path / "truth" / f"{event.id}.json").read_text())
    stack = read_stack(event, station)
    bg = estimate_background(stack, camera=station.camera, seed=0)
    fr = truth["frames"]
    lum = np.array(fr["energy_fraction"], float) > 0
    track = SimpleNamespace(x_px=np.where(lum, fr["x_mid_px"], np.nan), y_px=np.where(lum, fr["y_mid_px"], np.nan),
                            flux_adu=np.array(fr["energy_fraction"], float), psf_sigma_px=truth["psf_sigma_px"])
    sol = calibrate_event(stack, bg, track, SpectralGeometry.from_station(station), camera=station.camera)
    g = truth["geometry_true"]["grating"]
    assert sol.source == "event", sol.flags
    assert abs(sol.values["grooves_per_mm"] / g["grooves_per_mm"] - 1) < 0.003
    assert abs(sol.values["dispersion_angle_deg"] - g["dispersion_angle_deg"]) < 0.3


# --------------------------------------------------------------------------- feature centroids


def test_feature_centroids_from_nist_weights():
    # Na I D: D2 588.995 nm and D1 589.592 nm with gA in the ratio 2 : 1 (NIST ASD: g_k 4 and 2,
    # equal A_ki 6.16e7 and 6.14e7 s^-1) and upper levels 2.1 meV apart, so at 4500 K the
    # LTE-weighted centroid is (2 x 588.995 + 589.592) / 3 = 589.194 nm (energy per photon
    # differs by 0.1 %, the Boltzmann factors by 0.5 %: < 0.002 nm).
    from meteorspec.calibrate import feature_centroids
    cents = feature_centroids()
    assert cents["Na I D"][0] == "Na I"
    assert_allclose(cents["Na I D"][1], (2 * 588.995 + 589.592) / 3, atol=0.003)
    # O I 777 triplet, gA weighted: g_k 7, 5, 3 with equal A_ki 3.69e7 s^-1 (NIST ASD), so
    # (7 x 777.194 + 5 x 777.417 + 3 x 777.539) / 15 = 777.338 nm
    assert_allclose(cents["O I 777.4"][1], (7 * 777.194 + 5 * 777.417 + 3 * 777.539) / 15, atol=0.003)
    # a single line is its own centroid: Ca I 422.673 nm (NIST ASD)
    assert_allclose(cents["Ca I 422.7"][1], 422.673, atol=0.002)


def test_streaked_line_profile_has_unit_area_and_box_variance():
    # Gaussian (sigma) convolved with a box of length L: area 1 and variance sigma^2 + L^2 / 12
    # (variances of independent convolved kernels add; box variance L^2/12, common practice)
    from meteorspec.calibrate import _line_profile
    x = np.linspace(-40.0, 40.0, 80001)
    for sigma, box in ((0.5, 0.0), (0.7, 6.0), (1.2, 20.0)):
        p = _line_profile(x, sigma, box)
        dx = x[1] - x[0]
        assert_allclose(p.sum() * dx, 1.0, atol=1e-6)
        assert_allclose((p * x * x).sum() * dx, sigma**2 + box**2 / 12, rtol=1e-4)


def test_fit_holds_tilt_when_asked():
    # positions from one place in the field cannot tell a tilt from a groove density: with
    # fit_tilt=False the tilt stays at the prior's value and the groove density takes the rest
    rng = np.random.default_rng(4)
    x0, y0 = _track_allsky(1, (30.0, 30.0))
    m = _measurements(ALLSKY, x0, y0, LABS_NM, sigma_px=0.05, rng=rng)
    start = ALLSKY.with_grating(grooves_per_mm=610.0, tilt_deg=1.3)
    fit = fit_geometry(m, start, fit_tilt=False)
    assert fit
    assert_allclose(fit.values["tilt_deg"], 1.3, atol=1e-3)
    assert_allclose(fit.values["tilt_azimuth_deg"], 120.0, atol=1e-3)
    assert abs(fit.values["grooves_per_mm"] / 600.0 - 1) < 0.01  # the 0.5 deg tilt error costs < 1 %


def test_interp_columns_is_numpy_interp_bit_for_bit():
    # the line-window fit interpolates all its component profiles at once; it must give exactly
    # numpy.interp's numbers (reference: numpy), so that the speed-up changes no result
    from meteorspec.calibrate import _interp_columns
    rng = np.random.default_rng(3)
    for _ in range(20):
        xp = np.arange(rng.uniform(300.0, 400.0), 450.0, rng.uniform(0.01, 0.2))
        table = rng.normal(size=(xp.size, 6)) * rng.uniform(1e-3, 1e3)
        x = np.sort(rng.uniform(xp[0] - 1.0, xp[-1] + 1.0, 200))
        x[:3] = xp[[0, 7, -1]]  # nodes and both ends exactly
        shifts = rng.normal(size=5)
        ref = np.stack([np.stack([np.interp(x - s, xp, table[:, i]) for i in range(6)], axis=1) for s in shifts])
        np.testing.assert_array_equal(_interp_columns(x[None, :] - shifts[:, None], xp, table), ref)


def test_memo_lens_gives_the_lens_directions():
    # calibrate_event remembers zeroth-order directions; they must be the lens's own, for scalars,
    # arrays of any shape, repeated and interleaved calls (reference: LensModel.pixel_to_direction)
    from meteorspec.calibrate import _memo_geometry, _plain_geometry
    memo = _memo_geometry(ALLSKY)
    assert memo.lens != ALLSKY.lens and _plain_geometry(memo) == ALLSKY
    rng = np.random.default_rng(4)
    xa, ya = rng.uniform(100, 900, (7, 1)), rng.uniform(100, 900, (7, 1))
    for x, y in [(300.0, 400.0), (xa, ya), (xa, ya), (xa[:, 0], ya[:, 0]), (300.0, 400.0), (xa, ya)]:
        np.testing.assert_array_equal(memo.lens.pixel_to_direction(x, y), ALLSKY.lens.pixel_to_direction(x, y))
    lam = np.linspace(380.0, 880.0, 9)
    for got, want in zip(memo.spectrum_pixel(xa, ya, lam[None, :]), ALLSKY.spectrum_pixel(xa, ya, lam[None, :])):
        np.testing.assert_array_equal(got, want)


def _rows(lab_nm, species):
    n = len(lab_nm)
    z = np.zeros(n)
    return LineMeasurements(event=np.full(n, ""), frame=np.zeros(n, np.int64), x0_px=z, y0_px=z, x_px=z, y_px=z,
                            lab_nm=np.asarray(lab_nm, float), species=np.asarray(species), tangent_x=z + 1.0,
                            tangent_y=z, sigma_along_px=z + 0.1, sigma_cross_px=z + 0.1)


def test_blend_windows_anchor_a_first_fit_only_with_a_feature_and_a_long_reach():
    from meteorspec.calibrate import _windows_anchor

    wins = [396.0, 427.0, 447.0, 517.0, 613.0]
    names = [f"blend {w - 5:.0f}-{w + 5:.0f}" for w in wins]
    assert _windows_anchor(_rows(wins + [589.0], names + ["Na I"]))
    assert not _windows_anchor(_rows(wins, names))                        # no isolated feature
    assert not _windows_anchor(_rows(wins[:4] + [589.0], names[:4] + ["Na I"]))   # four windows
    short = [400.0, 420.0, 440.0, 460.0, 480.0]                           # 80 nm reach
    assert not _windows_anchor(_rows(short + [589.0], [f"blend {w:.0f}" for w in short] + ["Na I"]))


# --------------------------------------------------------------------------- frames lit in part


def _exposure_light(rate, lo):
    """Energy and light-weighted mean time of ``rate`` over the exposure ``[lo, lo + 1]`` (scipy quad)."""
    from scipy import integrate

    e = integrate.quad(rate, lo, lo + 1.0, limit=200)[0]
    return e, integrate.quad(lambda t: t * rate(t), lo, lo + 1.0, limit=200)[0] / e


def test_edge_frame_centre_of_a_rise_from_zero():
    from meteorspec.calibrate import _edge_centre_frac

    # light curves rising from nothing within the first exposure [-1/2, 1/2] (times in exposures);
    # the truth is the quadrature of the curve (scipy), independent of the model's closed form
    def power(t):
        return max(t - 0.1, 0.0) ** 2.3

    def gauss_cut(t):  # a Gaussian flight seen from where it passes a detection threshold
        return math.exp(-0.5 * ((t - 3.0) / 1.2) ** 2) if t > -0.3 else 0.0

    for rate, tol in ((power, 1e-4), (gauss_cut, 0.05)):
        (e0, c0), (e1, _), (e2, _) = (_exposure_light(rate, lo) for lo in (-0.5, 0.5, 1.5))
        got = _edge_centre_frac(e0, e1, e2)
        # a power-law rise is the model itself: exact to the solver's tolerance. Other shapes:
        # 0.05 exposures, 0.25 px of a 5 px streak, half the 0.5 nm the issue allows at
        # 2.5 nm/px (the linear light curve's 1/4 clip misses these by 0.16 and 0.05)
        assert abs(got - c0) < tol, (rate.__name__, got, c0)
    # light that does not rise into the flight: no estimate (the caller keeps its own)
    assert _edge_centre_frac(1.0, 1.0, 1.0) is None
    assert _edge_centre_frac(2.0, 1.0, 0.5) is None
    assert _edge_centre_frac(math.nan, 1.0, 2.0) is None


def test_cut_of_the_first_lit_frame_sits_at_its_light():
    from meteorspec.calibrate import _cuts

    # a meteor moving 6 px per exposure along x whose light rises as (t - t0)^2 from t0 = 0.2 of
    # the first lit exposure and falls linearly to nothing at 0.3 of the last (frames 2-21 lit,
    # contiguous exposures); the track, as an interpolated one, stops at the first and last lit
    # frames' middles
    n, lit = 24, np.arange(2, 22)
    t_mid = np.arange(n) + 0.5
    v_px = 6.0
    rate = lambda t: max(t - (2.0 + 0.2), 0.0) ** 2 * max(22.0 - 0.7 - t, 0.0)  # noqa: E731
    flux = np.zeros(n)
    centre = np.full(n, np.nan)
    for k in lit:
        flux[k], centre[k] = _exposure_light(rate, float(k))
    x = np.where(np.isin(np.arange(n), lit), 100.0 + v_px * t_mid, np.nan)
    y = np.where(np.isfinite(x), 20.0, np.nan)
    fps = 25.0

    def position(t_s):
        ok = np.isfinite(x)
        return np.interp(np.asarray(t_s) * fps, t_mid[ok], x[ok]), np.interp(np.asarray(t_s) * fps, t_mid[ok], y[ok])

    track = SimpleNamespace(x_px=x, y_px=y, flux_adu=flux, time_s=t_mid / fps, exposure_s=1.0 / fps,
                            position=position)
    frames = [_Frame(k, np.zeros((40, 300), np.float32), np.zeros((40, 300), bool)) for k in range(n)]
    cuts = {c.position: c for c in _cuts(frames, _FlatBackground(1.0), track, max_frames=40)}
    true_x = 100.0 + v_px * centre
    # first and last lit frames: at their light within 0.05 exposures (0.3 px; the model is the
    # curve's shape near each end, up to its other, slower factor; the tolerance of
    # test_edge_frame_centre_of_a_rise_from_zero); interior frames keep the linear light-curve
    # estimate, good to 0.1 px on this curve
    for k in (lit[0], lit[-1]):
        assert abs(cuts[k].x0_px - true_x[k]) < 0.05 * v_px, (k, cuts[k].x0_px, true_x[k])
    for k in lit[1:-1]:
        assert abs(cuts[k].x0_px - true_x[k]) < 0.1, (k, cuts[k].x0_px, true_x[k])
    # the old estimate (a linear light curve through the dark neighbour, clipped at 1/4 of the
    # half streak an interpolated track gives) was off by > 1 px
    assert abs(100.0 + v_px * t_mid[lit[0]] + 0.25 * 0.5 * v_px - true_x[lit[0]]) > 1.0


# --------------------------------------------------------------------------- acceptance of a fit


def test_free_tilt_is_judged_by_the_groove_density_it_leaves():
    from meteorspec.calibrate import _FEATURE_MAX_GROOVES_ERR, _grooves_error_frac

    rng = np.random.default_rng(7)

    def along_only(m):  # as measure_lines gives them: positions along the spectrum only
        return LineMeasurements(**{**{f: getattr(m, f) for f in m.__dataclass_fields__},
                                   "sigma_cross_px": np.full(len(m), np.inf)})

    start = ALLSKY.with_grating(grooves_per_mm=606.0, tilt_deg=1.8)
    # six features along a track 20-70 deg off axis fix tilt and groove density together (the
    # free fit's grooves 1-sigma ~0.02 %); three features from one place in the field cannot
    # tell a tilt from a groove density, and the free tilt leaves the grooves to ~0.7 %, beyond
    # the 0.3 % (the limit), while held it leaves them to ~0.05 %
    x0, y0 = _track_allsky(12)
    wide = fit_geometry(along_only(_measurements(ALLSKY, x0, y0, LABS_NM, sigma_px=0.1, rng=rng)), start)
    x1, y1 = _track_allsky(1, (30.0, 30.0))
    m1 = along_only(_measurements(ALLSKY, x1, y1, LABS_NM[[0, 3, 4]], sigma_px=0.1, rng=rng))
    one, one_held = fit_geometry(m1, start), fit_geometry(m1, start, fit_tilt=False)
    assert wide and one and one_held
    assert _grooves_error_frac(wide) < _FEATURE_MAX_GROOVES_ERR / 5
    assert _grooves_error_frac(one) > _FEATURE_MAX_GROOVES_ERR > 3 * _grooves_error_frac(one_held)


def test_isolated_misfit_allows_measurement_errors_but_not_a_wrong_match():
    from meteorspec.calibrate import _isolated_misfit

    rng = np.random.default_rng(8)
    x0, y0 = _track_allsky(6)
    labs = LABS_NM[[0, 2, 3, 4]]
    disp = ALLSKY.dispersion_nm_per_px(np.repeat(x0, labs.size), np.repeat(y0, labs.size), np.tile(labs, x0.size))
    for sigma_nm, ok in ((0.2, True), (1.5, True)):
        # positions scattered by their stated errors (0.2 nm: a bright event; 1.5 nm: a faint one,
        # which the plain 0.75 nm RMS limit rejected as a poor fit)
        m = _measurements(ALLSKY, x0, y0, labs, sigma_px=float(np.median(sigma_nm / disp)), rng=rng)
        m = LineMeasurements(**{**{f: getattr(m, f) for f in m.__dataclass_fields__},
                                "species": np.full(len(m), "Fe I")})
        fit = fit_geometry(m, ALLSKY, fit_tilt=False)
        rms, misfit = _isolated_misfit(fit, m, 0.75)
        assert (misfit <= 1.0) == ok, (sigma_nm, rms, misfit)
        if sigma_nm > 1.0:
            assert rms > 0.75  # the case the plain limit got wrong
            # on coarse spectra (allow_errors=False) the plain RMS limit still applies
            assert _isolated_misfit(fit, m, 0.75, allow_errors=False)[1] > 1.0
    # a feature taken for its neighbour 6 nm away in every frame, measured to 0.2 nm: its residuals
    # stay far beyond what its errors allow (held tilt, as for few features)
    m = _measurements(ALLSKY, x0, y0, labs, sigma_px=float(np.median(0.2 / disp)), rng=rng)
    lab = np.where(np.isclose(m.lab_nm, labs[1]), labs[1] + 6.0, m.lab_nm)
    m = LineMeasurements(**{**{f: getattr(m, f) for f in m.__dataclass_fields__}, "lab_nm": lab,
                            "species": np.full(len(m), "Fe I")})
    fit = fit_geometry(m, ALLSKY, fit_tilt=False, reject_sigma=1e9)
    assert _isolated_misfit(fit, m, 0.75)[1] > 1.0


def _wide_scene_station_off():
    """test_calibrate_event_from_wrong_station_values' first scene: frames, track, and the station
    geometry 3 % / 4 deg / 2 deg off the rendered one (WIDE)."""
    n = 12
    frames, track = _render_event(WIDE, np.linspace(60.0, 220.0, n), np.linspace(300.0, 200.0, n))
    g = WIDE.grating
    station = WIDE.with_grating(grooves_per_mm=g.grooves_per_mm * 1.03,
                                dispersion_angle_deg=g.dispersion_angle_deg + 4.0, tilt_deg=g.tilt_deg + 2.0)
    return frames, track, station


def test_a_fit_whose_features_are_lost_in_a_later_round_is_refused(monkeypatch):
    # The feature loop re-measures along each round's fitted curve with a narrower search (+-4,
    # +-2, +-1.2 nm). A round that no longer finds enough isolated features along that curve is
    # no confirmation of the fit it started from: the fit is dropped (calibration_few_lines) and
    # the whole-spectrum path decides, instead of the earlier round's fit being returned
    # unconfirmed. Seen on bench_calibration.py --allsky 8 --seed 7 event 001: a coarse-search
    # stretch 2 % off, fitted in round 1, found one isolated feature in round 2 and was kept 19 nm
    # off; refused, the whole-spectrum fit is 0.43 nm off. Here the loss is made: from the second
    # round on the isolated features are taken out of what measure_lines returns (the blend
    # windows stay) on the first scene of test_calibrate_event_from_wrong_station_values, which
    # refines from the event when left alone.
    frames, track, station = _wide_scene_station_off()
    real = cal.measure_lines
    rounds: list[tuple[int, int]] = []  # (isolated features measured, returned) per call

    def measure(*args, **kw):
        m = real(*args, **kw)
        n_found = cal._n_isolated(m)
        if rounds:
            m = m.select(cal._window_rows(m))
        rounds.append((n_found, cal._n_isolated(m)))
        return m

    monkeypatch.setattr(cal, "measure_lines", measure)
    sol = calibrate_event(frames, _FlatBackground(1.0), track, station, n_bins=4, whole_spectrum="off")
    # the premise: the first round anchored a fit on isolated features (>= min_lines, 3), so the
    # loop went on to a second round, which then returned none
    assert len(rounds) >= 2 and rounds[0][0] >= 3, rounds
    assert rounds[1][1] == 0
    assert sol.source == "station", sol.flags
    assert "calibration_few_lines" in sol.flags


@pytest.mark.parametrize("found_again_nm, confirmed", [((428.0, 518.0, 589.0, 657.0), True),
                                                       ((428.0, 518.0, 589.0), False)])
def test_a_windows_anchored_fit_is_kept_where_a_later_round_finds_its_windows_again(monkeypatch, found_again_nm,
                                                                                     confirmed):
    # A first fit may rest on blend windows at five or more wavelengths over 150 nm plus one
    # isolated feature (_windows_anchor). The next round searches +-2 nm along its curve instead of
    # +-4 nm; windows found again there at four wavelengths over 150 nm confirm the fit, which is
    # kept as fitted (seeded plasma_end_to_end.py --n 36 --seed 5 --modes perturbed, event 028:
    # windows at 589, 627, 682 and 745 nm found again; refused, the event fell back to the station
    # values 20 nm off). Three windows are no confirmation: the station values stay. The scene is
    # test_calibrate_event_from_wrong_station_values' first (station 3 % / 4 deg / 2 deg off), with
    # Na D the only isolated feature in every round; the truth is the geometry it was rendered with
    # (forward model), and the 0.3 % / 0.3 deg tolerances are the calibration's stated targets.
    frames, track, station = _wide_scene_station_off()
    g = WIDE.grating
    real = cal.measure_lines

    def measure(*args, **kw):
        m = real(*args, **kw)
        win = cal._window_rows(m)
        na_d = ~win & np.isclose(m.lab_nm, 589.2, atol=0.3)
        if kw.get("max_shift_nm") == 4.0:  # the first round: every window, Na D
            return m.select(win | na_d)
        if kw.get("max_shift_nm") in (2.0, 1.2):  # the later rounds: the windows found again, Na D
            return m.select((win & np.isin(np.round(m.lab_nm), found_again_nm)) | na_d)
        return m

    monkeypatch.setattr(cal, "measure_lines", measure)
    sol = calibrate_event(frames, _FlatBackground(1.0), track, station, n_bins=4, whole_spectrum="off")
    if confirmed:
        assert sol.source == "event", sol.flags
        assert abs(sol.values["grooves_per_mm"] / g.grooves_per_mm - 1) < 0.003
        assert abs(sol.values["dispersion_angle_deg"] - g.dispersion_angle_deg) < 0.3
    else:
        assert sol.source == "station" and "calibration_few_lines" in sol.flags, sol.flags
