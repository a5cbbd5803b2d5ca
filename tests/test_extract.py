"""Curved first-order extraction against frames rendered from a known model.

The frames here are drawn directly from :class:`SpectralGeometry` (the optics
model, itself checked against handbook formulas in ``test_optics.py``) with a
pixel-integrated Gaussian PSF (exact via the error function), so the energy and
wavelength of every line in the image are known exactly.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from types import SimpleNamespace

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.optimize import curve_fit
from scipy.special import erf

from meteorspec.config import Camera
from meteorspec.extract import FrameSpectra, Spectrum, default_wavelength_grid, extract_spectra
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.video import Frame
from test_flux_ratio import _truth_track  # the simulator's positions and light curve as a track

# --------------------------------------------------------------------------- helpers


@dataclass
class LinearTrack:
    """Zeroth order moving at constant velocity, luminous between t_on and t_off."""

    time_s: np.ndarray
    x0_px: float
    y0_px: float
    vx_px_s: float
    vy_px_s: float
    t_on_s: float = -np.inf
    t_off_s: float = np.inf
    flux_adu: np.ndarray = field(default=None)

    def position(self, time_s):
        t = np.asarray(time_s, dtype=float)
        return self.x0_px + self.vx_px_s * t, self.y0_px + self.vy_px_s * t

    def velocity_px_s(self, time_s):
        return self.vx_px_s, self.vy_px_s

    @property
    def x_px(self):
        x, _ = self.position(self.time_s)
        return np.where((self.time_s >= self.t_on_s) & (self.time_s <= self.t_off_s), x, np.nan)

    @property
    def y_px(self):
        _, y = self.position(self.time_s)
        return np.where((self.time_s >= self.t_on_s) & (self.time_s <= self.t_off_s), y, np.nan)

    def __post_init__(self):
        if self.flux_adu is None:
            self.flux_adu = np.ones_like(self.time_s)

    def __bool__(self):
        return True


@dataclass
class FlatBackground:
    """Known flat sky, Poisson + read noise (CCD noise model, common practice)."""

    height: int
    width: int
    sky_adu: float = 0.0
    read_noise_adu: float = 2.0
    gain_e_per_adu: float = 1.0
    star_mask: np.ndarray = None

    def __post_init__(self):
        self.level_adu = np.full((self.height, self.width), self.sky_adu, np.float32)
        if self.star_mask is None:
            self.star_mask = np.zeros((self.height, self.width), bool)

    def residual(self, frame):
        return frame.signal - self.level_adu[frame.y_start_px::frame.y_step_px][: frame.signal.shape[0]]

    def variance(self, frame, residual=None):
        if residual is None:
            residual = self.residual(frame)
        level = self.level_adu[frame.y_start_px::frame.y_step_px][: frame.signal.shape[0]]
        return (self.read_noise_adu**2 + np.clip(level + residual, 0, None) / self.gain_e_per_adu).astype(np.float32)


def pixel_gaussian(img, x, y, energy, sigma):
    """Add pixel-integrated Gaussians (pixel centres at integers) of total ``energy`` at (x, y)."""
    h, w = img.shape
    r = int(np.ceil(5 * sigma)) + 1
    x, y, energy = (np.ravel(a) for a in np.broadcast_arrays(x, y, energy))
    ok = np.isfinite(x) & np.isfinite(y)
    x, y, energy = x[ok], y[ok], energy[ok]
    ix, iy = np.rint(x).astype(int), np.rint(y).astype(int)
    d = np.arange(-r, r + 1)
    gx = ix[:, None] + d
    gy = iy[:, None] + d
    s2 = np.sqrt(2) * sigma
    wx = 0.5 * (erf((gx + 0.5 - x[:, None]) / s2) - erf((gx - 0.5 - x[:, None]) / s2))
    wy = 0.5 * (erf((gy + 0.5 - y[:, None]) / s2) - erf((gy - 0.5 - y[:, None]) / s2))
    stamp = energy[:, None, None] * wy[:, :, None] * wx[:, None, :]
    yy = np.broadcast_to(gy[:, :, None], stamp.shape)
    xx = np.broadcast_to(gx[:, None, :], stamp.shape)
    inside = (xx >= 0) & (xx < w) & (yy >= 0) & (yy < h)
    np.add.at(img, (yy[inside], xx[inside]), stamp[inside])


def render(geo, track, camera, lines, *, n_frames=4, fps=25.0, sigma=1.3, n_sub=24, continuum=None,
           interlaced=False, light=None):
    """Noise-free linear frames: ``lines`` = [(wavelength_nm, energy per exposure, ADU)].

    ``light(t)``: relative emission rate (default constant 1); an exposure then holds the
    energy times the mean rate over its substeps.
    """
    frames = []
    n_exp = 2 * n_frames if interlaced else n_frames
    expo = 1.0 / fps / (2 if interlaced else 1)
    for j in range(n_exp):
        t0, t1 = j * expo, (j + 1) * expo
        img = np.zeros((camera.height, camera.width))
        ts = t0 + (np.arange(n_sub) + 0.5) / n_sub * expo
        lum = (ts >= track.t_on_s) & (ts <= track.t_off_s)
        x0, y0 = track.position(ts[lum])
        comps = list(lines)
        if continuum is not None:
            comps += list(zip(*continuum))
        lam = np.array([c[0] for c in comps])
        en = np.array([c[1] for c in comps])
        if lum.any():
            xs, ys = geo.spectrum_pixel(x0[:, None], y0[:, None], lam[None, :])
            rate = np.ones(ts.size) if light is None else np.asarray(light(ts), dtype=float)
            pixel_gaussian(img, xs, ys, en[None, :] * rate[lum, None] / n_sub, sigma)
        start, step = (j % 2, 2) if interlaced else (0, 1)
        sig = img[start::step].astype(np.float32)
        frames.append(Frame(index=j, time_s=0.5 * (t0 + t1), exposure_s=expo, signal=sig,
                            saturated=np.zeros(sig.shape, bool), y_start_px=start, y_step_px=step))
    return frames


def camera(width=640, height=480, interlaced=False):
    return Camera(width=width, height=height, bit_depth=8, gamma=1.0, saturation_adu=255,
                  interlaced=interlaced)


def line_energy(fs: FrameSpectra, lam_nm, half_nm=25.0):
    wf = fs.whole_flight()
    e, err = wf.integrate(lam_nm - half_nm, lam_nm + half_nm)
    return e, err


def window_energy(fs: FrameSpectra, lam_nm, lines):
    """Whole-flight energy between the midpoints to the neighbouring lines."""
    wl = sorted(l for l, _ in lines)
    i = wl.index(lam_nm)
    lo = 0.5 * (wl[i - 1] + lam_nm) if i else 0.0
    hi = 0.5 * (wl[i + 1] + lam_nm) if i + 1 < len(wl) else 1e9
    return fs.whole_flight().integrate(lo, hi)[0]


def peak_nm(fs: FrameSpectra, lam_nm, half_nm=25.0):
    """Line position: least-squares Gaussian + constant fit to the whole-flight spectrum within +-half_nm."""
    wf = fs.whole_flight()
    sel = (np.abs(wf.wavelength_nm - lam_nm) < half_nm) & ~wf.mask
    x, y = wf.wavelength_nm[sel], wf.flux[sel]

    def model(x, a, mu, s, c):
        return a * np.exp(-0.5 * ((x - mu) / s) ** 2) + c

    p0 = (y.max(), x[np.argmax(y)], half_nm / 4, 0.0)
    p, _ = curve_fit(model, x, y, p0=p0)
    return float(p[1])


def times(n, fps=25.0, interlaced=False):
    if interlaced:
        return (np.arange(2 * n) + 0.5) / (2 * fps)
    return (np.arange(n) + 0.5) / fps


# off-axis fisheye station with a tilted grating: curved spectrum, varying dispersion
FISHEYE = SpectralGeometry(LensModel("equidistant", 330.0, 319.5, 239.5),
                           GratingModel(600.0, 8.0, tilt_deg=4.0, tilt_azimuth_deg=30.0))
LINES = [(517.27, 4000.0), (589.0, 6000.0), (656.28, 3000.0), (777.4, 2500.0)]


# --------------------------------------------------------------------------- tests


def test_flux_conserved_on_curved_off_axis_spectrum():
    # The optics model is the truth here (checked against the grating equation
    # in test_optics.py). Tolerance 1 %: the aperture (+-6 px plus streak) holds
    # all but ~1e-6 of a sigma 1.3 px Gaussian; the rest is the curve's
    # piecewise-linear interpolation (<1e-3 px) and float round-off, so 1 % is
    # a wide bar that any real loss (a missed streak end, a wrong pixel
    # fraction) would exceed.
    cam = camera()
    tr = LinearTrack(times(4), 150.0, 120.0, 400.0, 250.0)
    frames = render(FISHEYE, tr, cam, LINES)
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, FISHEYE, camera=cam, optimal=False)
    for lam, e in LINES:
        got = window_energy(fs, lam, LINES)
        assert_allclose(got, 4 * e, rtol=0.01)
    # per-frame spectra also conserve flux: frame 2 carries a quarter of the line
    f2 = fs.flux[2] * fs.bin_width_nm
    sel = (fs.wavelength_nm > 553.0) & (fs.wavelength_nm < 622.0)
    assert_allclose(np.nansum(f2[sel]), 6000.0, rtol=0.01)
    assert "motion_parallel_to_dispersion" not in fs.flags


@pytest.mark.parametrize("projection", ["equidistant", "equisolid", "stereographic"])
def test_line_peaks_on_curved_all_sky_spectrum(projection):
    # Wavelengths of the lines: NIST ASD (Mg I 517.268, Na I 588.995, H I 656.28,
    # O I 777.41 nm, air). The spectrum lies 200 px off axis on an all-sky lens,
    # where the grating curve is strongly curved; the centroid must land within
    # 0.1 nm (the bar for the true geometry).
    cam = camera()
    geo = SpectralGeometry(LensModel(projection, 400.0, 319.5, 239.5),
                           GratingModel(500.0, -20.0, tilt_deg=6.0, tilt_azimuth_deg=200.0))
    lines = [(517.268, 3000.0), (588.995, 3000.0), (656.28, 3000.0), (777.41, 3000.0)]
    tr = LinearTrack(times(3), 120.0, 330.0, 300.0, -500.0)
    frames = render(geo, tr, cam, lines, n_frames=3)
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, geo, camera=cam, optimal=False)
    for lam, _ in lines:
        assert abs(peak_nm(fs, lam) - lam) < 0.1


def test_streak_parallel_to_dispersion_is_flagged():
    cam = camera()
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 319.5, 239.5), GratingModel(600.0, 0.0))
    tr = LinearTrack(times(3), 100.0, 240.0, 500.0, 60.0)  # 6.8 deg from the dispersion (+x)
    frames = render(geo, tr, cam, LINES[:2], n_frames=3)
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, geo, camera=cam, optimal=False)
    assert "motion_parallel_to_dispersion" in fs.flags
    # across the dispersion: not flagged
    tr2 = LinearTrack(times(3), 100.0, 100.0, 40.0, 500.0)
    frames2 = render(geo, tr2, cam, LINES[:2], n_frames=3)
    fs2 = extract_spectra(frames2, FlatBackground(cam.height, cam.width), tr2, geo, camera=cam, optimal=False)
    assert "motion_parallel_to_dispersion" not in fs2.flags


def test_saturated_and_off_sensor_samples_are_masked():
    cam = camera()
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 319.5, 239.5), GratingModel(600.0, 0.0))
    tr = LinearTrack(times(3), 380.0, 200.0, 0.0, 300.0)
    frames = render(geo, tr, cam, [(500.0, 3000.0), (589.0, 3000.0), (800.0, 3000.0)], n_frames=3)
    grid = np.arange(450.0, 900.0, 0.5)
    # saturate the Na line in frame 1 over +-9 px across (the 12 px streak across the spectrum
    # plus 2 PSF sigma: more than the 0.8 that may be recovered from the wings) and +-1 px along
    f1 = frames[1]
    x, y = geo.spectrum_pixel(*tr.position(f1.time_s), 589.0)
    assert 0 < x < cam.width
    sat = f1.saturated.copy()
    iy, ix = int(round(float(y))), int(round(float(x)))
    sat[iy - 9:iy + 10, ix - 1:ix + 2] = True
    frames[1] = Frame(f1.index, f1.time_s, f1.exposure_s, f1.signal, sat)
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, geo, camera=cam,
                         wavelength_grid_nm=grid, optimal=False)
    na = np.abs(fs.wavelength_nm - 589.0) < 0.3
    assert fs.mask[1, na].all() and not fs.mask[0, na].any()
    assert "saturated" in fs.flags
    # 800 nm lands beyond the right edge (x > 640): masked, flagged off frame
    x8, _ = geo.spectrum_pixel(380.0, 200.0, 800.0)
    assert x8 > cam.width
    red = np.abs(fs.wavelength_nm - 800.0) < 1
    assert fs.mask[:, red].all()
    assert "spectrum_off_frame" in fs.flags
    # the whole flight still recovers the Na energy from the unsaturated frames (light curve flat)
    got, _ = line_energy(fs, 589.0)
    assert_allclose(got, 9000.0, rtol=0.01)


def _window(fs: FrameSpectra, k: int, lo_nm: float, hi_nm: float, *, mask=None) -> tuple[float, float]:
    """Energy and 1-sigma (with the bins' correlation) of frame ``k`` in ``[lo_nm, hi_nm)``."""
    m = fs.mask[k] if mask is None else mask
    sp = Spectrum(fs.wavelength_nm, fs.bin_width_nm, fs.flux[k], np.sqrt(fs.variance[k]), m, fs.correlation[k])
    return sp.integrate(lo_nm, hi_nm)


def _na_line_frames(hy: int | None, *, every_frame_band: bool = False):
    """Three exact frames (Gaussian PSF, 12 px streak across the spectrum), lines at 500, 589 and
    700 nm on a continuum; in frame 1 the Na core saturated over +-hy rows and 3 columns, or
    (``every_frame_band``) a +-3 row strip along the whole spectrum saturated in every frame."""
    cam = camera()
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 319.5, 239.5), GratingModel(600.0, 0.0))
    tr = LinearTrack(times(3), 380.0, 200.0, 0.0, 300.0)
    lines = [(500.0, 3000.0), (589.0, 3000.0), (700.0, 3000.0)]
    cont = (np.arange(450.0, 760.0, 0.2), np.full(1550, 3.0))
    frames = render(geo, tr, cam, lines, n_frames=3, continuum=cont)
    out = list(frames)
    for k, f in enumerate(frames):
        sat = np.zeros(f.signal.shape, bool)
        if every_frame_band:
            lam = np.arange(440.0, 770.0, 0.25)
            for t in (f.time_s - 0.5 * f.exposure_s, f.time_s, f.time_s + 0.5 * f.exposure_s):
                xs, ys = geo.spectrum_pixel(*tr.position(t), lam)
                for xi, yi in zip(np.rint(xs).astype(int), np.rint(ys).astype(int)):
                    if 0 <= xi < cam.width:
                        sat[max(yi - 3, 0):yi + 4, xi] = True
        elif k == 1 and hy is not None:
            x, y = geo.spectrum_pixel(*tr.position(f.time_s), 589.0)
            iy, ix = int(round(float(y))), int(round(float(x)))
            sat[iy - hy:iy + hy + 1, ix - 1:ix + 2] = True
        out[k] = Frame(f.index, f.time_s, f.exposure_s, f.signal, sat)
    return cam, geo, tr, frames, out


