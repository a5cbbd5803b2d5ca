"""Static HTML night report: an index page (table + ternary diagram) and one page per event.

Everything is plain files (HTML, one CSS file, PNG figures) linked by relative
paths, so the report opens from disk in any browser with no server and can be
copied or archived as a folder. Every figure that cannot be drawn is replaced
by a one-line note saying which stage has not run (or which input is missing).
"""

from __future__ import annotations

import csv
import html
import math
import os
import re
from collections import Counter
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from ..store import read_event

STAGE_NAMES = {
    "track": "zeroth-order tracking (track stage)",
    "spectrum": "first-order extraction (extract stage)",
    "calibration": "wavelength and flux calibration (calibrate stage)",
    "lines": "line identification (lines stage)",
    "composition": "composition and class (classify stage)",
}

FLAG_TEXT = {
    "saturated": "some pixels reached the camera's saturation level",
    "uncalibrated_flux": "no response curve: fluxes are not corrected for the system sensitivity",
    "spectrum_off_frame": "part of the spectrum fell outside the sensor",
    "low_snr": "low signal-to-noise ratio",
    "calibration_from_station": "wavelength scale from the station file values, not refined on this event",
    "calibration_uncertain": "wavelength scale refined on this event, but its own error exceeds 1 nm somewhere "
                             "over 390-850 nm (extrapolated beyond its lines)",
    "speed_unknown": "no trajectory speed: class given without the speed-dependent expectation",
    "no_meteor": "no meteor found in the video: nothing to extract, identify or classify",
    "plasma_fit_failed": "the plasma fit did not converge: no composition or class",
}

CSS = """\
:root { --ink:#1d2330; --muted:#5f6b7a; --line:#d8dde3; --paper:#fbfbf8; --accent:#0072B2;
        --ok:#1b7f3b; --partial:#b26b00; --failed:#b3261e; --pending:#5f6b7a; }
* { box-sizing: border-box; }
body { font: 15px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: var(--ink);
       background: var(--paper); margin: 0; }
header.top { background: var(--ink); color: #fff; padding: 14px 28px; }
header.top a { color: #cfe4ff; }
header.top h1 { margin: 0; font-size: 20px; font-weight: 600; }
header.top .sub { color: #b9c2cf; font-size: 13px; }
main { padding: 18px 28px 40px; max-width: 1200px; }
h2 { font-size: 17px; border-bottom: 2px solid var(--line); padding-bottom: 3px; margin-top: 28px; }
table { border-collapse: collapse; font-size: 13px; }
th, td { border-bottom: 1px solid var(--line); padding: 4px 8px; text-align: left; vertical-align: top; }
th { background: #eef1f4; position: sticky; top: 0; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.badge { display: inline-block; padding: 1px 8px; border-radius: 9px; color: #fff; font-size: 12px; }
.badge.ok { background: var(--ok); } .badge.partial { background: var(--partial); }
.badge.failed { background: var(--failed); } .badge.pending { background: var(--pending); }
.note { color: var(--muted); border-left: 3px solid var(--line); padding: 4px 10px; margin: 6px 0; }
.error { color: var(--failed); font-family: ui-monospace, monospace; font-size: 13px; }
.flag { display: inline-block; background: #eef1f4; border: 1px solid var(--line); border-radius: 4px;
        padding: 0 5px; margin: 1px 2px; font-size: 12px; font-family: ui-monospace, monospace; }
figure { margin: 10px 0; } figure img { max-width: 100%; border: 1px solid var(--line); background: #fff; }
figcaption { color: var(--muted); font-size: 13px; }
nav.pager { margin: 8px 0 0; font-size: 14px; }
nav.pager a { margin-right: 16px; }
.grid { display: grid; grid-template-columns: repeat(auto-fit, minmax(280px, 1fr)); gap: 12px 28px; }
code { font-size: 12px; }
.muted { color: var(--muted); }
.verdict { display: inline-block; padding: 0 7px; border-radius: 3px; font-size: 12px; border: 1px solid; }
.verdict.accepted { color: var(--ok); border-color: var(--ok); }
.verdict.rejected { color: var(--failed); border-color: var(--failed); }
.verdict.another-look { color: var(--partial); border-color: var(--partial); }
"""


