"""Optics of a grating-equipped meteor camera (contract section 2).

Three small immutable objects:

- :class:`LensModel` maps a direction in the camera frame to a pixel and back
  (five fisheye/rectilinear projections with radial terms k1, k2).
- :class:`GratingModel` diffracts a direction into order ``m`` at a wavelength
  (the vector grating equation, which includes conical diffraction).
- :class:`SpectralGeometry` combines them: (zeroth-order pixel, wavelength,
  order) -> pixel, and back (a pixel near the spectrum -> wavelength and
  cross-dispersion offset), with local dispersion and direction.

Nothing else in the package does trigonometry on the optics: tracker,
extractor, calibrator, simulator and plots all ask :class:`SpectralGeometry`.
All functions are vectorised and broadcast their array arguments.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .config import Grating, Lens, Station

PROJECTIONS = ("equidistant", "equisolid", "stereographic", "orthographic", "rectilinear")

# Largest off-axis angle each projection can represent. The rectilinear and
# stereographic radii diverge at the limit itself, so stop just short of it.
_PROJECTION_LIMIT_RAD = {
    "equidistant": np.pi,
    "equisolid": np.pi,
    "stereographic": np.pi * (1 - 1e-6),
    "orthographic": np.pi / 2,
    "rectilinear": np.pi / 2 * (1 - 1e-6),
}


def projection_radius(projection: str, theta_rad: ArrayLike) -> NDArray[np.float64]:
    """Normalised radius P(theta) of contract section 2.1 (radius / focal length).

    Notes
    -----
    equidistant ``theta``; equisolid ``2 sin(theta/2)``; stereographic
    ``2 tan(theta/2)``; orthographic ``sin(theta)``; rectilinear ``tan(theta)``
    (the standard fisheye projection formulas, e.g. Kannala & Brandt 2006,
    IEEE TPAMI 28, 1335).
    """
    t = np.asarray(theta_rad, dtype=float)
    if projection == "equidistant":
        return t.copy()
    if projection == "equisolid":
        return 2.0 * np.sin(t / 2.0)
    if projection == "stereographic":
        return 2.0 * np.tan(t / 2.0)
    if projection == "orthographic":
        return np.sin(t)
    if projection == "rectilinear":
        return np.tan(t)
    raise ValueError(f"unknown projection {projection!r}")


def _projection_slope(projection: str, theta_rad: NDArray[np.float64]) -> NDArray[np.float64]:
    """dP/dtheta, used by the Newton inverse."""
    t = theta_rad
    if projection == "equidistant":
        return np.ones_like(t)
    if projection == "equisolid":
        return np.cos(t / 2.0)
    if projection == "stereographic":
        return 1.0 / np.cos(t / 2.0) ** 2
    if projection == "orthographic":
        return np.cos(t)
    if projection == "rectilinear":
        return 1.0 / np.cos(t) ** 2
    raise ValueError(f"unknown projection {projection!r}")


def _normalise(v: NDArray[np.float64]) -> NDArray[np.float64]:
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def _dot(a: NDArray[np.float64], b: NDArray[np.float64]) -> NDArray[np.float64]:
    return np.sum(a * b, axis=-1)


def _unit_components(x: NDArray[np.float64], y: NDArray[np.float64],
                     z: NDArray[np.float64]) -> tuple[NDArray[np.float64], ...]:
    """:func:`_normalise` on a vector held as its three components.

    The curve evaluations work on separate component arrays (no reductions
    over a length-3 axis). ``(x*x + y*y) + z*z`` is the order numpy's sum over
    the last axis takes, so the result is :func:`_normalise`'s to the last bit
    (checked in tests/test_optics.py).
    """
    norm = np.sqrt(x * x + y * y + z * z)
    return x / norm, y / norm, z / norm


@dataclass(frozen=True)
class LensModel:
    """Direction <-> pixel mapping of contract section 2.1.

    Parameters
    ----------
    projection : str
        One of :data:`PROJECTIONS`.
    focal_px : float
        Focal length in pixels.
    cx, cy : float
        Pixel of the optical axis (origin at the centre of the top-left pixel).
    k1, k2 : float
        Radial terms: ``r = focal_px * P(theta) * (1 + k1 theta^2 + k2 theta^4)``.
    """

    projection: str
    focal_px: float
    cx: float
    cy: float
    k1: float = 0.0
    k2: float = 0.0

    def __post_init__(self) -> None:
        if self.projection not in PROJECTIONS:
            raise ValueError(f"unknown projection {self.projection!r}")
        if not self.focal_px > 0:
            raise ValueError(f"focal_px must be positive, got {self.focal_px}")

    @classmethod
    def from_config(cls, lens: Lens) -> LensModel:
        return cls(lens.projection, lens.focal_px, lens.cx, lens.cy, lens.k1, lens.k2)

    def radius_px(self, theta_rad: ArrayLike) -> NDArray[np.float64]:
        """Image radius (px) of a direction ``theta_rad`` off the optical axis."""
        t = np.asarray(theta_rad, dtype=float)
        return self.focal_px * projection_radius(self.projection, t) * (1 + self.k1 * t**2 + self.k2 * t**4)

    def _radius_slope(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        p = projection_radius(self.projection, t)
        dp = _projection_slope(self.projection, t)
        d = 1 + self.k1 * t**2 + self.k2 * t**4
        dd = 2 * self.k1 * t + 4 * self.k2 * t**3
        return self.focal_px * (dp * d + p * dd)

    @cached_property
    def theta_max_rad(self) -> float:
        """Largest off-axis angle where the radius still grows with angle.

        Beyond it the mapping is not one-to-one (the projection's own limit, or
        where strong distortion terms fold the radius back).
        """
        limit = _PROJECTION_LIMIT_RAD[self.projection]
        grid = np.linspace(0.0, limit, 20001)
        bad = np.nonzero(self._radius_slope(grid) <= 0)[0]
        if bad.size == 0:
            return float(limit)
        return float(grid[max(bad[0] - 1, 0)])

    @cached_property
    def _inverse_table(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        theta = np.linspace(0.0, self.theta_max_rad, 4097)
        return self.radius_px(theta), theta

    @property
    def radius_max_px(self) -> float:
        """Image radius at :attr:`theta_max_rad`."""
        return float(self._inverse_table[0][-1])

    def theta_from_radius(self, r_px: ArrayLike) -> NDArray[np.float64]:
        """Numerical inverse of :meth:`radius_px`; NaN beyond :attr:`radius_max_px`.

        A table gives the start, then safeguarded Newton steps converge to
        machine precision (well below 1e-9 px in radius).
        """
        r = np.asarray(r_px, dtype=float)
        r_tab, t_tab = self._inverse_table
        t = np.interp(r, r_tab, t_tab)
        lo = np.zeros_like(t)
        hi = np.full_like(t, self.theta_max_rad)
        for _ in range(40):
            f = self.radius_px(t) - r
            lo = np.where(f < 0, t, lo)
            hi = np.where(f > 0, t, hi)
            step = f / self._radius_slope(t)
            t_new = t - step
            outside = (t_new < lo) | (t_new > hi)
            t_new = np.where(outside, 0.5 * (lo + hi), t_new)
            done = np.abs(t_new - t) <= 1e-15 * np.maximum(1.0, np.abs(t))
            t = t_new
            if np.all(done | ~np.isfinite(t)):
                break
        invalid = ~np.isfinite(r) | (r < 0) | (r > r_tab[-1] * (1 + 1e-12))
        return np.where(invalid, np.nan, t)

    def direction_to_pixel(self, u: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Pixel ``(x_px, y_px)`` where light from direction ``u`` lands.

        Parameters
        ----------
        u : array_like of shape (..., 3)
            Directions in the camera frame (need not be normalised).

        Returns
        -------
        x_px, y_px : ndarray of shape (...)
            NaN where the direction lies beyond :attr:`theta_max_rad`.
        """
        u = np.asarray(u, dtype=float)
        return self._components_to_pixel(u[..., 0], u[..., 1], u[..., 2])

    def _components_to_pixel(self, x: NDArray[np.float64], y: NDArray[np.float64],
                             z: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """:meth:`direction_to_pixel` for a direction given as three component arrays."""
        ux, uy, uz = _unit_components(x, y, z)
        rho = np.hypot(ux, uy)
        theta = np.arctan2(rho, uz)  # better conditioned than arccos near the axis
        r = self.radius_px(np.where(theta <= self.theta_max_rad, theta, np.nan))
        with np.errstate(invalid="ignore", divide="ignore"):
            cos_phi = np.where(rho > 0, ux / rho, 1.0)
            sin_phi = np.where(rho > 0, uy / rho, 0.0)
        return self.cx + r * cos_phi, self.cy + r * sin_phi

    def pixel_to_direction(self, x_px: ArrayLike, y_px: ArrayLike) -> NDArray[np.float64]:
        """Unit direction ``u`` (shape (..., 3)) seen at pixel ``(x_px, y_px)``; NaN outside the lens."""
        dx = np.asarray(x_px, dtype=float) - self.cx
        dy = np.asarray(y_px, dtype=float) - self.cy
        dx, dy = np.broadcast_arrays(dx, dy)
        r = np.hypot(dx, dy)
        theta = self.theta_from_radius(r)
        s = np.sin(theta)
        with np.errstate(invalid="ignore", divide="ignore"):
            cos_phi = np.where(r > 0, dx / r, 1.0)
            sin_phi = np.where(r > 0, dy / r, 0.0)
        return np.stack([s * cos_phi, s * sin_phi, np.cos(theta)], axis=-1)


@dataclass(frozen=True)
class GratingModel:
    """Transmission grating in front of the lens (contract section 2.2).

    Parameters
    ----------
    grooves_per_mm : float
    dispersion_angle_deg : float
        Direction of the grating vector, from image +x towards +y.
    tilt_deg, tilt_azimuth_deg : float
        Tilt of the grating normal from the optical axis and its azimuth.
    """

    grooves_per_mm: float
    dispersion_angle_deg: float
    tilt_deg: float = 0.0
    tilt_azimuth_deg: float = 0.0

    @classmethod
    def from_config(cls, grating: Grating) -> GratingModel:
        return cls(grating.grooves_per_mm, grating.dispersion_angle_deg, grating.tilt_deg,
                   grating.tilt_azimuth_deg)

    @cached_property
    def normal(self) -> NDArray[np.float64]:
        """Unit grating normal ``n`` (towards the sky)."""
        t, a = np.radians(self.tilt_deg), np.radians(self.tilt_azimuth_deg)
        return np.array([np.sin(t) * np.cos(a), np.sin(t) * np.sin(a), np.cos(t)])

    @cached_property
    def groove_vector(self) -> NDArray[np.float64]:
        """Unit grating vector ``q`` in the grating plane, perpendicular to the grooves."""
        psi = np.radians(self.dispersion_angle_deg)
        q0 = np.array([np.cos(psi), np.sin(psi), 0.0])
        n = self.normal
        return _normalise(q0 - np.dot(q0, n) * n)

    def diffract(self, u: ArrayLike, wavelength_nm: ArrayLike, order: ArrayLike = 1) -> NDArray[np.float64]:
        """Direction ``u'`` of order ``order`` at ``wavelength_nm`` for a source seen at ``u``.

        Notes
        -----
        The vector grating equation in direction-cosine form,
        ``u'_t = u_t + m lambda / d q`` (Harvey & Vernold 1998, Appl. Opt. 37,
        8158), which holds for any incidence (conical diffraction included).
        Returns NaN where ``|u'_t| >= 1`` (evanescent) or where ``u`` lies
        behind the grating plane.
        """
        return np.stack(self._diffract_split(*self._split(u), wavelength_nm, order), axis=-1)

    def _split(self, u: ArrayLike) -> tuple[tuple[NDArray[np.float64], ...], NDArray[np.float64]]:
        """Tangential part ``u_t`` (three component arrays) and normal component ``u.n`` of the unit ``u``.

        They depend only on the source direction, so a caller evaluating many
        wavelengths for the same sources computes them once.
        """
        u = np.asarray(u, dtype=float)
        ux, uy, uz = _unit_components(u[..., 0], u[..., 1], u[..., 2])
        n = self.normal
        un = ux * n[0] + uy * n[1] + uz * n[2]  # _dot's order
        return (ux - un * n[0], uy - un * n[1], uz - un * n[2]), un

    def _diffract_split(self, u_t: tuple[NDArray[np.float64], ...], un: NDArray[np.float64],
                        wavelength_nm: ArrayLike, order: ArrayLike) -> tuple[NDArray[np.float64], ...]:
        """:meth:`diffract` from :meth:`_split`'s parts, as three component arrays.

        Broadcasts the parts against ``wavelength_nm``.
        """
        n, q = self.normal, self.groove_vector
        lam = np.asarray(wavelength_nm, dtype=float)
        m = np.asarray(order, dtype=float)
        # m * lambda / d with lambda in mm: the tangential direction-cosine step of one order.
        shift = m * lam * 1e-6 * self.grooves_per_mm
        wx, wy, wz = u_t[0] + shift * q[0], u_t[1] + shift * q[1], u_t[2] + shift * q[2]
        w2 = wx * wx + wy * wy + wz * wz  # _dot's order
        ok = (w2 < 1.0) & (un > 0)
        nz = np.sqrt(np.where(ok, 1.0 - w2, np.nan))
        return wx + nz * n[0], wy + nz * n[1], wz + nz * n[2]

    def undiffract(self, u_prime: ArrayLike, wavelength_nm: ArrayLike, order: ArrayLike = 1) -> NDArray[np.float64]:
        """Inverse of :meth:`diffract`: the zeroth-order direction whose order ``order`` lands at ``u_prime``."""
        return self.diffract(u_prime, wavelength_nm, -np.asarray(order))


@dataclass(frozen=True)
class SpectralGeometry:
    """Where the spectrum of a point source falls on the sensor.

    Maps (zeroth-order pixel, wavelength, order) to a pixel and back. All
    methods broadcast ``x0_px, y0_px`` against ``wavelength_nm`` (or the pixel
    arrays) with numpy rules.

    Examples
    --------
    >>> geo = SpectralGeometry(LensModel("equidistant", 1000.0, 639.5, 479.5),
    ...                        GratingModel(600.0, 0.0))
    >>> x, y = geo.spectrum_pixel(639.5, 479.5, 500.0)
    >>> round(float(x - 639.5), 3)  # f * arcsin(m lambda N) for the equidistant lens
    304.693
    """

    lens: LensModel
    grating: GratingModel

    # step of the central difference in wavelength: the pixel curve is smooth on
    # nm scales, and 0.05 nm keeps round-off (~1e-13 px / 0.05 nm) negligible.
    _DLAM_NM = 0.05

    @classmethod
    def from_station(cls, station: Station) -> SpectralGeometry:
        return cls(LensModel.from_config(station.lens), GratingModel.from_config(station.grating))

    @classmethod
    def from_values(cls, values: Mapping[str, Any]) -> SpectralGeometry:
        """From flat values named as in ``/calibration`` (``projection``, ``focal_px``, ``cx``, ``cy``,
        ``k1``, ``k2``, ``grooves_per_mm``, ``dispersion_angle_deg``, ``tilt_deg``, ``tilt_azimuth_deg``;
        distortion and tilt default to 0).

        Raises
        ------
        KeyError, ValueError, TypeError
            A value is missing or not a number.
        """
        return cls(LensModel(str(values["projection"]), float(values["focal_px"]), float(values["cx"]),
                             float(values["cy"]), float(values.get("k1", 0.0)), float(values.get("k2", 0.0))),
                   GratingModel(float(values["grooves_per_mm"]), float(values["dispersion_angle_deg"]),
                                float(values.get("tilt_deg", 0.0)), float(values.get("tilt_azimuth_deg", 0.0))))

    def with_grating(self, **changes: float) -> SpectralGeometry:
        """A copy with some grating values replaced (e.g. ``grooves_per_mm=601.2``)."""
        return SpectralGeometry(self.lens, dataclasses.replace(self.grating, **changes))

    def with_lens(self, **changes: float) -> SpectralGeometry:
        """A copy with some lens values replaced (e.g. ``focal_px=1012.0``)."""
        return SpectralGeometry(dataclasses.replace(self.lens, **changes), self.grating)

    def spectrum_pixel(self, x0_px: ArrayLike, y0_px: ArrayLike, wavelength_nm: ArrayLike,
                       order: int = 1) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Pixel of order ``order`` at ``wavelength_nm`` for a zeroth order at ``(x0_px, y0_px)``.

        Order 0 returns the zeroth-order pixel itself. NaN where the light does
        not reach the sensor plane (evanescent order, beyond the lens field).
        """
        u_t, un = self._source(x0_px, y0_px)
        return self._curve(u_t, un, np.asarray(wavelength_nm, dtype=float), order)

    def _source(self, x0_px: ArrayLike,
                y0_px: ArrayLike) -> tuple[tuple[NDArray[np.float64], ...], NDArray[np.float64]]:
        """Per-source invariants of the curve: tangential part and normal component of the
        zeroth-order direction (:meth:`GratingModel._split`), computed once per call."""
        return self.grating._split(self.lens.pixel_to_direction(x0_px, y0_px))

    def _curve(self, u_t: tuple[NDArray[np.float64], ...], un: NDArray[np.float64], lam: NDArray[np.float64],
               order: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Curve pixels at wavelengths ``lam`` from :meth:`_source`'s parts.

        ``lam`` may carry extra leading axes (several wavelength sets in one
        vectorised call); every element is computed exactly as alone.
        """
        return self.lens._components_to_pixel(*self.grating._diffract_split(u_t, un, lam, order))

    def _curve3(self, u_t: tuple[NDArray[np.float64], ...], un: NDArray[np.float64], lam: NDArray[np.float64],
                order: int) -> tuple[NDArray[np.float64], ...]:
        """Curve pixel and central-difference derivative at ``lam`` in one batched evaluation.

        Returns ``(xs, ys, dx, dy)`` equal to :meth:`spectrum_pixel` and
        :meth:`_derivative` element by element (same arithmetic).
        """
        h = self._DLAM_NM
        lam = np.broadcast_to(lam, np.broadcast_shapes(un.shape, np.shape(lam)))  # stack on a new leading axis
        x, y = self._curve(u_t, un, np.stack([lam, lam + h, lam - h]), order)
        return x[0], y[0], (x[1] - x[2]) / (2 * h), (y[1] - y[2]) / (2 * h)

    def zeroth_pixel(self, x_px: ArrayLike, y_px: ArrayLike, wavelength_nm: ArrayLike,
                     order: int = 1) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Zeroth-order pixel whose order ``order`` at ``wavelength_nm`` lands on ``(x_px, y_px)``.

        Lets the tracker place a zeroth order that is off the sensor or
        saturated from a recognised line in its spectrum.
        """
        u_prime = self.lens.pixel_to_direction(x_px, y_px)
        lam = np.asarray(wavelength_nm, dtype=float)
        u_prime, lam = np.broadcast_arrays(u_prime, lam[..., None])
        return self.lens.direction_to_pixel(self.grating.undiffract(u_prime, lam[..., 0], order))

    def _derivative(self, x0_px: ArrayLike, y0_px: ArrayLike, wavelength_nm: ArrayLike,
                    order: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        lam = np.asarray(wavelength_nm, dtype=float)
        h = self._DLAM_NM
        # lambda + h and lambda - h in one vectorised call, the source's direction split once
        u_t, un = self._source(x0_px, y0_px)
        lam = np.broadcast_to(lam, np.broadcast_shapes(un.shape, lam.shape))  # stack on a new leading axis
        x, y = self._curve(u_t, un, np.stack([lam + h, lam - h]), order)
        return (x[0] - x[1]) / (2 * h), (y[0] - y[1]) / (2 * h)

    def dispersion_nm_per_px(self, x0_px: ArrayLike, y0_px: ArrayLike, wavelength_nm: ArrayLike,
                             order: int = 1) -> NDArray[np.float64]:
        """Local dispersion along the spectrum curve, nm per pixel of arc length."""
        dx, dy = self._derivative(x0_px, y0_px, wavelength_nm, order)
        return 1.0 / np.hypot(dx, dy)

    def direction(self, x0_px: ArrayLike, y0_px: ArrayLike, wavelength_nm: ArrayLike,
                  order: int = 1) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Unit image vector ``(dx, dy)`` along the spectrum towards longer wavelength."""
        dx, dy = self._derivative(x0_px, y0_px, wavelength_nm, order)
        norm = np.hypot(dx, dy)
        return dx / norm, dy / norm

    def locate(self, x0_px: ArrayLike, y0_px: ArrayLike, x_px: ArrayLike, y_px: ArrayLike, *,
               order: int = 1, iterations: int = 4) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Wavelength and cross-dispersion offset of pixels near a spectrum.

        Parameters
        ----------
        x0_px, y0_px : array_like
            Zeroth-order pixel.
        x_px, y_px : array_like
            Pixels near the order-``order`` spectrum of that source.

        Returns
        -------
        wavelength_nm : ndarray
            Wavelength of the nearest point of the spectrum curve.
        offset_px : ndarray
            Signed distance from that point, positive along ``(-dy, dx)`` where
            ``(dx, dy)`` is :meth:`direction`: the tangent turned by +90 deg
            in image coordinates (clockwise on screen, since y points down).

        Notes
        -----
        The start is exact for pixels on the curve: the tangential direction
        cosines of order ``m`` differ from the zeroth order's by
        ``m lambda / d`` along ``q``. Newton steps along the local tangent
        then find the nearest point of the curve for pixels beside it.
        """
        u0 = self.lens.pixel_to_direction(x0_px, y0_px)
        u_t, un = self.grating._split(u0)  # before broadcasting: one split per source
        u1 = self.lens.pixel_to_direction(x_px, y_px)
        u0, u1 = np.broadcast_arrays(u0, u1)
        n, q = self.grating.normal, self.grating.groove_vector
        step = _dot(u1 - _dot(u1, n)[..., None] * n - (u0 - _dot(u0, n)[..., None] * n), q)
        lam = step / (order * 1e-6 * self.grating.grooves_per_mm)
        x = np.broadcast_to(np.asarray(x_px, dtype=float), lam.shape)
        y = np.broadcast_to(np.asarray(y_px, dtype=float), lam.shape)
        # the source's direction split once for the whole solve; each step evaluates
        # lambda, lambda + h and lambda - h in one batched call
        for _ in range(iterations):
            xs, ys, dx, dy = self._curve3(u_t, un, lam, order)
            lam = lam + ((x - xs) * dx + (y - ys) * dy) / (dx * dx + dy * dy)
        xs, ys, dx, dy = self._curve3(u_t, un, lam, order)
        norm = np.hypot(dx, dy)
        tx, ty = dx / norm, dy / norm
        offset = (x - xs) * (-ty) + (y - ys) * tx
        return lam, offset