def test_saturated_core_recovered_from_its_wings_on_an_exact_render():
    # The Na core of frame 1 saturated over +-2 rows (3 columns) of its 12 px streak: the bins
    # lose a large share of their light, and the other frames and cross-sections give the
    # profile to scale them up by. Noise-free exact render (pixel-integrated Gaussian PSF, the
    # extraction's own profile model): the window energy must equal the unsaturated
    # extraction's to 0.5 % (room for the profile fit's convergence and the 16 light steps of
    # the streak model); the stated error carries the profile-shape term (>= 1.5 % per bin).
    cam, geo, tr, clean, frames = _na_line_frames(2)
    grid = np.arange(450.0, 760.0, 0.5)
    bg = FlatBackground(cam.height, cam.width)
    fs = extract_spectra(frames, bg, tr, geo, camera=cam, wavelength_grid_nm=grid, optimal=False)
    ref = extract_spectra(clean, bg, tr, geo, camera=cam, wavelength_grid_nm=grid, optimal=False)
    na = np.abs(fs.wavelength_nm - 589.0) < 4.0
    assert "saturated" in fs.flags and "saturation_recovered" in fs.flags
    assert not fs.mask[1, na].any() and fs.recovered[1, na].sum() >= 3
    assert not fs.recovered[[0, 2]].any()
    got, err = _window(fs, 1, 583.0, 595.0)
    want, _ = _window(ref, 1, 583.0, 595.0)
    assert_allclose(got, want, rtol=0.005)
    rec = fs.recovered[1]
    assert np.all(np.sqrt(fs.variance[1, rec]) >= 0.015 * np.abs(fs.flux[1, rec]))
    assert np.all(fs.shape_rel_err[1, rec] >= 0.015) and not fs.shape_rel_err[~fs.recovered].any()
    assert np.sqrt(fs.variance[1, rec]).min() > np.sqrt(ref.variance[1, rec]).min()
    # the whole flight takes the recovered frame as measured: 3 x the line and continuum
    wf_got = fs.whole_flight().integrate(583.0, 595.0)[0]
    wf_want = ref.whole_flight().integrate(583.0, 595.0)[0]
    assert_allclose(wf_got, wf_want, rtol=0.005)


