"""Figures of the night report; each draws on ``ax`` (or a new Figure) and returns the Figure.

matplotlib is imported inside the drawing functions only, and pyplot never:
figures are plain :class:`matplotlib.figure.Figure` objects, so drawing has no
global state and works in any process (batch workers, tests, servers).

Visual language (the same on every page)
----------------------------------------
- Classes: one colour each from the Okabe-Ito colour-blind-safe set, fixed in
  :data:`CLASS_COLOURS`; ``normal`` is the neutral blue-grey.
- Line groups: Na orange, Mg green, Fe red-brown (:data:`GROUP_COLOURS`), in
  the spectrum labels, the light curves and the composition bars.
- Measured data are solid, predictions dashed, uncertainty bands translucent.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

# Okabe & Ito (2008), "Color Universal Design" palette: distinguishable with the common colour-vision deficiencies.
CLASS_COLOURS: dict[str, str] = {
    "normal": "#0072B2",
    "Na-poor": "#E69F00",
    "Na-enhanced": "#CC79A7",
    "Na-free": "#D55E00",
    "Fe-poor": "#009E73",
    "iron": "#56B4E9",
    "unclassified": "#7f7f7f",
}
GROUP_COLOURS: dict[str, str] = {"na": "#E69F00", "mg": "#009E73", "fe": "#A0522D"}

# Contract section 6: the three line groups (nm, standard air).
GROUP_WINDOWS_NM: dict[str, tuple[float, float]] = {
    "na": (588.0, 590.6),     # Na I multiplet 1, 588.995 and 589.592
    "mg": (515.7, 519.4),     # Mg I multiplet 2, 516.732-518.360
    "fe": (526.0, 546.0),     # Fe I multiplet 15, members between 526 and 546
}


def _axes(ax: Any, *, figsize: tuple[float, float]):
    from matplotlib.figure import Figure

    if ax is None:
        fig = Figure(figsize=figsize, layout="constrained")
        ax = fig.add_subplot()
    return ax.figure, ax


def ternary_xy(na: np.ndarray, mg: np.ndarray, fe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Plot coordinates of (na, mg, fe) fractions: Mg at (0, 0), Fe at (1, 0), Na at (1/2, sqrt(3)/2).

    The same orientation as :func:`meteorspec.classify.ternary_figure`. The
    fractions are normalised to sum 1 first.
    """
    na, mg, fe = (np.asarray(v, dtype=float) for v in (na, mg, fe))
    total = na + mg + fe
    na, fe = na / total, fe / total
    return fe + 0.5 * na, na * np.sqrt(3.0) / 2.0


