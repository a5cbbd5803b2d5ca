"""A readable text summary of one event file (``meteorspec show EVENT.h5``)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .store import read_event
from .report.html import STAGE_NAMES, _flag_text, lines_columns, why_missing


def _f(value: Any, fmt: str = "{:.3f}") -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    return "n/a" if not math.isfinite(v) else fmt.format(v)


def summarise(path: str | Path, *, max_lines: int = 12) -> str:
    """Text summary of an event file: identity, status, flags, track, spectrum, lines, composition.

    Parameters
    ----------
    path : str or Path
        An ``<event id>.h5`` file.
    max_lines : int
        Identified lines listed (strongest first).

    Raises
    ------
    InputError
        If the file is not readable HDF5.
    """
    ev = read_event(path)
    a = ev["attrs"]
    g = ev["groups"]
    out = [f"event    {a.get('event_id', '?')}   [{a.get('status', '?')}]", f"file     {path}"]
    out += [f"{k:<8} {v}" for k, v in (("station", a.get("station", "")), ("start", a.get("start_utc", "")),
                                         ("software", a.get("software_version", "")), ("schema", a.get("schema", "")))]
    if a.get("error"):
        out.append(f"error    {a['error']}")
    flags = list(a.get("flags", []))
    out.append("flags" + ("    none" if not flags else ""))
    out += [f"  {f}" + (f"  - {_flag_text(f)}" if _flag_text(f) else "") for f in flags]

    frames = g.get("frames")
    if frames is not None:
        t = np.asarray(frames["datasets"].get("time_s", []), dtype=float)
        nsat = np.asarray(frames["datasets"].get("n_saturated_px", []))
        span = f", {t[0]:.3f}-{t[-1]:.3f} s" if t.size else ""
        out.append(f"frames   {t.size}{span}, exposure {_f(frames['attrs'].get('exposure_s'), '{:.4f}')} s, "
                   f"{int(np.count_nonzero(nsat))} with saturated pixels")

    def missing(stage: str) -> None:
        why = why_missing(ev, stage)
        out.append(f"{stage:<8} not in file: {STAGE_NAMES[stage]} has not run" + (f" ({why})" if why else ""))

    track = g.get("track")
    if track is None:
        missing("track")
    else:
        d = track["datasets"]
        n = len(d.get("time_s", []))
        line = f"track    {n} points"
        if n and {"x", "y"} <= set(d):
            x, y = np.asarray(d["x"], float), np.asarray(d["y"], float)
            ok = np.isfinite(x) & np.isfinite(y)
            if ok.any():
                i0, i1 = np.flatnonzero(ok)[[0, -1]]
                line += f", from ({x[i0]:.1f}, {y[i0]:.1f}) to ({x[i1]:.1f}, {y[i1]:.1f}) px"
        if n and "flux" in d and np.isfinite(d["flux"]).any():
            k = int(np.nanargmax(d["flux"]))
            line += f", peak at {float(d['time_s'][k]):.3f} s"
        out.append(line)

    spec = g.get("spectrum")
    if spec is None:
        missing("spectrum")
    else:
        d = spec["datasets"]
        wl = np.asarray(d.get("wavelength_nm", []), dtype=float)
        line = f"spectrum {wl.size} samples"
        if wl.size:
            line += f", {wl[0]:.1f}-{wl[-1]:.1f} nm"
        if "per_frame" in d:
            line += f", per frame {np.shape(d['per_frame'])[0]} x {np.shape(d['per_frame'])[-1]}"
        out.append(line)

    cal = g.get("calibration")
    if cal is None:
        missing("calibration")
    else:
        c = cal["attrs"]
        out.append(f"calib.   source {c.get('source', 'refined')}, {_f(c.get('grooves_per_mm'), '{:.2f}')} "
                   f"grooves/mm, dispersion angle {_f(c.get('dispersion_angle_deg'), '{:.2f}')} deg, "
                   f"rms {_f(c.get('rms_nm'), '{:.3f}')} nm over {c.get('n_lines', 0)} lines")

    lines = lines_columns(ev)
    if lines is None:
        missing("lines")
    else:
        n = len(next(iter(lines.values()), []))
        out.append(f"lines    {n} identified" + (", strongest:" if n else ""))
        strength = np.asarray(lines.get("intensity", np.full(n, np.nan)), dtype=float)

        def col(name: str) -> list[Any]:
            return list(lines.get(name, [np.nan] * n))

        species, lab, measured, err, snr = (col(c) for c in ("species", "lab_nm", "measured_nm", "intensity_err",
                                                              "snr"))
        for i in np.argsort(-np.nan_to_num(strength, nan=-np.inf))[:max_lines]:
            out.append(f"  {str(species[i]):<6} {_f(lab[i], '{:8.3f}')} nm  measured {_f(measured[i], '{:8.3f}')}"
                       f"  I {_f(strength[i], '{:.4g}')} +/- {_f(err[i], '{:.2g}')}  snr {_f(snr[i], '{:.1f}')}")

    comp = g.get("composition")
    if comp is None:
        missing("composition")
    else:
        c: Mapping[str, Any] = comp["attrs"]
        parts = [f"{k.capitalize()} {_f(c.get(k))} +/- {_f(c.get(f'{k}_err'))}" for k in ("na", "mg", "fe")]
        out.append("comp.    " + ", ".join(parts))
        klass = f"class    {c.get('class', '?')}"
        if "class_confidence" in c:
            klass += f" (confidence {_f(c['class_confidence'], '{:.2f}')})"
        if c.get("class_reason"):
            klass += f": {c['class_reason']}"
        out.append(klass + f", speed {_f(c.get('speed_km_s'), '{:.1f}')} km/s")

    out += review_lines(g.get("review"), automatic_class=None if comp is None else comp["attrs"].get("class"))
    return "\n".join(out)


def review_lines(review: Mapping[str, Any] | None, *, automatic_class: Any = None) -> list[str]:
    """The review log in brief: how many entries, and the latest verdict, reviewer, note and class."""
    from .review.record import latest_review, reviewed_class

    n_review = len(review["groups"]) if review is not None else 0
    out = [f"review   {n_review} manual decision(s) recorded"]
    latest = latest_review(review)
    if latest is None:
        return out
    name, entry = latest
    a = entry["attrs"]
    out[0] += f"; latest ({name}): {a.get('verdict', '?')} by {a.get('reviewer', '?')}, {a.get('time_utc', '?')}"
    auto = a.get("automatic_class") or automatic_class or "n/a"
    out.append(f"  reviewed class {reviewed_class(entry) or 'n/a'} (automatic {auto})")
    corr = [c for c in a.get("corrections", []) if c and c != "none"]
    out.append("  corrections " + ("; ".join(corr) if corr else "none"))
    if a.get("note"):
        out.append(f"  note: {a['note']}")
    return out
