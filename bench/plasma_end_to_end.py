"""Issue 5 acceptance end to end: simulator video -> whole pipeline -> composition, class, Na peak.

Usage (from the top of the repository)::

    OPENBLAS_NUM_THREADS=1 python bench/plasma_end_to_end.py --n 36 --seed 5
    OPENBLAS_NUM_THREADS=1 python bench/plasma_end_to_end.py --n 8 --modes true
    OPENBLAS_NUM_THREADS=1 python bench/plasma_end_to_end.py --samples      (the sample_events)
    python bench/plasma_end_to_end.py --summarise run.jsonl                 (an earlier --out)
    python bench/plasma_end_to_end.py --summarise s5.jsonl s6.jsonl         (seeds pooled)

Events: ``meteorspec.simulate.random_specs(n, seed)`` -- compositions uniform over the
ternary (Dirichlet(1, 1, 1)), speeds 11-72 km/s, every lens projection, edge placements,
interlaced cameras, faint events (strongest group line SNR ~10), saturated fireballs with a
terminal flare (SNR ~3000) and ordinary ones (SNR 40-150). Each event is rendered once and run
through ``pipeline.process_event`` (video reader, background, tracker, calibration,
extraction, response and extinction, plasma fit, line identification, classification,
per-frame fits) in each of these modes:

``true``
    The station file holds the geometry the simulator rendered with and the pipeline keeps it
    (``refine_geometry=False``): judges the chain extraction -> response -> lines -> plasma ->
    classify with a perfect wavelength calibration.
``perturbed``
    The station file's grating values are off by up to +-3 % (grooves), +-4 deg (dispersion
    angle) and +-2 deg (tilt) as in ``bench/bench_calibration.py``; the pipeline refines them
    from the event's lines (the whole chain as a network runs it).
``true-refined``
    The true station file, refined by the event calibration all the same (optional: shows
    what the refinement does when the start is already right).

Measured against the simulator's truth (``truth/<event id>.json``):

* ``|na - truth|``, ``|mg - truth|``, ``|fe - truth|``: median and 95th percentile over all
  events (an event without a finite composition counts as error 1); target <= 0.03 / <= 0.08;
  also split by the instrument FWHM at Mg I 517 nm (``/plasma/instrument_fwhm_nm``): at
  more than ~20 nm the Mg I b triplet and Fe I multiplet 15 (centroid ~535 nm) are not
  resolved (Rayleigh-like criterion, common practice), and per base station;
* class: the truth class is ``classify.classify_points`` of the true group energies at the
  true speed; the events "more than 2 sigma from a boundary" are those whose true point lies
  more than 2 sigma (``classify.boundary_distance_sigma`` with the fit's own covariance
  scaled to the truth) from every boundary; target >= 95 % correct;
* Na peak time: the pipeline's ``peak_time_s:Na I`` against the middle of the exposure in
  which the truth's per-exposure Na I group energy peaks, for events whose strongest group
  line has SNR >= 20 at the light-curve peak; target within one exposure (frame or field).
  The reported sigma is judged against the sub-exposure peak of the truth's curve
  (:func:`subframe_peak_s`), since the brightest exposure's middle is itself up to half an
  exposure off the maximum.

Atmospheric extinction: the simulator renders the atmosphere when the station has
``[pointing]`` (``EventSpec.atmosphere``), and the pipeline then divides it out. By default the
random events are rendered without an atmosphere and their station files carry no ``[pointing]``
(extinction stage skipped), so that only the composition chain is judged; ``--keep-pointing``
renders the atmosphere and lets the pipeline correct it. ``--samples`` runs the sample events as
they are (rendered through the atmosphere; station files with ``[pointing]``) in the chosen modes
other than ``perturbed``.

``--noise-draw K`` renders every event with another draw of its sky, photon and read noise
(``EventSpec.noise_draw``; the scene, stars and emission unchanged): run with several K on the
same events, it shows how far noise alone moves an event's composition and Na peak.

``--oracle`` also fits each event's noise-free truth: the simulator's emission
(``simulate.emission.build_emission``: every line, N2 band and continuum sample at its share),
blurred by the fit's line profile (the pipeline's instrument FWHM times the fit's width factor;
a Gaussian convolved with the motion smear the fit was given, ``fit_plasma(box_nm=...)``), recorded
through the station response as the plasma model records it, binned on the grid of the
spectrum that gave the composition, scaled to that spectrum (one factor, weighted least
squares) and fitted with exactly the call's settings (``fit_plasma`` is wrapped while the
pipeline runs to keep the call). Its composition error is the model's own (the model that
cannot represent the simulator's spectrum, or a degeneracy the priors settle), apart from
the extraction and calibration; where the pipeline's error is large and this one small, the
data (extraction, calibration, noise) carry it. Errors do not subtract: the two are compared
event by event.
The random events are rendered without an atmosphere by default, which the noise-free truth
assumes (with ``--keep-pointing`` it is skipped).

``--oracle-draws K`` (implies ``--oracle``) also fits the noise-free truth K times with noise
added, drawn from the spectrum's own covariance (:meth:`Spectrum.covariance`: the bins'
correlation and the errors common to many bins), seeded by the event's id. The mean of those
fits minus the noise-free fit is what noise alone does to the plasma fit's composition on
average (its estimator bias), apart from extraction and calibration; their spread against the
fits' stated errors checks those errors on the fit alone. A mean of K fits has a standard
error of sd / sqrt(K) (common practice). ``--oracle-set KEY=VALUE`` (repeatable) replaces one
of the pipeline's ``fit_plasma`` keywords in the truth fits (noise-free and drawn), e.g.
``self_absorption=False`` or ``temperature_prior_k=(4867.0,1.0)``, to see which freedom of the
fit a shift comes from.

``--clean`` renders every event without noise (sky, photon and read) on a 16-bit camera
(saturation at 65535 ADU, the station's gain and black level kept; an 8-bit AVI becomes FITS):
the extraction, calibration and plasma model run on exact pixels without the clipping that a
12- or 8-bit camera's saturation brings (a fireball's brightest pixels can still reach 65535;
its flags say so). What the composition is then off by is the chain's own systematic error.
The bin errors the fit weights by are still the pipeline's estimate from the pixels (photon
and read noise of the signal), so chi-square and stated errors keep their noisy scale. SNR, the
kind of event and the Na peak cut are those of the noisy rendering. (Noise-free rendering of
the usual camera misleads on saturated events: with no noise in the wings the saturated bins'
recovery reads 1.3-2.3 times the truth.)

The SNR of an event is recovered from its spec by inverting
``simulate.peak_for_line_snr`` (bisection). No assertions; ``--out FILE`` writes one JSON
line per event and mode for later study.
"""

