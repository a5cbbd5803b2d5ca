"""Re-deriving an event from its HDF5 output after a person's corrections (no video needed).

The per-frame spectra on their common wavelength grid are enough to redo the last stages:
choose the frames, correct the wavelength scale, drop line identifications, then run the
project's own line identification (:func:`meteorspec.lines.identify_lines`), plasma fit
(:func:`meteorspec.plasma.fit_plasma`) and class (:func:`meteorspec.classify.classify`).
Everything here is pure: the event arrives as the nested dicts of
:func:`meteorspec.store.read_event` and leaves as plain objects; writing is the store's job.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..atomic import LineList, load_line_list
from ..errors import InputError
from ..extract import FrameSpectra, Spectrum

__all__ = ["VERDICTS", "PIVOT_NM", "LineRef", "Pin", "Corrections", "EventView", "Rework",
           "parse_frame_span", "parse_frame_list", "parse_line", "parse_pin", "parse_span_nm",
           "kept_frames", "combine_frames", "regrid", "solve_pins", "rederive"]

VERDICTS = ("accepted", "rejected", "another-look")
"""What a reviewer can conclude: the result stands, the event is not usable, or it needs
another look (by the same person later, or someone with more experience)."""

PIVOT_NM = 550.0
"""Fixed point of a wavelength stretch: the middle of the range every station records
(the Mg, Fe and Na groups lie 516-590 nm), so a stretch barely moves the group lines."""

LINE_MATCH_NM = 0.5
"""How close a line named by a reviewer (``"Mg I 517.3"``) must be to a line-list entry of
that species: half the typical spacing of close multiplet members, larger than the 0.1 nm
rounding a person uses."""


# --------------------------------------------------------------------------- corrections


@dataclass(frozen=True)
class LineRef:
    """A line of the project line list named by a reviewer, e.g. ``"Mg I 517.3"``."""

    text: str           # as written
    species: str        # "Mg I"
    lab_nm: float       # 517.268 (line list, air)
    index: int          # row in the line list


@dataclass(frozen=True)
class Pin:
    """"The peak seen at ``seen_nm`` is the line ``line``" (or a bare wavelength)."""

    seen_nm: float
    target_nm: float
    label: str          # "Mg I 517.268" or "517.268 nm"


@dataclass(frozen=True)
class Corrections:
    """Everything a reviewer changed; the defaults change nothing.

    Attributes
    ----------
    first_frame, last_frame : int or None
        Inclusive span of frame indices (rows of ``/spectrum/per_frame``) to use.
    dropped_frames : tuple of int
        Frames left out inside the span (an aircraft, a saturated flare).
    shift_nm, stretch : float
        Manual wavelength correction ``new = old + shift_nm + (stretch - 1) (old - PIVOT_NM)``.
    pins : tuple of Pin
        Alternative to ``shift_nm``/``stretch``: one pin sets a shift, two or more a shift
        and a stretch (least squares).
    rejected : tuple of LineRef
        Line-list entries the reviewer rules out for this event: they are left out of the
        line identification and of the plasma model.
    ignored_nm : tuple of (float, float)
        Wavelength spans left out of the fit and the line search (e.g. a lamp or an aircraft).
    """

    first_frame: int | None = None
    last_frame: int | None = None
    dropped_frames: tuple[int, ...] = ()
    shift_nm: float = 0.0
    stretch: float = 1.0
    pins: tuple[Pin, ...] = ()
    rejected: tuple[LineRef, ...] = ()
    ignored_nm: tuple[tuple[float, float], ...] = ()

    @property
    def is_empty(self) -> bool:
        return self == Corrections()

    def describe(self) -> list[str]:
        """One short line per correction, for the log and the terminal."""
        out = []
        if self.first_frame is not None or self.last_frame is not None:
            out.append(f"frames {'start' if self.first_frame is None else self.first_frame}"
                       f"..{'end' if self.last_frame is None else self.last_frame}")
        if self.dropped_frames:
            out.append("dropped frames " + ",".join(str(k) for k in self.dropped_frames))
        if self.shift_nm != 0.0:
            out.append(f"wavelength shift {self.shift_nm:+.3f} nm")
        if self.stretch != 1.0:
            out.append(f"wavelength stretch x{self.stretch:.5f} about {PIVOT_NM:.0f} nm")
        out += [f"pin: peak at {p.seen_nm:.2f} nm is {p.label}" for p in self.pins]
        out += [f"rejected line {r.species} {r.lab_nm:.3f}" for r in self.rejected]
        out += [f"ignored {lo:.1f}-{hi:.1f} nm" for lo, hi in self.ignored_nm]
        return out


def _number(text: str, what: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise ValueError(f"{what} {text!r} is not a number") from None
    if not math.isfinite(value):
        raise ValueError(f"{what} must be finite, got {text!r}")
    return value


def _integer(text: str, what: str) -> int:
    text = text.strip()
    if not re.fullmatch(r"\d+", text):
        raise ValueError(f"{what} {text!r} is not a frame number (0, 1, 2, ...)")
    return int(text)


def parse_frame_span(text: str) -> tuple[int | None, int | None]:
    """``"5:20"`` -> ``(5, 20)`` (inclusive); ``"5:"`` and ``":20"`` leave one end open."""
    if ":" not in text:
        raise ValueError(f"frame span {text!r} must look like FIRST:LAST (e.g. 5:20, 5: or :20)")
    a, b = (s.strip() for s in text.split(":", 1))
    first = _integer(a, "first frame") if a else None
    last = _integer(b, "last frame") if b else None
    if first is not None and last is not None and last < first:
        raise ValueError(f"frame span {text!r}: last frame before first")
    return first, last


def parse_frame_list(text: str) -> tuple[int, ...]:
    """``"3,7-9"`` -> ``(3, 7, 8, 9)``."""
    out: list[int] = []
    for item in (s.strip() for s in text.split(",")):
        if not item:
            continue
        if "-" in item:
            a, b = item.split("-", 1)
            lo, hi = _integer(a, "frame"), _integer(b, "frame")
            if hi < lo:
                raise ValueError(f"frame range {item!r}: end before start")
            out += range(lo, hi + 1)
        else:
            out.append(_integer(item, "frame"))
    if not out:
        raise ValueError(f"no frame numbers in {text!r}")
    return tuple(sorted(set(out)))


def parse_span_nm(text: str) -> tuple[float, float]:
    """``"655-658"`` -> ``(655.0, 658.0)``."""
    m = re.fullmatch(r"\s*([^:\-\s]+)\s*[-:]\s*([^:\-\s]+)\s*", text)
    if m is None:
        raise ValueError(f"wavelength span {text!r} must look like LO-HI in nm (e.g. 655-658)")
    lo, hi = _number(m[1], "wavelength"), _number(m[2], "wavelength")
    if not 0 < lo < hi:
        raise ValueError(f"wavelength span {text!r}: need 0 < LO < HI")
    return lo, hi


def parse_line(text: str, line_list: LineList) -> LineRef:
    """``"Mg I 517.3"`` -> the nearest Mg I line of the line list within :data:`LINE_MATCH_NM`.

    Raises
    ------
    ValueError
        Unknown species, no line of it near the wavelength, or a malformed name.
    """
    m = re.fullmatch(r"\s*([A-Z][a-z]?\s+[IVX]+)\s+(\S+)\s*", text)
    if m is None:
        raise ValueError(f"line {text!r} must look like 'SPECIES NM', e.g. 'Mg I 517.3'")
    species = " ".join(m[1].split())
    nm = _number(m[2], f"wavelength of {species}")
    own = np.flatnonzero(line_list.species == species)
    if own.size == 0:
        raise ValueError(f"line {text!r}: no {species} lines in the line list")
    k = int(own[np.argmin(np.abs(line_list.wavelength_nm[own] - nm))])
    if abs(line_list.wavelength_nm[k] - nm) > LINE_MATCH_NM:
        raise ValueError(f"line {text!r}: no {species} line within {LINE_MATCH_NM} nm of {nm:g} nm "
                         f"(nearest {line_list.wavelength_nm[k]:.3f} nm)")
    return LineRef(text=text.strip(), species=species, lab_nm=float(line_list.wavelength_nm[k]), index=k)


def parse_pin(text: str, line_list: LineList) -> Pin:
    """``"515.2=Mg I 517.3"`` or ``"515.2=517.268"``: the peak seen at 515.2 nm is that line."""
    if "=" not in text:
        raise ValueError(f"pin {text!r} must look like SEEN_NM=LINE, e.g. '515.2=Mg I 517.3'")
    seen, target = (s.strip() for s in text.split("=", 1))
    seen_nm = _number(seen, "seen wavelength")
    if re.fullmatch(r"[-+0-9.eE]+|nan|inf", target, flags=re.IGNORECASE):
        target_nm = _number(target, "target wavelength")
        return Pin(seen_nm=seen_nm, target_nm=target_nm, label=f"{target_nm:.3f} nm")
    ref = parse_line(target, line_list)
    return Pin(seen_nm=seen_nm, target_nm=ref.lab_nm, label=f"{ref.species} {ref.lab_nm:.3f}")


# --------------------------------------------------------------------------- the event as stored


@dataclass(frozen=True, eq=False)
class EventView:
    """What the review needs from an event file, checked once.

    Attributes
    ----------
    per_frame, per_frame_err : ndarray of shape (n_frames, n_wl)
        ``/spectrum/per_frame`` and its 1-sigma (flux density).
    per_frame_mask : ndarray of shape (n_frames, n_wl), bool
    frame_weight : ndarray of shape (n_frames,)
        Relative brightness of each frame, for bins where some frames are masked
        (see :func:`estimate_frame_weight`).
    fwhm_nm : ndarray of shape (n_wl,)
        Instrument FWHM on the stored grid.
    box_nm : ndarray of shape (n_wl,) or None
        The motion smear inside that width (``/plasma/instrument_box_nm``; the plasma fit's
        line profile, :func:`meteorspec.plasma.fit_plasma`); None for a file without it.
    response_nm : (ndarray, ndarray) or None
        The station response the spectra were divided by (``/plasma/response_wavelength_nm``,
        ``/plasma/response``): the plasma fit models blurred lines divided by it bin by bin.
    shape_rel_err : ndarray of shape (n_frames, n_wl)
        ``/spectrum/per_frame_shape_rel_err`` (bins recovered from the wings of saturated
        pixels); empty when the file has none.
    """

    path: str
    event_id: str
    wavelength_nm: np.ndarray
    bin_width_nm: np.ndarray
    per_frame: np.ndarray
    per_frame_err: np.ndarray
    per_frame_mask: np.ndarray
    time_s: np.ndarray
    frame_weight: np.ndarray
    fwhm_nm: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    lines: dict[str, np.ndarray]
    composition: dict[str, Any]
    speed_km_s: float | None
    speed_err_km_s: float | None
    notes: tuple[str, ...] = ()
    software_version: str = ""   # of the automatic run under review
    response_nm: tuple[np.ndarray, np.ndarray] | None = None
    shape_rel_err: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    box_nm: np.ndarray | None = None
    correlation: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))   # /spectrum/flux_correlation
    common_share: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))  # /spectrum/flux_common_share

    @property
    def n_frames(self) -> int:
        return int(self.per_frame.shape[0])

    @classmethod
    def from_event(cls, ev: Mapping[str, Any], path: str, *, speed_err_km_s: float | None = None,
                   require_spectrum: bool = True) -> EventView:
        """Check and collect the parts of ``read_event(path)`` that the review uses.

        Raises
        ------
        InputError
            Not an event file, no per-frame spectra (unless ``require_spectrum`` is False: then
            the view has no frames and only a verdict can be recorded), inconsistent shapes, no
            instrument width.
        """
        from ..report.html import lines_columns
        from ..store import SCHEMA

        if ev["attrs"].get("schema") != SCHEMA:
            raise InputError(path, f"not a meteorspec event file (schema {ev['attrs'].get('schema')!r}, "
                                   f"expected {SCHEMA!r})")
        spec = ev["groups"].get("spectrum")
        comp = dict((ev["groups"].get("composition") or {"attrs": {}})["attrs"])
        if spec is None:
            if require_spectrum:
                raise InputError(path, "no /spectrum: nothing to re-derive (the extraction has not run for this "
                                       "event); a verdict alone can still be recorded")
            empty = np.zeros(0)
            return cls(path=str(path), event_id=str(ev["attrs"].get("event_id", "")), wavelength_nm=empty,
                       bin_width_nm=empty, per_frame=np.zeros((0, 0)), per_frame_err=np.zeros((0, 0)),
                       per_frame_mask=np.zeros((0, 0), bool), time_s=empty, frame_weight=empty, fwhm_nm=empty,
                       flux=empty, flux_err=empty, lines={}, composition=comp, speed_km_s=None,
                       speed_err_km_s=None, notes=("no /spectrum in the file",),
                       software_version=str(ev["attrs"].get("software_version", "")))
        d = spec["datasets"]
        need = ("wavelength_nm", "bin_width_nm", "per_frame", "per_frame_err", "per_frame_mask")
        missing = [k for k in need if k not in d]
        if missing:
            raise InputError(path, f"/spectrum lacks {', '.join(missing)}")
        wl = np.asarray(d["wavelength_nm"], float)
        bw = np.asarray(d["bin_width_nm"], float)
        pf = np.asarray(d["per_frame"], float)
        pfe = np.asarray(d["per_frame_err"], float)
        pfm = np.asarray(d["per_frame_mask"], bool)
        if pf.ndim != 2 or pf.shape[1] != wl.size or pfe.shape != pf.shape or pfm.shape != pf.shape \
                or bw.shape != wl.shape:
            raise InputError(path, f"/spectrum shapes disagree: per_frame {pf.shape}, wavelength {wl.shape}")
        if wl.size < 2 or not (np.all(np.isfinite(wl)) and np.all(np.diff(wl) > 0)):
            raise InputError(path, "/spectrum/wavelength_nm is not finite and increasing")
        n = pf.shape[0]
        time_s = np.asarray(d.get("time_s", np.arange(n, dtype=float)), float)
        if time_s.shape != (n,):
            time_s = np.arange(n, dtype=float)
        notes: list[str] = []
        plasma = ev["groups"].get("plasma", {"datasets": {}, "attrs": {}})
        fwhm = np.asarray(plasma["datasets"].get("instrument_fwhm_nm", []), float)
        if fwhm.shape != wl.shape or not np.all(np.isfinite(fwhm) & (fwhm > 0)):
            fwhm = _fwhm_from_geometry(ev, wl)
            if fwhm is None:
                raise InputError(path, "no instrument width: /plasma/instrument_fwhm_nm is missing and "
                                       "/calibration with /track cannot give it")
            notes.append("instrument width from the stored calibration and track (no /plasma width)")
        if "frame_weight" in d and np.shape(d["frame_weight"]) == (n,):
            weight = np.asarray(d["frame_weight"], float)
        else:
            track = ev["groups"].get("track", {"datasets": {}})["datasets"]
            status = track.get("status")
            lit = (np.asarray([s != "absent" for s in status]) if status is not None and len(status) == n
                   else None)
            weight = estimate_frame_weight(pf, pfm, lit=lit)
        speed = comp.get("speed_km_s")
        speed = float(speed) if speed is not None and np.isfinite(float(speed)) else None
        lines = lines_columns(ev) or {}
        rw = np.asarray(plasma["datasets"].get("response_wavelength_nm", []), float)
        rv = np.asarray(plasma["datasets"].get("response", []), float)
        response_nm = (rw, rv) if rw.ndim == 1 and rw.size >= 2 and rv.shape == rw.shape else None
        box = np.asarray(plasma["datasets"].get("instrument_box_nm", []), float)
        box = box if box.shape == wl.shape and np.all(np.isfinite(box) & (box >= 0)) else None
        return cls(path=str(path), event_id=str(ev["attrs"].get("event_id", "")), wavelength_nm=wl,
                   bin_width_nm=bw, per_frame=pf, per_frame_err=pfe, per_frame_mask=pfm, time_s=time_s,
                   frame_weight=weight, fwhm_nm=fwhm, box_nm=box,
                   flux=np.asarray(d.get("flux", np.full(wl.size, np.nan)), float),
                   flux_err=np.asarray(d.get("flux_err", np.full(wl.size, np.nan)), float),
                   lines={k: np.asarray(v) for k, v in lines.items()}, composition=comp, speed_km_s=speed,
                   speed_err_km_s=speed_err_km_s if speed is not None else None, notes=tuple(notes),
                   software_version=str(ev["attrs"].get("software_version", "")), response_nm=response_nm,
                   shape_rel_err=(np.asarray(d["per_frame_shape_rel_err"], float)
                                  if np.shape(d.get("per_frame_shape_rel_err", ())) == pf.shape
                                  else np.zeros((0, 0))),
                   correlation=_per_bin_columns(d.get("flux_correlation"), wl.size),
                   common_share=_per_bin_columns(d.get("flux_common_share"), wl.size))


def _per_bin_columns(value: Any, n_wl: int) -> np.ndarray:
    """A stored (n_wl, k) table of per-bin columns, or an empty one where absent or misshapen."""
    a = np.asarray(value if value is not None else np.zeros((0, 0)), float)
    return a if a.ndim == 2 and a.shape[0] == n_wl and np.all(np.isfinite(a)) else np.zeros((0, 0))


def estimate_frame_weight(per_frame: np.ndarray, mask: np.ndarray, *, lit: np.ndarray | None = None,
                          n_iter: int = 30) -> np.ndarray:
    """Relative frame brightness from a rank-1 model ``flux[k, j] ~ w_k s_j`` of the unmasked samples.

    Only needed where some frames are masked in a bin (the whole-flight sum divides by the
    share of the light its unmasked frames carry, as :meth:`FrameSpectra.whole_flight`
    does). A frame with no unmasked sample is 0 unless ``lit`` says it carried light
    (then NaN: its share is unknown, and the bins it lost are masked in the sum).

    Notes
    -----
    Alternating least squares, started from each frame's sum over the bins that every
    frame with data records; the stored extraction uses the same model with the
    zeroth-order light curve as a start (the weights are only defined up to a scale,
    which cancels in the share).
    """
    f = np.where(mask | ~np.isfinite(per_frame), 0.0, per_frame)
    good = ~mask & np.isfinite(per_frame)
    has = good.any(axis=1)
    common = good[has].all(axis=0) if has.any() else np.zeros(f.shape[1], bool)
    w = np.clip(f[:, common].sum(axis=1) if common.any() else f.sum(axis=1), 0.0, None)
    for _ in range(n_iter):
        den = (good * w[:, None] ** 2).sum(axis=0)
        s = np.where(den > 0, (f * w[:, None]).sum(axis=0) / np.where(den > 0, den, 1.0), 0.0)
        den_w = (good * s[None, :] ** 2).sum(axis=1)
        w = np.where(den_w > 0, (f * s[None, :]).sum(axis=1) / np.where(den_w > 0, den_w, 1.0), 0.0)
        w = np.clip(w, 0.0, None)
    if lit is not None:
        w = np.where(~has & lit, np.nan, w)
    return w


def _fwhm_from_geometry(ev: Mapping[str, Any], wl: np.ndarray) -> np.ndarray | None:
    """Instrument FWHM from ``/calibration`` and ``/track`` (the pipeline's recipe, simplified:
    every finite track point, not the luminous ones only; each line image's own streak)."""
    from ..extract import SHEAR_PSF_SIGMA_PX
    from ..lines import instrument_fwhm_nm, line_streak_px
    from ..optics import SpectralGeometry

    cal, track = ev["groups"].get("calibration"), ev["groups"].get("track")
    if cal is None or track is None:
        return None
    a, t = cal["attrs"], track["datasets"]
    try:
        geo = SpectralGeometry.from_values(a)
        x, y, ts = (np.asarray(t[k], float) for k in ("x", "y", "time_s"))
    except (KeyError, ValueError, TypeError):
        return None
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() < 2:
        return None
    x0, y0 = float(np.median(x[ok])), float(np.median(y[ok]))
    vx, vy = np.gradient(x[ok], ts[ok]), np.gradient(y[ok], ts[ok])
    dx, dy = geo.direction(x0, y0, 550.0, 1)
    exposure = float(track["attrs"].get("exposure_s", np.nan))
    streak = float(np.nanmedian(np.abs(vx * dx + vy * dy))) * exposure if np.isfinite(exposure) else 0.0
    streak = streak if np.isfinite(streak) else 0.0
    sigma = float(track["attrs"].get("psf_sigma_px", np.nan))
    sigma = sigma if np.isfinite(sigma) and sigma > 0 else 1.3
    line = line_streak_px(geo, x0, y0, vx, vy, exposure, wl, order=1, psf_sigma_px=sigma,
                          shear_sigma_px=SHEAR_PSF_SIGMA_PX)
    streak = np.where(np.isfinite(line), line, streak)  # the zeroth order's where an image leaves the field
    try:
        fwhm = instrument_fwhm_nm(geo, x0, y0, wl, psf_fwhm_px=2.3548 * sigma,
                                  streak_px=streak)
    except ValueError:
        return None
    return fwhm if np.all(np.isfinite(fwhm) & (fwhm > 0)) else None


# --------------------------------------------------------------------------- the steps


def kept_frames(view: EventView, corrections: Corrections) -> np.ndarray:
    """Boolean mask of the frames the reviewer keeps.

    Raises
    ------
    InputError
        A frame number outside the event, or nothing left.
    """
    n = view.n_frames
    if n == 0:
        raise InputError(view.path, "no per-frame spectra in the file: nothing to re-derive "
                                    "(a verdict alone can still be recorded)")
    first = 0 if corrections.first_frame is None else corrections.first_frame
    last = n - 1 if corrections.last_frame is None else corrections.last_frame
    for k in (first, last, *corrections.dropped_frames):
        if not 0 <= k < n:
            raise InputError(view.path, f"frame {k} is outside the event (frames 0-{n - 1})")
    keep = np.zeros(n, bool)
    keep[first:last + 1] = True
    keep[list(corrections.dropped_frames)] = False
    if not (keep[:, None] & ~view.per_frame_mask).any():
        raise InputError(view.path, f"no frame with spectrum data left among frames {first}-{last} "
                                    "after the dropped ones")
    return keep


def combine_frames(view: EventView, keep: np.ndarray) -> Spectrum:
    """Whole-flight spectrum of the kept frames (:meth:`FrameSpectra.whole_flight` on the subset).

    Where none of the kept frames is masked this is exactly the sum of their per-frame
    spectra; elsewhere the sum is divided by the share of the kept frames' light that the
    unmasked ones carry.

    The file keeps the whole flight's error structure but not each frame's: the bins'
    correlation (pixels shared by neighbouring bins, and the background level's noise shared
    by frames) and the errors common to far bins (twinkling star light), and errors summed
    over frames beyond their quadrature sum. The kept frames' spectrum takes the whole
    flight's correlation and common shares, and each bin's variance is raised from the kept
    frames' quadrature sum by the whole flight's ratio of its stored variance to that sum.
    With every frame kept this is the stored error structure exactly. With frames dropped it is
    an approximation: it overstates the errors that frames share (fewer frames share them), and
    the bins' correlation is the whole flight's mix of the frames' (each frame's is set by its
    band's pixels, much alike along a flight).
    """
    def plain(index: np.ndarray) -> Spectrum:
        rel = (view.shape_rel_err[index] if view.shape_rel_err.shape == view.per_frame.shape
               else np.zeros((0, 0)))
        return FrameSpectra(view.wavelength_nm, view.bin_width_nm, view.per_frame[index],
                            view.per_frame_err[index] ** 2, view.per_frame_mask[index], view.time_s[index], (),
                            frame_weight=view.frame_weight[index], shape_rel_err=rel).whole_flight()

    kept = plain(keep)
    everything = plain(np.ones(view.n_frames, bool))
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.asarray(view.flux_err, float) ** 2 / everything.flux_err**2
    ratio = np.where(np.isfinite(ratio) & (ratio > 1.0), ratio, 1.0) if ratio.shape == kept.flux_err.shape else 1.0
    return Spectrum(kept.wavelength_nm, kept.bin_width_nm, kept.flux, kept.flux_err * np.sqrt(ratio), kept.mask,
                    view.correlation, view.common_share)


def corrected_wavelength(wavelength_nm: np.ndarray, shift_nm: float, stretch: float) -> np.ndarray:
    """``old + shift + (stretch - 1) (old - PIVOT_NM)``."""
    wl = np.asarray(wavelength_nm, float)
    return wl + shift_nm + (stretch - 1.0) * (wl - PIVOT_NM)


def regrid(spectrum: Spectrum, *, shift_nm: float, stretch: float) -> Spectrum:
    """The same spectrum on a corrected wavelength scale.

    Bin widths scale by ``stretch`` and the flux density by ``1 / stretch``, so that each
    bin's energy (density x width), and with it every line's intensity, is unchanged.
    """
    if not (math.isfinite(shift_nm) and math.isfinite(stretch) and stretch > 0):
        raise ValueError(f"wavelength correction must be finite with stretch > 0 "
                         f"(shift {shift_nm}, stretch {stretch})")
    return Spectrum(corrected_wavelength(spectrum.wavelength_nm, shift_nm, stretch),
                    np.asarray(spectrum.bin_width_nm, float) * stretch,
                    np.asarray(spectrum.flux, float) / stretch, np.asarray(spectrum.flux_err, float) / stretch,
                    np.asarray(spectrum.mask, bool).copy(), spectrum.correlation, spectrum.common_share)


@dataclass(frozen=True)
class PinnedPeak:
    pin: Pin
    peak_nm: float      # the significant peak found near pin.seen_nm (stored scale)


def solve_pins(spectrum: Spectrum, pins: Sequence[Pin], *, fwhm_nm: np.ndarray, path: str = "",
               search_fwhm: float = 1.5, min_search_nm: float = 1.0,
               min_snr: float = 3.0) -> tuple[float, float, list[PinnedPeak]]:
    """Shift and stretch that put each pinned peak on its line.

    The position a reviewer reads off a plot is only approximate: each pin is moved to the
    nearest significant peak (:func:`meteorspec.lines.find_peaks`) within
    ``max(search_fwhm x FWHM, min_search_nm)``. One pin gives a shift; two or more a
    least-squares shift and stretch about :data:`PIVOT_NM`.

    Raises
    ------
    InputError
        No peak near a pin, or pins that cannot define a stretch (all at one wavelength).
    """
    from ..lines import find_peaks

    peaks = find_peaks(spectrum, fwhm_nm=fwhm_nm, min_snr=min_snr)
    wl = np.asarray(spectrum.wavelength_nm, float)
    found: list[PinnedPeak] = []
    for pin in pins:
        window = max(search_fwhm * float(np.interp(pin.seen_nm, wl, fwhm_nm)), min_search_nm)
        near = np.flatnonzero(np.abs(peaks.position_nm - pin.seen_nm) <= window)
        if near.size == 0:
            raise InputError(path, f"pin {pin.seen_nm:g} nm: no significant peak (S/N >= {min_snr:g}) within "
                                   f"{window:.2f} nm of it")
        k = near[np.argmin(np.abs(peaks.position_nm[near] - pin.seen_nm))]
        found.append(PinnedPeak(pin, float(peaks.position_nm[k])))
    if len(found) == 1:
        return found[0].pin.target_nm - found[0].peak_nm, 1.0, found
    x = np.array([p.peak_nm - PIVOT_NM for p in found])
    y = np.array([p.pin.target_nm - p.peak_nm for p in found])
    if np.ptp(x) < 1.0:
        raise InputError(path, "pins lie within 1 nm of each other: they cannot set a stretch "
                               "(give one pin, or pins far apart)")
    # target = peak + shift + (stretch - 1) (peak - pivot): linear in (shift, stretch - 1)
    design = np.column_stack([np.ones_like(x), x])
    (shift, slope), *_ = np.linalg.lstsq(design, y, rcond=None)
    return float(shift), float(1.0 + slope), found


# --------------------------------------------------------------------------- the result


@dataclass(eq=False)
class Rework:
    """The event re-derived with a reviewer's corrections."""

    corrections: Corrections
    frames_kept: np.ndarray                 # frame indices used
    shift_nm: float
    stretch: float
    pinned: list[PinnedPeak]
    spectrum: Spectrum                      # whole flight of the kept frames, corrected scale
    fwhm_nm: np.ndarray
    fit: Any                                # PlasmaFit (falsy with a reason on failure)
    lines: Any                              # LineTable
    composition: Any | None                 # Composition, None when the fit failed
    notes: list[str] = field(default_factory=list)

    def summary(self) -> dict[str, Any]:
        """Composition, class and fit values as plain attributes (for the log and the printout)."""
        out: dict[str, Any] = {"fit_success": bool(self.fit), "fit_reason": str(getattr(self.fit, "reason", "")),
                               "n_lines": len(self.lines), "n_frames_used": int(self.frames_kept.size),
                               "shift_nm": self.shift_nm, "stretch": self.stretch}
        if self.fit:
            out["temperature_k"] = float(self.fit.temperature_k)
            out["chi2_reduced"] = float(self.fit.chi2_reduced)
        c = self.composition
        if c is not None:
            out.update(na=c.na, mg=c.mg, fe=c.fe, na_err=c.na_err, mg_err=c.mg_err, fe_err=c.fe_err,
                       **{"class": c.class_name}, class_confidence=c.class_confidence, class_reason=c.class_reason)
        else:
            out.update(**{"class": "unclassified"}, class_reason="plasma fit failed: " + out["fit_reason"])
        return out


def rederive(view: EventView, corrections: Corrections, *, line_list: LineList | None = None,
             plasma_options: Mapping[str, Any] | None = None) -> Rework:
    """Frames, wavelength scale, lines, plasma fit, composition and class after the corrections.

    Parameters
    ----------
    view : EventView
    corrections : Corrections
    line_list : LineList, optional
        Default: the project line list (the one the automatic run used).
    plasma_options : mapping, optional
        Extra keyword options of :func:`meteorspec.plasma.fit_plasma` (tests use them to
        make the fit cheaper).

    Raises
    ------
    InputError
        Frames outside the event, no peak near a pin, nothing left to fit.
    """
    from ..classify import classify
    from ..lines import identify_lines
    from ..plasma import fit_plasma

    line_list = load_line_list() if line_list is None else line_list
    keep = kept_frames(view, corrections)
    whole = combine_frames(view, keep)
    notes = list(view.notes)
    if corrections.pins and (corrections.shift_nm != 0.0 or corrections.stretch != 1.0):
        raise InputError(view.path, "give either pinned lines or a shift/stretch, not both")
    pinned: list[PinnedPeak] = []
    if corrections.pins:
        shift, stretch, pinned = solve_pins(whole, corrections.pins, fwhm_nm=view.fwhm_nm, path=view.path)
    else:
        shift, stretch = corrections.shift_nm, corrections.stretch
    if not (math.isfinite(shift) and math.isfinite(stretch) and 0.8 < stretch < 1.25):
        raise InputError(view.path, f"wavelength correction out of reach: shift {shift:g} nm, stretch {stretch:g} "
                                    "(a grating's scale is not off by 20 %)")
    spectrum = regrid(whole, shift_nm=shift, stretch=stretch)
    fwhm = np.asarray(view.fwhm_nm, float) * stretch
    box = None if view.box_nm is None else np.asarray(view.box_nm, float) * stretch
    if corrections.ignored_nm:
        mask = np.asarray(spectrum.mask, bool).copy()
        for lo, hi in corrections.ignored_nm:
            mask |= (spectrum.wavelength_nm >= lo) & (spectrum.wavelength_nm <= hi)
        spectrum = Spectrum(spectrum.wavelength_nm, spectrum.bin_width_nm, spectrum.flux, spectrum.flux_err,
                            mask, spectrum.correlation, spectrum.common_share)
    if corrections.rejected:
        drop = np.zeros(len(line_list), bool)
        drop[[r.index for r in corrections.rejected]] = True
        groups = sorted({str(line_list.group[r.index]) for r in corrections.rejected if line_list.group[r.index]})
        if groups:
            notes.append(f"rejected lines belong to the {', '.join(groups)} group(s): that group's intensity "
                         "now sums its remaining lines only")
        line_list = line_list.select(~drop)
    options = {"response_nm": view.response_nm, "box_nm": box} | dict(plasma_options or {})
    fit = fit_plasma(spectrum, fwhm_nm=fwhm, line_list=line_list, speed_km_s=view.speed_km_s, **options)
    table = identify_lines(spectrum, fwhm_nm=fwhm, line_list=line_list, plasma_fit=fit if fit else None)
    composition = None
    if fit:
        for group, share in sorted(fit.group_coverage.items()):
            if share < 0.5:  # the pipeline's threshold for group_poorly_covered
                notes.append(f"the {group} group rests mostly on the model of other lines (coverage {share:.2f}): "
                             "its lines are masked (saturated?) in the frames used; try only the unsaturated frames")
        composition = classify(fit.group_intensity, fit.group_covariance, speed_km_s=view.speed_km_s,
                               speed_err_km_s=view.speed_err_km_s, seed=0)
    return Rework(corrections=corrections, frames_kept=np.flatnonzero(keep), shift_nm=float(shift),
                  stretch=float(stretch), pinned=pinned, spectrum=spectrum, fwhm_nm=fwhm, fit=fit, lines=table,
                  composition=composition, notes=notes)