# --------------------------------------------------------------------------- small helpers


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _safe_name(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.+-]", "_", text) or "event"


def _num(value: Any, fmt: str = "{:.3f}") -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    return "" if not math.isfinite(v) else fmt.format(v)


def _pm(comp: Mapping[str, Any], key: str) -> str:
    v, e = _num(comp.get(key)), _num(comp.get(f"{key}_err"))
    return f"{v} &plusmn; {e}" if v and e else v


def _badge(status: str) -> str:
    return f'<span class="badge {_e(status)}">{_e(status)}</span>'


def _flags_html(flags: list[str]) -> str:
    return " ".join(f'<span class="flag" title="{_e(_flag_text(f))}">{_e(f)}</span>' for f in flags)


def _flag_text(flag: str) -> str:
    if flag.startswith("stage_missing:"):
        stage = flag.split(":", 1)[1]
        return f"{STAGE_NAMES.get(stage, stage)} has not run"
    return FLAG_TEXT.get(flag, "")


def _page(title: str, subtitle: str, body: str, *, css_href: str) -> str:
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f'<title>{_e(title)}</title><link rel="stylesheet" href="{_e(css_href)}"></head>\n'
            f'<body><header class="top"><h1>{_e(title)}</h1><div class="sub">{subtitle}</div></header>\n'
            f"<main>\n{body}\n</main></body></html>\n")


def _save(fig, path: Path) -> None:
    fig.savefig(path, dpi=96)


def _group(ev: Mapping[str, Any], name: str) -> Mapping[str, Any] | None:
    return ev["groups"].get(name)


def why_missing(ev: Mapping[str, Any], stage: str) -> str:
    """The recorded cause of a missing stage (no meteor, failed plasma fit), or ``""``."""
    flags = list(ev["attrs"].get("flags", []))
    if "no_meteor" in flags and stage in ("spectrum", "lines", "composition"):
        return "no meteor found in the video"
    plasma = ev["groups"].get("plasma")
    if stage == "composition" and plasma is not None and not plasma["attrs"].get("success", True):
        reason = str(plasma["attrs"].get("reason", "")).strip()
        return "the plasma fit failed" + (f": {reason}" if reason else "")
    return ""


def _missing_note(stage: str, what: str, ev: Mapping[str, Any] | None = None) -> str:
    why = why_missing(ev, stage) if ev is not None else ""
    return (f'<p class="note">No {_e(what)}: {_e(STAGE_NAMES.get(stage, stage))} has not run for this event '
            f'(no <code>/{_e(stage)}</code> in the file)' + (f"; {_e(why)}" if why else "") + ".</p>")


# --------------------------------------------------------------------------- data for the figures


def _frame_times(ev: Mapping[str, Any], n_rows: int) -> tuple[np.ndarray, str]:
    """Times of the rows of ``/spectrum/per_frame`` and where they come from."""
    spec = _group(ev, "spectrum") or {"datasets": {}}
    for source, group in (("spectrum", spec), ("track", _group(ev, "track")), ("frames", _group(ev, "frames"))):
        if group is not None and "time_s" in group["datasets"] and len(group["datasets"]["time_s"]) == n_rows:
            return np.asarray(group["datasets"]["time_s"], dtype=float), source
    return np.arange(n_rows, dtype=float), "index"


