"""Tests of the calibration result objects (meteorspec.wavesol).

The optics the solution asks (:class:`SpectralGeometry`) is tested against external references
in test_optics.py; here the containers and the round trip through them.
"""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec.optics import GratingModel, LensModel, SpectralGeometry
from meteorspec.wavesol import LineMeasurements, ResidualTable, WavelengthSolution, geometry_values

# the wide-field demo camera (QM01 binned 2x2): rectilinear, f = 575 px, 600 grooves/mm
WIDE = SpectralGeometry(LensModel("rectilinear", 575.0, 320.1, 238.9, -0.012),
                        GratingModel(600.0, 4.0, 1.5, 30.0))


def _rows(n, event="E"):
    return LineMeasurements(
        event=np.full(n, event), frame=np.arange(n), x0_px=np.zeros(n), y0_px=np.zeros(n),
        x_px=np.ones(n), y_px=np.ones(n), lab_nm=np.linspace(400.0, 800.0, n),
        species=np.array(["Na I"] + ["blend 500-530"] * (n - 1)), tangent_x=np.ones(n), tangent_y=np.zeros(n),
        sigma_along_px=np.full(n, 0.1), sigma_cross_px=np.full(n, np.inf))


def test_tables_select_concat_and_empty():
    a, b = _rows(3, "A"), _rows(2, "B")
    both = LineMeasurements.concat([a, b])
    assert len(both) == 5 and list(both.event) == ["A"] * 3 + ["B"] * 2
    assert len(both.select(both.event == "B")) == 2
    empty = LineMeasurements.empty()
    assert len(empty) == 0 and len(LineMeasurements.concat([])) == 0
    assert len(ResidualTable.empty()) == 0
    with pytest.raises(ValueError, match="shape"):
        LineMeasurements(**{**{k: getattr(a, k) for k in a.__dataclass_fields__}, "x_px": np.ones(4)})
    with pytest.raises(ValueError):
        a.x_px[0] = 5.0  # frozen columns


def test_solution_round_trip_and_attrs():
    sol = WavelengthSolution(geometry=WIDE, source="event", values=geometry_values(WIDE),
                             errors={k: math.nan for k in geometry_values(WIDE)}, rms_nm=0.2, n_lines=5,
                             n_frames_used=3, residuals=ResidualTable.empty())
    wl = np.array([400.0, 589.0, 800.0])
    x, y = sol.wav_to_pix(100.0, 200.0, wl)
    # pixel -> wavelength inverts wavelength -> pixel (1e-6 nm: the locate solver's tolerance)
    assert_allclose(sol.pix_to_wav(100.0, 200.0, x, y), wl, atol=1e-6)
    attrs = sol.to_attrs()
    assert attrs["grooves_per_mm"] == 600.0 and attrs["n_lines"] == 5 and math.isnan(attrs["k1_err"])
    with pytest.raises(ValueError, match="source"):
        WavelengthSolution(geometry=WIDE, source="lamp", values={}, errors={}, rms_nm=0.0, n_lines=0,
                           n_frames_used=0, residuals=ResidualTable.empty())
