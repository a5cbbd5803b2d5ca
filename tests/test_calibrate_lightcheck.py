"""The zeroth-order check of the event calibration: no first-order light short of the UV cut-off.

Ozone absorbs all light below ~300 nm (the atmospheric ultraviolet cut-off, common practice;
from memory: the Hartley band of O3 makes the atmosphere opaque shortward of ~0.3 um, as
tabulated in Allen's Astrophysical Quantities), so a first order carries no light between the
zeroth order and 300 nm. A refined
geometry whose curves find light there sits on a "zeroth order" that is really part of the
first order (a tracker that took the bright blue end for the zeroth order). Images are drawn
here from the project's grating model with seeded noise; the line wavelengths are the NIST
centroids of :func:`meteorspec.calibrate.feature_centroids`.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from meteorspec import calibrate as cal
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry

W, H = 720, 576
# a normal-field camera at ~2.7 nm/px, as the seeded benches' interlaced stations
GEO = SpectralGeometry(LensModel("orthographic", 700.0, 359.5, 287.5), GratingModel(500.0, 2.0))
PSF_PX = 1.3
NOISE_ADU = 1.0


def _image(geo: SpectralGeometry, x0: float, y0: float, lines_nm: dict[float, float],
           rng: np.random.Generator) -> np.ndarray:
    """Background residual of one frame: Gaussian line images along the first order, plus noise."""
    yy, xx = np.mgrid[0:H, 0:W].astype(float)
    img = rng.normal(0.0, NOISE_ADU, (H, W))
    for wl, amp in lines_nm.items():
        x, y = geo.spectrum_pixel(x0, y0, wl, 1)
        img += amp * np.exp(-0.5 * ((xx - float(x)) ** 2 + (yy - float(y)) ** 2) / PSF_PX**2)
    # the zeroth order itself (a quarter of the light, as the simulator's share)
    img += 0.25 * sum(lines_nm.values()) * np.exp(-0.5 * ((xx - x0) ** 2 + (yy - y0) ** 2) / PSF_PX**2)
    return img


def _cuts(lines_nm: dict[float, float], *, track_dx: float = 0.0, track_dy: float = 0.0,
          seed: int = 3) -> list:
    """Three frames of a meteor moving up the field; ``track_dx, track_dy`` move the tracked 'zeroth order'
    away from the true one (as a tracker that took a first-order feature for it)."""
    rng = np.random.default_rng(seed)
    out = []
    for k in range(3):
        x0, y0 = 165.0 + 0.7 * k, 225.0 - 1.9 * k
        img = _image(GEO, x0, y0, lines_nm, rng).astype(np.float32)
        out.append(cal._FrameCut(k, x0 + track_dx, y0 + track_dy, 0.7, -1.9, img,
                                 np.full_like(img, NOISE_ADU), 0, 1, NOISE_ADU))
    return out


def _lines() -> dict[float, float]:
    """Bright meteor features (peak ADU): Ca II H and K, Fe I 382, Mg I b, Na I D, O I 777."""
    c = cal.feature_centroids()
    amps = {"Ca II K": 30.0, "Ca II H": 25.0, "Fe I 382.0-382.6": 20.0, "Mg I b": 60.0,
            "Na I D": 50.0, "O I 777.4": 15.0}
    return {c[name][1]: a for name, a in amps.items()}


def _event_solution(geo: SpectralGeometry):
    return dataclasses.replace(cal.station_solution(geo), source="event", flags=())


def test_true_zeroth_order_keeps_the_solution():
    cuts = _cuts(_lines())
    gap, vis, snr = cal._gap_light(GEO, cuts, psf_px=PSF_PX, order=1)
    # the gap holds noise only: within 5 sigma (the detection threshold) and far below the lines
    assert abs(snr) < cal._GAP_MIN_SIGMA
    assert vis > 0 and abs(gap) < 0.05 * vis
    sol = cal._checked_zeroth_order(_event_solution(GEO), cuts, PSF_PX, GEO, 1)
    assert sol.source == "event" and cal.ZEROTH_ORDER_FLAG not in sol.flags


def test_light_just_beyond_the_cutoff_is_allowed():
    # a bright line at 320 nm lies beyond the 300 nm cut-off: real first-order light, no flag
    lines = _lines() | {320.0: 80.0}
    cuts = _cuts(lines)
    sol = cal._checked_zeroth_order(_event_solution(GEO), cuts, PSF_PX, GEO, 1)
    assert sol.source == "event"


def test_first_order_feature_taken_for_zeroth_order_is_rejected():
    # the tracked point is where the first order has Ca II H and K (~395 nm): Mg I b and Na I D
    # then lie between it and where any geometry puts 300 nm
    x_k, y_k = GEO.spectrum_pixel(165.0, 225.0, 395.0, 1)
    cuts = _cuts(_lines(), track_dx=float(x_k) - 165.0, track_dy=float(y_k) - 225.0)
    # a stretch 5.5 % off, as the accepted wrong fit of the seeded bench event
    wrong = GEO.with_grating(grooves_per_mm=527.5)
    gap, vis, snr = cal._gap_light(wrong, cuts, psf_px=PSF_PX, order=1)
    assert snr > cal._GAP_MIN_SIGMA and gap > vis
    sol = cal._checked_zeroth_order(_event_solution(wrong), cuts, PSF_PX, GEO, 1)
    assert sol.source == "station"
    assert cal.ZEROTH_ORDER_FLAG in sol.flags and "calibration_from_station" in sol.flags
    assert sol.geometry == GEO


@pytest.mark.parametrize("grooves", [480.0, 500.0, 520.0])
def test_check_does_not_depend_on_the_stretch(grooves):
    # whatever stretch the fit settles on, a true zeroth order keeps a dark gap
    geo = GEO.with_grating(grooves_per_mm=grooves)
    cuts = _cuts(_lines())
    assert cal._checked_zeroth_order(_event_solution(geo), cuts, PSF_PX, geo, 1).source == "event"


# --------------------------------------------------------------------------- wide re-measure
# The second check of an accepted solution (cal._checked_wide_offset): the isolated features
# re-measured along its curves with a search wider than any refinement round's. A wrong stretch
# that the refinement carried its features along with leaves them off its curves by a common
# shift. Same drawn images: lines at NIST centroids through the project's grating model.


def _stretched(frac: float) -> SpectralGeometry:
    return SpectralGeometry(GEO.lens, dataclasses.replace(GEO.grating,
                                                          grooves_per_mm=GEO.grating.grooves_per_mm * (1 + frac)))


def test_wide_remeasure_keeps_the_true_geometry():
    cuts = _cuts(_lines())
    off, err, n = cal._wide_offset(GEO, cuts, PSF_PX, 1, n_bins=8)
    # the features sit on the true curves within a quarter pixel (template and sampling
    # floor; the refusal needs a whole pixel)
    assert n >= 5 and abs(off) < 0.25
    sol = cal._checked_wide_offset(_event_solution(GEO), cuts, PSF_PX, GEO, 1, n_bins=8)
    assert sol.source == "event" and cal.WIDE_OFFSET_FLAG not in sol.flags


@pytest.mark.parametrize("frac", [0.01, -0.012])
def test_wide_remeasure_refuses_a_wrong_stretch(frac):
    # 1-1.2 % in groove density (the refused seed-5 perturbed composition event 021: +1.18 %)
    # moves the features 1.7-2.5 px at ~2.7 nm/px: station values, flagged
    cuts = _cuts(_lines())
    off, err, n = cal._wide_offset(_stretched(frac), cuts, PSF_PX, 1, n_bins=8)
    assert abs(off) > cal._WIDE_MIN_OFFSET_PX and abs(off) > cal._WIDE_MIN_SIGMA * err
    sol = cal._checked_wide_offset(_event_solution(_stretched(frac)), cuts, PSF_PX, GEO, 1, n_bins=8)
    assert sol.source == "station" and cal.WIDE_OFFSET_FLAG in sol.flags