from __future__ import annotations

import argparse
import ast
import dataclasses
import json
import math
import shutil
import sys
import tempfile
import time
import zlib
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from meteorspec import pipeline  # noqa: E402
from meteorspec.classify import GROUPS, boundary_distance_sigma, classify_points  # noqa: E402
from meteorspec.simulate import (EventSpec, NuisanceStrengths, peak_for_line_snr, random_specs,  # noqa: E402
                                 simulate_event)
from meteorspec.simulate.spec import written_grating  # noqa: E402
from meteorspec.simulate.writer import station_toml_text  # noqa: E402

MODES = ("true", "perturbed", "true-refined")


def perturbed_specs(n: int, seed: int) -> list:
    """The random set with the station files perturbed as in bench/bench_calibration.py."""
    rng = np.random.default_rng([seed, 4])
    return [dataclasses.replace(spec, delta_grooves_frac=float(rng.uniform(-0.03, 0.03)),
                                delta_dispersion_deg=float(rng.uniform(-4.0, 4.0)),
                                delta_tilt_deg=float(rng.uniform(-2.0, 2.0)))
            for spec in random_specs(n, seed=seed)]


def clean_spec(spec):
    """``spec`` rendered without noise on a 16-bit camera (module notes, ``--clean``)."""
    overrides = tuple(o for o in spec.overrides if o[0] not in ("camera.bit_depth", "camera.saturation_adu"))
    overrides += (("camera.bit_depth", 16), ("camera.saturation_adu", 65535.0))
    form = "fits" if spec.video_form == "avi" else spec.video_form  # AVI holds 8 bits only
    return dataclasses.replace(spec, noise=False, overrides=overrides, video_form=form)


def line_snr(spec) -> float:
    """Strongest group line SNR at the peak that ``peak_for_line_snr`` turned into this spec."""
    lo, hi = math.log(0.1), math.log(1e6)
    target = spec.peak_energy_adu_s
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if peak_for_line_snr(spec, math.exp(mid)) < target:
            lo = mid
        else:
            hi = mid
    return math.exp(0.5 * (lo + hi))


def write_station_files(spec, events_dir: Path, *, keep_pointing: bool) -> None:
    """Station files of both modes: ``stations_true/`` (rendered grating values) and the
    simulator's perturbed ``stations/`` file, rewritten without ``[pointing]`` unless
    ``keep_pointing`` (then the event is rendered without an atmosphere, see the module notes)."""
    station = spec.true_station()
    if not keep_pointing:
        station = dataclasses.replace(station, pointing=None)
    response = f"{station.id}_response.csv"
    true_dir = events_dir.parent / "stations_true"
    true_dir.mkdir(parents=True, exist_ok=True)
    (true_dir / response).write_text((events_dir / "stations" / response).read_text())
    (true_dir / f"{station.id}.toml").write_text(
        station_toml_text(station, station.grating, response, note="true geometry (bench)"))
    (events_dir / "stations" / f"{station.id}.toml").write_text(
        station_toml_text(station, written_grating(spec, station.grating), response,
                          note="perturbed geometry (bench)"))


def _attrs(result, part: str) -> dict:
    return result.parts.get(part, {}).get("attrs", {})