def stacked_image(ev: Mapping[str, Any]) -> tuple[np.ndarray | None, str]:
    """Maximum over the frames minus a median sky, from the event's video; or ``(None, reason)``.

    Read through :func:`meteorspec.video.read_stack` from the input paths
    recorded in ``/inputs``; skipped when the video is gone or has changed
    since processing (its SHA-256 differs).
    """
    from ..config import load_event, load_station
    from ..errors import InputError
    from ..pipeline import file_sha256
    from ..video import read_stack

    inputs = ev["groups"].get("inputs", {"groups": {}})["groups"]
    if not {"event", "station", "video"} <= set(inputs):
        return None, "the file records no event, station and video inputs"
    video = Path(inputs["video"]["attrs"].get("path", ""))
    if not video.exists():
        return None, f"video {video} not found (moved or deleted since processing)"
    if file_sha256(video) != inputs["video"]["attrs"].get("sha256"):
        return None, f"video {video} has changed since processing"
    try:
        event = load_event(inputs["event"]["attrs"]["path"])
        station = load_station(inputs["station"]["attrs"]["path"])
        stored = read_stack(event, station).stored
    except InputError as exc:
        return None, str(exc)
    # a median of at most 15 evenly spaced frames is a good enough sky for a picture, and cheap
    pick = np.unique(np.linspace(0, stored.shape[0] - 1, min(15, stored.shape[0])).astype(int))
    sky = np.median(stored[pick], axis=0)
    return stored.max(axis=0).astype(float) - sky, ""


