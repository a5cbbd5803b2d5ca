"""Atmospheric extinction: where a pixel points on the sky, airmass, optical depth, transmission.

Optional stage: it needs the station's ``[pointing]``. The frame change from
the camera to the local horizon is written here once (it is a rotation, not
lens optics; the lens part, pixel -> camera direction, is asked of
:class:`~meteorspec.optics.LensModel`).

Model
-----
``T(lambda, h) = exp(-X(h) * (tau_R(lambda) * p / p0 + tau_aer(lambda) + tau_O3(lambda)))``

* ``X(h)``: relative optical airmass of Kasten & Young (1989, Appl. Opt. 28, 4735).
* ``tau_R``: Rayleigh optical depth of the whole atmosphere at sea level,
  Bucholtz (1995, Appl. Opt. 34, 2765), scaled by the station pressure.
* ``tau_aer``: aerosol, Angstrom (1929) power law ``tau_550 (lambda / 550 nm)^-alpha``;
  ``tau_550`` and ``alpha`` are configurable (defaults: a clear rural night).
* ``tau_O3``: ozone Chappuis band, column (Dobson units) times a coarse
  cross-section table (see :data:`OZONE_CROSS_SECTION_CM2`).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .config import Pointing, Station
from .optics import LensModel

__all__ = [
    "EXTINCTION_FLAGS",
    "ExtinctionModel",
    "OZONE_CROSS_SECTION_CM2",
    "airmass_kasten_young",
    "camera_to_horizon",
    "extinction_correction",
    "pixel_altaz",
    "pressure_at_elevation_hpa",
    "rayleigh_optical_depth_bucholtz",
    "transmission",
]

EXTINCTION_FLAGS = ("extinction_corrected", "extinction_skipped_no_pointing", "below_horizon")

# Kasten & Young (1989), eq. (3): X = 1 / (sin h + a (h + b)^-c), h in degrees.
_KY_A, _KY_B_DEG, _KY_C = 0.50572, 6.07995, 1.6364

# Bucholtz (1995), Table 5, US Standard Atmosphere 1962, tau = A lam^-(B + C lam + D / lam), lam in um;
# two sets, below and above 0.5 um (coefficients from memory of the paper; the tests check the
# result against the paper's ~0.097 at 550 nm and the continuity of the two sets at 0.5 um).
_BUCHOLTZ_SHORT = (6.50362e-3, 3.55212, 1.35579, 0.11563)   # 0.2 - 0.5 um
_BUCHOLTZ_LONG = (8.64627e-3, 3.99668, 1.10298e-3, 2.71393e-2)  # 0.5 - 2.2 um

SEA_LEVEL_PRESSURE_HPA = 1013.25  # ISO 2533 standard atmosphere

#: Ozone absorption cross-section (cm^2 per molecule) of the Chappuis band at room temperature,
#: coarse table from memory after Serdyuchenko et al. (2014, Atmos. Meas. Tech. 7, 625);
#: good to ~20 %, which for 300 DU is < 0.01 in optical depth anywhere in 390-850 nm.
OZONE_CROSS_SECTION_CM2 = (
    np.array([350.0, 400.0, 440.0, 480.0, 500.0, 525.0, 550.0, 575.0, 600.0, 625.0, 650.0,
              675.0, 700.0, 750.0, 800.0, 850.0, 900.0]),
    np.array([0.0, 0.01, 0.1, 0.6, 1.3, 2.3, 3.3, 4.7, 5.1, 4.3, 2.6, 1.6, 0.9, 0.45, 0.25,
              0.15, 0.1]) * 1e-21,
)
_DU_MOLECULES_CM2 = 2.6867e16  # one Dobson unit (Loschmidt number x 10 um), common practice


def airmass_kasten_young(altitude_deg: ArrayLike) -> NDArray[np.float64]:
    """Relative optical airmass of Kasten & Young (1989).

    Parameters
    ----------
    altitude_deg : array_like
        Apparent altitude above the horizon, deg.

    Returns
    -------
    ndarray
        Airmass; NaN below the horizon (altitude < 0) or for non-finite input.

    Notes
    -----
    ``X = 1 / (sin h + 0.50572 (h + 6.07995 deg)^-1.6364)`` (Kasten & Young 1989,
    Appl. Opt. 28, 4735, eq. 3). It gives 0.99971 at the zenith (not exactly 1:
    the fit was made to their ray-traced table) and 37.92 at the horizon.
    """
    h = np.asarray(altitude_deg, dtype=float)
    ok = np.isfinite(h) & (h >= 0) & (h <= 90)
    hs = np.where(ok, h, 45.0)
    x = 1.0 / (np.sin(np.radians(hs)) + _KY_A * (hs + _KY_B_DEG) ** (-_KY_C))
    return np.where(ok, x, np.nan)


def rayleigh_optical_depth_bucholtz(wavelength_nm: ArrayLike,
                                    pressure_hpa: float = SEA_LEVEL_PRESSURE_HPA) -> NDArray[np.float64]:
    """Vertical Rayleigh optical depth of the whole atmosphere above a site.

    Parameters
    ----------
    wavelength_nm : array_like
        Wavelength, nm (the fit holds for 200-2200 nm).
    pressure_hpa : float
        Surface pressure at the site; the depth scales with the column, i.e. the pressure.

    Returns
    -------
    ndarray

    Notes
    -----
    Bucholtz (1995, Appl. Opt. 34, 2765, eq. 9 and Table 5, US Standard Atmosphere):
    ``tau = A lam^-(B + C lam + D / lam)`` with ``lam`` in um, one coefficient set below and
    one above 0.5 um (continuous there to 1e-4 relative).
    """
    lam = np.asarray(wavelength_nm, dtype=float) * 1e-3
    if not (np.isfinite(pressure_hpa) and pressure_hpa > 0):
        raise ValueError(f"pressure_hpa must be positive, got {pressure_hpa}")
    short = lam < 0.5
    a, b, c, d = (np.where(short, s, lo) for s, lo in zip(_BUCHOLTZ_SHORT, _BUCHOLTZ_LONG))
    with np.errstate(invalid="ignore", divide="ignore"):
        tau = a * lam ** (-(b + c * lam + d / lam))
    return tau * (pressure_hpa / SEA_LEVEL_PRESSURE_HPA)


def pressure_at_elevation_hpa(elevation_m: float) -> float:
    """Standard-atmosphere pressure at a height (ISO 2533 troposphere; common practice).

    ``p = 1013.25 hPa (1 - 2.25577e-5 h[m])^5.25588``.
    """
    return float(SEA_LEVEL_PRESSURE_HPA * (1.0 - 2.25577e-5 * float(elevation_m)) ** 5.25588)


@dataclass(frozen=True)
class ExtinctionModel:
    """Settings of the atmosphere above a station.

    Parameters
    ----------
    pressure_hpa : float
        Surface pressure; default the standard atmosphere at the station elevation.
    aerosol_tau_550 : float
        Aerosol vertical optical depth at 550 nm (0.05: a clear rural night, common practice).
    aerosol_angstrom : float
        Angstrom exponent alpha (1.3: Angstrom's own continental value, common practice).
    ozone_du : float
        Ozone column in Dobson units (300 DU: a mid-latitude mean, common practice).
    """

    pressure_hpa: float = SEA_LEVEL_PRESSURE_HPA
    aerosol_tau_550: float = 0.05
    aerosol_angstrom: float = 1.3
    ozone_du: float = 300.0

    def __post_init__(self) -> None:
        for name in ("pressure_hpa", "aerosol_tau_550", "aerosol_angstrom", "ozone_du"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value >= 0):
                raise ValueError(f"ExtinctionModel.{name} must be finite and >= 0, got {value!r}")
        if self.pressure_hpa <= 0:
            raise ValueError(f"ExtinctionModel.pressure_hpa must be > 0, got {self.pressure_hpa}")

    @classmethod
    def for_station(cls, station: Station, **changes: float) -> ExtinctionModel:
        """The default model with the station's elevation setting the pressure."""
        elev = 0.0 if station.elevation_m is None else station.elevation_m
        return dataclasses.replace(cls(pressure_hpa=pressure_at_elevation_hpa(elev)), **changes)

    def optical_depth(self, wavelength_nm: ArrayLike) -> NDArray[np.float64]:
        """Total vertical optical depth (Rayleigh + aerosol + ozone)."""
        lam = np.asarray(wavelength_nm, dtype=float)
        tau = rayleigh_optical_depth_bucholtz(lam, self.pressure_hpa)
        tau = tau + self.aerosol_tau_550 * (lam / 550.0) ** (-self.aerosol_angstrom)
        sigma = np.interp(lam, *OZONE_CROSS_SECTION_CM2, left=0.0, right=0.0)
        return tau + self.ozone_du * _DU_MOLECULES_CM2 * sigma


def transmission(wavelength_nm: ArrayLike, altitude_deg: ArrayLike, *,
                 model: ExtinctionModel | None = None) -> NDArray[np.float64]:
    """Fraction of light transmitted, ``exp(-X(h) tau(lambda))``.

    ``wavelength_nm`` and ``altitude_deg`` broadcast (e.g. ``altitude[:, None]`` against a
    wavelength grid gives a (frame, wavelength) table). NaN below the horizon.
    """
    model = ExtinctionModel() if model is None else model
    return np.exp(-airmass_kasten_young(altitude_deg) * model.optical_depth(wavelength_nm))

# --------------------------------------------------------------------------- camera -> horizon


def camera_to_horizon(pointing: Pointing) -> NDArray[np.float64]:
    """Rotation matrix from the camera frame to local East-North-Up.

    Returns
    -------
    ndarray of shape (3, 3)
        Columns are the camera ``+x``, ``+y``, ``+z`` axes in ENU: ``enu = R @ u_cam``.

    Notes
    -----
    ``+z`` is the optical axis at (``altitude_deg``, ``azimuth_deg``), azimuth from north
    towards east. With ``roll_deg = 0`` the image ``+y`` axis points "down the meridian":
    along the vertical circle through the axis towards lower altitude (for the zenith,
    towards the horizon at ``azimuth_deg``). A positive roll turns ``+y`` about the optical
    axis from there towards the image's initial ``-x`` side, i.e. the camera body turns
    counter-clockwise as seen from behind it. ``+x = +y x +z`` keeps the frame right-handed,
    so the sky is seen unmirrored (facing north at the horizon, east is to the right).
    """
    h, a, r = (np.radians(v) for v in (pointing.altitude_deg, pointing.azimuth_deg, pointing.roll_deg))
    z = np.array([np.cos(h) * np.sin(a), np.cos(h) * np.cos(a), np.sin(h)])
    up_along = np.array([-np.sin(h) * np.sin(a), -np.sin(h) * np.cos(a), np.cos(h)])  # d(axis)/dh
    y0 = -up_along
    x0 = np.cross(y0, z)
    y = np.cos(r) * y0 - np.sin(r) * x0
    x = np.cross(y, z)
    return np.stack([x, y, z], axis=1)


def pixel_altaz(lens: LensModel, pointing: Pointing, x_px: ArrayLike,
                y_px: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Altitude and azimuth (deg) seen at a pixel; NaN outside the lens field.

    The camera direction comes from :meth:`LensModel.pixel_to_direction`; the rotation from
    :func:`camera_to_horizon`. Refraction is not applied (under 0.5 deg above 1 deg altitude).
    """
    u = lens.pixel_to_direction(x_px, y_px)
    enu = u @ camera_to_horizon(pointing).T
    alt = np.degrees(np.arcsin(np.clip(enu[..., 2], -1.0, 1.0)))
    az = np.degrees(np.arctan2(enu[..., 0], enu[..., 1])) % 360.0
    return alt, az


# --------------------------------------------------------------------------- correction


def extinction_correction(spectra: Any, altitude_deg: ArrayLike, *,
                          model: ExtinctionModel | None = None) -> tuple[Any, tuple[str, ...]]:
    """Divide spectra by the atmospheric transmission along the meteor's line of sight.

    Parameters
    ----------
    spectra : FrameSpectra or Spectrum
        From :mod:`meteorspec.extract` (any object with ``wavelength_nm``, ``flux``, ``mask``
        and ``variance`` (per frame) or ``flux_err``).
    altitude_deg : array_like
        One altitude per frame for FrameSpectra (shape ``(n_frames,)``), or a scalar for a
        Spectrum. Get it from :func:`pixel_altaz` at the track positions.
    model : ExtinctionModel, optional
        Default :class:`ExtinctionModel` ().

    Returns
    -------
    corrected : same type
        Flux divided by the transmission (variance by its square); frames below the horizon
        or with no altitude are masked.
    flags : tuple of str
        ``("extinction_corrected",)``, plus ``"below_horizon"`` if some frame had to be masked.
    """
    model = ExtinctionModel() if model is None else model
    wl = np.asarray(spectra.wavelength_nm, dtype=float)
    flux = np.asarray(spectra.flux, dtype=float)
    alt = np.asarray(altitude_deg, dtype=float)
    if flux.ndim == 2:
        if alt.shape != (flux.shape[0],):
            raise ValueError(f"altitude_deg needs one value per frame ({flux.shape[0]}), got shape {alt.shape}")
        trans = np.exp(-airmass_kasten_young(alt)[:, None] * model.optical_depth(wl)[None, :])
    else:
        if alt.ndim != 0:
            raise ValueError("altitude_deg must be a scalar for a single spectrum")
        trans = np.exp(-airmass_kasten_young(alt) * model.optical_depth(wl))
    bad = ~np.isfinite(trans)
    trans = np.where(bad, 1.0, trans)
    mask = np.asarray(spectra.mask, dtype=bool) | bad
    changes: dict[str, Any] = {"flux": np.where(mask, np.nan, flux / trans), "mask": mask}
    if hasattr(spectra, "variance"):
        changes["variance"] = np.where(mask, np.nan, np.asarray(spectra.variance) / trans**2)
    else:
        changes["flux_err"] = np.where(mask, np.nan, np.asarray(spectra.flux_err) / trans)
    flags = ["extinction_corrected"]
    if np.any(bad):
        flags.append("below_horizon")
    if hasattr(spectra, "flags"):
        changes["flags"] = tuple(dict.fromkeys(tuple(spectra.flags) + tuple(flags)))
    return dataclasses.replace(spectra, **changes), tuple(flags)