def measure(result, truth: dict, *, snr: float) -> dict:
    """Per-event figures of one pipeline result against the truth."""
    comp_true = np.array([truth["composition"][g] for g in GROUPS])
    e_true = np.array([truth["groups"][g]["energy"] for g in GROUPS])
    speed = float(truth["speed_km_s"])
    out = {"event": result.event_id, "status": result.status, "flags": list(result.flags),
           "truth": comp_true.tolist(), "speed_km_s": speed, "snr": snr,
           "class_true": str(classify_points(e_true, speed)),
           "first_order_on_sensor": on_sensor_share(truth)}
    comp = _attrs(result, "composition")
    plasma = result.parts.get("plasma", {})
    if "na" in comp:
        got = np.array([float(comp[g]) for g in GROUPS])
        err = np.abs(got - comp_true) if np.all(np.isfinite(got)) else np.ones(3)  # NaN: a failure
        out |= {"fit": got.tolist(), "err": err.tolist(),
                "class_fit": str(comp["class"]), "class_confidence": float(comp["class_confidence"]),
                "class_reason": str(comp.get("class_reason", "")),
                "err_reported": [float(comp[f"{g}_err"]) for g in GROUPS],
                "temperature_k": float(_attrs(result, "plasma").get("temperature_k", math.nan)),
                "error_method": str(_attrs(result, "plasma").get("group_error_method", "")),
                "composition_source": str(comp.get("source", ""))}
        g = np.array([float(_attrs(result, "plasma")[f"{k}_intensity"]) for k in GROUPS])
        cov = np.asarray(plasma["datasets"]["group_covariance"][0], float)
        scale = float(np.clip(g, 0, None).sum())
        try:
            out["boundary_sigma"] = boundary_distance_sigma(comp_true, cov / scale**2, speed_km_s=speed)
        except (ValueError, np.linalg.LinAlgError):
            out["boundary_sigma"] = math.nan
        timeline = result.parts["composition"].get("groups", {}).get("timeline", {}).get("attrs", {})
        t_na = float(timeline.get("peak_time_s:Na I", math.nan))
        t_frames = np.asarray(truth["frames"]["time_s"], float)
        na_frames = np.asarray(truth["groups"]["na"]["per_frame"], float)
        dt = float(np.median(np.diff(t_frames)))
        t_true = float(t_frames[int(np.argmax(na_frames))]) if na_frames.max() > 0 else math.nan
        sigma_na = float(timeline.get("peak_time_err_s:Na I", math.nan))
        t_sub = subframe_peak_s(t_frames, na_frames)
        out |= {"na_peak_s": t_na, "na_peak_true_s": t_true, "na_peak_err_frames": (t_na - t_true) / dt,
                "na_peak_sigma_frames": sigma_na / dt, "na_peak_subframe_err_frames": (t_na - t_sub) / dt}
        if "instrument_fwhm_nm" in plasma.get("datasets", {}):
            fw = np.asarray(plasma["datasets"]["instrument_fwhm_nm"][0], float)
            wl = np.asarray(plasma["datasets"]["wavelength_nm"][0], float)
            out["fwhm_517_nm"] = float(np.interp(517.3, wl, fw))
    else:
        out |= {"fit": None, "err": [1.0, 1.0, 1.0], "class_fit": None,
                "reason": str(_attrs(result, "plasma").get("reason") or result.error
                              or _attrs(result, "track").get("reason", ""))}
    return out


def on_sensor_share(truth: dict) -> float:
    """Share of the flight's first-order light that the simulator put on the sensor (truth
    ``frames.first_order_on_sensor`` weighted by ``frames.energy_fraction``)."""
    frames = truth["frames"]
    w = np.asarray(frames["energy_fraction"], float)
    on = np.asarray([math.nan if v is None else v for v in frames["first_order_on_sensor"]], float)
    return float(np.nansum(w * on) / w.sum()) if w.sum() > 0 else math.nan


def subframe_peak_s(time_s: np.ndarray, energy: np.ndarray) -> float:
    """Sub-exposure peak time of a noise-free per-exposure light curve: the vertex of the parabola
    through its largest exposure and the two beside it.

    The acceptance compares the pipeline's (continuous) peak time with the middle of the truth's
    brightest exposure, which itself lies up to half an exposure from the curve's maximum; the
    pulls of the reported sigma are taken against this vertex instead. Exposure means of a
    quadratic are the quadratic plus a constant, so the vertex is exact for a curve that is
    quadratic over the three exposures (common practice: three-point peak interpolation).
    NaN when the maximum is at either end or the three do not form a maximum (e.g. a flare).
    """
    if energy.size < 3 or not np.any(energy > 0):
        return math.nan
    k = int(np.argmax(energy))
    if k == 0 or k == energy.size - 1:
        return math.nan
    y0, y1, y2 = (float(v) for v in energy[k - 1:k + 2])
    curvature = y0 - 2.0 * y1 + y2
    if not curvature < 0:
        return math.nan
    return float(time_s[k] + 0.5 * (y0 - y2) / curvature * (time_s[k + 1] - time_s[k]))