def test_saturated_bins_stay_masked_without_unsaturated_cross_sections():
    # Guard: every cross-section of the spectrum holds a saturated pixel in every frame (as a
    # fireball on a coarse binned camera can): nothing is left to estimate the profile's core
    # from, so no bin is scaled up from its wings; the saturated bins are masked, as before.
    cam, geo, tr, clean, frames = _na_line_frames(None, every_frame_band=True)
    grid = np.arange(450.0, 760.0, 0.5)
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, geo, camera=cam,
                         wavelength_grid_nm=grid, optimal=False)
    assert "saturated" in fs.flags and "saturation_recovered" not in fs.flags
    assert not fs.recovered.any()
    for lam in (500.0, 589.0, 700.0):
        assert fs.mask[:, np.abs(fs.wavelength_nm - lam) < 2.0].all()


def _saturated_na_scene(*, interlaced: bool, n_frames: int, duration_s: float):
    """A seeded QM03 simulator event whose Na I D core saturates in its bright frames (SNR 150 in
    the brightest line), without stars, response or atmosphere; extracted (boxcar) with the
    truth track and a flat background of the simulated sky: (rendered, stack, camera, track,
    background, frame spectra)."""
    from meteorspec.simulate import EventSpec, peak_for_line_snr, render_event

    spec = EventSpec("QM03", overrides={"camera.interlaced": interlaced}, n_frames=n_frames, meteor_start_s=0.02,
                     meteor_duration_s=duration_s, start_px=(300.0, 250.0), direction_deg=70.0, speed_deg_s=10.0,
                     na=0.5, mg=0.2, fe=0.3, flat_response=True, atmosphere=False, n_stars=0, seed=3)
    spec = dataclasses.replace(spec, peak_energy_adu_s=peak_for_line_snr(spec, 150.0))
    r = render_event(spec)
    stack, cam = r.frame_stack(), r.station.camera
    track = _truth_track(r)
    bg = FlatBackground(cam.height, cam.width, sky_adu=spec.sky_adu, read_noise_adu=cam.read_noise_adu,
                        gain_e_per_adu=cam.gain_e_per_adu)
    return r, stack, cam, track, bg, extract_spectra(stack, bg, track, r.geometry, camera=cam, optimal=False)


def _recovered_na_against_truth(fs, ref) -> tuple[float, float, list[int], np.ndarray]:
    """Every frame (field) with recovered Na bins: its Na window energy over the kept bins within
    3 sigma of its stated error against the noise-free extraction ``ref``; returns the sums, those
    frames and the Na window's bins."""
    assert "saturation_recovered" in fs.flags and "saturation_recovered" not in ref.flags
    na = (fs.wavelength_nm > 580.0) & (fs.wavelength_nm < 598.0)
    frames = [k for k in range(fs.n_frames) if (fs.recovered[k] & na).any()]
    assert len(frames) >= 4
    got_sum = want_sum = 0.0
    for k in frames:
        got, err = _window(fs, k, 580.0, 598.0)
        want, _ = _window(ref, k, 580.0, 598.0, mask=fs.mask[k])
        assert abs(got - want) <= 3.0 * err, (k, got / want, err / want)
        got_sum += got
        want_sum += want
    return got_sum, want_sum, frames, na


def test_saturated_na_core_of_a_simulated_event_recovered_against_its_noise_free_frames():
    # A seeded simulator event (meteorspec.simulate; 8-bit gamma camera, sky, photon and read
    # noise) whose Na I D core saturates in its bright frames. Truth: the same extraction of
    # the simulator's noise-free, unclipped linear frames (every pixel's true light, nothing
    # lost). In every frame with recovered Na bins, the Na window energy over the bins the
    # extraction kept must agree with the truth within 3 sigma of its stated error (noise of
    # the kept pixels plus the profile-shape term of the scaled-up bins, with the bins'
    # correlation), and the recovered frames together within 3 % (0.015 / (1 - L) at the
    # shares these bins lose, module constant _LOST_SHARE_ERR).
    r, stack, cam, track, bg, fs = _saturated_na_scene(interlaced=False, n_frames=10, duration_s=0.3)
    truth = [Frame(k, f.time_s, f.exposure_s, r.linear_clean[k].astype(np.float32),
                   np.zeros(r.linear_clean[k].shape, bool)) for k, f in enumerate(stack)]
    ref = extract_spectra(truth, bg, track, r.geometry, camera=cam, optimal=False,
                          wavelength_grid_nm=fs.wavelength_nm)
    got_sum, want_sum, _, _ = _recovered_na_against_truth(fs, ref)
    assert_allclose(got_sum, want_sum, rtol=0.03)


def test_saturated_na_core_in_the_fields_of_an_interlaced_camera_recovered_against_noise_free_fields():
    # The event of the test above on an interlaced camera: each field holds every other row
    # (each standing for two), exposed for half a frame. Truth: the same extraction of the
    # simulator's noise-free, unclipped fields (each field's own rows of the linear frames).
    # Field bins are recovered from their wings as frame bins are: per field the Na window
    # energy within 3 sigma of its stated error (noise plus the profile-shape term, with the
    # bins' correlation), and the recovered fields together within 3 % (0.015 / (1 - L) at the
    # shares these bins lose, module constant _LOST_SHARE_ERR; measured on noise-free truth the
    # fields' scaled-up bins read 1-3 % low up to L = 0.7, bench/saturation_wings.py --oracle).
    r, stack, cam, track, bg, fs = _saturated_na_scene(interlaced=True, n_frames=6, duration_s=0.2)
    assert cam.interlaced
    truth = []
    for k, f in enumerate(stack):
        assert f.y_step_px == 2 and r.exposures[k].row_start == f.y_start_px
        rows = r.linear_clean[r.exposures[k].frame][f.y_start_px::f.y_step_px].astype(np.float32)
        truth.append(Frame(k, f.time_s, f.exposure_s, rows, np.zeros(rows.shape, bool),
                           y_start_px=f.y_start_px, y_step_px=f.y_step_px))
    ref = extract_spectra(truth, bg, track, r.geometry, camera=cam, optimal=False,
                          wavelength_grid_nm=fs.wavelength_nm)
    got_sum, want_sum, fields, na = _recovered_na_against_truth(fs, ref)
    # the shape error is common to the fields (FrameSpectra.shape_rel_err, summed coherently by
    # the whole flight): here 3.0 % of the window. With the PSF that weighs the saturated pixels
    # fitted to the fields' pixels against their spectra the fields' sum reads 1.7 % low; with
    # the pooled mean-per-offset fit (too wide on every-other-row sampling) it read 3.0 % low,
    # and 5-12 % with each field's own refit. It must agree within 0.75 times the stated error:
    # room for the kept pixels' noise, none for the pooled fit's bias
    shape = sum(float(np.sum((fs.shape_rel_err[k] * fs.flux[k] * fs.bin_width_nm)[na & ~fs.mask[k]]))
                for k in fields)
    assert 0.0 < shape < 0.05 * want_sum
    assert abs(got_sum - want_sum) <= 0.75 * shape, (got_sum / want_sum, shape / want_sum)


