"""Looking at an event under review: figures, the review log as text, and the review window.

matplotlib is imported inside the functions that draw (pyplot only in :func:`run_desk`,
which needs a display). The window, :class:`ReviewDesk`, works on any Figure: its key and
mouse handlers are plain methods, so tests drive it under the Agg backend by sending
synthetic events to the canvas.

Window keys (also shown by ``h``)
---------------------------------
click on the frame panel      drop / restore that frame
click on the spectrum         put the cursor on a peak (the seen wavelength)
up / down                     step through the lines near the cursor (strongest first)
p                             pin: the peak at the cursor is the chosen line
x                             reject the chosen line for this event
left / right                  shift the wavelength scale by -/+0.1 nm (shift+arrow: 1 nm)
u                             undo the last correction
r                             re-derive (lines, plasma fit, composition, class)
a / j / l                     verdict accepted / rejected / another-look (then close)
q                             close without a decision
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from .rework import PIVOT_NM, Corrections, EventView, LineRef, Pin, Rework, corrected_wavelength, rederive

__all__ = ["ReviewDesk", "DeskChoice", "history_text", "write_figures", "run_desk", "candidate_lines"]

KEYS_HELP = __doc__.split("Window keys (also shown by ``h``)\n---------------------------------\n")[1]
_VERDICT_KEYS = {"a": "accepted", "j": "rejected", "l": "another-look"}
_CANDIDATE_WINDOW_NM = 6.0   # how far from the cursor lines are offered (a few instrument FWHM)
_CANDIDATE_T_K = 4500.0      # main-component temperature typical of meteors (common practice)


def history_text(path: str | Path) -> str:
    """The event's review log, oldest first, one block per entry."""
    from ..store import read_reviews

    entries = read_reviews(path)
    if not entries:
        return f"review log of {path}: empty"
    out = [f"review log of {path}: {len(entries)} entr{'y' if len(entries) == 1 else 'ies'}"]
    for e in entries:
        a = e["attrs"]
        res = e["groups"].get("result", {"attrs": {}})["attrs"]
        out.append(f"  {e['name']}  {a.get('time_utc', '?')}  {a.get('verdict', '?'):<12} by {a.get('reviewer', '?')}"
                   f"  class {res.get('class', '?')} (automatic {a.get('automatic_class', '?')})")
        corr = [c for c in a.get("corrections", []) if c and c != "none"]
        if corr:
            out.append("        corrections: " + "; ".join(corr))
        if a.get("note"):
            out.append(f"        note: {a['note']}")
    return "\n".join(out)


# --------------------------------------------------------------------------- figures


def plot_review_spectrum(view: EventView, rework: Rework | None, *, ax=None):
    """The reviewed whole-flight spectrum with its lines, over the automatic one (dashed)."""
    from ..report.figures import plot_spectrum

    if rework is None:
        fig = plot_spectrum(view.wavelength_nm, view.flux, view.flux_err, lines=view.lines if view.lines else None,
                            ax=ax)
        (ax if ax is not None else fig.axes[0]).set_title("automatic result (no corrections)", fontsize=9)
        return fig
    s = rework.spectrum
    lines = {"species": rework.lines.species, "measured_nm": rework.lines.measured_nm,
             "intensity": rework.lines.intensity}
    fig = plot_spectrum(s.wavelength_nm, s.flux, s.flux_err, lines=lines, ax=ax)
    axis = ax if ax is not None else fig.axes[0]
    axis.plot(view.wavelength_nm, view.flux, "--", color="#0072B2", lw=0.8, label="automatic (stored scale)")
    for p in rework.pinned:
        axis.axvline(p.pin.target_nm, color="#CC79A7", lw=0.8, ls=":")
    axis.legend(loc="upper left", fontsize=8, frameon=False)
    axis.set_title(f"reviewed: shift {rework.shift_nm:+.2f} nm, stretch {rework.stretch:.4f}; "
                   f"{rework.frames_kept.size} of {view.n_frames} frames", fontsize=9)
    return fig