def percentile_intervals(errors: np.ndarray, *, q: float = 95.0, level: float = 0.90,
                         resamples: int = 4000, seed: int = 0) -> np.ndarray:
    """Percentile-bootstrap interval of each column's ``q``-th percentile over the events.

    The events are resampled with replacement (Efron & Tibshirani, *An Introduction to the
    Bootstrap*, 1993, ch. 13, from memory); returns shape (2, n_columns), the interval's ends.
    With 36 events the 95th percentile rests on the two or three largest errors, so the
    interval says how much one seeded set can tell about the population the acceptance means.
    """
    rng = np.random.default_rng(seed)
    pick = rng.integers(0, len(errors), size=(resamples, len(errors)))
    stats = np.percentile(errors[pick], q, axis=1)  # (resamples, n_columns)
    tail = 50.0 * (1.0 - level)
    return np.percentile(stats, [tail, 100.0 - tail], axis=0)


def summarise(rows: list[dict], label: str) -> None:
    if not rows:
        return
    e = np.array([r["err"] for r in rows])
    print(f"\n== {label}: {len(rows)} events, {sum(r['fit'] is None for r in rows)} without composition")
    for r in rows:
        if r["fit"] is None:
            print(f"    {r['event']}: {r['status']}, first order on the sensor "
                  f"{100.0 * r.get('first_order_on_sensor', math.nan):.0f} % of the light; {r.get('reason') or '-'}")
    lo_hi = percentile_intervals(e)
    for j, g in enumerate(GROUPS):
        print(f"  |{g} - truth|: median {np.median(e[:, j]):.4f}  95th {np.percentile(e[:, j], 95):.4f}"
              f" (90 % interval over events {lo_hi[0, j]:.3f}-{lo_hi[1, j]:.3f})  max {e[:, j].max():.4f}")
    comp_ok = all(np.median(e[:, j]) <= 0.03 and np.percentile(e[:, j], 95) <= 0.08 for j in range(3))
    far = [r for r in rows if r.get("boundary_sigma", math.nan) > 2.0]
    n_ok = sum(r["class_fit"] == r["class_true"] for r in far)
    cls_ok = bool(far) and n_ok >= 0.95 * len(far)
    print(f"  class correct, > 2 sigma from a boundary: {n_ok}/{len(far)}"
          + (f" ({100.0 * n_ok / len(far):.0f} %)" if far else "")
          + f"; all events: {sum(r['class_fit'] == r['class_true'] for r in rows)}/{len(rows)}")
    bright = [r for r in rows if r["snr"] >= 20.0]
    peak = [r for r in bright if math.isfinite(r.get("na_peak_err_frames", math.nan))]
    n_peak = sum(abs(r["na_peak_err_frames"]) <= 1.0 for r in peak)
    peak_ok = len(bright) > 0 and n_peak == len(bright)
    print(f"  Na peak within one exposure (SNR >= 20): {n_peak}/{len(bright)}"
          f" ({len(bright) - len(peak)} without a peak time)")
    clear = [r for r in peak if "na_peak_saturated" not in r["flags"]]
    pulls = [abs(r["na_peak_err_frames"]) / r["na_peak_sigma_frames"] for r in peak
             if r.get("na_peak_sigma_frames", 0) > 0]
    if pulls:
        print(f"    |error| / reported sigma: median {np.median(pulls):.2f}, "
              f"{sum(p <= 2.0 for p in pulls)}/{len(pulls)} within 2 sigma")
    sub = [abs(r["na_peak_subframe_err_frames"]) / r["na_peak_sigma_frames"] for r in peak
           if r.get("na_peak_sigma_frames", 0) > 0 and math.isfinite(r.get("na_peak_subframe_err_frames", math.nan))]
    if sub:
        print(f"    against the sub-exposure truth (subframe_peak_s): median {np.median(sub):.2f}, "
              f"{sum(p <= 2.0 for p in sub)}/{len(sub)} within 2 sigma")
    print(f"    of which Na D unsaturated at the peak: {sum(abs(r['na_peak_err_frames']) <= 1.0 for r in clear)}"
          f"/{len(clear)}; flagged na_peak_saturated: "
          f"{sum(abs(r['na_peak_err_frames']) <= 1.0 for r in peak if r not in clear)}/{len(peak) - len(clear)}")
    for label, lo, hi in (("FWHM(517) <= 20 nm", 0.0, 20.0), ("FWHM(517) > 20 nm", 20.0, np.inf)):
        sub = [r for r in bright if lo < r.get("fwhm_517_nm", np.inf) <= hi]
        ok = sum(abs(r.get("na_peak_err_frames", math.nan)) <= 1.0 for r in sub)
        print(f"    {label}: {ok}/{len(sub)} within one exposure")
    missing = [r for r in bright if not math.isfinite(r.get("na_peak_err_frames", math.nan))]
    reasons: dict[str, int] = {}
    for r in missing:
        why = [f for f in r["flags"] if f.startswith("na_peak_") and f != "na_peak_saturated"] or (
            ["no composition"] if r["fit"] is None else ["other"])
        reasons[why[0]] = reasons.get(why[0], 0) + 1
    print("    without a Na peak time: " + ", ".join(f"{k} {v}" for k, v in sorted(reasons.items())))
    print(f"  targets: composition {'met' if comp_ok else 'NOT met'}, class {'met' if cls_ok else 'NOT met'},"
          f" Na peak {'met' if peak_ok else 'NOT met'}")
    for label, lo, hi in (("FWHM(517) <= 20 nm (Mg I b resolved from Fe I 15)", 0.0, 20.0),
                          ("FWHM(517) > 20 nm", 20.0, np.inf)):
        sub = [r for r in rows if lo < r.get("fwhm_517_nm", np.inf) <= hi]
        if sub:
            eb = np.array([r["err"] for r in sub])
            far_s = [r for r in sub if r.get("boundary_sigma", math.nan) > 2.0]
            print(f"  {label}: {len(sub)} events; median " + "/".join(f"{np.median(eb[:, j]):.3f}" for j in range(3))
                  + ", 95th " + "/".join(f"{np.percentile(eb[:, j], 95):.3f}" for j in range(3))
                  + f"; class {sum(r['class_fit'] == r['class_true'] for r in far_s)}/{len(far_s)} (> 2 sigma)")
    # stated errors by the path that gave them (plasma.fit_plasma: linearised, or a parametric
    # bootstrap where the linear check fails); |error| / stated has a median of 0.674 and exceeds
    # 2 on 4.6 % of components for Gaussian errors (common practice)
    by_method: dict[tuple[str, str], list[np.ndarray]] = {}
    for r in rows:
        if r.get("error_method") and "err_reported" in r:
            key = (r["error_method"], "FWHM(517) > 20 nm" if r.get("fwhm_517_nm", np.inf) > 20.0 else "FWHM(517) <= 20 nm")
            by_method.setdefault(key, []).append(np.array(r["err"]) / np.array(r["err_reported"]))
    for (method, res), zs in sorted(by_method.items()):
        z = np.array(zs)
        print(f"  {method} errors, {res}: {len(z)} events; |error| / stated median "
              + "/".join(f"{np.nanmedian(z[:, j]):.2f}" for j in range(3)) + ", above 2 on "
              + "/".join(f"{np.mean(z[:, j] > 2):.0%}" for j in range(3)))
    oracle = [r for r in rows if "oracle_err" in r]
    if oracle:
        eo = np.array([max(r["oracle_err"]) for r in oracle])
        ed = np.array([max(r["err"]) for r in oracle])
        broad = np.array([r.get("fwhm_517_nm", np.inf) > 20.0 for r in oracle])
        print(f"  noise-free truth (--oracle), {len(oracle)} events: largest-component error median {np.median(eo):.3f}, "
              f"95th {np.percentile(eo, 95):.3f}, max {eo.max():.3f}; > 0.03 on {int((eo > 0.03).sum())} "
              f"({int((eo[broad] > 0.03).sum())} at FWHM(517) > 20 nm); the pipeline's > 0.08 on "
              f"{int((ed > 0.08).sum())}, of which the truth fit > 0.03 on {int(((ed > 0.08) & (eo > 0.03)).sum())}")
    drawn = [r for r in oracle if r.get("oracle_noise_draws", 0) >= 2]
    if drawn:
        bias = np.array([r["oracle_noise_bias"] for r in drawn])
        se = np.array([r["oracle_noise_bias_se"] for r in drawn])
        zm = np.array([r["oracle_noise_z_mean"] for r in drawn])
        ratio = np.array([r["oracle_noise_sd"] for r in drawn]) / np.array([r["oracle_noise_stated"] for r in drawn])
        print(f"  noise drawn onto the truth (--oracle-draws), {len(drawn)} events, "
              f"{sum(r['oracle_noise_draws'] for r in drawn)} fits: mean shift by noise (fits - noise-free fit) "
              + "/".join(f"{bias[:, j].mean():+.4f}" for j in range(3))
              + " +- " + "/".join(f"{math.sqrt(np.sum(se[:, j] ** 2)) / len(drawn):.4f}" for j in range(3))
              + ", in stated sigmas " + "/".join(f"{zm[:, j].mean():+.2f}" for j in range(3))
              + "; fits' sd / stated, median " + "/".join(f"{np.median(ratio[:, j]):.2f}" for j in range(3)))
        for r, b, s_ in zip(drawn, bias, se):
            print(f"    {r['event']}: snr {r['snr']:.0f}, FWHM(517) {r.get('fwhm_517_nm', math.nan):.0f} nm, "
                  f"{r['oracle_noise_draws']} fits, shift " + "/".join(f"{x:+.3f}" for x in b)
                  + " +- " + "/".join(f"{x:.3f}" for x in s_))
    by_base: dict[str, list[dict]] = {}
    for r in rows:
        by_base.setdefault(r.get("base_station", "?"), []).append(r)
    for base, sub in sorted(by_base.items()):
        eb = np.array([r["err"] for r in sub])
        print(f"  base station {base}: {len(sub)} events, max-component error median "
              f"{np.median(eb.max(axis=1)):.3f}, largest {eb.max():.3f}")


