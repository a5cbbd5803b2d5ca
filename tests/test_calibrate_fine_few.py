"""The whole-spectrum fit on a faint fine spectrum where the feature method finds too few features.

meteorspec.calibrate._calibrate: below ``whole_spectrum_min_nm_per_px`` (3.5 nm/px at 589 nm) the
whole-spectrum fit (meteorspec.calfit) runs only where the feature method fell back with
``calibration_few_lines`` (or ``calibration_fit_poor``) after its coarse search chose a stretch,
and its solution is kept
(``calibration_whole_spectrum``) only within ``max_halves_nm`` (1.5 nm over 390-850 nm) of that
stretch; else the station values, flagged ``calibration_ambiguous``.

The event is the seeded simulator event 004 of ``bench/bench_calibration.py --n 20 --seed 5``
(a faint Na-rich meteor on the interlaced rectilinear camera QM03 at 2.8 nm/px, one isolated
feature, the station file written 2.2 % / 3.6 deg / 0.4 deg off in grooves, angle and tilt), with
the simulator's zeroth-order positions as the track (``--truth-track``: the tracker is tested
elsewhere). The truth is the geometry the simulator rendered with, whose lines come from the
NIST line list (meteorspec.atomic); tolerances are issue 4's acceptance (line positions 0.5 nm
median and 1.0 nm max over 390-850 nm).

Shrunk for test time: the calibrator reads the 10 brightest of the 24 lit fields
(``max_frames=10``; the bench reads all 24 in ~32 s of CPU, here ~17 s). Measured with it:
the feature method alone falls back with ``calibration_few_lines`` (station values 13.9 nm median,
19.0 nm max off), the whole-spectrum fit lies 0.48 nm from the features' stretch and is kept,
lines 0.40 nm median and 0.77 nm max. The event sits near the edge of the rule's premise: with
9, 11 or 14 fields the feature method refines by itself instead (line medians 1.1-2.1 nm), so the
premise is asserted before the rule's result.

The rule's exception: a whole-spectrum fit that freed the tilt and matches the spectrum to its
noise (reduced chi-square <= 2) stands on its own. Its event is the seeded simulator event 001 of
``bench/bench_calibration.py --n 30 --seed 4`` (saturated in its brightest fields, whose stretch
the coarse search reads from the ridge of clipped cores), against the same truth and acceptance.
"""

from __future__ import annotations

import json
import logging
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest

from meteorspec import calibrate as cal
from meteorspec.background import estimate_background, refine_background
from meteorspec.calfit import wavelength_disagreement_nm
from meteorspec.config import load_event, load_station
from meteorspec.optics import SpectralGeometry
from meteorspec.simulate import EventSpec, NuisanceStrengths, render_event, simulate_event, true_geometry
from meteorspec.video import read_stack
from meteorspec.wavesol import WavelengthSolution

# bench_calibration.perturbed_specs(20, 5)[4], written out so that the event does not move when
# the random set's draws change
SPEC = EventSpec(
    station="QM03", station_id="QM03-S5-004", overrides={"lens.projection": "rectilinear"},
    start_utc="2026-11-14T00:52:06.773Z", video_form="fits", fps=25.0, n_frames=20,
    meteor_start_s=0.14450386861080516, meteor_duration_s=0.47017117463576286,
    start_px=(130.98401604223343, 453.212300771274), direction_deg=-145.56223136495268,
    speed_deg_s=25.832701117549743, peak_energy_adu_s=225088.7760209331, light_curve="classic",
    peak_time_frac=0.32710263197270095, na=0.804, mg=0.09, fe=0.106, temperature_k=4208.430401758791,
    speed_km_s=29.73146087522173,
    nuisance=NuisanceStrengths(
        fe_other=0.6373660219646308, ca_i=1.2501705024004002, ca_ii=0.6768776478536922,
        cr_i=1.162675468176595, mn_i=0.5080918172809793, mg_ii=0.9152859303931262,
        si_ii=0.6735843344761158, fe_ii=1.391838886429934, h_i=0.8091109607382347,
        o_i=0.919287231455023, n_i=0.9149031831465548, n2=0.74088250510439,
        continuum=1.0664178915931388),
    n_stars=31, sky_adu=2.0231259830648205, delta_grooves_frac=-0.02183529070758187,
    delta_dispersion_deg=3.588265168321878, delta_tilt_deg=-0.3666277922033645, seed=500019)
MAX_FRAMES = 10
FINE_FLAG_LOG = "whole-spectrum fit on a fine spectrum"


