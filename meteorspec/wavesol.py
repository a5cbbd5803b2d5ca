"""Result objects of the wavelength calibration (the process is :mod:`meteorspec.calibrate`).

As a fitting process and its result are separate things (specreduce keeps
``wavecal1d`` apart from ``wavesol1d``), the calibrator returns a small,
immutable :class:`WavelengthSolution` that every later stage asks; the line
positions it was fitted to travel with it in a :class:`LineMeasurements`
table so that a night's events can be refitted together.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .optics import SpectralGeometry

__all__ = ["GRATING_PARAMETERS", "LENS_PARAMETERS", "LineMeasurements", "ResidualTable",
           "WavelengthSolution", "geometry_values"]

GRATING_PARAMETERS = ("grooves_per_mm", "dispersion_angle_deg", "tilt_deg", "tilt_azimuth_deg")
LENS_PARAMETERS = ("focal_px", "k1")


def geometry_values(geometry: SpectralGeometry) -> dict[str, float]:
    """The refinable grating and lens values of a geometry, by name."""
    g, lens = geometry.grating, geometry.lens
    out = {name: float(getattr(g, name)) for name in GRATING_PARAMETERS}
    out.update({name: float(getattr(lens, name)) for name in LENS_PARAMETERS})
    return out


class _Table:
    """Columns of equal length, frozen; ``select`` and ``concat`` keep the type."""

    def __post_init__(self) -> None:
        n = None
        for f in fields(self):
            arr = np.array(getattr(self, f.name), copy=True, ndmin=1)
            if n is None:
                n = arr.shape[0]
            if arr.ndim != 1 or arr.shape[0] != n:
                raise ValueError(f"{type(self).__name__}.{f.name} has shape {arr.shape}, expected ({n},)")
            arr.flags.writeable = False
            object.__setattr__(self, f.name, arr)

    def __len__(self) -> int:
        return int(getattr(self, fields(self)[0].name).shape[0])

    def select(self, index: ArrayLike):
        idx = np.asarray(index)
        return type(self)(**{f.name: getattr(self, f.name)[idx] for f in fields(self)})

    @classmethod
    def concat(cls, tables: list):
        if not tables:
            return cls.empty()
        return cls(**{f.name: np.concatenate([getattr(t, f.name) for t in tables]) for f in fields(cls)})

    @classmethod
    def empty(cls):
        kinds = {"species": str, "frame": int, "event": str}
        return cls(**{f.name: np.zeros(0, dtype=kinds.get(f.name, float)) for f in fields(cls)})


@dataclass(frozen=True, eq=False)
class LineMeasurements(_Table):
    """Measured positions of spectral features, one row per (frame or frame bin, feature).

    Attributes
    ----------
    event : ndarray of str
        Event id (``""`` within one event); lets a night fit keep events apart.
    frame : ndarray of int
        Position of the (first) frame of the bin in the event's frame sequence.
    x0_px, y0_px : ndarray of float
        Zeroth-order pixel the feature belongs to.
    x_px, y_px : ndarray of float
        Measured image position of the feature.
    lab_nm : ndarray of float
        Its laboratory (air) wavelength: for a blend the model-weighted centroid of the
        lines that make it.
    species : ndarray of str
        Dominant species of the feature, or ``"blend <lo>-<hi>"`` for a blend window (the
        whole line pattern of ``lo``-``hi`` nm; ``lab_nm`` is then the template's light
        centroid in the window).
    tangent_x, tangent_y : ndarray of float
        Unit vector along the spectrum at the measurement (the along-dispersion direction
        in which ``sigma_along_px`` applies).
    sigma_along_px, sigma_cross_px : ndarray of float
        1-sigma of the position along and across the spectrum (``inf``: not measured).
    """

    event: NDArray[np.str_]
    frame: NDArray[np.int64]
    x0_px: NDArray[np.float64]
    y0_px: NDArray[np.float64]
    x_px: NDArray[np.float64]
    y_px: NDArray[np.float64]
    lab_nm: NDArray[np.float64]
    species: NDArray[np.str_]
    tangent_x: NDArray[np.float64]
    tangent_y: NDArray[np.float64]
    sigma_along_px: NDArray[np.float64]
    sigma_cross_px: NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class ResidualTable(_Table):
    """Line-position residuals of a solution: ``residual_nm = measured_nm - lab_nm``.

    ``measured_nm`` is the wavelength the solution's geometry gives the measured pixel
    (:meth:`SpectralGeometry.locate`); ``used`` is False for rejected outliers.
    """

    event: NDArray[np.str_]
    frame: NDArray[np.int64]
    species: NDArray[np.str_]
    lab_nm: NDArray[np.float64]
    measured_nm: NDArray[np.float64]
    residual_nm: NDArray[np.float64]
    cross_px: NDArray[np.float64]
    used: NDArray[np.bool_]


@dataclass(frozen=True, eq=False)
class WavelengthSolution:
    """The spectral geometry an event's spectra are extracted with, and how it was found.

    Attributes
    ----------
    geometry : SpectralGeometry
        Refined geometry (``source == "event"``) or the station's (``"station"``).
    source : str
        ``"event"`` or ``"station"``.
    values : dict of str to float
        ``grooves_per_mm``, ``dispersion_angle_deg``, ``tilt_deg``, ``tilt_azimuth_deg``,
        ``focal_px``, ``k1`` used.
    errors : dict of str to float
        1-sigma of the fitted values; NaN for values held fixed.
    rms_nm : float
        RMS of the line-position residuals used in the fit (NaN without a fit).
    n_lines : int
        Distinct spectral features and blend windows (lab wavelengths) with accepted
        measurements.
    n_frames_used : int
        Frames that contributed accepted measurements.
    residuals : ResidualTable
    flags : tuple of str
    measurements : LineMeasurements
        The positions the fit used (empty for a station fallback without lines).
    reduced_chi2 : float
        Reduced chi-square of a whole-spectrum fit (NaN for a fit of line positions and for
        the station's values).
    """

    geometry: SpectralGeometry
    source: str
    values: dict[str, float]
    errors: dict[str, float]
    rms_nm: float
    n_lines: int
    n_frames_used: int
    residuals: ResidualTable
    flags: tuple[str, ...] = ()
    measurements: LineMeasurements | None = None
    reduced_chi2: float = math.nan

    def __post_init__(self) -> None:
        if self.source not in ("event", "station", "night"):
            raise ValueError(f"source must be 'event', 'station' or 'night', got {self.source!r}")

    def to_attrs(self) -> dict[str, Any]:
        """Attributes of the ``/calibration`` group (contract section 5).

        The grating and lens values used, ``rms_nm``, ``n_lines``, and ``<name>_err`` for each
        value (NaN where it was held fixed), plus ``source``, ``n_frames_used``,
        ``projection``, ``cx``, ``cy``, ``k2`` and ``flags``.
        """
        lens = self.geometry.lens
        attrs: dict[str, Any] = {"source": self.source, "projection": lens.projection,
                                 "cx": float(lens.cx), "cy": float(lens.cy), "k2": float(lens.k2)}
        for name, value in self.values.items():
            attrs[name] = float(value)
            attrs[f"{name}_err"] = float(self.errors.get(name, np.nan))
        attrs["rms_nm"] = float(self.rms_nm)
        attrs["n_lines"] = int(self.n_lines)
        attrs["n_frames_used"] = int(self.n_frames_used)
        attrs["flags"] = np.array(self.flags, dtype=str)
        return attrs

    def wav_to_pix(self, x0_px: ArrayLike, y0_px: ArrayLike, wavelength_nm: ArrayLike, *,
                   order: int = 1) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Pixel of ``wavelength_nm`` for a zeroth order at ``(x0_px, y0_px)``."""
        return self.geometry.spectrum_pixel(x0_px, y0_px, wavelength_nm, order)

    def pix_to_wav(self, x0_px: ArrayLike, y0_px: ArrayLike, x_px: ArrayLike, y_px: ArrayLike, *,
                   order: int = 1) -> NDArray[np.float64]:
        """Wavelength of a pixel near the spectrum of a zeroth order at ``(x0_px, y0_px)``."""
        return self.geometry.locate(x0_px, y0_px, x_px, y_px, order=order)[0]