def predicted_spectrum(ev: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """First-order positions (x, y, wavelength) for the brightest zeroth-order point of the track."""
    from ..optics import SpectralGeometry

    track, cal = _group(ev, "track"), _group(ev, "calibration")
    if track is None or cal is None or not {"x", "y"} <= set(track["datasets"]):
        return None
    x, y = (np.asarray(track["datasets"][k], dtype=float) for k in ("x", "y"))
    flux = np.asarray(track["datasets"].get("flux", np.ones_like(x)), dtype=float)
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(flux)
    if not ok.any():
        return None
    i = np.flatnonzero(ok)[np.argmax(flux[ok])]
    a = cal["attrs"]
    try:
        geo = SpectralGeometry.from_values(a)
    except (KeyError, ValueError, TypeError):
        return None
    orders = (_group(ev, "station") or {"attrs": {}})["attrs"].get("grating.orders", [1])
    order = int(np.atleast_1d(orders)[0])
    wl = np.arange(370.0, 900.5, 1.0)
    sx, sy = geo.spectrum_pixel(x[i], y[i], wl, order=order)
    return np.asarray(sx), np.asarray(sy), wl


def lines_columns(ev: Mapping[str, Any]) -> dict[str, np.ndarray] | None:
    """The ``/lines`` table as columns, whichever way it is stored.

    Accepted: a compound dataset ``/lines`` (contract section 5), a group
    ``/lines`` holding one compound dataset, or a group of column datasets.
    """
    if "lines" in ev["datasets"] and isinstance(ev["datasets"]["lines"], dict):
        return ev["datasets"]["lines"]
    group = _group(ev, "lines")
    if group is None:
        return None
    for value in group["datasets"].values():
        if isinstance(value, dict):
            return value
    if "lab_nm" in group["datasets"] or "measured_nm" in group["datasets"]:
        return {k: np.asarray(v) for k, v in group["datasets"].items()}
    return None


def normal_band(speed_km_s: np.ndarray | None = None) -> tuple[dict[str, np.ndarray] | None, str]:
    """The speed-dependent ``normal`` band of the classify stage, or ``(None, why)``.

    ``centre`` is :func:`meteorspec.classify.expected_normal` at each speed; the
    edges are the points with the same Fe/Mg and Na/Mg at the ``Na-poor`` and
    ``Na-enhanced`` thresholds of ``calibration/classes.csv`` (relative to the
    expected Na/Mg), i.e. the Na/Mg range that the class table calls normal.
    """
    try:
        from ..classify import expected_normal, load_class_table
    except ImportError as exc:
        return None, f"speed-dependent normal band not drawn: the classify stage is not available ({exc})"
    v = np.arange(11.0, 72.5, 0.5) if speed_km_s is None else np.asarray(speed_km_s, dtype=float)
    table = load_class_table()
    lo, hi = table.threshold("Na-poor", "na_mg_rel"), table.threshold("Na-enhanced", "na_mg_rel")
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return None, "speed-dependent normal band not drawn: the class table has no Na/Mg limits"
    centre = np.asarray(expected_normal(v), dtype=float)

    def scaled(factor: float) -> np.ndarray:
        edge = centre * np.array([factor, 1.0, 1.0])
        return edge / edge.sum(axis=1, keepdims=True)

    return {"speed_km_s": v, "centre": centre, "lower": scaled(lo), "upper": scaled(hi)}, ""


# --------------------------------------------------------------------------- manual review


VERDICT_TEXT = {"accepted": "accepted", "rejected": "rejected", "another-look": "needs another look"}


def _verdict_badge(verdict: str) -> str:
    return f'<span class="verdict {_e(verdict)}">{_e(VERDICT_TEXT.get(verdict, verdict or "no verdict"))}</span>'


def review_cell(ev: Mapping[str, Any]) -> str:
    """Night-table cell: the latest verdict and reviewed class, or a dash when never reviewed."""
    from ..review.record import latest_review, reviewed_class

    latest = latest_review(ev["groups"].get("review"))
    if latest is None:
        return '<span class="muted">&ndash;</span>'
    _, entry = latest
    a = entry["attrs"]
    auto = str(a.get("automatic_class", ""))
    cls = reviewed_class(entry)
    changed = f" &rarr; {_e(cls)}" if cls and cls != auto else ""
    who = _e(a.get("reviewer", ""))
    return f'{_verdict_badge(str(a.get("verdict", "")))}{changed} <span class="muted">{who}</span>'


def _review_summary_html(ev: Mapping[str, Any]) -> str:
    """The latest manual review next to the automatic result (event page, near the top)."""
    from ..review.record import latest_review, reviewed_class

    latest = latest_review(ev["groups"].get("review"))
    parts = ["<h2>Manual review</h2>"]
    if latest is None:
        parts.append('<p class="muted">not reviewed yet (<code>meteorspec review EVENT.h5</code>)</p>')
        return "\n".join(parts)
    name, entry = latest
    a = entry["attrs"]
    res = entry["groups"].get("result", {"attrs": {}})["attrs"]
    comp = (ev["groups"].get("composition") or {"attrs": {}})["attrs"]
    auto_cls = comp.get("class", "")
    if a.get("automatic_class") and a["automatic_class"] != auto_cls:
        parts.append(f'<p class="note">Reviewed when the automatic class was {_e(a["automatic_class"])} '
                     f'(the event has been processed again since).</p>')
    n = len(ev["groups"]["review"]["groups"])
    parts.append(f'<p>{_verdict_badge(str(a.get("verdict", "")))} by <b>{_e(a.get("reviewer", ""))}</b>, '
                 f'{_e(a.get("time_utc", ""))} (entry {_e(name)} of {n})</p>')
    if a.get("note"):
        parts.append(f'<p class="note">{_e(a["note"])}</p>')
    rows = [("class", _e(auto_cls), _e(reviewed_class(entry)))]
    rows += [(k.capitalize(), _pm(comp, k), _pm(res, k)) for k in ("na", "mg", "fe")]
    parts.append("<table><tr><th></th><th>automatic</th><th>reviewed</th></tr>"
                 + "".join(f"<tr><th>{k}</th><td class=num>{x}</td><td class=num>{y}</td></tr>" for k, x, y in rows)
                 + "</table>")
    corr = [c for c in a.get("corrections", []) if c and c != "none"]
    parts.append("<p>Corrections: " + (_e("; ".join(corr)) if corr else "none (verdict on the automatic result)")
                 + "</p>")
    return "\n".join(parts)


def _review_log_html(review: Mapping[str, Any] | None) -> str:
    """Every entry of the append-only review log, oldest first."""
    from ..review.record import reviewed_class

    parts = ["<h2>Review log</h2>"]
    names = sorted(review["groups"]) if review is not None else []
    if not names:
        parts.append("<p>no manual decisions recorded</p>")
        return "\n".join(parts)
    rows = []
    for name in names:
        entry = review["groups"][name]
        a = entry["attrs"]
        corr = [c for c in a.get("corrections", []) if c and c != "none"]
        rows.append(f"<tr><td>{_e(name)}</td><td>{_e(a.get('time_utc', ''))}</td>"
                    f"<td>{_verdict_badge(str(a.get('verdict', '')))}</td><td>{_e(a.get('reviewer', ''))}</td>"
                    f"<td>{_e(reviewed_class(entry))}</td><td>{_e('; '.join(corr) or 'none')}</td>"
                    f"<td>{_e(a.get('note', ''))}</td></tr>")
    parts.append("<table><tr><th>entry</th><th>time (UTC)</th><th>verdict</th><th>reviewer</th><th>class</th>"
                 "<th>corrections</th><th>note</th></tr>" + "".join(rows) + "</table>")
    return "\n".join(parts)


# --------------------------------------------------------------------------- pages


def _event_sections(ev: Mapping[str, Any], img_dir: Path, img_href: str, stem: str) -> str:
    from .figures import (plot_composition, plot_light_curves, plot_spectrogram, plot_spectrum, plot_stack,
                          window_light_curves)

    parts: list[str] = []

    def figure(fig, kind: str, caption: str) -> None:
        name = f"{stem}_{kind}.png"
        _save(fig, img_dir / name)
        parts.append(f'<figure><img src="{_e(img_href + name)}" alt="{_e(caption)}">'
                     f"<figcaption>{_e(caption)}</figcaption></figure>")

    track = _group(ev, "track")
    parts.append("<h2>Sky image</h2>")
    image, why = stacked_image(ev)
    if image is None:
        parts.append(f'<p class="note">Stacked image skipped: {_e(why)}.</p>')
    else:
        kw: dict[str, Any] = {}
        if track is not None and {"x", "y"} <= set(track["datasets"]):
            kw.update(track_x_px=track["datasets"]["x"], track_y_px=track["datasets"]["y"])
        pred = predicted_spectrum(ev)
        if pred is not None:
            kw.update(spectrum_x_px=pred[0], spectrum_y_px=pred[1], spectrum_wavelength_nm=pred[2])
        figure(plot_stack(image, **kw), "stack",
               "Maximum over all frames minus the sky; dots: zeroth-order track; dashed: first order "
               "predicted from the calibration for the brightest frame (ticks every 100 nm).")
        if track is None:
            parts.append(_missing_note("track", "track or predicted spectrum overlay"))

    spec = _group(ev, "spectrum")
    lines_table = lines_columns(ev)
    parts.append("<h2>Spectrum</h2>")
    if spec is None or not {"wavelength_nm", "flux"} <= set(spec["datasets"]):
        parts.append(_missing_note("spectrum", "calibrated spectrum", ev))
    else:
        d = spec["datasets"]
        calibrated = "uncalibrated_flux" not in ev["attrs"].get("flags", [])
        figure(plot_spectrum(d["wavelength_nm"], d["flux"], d.get("flux_err"), lines=lines_table,
                             calibrated=calibrated),
               "spectrum", "Whole-flight spectrum with 1-sigma band; shaded: the Na, Mg and Fe line groups; "
                           "labels: identified lines (strongest first).")
        if lines_table is None:
            parts.append(_missing_note("lines", "identified lines", ev))
        if "per_frame" in d and np.ndim(d["per_frame"]) == 2 and np.size(d["per_frame"]):
            per_frame = np.asarray(d["per_frame"], dtype=float)
            t, source = _frame_times(ev, per_frame.shape[0])
            parts.append("<h2>Spectrogram</h2>")
            figure(plot_spectrogram(per_frame, d["wavelength_nm"], t), "spectrogram",
                   f"Per-frame spectra (time from /{source}/time_s)." if source != "index"
                   else "Per-frame spectra (rows by frame number).")
            parts.append("<h2>Light curves</h2>")
            zt = zf = None
            if track is not None and {"time_s", "flux"} <= set(track["datasets"]):
                zt, zf = track["datasets"]["time_s"], track["datasets"]["flux"]
            figure(plot_light_curves(t, window_light_curves(per_frame, d["wavelength_nm"]),
                                     zeroth_time_s=zt, zeroth_flux=zf), "lightcurves",
                   "Monochromatic light curves: per-frame flux summed over each line-group window "
                   "(continuum included), each scaled to its peak; dashed: zeroth order.")
        else:
            parts.append("<h2>Spectrogram and light curves</h2>")
            parts.append('<p class="note">No /spectrum/per_frame in the file: no spectrogram or light curves.</p>')

    if lines_table is not None and len(lines_table.get("lab_nm", [])):
        cols = [c for c in ("species", "multiplet", "lab_nm", "measured_nm", "intensity", "intensity_err", "snr")
                if c in lines_table]
        rows = "".join("<tr>" + "".join(
            f'<td class="num">{_num(lines_table[c][i], "{:.3f}" if c.endswith("_nm") else "{:.4g}")}</td>'
            if np.asarray(lines_table[c]).dtype.kind in "fiu" else f"<td>{_e(lines_table[c][i])}</td>"
            for c in cols) + "</tr>" for i in range(len(lines_table["lab_nm"])))
        parts.append("<h2>Identified lines</h2><table><tr>" + "".join(f"<th>{_e(c)}</th>" for c in cols)
                     + f"</tr>{rows}</table>")

    parts.append("<h2>Composition</h2>")
    comp = _group(ev, "composition")
    if comp is None:
        parts.append(_missing_note("composition", "composition", ev))
    else:
        a = comp["attrs"]
        figure(plot_composition(a), "composition", "Relative intensities of the Na, Mg and Fe groups "
                                                   "(sum 1) with 1-sigma errors.")
        reason = a.get("class_reason", "")
        parts.append(f"<p>Class <b>{_e(a.get('class', ''))}</b>"
                     + (f" ({_e(reason)})" if reason else "")
                     + f"; speed {_num(a.get('speed_km_s'), '{:.1f}') or 'unknown'} km/s.</p>")
    return "\n".join(parts)


def _attr_table(attrs: Mapping[str, Any]) -> str:
    rows = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in sorted(attrs.items()))
    return f"<table>{rows}</table>"


