"""Tests of the zeroth-order tracker (meteorspec.track).

Synthetic events are built here with :class:`SpectralGeometry` only (a point
source moving along a great circle, its first-order spectrum where the grating
puts it, Gaussian PSF, Poisson photon noise and Gaussian read noise), so that
each case (a bright line, a star, a gap, saturation, leaving the sensor, fields)
can be switched on alone. The acceptance test at the end uses the project's
simulator and its truth.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter

from meteorspec.background import bin_frames, estimate_background
from meteorspec.config import Camera
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.track import STATUSES, Track, find_track, light_near_source, unless_a_line
from meteorspec.video import Frame

W, H = 320, 240
FPS = 25.0


def _camera(*, interlaced=False, gain=2.0, read=1.5, saturation=255.0) -> Camera:
    return Camera(width=W, height=H, bit_depth=8, gamma=1.0, saturation_adu=saturation, interlaced=interlaced,
                  read_noise_adu=read, gain_e_per_adu=gain)


def _geometry(dispersion_deg=0.0) -> SpectralGeometry:
    # 300 grooves/mm on a 400 px focal length: first order 400-800 nm spans ~50-100 px from the zeroth order
    return SpectralGeometry(LensModel("equidistant", 400.0, (W - 1) / 2, (H - 1) / 2),
                            GratingModel(300.0, dispersion_deg))


def _splat(img, x, y, w):
    """Bilinear deposit of weights ``w`` at (x, y): conserves flux and centroid."""
    ok = np.isfinite(x) & np.isfinite(y)
    x, y, w = x[ok], y[ok], w[ok]
    x0, y0 = np.floor(x).astype(int), np.floor(y).astype(int)
    fx, fy = x - x0, y - y0
    h, wd = img.shape
    for dx, dy, ww in ((0, 0, (1 - fx) * (1 - fy)), (1, 0, fx * (1 - fy)), (0, 1, (1 - fx) * fy), (1, 1, fx * fy)):
        xi, yi = x0 + dx, y0 + dy
        inside = (xi >= 0) & (xi < wd) & (yi >= 0) & (yi < h)
        img += np.bincount(yi[inside] * wd + xi[inside], (w * ww)[inside], minlength=h * wd).reshape(h, wd)


def make_event(*, start_px=(60.0, 80.0), end_px=(250.0, 150.0), n_frames=24, t_on=0.12, t_off=0.76,
               zeroth_adu_s=2.0e5, spectrum_adu_s=2.0e5, line_nm=(589.0,), line_share=0.3,
               gap_s=None, stars=(), twinkle=0.0, sky_adu=8.0, psf=1.2, interlaced=False,
               saturation=255.0, dispersion_deg=0.0, seed=1, nan_frame=None, noise=True):
    """Frames and truth of a synthetic event.

    The meteor moves at constant angular speed along the great circle through the
    directions of ``start_px`` (at ``t_on``) and ``end_px`` (at ``t_off``); its light is
    constant while on (``*_adu_s`` per second, first order split between a flat continuum
    400-800 nm and lines), zero in ``gap_s = (t0, t1)``. ``stars`` are (x, y, adu_s).
    """
    rng = np.random.default_rng(seed)
    geo = _geometry(dispersion_deg)
    lens = geo.lens
    u0, u1 = lens.pixel_to_direction(*start_px), lens.pixel_to_direction(*end_px)
    arc = np.arccos(np.clip(np.dot(u0, u1), -1, 1))
    e = (u1 - np.dot(u0, u1) * u0) / np.linalg.norm(u1 - np.dot(u0, u1) * u0)
    omega = arc / (t_off - t_on)

    def pixel(t):
        a = omega * (np.asarray(t, float) - t_on)
        return lens.direction_to_pixel(np.cos(a)[..., None] * u0 + np.sin(a)[..., None] * e)

    wl_cont = np.arange(400.0, 800.0, 1.0)
    cont_w = np.full(wl_cont.size, (1 - line_share * len(line_nm)) / wl_cont.size)
    wl = np.concatenate([wl_cont, np.array(line_nm, float)])
    wsh = np.concatenate([cont_w, np.full(len(line_nm), line_share)])
    n_exp = 2 * n_frames if interlaced else n_frames
    expo = 1.0 / FPS / (2 if interlaced else 1)
    frames, truth = [], {"time_s": [], "x_mid": [], "y_mid": [], "flux": [], "lit": []}
    for j in range(n_exp):
        t0, t1 = j * expo, (j + 1) * expo
        img = np.zeros((H, W))
        subs = 40
        ts = t0 + (np.arange(subs) + 0.5) / subs * expo
        on = (ts >= t_on) & (ts < t_off)
        if gap_s is not None:
            on &= ~((ts >= gap_s[0]) & (ts < gap_s[1]))
        flux0 = zeroth_adu_s * expo * on.mean()
        if on.any():
            xs, ys = pixel(ts[on])
            _splat(img, xs, ys, np.full(xs.size, zeroth_adu_s * expo / subs))
            sx, sy = geo.spectrum_pixel(xs[:, None], ys[:, None], wl[None, :])
            _splat(img, sx.ravel(), sy.ravel(), np.broadcast_to(spectrum_adu_s * expo / subs * wsh, sx.shape).ravel())
        for (x_s, y_s, f_s) in stars:
            f = f_s * expo * max(1.0 + twinkle * rng.standard_normal(), 0.0) if noise else f_s * expo
            _splat(img, np.array([x_s]), np.array([y_s]), np.array([f * 0.6]))
            sx, sy = geo.spectrum_pixel(x_s, y_s, wl_cont)
            _splat(img, sx, sy, np.full(wl_cont.size, f * 0.4 / wl_cont.size))
        img = gaussian_filter(img, psf, mode="constant") + sky_adu
        if noise:
            img = rng.poisson(img * 2.0) / 2.0 + 1.5 * rng.standard_normal(img.shape)  # gain 2 e/ADU, read 1.5 ADU
        stored = np.clip(np.rint(img), 0, saturation)
        sat = stored >= saturation
        xm, ym = pixel((t0 + t1) / 2)
        truth["time_s"].append((t0 + t1) / 2)
        truth["x_mid"].append(float(xm))
        truth["y_mid"].append(float(ym))
        truth["flux"].append(flux0)
        truth["lit"].append(flux0 > 0)
        sig = stored.astype(np.float32)
        if nan_frame is not None and j == nan_frame:
            sig[10, 10] = np.nan
        if interlaced:
            # field j exposes rows (j % 2)::2 ("top" field first); the stored frame interleaves two fields
            rows = slice(j % 2, None, 2)
            frames.append(Frame(index=j, time_s=(t0 + t1) / 2, exposure_s=expo,
                                signal=np.ascontiguousarray(sig[rows]), saturated=np.ascontiguousarray(sat[rows]),
                                y_start_px=j % 2, y_step_px=2))
        else:
            frames.append(Frame(index=j, time_s=(t0 + t1) / 2, exposure_s=expo, signal=sig, saturated=sat))
    truth = {k: np.array(v) for k, v in truth.items()}
    return frames, truth, geo


def run(frames, geo, *, interlaced=False, saturation=255.0):
    cam = _camera(interlaced=interlaced, saturation=saturation)
    bg = estimate_background(frames, camera=cam)
    return find_track(frames, bg, geo, camera=cam)


def _err(track, truth, mask=None):
    d = np.hypot(track.x_px - truth["x_mid"], track.y_px - truth["y_mid"])
    m = np.isfinite(d) if mask is None else (np.isfinite(d) & mask)
    return d[m]


# --------------------------------------------------------------------------- basic accuracy


def test_track_recovers_great_circle_motion():
    frames, truth, geo = make_event()
    track = run(frames, geo)
    assert track, track.reason
    assert track.reason == ""
    d = _err(track, truth)
    # acceptance of the issue: <= 0.3 px RMS against truth for an unsaturated zeroth order
    assert np.sqrt(np.mean(d**2)) <= 0.3
    # every fully lit frame is covered and measured
    full = truth["flux"] >= truth["flux"].max() * 0.999
    assert np.all(np.isin(track.status[full], ("measured",)))
    assert set(np.unique(track.status)) <= set(STATUSES)
    assert track.first_frame >= 0 and track.last_frame > track.first_frame
    # the light curve: aperture sum of a 3.5-sigma-PSF aperture holds > 97 % of a Gaussian's light
    # (1 - exp(-3.6^2/2) = 0.998 for the 3.6 px radius used); allow photon noise (5 sigma)
    m = full & np.isfinite(track.flux_adu)
    assert np.all(np.abs(track.flux_adu[m] - truth["flux"][m]) <= 0.03 * truth["flux"][m] + 5 * track.flux_err_adu[m])


def test_position_and_velocity_between_frames():
    frames, truth, geo = make_event()
    track = run(frames, geo)
    # inside an exposure the fitted trajectory is the motion streak: halfway between two mid-exposure points
    t = 0.5 * (truth["time_s"][8] + truth["time_s"][9])
    x, y = track.position(t)
    assert abs(x - 0.5 * (truth["x_mid"][8] + truth["x_mid"][9])) < 0.3
    vx, vy = track.velocity_px_s(truth["time_s"][10])
    step = np.hypot(truth["x_mid"][11] - truth["x_mid"][9], truth["y_mid"][11] - truth["y_mid"][9]) / (2 / FPS)
    assert abs(np.hypot(vx, vy) - step) / step < 0.02
    # far outside the luminous span the trajectory is not extrapolated
    assert np.all(np.isnan(track.position(10.0)))


# --------------------------------------------------------------------------- telling things apart


def test_zeroth_order_told_from_bright_line_of_its_own_spectrum():
    # a single line holding 60 % of the first order is ~1.8x brighter than the zeroth order:
    # the line's own "spectrum" would lie beyond 1000 nm (no light), the zeroth order's is lit
    frames, truth, geo = make_event(zeroth_adu_s=1.0e5, spectrum_adu_s=3.0e5, line_nm=(589.0,), line_share=0.6)
    track = run(frames, geo)
    assert track, track.reason
    assert np.sqrt(np.mean(_err(track, truth) ** 2)) <= 0.3


def test_bright_twinkling_star_and_its_spectrum_are_not_tracked():
    star = (160.0, 40.0, 1.5e5)
    frames, truth, geo = make_event(stars=[star, (90.0, 200.0, 4.0e4)], twinkle=0.15)
    track = run(frames, geo)
    assert track, track.reason
    assert np.sqrt(np.mean(_err(track, truth) ** 2)) <= 0.3
    assert np.all(np.hypot(track.x_meas_px - star[0], track.y_meas_px - star[1])[np.isfinite(track.x_meas_px)] > 20)


def test_no_meteor_gives_empty_track_with_reason():
    frames, truth, geo = make_event(zeroth_adu_s=0.0, spectrum_adu_s=0.0, stars=[(100.0, 100.0, 1e5)], twinkle=0.1)
    track = run(frames, geo)
    assert not track
    assert track.reason
    assert track.x_px.shape == (len(frames),) and np.all(np.isnan(track.x_px))
    assert np.all(track.status == "absent")
    assert track.first_frame == -1
    assert np.all(np.isnan(track.position(0.3)))


def test_nan_frame_is_a_clear_error():
    frames, truth, geo = make_event(nan_frame=5)
    cam = _camera()
    with pytest.raises(ValueError, match="frame 5 holds NaN"):
        estimate_background(frames, camera=cam)
    good = [f for f in frames if f.index != 5]
    bg = estimate_background(good, camera=cam)
    with pytest.raises(ValueError, match="frame 5 holds NaN"):
        find_track(frames, bg, geo, camera=cam)


# --------------------------------------------------------------------------- gaps, saturation, edges


def test_gap_is_bridged():
    frames, truth, geo = make_event(gap_s=(0.36, 0.48))
    track = run(frames, geo)
    assert track, track.reason
    dark = ~truth["lit"] & (truth["time_s"] > 0.36) & (truth["time_s"] < 0.48)
    assert dark.sum() >= 2
    assert np.all(track.status[dark] == "interpolated")
    # bridged positions within the unsaturated acceptance
    assert np.all(_err(track, truth, dark) <= 0.3)


def test_saturated_zeroth_order():
    frames, truth, geo = make_event(zeroth_adu_s=2.5e6, spectrum_adu_s=1.0e6)
    track = run(frames, geo)
    assert track, track.reason
    sat = track.status == "saturated"
    assert sat.sum() >= 10
    assert "saturated" in track.flags
    # acceptance for a saturated zeroth order: <= 1.0 px RMS
    assert np.sqrt(np.mean(_err(track, truth, sat) ** 2)) <= 1.0
    assert np.all(np.isnan(track.flux_adu[sat]))


def test_zeroth_order_saturated_in_every_frame_is_not_flagged_faint():
    # a fireball whose zeroth order clips in every lit frame: its clipped light alone is ~240 times
    # its noise (the saturated frames' SNR is a lower bound), far above the tracker's low-SNR limit
    # of 10 (module constant _LOW_SNR); "low_snr" would tell the review the opposite of the truth
    frames, truth, geo = make_event(zeroth_adu_s=1.0e7, spectrum_adu_s=1.0e6)
    track = run(frames, geo)
    assert track, track.reason
    assert set(track.status[track.luminous]) == {"saturated"}
    assert "saturated" in track.flags
    assert "low_snr" not in track.flags


def test_zeroth_order_off_sensor_located_from_spectrum():
    # the meteor enters from beyond the left edge; the spectrum (dispersed towards +x, 50-100 px
    # away) is on the sensor before the zeroth order is
    frames, truth, geo = make_event(start_px=(-70.0, 100.0), end_px=(200.0, 160.0), spectrum_adu_s=4.0e5)
    track = run(frames, geo)
    assert track, track.reason
    off = truth["lit"] & (np.array(truth["x_mid"]) < -6)
    assert off.sum() >= 2
    located = off & (track.status == "from_spectrum")
    assert located.sum() >= 1
    assert "zeroth_order_off_frame" in track.flags
    # located from a streaked spectrum: the along-track position within 1 px (same tolerance as saturated)
    assert np.all(_err(track, truth, located) <= 1.0)
    on = truth["lit"] & (track.status == "measured")
    assert np.sqrt(np.mean(_err(track, truth, on) ** 2)) <= 0.3


def test_line_of_a_spectrum_whose_zeroth_order_stays_off_the_sensor_is_not_taken_for_it():
    # the zeroth order stays beyond the left edge all the time, while its spectrum (Mg I b,
    # Na I D and O I 777 on a continuum) crosses the sensor: the tracker can only follow a
    # line. First-order light within 300 nm of a zeroth order does not reach the ground (the
    # ozone cut-off near 300 nm; common practice, from memory), so light there marks the source as a line.
    frames, truth, geo = make_event(start_px=(-45.0, 60.0), end_px=(-35.0, 190.0),
                                    line_nm=(518.0, 589.0, 777.0), line_share=0.25, spectrum_adu_s=4.0e5)
    cam = _camera()
    binned = bin_frames(frames, camera=cam)
    bg = estimate_background(frames, camera=cam, binned=binned)
    track = find_track(frames, bg, geo, camera=cam, binned=binned)
    assert track  # a line, moving as a zeroth order would
    assert np.nanmedian(track.x_px) > 0.0 > np.max(truth["x_mid"][truth["lit"]])
    refused = unless_a_line(track, bg, geo, binned)
    assert not refused
    assert refused.flags == ("zeroth_order_not_found",)
    assert "line of its own spectrum" in refused.reason
    # the real zeroth order of the same kind of event passes: no light where it must be dark
    frames, truth, geo = make_event(line_nm=(518.0, 589.0, 777.0), line_share=0.25, spectrum_adu_s=4.0e5)
    binned = bin_frames(frames, camera=cam)
    bg = estimate_background(frames, camera=cam, binned=binned)
    track = find_track(frames, bg, geo, camera=cam, binned=binned)
    ratio, n = light_near_source(track, bg, geo, binned)
    # the smoothed map's noise over ~100 samples: |mean| well below 0.1 of the spectrum's light
    assert n >= 10 and abs(ratio) < 0.1
    assert unless_a_line(track, bg, geo, binned) is track


def test_interlaced_fields_measured_in_full_frame_y():
    frames, truth, geo = make_event(interlaced=True, n_frames=14, zeroth_adu_s=3.0e5)
    assert frames[1].y_step_px == 2 and frames[1].y_start_px == 1
    track = run(frames, geo, interlaced=True)
    assert track, track.reason
    assert len(track.time_s) == len(frames)
    np.testing.assert_allclose(track.time_s, truth["time_s"])
    assert np.sqrt(np.mean(_err(track, truth) ** 2)) <= 0.3


def test_motion_parallel_to_dispersion_is_flagged():
    frames, truth, geo = make_event(start_px=(40.0, 90.0), end_px=(200.0, 100.0), dispersion_deg=0.0)
    track = run(frames, geo)
    assert "motion_parallel_to_dispersion" in track.flags
    frames, truth, geo = make_event(start_px=(60.0, 30.0), end_px=(80.0, 200.0), dispersion_deg=0.0)
    track = run(frames, geo)
    assert track, track.reason
    assert "motion_parallel_to_dispersion" not in track.flags


# --------------------------------------------------------------------------- simulator acceptance


def _acceptance_cases():
    sim = pytest.importorskip("meteorspec.simulate")
    cases = [(name, spec) for name, spec in sim.SAMPLE_SPECS.items()]
    cases += [(f"random{k}", s) for k, s in enumerate(sim.random_specs(6, seed=7))]
    return cases


@pytest.mark.slow
def test_acceptance_against_simulator_truth():
    """Issue 3 acceptance on the sample presets and 6 seeded random events (the full
    >= 30-event run is ``python bench/track_accuracy.py``)."""
    sim = pytest.importorskip("meteorspec.simulate")
    failures = []
    for name, spec in _acceptance_cases():
        rendered = sim.render_event(spec)
        frames = rendered.frame_stack()
        cam = rendered.station.camera
        geo = SpectralGeometry.from_station(rendered.station)
        track = find_track(frames, estimate_background(frames, camera=cam), geo, camera=cam,
                           orders=rendered.station.grating.orders)
        if not track:
            failures.append(f"{name}: not found ({track.reason})")
            continue
        tx = np.array([t.x_mid_px for t in rendered.truths])
        ty = np.array([t.y_mid_px for t in rendered.truths])
        d = np.hypot(track.x_px - tx, track.y_px - ty)
        sat = track.status == "saturated"
        # the issue sets no limit for a zeroth order located from its spectrum (off the sensor).
        # Known limitation: a saturated spectrum streaking along its own dispersion (random2) is
        # located to ~3 px only; 4 px guards against losing the spectrum altogether
        spec = track.status == "from_spectrum"
        for mask, limit, what in ((~sat & ~spec, 0.3, "unsaturated"), (sat, 1.0, "saturated"),
                                  (spec, 4.0, "from the spectrum")):
            m = mask & np.isfinite(d)
            if m.any() and np.sqrt(np.mean(d[m] ** 2)) > limit:
                failures.append(f"{name}: {what} RMS {np.sqrt(np.mean(d[m] ** 2)):.3f} px > {limit}")
    assert not failures, "; ".join(failures)


def test_track_is_falsy_dataclass_when_empty():
    t = Track(time_s=np.zeros(0), x_px=np.zeros(0), y_px=np.zeros(0), x_meas_px=np.zeros(0),
              y_meas_px=np.zeros(0), flux_adu=np.zeros(0), status=np.zeros(0, "<U13"), reason="nothing")
    assert not t
    assert t.first_frame == -1


# --------------------------------------------------------------------------- meteor-free background


def test_refined_background_and_light_curve_drop_the_light_of_a_meteor_lit_in_every_frame():
    """A faint meteor lit in all but the first and last frames leaves no meteor-free frame.

    The first background estimate then holds part of its light (the per-pixel clip
    cannot reject light at a few sigma); re-estimated with the track's and the
    spectrum's pixels masked frame by frame it must return to the true sky (a flat
    8 ADU here, noise-free truth of the synthetic scene), and the light curve
    measured against it must recover the true zeroth-order flux.
    """
    from meteorspec.background import meteor_mask, refine_background
    from meteorspec.track import remeasure_light_curve

    frames, truth, geo = make_event(t_on=0.03, t_off=0.93, n_frames=24, zeroth_adu_s=1.5e5,
                                    spectrum_adu_s=2.0e5, start_px=(60.0, 80.0), end_px=(200.0, 130.0))
    cam = _camera()
    bg = estimate_background(frames, camera=cam)
    track = find_track(frames, bg, geo, camera=cam)
    assert track
    lit = np.zeros((H, W), bool)
    for f in frames:
        lit |= meteor_mask(f, track, geo, height=H, width=W)
    # the meteor's pixels: where the noise-free scene has light above 1 ADU per frame somewhere
    clean, _, _ = make_event(t_on=0.03, t_off=0.93, n_frames=24, zeroth_adu_s=1.5e5, spectrum_adu_s=2.0e5,
                             start_px=(60.0, 80.0), end_px=(200.0, 130.0), noise=False)
    light = np.max([f.signal for f in clean], axis=0) - 8.0 > 1.0
    assert lit[light].mean() > 0.99  # the mask covers the meteor's light
    before = float(np.mean(bg.level_adu[light] - 8.0))
    refined = refine_background(frames, bg, track, geo, camera=cam)
    after = float(np.mean(refined.level_adu[light] - 8.0))
    # the mean of thousands of clipped means of ~20 samples scatters by well under 0.01 ADU: the
    # first estimate is biased by ~0.2 ADU here, the refined one within the clip's small bias
    assert before > 0.15
    assert abs(after) < 0.05
    assert np.array_equal(refined.level_adu[~lit], bg.level_adu[~lit])
    relit = remeasure_light_curve(frames, refined, track)
    ok = np.isfinite(relit.flux_adu) & np.isfinite(track.flux_adu) & (truth["flux"] > 0)
    ratio_after = np.median(relit.flux_adu[ok] / truth["flux"][ok])
    # the streak-shaped aperture (3 psf sigma around the streak) holds all but ~0.1 % of the light
    assert abs(ratio_after - 1.0) < 0.01
    np.testing.assert_array_equal(relit.x_px, track.x_px)


def test_slow_saturated_meteor_is_tracked_against_the_refined_background():
    """A slow, saturated meteor leaves its light in the first background along its track.

    Moving 0.9 px per frame and lit in frames 3-22 of 28 (as seed-5 event 035 of
    bench/plasma_end_to_end.py), the same pixels are lit in many of the frames the
    first estimate is built from: centroids measured against it are pushed outwards along the
    track and the fitted path comes out too fast (here -0.45 to +0.44 px, seeded scene).
    ``pipeline.locate_meteor`` tracks again against the background refined with the meteor
    masked. Truth: the scene's mid-exposure positions, made here from the great circle alone.
    """
    from pathlib import Path

    from meteorspec.config import Grating, Lens, Station
    from meteorspec.pipeline import locate_meteor

    zs = 3.0e5  # ADU/s: the zeroth order clips at 255 ADU in every lit frame
    frames, truth, geo = make_event(t_on=0.13, t_off=0.92, n_frames=28, zeroth_adu_s=zs, spectrum_adu_s=zs,
                                    start_px=(150.0, 110.0), end_px=(170.0, 112.0))
    cam = _camera()
    station = Station(id="TST2", camera=cam, lens=Lens("equidistant", 400.0, (W - 1) / 2, (H - 1) / 2),
                      grating=Grating(300.0, 0.0), path=Path("TST2.toml"))
    lit = truth["lit"]
    first = run(frames, geo)
    _, track = locate_meteor(frames, station)
    assert track
    assert all(frames[k].saturated.any() for k in np.flatnonzero(lit))
    # the defect is present in this scene: the first background moves the ends by ~0.45 px
    assert _err(first, truth, lit).max() > 0.3
    # against the true sky (8 ADU) the tracker is within 0.01 px here; 0.1 px leaves room for the
    # refined background's noise and is a quarter of the defect
    assert _err(track, truth, lit).max() < 0.1
    assert np.isfinite(track.x_px[lit]).all()


def test_background_masked_along_a_wrong_grating_is_mended_along_the_calibrated_one():
    """The pipeline masks the meteor along the station's grating, then again along the event's own.

    The mask is a band of 9 px half-width around each predicted spectrum curve. A station
    dispersion angle 4 deg off (the issue's range of station errors) moves the red end of a
    resolved camera's 300-400 px long spectrum 20-28 px sideways; this scene's spectrum is
    only ~100 px long, so an 8 deg error does the same here (~14 px), and the background
    there keeps part of the meteor's light. Refining that background once more with
    the right geometry (``pipeline.remasked_background``) must bring it back to the true sky
    (a flat 8 ADU, noise-free truth of the synthetic scene).
    """
    from meteorspec.background import meteor_mask, refine_background
    from meteorspec.optics import GratingModel

    kw = dict(t_on=0.03, t_off=0.93, n_frames=24, zeroth_adu_s=1.5e5, spectrum_adu_s=2.0e5,
              start_px=(60.0, 80.0), end_px=(200.0, 130.0))
    frames, truth, geo = make_event(**kw)
    cam = _camera()
    wrong = SpectralGeometry(geo.lens, GratingModel(geo.grating.grooves_per_mm, 8.0))
    bg = estimate_background(frames, camera=cam)
    track = find_track(frames, bg, geo, camera=cam)
    assert track
    first = refine_background(frames, bg, track, wrong, camera=cam)
    clean, _, _ = make_event(**kw, noise=False)
    light = np.max([f.signal for f in clean], axis=0) - 8.0 > 1.0
    # pixels lit in some frame where that frame's wrong mask does not reach
    missed = np.zeros((H, W), bool)
    for f, c in zip(frames, clean):
        missed |= (c.signal - 8.0 > 1.0) & ~meteor_mask(f, track, wrong, height=H, width=W)
    assert missed.sum() > 50  # the wrong mask leaves part of the spectrum out
    # the same bias as the first estimate's in the test above (~0.2 ADU) where the mask missed
    assert float(np.mean(first.level_adu[missed] - 8.0)) > 0.15
    mended = refine_background(frames, first, track, geo, camera=cam)
    # as above: the clip's own small bias, well under the 0.15 ADU the meteor left
    assert abs(float(np.mean(mended.level_adu[light] - 8.0))) < 0.05


def test_refine_keeps_a_background_built_from_meteor_free_frames():
    """When every frame of the first estimate is far from the meteor, nothing is re-read or changed."""
    from meteorspec.background import refine_background

    frames, truth, geo = make_event(n_frames=40, t_on=1.0, t_off=1.4)  # lit in frames 25-34
    cam = _camera()
    bg = estimate_background(frames, camera=cam, max_frames=8)
    track = find_track(frames, bg, geo, camera=cam)
    assert track
    assert np.all(np.abs(bg.frames_used - 29.5) > 7)  # the quiet frames are well away from the flight
    assert refine_background(frames, bg, track, geo, camera=cam) is bg