def plot_ternary(na: Sequence[float], mg: Sequence[float], fe: Sequence[float], *, classes: Sequence[str],
                 band: Mapping[str, np.ndarray] | None = None, band_note: str = "", ax=None):
    """The night's events in the Na-Mg-Fe ternary diagram, coloured by class.

    Parameters
    ----------
    na, mg, fe : sequence of float
        Relative intensities of the three line groups (contract section 6), one per event.
    classes : sequence of str
        Class of each event (:data:`CLASS_COLOURS` names; others are grey).
    band : mapping, optional
        The speed-dependent ``normal`` region: ``speed_km_s`` (n,), and ``centre``,
        ``lower``, ``upper`` (n, 3) as (na, mg, fe): the expected position at each
        speed and the two edges of the band (see :func:`meteorspec.report.html.normal_band`).
    band_note : str
        Shown instead of the band when ``band`` is None (why it is missing).
    """
    fig, ax = _axes(ax, figsize=(6.4, 5.8))
    corners = np.array([[0.0, 0.0], [1.0, 0.0], [0.5, np.sqrt(3) / 2], [0.0, 0.0]])
    ax.plot(corners[:, 0], corners[:, 1], color="#333333", lw=1.2)
    for f in np.arange(0.2, 1.0, 0.2):  # grid lines of constant fraction, every 0.2
        for a, b in (((f, 1 - f, 0), (f, 0, 1 - f)), ((0, f, 1 - f), (1 - f, f, 0)), ((0, 1 - f, f), (1 - f, 0, f))):
            x, y = ternary_xy(*np.array([a, b]).T)
            ax.plot(x, y, color="#dddddd", lw=0.7, zorder=0)
    ax.text(-0.03, -0.04, "Mg", ha="right", va="top", fontsize=12, color=GROUP_COLOURS["mg"], weight="bold")
    ax.text(1.03, -0.04, "Fe", ha="left", va="top", fontsize=12, color=GROUP_COLOURS["fe"], weight="bold")
    ax.text(0.5, np.sqrt(3) / 2 + 0.03, "Na", ha="center", va="bottom", fontsize=12,
            color=GROUP_COLOURS["na"], weight="bold")

    if band is not None and len(band["speed_km_s"]):
        centre, lower, upper = (np.asarray(band[k], dtype=float) for k in ("centre", "lower", "upper"))
        x, y = ternary_xy(centre[:, 0], centre[:, 1], centre[:, 2])
        xl, yl = ternary_xy(lower[:, 0], lower[:, 1], lower[:, 2])
        xu, yu = ternary_xy(upper[:, 0], upper[:, 1], upper[:, 2])
        ax.fill(np.r_[xl, xu[::-1]], np.r_[yl, yu[::-1]], color=CLASS_COLOURS["normal"], alpha=0.13, lw=0,
                zorder=1, label="normal band")
        ax.plot(x, y, color=CLASS_COLOURS["normal"], ls="--", lw=1, zorder=2, label="expected normal (by speed)")
        speeds = np.asarray(band["speed_km_s"], dtype=float)
        marked: list[tuple[float, float]] = []
        for v in (12, 15, 20, 30, 40, 50, 60, 70):
            i = int(np.argmin(np.abs(speeds - v)))
            # above some speed the expected position stops moving: label only distinct places
            if abs(speeds[i] - v) < 1 and all(np.hypot(x[i] - a, y[i] - b) > 0.04 for a, b in marked):
                marked.append((x[i], y[i]))
                ax.plot(x[i], y[i], "|", color=CLASS_COLOURS["normal"], ms=6, zorder=2)
                ax.annotate(f"{v} km/s", (x[i], y[i]), xytext=(6, 4), textcoords="offset points",
                            fontsize=8, color=CLASS_COLOURS["normal"])
    elif band_note:
        ax.text(0.5, -0.12, band_note, ha="center", va="top", fontsize=8, color="#666666", wrap=True)

    na_a, mg_a, fe_a = (np.asarray(v, dtype=float) for v in (na, mg, fe))
    cls = np.asarray(list(classes), dtype=object)
    ok = np.isfinite(na_a) & np.isfinite(mg_a) & np.isfinite(fe_a)
    for name in list(CLASS_COLOURS) + sorted(set(cls[ok]) - set(CLASS_COLOURS)):
        sel = ok & (cls == name)
        if sel.any():
            x, y = ternary_xy(na_a[sel], mg_a[sel], fe_a[sel])
            ax.scatter(x, y, s=36, color=CLASS_COLOURS.get(name, "#7f7f7f"), edgecolor="white", lw=0.6,
                       zorder=3, label=f"{name} ({int(sel.sum())})")
    if not ok.any():
        ax.text(0.5, 0.3, "no event has a composition yet", ha="center", color="#666666")
    ax.set_aspect("equal")
    ax.set_xlim(-0.1, 1.1)
    ax.set_ylim(-0.2, 1.0)
    ax.axis("off")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="upper right", fontsize=8, frameon=False)
    return fig


def plot_stack(image: np.ndarray, *, track_x_px: np.ndarray | None = None, track_y_px: np.ndarray | None = None,
               spectrum_x_px: np.ndarray | None = None, spectrum_y_px: np.ndarray | None = None,
               spectrum_wavelength_nm: np.ndarray | None = None, ax=None):
    """Stacked (maximum) image with the zeroth-order track and the predicted first-order curve.

    Parameters
    ----------
    image : ndarray of shape (height, width)
        Background-removed maximum over the frames (any linear scale).
    track_x_px, track_y_px : ndarray, optional
        Zeroth-order centroids per frame (contract section 5 ``/track``).
    spectrum_x_px, spectrum_y_px, spectrum_wavelength_nm : ndarray, optional
        Predicted first-order positions for one zeroth-order position, with
        wavelength ticks labelled every 100 nm.
    """
    fig, ax = _axes(ax, figsize=(8.0, 6.2))
    img = np.asarray(image, dtype=float)
    lo, hi = np.nanpercentile(img, [1.0, 99.9]) if np.isfinite(img).any() else (0.0, 1.0)
    # square-root stretch: faint spectrum and bright head visible together
    shown = np.sqrt(np.clip((img - lo) / max(hi - lo, 1e-12), 0, 1))
    ax.imshow(shown, cmap="gray", origin="upper", interpolation="nearest",
              extent=(-0.5, img.shape[1] - 0.5, img.shape[0] - 0.5, -0.5))  # pixel centres at integers
    if track_x_px is not None and len(track_x_px):
        ax.plot(track_x_px, track_y_px, ".", color="#56B4E9", ms=3, label="zeroth order (track)")
    if spectrum_x_px is not None and np.isfinite(spectrum_x_px).any():
        ax.plot(spectrum_x_px, spectrum_y_px, "--", color="#E69F00", lw=1.2, label="predicted 1st order")
        if spectrum_wavelength_nm is not None:
            for lam in range(400, 1000, 100):
                i = int(np.argmin(np.abs(spectrum_wavelength_nm - lam)))
                if abs(spectrum_wavelength_nm[i] - lam) < 2 and np.isfinite(spectrum_x_px[i]):
                    ax.plot(spectrum_x_px[i], spectrum_y_px[i], "|", color="#E69F00", ms=8)
                    ax.annotate(f"{lam}", (spectrum_x_px[i], spectrum_y_px[i]), xytext=(0, 6),
                                textcoords="offset points", ha="center", fontsize=7, color="#E69F00")
    ax.set_xlim(-0.5, img.shape[1] - 0.5)
    ax.set_ylim(img.shape[0] - 0.5, -0.5)
    ax.set_xlabel("x (px)")
    ax.set_ylabel("y (px)")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="lower right", fontsize=8, framealpha=0.7)
    return fig


