"""How long a line's streak the extraction records in an exposure the meteor lights up inside.

meteorspec.extract records each frame's lines at the light's centroid within the exposure and
states the light's RMS spread in time there (``FrameSpectra.light_spread``, in exposures;
``1 / sqrt(12)`` for even light), from the light curve within the exposure that it fits
(``exp(b s)`` through the zeroth order's measured centroid in the first and last lit
exposures). The plasma fit of a subset of frames takes its lines' motion width from it
(meteorspec.pipeline.streak_share): a fireball measured from the exposure it lit up in draws a
far shorter streak there than a whole exposure's.

Against the simulator's truth: its light curve (meteorspec.simulate.scene.LightCurve.rate)
integrated over each exposure by Gauss-Legendre quadrature gives the true spread; the track is
the simulator's own (zeroth-order pixel at any time from its trajectory, the light's centroid
of each exposure as the tracker measures it), so the extraction alone is tested.
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
from numpy.testing import assert_allclose
import pytest

from meteorspec.background import estimate_background
from meteorspec.config import load_event, load_station
from meteorspec.extract import extract_spectra
from meteorspec.optics import SpectralGeometry
from meteorspec.simulate import EventSpec, render_event, simulate_event, true_geometry
from meteorspec.simulate.scene import make_light_curve
from meteorspec.video import read_stack

# An invented meteor on the base QM01 camera (25 fps, progressive, 40 ms exposures) that lights
# up three quarters into its third exposure (0.08-0.12 s), unsaturated
SPEC = EventSpec(station="QM01", video_form="fits", n_frames=20, meteor_start_s=0.11,
                 meteor_duration_s=0.5, start_px=(300.0, 200.0), direction_deg=200.0, speed_deg_s=15.0,
                 peak_energy_adu_s=1.5e5, n_stars=5, sky_adu=3.0, seed=70411)


def _true_spread(spec: EventSpec, time_s: float, exposure_s: float) -> tuple[float, float]:
    """Light-weighted mean (from the exposure's middle) and RMS spread of the light, in exposures."""
    x, w = np.polynomial.legendre.leggauss(200)
    r = make_light_curve(spec).rate(time_s + 0.5 * exposure_s * x) * w
    s = 0.5 * x
    mean = float(np.sum(r * s) / np.sum(r))
    return mean, float(np.sqrt(np.sum(r * s * s) / np.sum(r) - mean**2))


@pytest.fixture(scope="module")
def extracted(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("light_spread")
    sim = simulate_event(SPEC, tmp / "events", truth_dir=tmp / "truth")
    ev = load_event(sim.event_dir)
    station = load_station(sim.station_toml)
    truth = json.loads(sim.truth_json.read_text())
    stack = read_stack(ev, station)
    fr = truth["frames"]
    lum = np.array(fr["energy_fraction"], float) > 0
    traj = render_event(SPEC).trajectory
    track = SimpleNamespace(
        time_s=np.array(fr["time_s"], float), luminous=lum,
        x_px=np.where(lum, np.array(fr["x_mid_px"], float), np.nan),
        y_px=np.where(lum, np.array(fr["y_mid_px"], float), np.nan),
        x_meas_px=np.where(lum, np.array(fr["x_centroid_px"], float), np.nan),
        y_meas_px=np.where(lum, np.array(fr["y_centroid_px"], float), np.nan),
        flux_adu=np.array(fr["energy_fraction"], float), psf_sigma_px=truth["psf_sigma_px"],
        exposure_s=float(stack.exposure_s), position=lambda t: traj.pixel(np.asarray(t, float)))
    bg = estimate_background(stack, camera=station.camera, seed=0)
    geo = true_geometry(SpectralGeometry.from_station(station), truth)
    spectra = extract_spectra(stack, bg, track, geo, camera=station.camera)
    return SimpleNamespace(spectra=spectra, lum=lum, time_s=track.time_s, exposure_s=track.exposure_s)


@pytest.mark.parametrize("end", ["first", "last"])
def test_the_end_exposures_record_a_short_streak(extracted, end):
    lit = np.flatnonzero(extracted.lum)
    k = int(lit[0] if end == "first" else lit[-1])
    mean, spread = _true_spread(SPEC, float(extracted.time_s[k]), extracted.exposure_s)
    # the premise: the meteor lit up late in the first exposure, went out early in the last
    # (true spread well under even light's 0.289)
    assert abs(mean) > 0.25 and spread < 0.5 / np.sqrt(12.0)
    got = float(extracted.spectra.light_spread[k])
    # exp(b s) through the centroid has a tail beyond where the meteor lit up or went out,
    # which the true light has not: it overstates the spread (here 0.057 for 0.045 and 0.072 for
    # 0.052; by 0.02-0.04 exposures on starts 1/4, 1/2 and 5/8 into an exposure of another
    # seeded event), far less than even light would (0.289)
    assert spread - 0.01 < got < spread + 0.05, (got, spread)


def test_exposures_inside_the_flight_are_evenly_lit(extracted):
    # inside the flight the light changes little within an exposure: spread within 0.01 of the
    # truth (the log-quadratic through three exposures' energies, as their centroids)
    lit = np.flatnonzero(extracted.lum)
    for k in lit[2:-2]:
        _, spread = _true_spread(SPEC, float(extracted.time_s[k]), extracted.exposure_s)
        assert abs(float(extracted.spectra.light_spread[k]) - spread) < 0.01, k
    # unlit frames: even light (nothing known)
    assert np.all(extracted.spectra.light_spread[~extracted.lum] == pytest.approx(1.0 / np.sqrt(12.0)))


@pytest.mark.parametrize("share,own", [(1.0, False), (0.8, False), (0.25, True)])
def test_a_subset_fit_gets_its_frames_width_beyond_the_width_factors_reach(monkeypatch, share, own):
    # fit_unsaturated_frames: the plasma fit fits a factor on the FWHM it is given
    # (WIDTH_SCALE_BOUNDS, 0.6-1.6). The frames' own width, sqrt(psf^2 + share^2 (fwhm^2 - psf^2))
    # (widths add in quadrature, the streak scaled by streak_share), replaces the flight's only
    # where it lies below that range: here a 4 nm PSF in a 10 nm FWHM; share 0.8 gives 8.35 nm
    # (within reach: 10 nm given), share 0.25 gives 4.61 nm (< 6 nm: given). Round invented
    # widths; the FWHM the fit receives is recorded (the fit itself replaced).
    from meteorspec import pipeline
    from meteorspec.extract import FrameSpectra
    from meteorspec.plasma import WIDTH_SCALE_BOUNDS

    assert WIDTH_SCALE_BOUNDS == (0.6, 1.6)
    wl = np.arange(380.0, 880.0, 2.0)
    n = 2
    spectra = FrameSpectra(wl, np.full(wl.size, 2.0), np.ones((n, wl.size)), np.full((n, wl.size), 0.01),
                           np.zeros((n, wl.size), bool), np.array([0.1, 0.14]), (), np.array([1.0, 3.0]),
                           light_spread=np.full(n, share / np.sqrt(12.0)))
    seen = {}

    class _NoFit:
        reason = "replaced in the test"

        def __bool__(self):
            return False

    def fake_fit(whole, *, fwhm_nm, **kw):
        seen["fwhm_nm"] = np.asarray(fwhm_nm, float)
        return _NoFit()

    monkeypatch.setattr(pipeline, "fit_plasma", fake_fit)
    fwhm, psf = np.full(wl.size, 10.0), np.full(wl.size, 4.0)
    assert pipeline.fit_unsaturated_frames(spectra, fwhm_nm=fwhm, speed_km_s=None, psf_fwhm_nm=psf) is None
    expected = np.sqrt(16.0 + share**2 * 84.0) if own else 10.0
    assert_allclose(seen["fwhm_nm"], expected, rtol=1e-12)
