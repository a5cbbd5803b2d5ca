"""The forward simulator: contract-conform output, exact truth, physics of the spectrum.

Events here are tiny (a few frames of a few hundred pixels) so the file runs in seconds.
"""

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy.special import erf
from numpy.testing import assert_allclose

from meteorspec.config import find_station_file, load_event, load_station
from meteorspec.extinction import ExtinctionModel, pixel_altaz, transmission
from meteorspec.optics import PROJECTIONS, SpectralGeometry
from meteorspec.simulate import (
    FIRST_ORDER_SHARE,
    SAMPLE_SPECS,
    EventSpec,
    NuisanceStrengths,
    random_specs,
    render_event,
    simulate_event,
)
from meteorspec.simulate.emission import WAVELENGTH_RANGE_NM, build_emission
from meteorspec.simulate.scene import star_spectrum
from meteorspec.video import iter_frames

SMALL_QM01 = {"camera.width": 240, "camera.height": 160, "lens.focal_px": 300.0,
              "lens.cx": 119.5, "lens.cy": 79.5}
SMALL_QM03 = {"camera.width": 200, "camera.height": 120, "lens.focal_px": 260.0,
              "lens.cx": 99.5, "lens.cy": 59.5}
# Everything but the three composition groups switched off (plus each group species' own
# weaker lines, which stay: they belong to the same LTE species).
ONLY_GROUPS = NuisanceStrengths(**{f.name: 0.0 for f in dataclasses.fields(NuisanceStrengths)})


# A 16-bit linear camera: quantisation negligible, pixel sums are energies.
LINEAR_16BIT = dict(SMALL_QM01, **{"camera.bit_depth": 16, "camera.saturation_adu": 65535.0,
                                   "camera.black_level_adu": 0.0})


def tiny(**kw) -> EventSpec:
    base = dict(station="QM01", station_id="QM01-T", overrides=SMALL_QM01, video_form="png", n_frames=6,
                meteor_start_s=0.02, meteor_duration_s=0.2, start_px=(15.0, 60.0), direction_deg=10.0,
                speed_deg_s=4.0, peak_energy_adu_s=2.0e6, n_stars=5, seed=7)
    base.update(kw)
    return EventSpec(**base)


