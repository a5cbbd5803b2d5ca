"""Grating geometry from each frame's whole first-order spectrum (forward-model fit).

Where isolated features blend (binned cameras, > 6 nm/px, or an all-sky lens at 4-5 nm/px
with motion smear) the feature and blend-window positions of :mod:`meteorspec.calibrate` can
settle on a wrong stretch with a normal-looking RMS. This module fits the geometry to the
light itself instead: for a trial geometry every frame's spectrum along its curve is
predicted as

* the NIST lines (:mod:`meteorspec.atomic`) of each meteor species with LTE weights, one
  free non-negative intensity per species (Fe I twice, at a cool and a warm temperature, so
  that the shape of its blends is not fixed by one assumed temperature), and for each of the
  strongest multiplets a change of its strength, held near its LTE share by a Gaussian prior
  (real spectra depart from optically thin LTE most in those: self-absorption),
* the N2 first-positive bands (the band samples of :mod:`meteorspec.plasma`) with free
  non-negative intensities,
* a smooth continuum (Legendre polynomial in the position along the curve times the station
  response, free sign),

each line spread by the PSF convolved with the exposure's motion streak along the spectrum.
The intensities are solved linearly (non-negative least squares, shared by all frames, with
one brightness factor per frame) for every trial geometry (variable projection); the
geometry (groove density, dispersion angle, tilt components) is refined by :func:`scipy.optimize.least_squares` over all frames at once:
the frames sit at different zeroth-order positions, so the changing dispersion and curve
along the track constrain the geometry; and because blends are part of the model they do
not pull a centroid.

The data of a frame are fixed pixels: aperture sums across a band around the curve of a
*reference* geometry, sampled every half pixel along it. For a trial geometry the
wavelength of each sample is :meth:`SpectralGeometry.locate` of that pixel; a trial whose
curve moves sideways by much less than the aperture half-width sees the same data. After a
fit the data are resampled along the fitted curve and the fit repeated.

The result carries the chi-square of the fit and the wavelength disagreement of two fits to
the two halves of the track, which :mod:`meteorspec.calibrate` uses to tell a solution
from a wrong one.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import ndimage, optimize

from . import atomic
from .calibrate import (_PRIOR_SIGMA, _TEMPLATE_WEIGHT, _FrameCut, _line_list, _line_profile, _pack,
                        _response_at, _sample_curves_both, _unpack, tilt_errors)
from .optics import SpectralGeometry
from .plasma import n2_band_samples

__all__ = ["SpectrumFit", "fit_spectrum_geometry", "residual_correlation", "spectrum_chi2", "spectrum_components",
           "wavelength_disagreement_nm"]

#: Temperatures of the two Fe I components (K): the main component of meteor spectra spans
#: roughly 3500-5500 K (Borovicka 1994, Planet. Space Sci. 42, 145; from memory, rounded).
_FE_TEMPERATURES_K = (3500.0, 6000.0)
#: Hot-component species (~10 000 K, same source) and the rest at 4500 K.
#: Floor of the cross-dispersion centroid error (px): sampling and PSF-shape effects left aside.
_CROSS_FLOOR_PX = 0.05
#: Normalised residual given to every sample of a frame the trial geometry's model cannot reach
#: (its curve off the sensor, fewer than 20 usable samples): a constant penalty, 30 sigma.
_UNFIT_RESIDUAL = 30.0
_HOT = ("Ca II", "Mg II", "Si II", "Fe II", "H I", "O I", "N I")
#: A multiplet gets a strength of its own (on top of its species' LTE share) when it carries at
#: least this much of a typical meteor's line light: the species' template weight
#: (``calibrate._TEMPLATE_WEIGHT``, Fe I = 1) times the multiplet's share of the species' light
#: as the camera sees it (after the response). The strongest features are the ones whose
#: wrong relative strength moves a blend centroid by most.
_MULTIPLET_MIN_LIGHT = 0.02
#: ... unless it is nearly all of its species (then the species' own strength is that multiplet's).
_MULTIPLET_MAX_SHARE = 0.9
#: 1-sigma of that change, as a fraction of the multiplet's LTE strength (Gaussian prior about
#: it). Real meteor spectra depart from optically thin one-temperature LTE mostly by
#: self-absorption of the strongest low-excitation multiplets (central optical depths of a few
#: in bright meteors: Borovicka 1993, A&A 279, 627; from memory): the curve of growth
#: (``plasma.growth_ratio``) leaves a line at tau0 = 2-3 with 0.56-0.45 of its thin energy, so
#: departures of ~50 %; a multiplet's upper-level population away from the fitted temperatures
#: (the main component spans 3500-5500 K, see above) moves it by the same order. The prior's
#: chi-square is then raised as the samples' is overstated (:meth:`_Model.weigh_prior`).
_MULTIPLET_SIGMA = 0.5
#: :meth:`_Model.settle_brightness` settles the factors of the frames with at least this share of
#: their samples usable, among themselves; the others start every solve from their total light,
#: as before the settling. A frame showing less of its spectrum is nearly all saturated: its few
#: samples are the wings of lines under the clipped stretch, and the factor that fits them at the
#: reference geometry is not the one at another trial geometry, so settled it holds the fit near
#: the reference. Seed-5 event 029 of ``bench/plasma_end_to_end.py --modes perturbed`` (a
#: fireball; at the coarse start, 8 % off in stretch, 8 of its 9 frames 9-19 % usable): settled
#: with the rest, their factors rose from their total light by x54 (the 19 % frame) to x1.6e5, the
#: fit's robust cost fell away from the truth at the start, and the fit stayed 46 nm off and was
#: rejected (station values, 16 nm off; composition 0.107 off, class wrong); held, the fit walks
#: to the solution of the event's one well-exposed frame as before the settling (lines 3.1 nm
#: off, the station's tilt held; composition 0.046 off, class right). Seed-5 calibration bench
#: event 017, for which the settling was made (saturated over 440-710 nm), keeps 31-100 % of its
#: frames' samples.
_SETTLE_MIN_USABLE = 0.25
#: Degree of each frame's continuum: a Legendre polynomial along the curve times the station
#: response at each sample's wavelength (when the response is given). The camera sees a smooth
#: emitted continuum times the response, which peaks mid-range; a bare quadratic over 370-890 nm
#: cannot follow that, and a strong multiplet near the peak then fills the difference (a test
#: spectrum with a flat continuum times a Gaussian response, ``tests/test_calfit.py``: reduced
#: chi-square 26 with a bare quadratic, 2.2 with the response's shape; stretch -0.18 % against
#: -0.04 %). A bare polynomial of degree 3 or 4 followed it too, but let a wrong stretch (-2.4 %)
#: hold there or another start's solution come within the ambiguity threshold on a bench event.
_CONTINUUM_DEGREE = 2


@functools.lru_cache(maxsize=4)
def _components(lo_nm: float, hi_nm: float) -> tuple[tuple[str, str, NDArray, NDArray, NDArray], ...]:
    """``(name, species, air wavelengths nm, relative weights, multiplet labels)`` of every component."""
    lines_all = _line_list()
    comps = []
    for species in _TEMPLATE_WEIGHT:
        lines = lines_all.for_species(species).in_range(lo_nm, hi_nm)
        lines = lines.select(lines.transition_type == "E1")
        if len(lines) == 0:
            continue
        temps = _FE_TEMPERATURES_K if species == "Fe I" else ((10000.0,) if species in _HOT else (4500.0,))
        for t in temps:
            e = np.asarray(atomic.line_energy_rate(lines, t, 1.0), float)
            keep = e > 1e-4 * e.max()
            if keep.any():
                w = e[keep] / e[keep].sum()
                comps.append((f"{species} {t:.0f} K", species, np.asarray(lines.wavelength_nm[keep], float), w,
                              np.asarray(lines.multiplet[keep], str)))
    wl, weights, names = n2_band_samples(degree=1)  # the calibrator's template, as measured in issue 4's benches
    for j, name in enumerate(names):
        sel = (weights[:, j] > 0) & (wl >= lo_nm) & (wl <= hi_nm)
        if sel.any():
            comps.append((name, "N2", np.asarray(wl[sel], float), weights[sel, j] / weights[sel, j].sum(),
                          np.full(int(sel.sum()), name, dtype=str)))
    return tuple(comps)


def spectrum_components(lo_nm: float = 340.0, hi_nm: float = 930.0) -> tuple[tuple[str, NDArray, NDArray], ...]:
    """Line components of the emission model: ``(name, air wavelengths nm, relative weights)``.

    One component per meteor species of the calibrator's template (LTE line energies at
    4500 K, or 10 000 K for hot-component species, from the NIST line list), Fe I at two
    temperatures, and one per N2 band parameter of :mod:`meteorspec.plasma`. The strongest
    multiplets get a regularised free strength on top (:class:`_Model`).
    """
    return tuple((c[0], c[2], c[3]) for c in _components(lo_nm, hi_nm))


@dataclass(frozen=True, eq=False)
class _FrameData:
    """One frame's aperture sums along a reference curve (fixed pixels)."""

    cut: _FrameCut
    x_px: NDArray          # sample pixels on the reference curve
    y_px: NDArray
    value: NDArray         # aperture sum per sample (ADU per px of arc)
    error: NDArray         # its 1-sigma
    step_px: float         # arc length between samples
    sigma_px: float        # line-spread sigma along the spectrum (PSF)
    box_px: float          # motion streak along the spectrum (full length)
    segment: NDArray       # segment (0..n_seg-1) of each sample along the curve
    cross_px: NDArray      # light centroid across the reference curve per segment (px)
    cross_err_px: NDArray  # its 1-sigma
    cross_weight: NDArray  # weights of the samples in the centroid (light, >= 0)