def _event_page(ev: Mapping[str, Any], *, h5_href: str, img_dir: Path, stem: str, prev_href: str | None,
                next_href: str | None, latest_failure: str = "") -> str:
    a = ev["attrs"]
    flags = list(a.get("flags", []))
    nav = ['<a href="../index.html">&larr; night</a>']
    if prev_href:
        nav.append(f'<a href="{_e(prev_href)}">previous event</a>')
    if next_href:
        nav.append(f'<a href="{_e(next_href)}">next event</a>')
    nav.append(f'<a href="{_e(h5_href)}">HDF5 file</a>')
    body = [f'<nav class="pager">{" ".join(nav)}</nav>',
            f"<p>{_badge(str(a.get('status', '')))} station <b>{_e(a.get('station', ''))}</b>, "
            f"start {_e(a.get('start_utc', ''))}, software {_e(a.get('software_version', ''))}</p>"]
    if latest_failure:
        body.append(f'<p class="error">{_e(_latest_failure_text(latest_failure))}</p>')
    if a.get("error"):
        body.append(f'<p class="error">{_e(a["error"])}</p>')
    body.append("<h2>Flags</h2>")
    if flags:
        body.append("<table>" + "".join(f'<tr><td><span class="flag">{_e(f)}</span></td>'
                                        f"<td>{_e(_flag_text(f))}</td></tr>" for f in flags) + "</table>")
    else:
        body.append("<p>none</p>")
    body.append(_review_summary_html(ev))
    body.append(_event_sections(ev, img_dir, "../img/", stem))
    cal = _group(ev, "calibration")
    body.append("<h2>Calibration values used</h2>")
    body.append(_attr_table(cal["attrs"]) if cal is not None else _missing_note("calibration", "calibration"))
    inputs = ev["groups"].get("inputs")
    if inputs is not None:
        rows = "".join(f"<tr><td>{_e(role)}</td><td><code>{_e(g['attrs'].get('path', ''))}</code></td>"
                       f"<td><code>{_e(str(g['attrs'].get('sha256', ''))[:16])}&hellip;</code></td></tr>"
                       for role, g in sorted(inputs["groups"].items()))
        body.append(f"<h2>Inputs</h2><table><tr><th>role</th><th>path</th><th>SHA-256</th></tr>{rows}</table>")
    body.append(_review_log_html(ev["groups"].get("review")))
    title = f"Event {a.get('event_id', stem)}"
    return _page(title, "meteorspec event report", "\n".join(body), css_href="../style.css")


