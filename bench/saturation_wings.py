"""Saturated lines recovered from their unsaturated wings: how far can the lost share go?

Usage (from the top of the repository)::

    OPENBLAS_NUM_THREADS=1 python bench/saturation_wings.py --seed 5 --only 20 27 3 --out run.jsonl
    python bench/saturation_wings.py --summarise run.jsonl

An experiment, not a stage: the events of ``bench/plasma_end_to_end.py`` (same generation, same
per-event figures, ``--modes true`` only: true station geometry, no refinement) are rendered
once each and run through ``pipeline.process_event`` several times, with
``meteorspec.pipeline.extract_spectra`` wrapped (``functools.partial``, in this process only) to
other settings of the extraction's rule for bins holding saturated pixels.

The extraction (``meteorspec.extract``, module notes step 5) estimates the pooled cross-dispersion
profile without the cross-sections of the spectrum that hold a saturated pixel (a saturated core
otherwise drops out of the mean residual at small offsets while its wings stay in, which widens
the profile); when that profile is clean, saturated pixels count as lost light and a bin is
scaled up by ``1 / (1 - lost)`` up to a lost share ``max_saturated_fraction`` (default 0.8);
otherwise (too few unsaturated cross-sections, e.g. coarse binned cameras) a bin is masked as
soon as its saturated pixels carry 0.1 % of it. The oracle (``--oracle``) covers frames and
fields.

Settings: ``base`` (the package as it is); ``masked`` (the profile reported not clean, so every
saturated bin is masked: the rule before wing recovery; it defines the saturated Na frames of
each event); ``S0.5``, ``S0.6``, ``S0.7``, ``S0.9`` (``max_saturated_fraction``). Each row also
records whether the profile was clean and from how many unsaturated cross-sections.

Other modes: ``--probe`` (per lit frame of the masked extraction: the masked bins by the share of
their light on saturated pixels, and the wavelength span of the saturated pixels) and
``--oracle [--oracle-setting S]`` (bin by bin against the simulator's noise-free, unclipped
frames: the extraction's saturated share against the true one, and the scaled-up boxcar
estimate against the true bin light; progressive cameras).

    OPENBLAS_NUM_THREADS=1 python bench/saturation_wings.py --oracle --only 2 1 6 31 35 26
    OPENBLAS_NUM_THREADS=1 python bench/saturation_wings.py --oracle --oracle-setting masked --only 35
    OPENBLAS_NUM_THREADS=1 python bench/saturation_wings.py --probe --only 2 5

Per event and setting: the composition errors and Na peak error in frames as measured by
``plasma_end_to_end.measure``; the recovered per-frame Na I light curve
(``/composition/light_curves/Na_I``) against the truth's per-frame Na group energy
(``truth["groups"]["na"]["per_frame"]``): ratio recovered / true in every frame, normalised by
its median over the frames the truth marks unsaturated (so units and the response drop out),
reported over the frames the truth marks saturated (``truth["frames"]["saturated"]``) that
carry at least 5 % of the Na peak; and the extraction mask (masked bins per lit frame, the
wavelength span masked in the frame of the truth's Na peak).
"""

from __future__ import annotations

import argparse
import dataclasses
import functools
import importlib.util
import inspect
import json
import math
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from meteorspec import extract as extract_mod  # noqa: E402
from meteorspec import pipeline  # noqa: E402
from meteorspec.simulate import simulate_event  # noqa: E402

_spec = importlib.util.spec_from_file_location("plasma_end_to_end", REPO / "bench" / "plasma_end_to_end.py")
e2e = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(e2e)

SETTINGS = {"base": {},
            # saturated bins masked as soon as saturated pixels carry 0.1 % of them (the rule before
            # wing recovery): the pooled profile is reported not clean
            "masked": {"_force_unclean": True},
            # other limits of the profile share a bin holding saturated pixels may lose
            "S0.5": {"max_saturated_fraction": 0.5}, "S0.6": {"max_saturated_fraction": 0.6},
            "S0.7": {"max_saturated_fraction": 0.7}, "S0.9": {"max_saturated_fraction": 0.9}}