def test_variance_matches_scatter_of_noise_realisations():
    # Variance propagation checked against 200 seeded Poisson + Gaussian
    # realisations. With 200 samples the sample variance has a relative
    # standard error of sqrt(2/199) = 10 %; over ~40 bins averaged the mean
    # ratio is known to ~2 %, so 0.9-1.1 is a >4-sigma bar.
    cam = camera(320, 160)
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 159.5, 79.5), GratingModel(600.0, 5.0))
    tr = LinearTrack(times(1), 20.0, 60.0, 100.0, 200.0)
    clean = render(geo, tr, cam, [(520.0, 2000.0), (560.0, 1500.0)], n_frames=1)[0]
    bg = FlatBackground(cam.height, cam.width, sky_adu=20.0, read_noise_adu=3.0, gain_e_per_adu=2.0)
    grid = np.arange(505.0, 575.0, 0.5)
    rng = np.random.default_rng(7)
    fluxes, variances, win_err, naive_err, rho = [], [], [], [], []
    for _ in range(200):
        img = rng.poisson((clean.signal + 20.0) * 2.0) / 2.0 + 3.0 * rng.standard_normal(clean.signal.shape)
        fr = Frame(0, clean.time_s, clean.exposure_s, img.astype(np.float32), clean.saturated)
        fs = extract_spectra([fr], bg, tr, geo, camera=cam, wavelength_grid_nm=grid, optimal=False)
        fluxes.append(fs.flux[0])
        variances.append(fs.variance[0])
        wf = fs.whole_flight()
        win_err.append(wf.integrate(508.0, 532.0)[1])
        sel = (grid >= 508.0) & (grid < 532.0)
        naive_err.append(np.sqrt(np.sum((wf.flux_err[sel] * wf.bin_width_nm[sel]) ** 2)))
        rho.append(wf.correlation[:, 0])
    fluxes, variances = np.array(fluxes), np.array(variances)
    ratio = np.var(fluxes, axis=0, ddof=1) / np.mean(variances, axis=0)
    inner = slice(10, -10)
    assert 0.9 < np.mean(ratio[inner]) < 1.1
    # Neighbouring bins share pixels (2 bins per pixel here), so their noise is correlated: the
    # stated correlation of adjacent bins matches the sample correlation (200 draws: standard
    # error of a coefficient ~0.05, averaged over ~120 bins far smaller; 0.05 bar), and the error
    # of a 24 nm sum, which needs it, matches the scatter of that sum (sample sd of 200 draws:
    # 5 % standard error, 0.85-1.15 is a 3-sigma bar). Without the covariance the error is far
    # too small (the bins' noise is positively correlated).
    emp = np.array([np.corrcoef(fluxes[:, j], fluxes[:, j + 1])[0, 1] for j in range(10, grid.size - 11)])
    assert abs(np.mean(emp) - np.mean(np.array(rho)[:, 10:grid.size - 11])) < 0.05
    assert np.mean(emp) > 0.3
    sel = (grid >= 508.0) & (grid < 532.0)
    e_win = (fluxes[:, sel] * fs.bin_width_nm[sel]).sum(axis=1)
    assert 0.85 < np.std(e_win, ddof=1) / np.mean(win_err) < 1.15
    assert np.std(e_win, ddof=1) / np.mean(naive_err) > 1.3
    # and the estimate is unbiased: mean line energy equals the rendered one within 3 sigma of the mean
    e = (fluxes * fs.bin_width_nm)[:, np.abs(grid - 520.0) < 12].sum(axis=1)
    assert abs(e.mean() - 2000.0) < 3 * e.std(ddof=1) / np.sqrt(e.size)


def test_optimal_extraction_beats_boxcar_on_faint_line_and_is_unbiased():
    # Horne 1986 (PASP 98, 609): profile weighting reduces the variance of a
    # sky-noise-dominated extraction; it must stay unbiased.
    cam = camera(320, 160)
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 159.5, 79.5), GratingModel(600.0, 5.0))
    tr = LinearTrack(times(2), 20.0, 60.0, 50.0, 50.0)
    clean = render(geo, tr, cam, [(520.0, 120.0), (560.0, 80.0)], n_frames=2,
                   continuum=(np.arange(505.0, 575.0, 0.2), np.full(350, 3.0)))
    bg = FlatBackground(cam.height, cam.width, sky_adu=30.0, read_noise_adu=4.0, gain_e_per_adu=1.0)
    grid = np.arange(505.0, 575.0, 0.5)
    rng = np.random.default_rng(11)
    e_box, e_opt, err_box, err_opt = [], [], [], []
    for _ in range(60):
        frs = []
        for c in clean:
            img = rng.poisson(c.signal + 30.0) + 4.0 * rng.standard_normal(c.signal.shape)
            frs.append(Frame(c.index, c.time_s, c.exposure_s, img.astype(np.float32), c.saturated))
        for opt, out, err in ((False, e_box, err_box), (True, e_opt, err_opt)):
            fs = extract_spectra(frs, bg, tr, geo, camera=cam, wavelength_grid_nm=grid, optimal=opt)
            e, de = line_energy(fs, 520.0, 12.0)
            out.append(e)
            err.append(de)
    e_box, e_opt = np.array(e_box), np.array(e_opt)
    # truth: line + continuum in the +-3 nm window, two frames
    truth = 2 * (120.0 + 3.0 * np.count_nonzero(np.abs(np.arange(505.0, 575.0, 0.2) - 520.0) < 12))
    assert np.std(e_opt) < 0.85 * np.std(e_box)
    # the stated errors of the sums (with the covariance of bins that share pixels) match the
    # scatter: 60 draws give a sample sd to ~9 %, so 0.7-1.3 is a 3-sigma bar
    for e, err in ((e_box, err_box), (e_opt, err_opt)):
        assert 0.7 < np.std(e, ddof=1) / np.mean(err) < 1.3
    # unbiased within 3 standard errors of the mean (60 realisations) + 2 % for the profile estimate
    for e in (e_box, e_opt):
        assert abs(e.mean() - truth) < 3 * e.std(ddof=1) / np.sqrt(e.size) + 0.02 * truth


def test_interlaced_fields_conserve_flux():
    # Each field sees every other row; a field pixel stands for two image rows.
    # Tolerance 2 %: sampling every other row of a sigma 1.3 px PSF recovers the
    # energy to ~0.1 % for a line streaking across rows (Nyquist-sampled).
    cam = camera(interlaced=True)
    tr = LinearTrack(times(2, interlaced=True), 150.0, 120.0, 300.0, 400.0)
    frames = render(FISHEYE, tr, cam, LINES, n_frames=2, interlaced=True)
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, FISHEYE, camera=cam, optimal=False)
    assert fs.n_frames == 4
    for lam, e in LINES:
        assert_allclose(window_energy(fs, lam, LINES), 4 * e, rtol=0.02)


def test_empty_and_nan_inputs():
    cam = camera()
    geo = FISHEYE
    tr = LinearTrack(times(3), 150.0, 120.0, 400.0, 250.0, t_on_s=10.0)  # never luminous
    frames = render(geo, LinearTrack(times(3), 150.0, 120.0, 400.0, 250.0), cam, LINES, n_frames=3)
    bg = FlatBackground(cam.height, cam.width)
    fs = extract_spectra(frames, bg, tr, geo, camera=cam)
    assert fs.flux.shape[0] == 3 and fs.mask.all()
    assert fs.wavelength_nm.size == 0 and "no_luminous_frames" in fs.flags
    wf = fs.whole_flight()
    assert wf.flux.size == 0
    # no frames at all
    tr_ok = LinearTrack(times(3), 150.0, 120.0, 400.0, 250.0)
    fs0 = extract_spectra([], bg, tr_ok, geo, camera=cam)
    assert fs0.flux.shape[0] == 0 and fs0.whole_flight().mask.all()
    # NaN pixels are masked out, never propagated
    f0 = frames[0]
    sig = f0.signal.copy()
    sig[:, :] = np.nan
    frames_nan = [Frame(0, f0.time_s, f0.exposure_s, sig, f0.saturated)] + frames[1:]
    fs1 = extract_spectra(frames_nan, bg, tr_ok, geo, camera=cam, optimal=False)
    assert fs1.mask[0].all() and not fs1.mask[1].all()
    assert np.all(np.isfinite(fs1.flux[~fs1.mask]))
    # bad grids are refused
    with pytest.raises(ValueError, match="wavelength_grid_nm"):
        extract_spectra(frames, bg, tr_ok, geo, camera=cam, wavelength_grid_nm=np.array([500.0, np.nan]))
    with pytest.raises(ValueError, match="wavelength_grid_nm"):
        extract_spectra(frames, bg, tr_ok, geo, camera=cam, wavelength_grid_nm=np.array([500.0, 499.0]))


