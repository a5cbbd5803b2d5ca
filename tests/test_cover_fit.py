"""Widening a composition's error to cover a second fit of the same meteor (classify.cover_other_fit).

The composition is ``f_i = I_i / sum(I)`` (contract section 6) with first-order error propagation
through the normalisation's Jacobian (common practice; classify.composition_from_groups). The
checks below compare the widened errors with that propagation done independently here, and
with a Monte Carlo of the intensities (seeded).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec import classify as cl

KEPT = np.array([8200.0, 110.0, 1660.0])        # an invented Na-rich meteor's group energies
KEPT_COV = np.diag([25.0, 27.0, 30.0]) ** 2


def _fractions_and_errors(intensity: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """f = I / S and sqrt(diag(J C J^T)), J = d f / d I written out element by element."""
    s = intensity.sum()
    jac = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            jac[i, j] = ((1.0 if i == j else 0.0) * s - intensity[i]) / s**2
    return intensity / s, np.sqrt(np.diag(jac @ cov @ jac.T))


def test_agreeing_fits_leave_the_covariance_unchanged():
    other = KEPT * np.array([1.0, 1.0, 1.004])  # fe moves by far less than its error
    cov, z = cl.cover_other_fit(KEPT, KEPT_COV, other, KEPT_COV)
    assert_allclose(cov, KEPT_COV, rtol=0, atol=0)
    assert 0 < z < cl.FITS_DISAGREE_SIGMA


def test_disagreeing_fits_widen_each_fraction_to_reach_the_other():
    frac, err = _fractions_and_errors(KEPT, KEPT_COV)
    # the other fit: na lower by 0.06 of the total, fe higher (an invented case shaped like a
    # fireball whose unsaturated frames and whole flight disagree)
    other = KEPT + np.array([-600.0, 0.0, 600.0])
    other_frac, other_err = _fractions_and_errors(other, 4 * KEPT_COV)
    d = other_frac - frac
    z_expected = np.max(np.abs(d) / np.hypot(err, other_err))
    cov, z = cl.cover_other_fit(KEPT, KEPT_COV, other, 4 * KEPT_COV)
    assert z == pytest.approx(z_expected, rel=1e-12)
    assert z > cl.FITS_DISAGREE_SIGMA
    _, widened = _fractions_and_errors(KEPT, cov)
    # each fraction's error is its own and the difference in quadrature (to rounding)
    assert_allclose(widened, np.hypot(err, d), rtol=1e-9)
    assert np.all(np.abs(d) <= widened)
    # the intensities themselves are untouched: only the covariance changes
    values, errors = cl.composition_from_groups(KEPT, cov)
    assert_allclose(values, frac, rtol=1e-12)
    assert_allclose(errors, widened, rtol=1e-9)


def test_widened_covariance_matches_a_monte_carlo_of_the_fractions():
    other = KEPT + np.array([-600.0, 0.0, 600.0])
    cov, _ = cl.cover_other_fit(KEPT, KEPT_COV, other, KEPT_COV)
    rng = np.random.default_rng(20261205)
    draws = rng.multivariate_normal(KEPT, cov, size=40000)
    frac = draws / draws.sum(axis=1, keepdims=True)
    _, widened = cl.composition_from_groups(KEPT, cov)
    # first-order propagation against the sample spread: the relative errors are ~6 %, so the
    # second-order terms are ~0.4 %; 40000 draws estimate a sigma to ~0.35 % (1 / sqrt(2 n))
    assert_allclose(frac.std(axis=0), widened, rtol=0.02)


def test_undefined_composition_is_not_compared():
    cov, z = cl.cover_other_fit(KEPT, KEPT_COV, np.array([np.nan, 1.0, 1.0]), KEPT_COV)
    assert np.isnan(z)
    assert_allclose(cov, KEPT_COV, rtol=0, atol=0)


def test_threshold_is_the_stated_sigma():
    other = KEPT + np.array([-600.0, 0.0, 600.0])
    _, z = cl.cover_other_fit(KEPT, KEPT_COV, other, KEPT_COV)
    cov_hi, _ = cl.cover_other_fit(KEPT, KEPT_COV, other, KEPT_COV, max_sigma=z + 0.1)
    assert_allclose(cov_hi, KEPT_COV, rtol=0, atol=0)


def _fit(intensity: np.ndarray, cov: np.ndarray):
    """A PlasmaFit-like record: what pipeline.composition_covariance reads of a fit."""
    return SimpleNamespace(group_intensity=dict(zip(cl.GROUPS, intensity)), group_covariance=cov)


def test_pipeline_records_the_other_fit_and_flags_a_disagreement():
    from meteorspec import pipeline
    kept = _fit(KEPT, KEPT_COV)
    cov, attrs, flags = pipeline.composition_covariance(kept, None)
    assert_allclose(cov, KEPT_COV, rtol=0, atol=0)
    assert attrs == {} and flags == ()
    other_intensity = KEPT + np.array([-600.0, 0.0, 600.0])
    other_frac = other_intensity / other_intensity.sum()
    cov, attrs, flags = pipeline.composition_covariance(kept, (_fit(other_intensity, KEPT_COV), "whole flight"))
    assert flags == (pipeline.FITS_DISAGREE,)
    assert attrs["other_fit_source"] == "whole flight"
    assert_allclose(attrs["other_fit_composition"], other_frac)
    assert attrs["other_fit_disagreement_sigma"] > cl.FITS_DISAGREE_SIGMA
    values, errors = cl.composition_from_groups(KEPT, cov)
    assert np.all(np.abs(other_frac - values) <= errors * (1 + 1e-9))
    # agreeing fits: recorded, not flagged, covariance kept
    near = _fit(KEPT * np.array([1.0, 1.0, 1.004]), KEPT_COV)
    cov, attrs, flags = pipeline.composition_covariance(kept, (near, "unsaturated frames"))
    assert flags == () and attrs["other_fit_disagreement_sigma"] < cl.FITS_DISAGREE_SIGMA
    assert_allclose(cov, KEPT_COV, rtol=0, atol=0)


def test_other_fit_record_survives_the_event_file(tmp_path):
    from meteorspec import pipeline
    from meteorspec.result import EventResult, FrameTimes
    from meteorspec.store import read_event, write_event
    other = _fit(KEPT + np.array([-600.0, 0.0, 600.0]), KEPT_COV)
    _, attrs, flags = pipeline.composition_covariance(_fit(KEPT, KEPT_COV), (other, "whole flight"))
    result = EventResult(event_id="20261114T031522Z_TST1", station="TST1", start_utc="2026-11-14T03:15:22.120Z",
                         software_version="0.1.0", status="partial", flags=list(flags),
                         frames=FrameTimes(time_s=np.array([0.02]), exposure_s=0.04,
                                           n_saturated_px=np.array([0]), interlaced=False),
                         parts={"composition": {"attrs": {"na": 0.82} | attrs}})
    back = read_event(write_event(tmp_path / "e.h5", result))["groups"]["composition"]["attrs"]
    assert back["other_fit_source"] == "whole flight"
    assert_allclose(back["other_fit_composition"], attrs["other_fit_composition"])
    assert back["other_fit_disagreement_sigma"] == pytest.approx(attrs["other_fit_disagreement_sigma"])