_ORIG_EXTRACT = pipeline.extract_spectra
_ORIG_POOLED = extract_mod._pooled_profile


def _capturing_extract(*args, _store: dict, **kwargs):
    spectra = _ORIG_EXTRACT(*args, **kwargs)
    _store["spectra"] = spectra
    return spectra


def run_setting(event_dir: Path, stations: Path, name: str, store: dict):
    opts = dict(SETTINGS[name])
    force = opts.pop("_force_unclean", False)
    pipeline.extract_spectra = functools.partial(_capturing_extract, _store=store, **opts)

    def pooled(*a, **k):
        out = _ORIG_POOLED(*a, **k)
        if force:
            out = dataclasses.replace(out, clean=False)
        store["profile_clean"] = bool(out.clean)
        store["pooled"] = out
        params = inspect.signature(_ORIG_EXTRACT).parameters
        limit = opts.get("max_saturated_fraction", params["max_saturated_fraction"].default)
        store["sat_limit"] = max(limit, params["max_lost_fraction"].default) if out.clean else None
        store["profile_sections"] = int(out.n_sections)
        return out

    extract_mod._pooled_profile = pooled
    try:
        return pipeline.process_event(event_dir, stations_dir=stations, refine_geometry=False)
    finally:
        pipeline.extract_spectra = _ORIG_EXTRACT
        extract_mod._pooled_profile = _ORIG_POOLED


def na_energy_figures(result, truth: dict, base_measured: np.ndarray | None) -> dict:
    """Recovered / true per-frame Na energy in the frames with >= 5 % of the truth's Na peak.

    ``base_measured``: the frames whose Na light curve the ``masked`` setting measured (finite);
    the others are this event's saturated Na frames. The ratio is normalised by its median over
    the masked-measured frames (same setting); with fewer than two of them (fireballs) by the
    median ratio of the control events of the same station (in :func:`summarise`).
    """
    t_true = np.asarray(truth["frames"]["time_s"], float)
    e_true = np.asarray(truth["groups"]["na"]["per_frame"], float)
    strong = e_true >= 0.05 * e_true.max()
    comp = result.parts.get("composition", {}).get("datasets", {})
    rec = np.full(t_true.size, np.nan)
    if "light_curves/Na_I" in comp:
        t = np.asarray(comp["time_s"][0], float)
        lc = np.asarray(comp["light_curves/Na_I"][0], float)
        dt = float(np.median(np.diff(t_true)))
        for k, tk in enumerate(t_true):
            j = int(np.argmin(np.abs(t - tk))) if t.size else -1
            if j >= 0 and abs(t[j] - tk) < 0.25 * dt:
                rec[k] = lc[j]
    measured = np.isfinite(rec) if base_measured is None else base_measured
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = rec / e_true
    return {"na_measured": [bool(v) for v in np.isfinite(rec)],
            "na_base_measured": [bool(v) for v in measured],
            "na_strong": [bool(v) for v in strong],
            "na_true_rel": [float(v) for v in e_true / e_true.max()],
            "na_raw_ratio": [float(v) if np.isfinite(v) else None for v in ratio]}


def mask_figures(spectra, truth: dict) -> dict:
    """Masked bins per lit frame and the span masked in the truth's Na peak frame."""
    if spectra is None:
        return {}
    wl = np.asarray(spectra.wavelength_nm, float)
    lit = ~(np.asarray(spectra.frame_weight, float) == 0.0)  # NaN: lit, every bin lost to saturation
    m = np.asarray(spectra.mask, bool)
    e_true = np.asarray(truth["groups"]["na"]["per_frame"], float)
    t_true = np.asarray(truth["frames"]["time_s"], float)
    k_true = int(np.argmax(e_true))
    k = int(np.argmin(np.abs(np.asarray(spectra.time_s) - t_true[k_true])))
    row = m[k]
    inner = (wl > 380) & (wl < 880)
    span = [float(wl[row & inner].min()), float(wl[row & inner].max())] if np.any(row & inner) else []
    na_bins = (wl > 586) & (wl < 592)
    return {"masked_bins_per_lit_frame": float(m[lit][:, inner].sum() / max(lit.sum(), 1)),
            "n_bins": int(inner.sum()),
            "peak_frame_masked_span_nm": span,
            "peak_frame_masked_nm": float(np.sum(row & inner) * np.median(np.diff(wl))),
            "frames_na_masked": int(np.sum(np.any(m[:, na_bins], axis=1) & lit)),
            "frames_lit": int(lit.sum())}