def plot_spectrum(wavelength_nm: np.ndarray, flux: np.ndarray, flux_err: np.ndarray | None = None, *,
                  lines: Mapping[str, np.ndarray] | None = None, calibrated: bool = True, max_labels: int = 14,
                  ax=None):
    """Whole-flight spectrum with its 1-sigma band and the identified lines labelled.

    ``lines`` holds the contract's ``/lines`` columns (``species``, ``measured_nm``,
    ``intensity``, ...); the ``max_labels`` strongest are labelled.
    """
    fig, ax = _axes(ax, figsize=(9.0, 4.2))
    wl = np.asarray(wavelength_nm, dtype=float)
    f = np.asarray(flux, dtype=float)
    if flux_err is not None:
        e = np.asarray(flux_err, dtype=float)
        ax.fill_between(wl, f - e, f + e, color="#999999", alpha=0.35, lw=0, label="1-sigma")
    ax.plot(wl, f, color="#222222", lw=0.9, label="spectrum")
    for key, (a, b) in GROUP_WINDOWS_NM.items():
        ax.axvspan(a, b, color=GROUP_COLOURS[key], alpha=0.12, lw=0)
    if lines is not None and len(lines.get("measured_nm", [])):
        pos = np.asarray(lines["measured_nm"], dtype=float)
        strength = np.asarray(lines.get("intensity", np.ones_like(pos)), dtype=float)
        species = [str(s) for s in lines.get("species", [""] * len(pos))]
        order = np.argsort(-np.nan_to_num(strength, nan=-np.inf))[:max_labels]
        top = np.nanmax(f) if np.isfinite(f).any() else 1.0
        min_gap = 0.012 * (np.nanmax(wl) - np.nanmin(wl))  # labels closer than this would overlap
        labelled: list[float] = []
        for i in order:
            if not np.isfinite(pos[i]):
                continue
            if any(abs(pos[i] - p) < min_gap for p in labelled):
                ax.plot([pos[i]], [top * 1.08], "|", color="#555555", ms=4)  # marked, label left to the stronger
                continue
            labelled.append(pos[i])
            colour = {"Na I": GROUP_COLOURS["na"], "Mg I": GROUP_COLOURS["mg"],
                      "Fe I": GROUP_COLOURS["fe"]}.get(species[i], "#555555")
            y = np.interp(pos[i], wl, f)
            ax.plot([pos[i], pos[i]], [y, top * 1.08], color=colour, lw=0.6)
            ax.text(pos[i], top * 1.1, f"{species[i]} {pos[i]:.1f}", rotation=90, ha="center", va="bottom",
                    fontsize=7, color=colour)
        ax.set_ylim(top=top * 1.45)
    ax.set_xlabel("wavelength (nm, air)")
    ax.set_ylabel("energy flux (relative)" if calibrated else "flux (not response-corrected)")
    ax.set_xlim(np.nanmin(wl), np.nanmax(wl))
    ax.legend(loc="upper left", fontsize=8, frameon=False)
    return fig


