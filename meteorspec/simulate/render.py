"""Render the frames of a simulated event: meteor orders, stars, sky, noise, encoding.

For every exposure (a frame, or a field of an interlaced camera, each at its
own time) the meteor's motion inside the exposure is cut into substeps short
enough that the zeroth order and every part of the spectrum move less than
0.4 px per substep. Each substep puts its share of the light-curve energy at
the zeroth-order pixel and at ``SpectralGeometry.spectrum_pixel`` of every
emission component, with bilinear weights; one Gaussian PSF convolution
(sigma ``spec.psf_sigma_px``, default 1.2 px) of that splat follows, done only
in the bounding box it touches (stars: once per star, scaled per exposure by
the scintillation). Bilinear splatting and a normalised Gaussian kernel both
conserve flux and centroid, so the truth's energies and centroids are exact
for the rendered image (up to light falling off the sensor).

Energy units: the emitted energy of a component in an exposure is
``share * peak_energy_adu_s * int(rate dt)``. Its first-order image holds
``FIRST_ORDER_SHARE * T(lambda, h) * response(lambda)`` of that, in linear ADU; the
zeroth order holds ``ZEROTH_ORDER_SHARE`` of the transmitted, response-weighted total.

Atmosphere: when the true station has ``[pointing]`` (and ``spec.atmosphere`` is not
False), ``T(lambda, h)`` is :func:`meteorspec.extinction.transmission` at the altitude
``h`` of the meteor in each substep (of each star, for the stars), with
:meth:`~meteorspec.extinction.ExtinctionModel.for_station`; otherwise ``T = 1``. The
pipeline divides by the same functions. Sharing them is deliberate and safe: they are
tested on their own against external references (Kasten & Young 1989 airmass, Bucholtz
1995 Rayleigh depth; tests/test_extinction.py), so the simulator does not test them
against themselves; without this the pipeline divided rendered events by an atmosphere
that was never applied.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter

from ..config import Camera, Station
from ..extinction import ExtinctionModel, camera_to_horizon, pixel_altaz, transmission
from ..optics import SpectralGeometry
from ..video import FrameStack, encode
from .emission import WAVELENGTH_RANGE_NM, EmissionModel, build_emission
from .scene import LightCurve, Stars, Trajectory, make_light_curve, make_stars, make_trajectory, star_spectrum
from .spec import EventSpec

#: Share of the emitted energy (times the response) recorded in diffraction order +1.
FIRST_ORDER_SHARE = 0.5
#: Share of the response-weighted emitted energy recorded in the zeroth order.
ZEROTH_ORDER_SHARE = 0.25
#: Share for any other order listed in the station file (|m| != 1 or m = -1); invented.
OTHER_ORDER_SHARE = 0.05
#: Largest motion of any image point within one substep, px (the brief asks < 0.5 px).
MAX_SUBSTEP_PX = 0.4
#: Star brightness scatter per exposure (scintillation), 1 sigma, relative; typical of
#: small-aperture video at moderate altitude (common practice, from memory).
SCINTILLATION = 0.07
_DEFAULT_READ_NOISE_ADU = 1.5
_DEFAULT_GAIN_E_PER_ADU = 1.0


def order_share(order: int) -> float:
    return FIRST_ORDER_SHARE if order == 1 else OTHER_ORDER_SHARE


@dataclass(frozen=True)
class Exposure:
    """One exposure: a whole frame, or one field (rows ``row_start::row_step``) of a frame."""

    index: int
    frame: int
    t_start_s: float
    t_end_s: float
    row_start: int
    row_step: int

    @property
    def time_s(self) -> float:
        return 0.5 * (self.t_start_s + self.t_end_s)


def exposures(camera: Camera, fps: float, n_frames: int) -> list[Exposure]:
    """Frames, or fields in time order (contract section 1), with the rows each one fills."""
    if not camera.interlaced:
        return [Exposure(k, k, k / fps, (k + 1) / fps, 0, 1) for k in range(n_frames)]
    first = 0 if camera.field_order == "top" else 1
    out = []
    for j in range(2 * n_frames):
        start = first if j % 2 == 0 else 1 - first
        out.append(Exposure(j, j // 2, j / (2 * fps), (j + 1) / (2 * fps), start, 2))
    return out


@dataclass(frozen=True, eq=False)
class ExposureTruth:
    """Noise-free facts of one exposure, for the truth file.

    ``first_order_on_sensor`` is the share of the response-weighted first-order
    energy whose splat lands on the sensor (0 when the meteor is dark);
    ``saturated`` means a pixel lit by the meteor is at or above the clip level.
    ``altitude_deg`` is the meteor's altitude at mid-exposure (NaN when no atmosphere is
    rendered: no ``[pointing]``, or ``spec.atmosphere`` False).
    """

    index: int
    time_s: float
    x_mid_px: float
    y_mid_px: float
    x_centroid_px: float
    y_centroid_px: float
    emitted_energy_adu: float
    zeroth_flux_adu: float
    saturated: bool
    off_frame: bool
    first_order_on_sensor: float
    n_substeps: int
    altitude_deg: float = float("nan")


@dataclass(frozen=True, eq=False)
class Rendered:
    """Everything the writer needs.

    Attributes
    ----------
    stored : ndarray of shape (n_frames, height, width)
        Encoded camera values (uint8 or uint16).
    linear_clean : ndarray of shape (n_frames, height, width), float32
        Noise-free linear signal (meteor + stars + sky) before encoding.
    transmission : ndarray of shape (n_exposures, n_components)
        Energy-weighted mean atmospheric transmission of each emission component over each
        exposure (1.0 everywhere without an atmosphere; for a dark exposure, at its middle).
    atmosphere : ExtinctionModel or None
        The atmosphere applied (None: none).
    star_altitude_deg : ndarray of shape (n_stars,)
        NaN without an atmosphere.
    background_adu : ndarray of shape (height, width), float32
        The background's true mean: sky plus the stars over one exposure without their
        twinkle (linear ADU), what a background estimate from infinitely many frames gives.
    """

    stored: np.ndarray
    linear_clean: np.ndarray
    exposures: list[Exposure]
    truths: list[ExposureTruth]
    emission: EmissionModel
    response: np.ndarray
    stars: Stars
    star_zeroth_adu_s: np.ndarray
    trajectory: Trajectory
    light_curve: LightCurve
    station: Station
    geometry: SpectralGeometry
    transmission: np.ndarray
    atmosphere: ExtinctionModel | None
    star_altitude_deg: np.ndarray
    background_adu: np.ndarray | None = None

    def frame_stack(self) -> FrameStack:
        """The rendered video as the pipeline sees it after decoding (no file written)."""
        fields = 2 if self.station.camera.interlaced else 1
        exposure_s = self.exposures[0].t_end_s - self.exposures[0].t_start_s
        return FrameStack(stored=self.stored, camera=self.station.camera, fps=1.0 / (exposure_s * fields))


def _splat(x: np.ndarray, y: np.ndarray, w: np.ndarray, width: int, height: int) -> np.ndarray:
    """Bilinear splat of weights ``w`` at ``(x, y)`` into a (height, width) float64 image."""
    x, y, w = (np.ravel(a) for a in np.broadcast_arrays(x, y, w))
    ok = np.isfinite(x) & np.isfinite(y) & (w != 0) & (x > -1) & (x < width) & (y > -1) & (y < height)
    x, y, w = x[ok], y[ok], w[ok]
    ix = np.floor(x).astype(np.int64)
    iy = np.floor(y).astype(np.int64)
    fx, fy = x - ix, y - iy
    xs = np.concatenate([ix, ix + 1, ix, ix + 1])
    ys = np.concatenate([iy, iy, iy + 1, iy + 1])
    ws = np.concatenate([w * (1 - fx) * (1 - fy), w * fx * (1 - fy), w * (1 - fx) * fy, w * fx * fy])
    inside = (xs >= 0) & (xs < width) & (ys >= 0) & (ys < height)
    flat = np.bincount(ys[inside] * width + xs[inside], weights=ws[inside], minlength=width * height)
    return flat.reshape(height, width)


@dataclass(frozen=True, eq=False)
class _Patch:
    """A PSF-convolved splat cut to the part of the sensor it touches: ``img[y0:y0+h, x0:x0+w]``."""

    y0: int
    x0: int
    data: np.ndarray

    def add_to(self, image: np.ndarray, scale: float = 1.0) -> None:
        h, w = self.data.shape
        image[self.y0:self.y0 + h, self.x0:self.x0 + w] += scale * self.data


def _psf_patch(x: np.ndarray, y: np.ndarray, w: np.ndarray, width: int, height: int,
               sigma_px: float) -> _Patch | None:
    """Bilinear splat then Gaussian PSF, computed only in the bounding box of the points.

    Identical to splatting into the whole frame and filtering it with zero padding
    (``mode="constant"``: light beyond the edge is lost, not mirrored): the box gets a
    margin of the kernel radius and is cut to the frame afterwards.
    """
    x, y, w = (np.ravel(a) for a in np.broadcast_arrays(x, y, w))
    ok = np.isfinite(x) & np.isfinite(y) & (w != 0) & (x > -1) & (x < width) & (y > -1) & (y < height)
    if not np.any(ok):
        return None
    x, y, w = x[ok], y[ok], w[ok]
    radius = int(4.0 * sigma_px + 0.5) + 1  # scipy's truncate=4 kernel radius, plus the splat's pixel
    bx0 = max(int(np.floor(x.min())) - radius, 0)
    by0 = max(int(np.floor(y.min())) - radius, 0)
    bx1 = min(int(np.floor(x.max())) + 1 + radius, width - 1)
    by1 = min(int(np.floor(y.max())) + 1 + radius, height - 1)
    # pad by the radius on every side so that zero padding at the frame edge is reproduced
    pw, ph = bx1 - bx0 + 1 + 2 * radius, by1 - by0 + 1 + 2 * radius
    local = _splat(x - bx0 + radius, y - by0 + radius, w, pw, ph)
    # points beyond the frame edge were dropped above only if fully outside; cut the rest
    lx0, ly0 = radius - bx0, radius - by0  # local index of frame pixel (0, 0)
    local[:, :max(lx0, 0)] = 0.0
    local[:max(ly0, 0), :] = 0.0
    local[:, lx0 + width:] = 0.0
    local[ly0 + height:, :] = 0.0
    local = gaussian_filter(local, sigma_px, mode="constant")
    return _Patch(by0, bx0, local[radius:radius + by1 - by0 + 1, radius:radius + bx1 - bx0 + 1])


def _response(spec: EventSpec, station: Station, wavelength_nm: np.ndarray) -> np.ndarray:
    if spec.flat_response or station.response is None:
        return np.ones_like(wavelength_nm)
    r = station.response(wavelength_nm)
    return np.nan_to_num(r / np.max(station.response.response), nan=0.0)


def _continuum_step_nm(spec: EventSpec, geo: SpectralGeometry) -> float:
    lam = np.linspace(*WAVELENGTH_RANGE_NM, 12)
    disp = geo.dispersion_nm_per_px(spec.start_px[0], spec.start_px[1], lam, order=1)
    disp = disp[np.isfinite(disp)]
    if disp.size == 0:
        return 0.25
    return float(np.clip(0.4 * disp.min(), 0.05, 2.0))


def _substeps(traj: Trajectory, geo: SpectralGeometry, orders: tuple[int, ...], t0: float, t1: float) -> int:
    t = np.linspace(t0, t1, 9)
    x0, y0 = traj.pixel(t)
    lam = np.array([WAVELENGTH_RANGE_NM[0], 600.0, WAVELENGTH_RANGE_NM[1]])
    paths = [np.nansum(np.hypot(np.diff(x0), np.diff(y0)))]
    for m in orders:
        xs, ys = geo.spectrum_pixel(x0[:, None], y0[:, None], lam[None, :], m)
        paths.append(np.nanmax(np.nansum(np.hypot(np.diff(xs, axis=0), np.diff(ys, axis=0)), axis=0),
                               initial=0.0))
    return max(1, int(np.ceil(max(paths) / MAX_SUBSTEP_PX)))


def _altitude_deg(direction: np.ndarray, to_enu: np.ndarray | None) -> np.ndarray:
    """Altitude (deg) of camera-frame unit vectors ``direction[..., 3]``; NaN without a rotation."""
    if to_enu is None:
        return np.full(np.shape(direction)[:-1], np.nan)
    up = np.asarray(direction, float) @ to_enu[2]  # ENU "up" component of R @ u
    return np.degrees(np.arcsin(np.clip(up, -1.0, 1.0)))


def _transmission(wavelength_nm: np.ndarray, altitude_deg: np.ndarray,
                  atmosphere: ExtinctionModel | None) -> np.ndarray:
    """``T`` of shape ``altitude.shape + wavelength.shape``; 1 without an atmosphere, 0 below the horizon."""
    alt = np.asarray(altitude_deg, float)
    if atmosphere is None:
        return np.ones(alt.shape + np.shape(wavelength_nm))
    t = transmission(np.asarray(wavelength_nm)[(None,) * alt.ndim], alt[..., None], model=atmosphere)
    return np.nan_to_num(t, nan=0.0)  # extinction.transmission is NaN below the horizon: no light


def render_event(spec: EventSpec, *, station: Station | None = None) -> Rendered:
    """Render all frames of ``spec`` (deterministic in ``spec.seed`` and ``spec.noise_draw``).

    Parameters
    ----------
    spec : EventSpec
    station : Station, optional
        The true station; default ``spec.true_station()``.

    Returns
    -------
    Rendered
    """
    station = spec.true_station() if station is None else station
    cam = station.camera
    width, height = cam.width, cam.height
    geo = SpectralGeometry.from_station(station)
    orders = tuple(station.grating.orders)
    traj = make_trajectory(spec, geo)
    lc = make_light_curve(spec)
    model = build_emission(spec, continuum_step_nm=_continuum_step_nm(spec, geo))
    resp = _response(spec, station, model.wavelength_nm)
    atmosphere = spec.atmosphere_model(station)
    to_enu = None if atmosphere is None else camera_to_horizon(station.pointing)

    stars = make_stars(spec, geo, width, height)
    star_lam = np.arange(WAVELENGTH_RANGE_NM[0], WAVELENGTH_RANGE_NM[1], max(model.continuum_step_nm, 0.5))
    star_resp = _response(spec, station, star_lam)
    star_zeroth = np.zeros(len(stars))
    star_patches: list[_Patch | None] = []
    star_alt = np.full(len(stars), np.nan)
    if atmosphere is not None and len(stars):
        star_alt = pixel_altaz(geo.lens, station.pointing, stars.x_px, stars.y_px)[0]
    for i in range(len(stars)):
        # each star seen through the air at its own altitude
        sp = star_spectrum(stars.temperature_k[i], star_lam) * _transmission(star_lam, star_alt[i], atmosphere)
        star_zeroth[i] = ZEROTH_ORDER_SHARE * stars.energy_adu_s[i] * float(np.sum(sp * star_resp))
        px, py, pw = [np.array([stars.x_px[i]])], [np.array([stars.y_px[i]])], [np.array([star_zeroth[i]])]
        for m in orders:
            xs, ys = geo.spectrum_pixel(stars.x_px[i], stars.y_px[i], star_lam, m)
            px.append(xs)
            py.append(ys)
            pw.append(order_share(m) * stars.energy_adu_s[i] * sp * star_resp)
        # per second of exposure; scaled per exposure by its length and the scintillation
        star_patches.append(_psf_patch(np.concatenate(px), np.concatenate(py), np.concatenate(pw),
                                       width, height, spec.psf_sigma_px))

    # sky: inside the lens field and above its 90-degree circle, with a gentle gradient
    yy, xx = np.mgrid[0:height, 0:width]
    uz = geo.lens.pixel_to_direction(xx, yy)[..., 2]
    sky = np.where(np.isfinite(uz) & (uz > 0), spec.sky_adu * (0.9 + 0.2 * yy / max(height - 1, 1)), 0.0)
    if not spec.noise:
        sky = np.zeros_like(sky)

    full = cam.full_scale_adu
    lin_sat = full * ((cam.saturation_adu - cam.black_level_adu) / full) ** (1.0 / cam.gamma)
    # the stars' twinkle is noise too: a fresh draw with each noise draw (draw 0: the scene's own)
    rng_star = np.random.default_rng([spec.seed, 404] + ([int(spec.noise_draw)] if spec.noise_draw else []))
    rng_noise = np.random.default_rng([spec.seed, 303] + ([int(spec.noise_draw)] if spec.noise_draw else []))
    read_noise = _DEFAULT_READ_NOISE_ADU if cam.read_noise_adu is None else cam.read_noise_adu
    gain = _DEFAULT_GAIN_E_PER_ADU if cam.gain_e_per_adu is None else cam.gain_e_per_adu

    exps = exposures(cam, spec.fps, spec.n_frames)
    clean = np.zeros((spec.n_frames, height, width), dtype=np.float32)
    truths = []
    first_w = {m: order_share(m) * model.share * resp for m in orders}
    zeroth_w = ZEROTH_ORDER_SHARE * model.share * resp
    trans_table = np.ones((len(exps), model.wavelength_nm.size))
    for ex in exps:
        energy = float(lc.integral(ex.t_start_s, ex.t_end_s)) * spec.peak_energy_adu_s
        x_mid, y_mid = (float(v) for v in traj.pixel(ex.time_s))
        alt_mid = float(_altitude_deg(traj.direction(ex.time_s), to_enu))
        if atmosphere is not None:
            trans_table[ex.index] = _transmission(model.wavelength_nm, alt_mid, atmosphere)
        xc = yc = float("nan")
        n_sub = 0
        on_sensor = 0.0
        zeroth_flux = 0.0
        patch = None
        if energy > 0:
            n_sub = _substeps(traj, geo, orders, ex.t_start_s, ex.t_end_s)
            edges = np.linspace(ex.t_start_s, ex.t_end_s, n_sub + 1)
            w = lc.integral(edges[:-1], edges[1:]) * spec.peak_energy_adu_s
            use = w > 0
            tm = 0.5 * (edges[:-1] + edges[1:])[use]
            w = w[use]
            x0, y0 = traj.pixel(tm)
            xc, yc = float(np.sum(w * x0) / w.sum()), float(np.sum(w * y0) / w.sum())
            # (substep, component) transmission along the meteor's line of sight
            trans = _transmission(model.wavelength_nm, _altitude_deg(traj.direction(tm), to_enu), atmosphere)
            if atmosphere is not None:
                trans_table[ex.index] = (w @ trans) / w.sum()
            zeroth_sub = w * (trans @ zeroth_w)
            zeroth_flux = float(zeroth_sub.sum())
            pts_x, pts_y, pts_w = [x0], [y0], [zeroth_sub]
            wanted = deposited = 0.0
            for m in orders:
                xs, ys = geo.spectrum_pixel(x0[:, None], y0[:, None], model.wavelength_nm[None, :], m)
                weights = w[:, None] * first_w[m][None, :] * trans
                inside = np.isfinite(xs) & np.isfinite(ys) & (xs > -0.5) & (xs < width - 0.5) & \
                    (ys > -0.5) & (ys < height - 0.5)
                wanted += float(weights.sum())
                deposited += float(weights[inside].sum())
                pts_x.append(xs.ravel())
                pts_y.append(ys.ravel())
                pts_w.append(weights.ravel())
            on_sensor = deposited / wanted if wanted > 0 else 0.0
            patch = _psf_patch(np.concatenate(pts_x), np.concatenate(pts_y), np.concatenate(pts_w),
                               width, height, spec.psf_sigma_px)
        total = sky.copy()
        if patch is not None:
            patch.add_to(total)
        if len(stars):
            expo = ex.t_end_s - ex.t_start_s
            factor = np.ones(len(stars))
            if spec.noise:
                factor = np.clip(1.0 + SCINTILLATION * rng_star.standard_normal(len(stars)), 0.0, None)
            for i, sp_patch in enumerate(star_patches):
                if sp_patch is not None:
                    sp_patch.add_to(total, expo * factor[i])
        rows = slice(ex.row_start, None, ex.row_step)
        clean[ex.frame, rows] = total[rows]
        saturated = False
        if patch is not None:
            # a pixel of this exposure's rows, lit by the meteor (> 1 ADU), at or above the clip level
            h, w_ = patch.data.shape
            first = (ex.row_start - patch.y0) % ex.row_step
            lit = patch.data[first::ex.row_step] > 1.0
            level = total[patch.y0 + first:patch.y0 + h:ex.row_step, patch.x0:patch.x0 + w_]
            saturated = bool(np.any(lit & (level >= lin_sat)))
        off = not (np.isfinite(x_mid) and np.isfinite(y_mid) and -0.5 <= x_mid <= width - 0.5
                   and -0.5 <= y_mid <= height - 0.5)
        truths.append(ExposureTruth(
            index=ex.index, time_s=ex.time_s, x_mid_px=x_mid, y_mid_px=y_mid, x_centroid_px=xc,
            y_centroid_px=yc, emitted_energy_adu=energy, zeroth_flux_adu=zeroth_flux,
            saturated=saturated, off_frame=off, first_order_on_sensor=on_sensor, n_substeps=n_sub,
            altitude_deg=alt_mid))

    background = sky.copy()
    for sp_patch in star_patches:
        if sp_patch is not None:
            sp_patch.add_to(background, exps[0].t_end_s - exps[0].t_start_s)
    stored = np.empty(clean.shape, dtype=np.uint8 if cam.bit_depth <= 8 else np.uint16)
    for k in range(spec.n_frames):
        frame = clean[k].astype(np.float64)
        if spec.noise:
            frame = rng_noise.poisson(np.clip(frame, 0.0, None) * gain) / gain
            frame += read_noise * rng_noise.standard_normal(frame.shape)
        stored[k] = encode(frame, cam)
    return Rendered(stored=stored, linear_clean=clean, exposures=exps, truths=truths,
                    emission=model, response=resp, stars=stars, star_zeroth_adu_s=star_zeroth,
                    trajectory=traj, light_curve=lc, station=station, geometry=geo,
                    transmission=trans_table, atmosphere=atmosphere, star_altitude_deg=star_alt,
                    background_adu=background.astype(np.float32))