def print_row(r: dict, mode: str, seconds: float) -> None:
    if r["fit"] is None:
        print(f"  {mode:12s} {r['event']:34s} snr {r['snr']:6.0f}: NO composition ({r.get('reason')})")
        return
    t, f = r["truth"], r["fit"]
    print(f"  {mode:12s} {r['event']:34s} snr {r['snr']:6.0f} v {r['speed_km_s']:4.0f}  truth "
          f"{t[0]:.3f}/{t[1]:.3f}/{t[2]:.3f} fit {f[0]:.3f}/{f[1]:.3f}/{f[2]:.3f} max|d| {max(r['err']):.3f}"
          f"  class {r['class_true']}->{r['class_fit']} ({r['boundary_sigma']:.1f} sig)"
          f"  Na peak {r['na_peak_err_frames']:+.2f} +- {r.get('na_peak_sigma_frames', math.nan):.2f} fr"
          f"  {seconds:.0f} s")


class _FitRecorder:
    """Keeps every ``pipeline.fit_plasma`` call (spectrum, settings, result) while active."""

    def __init__(self) -> None:
        self.calls: list[tuple] = []
        self._orig = None

    def __enter__(self) -> "_FitRecorder":
        self._orig = pipeline.fit_plasma

        def recording(spectrum, **kw):
            fit = self._orig(spectrum, **kw)
            self.calls.append((spectrum, kw, fit))
            return fit

        pipeline.fit_plasma = recording
        return self

    def __exit__(self, *exc) -> None:
        pipeline.fit_plasma = self._orig