def probe_mask(event_dir: Path, stations: Path, truth: dict) -> None:
    """Per lit frame (masked setting): what the masked bins' saturated pixels carry, and where they are.

    The extraction's band pixels are captured by wrapping ``extract._set_band_profile`` (in this
    process only); each bin's saturated profile share is recomputed as the extraction does
    (``_bin_fractions``, profile density times dispersion).
    """
    bands = []
    orig = extract_mod._set_band_profile

    def capture(band, *a, **k):
        bands.append(band)
        return orig(band, *a, **k)

    store: dict = {}
    extract_mod._set_band_profile = capture
    try:
        run_setting(event_dir, stations, "masked", store)
    finally:
        extract_mod._set_band_profile = orig
    sp = store["spectra"]
    wl = np.asarray(sp.wavelength_nm, float)
    edges = np.concatenate([[wl[0] - 0.5 * sp.bin_width_nm[0]], wl + 0.5 * np.asarray(sp.bin_width_nm)])
    e_true = np.asarray(truth["groups"]["na"]["per_frame"], float)
    last = {}
    for b in bands:  # the last capture of a frame is the final profile
        last[b.frame] = b
    print("  frame  Na true rel  masked bins: sat share (1e-3,1e-2] (1e-2,0.1] (0.1,0.5] (0.5,0.9] >0.9  other"
          "  | Na 586-592 sat share max | sat px wavelength span nm | masked span nm")
    for k in sorted(last):
        b = last[k]
        jj, fr = extract_mod._bin_fractions(b.u_nm, b.a_nm, b.b_nm, edges)
        # the weights the extraction gives lost pixels
        s_good = np.bincount(jj.ravel(), (fr * np.where(b.bad, 0.0, b.data)[:, None]).ravel(), wl.size)
        wprof = extract_mod._loss_weights(b, jj, fr, s_good, np.asarray(sp.bin_width_nm, float), store["pooled"].psf,
                                          store["sat_limit"])
        all_w = np.bincount(jj.ravel(), wprof.ravel(), wl.size)
        sat_w = np.bincount(jj.ravel(), (wprof * b.sat[:, None]).ravel(), wl.size)
        with np.errstate(invalid="ignore", divide="ignore"):
            ss = np.where(all_w > 0, sat_w / all_w, 0.0)
        m = np.asarray(sp.mask[k], bool)
        cls = [int(np.sum(m & (ss > lo) & (ss <= hi))) for lo, hi in
               ((1e-3, 1e-2), (1e-2, 0.1), (0.1, 0.5), (0.5, 0.9), (0.9, 1.01))]
        other = int(np.sum(m & (ss <= 1e-3)))
        na = (wl > 586) & (wl < 592)
        us = b.u_nm[b.sat]
        span_sat = f"{us.min():.0f}-{us.max():.0f} ({b.sat.sum()} px)" if us.size else "-"
        span_m = f"{wl[m].min():.0f}-{wl[m].max():.0f}" if np.any(m) else "-"
        rel = e_true[k] / e_true.max() if k < e_true.size else math.nan
        print(f"  {k:5d}  {rel:11.3f}  {cls[0]:22d} {cls[1]:10d} {cls[2]:9d} {cls[3]:9d} {cls[4]:4d} {other:6d}"
              f"  | {np.max(ss[na]) if np.any(na) else math.nan:24.3f} | {span_sat:26s} | {span_m}")