def _prepare(cuts: list[_FrameCut], geo: SpectralGeometry, *, psf_px: float, order: int,
             wl_range_nm: tuple[float, float], step_px: float = 0.5, n_segments: int = 3) -> list[_FrameData]:
    """Aperture sums every ``step_px`` along ``geo``'s curve of every frame."""
    half = max(2.0, math.ceil(2.5 * psf_px))
    offs = np.arange(-half, half + 0.01, 1.0)
    fine = np.linspace(wl_range_nm[0], wl_range_nm[1], 600)
    out = []
    for cut in cuts:
        xs, ys = geo.spectrum_pixel(cut.x0_px, cut.y0_px, fine, order)
        ok = np.isfinite(xs) & np.isfinite(ys)
        if ok.sum() < 10:
            continue
        xs, ys, wl = xs[ok], ys[ok], fine[ok]
        arc = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(xs), np.diff(ys)))])
        s = np.arange(0.0, arc[-1], step_px)
        if s.size < 20:
            continue
        lam = np.interp(s, arc, wl)
        curves = tuple(np.asarray(v, float)[None, :] for v in (
            np.interp(s, arc, xs), np.interp(s, arc, ys)) + tuple(geo.direction(cut.x0_px, cut.y0_px, lam, order)))
        (band,), (noise,) = _sample_curves_both([cut], curves, offs)
        good = np.all(np.isfinite(band), axis=0) & np.all(np.isfinite(noise), axis=0)
        if good.sum() < 20:
            continue
        value = np.where(good, band.sum(axis=0), np.nan)
        error = np.where(good, np.sqrt(np.sum(noise**2, axis=0)), np.nan)
        tx, ty = geo.direction(cut.x0_px, cut.y0_px, 600.0, order)
        box = abs(cut.streak_dx_px * float(tx) + cut.streak_dy_px * float(ty))
        # light centroid across the curve in a few segments along it: where the curve lies
        # sideways (the dispersion angle, and the tilt across the field)
        seg = np.minimum((np.arange(s.size) * n_segments) // s.size, n_segments - 1)
        wgt = np.where(good, np.clip(value, 0.0, None), 0.0)
        bpos = np.where(np.isfinite(band), band, 0.0)
        cross, cross_err = np.full(n_segments, np.nan), np.full(n_segments, np.nan)
        for j in range(n_segments):
            sel = (seg == j) & good
            tot = float(np.sum(bpos[:, sel]))
            if tot <= 0:
                continue
            c = float(np.sum(offs[:, None] * bpos[:, sel]) / tot)
            # centroid noise (samples every half px are correlated: x2 on the variance)
            var = 2.0 * float(np.sum(((offs[:, None] - c) * noise[:, sel]) ** 2)) / tot**2
            snr = tot / math.sqrt(2.0 * float(np.sum(noise[:, sel] ** 2)))
            if snr >= 5.0:
                cross[j], cross_err[j] = c, math.sqrt(var + _CROSS_FLOOR_PX**2)
        # the line spread along the curve: the PSF, the pixel (1/12 px^2) and the blur of the
        # bilinear resampling above, t(1 - t) px^2 at a sample a fraction t between pixels, 1/6 on
        # average (a property of linear interpolation). Without the last, on the unsaturated
        # noise-free render of seed-5 bench event 017 fitted from the truth the lines came out
        # 0.99 nm off (9.1 nm/px), 0.35 nm with it
        sigma_px = math.sqrt(max(psf_px, 0.7) ** 2 + 1.0 / 12.0 + 1.0 / 6.0)
        out.append(_FrameData(cut, curves[0][0], curves[1][0], value, error, step_px, sigma_px,
                              box if np.isfinite(box) else 0.0, seg, cross, cross_err, wgt))
    return out


class _Model:
    """Variable-projection residuals of a set of frames for trial geometries."""

    def __init__(self, data: list[_FrameData], *, order: int, continuum_degree: int = _CONTINUUM_DEGREE,
                 response: Callable[[NDArray], NDArray] | None = None, brightness_rounds: int = 2,
                 multiplet_sigma: float = _MULTIPLET_SIGMA):
        self.data = data
        self.brightness_rounds = int(brightness_rounds)
        self.order = order
        comps = _components(340.0, 930.0)
        self.names = [c[0] for c in comps]
        self.centres = np.concatenate([c[2] for c in comps])
        self.weights = np.concatenate([c[3] for c in comps])
        self.response = response
        if response is not None:
            # the camera sees the emitted lines times the station response: within a species
            # that reweights lines far apart, and so where its blends have their centroids
            self.weights = self.weights * _response_at(self.centres, response)
        self.comp = np.concatenate([np.full(c[2].size, j) for j, c in enumerate(comps)])
        self.n_base = len(comps)
        self._add_multiplets(np.concatenate([np.full(c[2].size, c[1]) for c in comps]),
                             np.concatenate([c[4] for c in comps]), multiplet_sigma)
        self.n_comp = self.n_base + self.n_dev
        self.prior_weight = 1.0  # see weigh_prior
        self.degree = continuum_degree
        self.kernels = []
        for d in data:
            nk = int(math.ceil((5.0 * d.sigma_px + 0.5 * d.box_px) / d.step_px))
            k = _line_profile(np.arange(-nk, nk + 1) * d.step_px, d.sigma_px, d.box_px) * d.step_px
            self.kernels.append((nk, k))
        # each frame's total light: the scale of the shared line intensities in that frame
        self.scale = np.array([max(float(np.nansum(d.value)) * d.step_px, 1e-9) for d in data])
        self.last_scale = self.scale.copy()  # the factors the last solve ended with
        # the pixels every trial geometry locates, built once: the same arrays at every call
        # let a remembering lens (``calibrate._MemoLens``) skip their directions
        self.x0 = np.concatenate([np.full(d.x_px.size, d.cut.x0_px) for d in data])
        self.y0 = np.concatenate([np.full(d.x_px.size, d.cut.y0_px) for d in data])
        self.xs = np.concatenate([d.x_px for d in data])
        self.ys = np.concatenate([d.y_px for d in data])
        self.cut = np.cumsum([d.x_px.size for d in data])[:-1]
        self._cont_cache: dict[int, tuple[bytes, NDArray, NDArray]] = {}

    def _add_multiplets(self, species: NDArray, multiplet: NDArray, sigma: float) -> None:
        """Columns of a free strength change of each strong multiplet, and the LTE strength the
        species components predict for it (``self.share``: component x multiplet)."""
        self.multiplet_sigma = float(sigma)
        picked = []
        if self.multiplet_sigma > 0:
            for sp, tw in _TEMPLATE_WEIGHT.items():
                on = species == sp
                total = float(self.weights[on].sum())
                if not total > 0:
                    continue
                for label in np.unique(multiplet[on]):
                    share = float(self.weights[on & (multiplet == label)].sum()) / total
                    if share <= _MULTIPLET_MAX_SHARE and tw * share >= _MULTIPLET_MIN_LIGHT:
                        picked.append((sp, str(label)))
        self.n_dev = len(picked)
        self.share = np.zeros((self.n_base, self.n_dev))
        centres, weights, comp = [self.centres], [self.weights], [self.comp]
        for m, (sp, label) in enumerate(picked):
            sel = (species == sp) & (multiplet == label)
            # the multiplet's lines with the mean of its species' components' weights: within a
            # multiplet the upper levels lie close, so its shape hardly depends on the temperature
            self.share[:, m] = np.bincount(self.comp[sel], self.weights[sel], minlength=self.n_base)
            centres.append(self.centres[sel])
            weights.append(self.weights[sel] / self.weights[sel].sum())
            comp.append(np.full(int(sel.sum()), self.n_base + m))
            self.names.append(f"{sp} {label}")
        self.centres, self.weights, self.comp = (np.concatenate(v) for v in (centres, weights, comp))

    def locate(self, geo: SpectralGeometry) -> tuple[list[NDArray], list[NDArray]]:
        lam, off = geo.locate(self.x0, self.y0, self.xs, self.ys, order=self.order)
        return np.split(lam, self.cut), np.split(off, self.cut)

    def lines(self, k: int, lam: NDArray) -> NDArray | None:
        """(n_samples, n_comp) line columns of frame ``k`` for sample wavelengths ``lam``."""
        n = lam.size
        idx = np.arange(n, dtype=float)
        ok = np.isfinite(lam)
        if ok.sum() < 20 or np.any(np.diff(lam[ok]) <= 0):
            return None
        nk, kern = self.kernels[k]
        # each line's position in sample units along the curve (wavelength rises along it)
        pos = np.interp(self.centres, lam[ok], idx[ok], left=-1e9, right=1e9) + nk
        n_ext = n + 2 * nk
        i = np.floor(pos).astype(int)
        f = pos - i
        use = (i >= 0) & (i < n_ext - 1)
        # lines off the curve deposit a weight of exactly 0 into bin 0 instead of being cut out:
        # every bin sums the same terms in the same order (adding 0 changes no sum)
        flat = np.where(use, self.comp * n_ext + i, 0)
        dep = (np.bincount(flat, np.where(use, self.weights * (1 - f), 0.0), minlength=self.n_comp * n_ext)
               + np.bincount(flat + 1, np.where(use, self.weights * f, 0.0), minlength=self.n_comp * n_ext))
        dep = dep[: self.n_comp * n_ext].reshape(self.n_comp, n_ext)
        return ndimage.convolve1d(dep, kern, axis=1, mode="constant")[:, nk: nk + n].T

    def _continuum(self, k: int, good: NDArray, lam: NDArray | None = None) -> tuple[NDArray, NDArray]:
        """Orthonormal continuum basis of frame ``k`` on its ``good`` samples (times the response at
        the samples' wavelengths ``lam``, see ``_CONTINUUM_DEGREE``), and the data with the
        continuum projected out; kept for the last mask and response of each frame."""
        rk = None
        if self.response is not None and lam is not None:
            rk = np.asarray(self.response(np.where(np.isfinite(lam), lam, 600.0)), float)
            rk = np.where(np.isfinite(rk) & (rk > 0), rk, 0.0)
        key = good.tobytes() + (b"" if rk is None else rk.tobytes())
        hit = self._cont_cache.get(k)
        if hit is not None and hit[0] == key:
            return hit[1], hit[2]
        d = self.data[k]
        bw = np.where(good, d.value / d.error, 0.0)
        u = np.linspace(-1.0, 1.0, good.size)
        cont = np.polynomial.legendre.legvander(u, self.degree) / np.where(good, d.error, np.inf)[:, None]
        if rk is not None:
            cont = cont * rk[:, None]
        q, _ = np.linalg.qr(cont)
        bw = bw - q @ (q.T @ bw)
        self._cont_cache[k] = (key, q, bw)
        return q, bw

    def settle_brightness(self, geo: SpectralGeometry, *, max_solves: int = 25, rtol: float = 1e-3) -> int:
        """Start every frame's brightness factor where the alternating solve converges at ``geo``.

        :meth:`solve` refines the factors from ``self.scale`` in ``brightness_rounds`` steps of
        alternating least squares, which converge slowly where a frame shows little of its
        spectrum: the shared intensities, fitted mostly to other frames, and the factor trade
        off against each other. Left short, the lines hidden under a frame's saturated stretch
        are modelled too faint, and the unsaturated wings beside them pull those lines
        towards themselves. Seed-5 bench event 017 (a fireball saturated from the violet end
        to 440-710 nm in 12 of its 14 frames, 9.1 nm/px), its noise-free render clipped at the
        real level and fitted from the truth (tilt held): lines (median) 2.0 nm off after 2
        steps, 1.4 after 4, 0.5 after 10, 0.2 after 20; 0.4 with the settled start (0.35 for
        the unclipped render). Settled once at the reference geometry (repeated solves
        until no factor changes by more than ``rtol``, at most ``max_solves``), they are the
        start of every trial geometry's solve, which refines them as before; one start for
        all trial geometries keeps the objective smooth. Only the frames with at least
        ``_SETTLE_MIN_USABLE`` of their samples usable are settled, among themselves; the others
        keep their start, their total light (see there). Returns the solves used.
        """
        held = np.array([np.count_nonzero(np.isfinite(d.value)) < _SETTLE_MIN_USABLE * d.value.size
                         for d in self.data], bool)
        if held.all():
            return 0
        if held.any():
            # settled without them: held in every solve at a start the others' common scale
            # drifts away from, they would keep the settling from converging
            rest = _Model([d for d, h in zip(self.data, held) if not h], order=self.order,
                          continuum_degree=self.degree, response=self.response,
                          brightness_rounds=self.brightness_rounds, multiplet_sigma=self.multiplet_sigma)
            rest.scale = self.scale[~held].copy()
            rest.prior_weight = self.prior_weight  # the same multiplet prior as a settling of all frames
            n = rest.settle_brightness(geo, max_solves=max_solves, rtol=rtol)
            self.scale = self.scale.copy()
            self.scale[~held] = rest.scale
            return n
        for n in range(1, max_solves + 1):
            self.solve(geo)
            new = np.asarray(self.last_scale, float)
            done = bool(np.all(np.abs(new / self.scale - 1.0) <= rtol))
            self.scale = new
            if done:
                return n
        return max_solves

    def weigh_prior(self, geo: SpectralGeometry) -> float:
        """Weigh the multiplets' prior as the data count at ``geo`` (returns the factor on its chi-square).

        The samples' chi-square overstates what they know by the reduced chi-square (when
        above 1) times the residuals' correlation along the spectra (as in
        :attr:`SpectrumFit.chi2_scale`); the prior on the multiplets' strengths is physics, not
        samples, so its chi-square is raised by the same factor, measured once with every
        multiplet at its LTE share (one factor for all trial geometries: a smooth objective).
        """
        self.prior_weight = 1.0
        r, _, _ = self.solve(geo, multiplets=False)
        fitted = self.fitted_series(r)
        n = sum(int(np.count_nonzero(f)) for f in fitted)
        chi2 = float(sum(np.sum(f * f) for f in fitted))
        self.prior_weight = max(1.0, chi2 / max(n, 1)) * residual_correlation(fitted) if n else 1.0
        return self.prior_weight

    def solve(self, geo: SpectralGeometry, *, lines: bool = True,
              multiplets: bool = True) -> tuple[NDArray, NDArray, list[NDArray]]:
        """Normalised residuals of all samples, of the cross positions and strength priors, and the
        fitted intensities (species and N2 components, then the multiplets' changes up, then down).

        The line intensities (the relative spectrum) are shared by all frames, so that a
        frame's spectrum cannot bend its own lines into place; each frame has one free
        brightness factor, and a continuum free per frame that is projected out exactly (it
        enters linearly with free sign).

        The brightness factors start at each frame's total light (a geometry-independent sum
        of its samples) and are then refined by alternating least squares with the shared
        intensities (``brightness_rounds``; each step solves one exactly given the other).
        The total light alone is the wrong scale wherever a frame shows only part of its
        spectrum: saturated stretches (NaN) and ends off the sensor leave its sum short, and
        every line of that frame is then modelled too faint by the same factor. At the true
        geometry of seeded simulator events (``bench/bench_calibration.py --n 30 --seed 4
        --truth-track``, events 8, 18, 25: 23-40 frames with saturated pixels) that left a
        reduced chi-square of 9-19 (50 in the brightest frames) and, with the tilt free,
        pulled the groove density by +0.1 to +0.2 %; refined, 1.4-2.7.

        The strongest multiplets' changes (``_MULTIPLET_SIGMA``) enter from the first brightness
        round on: their prior's scale is the LTE strength the species' components give them,
        taken from the round before.
        """
        lams, offs = self.locate(geo)
        t_rows, b_rows = [], []
        cross_r = []
        for k, (d, lam, off) in enumerate(zip(self.data, lams, offs)):
            good = np.isfinite(d.value) & np.isfinite(lam)
            t = self.lines(k, lam)
            if t is None or good.sum() < 20:
                t_rows.append(None)
                b_rows.append(np.full(d.value.size, _UNFIT_RESIDUAL))
            else:
                aw = np.where(good[:, None], t / d.error[:, None], 0.0)
                q, bw = self._continuum(k, good, lam)
                aw = aw - q @ (q.T @ aw)
                t_rows.append(aw)
                b_rows.append(bw)
            for j in range(d.cross_px.size):
                if not np.isfinite(d.cross_px[j]):
                    continue
                sel = (d.segment == j) & np.isfinite(off)
                w = d.cross_weight[sel]
                if w.sum() <= 0:
                    cross_r.append(30.0)
                    continue
                o = float(np.sum(w * off[sel]) / w.sum())
                cross_r.append((o + d.cross_px[j]) / d.cross_err_px[j])
        b = np.concatenate(b_rows)
        # a multiplet's change enters with either sign: two non-negative columns (+, -), each
        # with its own prior row, so that at most one of them carries light
        nb, nd = self.n_base, self.n_dev
        t_rows = [None if t is None else np.hstack([t, -t[:, nb:]]) for t in t_rows]
        ncol = nb + 2 * nd
        scale = self.scale.copy()
        expected = np.zeros(nd)  # each multiplet's LTE strength from the species components
        for rnd in range(1 + (self.brightness_rounds if lines else 0)):
            a = np.vstack([np.zeros((bk.size, ncol)) if t is None else t * s
                           for t, s, bk in zip(t_rows, scale, b_rows)])
            live = np.any(a != 0, axis=0) & lines
            # the changes only once the species' strengths are known (their prior's scale)
            live[nb:] &= np.tile(expected > 0, 2) & multiplets
            coef = np.zeros(ncol)
            prior = np.zeros(2 * nd)  # a fixed length: the residual vector of every trial geometry
            if live.any():
                dev = np.flatnonzero(live[nb:])
                inv = math.sqrt(self.prior_weight) / (self.multiplet_sigma * np.tile(expected, 2)[dev])
                rows = np.zeros((dev.size, ncol))
                rows[np.arange(dev.size), nb + dev] = inv
                coef[live], _ = optimize.nnls(np.vstack([a, rows])[:, live], np.concatenate([b, np.zeros(dev.size)]),
                                              maxiter=50 * ncol)
                prior[dev] = coef[nb + dev] * inv
                expected = coef[:nb] @ self.share
            if rnd == self.brightness_rounds or not live.any():
                break
            # each frame's brightness given the shared spectrum: linear least squares
            # (continuum already projected out); a frame the shared lines do not reach keeps its own
            for k, (t, bk) in enumerate(zip(t_rows, b_rows)):
                if t is None:
                    continue
                pk = t @ coef
                norm = float(pk @ pk)
                if norm > 0:
                    s_k = float(pk @ bk) / norm
                    if s_k > 0:
                        scale[k] = s_k
        self.last_scale = scale
        return b - a @ coef, np.concatenate([np.asarray(cross_r, float), prior]), [coef]

    def fitted_series(self, residuals: NDArray) -> list[NDArray]:
        """Each frame's sample residuals (of :meth:`solve`), without the frames the model did not reach.

        Their constant penalty would read as perfectly correlated residuals
        (:func:`residual_correlation`) and inflate the fit's errors.
        """
        return [f for f in np.split(residuals, self.cut) if not np.all(f == _UNFIT_RESIDUAL)]

    def residuals(self, geo: SpectralGeometry) -> NDArray:
        r, rc, _ = self.solve(geo)
        return np.concatenate([r, rc])


@dataclass(frozen=True, eq=False)
class SpectrumFit:
    """Result of :func:`fit_spectrum_geometry`.

    Attributes
    ----------
    geometry : SpectralGeometry
    chi2 : float
        Sum of squared normalised residuals over all frame samples (robust loss not applied).
    n_data : int
        Number of samples fitted.
    errors : dict
        1-sigma of ``grooves_per_mm``, ``dispersion_angle_deg`` and, with the tilt fitted,
        ``tilt_deg`` and ``tilt_azimuth_deg`` (Gauss-Newton covariance, scaled by the reduced
        chi-square when that exceeds 1 and by the residuals' correlation).
    n_frames : int
    success : bool
    n_components : int
        Model components (species, N2 bands) with light.
    line_chi2 : float
        Drop of the chi-square of the spectra when the lines are added to the continuum
        alone: how much the line model explains (its square root is the significance).
    tilt_err_deg : float
        Larger 1-sigma of the two tilt components (prior included; NaN when the tilt was held).
    correlation : float
        Integrated autocorrelation of the normalised residuals along the spectra
        (:func:`residual_correlation`, >= 1): how many samples carry one independent residual.
    """

    geometry: SpectralGeometry
    chi2: float
    n_data: int
    errors: dict[str, float]
    n_frames: int
    success: bool
    n_components: int = 0
    line_chi2: float = 0.0
    tilt_err_deg: float = math.nan
    correlation: float = 1.0

    def __bool__(self) -> bool:
        return self.success

    @property
    def reduced_chi2(self) -> float:
        return self.chi2 / max(self.n_data, 1)

    @property
    def chi2_scale(self) -> float:
        """Factor by which a chi-square difference overstates its significance: the reduced
        chi-square (when above 1) times the residuals' correlation."""
        return max(1.0, self.reduced_chi2) * max(1.0, self.correlation)


def fit_spectrum_geometry(cuts: list[_FrameCut], start: SpectralGeometry, *, psf_px: float,
                          prior: SpectralGeometry | None = None, fit_tilt: bool = True, order: int = 1,
                          wl_range_nm: tuple[float, float] = (370.0, 890.0), rounds: int = 2,
                          reference: SpectralGeometry | None = None, max_nfev: int = 60,
                          response: Callable[[NDArray], NDArray] | None = None,
                          tilt_sigma_deg: float | None = None,
                          multiplet_sigma: float = _MULTIPLET_SIGMA) -> SpectrumFit:
    """Fit groove density, dispersion angle and tilt to the frames' whole spectra.

    Parameters
    ----------
    cuts : list of _FrameCut
        Frames (background residuals and zeroth-order positions) from :mod:`meteorspec.calibrate`.
    start : SpectralGeometry
        Starting geometry (from the coarse search).
    psf_px : float
        PSF sigma in px.
    prior : SpectralGeometry, optional
        Values of the weak prior (``calibrate._PRIOR_SIGMA``); default ``start``.
    fit_tilt : bool
        Fit the tilt components (else held at the prior's).
    wl_range_nm : tuple
        Wavelengths of the reference curve sampled.
    rounds : int
        Fits, each on data resampled along the previous fit's curve.
    reference : SpectralGeometry, optional
        Curve the first round's data are sampled along (default ``start``).
    max_nfev : int
        Evaluations per round of :func:`scipy.optimize.least_squares`.
    response : callable, optional
        Station response (relative, of wavelength in nm); the line weights are multiplied
        by it. Without it the blends' shapes assume a flat response.
    tilt_sigma_deg : float, optional
        1-sigma of the prior on each tilt component about the prior's (default
        ``calibrate._PRIOR_SIGMA["tilt_deg"]``).
    multiplet_sigma : float
        1-sigma of the strongest multiplets' strength changes, as a fraction of their LTE
        strength (default ``_MULTIPLET_SIGMA``); 0 holds every multiplet at its LTE share.

    Returns
    -------
    SpectrumFit
        Falsy when there is nothing to fit or the fit fails.
    """
    prior = start if prior is None else prior
    pp = _pack(prior, False)
    ts = _PRIOR_SIGMA["tilt_deg"] if tilt_sigma_deg is None else float(tilt_sigma_deg)
    if not ts > 0:
        raise ValueError(f"tilt_sigma_deg must be > 0, got {tilt_sigma_deg!r}")
    ps = np.array([pp[0] * _PRIOR_SIGMA["grooves_frac"], _PRIOR_SIGMA["dispersion_angle_deg"], ts, ts])
    # step scales of the optimiser: independent of the prior's width
    xs = np.array([pp[0] * _PRIOR_SIGMA["grooves_frac"], _PRIOR_SIGMA["dispersion_angle_deg"],
                   _PRIOR_SIGMA["tilt_deg"], _PRIOR_SIGMA["tilt_deg"]]) * 0.02
    p = _pack(start, False)
    if not fit_tilt:
        p[2:4] = pp[2:4]
    free = np.array([True, True, fit_tilt, fit_tilt])
    ref = start if reference is None else reference
    geo = _unpack(p, start, False)
    fail = SpectrumFit(start, math.nan, 0, {}, 0, False)
    res = None
    model = None
    for _ in range(max(1, rounds)):
        data = _prepare(cuts, ref, psf_px=psf_px, order=order, wl_range_nm=wl_range_nm)
        if len(data) == 0:
            return fail
        model = _Model(data, order=order, response=response, multiplet_sigma=multiplet_sigma)
        model.settle_brightness(ref)
        model.weigh_prior(ref)

        def fun(q: NDArray, _model=model) -> NDArray:
            full = p.copy()
            full[free] = q
            r = _model.residuals(_unpack(full, start, False))
            return np.concatenate([r, (full[free] - pp[free]) / ps[free]])

        res = optimize.least_squares(fun, p[free], x_scale=xs[free], diff_step=1e-5, loss="soft_l1",
                                     f_scale=3.0, max_nfev=max_nfev)
        p[free] = res.x
        geo = _unpack(p, start, False)
        ref = geo
    r_s, r_c, coefs = model.solve(geo)
    line_chi2 = float(np.sum(model.solve(geo, lines=False)[0] ** 2) - np.sum(r_s**2))
    r = np.concatenate([r_s, r_c])
    n_data = int(np.count_nonzero(r))
    chi2 = float(np.sum(r**2))
    corr = residual_correlation(model.fitted_series(r_s))
    errors = {"grooves_per_mm": math.nan, "dispersion_angle_deg": math.nan}
    tilt_err = math.nan
    try:
        jac = res.jac
        # Gauss-Newton covariance, scaled by the reduced chi-square (when above 1) and by the
        # residuals' correlation along the spectra: n correlated samples weigh like n / corr
        cov = np.linalg.inv(jac.T @ jac) * max(1.0, chi2 / max(n_data - jac.shape[1], 1)) * corr
        err = np.sqrt(np.clip(np.diag(cov), 0, None))
        errors = {"grooves_per_mm": float(err[0]), "dispersion_angle_deg": float(err[1])}
        if fit_tilt:
            tilt_err = float(max(err[2], err[3]))
            errors.update(tilt_errors(p[2], p[3], cov[2:4, 2:4]))
    except np.linalg.LinAlgError:
        pass
    # status 0 (evaluation budget used up) still returns the best point found
    ok = bool(res.status >= 0) and bool(np.all(np.isfinite(p)))
    n_comp = int(np.count_nonzero(coefs[0][:model.n_base] > 0))
    return SpectrumFit(geo, chi2, n_data, errors, len(model.data), ok, n_comp, line_chi2, tilt_err, corr)


def residual_correlation(frames: list[NDArray], max_lag: int = 60) -> float:
    """Integrated autocorrelation ``1 + 2 sum_k rho_k`` of residual series (>= 1).

    ``rho_k`` is the lag-``k`` autocorrelation pooled over the series (each frame's normalised
    residuals along its spectrum, zeros where a sample is not fitted), summed until it first
    drops to zero or below (the initial-positive-sequence truncation, common practice for
    integrated autocorrelation times). Independent residuals give 1; a series whose values
    repeat ``L`` times gives ~``L``. Samples half a pixel apart that share pixels, and a
    model mismatch repeated across a line's width, make the residuals of the whole-spectrum
    fit correlated, so a sum of squares counts each independent residual several times.
    """
    c0 = float(sum(np.sum(f * f) for f in frames))
    if not c0 > 0:
        return 1.0
    tau = 1.0
    for k in range(1, max_lag + 1):
        ck = float(sum(np.sum(f[:-k] * f[k:]) for f in frames if f.size > k))
        rho = ck / c0
        if not rho > 0:
            break
        tau += 2.0 * rho
    return tau


def spectrum_chi2(cuts: list[_FrameCut], reference: SpectralGeometry, geometries: list[SpectralGeometry], *,
                  psf_px: float, order: int = 1, wl_range_nm: tuple[float, float] = (370.0, 890.0),
                  response: Callable[[NDArray], NDArray] | None = None) -> NDArray:
    """Chi-square of each geometry on the same data (sampled along ``reference``'s curves).

    Fits with different reference curves see different pixels; comparing solutions needs one.
    """
    data = _prepare(cuts, reference, psf_px=psf_px, order=order, wl_range_nm=wl_range_nm)
    if not data:
        return np.full(len(geometries), np.nan)
    model = _Model(data, order=order, response=response)
    model.settle_brightness(reference)
    model.weigh_prior(reference)
    return np.array([float(np.sum(model.residuals(g) ** 2)) for g in geometries])


def wavelength_disagreement_nm(a: SpectralGeometry, b: SpectralGeometry, cuts: list[_FrameCut], *,
                               order: int = 1, wl_range_nm: tuple[float, float] = (390.0, 850.0)) -> float:
    """Largest difference (nm) of the wavelengths two geometries give to the pixels of ``a``'s curves."""
    wl = np.linspace(wl_range_nm[0], wl_range_nm[1], 24)
    worst = 0.0
    for cut in cuts:
        xs, ys = a.spectrum_pixel(cut.x0_px, cut.y0_px, wl, order)
        ok = np.isfinite(xs) & np.isfinite(ys)
        if not ok.any():
            continue
        lam, _ = b.locate(np.full(ok.sum(), cut.x0_px), np.full(ok.sum(), cut.y0_px), xs[ok], ys[ok], order=order)
        d = np.abs(lam - wl[ok])
        if np.isfinite(d).any():
            worst = max(worst, float(np.nanmax(d)))
    return worst