def oracle_fit(spec, calls: list[tuple], result, *, draws: int = 0, settings: dict | None = None) -> dict:
    """The composition the plasma fit gives on the event's noise-free truth (module notes, --oracle).

    The call whose group intensities are the event's ``/plasma`` ones is repeated on the truth;
    ``{}`` when there is none (no composition) or the event was rendered through an atmosphere.
    ``draws``: also refit the truth with that many draws of the spectrum's own noise
    (module notes, ``--oracle-draws``; :func:`noise_draw_fits`). ``settings``: ``fit_plasma``
    keywords that replace the call's in these truth fits (``--oracle-set``).
    """
    from meteorspec.plasma import _split_profile, box_profile_cdf
    from meteorspec.simulate.emission import build_emission

    plasma_attrs = _attrs(result, "plasma")
    na = plasma_attrs.get("na_intensity")
    if spec.atmosphere or na is None:
        return {}
    chosen = [c for c in calls if c[2] and math.isclose(c[2].group_intensity.get("na", math.nan), float(na),
                                                        rel_tol=1e-9, abs_tol=1e-12)]
    if not chosen:
        return {}
    spectrum, kw, fit = chosen[-1]
    em = build_emission(spec)
    wl = np.asarray(spectrum.wavelength_nm, float)
    bw = np.asarray(spectrum.bin_width_nm, float)
    fwhm = kw["fwhm_nm"]
    fwhm = fwhm(wl) if callable(fwhm) else np.broadcast_to(np.asarray(fwhm, float), wl.shape)
    fwhm = np.interp(em.wavelength_nm, wl, fwhm * fit.width_scale)
    # the fit's line profile: a Gaussian and the motion smear in it, split as the model splits it
    box = fit.config.get("box_nm")
    box_fn = None if box is None else (lambda lam: np.interp(lam, wl, box * fit.width_scale))
    box, gauss_fwhm = _split_profile(fwhm, box_fn, em.wavelength_nm)
    sigma = gauss_fwhm / math.sqrt(8.0 * math.log(2.0))
    beta = (np.zeros_like(sigma) if box is None else 0.5 * box / sigma)[:, None]
    x = em.wavelength_nm[:, None]
    blur = (box_profile_cdf((wl + 0.5 * bw - x) / sigma[:, None], beta)
            - box_profile_cdf((wl - 0.5 * bw - x) / sigma[:, None], beta)) / bw
    share = np.asarray(em.share, float)
    response = kw.get("response_nm")
    if response is not None:  # recorded with the response at each line, divided by it at each bin
        r_wl, r_val = (np.asarray(a, float) for a in response)
        density = (share * np.interp(em.wavelength_nm, r_wl, r_val)) @ blur / np.interp(wl, r_wl, r_val)
    else:
        density = share @ blur
    flux = np.asarray(spectrum.flux, float)
    err = np.asarray(spectrum.flux_err, float)
    good = ~np.asarray(spectrum.mask, bool) & np.isfinite(flux) & np.isfinite(err) & (err > 0)
    w = 1.0 / err[good] ** 2
    scale = float(np.sum(density[good] * flux[good] * w) / np.sum(density[good] ** 2 * w))
    kw = kw | (settings or {})
    truth_fit = pipeline.fit_plasma(dataclasses.replace(spectrum, flux=scale * density), **kw)
    if not truth_fit:
        return {"oracle_reason": truth_fit.reason}
    g = np.array([truth_fit.group_intensity[k] for k in GROUPS])
    comp = g / g.sum()
    true_comp = np.array([spec.composition[k] for k in GROUPS])
    out = {"oracle_fit": comp.tolist(), "oracle_err": np.abs(comp - true_comp).tolist(),
           "oracle_chi2": float(truth_fit.chi2_reduced)}
    if settings:
        out["oracle_settings"] = {k: repr(v) for k, v in settings.items()}
    if draws > 0:
        out |= noise_draw_fits(dataclasses.replace(spectrum, flux=scale * density), kw, comp, draws=draws,
                               seed=zlib.crc32(result.event_id.encode()))
    return out