def oracle_bins(spec, event_dir: Path, stations: Path, setting: str = "base") -> list[dict]:
    """Bin by bin, the extraction's saturated share and scaled-up boxcar against the noise-free light.

    The simulator's ``linear_clean`` frames (before noise, encoding and clipping) are rendered
    again for the event and for the same event with no meteor light; their difference is each
    pixel's true meteor light. For every lit frame and bin of the ``base`` extraction: the
    profile share of its saturated pixels as the extraction computes it (``s_model``), the true
    share of the bin's light on those pixels (``s_true``), and the boxcar estimate scaled by
    ``1 / (1 - lost)`` (all bad pixels) over the true bin light. In a field the true bin light is
    that of the field's own rows, each standing for ``band.scale`` image rows as in the
    extraction (the error of sampling every other row is then left out: it is the same for
    saturated and unsaturated bins).
    """
    from meteorspec.simulate.render import render_event
    rendered = render_event(spec)
    full = rendered.linear_clean
    # exposure (frame or field) -> the clean frame that holds its rows
    exp_frame = {ex.index: ex.frame for ex in rendered.exposures}
    dark = render_event(dataclasses.replace(spec, peak_energy_adu_s=1e-12)).linear_clean
    meteor = (full - dark).astype(float)
    del full, dark, rendered
    bands, coords = [], []
    orig_set, orig_fb = extract_mod._set_band_profile, extract_mod._frame_band

    def capture(band, *a, **k):
        if not any(band is b for b in bands):
            bands.append(band)
        return orig_set(band, *a, **k)

    def capture_fb(*a, **k):
        out = orig_fb(*a, **k)
        if out is not None:
            coords.append((out[0].copy(), out[1].copy(), out[5].astype(np.float32)))
        return out

    store: dict = {}
    extract_mod._set_band_profile, extract_mod._frame_band = capture, capture_fb
    try:
        run_setting(event_dir, stations, setting, store)
    finally:
        extract_mod._set_band_profile, extract_mod._frame_band = orig_set, orig_fb
    sp = store["spectra"]
    wl = np.asarray(sp.wavelength_nm, float)
    edges = np.concatenate([[wl[0] - 0.5 * sp.bin_width_nm[0]], wl + 0.5 * np.asarray(sp.bin_width_nm)])
    out = []
    h, w = meteor.shape[1:]
    for band, (px, py, off) in zip(bands, coords):
        if px.size != band.u_nm.size:
            # a field keeps every other row of the band: the parity whose offsets are the band's
            for start in (0, 1):
                keep = ((py - start) % 2) == 0
                if np.count_nonzero(keep) == band.u_nm.size and np.array_equal(off[keep], band.off_px):
                    px, py = px[keep], py[keep]
                    break
            else:
                continue
        on = ~band.off_sensor
        m = np.zeros(px.size)
        # a field's pixel stands for band.scale image rows (its data are scaled by it): the truth is
        # the field's own rows scaled alike, so that the sampling of the rows cancels
        m[on] = meteor[exp_frame[band.frame], py[on], px[on]] * band.scale
        jj, fr = extract_mod._bin_fractions(band.u_nm, band.a_nm, band.b_nm, edges)
        # the weights the extraction gives lost pixels
        s_good = np.bincount(jj.ravel(), (fr * np.where(band.bad, 0.0, band.data)[:, None]).ravel(), wl.size)
        wprof = extract_mod._loss_weights(band, jj, fr, s_good, np.asarray(sp.bin_width_nm, float),
                                          store["pooled"].psf, store["sat_limit"])
        all_w = np.bincount(jj.ravel(), wprof.ravel(), wl.size)
        sat_w = np.bincount(jj.ravel(), (wprof * band.sat[:, None]).ravel(), wl.size)
        bad_w = np.bincount(jj.ravel(), (wprof * band.bad[:, None]).ravel(), wl.size)
        m_all = np.bincount(jj.ravel(), (fr * m[:, None]).ravel(), wl.size)
        m_sat = np.bincount(jj.ravel(), (fr * (m * band.sat)[:, None]).ravel(), wl.size)
        got = np.bincount(jj.ravel(), (fr * np.where(band.bad, 0.0, band.data)[:, None]).ravel(), wl.size)
        with np.errstate(invalid="ignore", divide="ignore"):
            s_model = sat_w / all_w
            lost = bad_w / all_w
            s_true = m_sat / m_all
            rec = got / np.clip(1.0 - lost, 1e-6, None) / m_all
        # two candidate causes of s_model != s_true, each replaced by its truth in turn:
        # (1) the cross profile: this frame's true cross profile of the meteor light (0.25 px offset bins)
        ob = np.round(band.off_px / 0.25).astype(int)
        ob -= ob.min()
        p_true = np.bincount(ob[on], (m / np.maximum(band.disp, 1e-12))[on], ob.max() + 1)
        p_true = np.clip(p_true / max(np.sum(p_true), 1e-30), 0.0, None)[ob]
        w1 = fr * (p_true * band.disp)[:, None]
        # (2) the spectrum within a bin's footprint: the cross model times the true bin-level spectrum
        #     interpolated to each pixel's wavelength
        dens = m_all / np.maximum(np.diff(edges), 1e-12)
        w2 = wprof * np.interp(band.u_nm, wl, dens)[:, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            s_ptrue = np.bincount(jj.ravel(), (w1 * band.sat[:, None]).ravel(), wl.size) / \
                np.bincount(jj.ravel(), w1.ravel(), wl.size)
            s_spec = np.bincount(jj.ravel(), (w2 * band.sat[:, None]).ravel(), wl.size) / \
                np.bincount(jj.ravel(), w2.ravel(), wl.size)
            lost1 = np.bincount(jj.ravel(), (w1 * band.bad[:, None]).ravel(), wl.size) / \
                np.bincount(jj.ravel(), w1.ravel(), wl.size)
            rec1 = got / np.clip(1.0 - lost1, 1e-6, None) / m_all
        strong = m_all > 0.05 * np.max(m_all)
        sel = strong & np.isfinite(s_model) & (sat_w > 0)
        na = (wl > 586) & (wl < 592)
        out.append({"frame": int(band.frame), "s_model": s_model[sel].tolist(), "s_true": s_true[sel].tolist(),
                    "rec": rec[sel].tolist(), "na": na[sel].tolist(),
                    "s_ptrue": s_ptrue[sel].tolist(), "rec_ptrue": rec1[sel].tolist(), "s_spec": s_spec[sel].tolist(), "wl": wl[sel].tolist(),
                    "unsat_rec": rec[strong & (sat_w == 0) & (lost < 1e-3)].tolist()})
    return out


def summarise_oracle(per_event: dict) -> None:
    cls = ((1e-3, 0.1), (0.1, 0.3), (0.3, 0.5), (0.5, 0.7), (0.7, 0.9), (0.9, 1.0))
    print("\noracle (noise-free truth per bin, boxcar scaled by 1/(1-lost)); bins with >= 5 % of the frame's"
          " brightest bin light:")
    print("  s_model class   bins   s_true - s_model median [p5,p95]   recovered/true median [p5,p95]   (Na D bins)")
    allrows = [(a, b, c, d) for rows in per_event.values() for f in rows
               for a, b, c, d in zip(f["s_model"], f["s_true"], f["rec"], f["na"])]
    arr = np.array([(a, b, c, float(d)) for a, b, c, d in allrows]) if allrows else np.zeros((0, 4))
    for lo, hi in cls:
        sel = (arr[:, 0] > lo) & (arr[:, 0] <= hi) & np.isfinite(arr[:, 2]) if arr.size else np.zeros(0, bool)
        if not np.any(sel):
            print(f"  ({lo:.3g},{hi:.3g}]  0")
            continue
        d = arr[sel, 1] - arr[sel, 0]
        r = arr[sel, 2]
        nsel = sel & (arr[:, 3] > 0)
        rn = arr[nsel, 2]
        print(f"  ({lo:.3g},{hi:.3g}]  {sel.sum():6d}   {np.median(d):+.3f} [{np.percentile(d, 5):+.3f},"
              f"{np.percentile(d, 95):+.3f}]      {np.median(r):.3f} [{np.percentile(r, 5):.3f},{np.percentile(r, 95):.3f}]"
              + (f"   Na: {nsel.sum()} bins, {np.median(rn):.3f}" if rn.size else ""))
    print("  s_model class   s_true - s_(true cross profile)   s_true - s_(model profile x true spectrum in the bin)"
          "   recovered/true with the true cross profile")
    for lo, hi in cls:
        d1 = [t - q for rows in per_event.values() for f in rows
              for a, t, q in zip(f["s_model"], f["s_true"], f.get("s_ptrue", [])) if lo < a <= hi]
        d2 = [t - q for rows in per_event.values() for f in rows
              for a, t, q in zip(f["s_model"], f["s_true"], f.get("s_spec", [])) if lo < a <= hi]
        d1 = [x for x in d1 if math.isfinite(x)]
        d2 = [x for x in d2 if math.isfinite(x)]
        r1 = [q for rows in per_event.values() for f in rows
              for a, q in zip(f["s_model"], f.get("rec_ptrue", [])) if lo < a <= hi and math.isfinite(q)]
        if d1 and d2:
            print(f"  ({lo:.3g},{hi:.3g}]  {np.median(d1):+.3f} [{np.percentile(d1, 5):+.3f},{np.percentile(d1, 95):+.3f}]"
                  f"          {np.median(d2):+.3f} [{np.percentile(d2, 5):+.3f},{np.percentile(d2, 95):+.3f}]"
                  + (f"          {np.median(r1):.3f} [{np.percentile(r1, 5):.3f},{np.percentile(r1, 95):.3f}]"
                     if r1 else ""))
    un = [x for rows in per_event.values() for f in rows for x in f["unsat_rec"]]
    if un:
        print(f"  unsaturated bins (control): {len(un)}, recovered/true median {np.median(un):.4f}"
              f" [{np.percentile(un, 5):.3f},{np.percentile(un, 95):.3f}]")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=36)
    ap.add_argument("--seed", type=int, default=5)
    ap.add_argument("--only", type=int, nargs="*", help="indices of the random set to run")
    ap.add_argument("--settings", default=",".join(SETTINGS), help=f"comma-separated of {', '.join(SETTINGS)}")
    ap.add_argument("--probe", action="store_true", help="only the mask probe (masked setting) of the --only events")
    ap.add_argument("--oracle", action="store_true",
                    help="only the bin-level check against the noise-free render (progressive --only events)")
    ap.add_argument("--oracle-setting", default="base",
                    help="extraction setting of --oracle (base: the package as it is; masked: saturated bins masked)")
    ap.add_argument("--out", type=Path, help="append one JSON line per event and setting")
    ap.add_argument("--summarise", type=Path, nargs="*", metavar="JSONL", help="print the table of earlier --out files")
    args = ap.parse_args(argv)
    if args.summarise:
        rows = [json.loads(line) for p in args.summarise for line in p.read_text().splitlines() if line.strip()]
        summarise(rows)
        return 0
    settings = [s.strip() for s in args.settings.split(",") if s.strip()]
    # the masked run (saturated bins masked) defines the saturated Na frames
    settings = ["masked"] + [s for s in settings if s != "masked"]
    head = subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"], capture_output=True,
                          text=True).stdout.strip()
    dirty = subprocess.run(["git", "-C", str(REPO), "diff", "--stat", "--", "meteorspec/extract.py"],
                           capture_output=True, text=True).stdout.strip()
    print(f"HEAD {head}; extract.py {'modified in the tree' if dirty else 'as committed'}")
    specs = e2e.perturbed_specs(args.n, args.seed)
    idx = args.only if args.only else list(range(len(specs)))
    rows = []
    oracle_rows: dict = {}
    out = open(args.out, "a") if args.out else None
    with tempfile.TemporaryDirectory(prefix="ms_satw_") as tmp:
        work = Path(tmp)
        for i in idx:
            spec = dataclasses.replace(specs[i], atmosphere=False)
            sim = simulate_event(spec, work / "events", truth_dir=work / "truth")
            e2e.write_station_files(spec, work / "events", keep_pointing=False)
            snr = e2e.line_snr(spec)
            if args.oracle:
                res = oracle_bins(spec, sim.event_dir, work / "stations_true",
                                  args.oracle_setting)
                oracle_rows[i] = res
                print(f"event {i}: {len(res)} frames")
                summarise_oracle({i: res})
                shutil.rmtree(sim.event_dir, ignore_errors=True)
                continue
            if args.probe:
                print(f"event {i} ({sim.event_id})")
                probe_mask(sim.event_dir, work / "stations_true", sim.truth)
                shutil.rmtree(sim.event_dir, ignore_errors=True)
                continue
            kind = "fireball" if spec.light_curve == "flare" else ("faint" if snr < 15 else "normal")
            base_measured = None
            for name in settings:
                store: dict = {}
                t0 = time.perf_counter()
                result = run_setting(sim.event_dir, work / "stations_true", name, store)
                r = e2e.measure(result, sim.truth, snr=snr) | {
                    "setting": name, "index": i, "kind": kind, "base_station": spec.station, "seed": args.seed, "head": head,
                    "extract_dirty": bool(dirty), "seconds": time.perf_counter() - t0}
                r |= na_energy_figures(result, sim.truth, base_measured) | mask_figures(store.get("spectra"), sim.truth)
                r |= {"profile_clean": store.get("profile_clean"), "profile_sections": store.get("profile_sections")}
                if name == "masked":
                    base_measured = np.array(r["na_measured"], bool)
                rows.append(r)
                print_row(r)
                if out is not None:
                    out.write(json.dumps(r) + "\n")
                    out.flush()
            shutil.rmtree(sim.event_dir, ignore_errors=True)
    if out is not None:
        out.close()
    if args.oracle:
        print("\nall oracle events:")
        summarise_oracle(oracle_rows)
        if args.out is not None:
            args.out.with_suffix(".oracle.json").write_text(json.dumps(oracle_rows))
        return 0
    summarise(rows)
    return 0