def test_default_grid_spans_sensor_at_half_the_finest_dispersion():
    cam = camera()
    tr = LinearTrack(times(4), 150.0, 120.0, 400.0, 250.0)
    grid = default_wavelength_grid(FISHEYE, tr, camera=cam)
    assert grid[0] >= 350.0 and grid[-1] <= 900.0
    step = np.diff(grid)
    assert_allclose(step, step[0], rtol=1e-9)
    d = FISHEYE.dispersion_nm_per_px(tr.x_px[:, None], tr.y_px[:, None], grid[None, :])
    assert step[0] <= 0.5 * np.nanmin(d) * 1.0001


def test_saturated_brightest_frames_recovered_from_light_curve_without_zeroth_flux():
    # A fireball: the Na line core saturates in the two brightest frames, where
    # the tracker also has no zeroth-order flux (NaN: saturated zeroth order).
    # The frames' weights must then come from their unsaturated bins against
    # the mean spectrum of the other frames, and the whole-flight Na energy
    # from the unsaturated frames scaled by their share of the light curve.
    # Noise-free, constant spectral shape: exact up to the 1 % flux bar of
    # test_flux_conserved_on_curved_off_axis_spectrum.
    cam = camera()
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 319.5, 239.5), GratingModel(600.0, 0.0))
    tr = LinearTrack(times(4), 300.0, 150.0, 0.0, 300.0)
    lines = [(517.27, 4000.0), (589.0, 6000.0), (656.28, 3000.0)]
    cont = (np.arange(480.0, 700.0, 0.2), np.full(1100, 2.0))
    frames = render(geo, tr, cam, lines, n_frames=4, continuum=cont)
    light = np.array([1.0, 3.0, 4.0, 2.0])
    scaled = []
    for k, f in enumerate(frames):
        sat = np.zeros(f.signal.shape, bool)
        if k in (1, 2):
            # the core over the whole 12 px streak across the spectrum (+-7 rows) and +-4 px along
            # it: more than the 0.8 of a bin's light that may be recovered from its wings, so the
            # bins are masked and the frames' light comes from the light curve
            x, y = geo.spectrum_pixel(*tr.position(f.time_s), 589.0)
            iy, ix = int(round(float(y))), int(round(float(x)))
            sat[iy - 7:iy + 8, ix - 4:ix + 5] = True
        scaled.append(Frame(f.index, f.time_s, f.exposure_s, f.signal * light[k], sat))
    tr.flux_adu = np.where([True, False, False, True], 50.0 * light, np.nan)
    fs = extract_spectra(scaled, FlatBackground(cam.height, cam.width), tr, geo, camera=cam, optimal=False)
    na = np.abs(fs.wavelength_nm - 589.0) < 0.3
    assert fs.mask[1, na].all() and fs.mask[2, na].all() and not fs.mask[0, na].any()
    # the filled weights follow the light curve
    assert_allclose(fs.frame_weight / fs.frame_weight[0], light, rtol=0.01)
    # window_energy spans the midpoints to the neighbouring lines; continuum components inside it
    lo, hi = 0.5 * (517.27 + 589.0), 0.5 * (589.0 + 656.28)
    cont_in = 2.0 * np.count_nonzero((cont[0] > lo) & (cont[0] < hi))
    got = window_energy(fs, 589.0, lines)
    assert_allclose(got, light.sum() * (6000.0 + cont_in), rtol=0.01)


def _rank1_scene(rng, n_frames: int, n_bins: int, *, peak: float, spread: float, width_nm: float):
    """Noise-free rank-1 frame spectra ``E = w T`` (Gaussian light curve ``w``, random spectrum
    ``T``) as densities over bins of ``width_nm``, with unit variances: (w, flux, variance, widths)."""
    w_true = np.exp(-0.5 * ((np.arange(n_frames) - peak) / spread) ** 2)
    t_true = 1.0 + rng.random(n_bins) * 5.0
    widths = np.full(n_bins, width_nm)
    flux = w_true[:, None] * t_true[None, :] / widths
    return w_true, flux, np.full((n_frames, n_bins), 1.0), widths


def test_frame_weights_from_the_spectra_recover_a_light_curve_with_masked_bins():
    """Rank-1 data ``E = w T`` with bins masked at random (saturation, sensor edge):

    starting from wrong weights (one frame's zeroth order known, the rest guessed), the
    fit returns the true relative weights (noise-free data: to round-off).
    """
    from meteorspec.extract import _spectral_weights

    rng = np.random.default_rng(8)
    w_true, flux, variance, widths = _rank1_scene(rng, 12, 300, peak=6.0, spread=2.5, width_nm=0.4)
    n, m = flux.shape
    mask = rng.random((n, m)) < 0.4
    mask[5:8, 100:200] = True  # the brightest frames lose a block of bins, as a saturated line does
    weight = np.where(np.arange(n) == 2, w_true[2] * 7.0, 1.0)  # scale from frame 2, others a guess
    _spectral_weights(weight, np.where(mask, np.nan, flux), variance, mask, widths)
    np.testing.assert_allclose(weight / weight.sum(), w_true / w_true.sum(), rtol=1e-6)


def test_frame_weights_of_saturated_frames_anchored_by_faint_measured_frames():
    """A fireball's pattern: the bright frames keep only a few bins (the rest saturated), the
    faint first and last frames keep all and alone have a measured (fixed) weight.

    Rank-1 data ``E = w T`` without noise are fitted exactly by the generating factors (a
    least-squares identity), so the fit must return the true weights to 1e-6 (the solver's
    tolerances are 1e-10 and below). Fifty alternating steps alone left the bright frames 2.3
    times too high here, the pattern of bench/plasma_end_to_end.py --seed 5 events 35 and 17.
    """
    from meteorspec.extract import _spectral_weights

    rng = np.random.default_rng(35)
    w_true, flux, variance, widths = _rank1_scene(rng, 16, 120, peak=7.5, spread=3.0, width_nm=4.3)
    n, m = flux.shape
    mask = np.zeros((n, m), bool)
    for k in range(2, n - 2):  # the brighter the frame, the more bins saturate
        keep = max(8, int(m * (1.0 - w_true[k])))
        mask[k, rng.permutation(m)[keep:]] = True
    fixed = np.zeros(n, bool)
    fixed[[0, 1, n - 2, n - 1]] = True
    weight = np.where(fixed, w_true, np.nan)
    weight[~fixed] = [np.sum(flux[k, ~mask[k]]) / np.sum(flux[0, ~mask[k]]) * w_true[0] for k in
                      np.flatnonzero(~fixed)]  # a first guess from frame 0 alone, as _fill_weights
    weight[~fixed] *= 3.0  # and far off, as a saturated frame's first estimate can be
    _spectral_weights(weight, np.where(mask, np.nan, flux), variance, mask, widths, fixed=fixed)
    np.testing.assert_allclose(weight, w_true, rtol=1e-6)


