"""Tests of meteorspec.plasma: group errors where the linearised covariance fails its check.

External reference: the scatter of the group intensities of independent, seeded noise redraws
of the same synthetic spectrum, each fitted by :func:`meteorspec.plasma.fit_plasma` (a Monte
Carlo estimate of the estimator's error; Press et al., *Numerical Recipes*, 3rd ed., sec. 15.6,
from memory), against numpy's sample standard deviation. The synthetic meteor is
``test_plasma._meteor`` (an independent fine-grid render).
"""

from __future__ import annotations

import numpy as np
import pytest

from meteorspec import atomic, plasma
from test_plasma import _meteor  # the independent fine-grid render

# A broad, saturated spectrum (30 nm FWHM, 4 nm bins, 440-680 nm): the case of the seeded
# end-to-end bench where the linearised group errors were 10-200 times the actual ones.
_BROAD = dict(fwhm=30.0, step=4.0, lo=440.0, hi=680.0, snr=300.0)


@pytest.fixture(scope="module")
def line_list() -> atomic.LineList:
    return atomic.load_line_list()


def test_bootstrap_group_error_matches_redraw_scatter(line_list):
    spec, _ = _meteor(line_list, seed=1, **_BROAD)
    fit = plasma.fit_plasma(spec, fwhm_nm=30.0)
    linear = plasma.fit_plasma(spec, fwhm_nm=30.0, bootstrap_draws=0)
    assert fit and linear
    assert fit.group_error_method == "bootstrap"
    assert linear.group_error_method == "linear"
    # independent redraws of the noise (seeds 2-7), fitted alike: the reference scatter
    na = []
    for seed in range(2, 8):
        redraw, _ = _meteor(line_list, seed=seed, **_BROAD)
        na.append(plasma.fit_plasma(redraw, fwhm_nm=30.0, bootstrap_draws=0).group_intensity["na"])
    scatter = float(np.std(na, ddof=1))
    boot = fit.group_intensity_err["na"]
    # A 16-draw bootstrap sigma scatters by 1/sqrt(2 x 15) = 18 % and a 6-redraw standard
    # deviation by 1/sqrt(2 x 5) = 32 %: together 37 % (1 sigma in ln), so a factor 2.2 is
    # a 2-sigma band (ln 2.2 = 0.79).
    assert scatter / 2.2 < boot < 2.2 * scatter, (boot, scatter)
    # the linearised error it replaces is off by orders of magnitude here (it was 9 x the
    # intensity against a scatter of 1 %)
    assert linear.group_intensity_err["na"] > 50.0 * scatter