def plot_spectrogram(per_frame: np.ndarray, wavelength_nm: np.ndarray, time_s: np.ndarray, *, ax=None):
    """Per-frame spectra as an image: time down, wavelength across.

    Square-root colour scale from 0 to the peak, so that faint lines and the
    bright ones show together; rows without data (NaN) are cut off.
    """
    from matplotlib.colors import PowerNorm

    fig, ax = _axes(ax, figsize=(9.0, 4.0))
    data = np.asarray(per_frame, dtype=float)
    wl = np.asarray(wavelength_nm, dtype=float)
    t = np.asarray(time_s, dtype=float)
    finite = data[np.isfinite(data)]
    vmax = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
    dt = np.median(np.diff(t)) if t.size > 1 else 1.0
    dw = np.median(np.diff(wl)) if wl.size > 1 else 1.0
    im = ax.imshow(np.clip(data, 0, None), aspect="auto", origin="upper", cmap="magma",
                   norm=PowerNorm(gamma=0.5, vmin=0.0, vmax=vmax),
                   extent=(wl[0] - dw / 2, wl[-1] + dw / 2, t[-1] + dt / 2, t[0] - dt / 2),
                   interpolation="nearest")
    rows = np.flatnonzero(np.isfinite(data).any(axis=1))
    if rows.size:
        ax.set_ylim(t[rows[-1]] + dt / 2, t[rows[0]] - dt / 2)
    fig.colorbar(im, ax=ax, label="flux per frame (relative, sqrt scale)", pad=0.01)
    ax.set_xlabel("wavelength (nm, air)")
    ax.set_ylabel("time (s)")
    return fig


def window_light_curves(per_frame: np.ndarray, wavelength_nm: np.ndarray, *,
                        windows: Mapping[str, tuple[float, float]] | None = None) -> dict[str, np.ndarray]:
    """Per-frame flux summed over wavelength windows (default: the three contract groups).

    These are window sums of the extracted spectra (continuum included), a
    quick look at how each group evolves, not the fitted line intensities.
    """
    windows = GROUP_WINDOWS_NM if windows is None else windows
    data = np.asarray(per_frame, dtype=float)
    wl = np.asarray(wavelength_nm, dtype=float)
    out: dict[str, np.ndarray] = {}
    for name, (a, b) in windows.items():
        sel = (wl >= a) & (wl <= b)
        out[name] = np.nansum(data[:, sel], axis=1) if sel.any() else np.full(data.shape[0], np.nan)
    return out


def plot_light_curves(time_s: np.ndarray, curves: Mapping[str, np.ndarray], *,
                      zeroth_time_s: np.ndarray | None = None, zeroth_flux: np.ndarray | None = None, ax=None):
    """Monochromatic light curves (each scaled to its own peak) and the zeroth-order light curve."""
    fig, ax = _axes(ax, figsize=(9.0, 3.6))
    t = np.asarray(time_s, dtype=float)
    for name, curve in curves.items():
        c = np.asarray(curve, dtype=float)
        peak = np.nanmax(c) if np.isfinite(c).any() else np.nan
        if np.isfinite(peak) and peak > 0:
            a, b = GROUP_WINDOWS_NM.get(name, (np.nan, np.nan))
            label = f"{name.capitalize()} ({a:.0f}-{b:.0f} nm)" if np.isfinite(a) else name
            ax.plot(t, c / peak, color=GROUP_COLOURS.get(name, None), lw=1.4, label=label)
    if zeroth_time_s is not None and zeroth_flux is not None and len(zeroth_flux):
        z = np.asarray(zeroth_flux, dtype=float)
        peak = np.nanmax(z) if np.isfinite(z).any() else np.nan
        if np.isfinite(peak) and peak > 0:
            ax.plot(zeroth_time_s, z / peak, "--", color="#333333", lw=1, label="zeroth order")
    ax.set_xlabel("time (s)")
    ax.set_ylabel("relative to peak")
    ax.axhline(0, color="#cccccc", lw=0.6)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=8, frameon=False, loc="upper right")
    return fig


def plot_composition(composition: Mapping[str, Any], *, ax=None):
    """Na, Mg, Fe relative intensities with 1-sigma error bars, and the class."""
    fig, ax = _axes(ax, figsize=(4.2, 3.4))
    keys = ("na", "mg", "fe")
    vals = [float(composition.get(k, np.nan)) for k in keys]
    errs = [float(composition.get(f"{k}_err", np.nan)) for k in keys]
    ax.bar(range(3), vals, yerr=np.nan_to_num(errs), capsize=5, color=[GROUP_COLOURS[k] for k in keys],
           edgecolor="#333333", lw=0.6)
    ax.set_xticks(range(3), ["Na", "Mg", "Fe"])
    ax.set_ylim(0, max(1.0, np.nanmax(np.array(vals) + np.nan_to_num(errs))) if np.isfinite(vals).any() else 1.0)
    ax.set_ylabel("fraction (sum 1)")
    title = str(composition.get("class", ""))
    conf = composition.get("class_confidence")
    if conf is not None and np.isfinite(float(conf)):
        title += f"  (confidence {float(conf):.2f})"
    ax.set_title(title, color=CLASS_COLOURS.get(str(composition.get("class", "")), "#333333"))
    return fig