def _files(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_same_spec_gives_identical_bytes(tmp_path):
    spec = tiny(delta_grooves_frac=0.004, delta_dispersion_deg=0.3, delta_tilt_deg=0.5)
    for name in ("a", "b"):
        simulate_event(spec, tmp_path / name, truth_dir=tmp_path / name / "truth")
    a, b = _files(tmp_path / "a"), _files(tmp_path / "b")
    assert sorted(a) == sorted(b) and len(a) == 6 + 4  # frames, event.toml, station, response, truth
    assert all(a[k] == b[k] for k in a)
    # and a different seed changes the pixels
    simulate_event(dataclasses.replace(spec, seed=8), tmp_path / "c", truth_dir=tmp_path / "c" / "truth")
    video = [k for k in a if k.endswith("frame_00003.png")][0]
    assert a[video] != _files(tmp_path / "c")[video]


def test_noise_draw_changes_the_noise_only():
    # Another noise draw of the same scene: the noise-free render (the scene) is identical,
    # the noisy pixels and the stars' twinkle differ, and draw 0 is the seed's own render
    # (earlier benches unchanged).
    spec = tiny()
    scene = [render_event(dataclasses.replace(spec, noise=False, noise_draw=k)) for k in (0, 1)]
    assert np.array_equal(scene[0].linear_clean, scene[1].linear_clean)
    noisy = [render_event(dataclasses.replace(spec, noise_draw=k)) for k in (0, 1)]
    assert not np.array_equal(noisy[0].stored, noisy[1].stored)
    # the light without noise differs only by the stars' twinkle (7 % per draw, render.SCINTILLATION):
    # under half the brightest light of the scene (5 sigma of the two draws' difference, 0.1)
    twinkle = np.abs(noisy[1].linear_clean - noisy[0].linear_clean)
    assert 0 < twinkle.max() <= 0.5 * scene[0].linear_clean.max()
    assert np.array_equal(noisy[0].stored, render_event(spec).stored)


def test_true_background_is_the_mean_of_meteor_free_light():
    # Rendered.background_adu (an oracle for benches) is the light of a frame without the
    # meteor and without twinkle: without noise (no sky, no twinkle) it is every frame's light
    # wherever the meteor never reaches; with noise the sky is in it, and a frame's light there
    # differs from it only by the stars' twinkle
    spec = tiny()
    clean = render_event(dataclasses.replace(spec, noise=False))
    still = np.all(clean.linear_clean == clean.linear_clean[0], axis=0)  # the meteor never lit
    assert still.mean() > 0.5 and np.any(clean.background_adu[still] > 0.1)  # and (faint) stars are there
    assert_allclose(clean.linear_clean[0][still], clean.background_adu[still], rtol=1e-6, atol=1e-4)
    noisy = render_event(spec)
    sky = (noisy.background_adu - clean.background_adu)[still]
    assert float(np.median(sky[sky > 0])) == pytest.approx(spec.sky_adu, rel=0.15)  # 0.9-1.1 x gradient
    twinkle = (noisy.linear_clean[0] - noisy.background_adu)[still]
    # 7 % per star (render.SCINTILLATION): within 5 sigma of it
    assert np.all(np.abs(twinkle) <= 0.35 * clean.background_adu[still] + 1e-4)
    assert np.any(np.abs(twinkle) > 1e-4)


@pytest.mark.parametrize("form", ["avi", "fits", "tiff", "fits-frames"])
def test_written_event_loads_through_the_readers(tmp_path, form):
    spec = tiny(video_form=form, delta_grooves_frac=-0.005, delta_dispersion_deg=0.5, delta_tilt_deg=-3.0)
    sim = simulate_event(spec, tmp_path / "out", truth_dir=tmp_path / "truth")
    assert not (sim.event_dir / "truth").exists() and sim.truth_json.parent == tmp_path / "truth"
    event = load_event(sim.event_dir)
    station = load_station(find_station_file(event))
    assert station.path == sim.station_toml
    assert event.id == "20261114T031522Z_QM01-T" and event.speed_km_s == spec.speed_km_s
    frames = list(iter_frames(event, station))
    assert len(frames) == spec.n_frames and frames[0].signal.shape == (160, 240)
    truth = json.loads(sim.truth_json.read_text())
    true_g, wrote = truth["geometry_true"]["grating"], truth["geometry_written"]["grating"]
    assert_allclose(station.grating.grooves_per_mm, true_g["grooves_per_mm"] * (1 - 0.005), rtol=1e-12)
    assert_allclose(station.grating.dispersion_angle_deg, true_g["dispersion_angle_deg"] + 0.5)
    # tilt 1.5 - 3.0 < 0 is written as +1.5 deg with the azimuth turned by 180 deg: the same normal
    assert_allclose([station.grating.tilt_deg, station.grating.tilt_azimuth_deg], [1.5, 210.0])
    assert wrote["grooves_per_mm"] == station.grating.grooves_per_mm
    assert station.response is not None and station.response.response.max() == 1.0


def test_composition_in_truth_is_the_spec_and_groups_follow_the_contract(tmp_path):
    spec = tiny(na=0.137, mg=0.291, fe=0.572, n_frames=4)
    sim = simulate_event(spec, tmp_path, truth_dir=tmp_path / "truth")
    assert sim.truth["composition"] == {"na": 0.137, "mg": 0.291, "fe": 0.572}
    model = build_emission(spec)
    totals = np.array([model.group_share(g) for g in ("na", "mg", "fe")])
    assert_allclose(totals / totals.sum(), [0.137, 0.291, 0.572], rtol=1e-12)  # exact up to round-off
    # membership per contract section 6
    na = model.wavelength_nm[model.group == "na"]
    mg = model.wavelength_nm[model.group == "mg"]
    fe = model.wavelength_nm[model.group == "fe"]
    assert_allclose(na, [588.995, 589.592], atol=1e-3)
    assert_allclose(mg, [516.732, 517.268, 518.360], atol=1e-3)
    assert fe.size == 9 and fe.min() > 526 and fe.max() < 546
    assert set(model.species[model.group == "fe"]) == {"Fe I"}
    assert set(model.multiplet[model.group == "fe"]) == {"a 5F - z 5D*"}  # multiplet 15 terms
    groups = sim.truth["groups"]
    g = np.array([groups[k]["energy"] for k in ("na", "mg", "fe")])
    assert_allclose(g / g.sum(), [0.137, 0.291, 0.572], rtol=1e-5)  # JSON keeps 6 digits


def test_na_free_meteor_has_no_sodium():
    model = build_emission(tiny(na=0.0, mg=0.4, fe=0.6))
    assert model.share[model.species == "Na I"].sum() == 0.0
    with pytest.raises(ValueError, match="sum to 1"):
        tiny(na=0.5, mg=0.5, fe=0.5)


def test_lte_line_ratio_inside_one_species_follows_boltzmann():
    # External check: NIST ASD (Kramida et al., doi:10.18434/T4W30F) values entered by hand:
    # Fe I 371.9935 nm: A = 1.62e7 s^-1, g_u = 11, E_u = 3.3320 eV (26874.55 cm^-1);
    # Fe I 404.5813 nm: A = 8.62e7 s^-1, g_u = 9,  E_u = 4.5485 eV (36686.18 cm^-1).
    # LTE, optically thin: I ~ (hc/lambda) A g_u exp(-E_u/kT); k = 8.617333e-5 eV/K (CODATA 2018).
    t_k = 4500.0
    k_ev = 8.617333262e-5
    expected = (1.62e7 * 11 / 371.9935) / (8.62e7 * 9 / 404.5813) * math.exp(-(3.3320 - 4.5485) / (k_ev * t_k))
    model = build_emission(tiny(temperature_k=t_k))

    def share(wl):
        i = np.flatnonzero((model.species == "Fe I") & (np.abs(model.wavelength_nm - wl) < 0.005))
        assert i.size == 1
        return model.share[i[0]]

    # 1e-3: the hand values carry 3-4 significant digits and E_u is rounded to 1e-4 eV
    assert_allclose(share(371.9935) / share(404.5813), expected, rtol=1e-3)


@pytest.mark.parametrize("group", ["na", "mg"])
def test_line_energy_is_conserved_on_the_sensor(tmp_path, group):
    # Noise-free, response 1, a 16-bit linear camera so quantisation is negligible, and only
    # one group species (composition 1 for it, every nuisance strength 0). Bilinear splatting
    # and a normalised Gaussian PSF conserve flux, so the box sum equals the truth energy of
    # the lines in it. Weak neighbours near the box edge count with the share of their
    # (Gaussian, 1.2 px) PSF inside the box; 1 % covers that approximation and the wings.
    # No atmosphere here (its attenuation is tested below).
    comp = {"na": 0.0, "mg": 0.0, "fe": 0.0, group: 1.0}
    spec = tiny(overrides=LINEAR_16BIT, video_form="fits", noise=False, flat_response=True, n_stars=0,
                nuisance=ONLY_GROUPS, speed_deg_s=0.0, direction_deg=0.0, n_frames=4,
                meteor_duration_s=0.3, peak_energy_adu_s=5.0e6, atmosphere=False, **comp)
    sim = simulate_event(spec, tmp_path, truth_dir=tmp_path / "truth")
    event = load_event(sim.event_dir)
    frames = list(iter_frames(event, load_station(sim.station_toml)))
    truth = sim.truth
    geo = SpectralGeometry.from_station(spec.true_station())
    lines = truth["lines"]
    energy = np.array(lines["energy"])
    xs, ys = geo.spectrum_pixel(*spec.start_px, np.array(lines["lab_nm"]))
    members = np.array([g == group for g in lines["group"]])
    ix, iy = int(round(xs[members].mean())), int(round(ys[members].mean()))
    sigma = math.hypot(spec.psf_sigma_px, math.sqrt(1 / 6))  # PSF and mean bilinear spread

    def inside(c, lo):
        return 0.5 * (erf((lo + 13.0 - c) / (math.sqrt(2) * sigma)) - erf((lo - c) / (math.sqrt(2) * sigma)))

    share_in_box = np.nan_to_num(inside(xs, ix - 6.5) * inside(ys, iy - 6.5))
    assert np.all(share_in_box[members] > 0.999)  # the group itself sits well inside
    for k in (1, 2):
        want = (energy * share_in_box).sum() * truth["frames"]["energy_fraction"][k]
        got = frames[k].signal[iy - 6:iy + 7, ix - 6:ix + 7].sum(dtype=np.float64)
        assert want > 2000.0
        assert_allclose(got, want, rtol=0.01)
    total = truth["energy_total"]
    assert_allclose(energy.sum() + total["continuum"] + total["bands"], total["all"], rtol=1e-3)
    assert truth["first_order_share"] == FIRST_ORDER_SHARE


def _box(img, x, y, half=6):
    ix, iy = int(round(x)), int(round(y))
    return img[iy - half:iy + half + 1, ix - half:ix + half + 1].sum(dtype=np.float64)


def test_atmosphere_attenuates_by_the_transmission_at_the_meteor_altitude():
    # A meteor held still on the optical axis of QM01 (pointing altitude 48 deg): by the
    # definition of [pointing] (contract section 3) it is seen at 48 deg. Rendered noise-free
    # with and without the atmosphere, every image point scales by T(lambda, 48 deg) of
    # meteorspec.extinction (tested against Kasten & Young 1989 and Bucholtz 1995 in
    # test_extinction.py); splat and PSF are linear, so the ratio of box sums is exact up to the
    # spread of T over the lines in a box and float32 storage: 1e-3 (measured 1e-4 at Na D,
    # 6e-4 at Mg b, whose lines span 1.6 nm where T changes by 0.2 % per nm).
    base = tiny(overrides=LINEAR_16BIT, noise=False, flat_response=True, n_stars=0, nuisance=ONLY_GROUPS,
                speed_deg_s=0.0, start_px=(119.5, 79.5), n_frames=4, meteor_duration_s=0.3,
                na=0.5, mg=0.5, fe=0.0)
    on, off = render_event(base), render_event(dataclasses.replace(base, atmosphere=False))
    station = base.true_station()
    model = ExtinctionModel.for_station(station)
    assert station.pointing.altitude_deg == 48.0 and on.atmosphere == model and off.atmosphere is None
    assert_allclose([t.altitude_deg for t in on.truths], 48.0, atol=1e-6)
    geo = on.geometry
    k = 2
    for lam in (589.3, 517.3):
        x, y = geo.spectrum_pixel(119.5, 79.5, lam)
        ratio = _box(on.linear_clean[k], x, y) / _box(off.linear_clean[k], x, y)
        assert_allclose(ratio, transmission(lam, 48.0, model=model), rtol=1e-3)
    # the blue loses more: at airmass 1.35 the Mg/Na ratio drops by about 2-4 %
    t_na, t_mg = (float(transmission(v, 48.0, model=model)) for v in (589.3, 517.3))
    assert 0.95 < t_mg / t_na < 0.99
    # zeroth order: the transmission averaged over the emitted (flat-response) spectrum
    m = on.emission
    want = np.sum(m.share * transmission(m.wavelength_nm, 48.0, model=model)) / np.sum(m.share)
    assert_allclose(on.truths[k].zeroth_flux_adu / off.truths[k].zeroth_flux_adu, want, rtol=1e-9)
    assert_allclose(_box(on.linear_clean[k], 119.5, 79.5) / _box(off.linear_clean[k], 119.5, 79.5), want, rtol=1e-3)


def test_truth_records_the_atmosphere(tmp_path):
    spec = tiny(n_frames=4, noise=False, n_stars=3)
    truth = simulate_event(spec, tmp_path, truth_dir=tmp_path / "truth").truth
    atm = truth["atmosphere"]
    assert atm["applied"] and atm["pressure_hpa"] == pytest.approx(ExtinctionModel.for_station(
        spec.true_station()).pressure_hpa)
    fr = truth["frames"]
    lit = np.array(fr["energy_fraction"]) > 0
    alt = np.array(fr["altitude_deg"], float)
    # altitude from the truth's own pixel through extinction.pixel_altaz (the pipeline's way)
    geo = SpectralGeometry.from_station(spec.true_station())
    a_pix = pixel_altaz(geo.lens, spec.true_station().pointing, np.array(fr["x_mid_px"], float)[lit],
                        np.array(fr["y_mid_px"], float)[lit])[0]
    assert_allclose(alt[lit], a_pix, atol=1e-4)
    # Kasten & Young (1989) eq. 3, written out here
    h = alt[lit]
    ky = 1.0 / (np.sin(np.radians(h)) + 0.50572 * (h + 6.07995) ** -1.6364)
    assert_allclose(np.array(fr["airmass"], float)[lit], ky, rtol=1e-6)
    # energy above the atmosphere, energy_observed after it: less, and less in the blue
    g = truth["groups"]
    t_na = g["na"]["energy_observed"] / g["na"]["energy"]
    t_mg = g["mg"]["energy_observed"] / g["mg"]["energy"]
    assert 0.0 < t_mg < t_na < 1.0
    assert len(truth["stars"]["altitude_deg"]) == 3
    # switched off: no altitude, observed = emitted
    plain = simulate_event(dataclasses.replace(spec, atmosphere=False), tmp_path / "b",
                           truth_dir=tmp_path / "b" / "truth").truth
    assert plain["atmosphere"] == {"applied": False}
    assert all(v is None for v in plain["frames"]["altitude_deg"])
    assert plain["groups"]["na"]["energy_observed"] == plain["groups"]["na"]["energy"]


def test_stars_are_attenuated_at_their_own_altitude():
    spec = tiny(noise=False, n_stars=6, peak_energy_adu_s=0.0, n_frames=2, flat_response=True)
    on, off = render_event(spec), render_event(dataclasses.replace(spec, atmosphere=False))
    st = on.stars
    alt = pixel_altaz(on.geometry.lens, spec.true_station().pointing, st.x_px, st.y_px)[0]
    assert_allclose(on.star_altitude_deg, alt)
    assert np.ptp(alt) > 3.0  # stars spread over the field: the test sees different airmasses
    lam = np.arange(*WAVELENGTH_RANGE_NM, max(on.emission.continuum_step_nm, 0.5))  # the render's star grid
    model = ExtinctionModel.for_station(spec.true_station())
    for i in range(len(st)):
        sp = star_spectrum(st.temperature_k[i], lam)
        want = np.sum(sp * transmission(lam, alt[i], model=model)) / np.sum(sp)
        assert_allclose(on.star_zeroth_adu_s[i] / off.star_zeroth_adu_s[i], want, rtol=1e-9)


def test_default_atmosphere_needs_pointing():
    spec = tiny(noise=False, n_stars=0, n_frames=3)
    station = dataclasses.replace(spec.true_station(), pointing=None)
    assert spec.atmosphere_model(spec.true_station()) is not None
    assert spec.atmosphere_model(station) is None  # default: on only with [pointing]
    a = render_event(spec, station=station)
    b = render_event(dataclasses.replace(spec, atmosphere=False))
    assert a.atmosphere is None and np.array_equal(a.linear_clean, b.linear_clean)
    with pytest.raises(ValueError, match="pointing"):
        render_event(dataclasses.replace(spec, atmosphere=True), station=station)


def test_zeroth_order_centroid_matches_truth():
    # Noise-free render of a moving meteor: bilinear splat + Gaussian PSF keep the centroid,
    # so the rendered centroid equals the exposure-averaged truth (0.05 px: the brief's bar).
    spec = tiny(noise=False, n_stars=0, speed_deg_s=20.0, direction_deg=30.0, n_frames=6)
    r = render_event(spec)
    for t in r.truths[1:5]:
        img = r.linear_clean[t.index]
        ix, iy = int(round(t.x_centroid_px)), int(round(t.y_centroid_px))
        h = 12
        cut = img[iy - h:iy + h + 1, ix - h:ix + h + 1].astype(np.float64)
        yy, xx = np.mgrid[iy - h:iy + h + 1, ix - h:ix + h + 1]
        assert abs((cut * xx).sum() / cut.sum() - t.x_centroid_px) < 0.05
        assert abs((cut * yy).sum() / cut.sum() - t.y_centroid_px) < 0.05
        assert_allclose(cut.sum(), t.zeroth_flux_adu, rtol=0.01)
        assert t.n_substeps >= 2  # ~6 px of motion per frame needs substeps below 0.5 px


@pytest.mark.parametrize("field_order", ["top", "bottom"])
def test_interlaced_fields_in_time_order_with_their_rows(tmp_path, field_order):
    over = dict(SMALL_QM03, **{"camera.field_order": field_order})
    spec = EventSpec("QM03", station_id=f"QM03-{field_order}", overrides=over, video_form="avi", n_frames=4,
                     meteor_start_s=0.0, meteor_duration_s=0.16, start_px=(20.0, 40.0), direction_deg=0.0,
                     speed_deg_s=30.0, peak_energy_adu_s=3.0e5, noise=False, n_stars=0, seed=3)
    sim = simulate_event(spec, tmp_path, truth_dir=tmp_path / "truth")
    event = load_event(sim.event_dir)
    fields = list(iter_frames(event, load_station(sim.station_toml)))
    truth = sim.truth["frames"]
    assert truth["kind"] == "field" and len(fields) == 8 == len(truth["index"])
    first = 0 if field_order == "top" else 1
    xs = []
    for j, f in enumerate(fields):
        assert f.y_start_px == (first if j % 2 == 0 else 1 - first)
        assert_allclose(f.time_s, truth["time_s"][j], atol=1e-9)
        if truth["zeroth_flux_adu"][j] < 50:
            continue
        cut = f.signal[:, :60].astype(np.float64)  # the zeroth order (first order lies further right)
        x = (cut * np.arange(60)).sum() / cut.sum()
        # 0.15 px: gamma 0.45 and 8-bit rounding of a noise-free image, quantisation only
        assert abs(x - truth["x_centroid_px"][j]) < 0.15
        xs.append(x)
    assert len(xs) >= 5 and np.all(np.diff(xs) > 1.0)  # moving right, field after field


def test_random_specs_are_seeded_and_varied():
    a = random_specs(10, seed=5)
    assert a == random_specs(10, seed=5)
    assert a != random_specs(10, seed=6)
    assert {dict(s.overrides)["lens.projection"] for s in a} == set(PROJECTIONS)
    for s in a:
        assert abs(s.na + s.mg + s.fe - 1.0) < 1e-9 and 11 <= s.speed_km_s <= 72
        assert s.delta_grooves_frac == 0.0
    assert any(s.delta_grooves_frac != 0 for s in random_specs(4, seed=5, perturb=True))
    assert len({s.station_id for s in a}) == 10


def test_random_edge_events_move_into_the_field_with_their_spectrum_on_the_sensor():
    """Every random event starts with its first order up to 800 nm on the sensor, and one
    placed at the left, top or bottom margin (6 % of the sensor) moves into the field (a start
    at the right margin, the side the gratings disperse towards, is moved back by the spectrum's
    length, so it is no longer at the margin)."""
    n_edge = 0
    for seed in (4, 6):
        for spec in random_specs(36, seed=seed):
            st = spec.true_station()
            w, h = st.camera.width, st.camera.height
            x, y = spec.start_px
            xr, yr = SpectralGeometry.from_station(st).spectrum_pixel(x, y, 800.0)
            assert 0.0 <= xr <= w and 0.0 <= yr <= h, (spec.station_id, xr, yr)
            side = [abs(x - 0.06 * w) < 1e-6, abs(y - 0.06 * h) < 1e-6, abs(y - 0.94 * h) < 1e-6]
            if not any(side):
                continue
            n_edge += 1
            inward = np.array([1.0, 0.0]) if side[0] else np.array([0.0, 1.0 if side[1] else -1.0])
            a = math.radians(spec.direction_deg)
            assert np.dot([math.cos(a), math.sin(a)], inward) >= math.cos(math.radians(60.0)) - 1e-9
    # 4 edge starts of seeds 4 and 6 stay at these margins; the others moved back so that their
    # spectrum starts on the sensor (and the 800 nm check above covers them)
    assert n_edge >= 4


def test_a_random_event_renders_and_validates(tmp_path):
    spec = random_specs(3, seed=1)[2]
    spec = dataclasses.replace(spec, n_frames=5)
    sim = simulate_event(spec, tmp_path, truth_dir=tmp_path / "truth")
    event = load_event(sim.event_dir)
    assert len(list(iter_frames(event, load_station(sim.station_toml)))) >= 5


def test_sample_specs_cover_the_demo_cases():
    forms = {s.video_form for s in SAMPLE_SPECS.values()}
    assert len(forms) >= 2
    stations = {s.true_station().camera.interlaced for s in SAMPLE_SPECS.values()}
    assert stations == {True, False}
    assert any(s.na == 0 for s in SAMPLE_SPECS.values())


def test_bad_specs_fail_clearly(tmp_path):
    with pytest.raises(ValueError, match="video_form"):
        tiny(video_form="mp4")
    with pytest.raises(ValueError, match="unknown override"):
        tiny(overrides={"camera.colour": 3})
    for draw in (-1, 1.5):
        with pytest.raises(ValueError, match="noise_draw"):
            tiny(noise_draw=draw)
    spec = EventSpec("QM04", video_form="avi", n_frames=2)
    with pytest.raises(ValueError, match="8-bit"):
        simulate_event(spec, tmp_path, truth_dir=tmp_path / "truth")
    assert not any(tmp_path.iterdir())


def test_saturation_and_off_frame_flags():
    bright = render_event(tiny(peak_energy_adu_s=1e9, n_frames=4, n_stars=0))
    faint = render_event(tiny(peak_energy_adu_s=1e4, n_frames=4, n_stars=0))
    assert any(t.saturated for t in bright.truths) and not any(t.saturated for t in faint.truths)
    # a meteor that leaves the sensor through the left edge
    gone = render_event(tiny(start_px=(3.0, 60.0), direction_deg=180.0, speed_deg_s=40.0, n_frames=6,
                             n_stars=0, meteor_duration_s=0.2))
    lit = [t for t in gone.truths if t.emitted_energy_adu > 0]
    assert not lit[0].off_frame and lit[-1].off_frame