def plot_frame_choice(view: EventView, keep: np.ndarray, *, ax=None):
    """Per-frame spectra by frame number (square-root scale), the frames left out hatched."""
    from matplotlib.colors import PowerNorm

    from ..report.figures import _axes

    fig, axis = _axes(ax, figsize=(9.0, 4.0))
    data = np.clip(np.where(view.per_frame_mask, np.nan, view.per_frame), 0, None)
    finite = data[np.isfinite(data)]
    vmax = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
    wl = view.wavelength_nm
    dw = float(np.median(np.diff(wl)))
    axis.imshow(data, aspect="auto", origin="upper", cmap="magma", interpolation="nearest",
                norm=PowerNorm(gamma=0.5, vmin=0.0, vmax=vmax),
                extent=(wl[0] - dw / 2, wl[-1] + dw / 2, view.n_frames - 0.5, -0.5))
    for k in np.flatnonzero(~keep):
        axis.axhspan(k - 0.5, k + 0.5, facecolor="#56B4E9", alpha=0.35, edgecolor="#56B4E9", hatch="////")
    axis.set_xlabel("wavelength (nm, air, stored scale)")
    axis.set_ylabel("frame")
    axis.set_title(f"frames used: {int(keep.sum())} of {view.n_frames} (hatched: left out; "
                   "masked samples blank)", fontsize=9)
    return fig


def write_figures(view: EventView, rework: Rework | None, out_dir: str | Path) -> list[Path]:
    """Spectrum (reviewed over automatic), frame choice, light curves and composition as PNG files."""
    from ..report.figures import plot_composition, plot_light_curves, window_light_curves

    if view.n_frames == 0:
        raise InputError(view.path, "no per-frame spectra in the file: no figures to draw")
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(out, f"cannot create the figure folder ({exc.strerror or exc})") from None
    keep = np.zeros(view.n_frames, bool)
    keep[rework.frames_kept if rework is not None else slice(None)] = True
    stem = view.event_id or Path(view.path).stem
    figures = {
        "review_spectrum": plot_review_spectrum(view, rework),
        "review_frames": plot_frame_choice(view, keep),
        "review_lightcurves": plot_light_curves(view.time_s, window_light_curves(
            np.where(keep[:, None], view.per_frame, np.nan), view.wavelength_nm)),
    }
    comp = rework.summary() if rework is not None and rework.composition is not None else view.composition
    if comp:
        figures["review_composition"] = plot_composition(comp)
    paths = []
    for kind, fig in figures.items():
        path = out / f"{stem}_{kind}.png"
        fig.savefig(path, dpi=96)
        paths.append(path)
    return paths


# --------------------------------------------------------------------------- the window


def candidate_lines(wavelength_nm: float, *, line_list=None, window_nm: float = _CANDIDATE_WINDOW_NM,
                    max_lines: int = 8) -> list[LineRef]:
    """Lines a peak at ``wavelength_nm`` may be, strongest first.

    Strength is the LTE emission of the line at a meteor's typical 4500 K, ``g A exp(-E/kT) / lambda``
    per atom of its species (Boltzmann; common practice), times the CI-chondrite abundance
    of the element; good enough to order the offers, not to identify.
    """
    from .. import lines as lines_stage
    from ..atomic import load_line_list

    log_eps = getattr(lines_stage, "_LOG_EPS", {})  # the abundances the lines stage assumes

    lines = load_line_list() if line_list is None else line_list
    near = np.flatnonzero((np.abs(lines.wavelength_nm - wavelength_nm) <= window_nm) & (lines.ion <= 2)
                          & (lines.transition_type == "E1"))
    if near.size == 0:
        return []
    k_ev = 8.617333262e-5  # Boltzmann constant, eV/K (CODATA 2018)
    strength = (lines.g_upper[near] * lines.a_ki_s[near] * np.exp(-lines.e_upper_ev[near] / (k_ev * _CANDIDATE_T_K))
                / lines.wavelength_nm[near]
                * np.array([10.0 ** log_eps.get(str(e), 6.0) for e in lines.element[near]])
                * np.where(lines.ion[near] == 1, 1.0, 0.1))  # ions: ~10 % of neutrals at 4500 K (rough)
    order = near[np.argsort(-strength)][:max_lines]
    return [LineRef(text=f"{lines.species[k]} {lines.wavelength_nm[k]:.3f}", species=str(lines.species[k]),
                    lab_nm=float(lines.wavelength_nm[k]), index=int(k)) for k in order]


@dataclass(frozen=True)
class DeskChoice:
    """What the reviewer left the window with."""

    corrections: Corrections
    verdict: str | None


