"""Tests of meteorspec.plasma: the fit's covariance when a parameter has no leverage.

Source of the checks: the covariance of a linear least-squares fit, ``(J^T J)^-1``, and how it
transforms when a parameter is rescaled (common practice; e.g. Press et al., *Numerical
Recipes*, sec. 15.4, from memory), against numpy's inverse. The synthetic meteor is
``test_plasma._meteor`` (an independent fine-grid render).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec import atomic, plasma
from test_plasma import _meteor  # the independent fine-grid render


@pytest.fixture(scope="module")
def line_list() -> atomic.LineList:
    return atomic.load_line_list()


def test_covariance_of_a_parameter_without_leverage():
    # J = J1 D with D = diag(1, 1, 1e-160) gives C = D^-1 C1 D^-1 (C1 from J1, numpy's
    # inverse): a quantity that does not depend on the third parameter keeps the variance it
    # has from C1, one that depends on it as weakly as the data do gets a finite variance.
    # Squaring that column (1e-320) would overflow C.
    rng = np.random.default_rng(7)
    j1 = rng.normal(size=(40, 3))
    tiny = 1e-160
    jac = j1 * np.array([1.0, 1.0, tiny])
    c1 = np.linalg.inv(j1.T @ j1)
    cov_unit, scale = plasma._covariance(jac)
    q = np.array([[2.0, -1.0, 0.0],          # independent of the third parameter
                  [0.0, 0.0, 3.0 * tiny]])    # the third parameter's own (tiny) effect
    q1 = q / np.array([1.0, 1.0, tiny])      # the same quantities in J1's parameters
    got = (q / scale) @ cov_unit @ (q / scale).T
    assert_allclose(got, q1 @ c1 @ q1.T, rtol=1e-10)


def _finish_at(fit, spec, line_list, **change_dex):
    """plasma._finish (covariance, derived quantities) at the fit's solution moved by ``change_dex``."""
    cfg = fit.config
    wl, bw, flux, err, good = plasma._spectrum_arrays(spec)
    model = plasma._Model(wl, bw, plasma._fwhm_function(2.5, wl),
                          line_list.select(cfg["line_index"]), cfg["component"],
                          self_absorption=True, continuum_degree=cfg["continuum_degree"],
                          group_freedom_dex=0.3, response_degree=cfg["response_degree"],
                          n2_tied=cfg["n2_tied"])
    for name, value in fit.parameters.items():
        model.params[name].value = value + change_dex.get(name, 0.0)
    t0, sd = cfg["temperature_prior_k"]
    prior = model.group_prior | {"log_t": (math.log10(t0), sd / (t0 * math.log(10.0)))}
    problem = plasma._Problem(model, flux, err, good, prior=prior)
    metal = cfg["component"] != "air"
    line_index = np.concatenate([cfg["line_index"][metal], cfg["line_index"][~metal]])
    return plasma._finish(model, problem, SimpleNamespace(x=model.vector()), line_index=line_index,
                          n_bins=wl.size, config=cfg, column_known=True)


def test_group_errors_survive_a_component_turned_off(line_list):
    # A fit may turn a component off by driving its area to 1e-150 (a simulated event whose
    # extraction missed the meteor did, 1e-151): its parameters then have no leverage and
    # their variance overflows, but the group covariance must be that of the component
    # turned off by 1e-30 (the same fit to the data: both far below the noise), not a
    # failure or another number.
    spec, _ = _meteor(line_list, lo=480.0, hi=620.0, fwhm=2.5, snr=300.0, seed=5)
    fit = plasma.fit_plasma(spec, fwhm_nm=2.5)
    assert fit
    same = _finish_at(fit, spec, line_list)
    assert_allclose(same.group_covariance, fit.group_covariance, rtol=1e-9)  # the helper is _finish
    off30 = _finish_at(fit, spec, line_list, log_scale_hot=-30.0)
    off160 = _finish_at(fit, spec, line_list, log_scale_hot=-160.0)
    assert off30 and off160, off160.reason
    assert_allclose(off160.group_covariance, off30.group_covariance, rtol=1e-6)
    assert all(np.isfinite(off160.group_intensity_err[g]) for g in plasma.GROUPS)
    # the hot temperature is not measured at all: an overflowing error, not a made-up one
    assert not off160.hot_temperature_err_k < 1e100
