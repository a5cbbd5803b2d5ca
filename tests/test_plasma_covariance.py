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
from test_plasma import _meteor, _render  # the independent fine-grid render


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
    prior |= {f"response_{k}": (0.0, cfg["response_prior_sigma"])
              for k in range(1, cfg["response_degree"] + 1)}
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
    # the linearised covariance throughout (this spectrum's saturated solution fails the linear
    # check and the fit would take a bootstrap's, which _finish_at does not redo)
    fit = plasma.fit_plasma(spec, fwhm_nm=2.5, bootstrap_draws=0)
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


def test_group_at_its_bound_has_the_marginal_error_of_its_blend(line_list):
    # A group fitted to nothing (Fe I column at its lower bound) at a coarse dispersion (30 nm
    # FWHM), where its lines blend with Mg I b and Na I D. At fixed temperature and positions the
    # model is linear in the groups' amplitudes, those of the other Na I and Mg I lines and the
    # free continuum coefficients (components at their bound stay off), so the error
    # of the group at its bound is the marginal one of a linear least-squares fit,
    # [(A^T W A)^-1]_kk (Press et al., *Numerical Recipes*, sec. 15.4, from memory), against
    # numpy's inverse of A rendered here (thin LTE line ratios, NIST data; Legendre continuum
    # from numpy). It exceeds the conditional 1 / (A^T W A)_kk, all that the group's own profile
    # with the rest held fixed would give, where the templates overlap.
    fwhm, step, lo, hi = 30.0, 4.0, 440.0, 680.0
    wl = np.arange(lo, hi, step) + step / 2
    bw = np.full(wl.size, step)
    index, component = plasma.select_model_lines(line_list, lo - 10, hi + 10)
    model = plasma._Model(wl, bw, plasma._fwhm_function(fwhm, wl), line_list.select(index), component,
                          self_absorption=False, continuum_degree=2, group_freedom_dex=0.3,
                          response_degree=0)
    for s in model.species:  # everything but Na I and Mg I turned off: Fe I at its bound
        if s not in ("Na I", "Mg I"):
            model.params[f"log_n {s}"].value = model.params[f"log_n {s}"].lo
    err = np.full(wl.size, 0.5)
    problem = plasma._Problem(model, np.zeros(wl.size), err, np.ones(wl.size, bool))
    got = plasma._bound_group_covariance(model, problem, model.vector(), np.zeros((3, 3)),
                                         np.array([False, False, True]), noise_scale2=1.0)
    main = line_list.select(index[component == "main"])
    t_k = 10.0 ** model.value("log_t")
    cols = []
    for g in plasma.GROUPS:  # each group's lines at unit energy
        sel = main.select(main.group == g)
        e = atomic.line_energy_rate(sel, t_k, {s: 1e10 for s in set(sel.species.tolist())})
        cols.append(_render(wl, bw, sel.wavelength_nm, e / e.sum(), fwhm))
    for s in ("Mg I", "Na I"):  # their lines outside the groups: free with the species' column
        sel = main.select((main.species == s) & ~np.isin(main.group, plasma.GROUPS))
        if len(sel):
            cols.append(_render(wl, bw, sel.wavelength_nm, atomic.line_energy_rate(sel, t_k, {s: 1e10}), fwhm))
    x = 2.0 * (wl - wl[0]) / (wl[-1] - wl[0]) - 1.0
    cols += [np.polynomial.legendre.legval(x, [0, 1]), np.polynomial.legendre.legval(x, [0, 0, 1])]
    a = np.column_stack(cols) / err[:, None]
    info = a.T @ a
    expected = np.linalg.inv(info)[:3, :3]
    # the fine-grid render matches exact bin integrals to < 1e-5 (step 0.004 nm, sigma 13 nm)
    assert_allclose(got, expected, rtol=1e-3, atol=1e-3 * float(np.sqrt(expected[2, 2] * expected[1, 1])))
    assert got[2, 2] > 1.5 / info[2, 2]  # the blend: more than the conditional error


def test_sandwich_covariance_matches_the_scatter_of_fits_to_correlated_noise():
    # Weighted least squares that takes correlated bins as independent: the estimate stays
    # unbiased, its scatter is the "sandwich" (U^T U)^-1 U^T R U (U^T U)^-1 (common practice,
    # e.g. Seber & Wild, Nonlinear Regression, 1989, sec. 2.1.4, from memory), not (U^T U)^-1.
    # Reference: the scatter of 4000 seeded fits of a Gaussian line's amplitude and a flat
    # level to noise of unit variance with lag-1/lag-2 correlations 0.64/0.14 (those of the
    # default grid), drawn by numpy's Cholesky of the full matrix. The sandwich must match the
    # scatter to 5 % (the standard deviation of 4000 draws scatters by 1.1 %); the plain
    # covariance is 37 % short of it here. The banded noise of _correlated_noise must
    # reproduce the correlations to 0.03 (4000 draws: 1-sigma 0.016).
    n = 120
    x = np.arange(n, dtype=float)
    unit = np.column_stack([np.exp(-0.5 * ((x - 60.0) / 3.0) ** 2), np.ones(n)])
    p = np.concatenate([np.arange(n - 1), np.arange(n - 2)])
    q = np.concatenate([np.arange(1, n), np.arange(2, n)])
    rho = np.concatenate([np.full(n - 1, 0.64), np.full(n - 2, 0.14)])
    corr = np.eye(n)
    corr[p, q] = corr[q, p] = rho
    rng = np.random.default_rng(5)
    noise = rng.standard_normal((4000, n)) @ np.linalg.cholesky(corr).T
    solve = np.linalg.solve(unit.T @ unit, unit.T)
    scatter = np.std(noise @ solve.T, axis=0, ddof=1)
    plain = np.linalg.inv(unit.T @ unit)
    sandwich = plain + plasma._pair_term(plain @ unit.T, (p, q, rho))
    assert_allclose(np.sqrt(np.diag(sandwich)), scatter, rtol=0.05)
    assert_allclose(np.diag(sandwich), np.diag(plain) + plasma._pair_term(plain @ unit.T, (p, q, rho), diagonal=True))
    assert np.all(np.sqrt(np.diag(plain)) < 0.7 * scatter)
    draws = np.array([plasma._correlated_noise(rng, n, (p, q, rho)) for _ in range(4000)])
    got = np.corrcoef(draws[:, 59:62].T)
    assert_allclose([got[0, 1], got[1, 2], got[0, 2]], [0.64, 0.64, 0.14], atol=0.03)
    assert_allclose(np.var(draws[:, 60]), 1.0, atol=0.07)