class ReviewDesk:
    """The interactive review window on a matplotlib Figure (see the module notes for the keys).

    Parameters
    ----------
    view : EventView
    corrections : Corrections
        Starting point (e.g. from command-line options).
    fig : Figure, optional
        Drawn on (default: a new :class:`matplotlib.figure.Figure`).
    rederive_fn : callable, optional
        ``(view, corrections) -> Rework``; default :func:`meteorspec.review.rework.rederive`.
    """

    def __init__(self, view: EventView, corrections: Corrections | None = None, *, fig=None,
                 rederive_fn: Callable[[EventView, Corrections], Rework] | None = None):
        from matplotlib.figure import Figure

        self.view = view
        self.corrections = Corrections() if corrections is None else corrections
        self.history: list[Corrections] = []
        self.rederive_fn = rederive if rederive_fn is None else rederive_fn
        self.rework: Rework | None = None
        self.cursor_seen_nm: float | None = None
        self.candidates: list[LineRef] = []
        self.candidate_index = 0
        self.verdict: str | None = None
        self.closed = False
        self.message = "h: keys"
        self.fig = Figure(figsize=(11, 7.5), layout="constrained") if fig is None else fig
        self.ax_frames, self.ax_spec = self.fig.subplots(2, 1, height_ratios=[1, 1.3])
        self._cids = [self.fig.canvas.mpl_connect("key_press_event", self.on_key),
                      self.fig.canvas.mpl_connect("button_press_event", self.on_click)]
        self.draw()

    # ---------------------------------------------------------------- state

    @property
    def keep(self) -> np.ndarray:
        c = self.corrections
        keep = np.zeros(self.view.n_frames, bool)
        first = 0 if c.first_frame is None else c.first_frame
        last = self.view.n_frames - 1 if c.last_frame is None else c.last_frame
        keep[first:last + 1] = True
        keep[list(c.dropped_frames)] = False
        return keep

    def choice(self) -> DeskChoice | None:
        """The corrections and verdict, or None when closed without a decision."""
        return None if self.verdict is None else DeskChoice(self.corrections, self.verdict)

    def _change(self, **changes: Any) -> None:
        self.history.append(self.corrections)
        self.corrections = replace(self.corrections, **changes)
        self.rework = None  # stale until re-derived

    def _scale(self) -> tuple[float, float]:
        if self.rework is not None:
            return self.rework.shift_nm, self.rework.stretch
        return self.corrections.shift_nm, self.corrections.stretch

    def _to_stored(self, shown_nm: float) -> float:
        shift, stretch = self._scale()
        return (shown_nm - shift + (stretch - 1.0) * PIVOT_NM) / stretch

    # ---------------------------------------------------------------- handlers

    def on_click(self, event) -> None:
        if event.inaxes is self.ax_frames and event.ydata is not None:
            k = int(round(event.ydata))
            if 0 <= k < self.view.n_frames:
                dropped = set(self.corrections.dropped_frames) ^ {k}
                self._change(dropped_frames=tuple(sorted(dropped)))
                self.message = f"frame {k} {'left out' if k in dropped else 'used again'}"
        elif event.inaxes is self.ax_spec and event.xdata is not None:
            self.cursor_seen_nm = self._to_stored(float(event.xdata))
            self.candidates = candidate_lines(float(event.xdata))
            self.candidate_index = 0
            self.message = (f"cursor at {event.xdata:.2f} nm: " + self._candidate_text()) if self.candidates \
                else f"cursor at {event.xdata:.2f} nm: no line list entry within {_CANDIDATE_WINDOW_NM:g} nm"
        self.draw()

    def _candidate_text(self) -> str:
        ref = self.candidates[self.candidate_index]
        return (f"{ref.species} {ref.lab_nm:.3f} ({self.candidate_index + 1}/{len(self.candidates)}; "
                "up/down, p pin, x reject)")

    def on_key(self, event) -> None:
        key = event.key or ""
        c = self.corrections
        if key in ("left", "right", "shift+left", "shift+right"):
            step = (1.0 if key.startswith("shift") else 0.1) * (1 if key.endswith("right") else -1)
            base, stretch = self._scale()
            self._change(shift_nm=round(base + step, 6), stretch=stretch, pins=())
            self.message = f"shift {self.corrections.shift_nm:+.2f} nm"
        elif key in ("up", "down") and self.candidates:
            self.candidate_index = (self.candidate_index + (1 if key == "down" else -1)) % len(self.candidates)
            self.message = self._candidate_text()
        elif key == "p" and self.candidates and self.cursor_seen_nm is not None:
            ref = self.candidates[self.candidate_index]
            pin = Pin(seen_nm=round(self.cursor_seen_nm, 3), target_nm=ref.lab_nm,
                      label=f"{ref.species} {ref.lab_nm:.3f}")
            self._change(pins=c.pins + (pin,), shift_nm=0.0, stretch=1.0)
            self.message = f"pinned: peak at {pin.seen_nm:.2f} nm is {pin.label} (r to re-derive)"
        elif key == "x" and self.candidates:
            ref = self.candidates[self.candidate_index]
            if all(r.index != ref.index for r in c.rejected):
                self._change(rejected=c.rejected + (ref,))
            self.message = f"rejected {ref.species} {ref.lab_nm:.3f} (r to re-derive)"
        elif key == "u" and self.history:
            self.corrections = self.history.pop()
            self.rework = None
            self.message = "undone"
        elif key == "r":
            try:
                self.rework = self.rederive_fn(self.view, self.corrections)
                s = self.rework.summary()
                self.message = f"re-derived: class {s.get('class')}"
            except InputError as exc:
                self.message = f"cannot re-derive: {exc.problem}"
        elif key in _VERDICT_KEYS:
            self.verdict = _VERDICT_KEYS[key]
            self.message = f"verdict: {self.verdict}"
            self._close()
            return
        elif key == "q":
            self.verdict = None
            self._close()
            return
        elif key == "h":
            self.message = KEYS_HELP
        self.draw()

    def _close(self) -> None:
        self.closed = True
        for cid in self._cids:
            self.fig.canvas.mpl_disconnect(cid)
        manager = getattr(self.fig.canvas, "manager", None)
        if manager is not None:
            try:
                import matplotlib.pyplot as plt
                plt.close(self.fig)
            except Exception:  # noqa: BLE001 - closing a window that is already gone
                pass

    # ---------------------------------------------------------------- drawing

    def draw(self) -> None:
        from ..report.figures import GROUP_COLOURS

        view = self.view
        for ax in (self.ax_frames, self.ax_spec):
            ax.clear()
        plot_frame_choice(view, self.keep, ax=self.ax_frames)
        shift, stretch = self._scale()
        if self.rework is not None:
            plot_review_spectrum(view, self.rework, ax=self.ax_spec)
        else:
            from .rework import combine_frames, kept_frames, regrid

            try:
                whole = regrid(combine_frames(view, kept_frames(view, self.corrections)),
                               shift_nm=shift, stretch=stretch)
                self.ax_spec.plot(whole.wavelength_nm, whole.flux, color="#222222", lw=0.9,
                                  label="frames used (not re-derived yet: r)")
            except (InputError, ValueError) as exc:
                self.ax_spec.text(0.5, 0.5, str(exc), transform=self.ax_spec.transAxes, ha="center")
            shown = corrected_wavelength(view.wavelength_nm, shift, stretch)
            self.ax_spec.plot(shown, view.flux, "--", color="#0072B2", lw=0.7, label="automatic")
            self.ax_spec.set_xlabel("wavelength (nm, air)")
            self.ax_spec.legend(loc="upper left", fontsize=8, frameon=False)
        for ref in self.corrections.rejected:
            self.ax_spec.axvline(ref.lab_nm, color=GROUP_COLOURS["fe"], ls=":", lw=1)
        if self.cursor_seen_nm is not None:
            self.ax_spec.axvline(float(corrected_wavelength(self.cursor_seen_nm, shift, stretch)), color="#CC79A7",
                                 lw=1)
        lines = self.corrections.describe()
        self.fig.suptitle(f"{view.event_id}  |  " + ("; ".join(lines) if lines else "no corrections")
                          + f"\n{self.message}", fontsize=8 if "\n" in self.message else 9, ha="left", x=0.01)
        self.fig.canvas.draw_idle()


def has_display() -> bool:
    """Whether matplotlib can open a window here (an interactive backend)."""
    import matplotlib

    backend = matplotlib.get_backend().lower()
    return not (backend in ("agg", "pdf", "ps", "svg", "cairo", "template") or "inline" in backend)


def run_desk(view: EventView, corrections: Corrections) -> DeskChoice | None:
    """Open the review window and wait until it is closed.

    Raises
    ------
    InputError
        When there is no display (use ``--figures DIR`` and the command-line options).
    """
    import matplotlib.pyplot as plt

    if view.n_frames == 0:
        raise InputError(view.path, "no per-frame spectra in the file: nothing to show in the review window")
    if not has_display():
        raise InputError(view.path, "no display for the review window (matplotlib backend "
                                    f"{plt.get_backend()!r}); use --figures DIR and the correction options")
    fig = plt.figure(figsize=(11, 7.5), layout="constrained")
    desk = ReviewDesk(view, corrections, fig=fig)
    plt.show()
    return desk.choice()