def test_spectrum_leaving_the_lens_field_is_masked_where_partly_recorded():
    # Near the rim of an all-sky lens the first order runs past the lens field
    # (the diffracted direction turns evanescent, |w_t| >= 1 in the contract's
    # grating formula): the spectrum ends on the sensor, and as the meteor
    # moves that end sweeps ~13 nm per frame along the spectrum. A line the end
    # passes during an exposure is recorded for part of it only: its bins must
    # be masked, never returned short of light (which also drags its peak, by
    # 0.7 nm here before the fix). Lines recorded whole keep their energy to
    # 1.5 % (the flux bar of test_flux_conserved_on_curved_off_axis_spectrum,
    # plus the light a 5 nm/px spectrum spreads beyond the +-22 nm window) and
    # their peaks to 0.1 nm (the bar for the true geometry, as in
    # test_line_peaks_on_curved_all_sky_spectrum).
    cam = camera(512, 512)
    geo = SpectralGeometry(LensModel("equidistant", 177.5, 255.5, 255.75, k1=0.008),
                           GratingModel(600.0, -15.0, tilt_deg=0.8, tilt_azimuth_deg=120.0))
    tr = LinearTrack(times(4), 295.0, 481.0, 32.0, 0.0)
    # where the spectrum ends at the start and end of the flight (no light beyond: NaN)
    lam = np.arange(400.0, 800.0, 0.25)
    ends = [lam[np.isfinite(geo.spectrum_pixel(*tr.position(t), lam)[0])].max() for t in (0.0, 0.16)]
    assert 655.0 < ends[0] < 665.0 and 605.0 < ends[1] < 615.0
    lines = [(430.0, 3000.0), (480.0, 3000.0), (530.0, 3000.0), (575.0, 3000.0), (630.0, 3000.0), (655.0, 3000.0)]
    frames = render(geo, tr, cam, lines, n_frames=4, sigma=1.2)
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, geo, camera=cam, optimal=False,
                         psf_sigma_px=1.2)
    assert "spectrum_off_frame" in fs.flags
    for k in range(fs.n_frames):
        for lam0, e in lines:
            core = np.abs(fs.wavelength_nm - lam0) < 15.0
            win = np.abs(fs.wavelength_nm - lam0) < 22.0
            if fs.mask[k, core].any():
                continue
            got = np.sum(np.where(fs.mask[k, win], 0.0, fs.flux[k, win]) * fs.bin_width_nm[win])
            assert_allclose(got, e, rtol=0.015)
    wf = fs.whole_flight()
    # the end sweeps over 630 nm in every frame: never seen whole
    assert wf.mask[np.abs(wf.wavelength_nm - 630.0) < 15.0].any()
    for lam0, _ in lines[:3]:
        assert abs(peak_nm(fs, lam0, 22.0) - lam0) < 0.1


@pytest.mark.parametrize("rate_per_s", [25.0, -35.0])
def test_line_peaks_when_the_meteor_brightens_or_fades_within_each_exposure(rate_per_s):
    # The light of a line is spread along its streak as the light curve runs
    # during the exposure: a meteor brightening by e per 40 ms puts the streak's
    # light centroid 0.11 of the streak past its middle. Moving at 55 deg to the
    # dispersion on this fisheye (5 nm/px), the shear leaves 28 % of the 5 px
    # along-dispersion streak in the wavelength coordinate, so the line moved
    # by ~0.7 nm before the extraction placed the streak at its light centroid
    # (light curve from the frame energies, monotone cubic of the cumulative
    # energy). Exponential light curves, noise-free: the same 0.1 nm bar as
    # test_line_peaks_on_curved_all_sky_spectrum.
    cam = camera()
    tr = LinearTrack(times(4), 100.0, 150.0, 100.0, 200.0)

    def light(t):
        return np.exp(rate_per_s * np.asarray(t))

    frames = render(FISHEYE, tr, cam, [(450.0, 3000.0), (589.0, 3000.0), (777.41, 3000.0)], n_frames=4,
                    light=light, n_sub=48)
    tr.flux_adu = np.array([np.mean(light(t + (np.arange(48) + 0.5 - 24) / 48 / 25.0)) for t in tr.time_s])
    fs = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, FISHEYE, camera=cam, optimal=False)
    for lam0 in (450.0, 589.0, 777.41):
        assert abs(peak_nm(fs, lam0, 12.0) - lam0) < 0.1


def test_light_centroid_of_exposures_from_their_energies():
    # Exponential and Gaussian light curves sampled by 40 ms exposures: the
    # light-weighted mean time of each exposure (exact integrals by Gauss-
    # Legendre quadrature) against the estimate from the exposure energies
    # alone. Inside the flight 0.01 of an exposure (0.5 nm for the 5 nm/px
    # fisheye with a whole exposure's 10 px streak along the dispersion, and
    # far less after the shear); a flat light curve gives exactly 0.
    from meteorspec.extract import _light_centroid_fraction

    t_e = 0.04
    t = (np.arange(12) + 0.5) * t_e
    x, w = np.polynomial.legendre.leggauss(32)
    for rate in (lambda s: np.exp(s / 0.05), lambda s: np.exp(-0.5 * ((s - 0.25) / 0.08) ** 2),
                 lambda s: np.ones_like(s)):
        tt = t[:, None] + 0.5 * t_e * x[None, :]
        e = (rate(tt) * w).sum(axis=1)
        truth = (rate(tt) * w * x).sum(axis=1) / e * 0.5
        got = _light_centroid_fraction(t, e, {k: t_e for k in range(t.size)})
        assert_allclose(got[1:-1], truth[1:-1], atol=0.01)
    assert_allclose(_light_centroid_fraction(t, np.ones(t.size), {k: t_e for k in range(t.size)}), 0.0, atol=1e-12)



def test_end_exposures_take_the_light_slope_from_the_measured_centroid():
    # The first and last lit exposures: exp(b s) over s in [-1/2, 1/2] must have the measured
    # centroid as its mean. Reference: the mean by adaptive quadrature (scipy.integrate.quad),
    # to 1e-6 of an exposure; and _light_centroid_fraction returns that centroid there, while the
    # exposures between keep their energies' estimate (unchanged by a measured centroid).
    from scipy.integrate import quad

    from meteorspec.extract import _light_centroid_fraction, _slope_for_centroid

    for centroid in (-0.45, -0.2, 0.0, 0.1, 0.36, 0.45):
        b = _slope_for_centroid(centroid)
        mean = quad(lambda s: s * np.exp(b * s), -0.5, 0.5)[0] / quad(lambda s: np.exp(b * s), -0.5, 0.5)[0]
        assert abs(mean - centroid) < 1e-6, (centroid, b, mean)
    t_e = 0.04
    t = (np.arange(8) + 0.5) * t_e
    e = np.exp(t / 0.05)
    exposures = {k: t_e for k in range(t.size)}
    plain = _light_centroid_fraction(t, e, exposures)
    got = _light_centroid_fraction(t, e, exposures, measured={0: 0.3, 4: -0.3, 7: -0.25})
    assert_allclose(got[[0, 7]], [0.3, -0.25], atol=1e-6)
    assert_allclose(got[1:7], plain[1:7], atol=1e-12)
    # an exposure without a measured energy (a saturated zeroth order) makes its own slope and
    # its neighbours' rough: there the measured centroid places the light as well
    known = np.ones(t.size, bool)
    known[4] = False
    measured = {k: 0.1 * (k - 3.5) for k in range(t.size)}
    got = _light_centroid_fraction(t, e, exposures, measured=measured, energy_known=known)
    assert_allclose(got[[0, 3, 4, 5, 7]], [measured[k] for k in (0, 3, 4, 5, 7)], atol=1e-6)
    assert_allclose(got[[1, 2, 6]], plain[[1, 2, 6]], atol=1e-12)


def test_light_spread_within_an_exposure():
    # The RMS spread in time of light exp(b s + c s^2) over s in [-1/2, 1/2] (in exposures),
    # which sets how long a line's streak the extraction records. Even light: the uniform
    # distribution's 1/sqrt(12) (textbook). Exponential light: the truncated exponential's
    # variance 1/b^2 - 1/(4 sinh^2(b/2)) (worked by hand from its moment generating function);
    # with curvature, against adaptive quadrature (scipy.integrate.quad); to 1e-6 of an exposure
    # (16-point Gauss-Legendre is exact to far below that for these smooth weights).
    from scipy.integrate import quad

    from meteorspec.extract import _light_spread

    assert _light_spread(0.0, 0.0) == pytest.approx(1.0 / np.sqrt(12.0), abs=1e-12)
    for b in (-20.0, -3.0, 0.5, 4.0, 12.0):
        exact = np.sqrt(1.0 / b**2 - 1.0 / (4.0 * np.sinh(b / 2.0) ** 2))
        assert _light_spread(b, 0.0) == pytest.approx(exact, abs=1e-6), b
    for b, c in ((2.0, -8.0), (-5.0, 6.0)):
        m0 = quad(lambda s: np.exp(b * s + c * s * s), -0.5, 0.5)[0]
        m1 = quad(lambda s: s * np.exp(b * s + c * s * s), -0.5, 0.5)[0] / m0
        m2 = quad(lambda s: s * s * np.exp(b * s + c * s * s), -0.5, 0.5)[0] / m0
        assert _light_spread(b, c) == pytest.approx(np.sqrt(m2 - m1**2), abs=1e-6), (b, c)


