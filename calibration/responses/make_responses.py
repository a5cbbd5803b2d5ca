"""Write the invented system-response curves of the demo network (see SOURCES.md).

Usage: python calibration/responses/make_responses.py   (rewrites the CSVs beside this script)

Each curve is the product of three smooth invented factors, normalised to a maximum of 1:
sensor quantum efficiency (an asymmetric Gaussian in wavelength), lens transmission (a
logistic ultraviolet cut-off) and first-order grating efficiency from the scalar blaze
approximation, sinc^2(1 - lambda_blaze / lambda) (from memory; textbook scalar theory of a
blazed grating, e.g. Palmer's Diffraction Grating Handbook). The output is deterministic.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

WAVELENGTH_NM = np.arange(340.0, 920.0 + 1e-9, 5.0)

# id: (QE peak nm, QE blue width nm, QE red width nm, UV cut-off nm, cut-off scale nm, blaze nm)
CURVES = {
    "QM01": (560.0, 130.0, 210.0, 365.0, 12.0, 500.0),  # mono CMOS, wide-field lens
    "QM02": (560.0, 130.0, 210.0, 375.0, 14.0, 500.0),  # same sensor, fisheye glass cuts more UV
    "QM03": (520.0, 110.0, 170.0, 370.0, 12.0, 550.0),  # interline CCD of an analogue camera
    "QM04": (600.0, 170.0, 230.0, 360.0, 10.0, 600.0),  # back-illuminated 12-bit sensor
}


def response(wavelength_nm: np.ndarray, peak_nm: float, blue_nm: float, red_nm: float,
             cut_nm: float, cut_scale_nm: float, blaze_nm: float) -> np.ndarray:
    width = np.where(wavelength_nm < peak_nm, blue_nm, red_nm)
    qe = np.exp(-0.5 * ((wavelength_nm - peak_nm) / width) ** 2)
    lens = 1.0 / (1.0 + np.exp(-(wavelength_nm - cut_nm) / cut_scale_nm))
    grating = np.sinc(1.0 - blaze_nm / wavelength_nm) ** 2
    total = qe * lens * grating
    return total / total.max()


def main() -> None:
    here = Path(__file__).resolve().parent
    for sid, params in CURVES.items():
        r = response(WAVELENGTH_NM, *params)
        lines = ["wavelength_nm,response"] + [f"{w:.1f},{v:.5f}" for w, v in zip(WAVELENGTH_NM, r)]
        (here / f"{sid}_response.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