class _Messages(logging.Handler):
    """The calibrator's debug messages (caplog is per test; the fit runs once per module)."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.messages: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record)


def _line_errors_nm(sol_geo: SpectralGeometry, ev: SimpleNamespace) -> np.ndarray:
    """|wavelength read by ``sol_geo`` - true wavelength| on the true curves, 390-850 nm, every lit frame."""
    wl = np.linspace(390.0, 850.0, 93)
    x0, y0 = ev.x_true_px[:, None], ev.y_true_px[:, None]
    xs, ys = ev.true_geo.spectrum_pixel(x0, y0, wl[None, :])
    cam = ev.station.camera
    on = (xs >= 0) & (xs <= cam.width - 1) & (ys >= 0) & (ys <= cam.height - 1)
    lam, _ = sol_geo.locate(x0, y0, xs, ys)
    err = np.abs(lam - wl[None, :])
    return err[on & np.isfinite(err)]


def _load(spec: EventSpec, tmp) -> SimpleNamespace:
    """The simulated event, its background (re-estimated with the meteor masked, as the pipeline
    does) and the simulator's track, interpolated between lit frames as a fitted track is."""
    sim = simulate_event(spec, tmp / "events", truth_dir=tmp / "truth")
    ev = load_event(sim.event_dir)
    station = load_station(sim.station_toml)
    truth = json.loads(sim.truth_json.read_text())
    stack = read_stack(ev, station)
    geo = SpectralGeometry.from_station(station)
    fr = truth["frames"]
    xt, yt = np.array(fr["x_mid_px"], float), np.array(fr["y_mid_px"], float)
    lum = np.array(fr["energy_fraction"], float) > 0
    tt = np.array(fr["time_s"], float)

    def position(t):
        return np.interp(t, tt[lum], xt[lum]), np.interp(t, tt[lum], yt[lum])

    def velocity_px_s(t, h=1e-3):
        (xp, yp), (xm, ym) = position(np.asarray(t) + h), position(np.asarray(t) - h)
        return (xp - xm) / (2 * h), (yp - ym) / (2 * h)

    track = SimpleNamespace(x_px=np.where(lum, xt, np.nan), y_px=np.where(lum, yt, np.nan),
                            flux_adu=np.array(fr["energy_fraction"], float), psf_sigma_px=truth["psf_sigma_px"],
                            time_s=tt, luminous=lum, exposure_s=float(stack.exposure_s),
                            trajectory=render_event(spec).trajectory, position=position,
                            velocity_px_s=velocity_px_s)
    bg = estimate_background(stack, camera=station.camera, seed=0)
    bg = refine_background(stack, bg, track, geo, camera=station.camera,
                           orders=[o for o in station.grating.orders if o != 0])
    return SimpleNamespace(stack=stack, bg=bg, track=track, station=station, geo=geo,
                           true_geo=true_geometry(geo, truth), x_true_px=xt[lum], y_true_px=yt[lum])


@pytest.fixture(scope="module")
def event(tmp_path_factory):
    """The faint Na-rich event (SPEC) as calibrate_event gets it."""
    return _load(SPEC, tmp_path_factory.mktemp("fine_few"))


def _calibrate(ev: SimpleNamespace, **kw: Any) -> WavelengthSolution:
    kw = {"max_frames": MAX_FRAMES} | kw
    return cal.calibrate_event(ev.stack, ev.bg, ev.track, ev.geo, camera=ev.station.camera,
                               response=ev.station.response, **kw)


def _recorded(event: SimpleNamespace, **kw: Any) -> SimpleNamespace:
    """calibrate_event on the event, its internals recorded: the features' chosen stretch, the
    whole-spectrum fit's result and the cut-outs it ran on, and the calibrator's debug log."""
    seen: dict = {"chosen": None, "whole": (None, ""), "cuts": []}
    real_features, real_whole = cal._calibrate_features, cal._whole_spectrum_solution

    def features(*args, coarse=None, **kw):
        out = real_features(*args, coarse=coarse, **kw)
        seen["chosen"] = coarse.get("chosen")
        return out

    def whole(cuts, *args, **kw):
        out = real_whole(cuts, *args, **kw)
        seen["whole"], seen["cuts"] = out, cuts  # the held-tilt call returns inside the free one: last is outer
        return out

    log = logging.getLogger("meteorspec.calibrate")
    handler, level = _Messages(), log.level
    log.addHandler(handler)
    log.setLevel(logging.DEBUG)
    try:
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(cal, "_calibrate_features", features)
            mp.setattr(cal, "_whole_spectrum_solution", whole)
            sol = _calibrate(event, **kw)
    finally:
        log.removeHandler(handler)
        log.setLevel(level)
    return SimpleNamespace(sol=sol, log=handler.messages, **seen)