def test_streak_share_of_frames():
    # streak_share: the light-weighted RMS spread of the frames' light over that of an evenly lit
    # exposure (variances add with the frames' light). Evenly lit frames: 1. One frame lit at
    # 1/sqrt(12) and one, three times as bright, lit over its last quarter only (a uniform
    # quarter: spread 0.25/sqrt(12)): sqrt((1 + 3/16) / 4) (worked by hand).
    from meteorspec.extract import FrameSpectra
    from meteorspec.pipeline import streak_share

    def frames(spread, weight):
        n = len(spread)
        return FrameSpectra(np.array([500.0]), np.array([1.0]), np.ones((n, 1)), np.ones((n, 1)),
                            np.zeros((n, 1), bool), np.arange(n) * 0.04, (), np.asarray(weight, float),
                            light_spread=np.asarray(spread, float))

    even = 1.0 / np.sqrt(12.0)
    assert streak_share(frames([even, even, even], [1.0, 5.0, 2.0])) == pytest.approx(1.0, abs=1e-12)
    assert streak_share(frames([even, 0.25 * even], [1.0, 3.0])) == pytest.approx(np.sqrt((1 + 3 / 16) / 4), abs=1e-12)
    # frames without a known light (weight NaN, saturated in full) do not count; none known: NaN
    assert streak_share(frames([even, 0.25 * even], [1.0, np.nan])) == pytest.approx(1.0, abs=1e-12)
    assert np.isnan(streak_share(frames([even], [np.nan])))
    assert np.isnan(streak_share(frames([], [])))

# --------------------------------------------------------------------------- black-level floor of faint spectra


def _encoded_mean(mean_adu, read_adu, gain):
    """Mean linear value of a pixel with signal mean ``mean_adu`` as the camera stores it (contract section 3).

    Poisson electrons plus Gaussian read noise (common practice, Janesick 2007, *Photon Transfer*), the
    encoding rounding the signal above black to an integer and stopping at 0: for a rounded non-negative
    variable ``E = sum_{j>=1} Pr(L >= j - 1/2)``. Exact sums (no sampling), tabulated and interpolated.
    """
    from scipy.stats import norm, poisson

    grid = np.linspace(0.0, float(np.max(mean_adu)) + 1.0, 801)
    k = np.arange(0, int(grid[-1] * gain + 12 * np.sqrt(grid[-1] * gain) + 20))
    j = np.arange(1, int(grid[-1] + 12 * np.sqrt(read_adu**2 + grid[-1] / gain) + 20))
    tail = norm.sf((j[:, None] - 0.5 - k[None, :] / gain) / read_adu).sum(axis=0)  # E[. | k electrons]
    table = poisson.pmf(k[None, :], grid[:, None] * gain) @ tail
    return np.interp(mean_adu, grid, table)


@dataclass
class FloorBackground:
    """A dark sky on a camera whose pixel values stop at the black level: the meteor-free mean is floor-cut."""

    level_adu: np.ndarray
    sky_adu: np.ndarray
    read_noise_adu: float
    gain_e_per_adu: float
    star_mask: np.ndarray

    # the same noise model as the flat sky's, on this level
    residual = FlatBackground.residual
    variance = FlatBackground.variance


def test_black_level_floor_of_a_faint_spectrum_is_corrected():
    """A faint spectrum on a dark sky of a low-black-level 8-bit camera keeps its energy.

    Pixel values stop at the black level (contract section 3), so the noise's low tail is cut: less on a
    pixel the meteor lights than on the dark sky the background level comes from, and a faint line's
    residual falls short of its light by up to the floor's excess (0.05 ADU per pixel on a 4 ADU sky
    under 2.6 ADU of noise, the QM01 demo camera). The frames here hold each pixel's *expected* stored
    value (exact sums over the camera's noise model, :func:`_encoded_mean`), so the test is
    deterministic. The reference is the same light extracted from linear frames without a floor (the
    lines' windows share their Gaussian tails, so it is not exactly the line energy). Bar 0.3 %: the
    correction's pixel model comes from the extracted spectrum and the fitted profile, not from the
    truth (measured: +0.1 %); without the correction the lines come out 1.7-2.5 % low.
    """
    read, gain, sky = 1.8, 1.2, 4.0
    cam = camera()
    tr = LinearTrack(times(4), 150.0, 120.0, 400.0, 250.0)
    lines = [(lam, e / 25.0) for lam, e in LINES]  # 100-240 ADU per exposure: 1-6 ADU at the peak pixel
    clean = render(FISHEYE, tr, cam, lines)
    shape = (cam.height, cam.width)
    no_stars = np.zeros(shape, bool)

    def energies(frames, level, corr):
        bg = FloorBackground(np.full(shape, level, np.float32), np.full(shape, level, np.float32), read, gain,
                             no_stars)
        fs = extract_spectra(frames, bg, tr, FISHEYE, camera=cam, optimal=False, floor_correction=corr)
        return np.array([window_energy(fs, lam, lines) for lam, _ in lines])

    linear = [Frame(c.index, c.time_s, c.exposure_s, (sky + c.signal).astype(np.float32), c.saturated)
              for c in clean]
    stored = [Frame(c.index, c.time_s, c.exposure_s, _encoded_mean(sky + c.signal, read, gain).astype(np.float32),
                    c.saturated) for c in clean]
    ref = energies(linear, sky, False)
    floor_level = float(_encoded_mean(np.array(sky), read, gain))
    assert_allclose(energies(stored, floor_level, True) / ref, 1.0, atol=0.003)
    assert np.all(energies(stored, floor_level, False) / ref < 0.99)


# --------------------------------------------------------------------------- profile-weighted extraction


@dataclass
class DeceleratingTrack(LinearTrack):
    """Zeroth order slowing down: each exposure's streak is shorter than the last (x'' = ax, y'' = ay)."""

    ax_px_s2: float = 0.0
    ay_px_s2: float = 0.0

    def position(self, time_s):
        t = np.asarray(time_s, dtype=float)
        return (self.x0_px + self.vx_px_s * t + 0.5 * self.ax_px_s2 * t * t,
                self.y0_px + self.vy_px_s * t + 0.5 * self.ay_px_s2 * t * t)

    def velocity_px_s(self, time_s):
        t = np.asarray(time_s, dtype=float)
        return self.vx_px_s + self.ax_px_s2 * t, self.vy_px_s + self.ay_px_s2 * t


def test_optimal_extraction_of_interlaced_fields_conserves_flux():
    # A field row stands for two image rows: its value (scaled by 2) is
    # F p disp * 2. Horne's weights once left the 2 out, and every interlaced
    # event came out ~2x too bright (bench/flux_ratio.py events 4, 12, 14:
    # +61 to +85 % on the Na and O I windows). Noise-free float frames, so
    # the truth is exact; tolerance 0.5 %: boxcar recovers these windows to
    # ~0.1 % (test_interlaced_fields_conserve_flux), and the fitted Gaussian
    # profile (PSF plus the pixel's 1/12 px^2, convolved with each field's
    # streak) departs from the pixel-integrated one by far less than that.
    cam = camera(interlaced=True)
    tr = LinearTrack(times(2, interlaced=True), 150.0, 120.0, 300.0, 400.0)
    frames = render(FISHEYE, tr, cam, LINES, n_frames=2, interlaced=True)
    bg = FlatBackground(cam.height, cam.width)
    fs = extract_spectra(frames, bg, tr, FISHEYE, camera=cam, optimal=True)
    assert fs.optimal
    for lam, e in LINES:
        assert_allclose(window_energy(fs, lam, LINES), 4 * e, rtol=0.005)