def own_norm(r: dict) -> float:
    """Median raw ratio over the strong frames the masked setting measured (NaN if fewer than 2)."""
    v = [x for x, m, st in zip(r["na_raw_ratio"], r["na_base_measured"], r["na_strong"])
         if m and st and x is not None]
    return float(np.median(v)) if len(v) >= 2 else math.nan


def sat_ratios(r: dict, norm: float) -> tuple[list, int]:
    """Normalised recovered/true Na energy in this event's saturated Na frames; (values, n frames)."""
    sel = [x for x, m, st in zip(r["na_raw_ratio"], r["na_base_measured"], r["na_strong"]) if st and not m]
    return [x / norm for x in sel if x is not None and math.isfinite(norm)], len(sel)


def _fmt_ratio(v: list, n: int) -> str:
    if not n:
        return "no sat. Na frame"
    if not v:
        return f"0/{n} rec."
    return f"{len(v)}/{n} rec. med {np.median(v):.2f} [{min(v):.2f},{max(v):.2f}]"


def print_row(r: dict) -> None:
    err = "/".join(f"{x:.3f}" for x in r["err"]) if r["fit"] is not None else "no composition"
    pk = r.get("na_peak_err_frames", math.nan)
    na_flags = ",".join(f[8:] for f in r["flags"] if f.startswith("na_peak_")) or "-"
    span = r.get("peak_frame_masked_span_nm", [])
    norm = own_norm(r)
    v, n = sat_ratios(r, norm)
    print(f"  {r['index']:3d} {r['kind']:8s} snr {r['snr']:6.0f} {r['setting']:5s} err {err:20s} "
          f"Na pk {pk:+6.2f} fr ({na_flags}) Na sat {_fmt_ratio(v, n) if math.isfinite(norm) else 'norm by station'}"
          f"; mask/fr {r.get('masked_bins_per_lit_frame', math.nan):.0f} of {r.get('n_bins', 0)}"
          f", peak frame {r.get('peak_frame_masked_nm', math.nan):.0f} nm masked"
          f" ({'-'.join(f'{x:.0f}' for x in span)}); Na-masked frames {r.get('frames_na_masked', '?')}"
          f"/{r.get('frames_lit', '?')}; profile {'clean' if r.get('profile_clean') else 'NOT clean'}"
          f" ({r.get('profile_sections')} sections)  {r['seconds']:.0f} s", flush=True)


