"""Manual review of a single fireball from its event file (``meteorspec review EVENT.h5``).

- :mod:`.rework`  pure logic: the stored per-frame spectra, a reviewer's corrections
  (frames, wavelength scale, pinned and rejected lines), and the re-derived lines, plasma
  fit, composition and class.
- :mod:`.record`  one review as an entry of the append-only ``/review`` log.
- :mod:`.desk`    figures of the event and the interactive review window (matplotlib).

Writing goes through :func:`meteorspec.store.append_review` (h5py stays in the store).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..errors import InputError
from .record import latest_review, make_entry, reviewed_class, utc_now
from .rework import (VERDICTS, Corrections, EventView, Rework, parse_frame_list, parse_frame_span, parse_line,
                     parse_pin, parse_span_nm, rederive)

__all__ = ["VERDICTS", "Corrections", "EventView", "Rework", "ReviewOutcome", "build_corrections", "open_event",
           "review_event",
           "compare_text", "latest_review", "reviewed_class", "parse_frame_list", "parse_frame_span",
           "parse_line", "parse_pin", "parse_span_nm", "rederive"]


def build_corrections(path: str | Path, *, frames: str | None = None, drop_frames: str | None = None,
                      shift_nm: float | None = None, stretch: float | None = None, pins: tuple[str, ...] = (),
                      reject: tuple[str, ...] = (), ignore_nm: tuple[str, ...] = ()) -> Corrections:
    """Corrections from their written form (the command-line options).

    Raises
    ------
    InputError
        Naming ``path`` and the malformed value (NaN, unknown line, bad span, ...).
    """
    from ..atomic import load_line_list

    try:
        first, last = parse_frame_span(frames) if frames is not None else (None, None)
        dropped = parse_frame_list(drop_frames) if drop_frames is not None else ()
        for name, value in (("--shift-nm", shift_nm), ("--stretch", stretch)):
            if value is not None and not math.isfinite(value):
                raise ValueError(f"{name} must be finite, got {value}")
        if stretch is not None and not 0.8 < stretch < 1.25:
            raise ValueError(f"--stretch {stretch:g} is out of reach (0.8-1.25; a grating's scale is not off by 20 %)")
        line_list = load_line_list() if pins or reject else None
        pinned = tuple(parse_pin(p, line_list) for p in pins)
        rejected = tuple({ref.index: ref for ref in (parse_line(r, line_list) for r in reject)}.values())
        ignored = tuple(parse_span_nm(s) for s in ignore_nm)
    except ValueError as exc:
        raise InputError(path, str(exc)) from None
    if pinned and (shift_nm is not None or stretch is not None):
        raise InputError(path, "give either --pin or --shift-nm/--stretch, not both")
    return Corrections(first_frame=first, last_frame=last, dropped_frames=dropped,
                       shift_nm=0.0 if shift_nm is None else float(shift_nm),
                       stretch=1.0 if stretch is None else float(stretch), pins=pinned, rejected=rejected,
                       ignored_nm=ignored)


def open_event(path: str | Path, *, require_spectrum: bool = False) -> EventView:
    """Read and check an event file for review.

    The speed error is not in the event file; it is read from the recorded ``event.toml``
    when that file is still there (otherwise the classifier takes the speed as exact).

    Raises
    ------
    InputError
        Missing file, not HDF5, not an event file, or (with ``require_spectrum``) no
        per-frame spectra; without it an event with no spectrum opens for a verdict only.
    """
    from ..store import read_event

    path = Path(path)
    if not path.exists():
        raise InputError(path, "no such file")
    if path.is_dir():
        raise InputError(path, "is a folder; give an <event id>.h5 file")
    ev = read_event(path)
    return EventView.from_event(ev, str(path), speed_err_km_s=_speed_err(ev), require_spectrum=require_spectrum)


def _speed_err(ev: dict[str, Any]) -> float | None:
    from ..config import load_event

    rec = ev["groups"].get("inputs", {"groups": {}})["groups"].get("event")
    if rec is None:
        return None
    try:
        err = load_event(rec["attrs"].get("path", "")).speed_err_km_s
    except (InputError, OSError, AttributeError):
        return None
    return float(err) if err is not None and math.isfinite(float(err)) else None


@dataclass(eq=False)
class ReviewOutcome:
    """What one review did: the re-derivation (None without corrections) and the log entry."""

    view: EventView
    rework: Rework | None
    entry: dict[str, Any]
    written: str | None        # entry name, None for a dry run or no verdict


def review_event(path: str | Path, corrections: Corrections, *, verdict: str | None, reviewer: str | None,
                 note: str = "", dry_run: bool = False, time_utc: str | None = None,
                 plasma_options: dict[str, Any] | None = None, view: EventView | None = None) -> ReviewOutcome:
    """Re-derive an event with ``corrections`` and append the review to its log.

    Parameters
    ----------
    path : str or Path
        The event file.
    corrections : Corrections
        Empty: the verdict is on the automatic result as it is (nothing re-derived).
    verdict : str or None
        One of :data:`VERDICTS`; None records nothing (a look at the re-derived result).
    reviewer : str or None
        Required with a verdict.
    note : str
        Why (free text, one line is kept as written).
    dry_run : bool
        Re-derive and show, write nothing.
    time_utc : str, optional
        Time of the decision (default now).

    Raises
    ------
    InputError
        Any problem with the file or the corrections; nothing is written then.
    """
    from ..store import append_review
    from ..version import software_version

    path = Path(path)
    if verdict is not None and verdict not in VERDICTS:
        raise InputError(path, f"verdict {verdict!r} is not one of {', '.join(VERDICTS)}")
    if verdict is not None and not (reviewer or "").strip():
        raise InputError(path, "a verdict needs the reviewer's name (--reviewer)")
    view = open_event(path) if view is None else view
    rework = None if corrections.is_empty else rederive(view, corrections, plasma_options=plasma_options)
    entry = make_entry(view, rework, verdict=verdict or "", reviewer=(reviewer or "").strip(),
                       note=" ".join(note.split()), time_utc=utc_now() if time_utc is None else time_utc,
                       software_version=software_version())
    written = None
    if verdict is not None and not dry_run:
        written = append_review(path, entry)
    return ReviewOutcome(view=view, rework=rework, entry=entry, written=written)


def _fmt(value: Any, fmt: str = "{:.3f}") -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    return fmt.format(v) if math.isfinite(v) else "n/a"


def compare_text(outcome: ReviewOutcome) -> str:
    """Automatic result next to the reviewed one, and the corrections, as terminal lines."""
    view, rework = outcome.view, outcome.rework
    auto = view.composition
    res = outcome.entry["groups"]["result"]["attrs"]
    span = (f"{view.n_frames} frames, {view.wavelength_nm[0]:.1f}-{view.wavelength_nm[-1]:.1f} nm"
            if view.wavelength_nm.size else "no spectrum")
    out = [f"event      {view.event_id}   ({span})"]
    out.append("corrections " + ("; ".join(outcome.entry["attrs"]["corrections"])))
    source = str(auto.get("source", "")) if auto else ""
    if source.startswith(("unsaturated", "least saturated")):
        frames = auto.get("source_frames")
        which = f" ({', '.join(str(int(k)) for k in frames)})" if frames is not None and len(frames) else ""
        kind = ("the unsaturated frames" if source.startswith("unsaturated")
                else "the least saturated frames, whose group lines are still partly saturated")
        out.append(f"note       the automatic composition used only {kind}{which}; a re-derivation "
                   "uses the frames chosen here (all by default)")
    if rework is not None:
        out.append(f"frames     {rework.frames_kept.size} of {view.n_frames} used"
                   + (f" ({rework.frames_kept[0]}-{rework.frames_kept[-1]})" if rework.frames_kept.size else ""))
        out.append(f"wavelength new = old {rework.shift_nm:+.3f} nm, stretch {rework.stretch:.5f} about 550 nm")
        for p in rework.pinned:
            out.append(f"  pin: peak found at {p.peak_nm:.2f} nm (given {p.pin.seen_nm:g}) -> {p.pin.label}")
        out += [f"note       {n}" for n in rework.notes]
        if not rework.fit:
            out.append(f"plasma fit failed: {rework.fit.reason}")
        else:
            out.append(f"plasma     T {_fmt(rework.fit.temperature_k, '{:.0f}')} K, "
                       f"chi2/dof {_fmt(rework.fit.chi2_reduced, '{:.2f}')}")
    out.append(f"{'':<11}{'automatic':<24}reviewed")
    for k in ("na", "mg", "fe"):
        a = f"{_fmt(auto.get(k))} +/- {_fmt(auto.get(f'{k}_err'))}" if auto else "n/a"
        r = f"{_fmt(res.get(k))} +/- {_fmt(res.get(f'{k}_err'))}" if k in res else "n/a"
        out.append(f"{k.capitalize():<11}{a:<24}{r}")
    out.append(f"{'class':<11}{str(auto.get('class', 'n/a')) if auto else 'n/a':<24}{res.get('class', 'n/a')}"
               + (f" (confidence {_fmt(res['class_confidence'], '{:.2f}')})" if "class_confidence" in res else ""))
    if res.get("class_reason"):
        out.append(f"{'':<11}reason: {res['class_reason']}")
    n_auto = len(view.lines.get("lab_nm", []))
    if rework is not None:
        out.append(f"{'lines':<11}{n_auto:<24}{len(rework.lines)}")
        for i in range(len(rework.lines)):
            t = rework.lines
            out.append(f"  {t.species[i] or '?':<14} lab {_fmt(t.lab_nm[i], '{:8.3f}')}  measured "
                       f"{_fmt(t.measured_nm[i], '{:8.3f}')}  S/N {_fmt(t.snr[i], '{:.0f}')}  {t.status[i]}")
    return "\n".join(out)