def noise_draw_fits(truth_spectrum, kw: dict, comp0: np.ndarray, *, draws: int, seed: int) -> dict:
    """Plasma fits of a noise-free spectrum with ``draws`` draws of its own noise added.

    The noise is Gaussian with the spectrum's covariance over its usable bins
    (:meth:`Spectrum.covariance`; drawn through its symmetric square root from the
    eigen-decomposition, negative round-off eigenvalues clipped to 0). Returns the mean composition of the fits
    minus ``comp0`` (the noise-free fit's) with its standard error, the fits' sd, their median
    stated error (:func:`meteorspec.classify.composition_from_groups` of each fit's group
    covariance) and the mean of (fit - comp0) / stated.
    """
    from meteorspec.classify import composition_from_groups

    flux = np.asarray(truth_spectrum.flux, float)
    err = np.asarray(truth_spectrum.flux_err, float)
    good = np.flatnonzero(~np.asarray(truth_spectrum.mask, bool) & np.isfinite(flux) & np.isfinite(err)
                          & (err > 0))
    cov = np.nan_to_num(truth_spectrum.covariance())[np.ix_(good, good)]
    w, v = np.linalg.eigh(0.5 * (cov + cov.T))
    root = v * np.sqrt(np.clip(w, 0.0, None))  # cov = root root^T (clipped round-off)
    rng = np.random.default_rng(seed)
    comps, stated = [], []
    for _ in range(int(draws)):
        f = flux.copy()
        f[good] += root @ rng.standard_normal(good.size)
        fit = pipeline.fit_plasma(dataclasses.replace(truth_spectrum, flux=f), **kw)
        if not fit:
            continue
        g = np.array([fit.group_intensity[k] for k in GROUPS])
        values, errors = composition_from_groups(g, fit.group_covariance)
        if np.all(np.isfinite(values)):
            comps.append(values)
            stated.append(errors)
    if len(comps) < 2:
        return {"oracle_noise_draws": len(comps)}
    c, e = np.array(comps), np.array(stated)
    d = c - np.asarray(comp0, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = d / e
    return {"oracle_noise_draws": len(c), "oracle_noise_bias": d.mean(axis=0).tolist(),
            "oracle_noise_bias_se": (d.std(axis=0, ddof=1) / math.sqrt(len(c))).tolist(),
            "oracle_noise_sd": c.std(axis=0, ddof=1).tolist(),
            "oracle_noise_stated": np.median(e, axis=0).tolist(),
            "oracle_noise_z_mean": np.nanmean(np.where(np.isfinite(z), z, np.nan), axis=0).tolist()}


def run_random(args) -> dict[str, list[dict]]:
    specs = perturbed_specs(args.n, args.seed)
    if args.only:
        specs = [specs[k] for k in args.only]
    if args.noise_draw:
        specs = [dataclasses.replace(s, noise_draw=args.noise_draw) for s in specs]
    rows: dict[str, list[dict]] = {m: [] for m in args.modes}
    out = open(args.out, "a") if args.out else None
    with tempfile.TemporaryDirectory(prefix="ms_e2e_") as tmp:
        work = Path(tmp)
        for spec in specs:
            if not args.keep_pointing:
                spec = dataclasses.replace(spec, atmosphere=False)
            snr = line_snr(spec)  # that of the usual rendering, also with --clean
            if args.clean:
                spec = clean_spec(spec)
            sim = simulate_event(spec, work / "events", truth_dir=work / "truth")
            write_station_files(spec, work / "events", keep_pointing=args.keep_pointing)
            kind = "fireball" if spec.light_curve == "flare" else ("faint" if snr < 15 else "normal")
            print(f"{sim.event_id}: {kind}, {spec.true_station().lens.projection}, "
                  f"{'interlaced' if spec.true_station().camera.interlaced else 'progressive'}, {spec.video_form}")
            for mode in args.modes:
                t0 = time.perf_counter()
                stations = work / ("events/stations" if mode == "perturbed" else "stations_true")
                with _FitRecorder() as recorder:
                    result = pipeline.process_event(sim.event_dir, stations_dir=stations,
                                                    refine_geometry=(mode != "true"))
                oracle = (oracle_fit(spec, recorder.calls, result, draws=args.oracle_draws,
                                     settings=args.oracle_set)
                          if args.oracle or args.oracle_draws or args.oracle_set else {})
                r = measure(result, sim.truth, snr=snr) | oracle | {
                    "mode": mode, "kind": kind, "seed": args.seed, "noise_draw": args.noise_draw,
                    "clean": bool(args.clean),
                    "base_station": spec.station,
                    "binned": spec.station != "QM03", "projection": spec.true_station().lens.projection,
                    "interlaced": bool(spec.true_station().camera.interlaced)}
                rows[mode].append(r)
                print_row(r, mode, time.perf_counter() - t0)
                if out is not None:
                    out.write(json.dumps(r) + "\n")
                    out.flush()
            shutil.rmtree(sim.event_dir, ignore_errors=True)  # keep the temporary folder small
    if out is not None:
        out.close()
    return rows


def run_samples(args) -> dict[str, list[dict]]:
    folder = REPO / "sample_events"
    rows: dict[str, list[dict]] = {m: [] for m in args.modes if m != "perturbed"}
    rows["sample files"] = []
    for event_dir in sorted(p.parent for p in folder.glob("*/event.toml")):
        truth = json.loads((folder / "truth" / f"{event_dir.name}.json").read_text())
        spec_d = dict(truth["spec"], nuisance=NuisanceStrengths(**truth["spec"]["nuisance"]))
        snr = line_snr(EventSpec(**spec_d))
        for label, refine in [("sample files", True)] + [(m, m != "true") for m in rows if m != "sample files"]:
            t0 = time.perf_counter()
            if label == "sample files":
                result = pipeline.process_event(event_dir)
            else:
                # the sample station files are perturbed: write the true ones next to a copy
                with tempfile.TemporaryDirectory(prefix="ms_e2e_") as tmp:
                    st = _true_sample_station(truth, event_dir, Path(tmp), keep_pointing=True)  # rendered with it
                    result = pipeline.process_event(event_dir, stations_dir=st, refine_geometry=refine)
            r = measure(result, truth, snr=snr) | {"mode": label}
            rows[label].append(r)
            print_row(r, label, time.perf_counter() - t0)
    return rows


def _true_sample_station(truth: dict, event_dir: Path, tmp: Path, *, keep_pointing: bool) -> Path:
    from meteorspec.config import Grating, find_station_file, load_event, load_station
    event = load_event(event_dir)
    station = load_station(find_station_file(event, run_root=event_dir.parent))
    if not keep_pointing:
        station = dataclasses.replace(station, pointing=None)
    g = truth["geometry_true"]["grating"]
    grating = Grating(grooves_per_mm=g["grooves_per_mm"], dispersion_angle_deg=g["dispersion_angle_deg"],
                      tilt_deg=g["tilt_deg"], tilt_azimuth_deg=g["tilt_azimuth_deg"], orders=tuple(g["orders"]))
    response = station.response.path.name
    (tmp / response).write_text(station.response.path.read_text())
    (tmp / f"{station.id}.toml").write_text(station_toml_text(station, grating, response, note="true geometry"))
    return tmp


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=36)
    ap.add_argument("--seed", type=int, default=5)
    ap.add_argument("--modes", default="true,perturbed",
                    help=f"comma-separated, of {', '.join(MODES)}")
    ap.add_argument("--only", type=int, nargs="*", help="indices of the random set to run")
    ap.add_argument("--samples", action="store_true", help="the sample_events folder instead")
    ap.add_argument("--keep-pointing", action="store_true",
                    help="render the random events through the atmosphere and keep [pointing] in their "
                         "station files (the pipeline corrects it)")
    ap.add_argument("--summarise", type=Path, nargs="+", metavar="JSONL",
                    help="print the summary of earlier runs' --out files instead of running; "
                         "several files (e.g. seeds) are pooled by mode")
    ap.add_argument("--out", type=Path, help="append one JSON line per event and mode")
    ap.add_argument("--noise-draw", type=int, default=0,
                    help="render with another draw of the noise (0: the seed's own)")
    ap.add_argument("--clean", action="store_true",
                    help="render without noise on a 16-bit camera: the chain's own systematic error")
    ap.add_argument("--oracle", action="store_true",
                    help="also fit each event's noise-free truth on the pipeline's grid and settings")
    ap.add_argument("--oracle-draws", type=int, default=0, metavar="K",
                    help="also fit that truth K times with draws of the spectrum's own noise (implies --oracle)")
    ap.add_argument("--oracle-set", action="append", default=[], metavar="KEY=VALUE",
                    help="a fit_plasma keyword (Python literal) that replaces the pipeline's in the truth fits; "
                         "repeatable, e.g. self_absorption=False")
    args = ap.parse_args(argv)
    args.modes = [m.strip() for m in args.modes.split(",") if m.strip()]
    settings = {}
    for item in args.oracle_set:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            ap.error(f"--oracle-set {item!r}: expected KEY=VALUE")
        try:
            settings[key.strip()] = ast.literal_eval(value.strip())
        except (ValueError, SyntaxError):
            ap.error(f"--oracle-set {item!r}: the value must be a Python literal")
    args.oracle_set = settings
    for m in args.modes:
        if m not in MODES:
            ap.error(f"unknown mode {m!r}; known: {', '.join(MODES)}")
    if args.summarise is not None:
        rows = {}
        for line in (ln for f in args.summarise for ln in f.read_text().splitlines()):
            r = json.loads(line)
            if r["fit"] is not None and not all(math.isfinite(x) for x in r["fit"]):
                r["err"] = [1.0, 1.0, 1.0]
            rows.setdefault(r["mode"], []).append(r)
    else:
        rows = run_samples(args) if args.samples else run_random(args)
    for mode, mode_rows in rows.items():
        seeds = sorted({r.get("seed", args.seed) for r in mode_rows}) or [args.seed]  # a summarised file's own
        label = f"seed {seeds[0]}" if len(seeds) == 1 else "seeds " + ", ".join(str(x) for x in seeds)
        summarise(mode_rows, f"{mode} ({label})" if not args.samples else mode)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