def test_optimal_extraction_unbiased_when_streaks_differ_between_frames():
    # A decelerating meteor brightening within each exposure: its streak
    # shrinks from 21 px to 9 px over the flight, and its part across the
    # spectrum changes along the spectrum as the curve turns with
    # the fisheye's curved spectrum, so no single cross-dispersion profile fits
    # every frame (Horne's estimate is F sum(p P / V) / sum(p^2 / V) for a
    # true profile P). Bright lines (peak pixels ~10^3 ADU, the lines' own shot
    # noise dominates the variance) also test that the weights treat a
    # line's bins alike: weights following each bin's brightness took 1.5-3 %
    # off streaked lines. Noise-free float frames; tolerance 0.5 % as in
    # test_optimal_extraction_of_interlaced_fields_conserves_flux, against
    # the boxcar sum of the same frames (flux-exact to ~1e-3 here) and the truth.
    cam = camera()
    tr = DeceleratingTrack(times(5), 110.0, 140.0, 220.0, 160.0, ax_px_s2=-700.0, ay_px_s2=-500.0)

    def light(t):
        return np.exp(20.0 * np.asarray(t))

    lines = [(450.0, 9000.0), (517.27, 12000.0), (589.0, 15000.0), (777.41, 8000.0)]
    frames = render(FISHEYE, tr, cam, lines, n_frames=5, light=light, n_sub=48, sigma=1.2)
    tr.flux_adu = np.array([np.mean(light(t + (np.arange(48) + 0.5 - 24) / 48 / 25.0)) for t in tr.time_s])
    bg = FlatBackground(cam.height, cam.width)
    box = extract_spectra(frames, bg, tr, FISHEYE, camera=cam, optimal=False)
    opt = extract_spectra(frames, bg, tr, FISHEYE, camera=cam, optimal=True)
    across = [-np.diff(np.array(tr.position([t - 0.02, t + 0.02])), axis=1) for t in tr.time_s]
    assert np.hypot(*across[0].ravel()) > 2.0 * np.hypot(*across[-1].ravel())  # the streaks really differ
    for lam, e in lines:
        truth = e * float(np.sum(tr.flux_adu))
        assert_allclose(window_energy(box, lam, lines), truth, rtol=0.005)
        assert_allclose(window_energy(opt, lam, lines), truth, rtol=0.005)


def test_whole_flight_adds_the_profile_shape_error_coherently():
    # Two frames, one recovered bin each with a 10 % shape error on a flux of 10 (variance 1 from
    # the shape, 0.5 from noise): the noise adds in quadrature (1.0), the shape error is the same
    # profile in both frames and adds linearly ((1 + 1)^2 = 4) -- the sum of fully correlated
    # errors (common practice).
    wl = np.array([500.0, 501.0])
    bw = np.ones(2)
    flux = np.array([[10.0, 5.0], [10.0, 5.0]])
    rel = np.array([[0.1, 0.0], [0.1, 0.0]])
    var = 0.5 + (rel * flux) ** 2
    fs = FrameSpectra(wl, bw, flux, var, np.zeros((2, 2), bool), np.array([0.0, 0.04]), (),
                      np.ones(2), shape_rel_err=rel)
    whole = fs.whole_flight()
    assert_allclose(whole.flux, [20.0, 10.0])
    assert_allclose(whole.flux_err ** 2, [1.0 + 4.0, 1.0])
    plain = dataclasses.replace(fs, shape_rel_err=np.zeros((0, 0)))
    assert_allclose(plain.whole_flight().flux_err ** 2, [1.0 + 2.0, 1.0])


# --------------------------------------------------------------------------- a fireball lighting up inside an exposure


def test_fireball_lighting_up_inside_its_first_exposure_keeps_only_bins_its_scale_up_explains():
    # Event 23 of the seeded simulator set random_specs(36, seed=6) (the one bench/
    # plasma_end_to_end.py --seed 6 runs; no stars or atmosphere here): a fireball whose
    # first-order spectrum saturates from the exposure in which it lights up to the one in
    # which it goes out, its light rising 17-fold from the first exposure to the second. The
    # track is what the tracker gives a saturated zeroth order: positions and the measured
    # light centroid, no flux. Truth: the same extraction of the simulator's noise-free,
    # unclipped frames. In the first two and last two lit exposures every composition window
    # (Na I D, Mg I b, Fe I 526-545, 400-450 nm) with bins the extraction keeps must agree with
    # the truth within 3 sigma of its stated error (noise plus the profile-shape term). Before
    # the measured centroid placed the light within the end exposures (and the frame's PSF fit
    # lit its streak the same way), the profile lit the wrong end of the streak: the first
    # exposure's bins were kept as recovered and read 0.5-2.4 % of their light (1600-6200
    # sigma), the last one's Mg I b window 15 % low (7 sigma).
    from meteorspec.simulate import random_specs, render_event

    spec = dataclasses.replace(random_specs(36, seed=6)[23], atmosphere=False, n_stars=0)
    r = render_event(spec)
    stack, cam = r.frame_stack(), r.station.camera
    base = _truth_track(r)
    lit = np.flatnonzero(base.luminous)
    sat = np.array([t.saturated for t in r.truths])
    assert sat[lit[0]] and sat[lit[-1]]
    track = SimpleNamespace(**vars(base), x_meas_px=np.where(base.luminous, [t.x_centroid_px for t in r.truths], np.nan),
                            y_meas_px=np.where(base.luminous, [t.y_centroid_px for t in r.truths], np.nan))
    track.flux_adu = np.where(sat, np.nan, base.flux_adu)
    bg = FlatBackground(cam.height, cam.width, sky_adu=spec.sky_adu, read_noise_adu=cam.read_noise_adu,
                        gain_e_per_adu=cam.gain_e_per_adu)
    fs = extract_spectra(stack, bg, track, r.geometry, camera=cam, optimal=False)
    truth = [Frame(k, f.time_s, f.exposure_s, r.linear_clean[k].astype(np.float32),
                   np.zeros(r.linear_clean[k].shape, bool)) for k, f in enumerate(stack)]
    ref = extract_spectra(truth, bg, track, r.geometry, camera=cam, optimal=False,
                          wavelength_grid_nm=fs.wavelength_nm)
    checked = 0
    for k in (*lit[:2], *lit[-2:]):
        for lo, hi in ((580.0, 598.0), (510.0, 524.0), (525.0, 545.0), (400.0, 450.0)):
            inside = (fs.wavelength_nm >= lo) & (fs.wavelength_nm < hi)
            if not (~fs.mask[k] & inside).any():
                continue
            got, err = _window(fs, k, lo, hi)
            want, _ = _window(ref, k, lo, hi, mask=fs.mask[k])
            assert abs(got - want) <= 3.0 * err, (k, lo, got / want, err / want)
            checked += 1
    assert checked >= 3


@pytest.mark.parametrize("vx, vy", [(200.0, 200.0), (250.0, 120.0), (120.0, 300.0), (300.0, 0.0), (0.0, 300.0)])
def test_line_width_of_a_streaked_line_as_the_instrument_model_states(vx, vy):
    # The extraction shears its integration towards the motion (module notes, step 3), which
    # removes most of a diagonal streak's smear along the dispersion. The instrument width that
    # the plasma fit and the line finder are given (lines.line_streak_px with the PSF, then
    # lines.instrument_fwhm_nm) must state the width of the lines the extraction returns: here
    # the second moment of one rendered line (8-12 px streaks per exposure, PSF sigma 1.3 px,
    # the extraction's default shear sigma). Tolerance 7 %: the render's pixel integration and
    # the extraction's fractional binning each add 1/12 px^2 to a 2.5-11 px^2 variance (about
    # 3 % of the FWHM together), which the model leaves out. Counting the whole streak along
    # the dispersion, as before, stated 16.8 nm for the 11.6 nm of the (200, 200) px/s case.
    from meteorspec.extract import SHEAR_PSF_SIGMA_PX
    from meteorspec.lines import instrument_fwhm_nm, line_streak_px
    cam = camera()
    geo = SpectralGeometry(LensModel("equidistant", 600.0, 319.5, 239.5), GratingModel(600.0, 0.0))
    tr = LinearTrack(times(4), 150.0, 200.0, vx, vy)
    lam0 = 589.0
    frames = render(geo, tr, cam, [(lam0, 5000.0)], n_frames=4, sigma=1.3)
    w = extract_spectra(frames, FlatBackground(cam.height, cam.width), tr, geo, camera=cam,
                        optimal=False).whole_flight()
    wl, bw = np.asarray(w.wavelength_nm), np.asarray(w.bin_width_nm)
    e = np.asarray(w.flux) * bw
    sel = np.abs(wl - lam0) < 30.0
    c = np.sum(wl[sel] * e[sel]) / np.sum(e[sel])
    var = np.sum((wl[sel] - c) ** 2 * e[sel]) / np.sum(e[sel]) - np.mean(bw[sel]) ** 2 / 12.0  # bins' own
    measured = np.sqrt(8.0 * np.log(2.0) * var)
    x0, y0 = tr.position(0.08)
    streak = line_streak_px(geo, x0, y0, [vx], [vy], 0.04, [lam0], psf_sigma_px=1.3,
                            shear_sigma_px=SHEAR_PSF_SIGMA_PX)
    stated = instrument_fwhm_nm(geo, x0, y0, [lam0], psf_fwhm_px=2.3548 * 1.3, streak_px=streak)[0]
    assert abs(measured / stated - 1.0) < 0.07