@pytest.fixture(scope="module")
def kept(event):
    """The faint event's calibration, recorded (_recorded)."""
    return _recorded(event)


def test_few_features_on_a_fine_spectrum_keep_an_agreeing_whole_spectrum_fit(event, kept):
    # the premise: a fine spectrum (station dispersion at 589 nm mid-track below 3.5 nm/px, the
    # rule's own measure) on which the feature method alone falls back for too few features,
    # leaving station values far off (measured 13.9 nm median): what the calibrator returned
    # here before the rule (commit 71660ab)
    tr = event.track
    k = np.flatnonzero(np.isfinite(tr.x_px))[np.isfinite(tr.x_px).sum() // 2]
    assert float(event.geo.dispersion_nm_per_px(tr.x_px[k], tr.y_px[k], 589.0)) < 3.5
    off = _calibrate(event, whole_spectrum="off")
    assert off.source == "station" and "calibration_few_lines" in off.flags, off.flags
    assert np.median(_line_errors_nm(off.geometry, event)) > 10.0
    # with the rule, the whole-spectrum solution
    sol = kept.sol
    assert sol.source == "event", sol.flags
    assert "calibration_whole_spectrum" in sol.flags
    assert not {"calibration_ambiguous", "calibration_from_station", "calibration_few_lines"} & set(sol.flags)
    # kept by the rule: the coarse search chose a stretch, the fit was compared with it (the
    # calibrator's debug message) and agreed to max_halves_nm (measured 0.48 nm)
    assert kept.chosen is not None
    new, _ = kept.whole
    assert new is not None
    apart = wavelength_disagreement_nm(new.geometry, kept.chosen, kept.cuts)
    assert apart <= 1.5
    logged = [r.args[0] for r in kept.log if r.getMessage().startswith(FINE_FLAG_LOG)]
    assert logged == [pytest.approx(apart)]
    # issue 4 acceptance: line positions 0.5 nm median, 1.0 nm max over 390-850 nm against the
    # rendered geometry (measured 0.40 and 0.77 nm). They hold for this seeded draw, not for every
    # variant: at 12 fields another noise seed gave 0.64 / 1.06 nm and the meteor 0.8x and 1.25x as
    # bright 0.23 / 1.08 and 0.33 / 0.69 nm
    err = _line_errors_nm(sol.geometry, event)
    assert err.size > 1000
    assert np.median(err) < 0.5 and err.max() < 1.0
    # and issue 4's grooves 0.3 % and dispersion angle 0.3 deg against the rendered grating
    # (measured +0.08 % and +0.01 deg; the station file's -2.2 % and +3.6 deg). The tilt stays at
    # the station's (0.37 deg off): the fit freed it, found it loose (1-sigma 5 deg) and held it
    g = event.true_geo.grating
    assert abs(sol.values["grooves_per_mm"] / g.grooves_per_mm - 1) < 0.003
    assert abs(sol.values["dispersion_angle_deg"] - g.dispersion_angle_deg) < 0.3


@pytest.mark.parametrize("grooves_factor,refused", [(1.0, False), (1.01, True)])
def test_a_whole_spectrum_fit_away_from_the_features_stretch_is_refused(event, kept, monkeypatch, grooves_factor,
                                                                        refused):
    # The rule's refusal, cheaply: the whole-spectrum fit is replayed from the run above (same
    # inputs, deterministic) while the stretch the coarse search chose is stretched by
    # ``grooves_factor``. 1 % more grooves moves 850 nm by ~8.4 nm (on a fixed pixel lambda is
    # proportional to the groove spacing, the grating equation; measured 8.9 nm over the frames'
    # curves, as the bench's seed 4 event 024 that the rule refused at 8.9 nm): beyond
    # max_halves_nm, so the station values stay, flagged calibration_ambiguous. Factor 1.0 is the
    # control: the replay returns the kept solution.
    assert kept.whole[0] is not None, "no whole-spectrum solution on this event: nothing to replay"
    real_features = cal._calibrate_features
    shifted = {}

    def features(*args, coarse=None, **kw):
        out = real_features(*args, coarse=coarse, **kw)
        g = coarse["chosen"]
        coarse["chosen"] = shifted["geo"] = g.with_grating(grooves_per_mm=g.grating.grooves_per_mm * grooves_factor)
        return out

    monkeypatch.setattr(cal, "_calibrate_features", features)
    monkeypatch.setattr(cal, "_whole_spectrum_solution", lambda *a, **k: kept.whole)
    sol = _calibrate(event)
    apart = wavelength_disagreement_nm(kept.whole[0].geometry, shifted["geo"], kept.cuts)
    if not refused:
        assert apart <= 1.5
        assert sol.source == "event" and sol.flags == kept.sol.flags
        assert sol.values == kept.sol.values
        return
    assert apart > 3.0 * 1.5  # well beyond the limit, not at its edge
    assert sol.source == "station"
    assert {"calibration_from_station", "calibration_few_lines", "calibration_ambiguous"} <= set(sol.flags)
    assert "calibration_whole_spectrum" not in sol.flags
    assert sol.values == cal.station_solution(event.geo).values


def test_a_first_fit_on_blend_windows_not_found_again_is_refused(event):
    # The same event read from its 11 brightest fields: single-frame blend windows at S/N 4-8
    # (5 wavelengths over 378-821 nm) plus Na I anchor a first feature fit, and the next, narrower
    # round finds only 2 rows along its curve. Kept, that fit put the lines 1.66 nm median and
    # 2.49 nm max off (Na I D read ~2 nm blueward: along a 16 nm streak a Na model shifted blue
    # with free Si II / O I neighbours filling its red edge fits as well), beyond issue 4's
    # 0.5 / 1.0 nm, unflagged. Refused, the feature method falls back with
    # calibration_few_lines, and the whole-spectrum path above decides (0.40 / 0.77 nm measured).
    off = _calibrate(event, whole_spectrum="off", max_frames=11)
    assert off.source == "station", (off.flags, np.median(_line_errors_nm(off.geometry, event)))
    assert "calibration_few_lines" in off.flags


def test_a_poor_feature_fit_on_a_fine_spectrum_tries_the_whole_spectrum_fit(event, kept, monkeypatch):
    # The feature method's other fallback: its fit leaves the isolated features beyond what their
    # errors allow (``calibration_fit_poor``). Seen on plasma_end_to_end.py --n 36 --seed 5
    # --modes perturbed event 004 (this event's spec, tracked by the pipeline): a line just under
    # its SNR limit in the second round ended the loop on the first round's fit (1.41 times the
    # allowance), and the station values (2.2 %, 3.6 deg off) put the extraction aperture beside
    # the spectrum. The features' fallback here is relabelled as that one (same station values and
    # measurements): the whole-spectrum fit then runs as for too few features, its rivals are not
    # refined (refine_rivals=False: where the features depart from the model, starts agreeing is
    # no evidence), and its solution is kept within max_halves_nm of the features' stretch.
    real_features, real_whole = cal._calibrate_features, cal._whole_spectrum_solution
    seen: dict = {}

    def features(*args, **kw):
        out = real_features(*args, **kw)
        assert out.flags == ("calibration_from_station", "calibration_few_lines")
        return cal.station_solution(args[2], flags=("calibration_fit_poor",), measurements=out.measurements)

    def whole(cuts, *args, refine_rivals=True, **kw):
        seen["refine_rivals"] = refine_rivals
        return kept.whole  # the same inputs as the run above (deterministic): replayed

    monkeypatch.setattr(cal, "_calibrate_features", features)
    monkeypatch.setattr(cal, "_whole_spectrum_solution", whole)
    sol = _calibrate(event)
    assert seen == {"refine_rivals": False}
    assert sol.source == "event" and "calibration_whole_spectrum" in sol.flags, sol.flags
    assert sol.values == kept.sol.values
    # issue 4 acceptance against the rendered geometry, as above
    err = _line_errors_nm(sol.geometry, event)
    assert np.median(err) < 0.5 and err.max() < 1.0


# bench_calibration.perturbed_specs(30, 4)[1], written out as SPEC is: a bright Mg-rich meteor on
# the 640 x 480 equisolid camera (2.85 nm/px at 589 nm), saturated in its brightest fields, the
# station file written +0.43 % / +2.0 deg / -1.65 deg off in grooves, angle and tilt
SATURATED_SPEC = EventSpec(
    station="QM01", station_id="QM01-S4-001",
    overrides={"camera.height": 480, "camera.width": 640, "lens.cx": 320.35, "lens.cy": 238.9,
               "lens.focal_px": 575.0, "lens.projection": "equisolid"},
    start_utc="2026-11-14T00:19:20.908Z", video_form="tiff", fps=25.0, n_frames=21,
    meteor_start_s=0.15760624333534906, meteor_duration_s=0.5008298538632044,
    start_px=(250.1888376024246, 427.8297863720994), direction_deg=-139.5242027054535,
    speed_deg_s=21.658786555492533, peak_energy_adu_s=6793721.354380792, light_curve="classic",
    peak_time_frac=0.3411083293124205, na=0.217, mg=0.779, fe=0.004, temperature_k=4215.1270005997685,
    speed_km_s=33.83071519492433,
    nuisance=NuisanceStrengths(
        fe_other=1.4694485202702028, ca_i=0.6959453200404111, ca_ii=0.9255236588302546,
        cr_i=0.504119641912906, mn_i=1.1463492849256127, mg_ii=1.393113834722692,
        si_ii=1.2912969529465466, fe_ii=0.5874243073005313, h_i=1.0447663815826187,
        o_i=0.698527954627434, n_i=0.7848871574832734, n2=1.497953858111126,
        continuum=1.0041922597059099),
    n_stars=34, sky_adu=4.720114198109064, delta_grooves_frac=0.0042731959117384075,
    delta_dispersion_deg=1.9927087860813604, delta_tilt_deg=-1.652407244678752, seed=400013)
SATURATED_MAX_FRAMES = 40  # calibrate_event's default, as the bench ran it (all 14 lit fields)


@pytest.fixture(scope="module")
def saturated(tmp_path_factory):
    """The saturated event (SATURATED_SPEC), calibrated from all its fields, internals recorded."""
    ev = _load(SATURATED_SPEC, tmp_path_factory.mktemp("fine_saturated"))
    return SimpleNamespace(event=ev, run=_recorded(ev, max_frames=SATURATED_MAX_FRAMES))


def test_a_self_sufficient_whole_spectrum_fit_stands_against_a_saturated_events_stretch(saturated):
    # The rule's exception (meteorspec.calibrate._whole_fit_self_sufficient): a whole-spectrum fit
    # that freed the tilt (error within whole_spectrum_max_tilt_err_deg) and matches the spectrum
    # to its noise (reduced chi-square <= 2) is kept whatever the features' stretch, which on a
    # saturated event comes from the ridge of clipped cores. Measured: the fit lay 4.52 nm from
    # that stretch at reduced chi-square 1.00; refused, the station values left the lines 3.7 nm
    # median, 10.4 nm max off.
    ev, run = saturated.event, saturated.run
    tr = ev.track
    k = np.flatnonzero(np.isfinite(tr.x_px))[np.isfinite(tr.x_px).sum() // 2]
    assert float(ev.geo.dispersion_nm_per_px(tr.x_px[k], tr.y_px[k], 589.0)) < 3.5  # a fine spectrum
    new, _ = run.whole
    assert new is not None and run.chosen is not None
    assert wavelength_disagreement_nm(new.geometry, run.chosen, run.cuts) > 3.0 * 1.5  # far from the stretch
    assert np.isfinite(new.errors["tilt_deg"]) and new.reduced_chi2 <= 2.0
    sol = run.sol
    assert sol.source == "event" and "calibration_whole_spectrum" in sol.flags, sol.flags
    assert not {"calibration_ambiguous", "calibration_from_station"} & set(sol.flags)
    # issue 4 acceptance against the rendered geometry: line positions 0.5 nm median and 1.0 nm
    # max over 390-850 nm (measured 0.07 / 0.16), grooves 0.3 %, dispersion angle 0.3 deg
    # (measured +0.009 %, +0.012 deg)
    err = _line_errors_nm(sol.geometry, ev)
    assert np.median(err) < 0.5 and err.max() < 1.0
    g = ev.true_geo.grating
    assert abs(sol.values["grooves_per_mm"] / g.grooves_per_mm - 1) < 0.003
    assert abs(sol.values["dispersion_angle_deg"] - g.dispersion_angle_deg) < 0.3
    # the fitted tilt's stated 1-sigma (propagated from its two components, as the feature fit's)
    # covers the rendered tilt at 3 sigma (measured 0.155 deg off, stated 0.107)
    assert abs(sol.values["tilt_deg"] - g.tilt_deg) < 3.0 * sol.errors["tilt_deg"]


def test_without_the_exception_the_saturated_events_fit_is_refused(saturated, monkeypatch):
    # Control: the same fit replayed (deterministic inputs) with the exception's chi-square limit
    # at 0, so the stretch rule alone decides: the station values, flagged ambiguous.
    ev, run = saturated.event, saturated.run
    monkeypatch.setattr(cal, "_SELF_SUFFICIENT_CHI2", 0.0)
    monkeypatch.setattr(cal, "_whole_spectrum_solution", lambda *a, **k: run.whole)
    sol = _calibrate(ev, max_frames=SATURATED_MAX_FRAMES)
    assert sol.source == "station"
    assert {"calibration_from_station", "calibration_ambiguous"} <= set(sol.flags)
