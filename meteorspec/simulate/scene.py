"""The sky scene of a simulated event: meteor path and light curve, and the stars.

The meteor moves at constant angular speed along a great circle of the sky
(a straight trajectory seen from the station, ignoring deceleration). Pixels
and directions are converted only through :class:`meteorspec.optics.LensModel`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import atomic
from ..optics import SpectralGeometry
from .spec import EventSpec

# Resolution of the tabulated cumulative light curve (per luminous flight).
_LIGHT_CURVE_SAMPLES = 20001
# Flare shape: Gaussian in flight fraction, centred at 85 % of the flight (invented).
_FLARE_AT, _FLARE_WIDTH = 0.85, 0.025


@dataclass(frozen=True, eq=False)
class Trajectory:
    """Great-circle motion: ``u(t) = cos(a) u0 + sin(a) e``, ``a = omega (t - t0)``.

    Attributes
    ----------
    u0 : ndarray of shape (3,)
        Direction (camera frame) at the start of the luminous flight.
    e : ndarray of shape (3,)
        Unit tangent at ``u0`` along the motion.
    omega_rad_s : float
        Angular speed.
    t0_s : float
        Start of the luminous flight.
    """

    geometry: SpectralGeometry
    u0: np.ndarray
    e: np.ndarray
    omega_rad_s: float
    t0_s: float

    def direction(self, time_s: np.ndarray) -> np.ndarray:
        a = self.omega_rad_s * (np.asarray(time_s, dtype=float) - self.t0_s)
        return np.cos(a)[..., None] * self.u0 + np.sin(a)[..., None] * self.e

    def pixel(self, time_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Zeroth-order pixel ``(x_px, y_px)`` at ``time_s`` (NaN beyond the lens field)."""
        return self.geometry.lens.direction_to_pixel(self.direction(time_s))


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v)


def make_trajectory(spec: EventSpec, geometry: SpectralGeometry) -> Trajectory:
    """The great circle of ``spec`` (start pixel and either end pixel or direction + speed)."""
    lens = geometry.lens
    x0, y0 = spec.start_px
    u0 = lens.pixel_to_direction(x0, y0)
    if not np.all(np.isfinite(u0)):
        raise ValueError(f"start_px {spec.start_px} is outside the lens field")
    if spec.end_px is not None:
        u1 = lens.pixel_to_direction(*spec.end_px)
        if not np.all(np.isfinite(u1)):
            raise ValueError(f"end_px {spec.end_px} is outside the lens field")
        cos_arc = float(np.clip(np.dot(u0, u1), -1.0, 1.0))
        e = _unit(u1 - cos_arc * u0)
        omega = np.arccos(cos_arc) / spec.meteor_duration_s
    else:
        # the image direction at start_px, carried to the sphere by a 1 px step
        d = np.radians(spec.direction_deg)
        u1 = lens.pixel_to_direction(x0 + np.cos(d), y0 + np.sin(d))
        e = _unit(u1 - np.dot(u1, u0) * u0)
        omega = np.radians(spec.speed_deg_s)
    return Trajectory(geometry=geometry, u0=u0, e=e, omega_rad_s=float(omega), t0_s=spec.meteor_start_s)


@dataclass(frozen=True, eq=False)
class LightCurve:
    """Emitted energy rate relative to its maximum, and its integral over any interval.

    ``rate(t)`` is 1 at the maximum and 0 outside the luminous flight. The
    classic shape is ``x^a (1 - x)^b`` in flight fraction ``x`` with
    ``a / (a + b)`` = ``peak_time_frac`` and ``a + b = 4``: a smooth, invented
    stand-in for a rise and a faster or slower fall.
    """

    t0_s: float
    duration_s: float
    peak_time_frac: float
    flare_amplitude: float

    def rate(self, time_s: np.ndarray) -> np.ndarray:
        x = (np.asarray(time_s, dtype=float) - self.t0_s) / self.duration_s
        inside = (x > 0) & (x < 1)
        xc = np.clip(x, 0.0, 1.0)
        a, b = 4.0 * self.peak_time_frac, 4.0 * (1.0 - self.peak_time_frac)
        p = self.peak_time_frac
        shape = (xc**a * (1 - xc) ** b) / (p**a * (1 - p) ** b)
        shape = shape + self.flare_amplitude * np.exp(-0.5 * ((xc - _FLARE_AT) / _FLARE_WIDTH) ** 2)
        return np.where(inside, shape, 0.0)

    def _table(self) -> tuple[np.ndarray, np.ndarray]:
        t = self.t0_s + self.duration_s * np.linspace(0.0, 1.0, _LIGHT_CURVE_SAMPLES)
        r = self.rate(t)
        cum = np.concatenate([[0.0], np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(t))])
        return t, cum

    def integral(self, t_start_s: np.ndarray, t_end_s: np.ndarray) -> np.ndarray:
        """``int rate dt`` from ``t_start_s`` to ``t_end_s`` (seconds at peak rate).

        The cumulative integral is tabulated once (trapezoid, 20 001 samples) and
        interpolated linearly, so integrals over adjacent intervals add up exactly.
        """
        t, cum = self._cached
        return np.interp(t_end_s, t, cum) - np.interp(t_start_s, t, cum)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_cached", self._table())


def make_light_curve(spec: EventSpec) -> LightCurve:
    flare = spec.flare_amplitude if spec.light_curve == "flare" else 0.0
    return LightCurve(t0_s=spec.meteor_start_s, duration_s=spec.meteor_duration_s,
                      peak_time_frac=spec.peak_time_frac, flare_amplitude=flare)


@dataclass(frozen=True, eq=False)
class Stars:
    """Static stars: zeroth-order pixel, energy per second, black-body temperature."""

    x_px: np.ndarray
    y_px: np.ndarray
    energy_adu_s: np.ndarray
    temperature_k: np.ndarray

    def __len__(self) -> int:
        return int(self.x_px.size)


def make_stars(spec: EventSpec, geometry: SpectralGeometry, width: int, height: int) -> Stars:
    """Seeded random stars inside the lens field (at least 3 degrees above its rim).

    Brightness follows a power law (many faint, few bright), from 40 to
    40 000 ADU/s of emitted energy; temperatures uniform in 3000-12 000 K.
    """
    rng = np.random.default_rng([spec.seed, 202])
    n = int(spec.n_stars)
    xs, ys = [], []
    tries = 0
    while len(xs) < n and tries < 50:
        tries += 1
        x = rng.uniform(5.0, width - 6.0, 4 * n)
        y = rng.uniform(5.0, height - 6.0, 4 * n)
        u = geometry.lens.pixel_to_direction(x, y)
        ok = np.isfinite(u[:, 2]) & (u[:, 2] > np.sin(np.radians(3.0)))
        xs += list(x[ok])
        ys += list(y[ok])
    x = np.array(xs[:n], dtype=float)
    y = np.array(ys[:n], dtype=float)
    n = x.size
    energy = 40.0 * 1000.0 ** rng.power(0.35, n) if n else np.zeros(0)
    # rng.power(a) ~ x^(a-1) on [0, 1]; 1000**x then spans 1..1000, most near the faint end
    temperature = rng.uniform(3000.0, 12000.0, n)
    return Stars(x_px=x, y_px=y, energy_adu_s=np.asarray(energy, dtype=float), temperature_k=temperature)


def star_spectrum(temperature_k: float, wavelength_nm: np.ndarray) -> np.ndarray:
    """Relative energy per wavelength sample of a star: Planck, normalised to sum 1."""
    b = atomic.planck_radiance(wavelength_nm, temperature_k)
    return b / b.sum()