def summarise(rows: list[dict]) -> None:
    by: dict[str, list[dict]] = {}
    for r in rows:
        by.setdefault(r["setting"], []).append(r)
    base = {r["index"]: r for r in by.get("masked", [])}
    # events without two measured Na frames of their own are normalised by their station's other events
    station_norm: dict[tuple[str, str], list[float]] = {}
    for r in rows:
        if math.isfinite(own_norm(r)):
            station_norm.setdefault((r["setting"], r.get("base_station", "?")), []).append(own_norm(r))
    print("\nper event: setting -> |na|/|mg|/|fe| err, Na peak err [frames], recovered/true Na energy in the"
          " saturated Na frames (median [min,max], recovered/all), Na-masked frames / lit")
    for i in sorted(base):
        rb = base[i]
        print(f" {i:3d} {rb['kind']:8s} {rb.get('base_station', '?')} snr {rb['snr']:.0f}"
              f" truth {'/'.join(f'{x:.3f}' for x in rb['truth'])}")
        for name in SETTINGS:
            r = next((q for q in by.get(name, []) if q["index"] == i), None)
            if r is None:
                continue
            norm = own_norm(r)
            how = "own"
            if not math.isfinite(norm):
                st = station_norm.get((name, r.get("base_station", "?")), [])
                norm, how = (float(np.median(st)), f"station n={len(st)}") if st else (math.nan, "none")
            v, n = sat_ratios(r, norm)
            err = "/".join(f"{x:.3f}" for x in r["err"]) if r["fit"] is not None else "no composition     "
            print(f"     {name:5s} {err}  Na pk {r.get('na_peak_err_frames', math.nan):+6.2f}"
                  f"  Na sat {_fmt_ratio(v, n)} (norm {how})"
                  f"  Na-masked {r.get('frames_na_masked', '?')}/{r.get('frames_lit', '?')}"
                  f"  mask/fr {r.get('masked_bins_per_lit_frame', math.nan):.0f}")
    print("\nsetting  n  no-comp  |na|,|mg|,|fe| median/95th/max                          Na peak <=1 fr (SNR>=20)"
          "  Na sat frames recovered/true: median [p5,p95] (recovered/all)  masked-measured frames vs masked: median [min,max]")
    for name in SETTINGS:
        sub = by.get(name, [])
        if not sub:
            continue
        e = np.array([r["err"] for r in sub])
        bright = [r for r in sub if r["snr"] >= 20]
        ok = sum(abs(r.get("na_peak_err_frames", math.nan)) <= 1.0 for r in bright)
        nopk = sum(not math.isfinite(r.get("na_peak_err_frames", math.nan)) for r in bright)
        vals, ntot = [], 0
        ref = []
        for r in sub:
            norm = own_norm(r)
            if not math.isfinite(norm):
                st = station_norm.get((name, r.get("base_station", "?")), [])
                norm = float(np.median(st)) if st else math.nan
            v, n = sat_ratios(r, norm)
            vals += v
            ntot += n
            rb = base.get(r["index"])
            if rb is not None:
                for x, xb, m, stg in zip(r["na_raw_ratio"], rb["na_raw_ratio"], r["na_base_measured"], r["na_strong"]):
                    if m and stg and x is not None and xb is not None:
                        ref.append(x / xb)
        v = np.array(vals)
        vr = (f"{np.median(v):.3f} [{np.percentile(v, 5):.2f},{np.percentile(v, 95):.2f}] ({v.size}/{ntot})"
              if v.size else f"- (0/{ntot})")
        rr = f"{np.median(ref):.4f} [{min(ref):.3f},{max(ref):.3f}] ({len(ref)})" if ref else "-"
        print(f"{name:6s} {len(sub):3d} {sum(r['fit'] is None for r in sub):4d}    "
              + " ".join(f"{np.median(e[:, j]):.3f}/{np.percentile(e[:, j], 95):.3f}/{e[:, j].max():.3f}"
                         for j in range(3))
              + f"   {ok}/{len(bright)} ({nopk} no time)   {vr}   {rr}")


if __name__ == "__main__":
    raise SystemExit(main())