def latest_failures(out_dir: Path) -> dict[str, str]:
    """Event files whose latest run failed but kept an earlier result, with the run's reason.

    ``meteorspec process`` never replaces an ok or partial file by a failed run (see
    :func:`meteorspec.batch.run_event`); the failure is only in the night table, which every
    run rewrites. Without this the report would show the kept result as if it were current.
    An unreadable table gives no entries (the report reads the event files, not the table).
    """
    from ..batch import NIGHT_TABLE, read_table

    table = out_dir / NIGHT_TABLE
    if not table.is_file():
        return {}
    try:
        rows = read_table(table)
    except (OSError, UnicodeDecodeError, csv.Error):
        return {}
    return {row["output"]: " ".join(str(row.get("error") or "").split()) for row in rows
            if row.get("status") == "failed" and row.get("output")}


def _latest_failure_text(reason: str) -> str:
    return f"The latest run of this event failed; the results below are from an earlier run. {reason}"


def write_report(out_dir: str | Path, *, report_dir: str | Path | None = None) -> Path:
    """Write the night report for every ``*.h5`` in ``out_dir``; return the index page.

    Parameters
    ----------
    out_dir : str or Path
        Folder written by ``meteorspec process`` (event files, ``night.csv``).
    report_dir : str or Path, optional
        Where to write the report (default ``out_dir/report``): ``index.html``,
        ``style.css``, ``events/<event id>.html``, ``img/*.png``.

    Raises
    ------
    FileNotFoundError
        If ``out_dir`` does not exist.
    """
    from .figures import plot_ternary

    out = Path(out_dir)
    if not out.is_dir():
        raise FileNotFoundError(f"{out}: no such folder")
    rep = out / "report" if report_dir is None else Path(report_dir)
    (rep / "events").mkdir(parents=True, exist_ok=True)
    (rep / "img").mkdir(exist_ok=True)
    (rep / "style.css").write_text(CSS, encoding="utf-8")

    files = sorted(out.glob("*.h5"))
    events: list[tuple[Path, dict[str, Any] | None, str]] = []
    for path in files:
        try:
            events.append((path, read_event(path), ""))
        except Exception as exc:  # noqa: BLE001 - one unreadable file must not stop the report
            events.append((path, None, " ".join(str(exc).split())))
    failures = latest_failures(out)
    stems = [_safe_name(p.stem) for p, _, _ in events]
    hrefs = [f"events/{s}.html" for s in stems]

    rows = []
    for i, (path, ev, problem) in enumerate(events):
        h5_rel = os.path.relpath(path, rep / "events")
        if ev is None:
            rows.append(f"<tr><td>{_e(path.stem)}</td><td>{_badge('failed')}</td><td colspan=8></td>"
                        f'<td class="error">{_e(problem)}</td></tr>')
            continue
        status = str(ev["attrs"].get("status", ""))
        # the table's failure is about this file only while the file holds a kept earlier result
        failure = failures.get(path.name, "") if status in ("ok", "partial") else ""
        page = _event_page(ev, h5_href=h5_rel, img_dir=rep / "img", stem=stems[i], latest_failure=failure,
                           prev_href=f"{stems[i - 1]}.html" if i > 0 and events[i - 1][1] is not None else None,
                           next_href=f"{stems[i + 1]}.html" if i + 1 < len(events) and events[i + 1][1] is not None
                           else None)
        (rep / hrefs[i]).write_text(page, encoding="utf-8")
        a = ev["attrs"]
        comp = (ev["groups"].get("composition") or {"attrs": {}})["attrs"]
        cls = comp.get("class", "")
        rows.append(
            f'<tr><td><a href="{_e(hrefs[i])}">{_e(a.get("event_id", path.stem))}</a></td>'
            f"<td>{_badge(status)}{' ' + _badge('failed') + ' latest run' if failure else ''}</td>"
            f"<td>{_e(a.get('station', ''))}</td>"
            f"<td>{_e(cls)}</td><td class=num>{_pm(comp, 'na')}</td><td class=num>{_pm(comp, 'mg')}</td>"
            f"<td class=num>{_pm(comp, 'fe')}</td><td class=num>{_num(comp.get('speed_km_s'), '{:.1f}')}</td>"
            f"<td>{review_cell(ev)}</td>"
            f"<td>{_flags_html(list(a.get('flags', [])))}</td>"
            f'<td class="error">{_e(failure or a.get("error", ""))}</td></tr>')

    comps = [(ev["groups"].get("composition") or {"attrs": {}})["attrs"] for _, ev, _ in events if ev is not None]
    band, band_note = normal_band()
    fig = plot_ternary([c.get("na", np.nan) for c in comps], [c.get("mg", np.nan) for c in comps],
                       [c.get("fe", np.nan) for c in comps], classes=[str(c.get("class", "")) for c in comps],
                       band=band, band_note=band_note)
    _save(fig, rep / "img" / "ternary.png")

    statuses = Counter(str(ev["attrs"].get("status", "")) if ev is not None else "failed" for _, ev, _ in events)
    classes = Counter(str(c.get("class")) for c in comps if c.get("class"))
    summary = ", ".join(f"{_badge(s)} {n}" for s, n in sorted(statuses.items())) or "no event files"
    body = [f"<p>{len(events)} events: {summary}"
            + (f"; classes: {_e(', '.join(f'{k} {n}' for k, n in sorted(classes.items())))}" if classes else "")
            + "</p>"]
    if (out / "night.csv").is_file():
        body.append(f'<p>Night table: <a href="{_e(os.path.relpath(out / "night.csv", rep))}">night.csv</a></p>')
    body.append("<h2>Composition of the night</h2>")
    body.append('<figure><img src="img/ternary.png" alt="ternary diagram of the night">'
                "<figcaption>Na-Mg-Fe relative intensities of every classified event, coloured by class"
                + (f"; {_e(band_note)}" if band is None and band_note else
                   "; dashed: expected position of a normal (chondritic) meteoroid by speed (classify stage); "
                   "shaded: the Na/Mg range the class table calls normal")
                + ".</figcaption></figure>")
    if any(c.get("class") for c in comps) is False and comps:
        body.append(_missing_note("composition", "composition for any event"))
    body.append("<h2>Events</h2><table><tr><th>event</th><th>status</th><th>station</th><th>class</th>"
                "<th>Na</th><th>Mg</th><th>Fe</th><th>speed km/s</th><th>reviewed</th><th>flags</th><th>error</th></tr>"
                + "".join(rows) + "</table>")
    index = rep / "index.html"
    index.write_text(_page(f"Night report: {out.resolve().name}", f"{_e(out.resolve())}", "\n".join(body),
                           css_href="style.css"), encoding="utf-8")
    return index
