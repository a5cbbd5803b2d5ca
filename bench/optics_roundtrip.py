"""Optics round-trip errors over a whole 1280x960 sensor and to 89 deg off axis (numbers for the foundation issue).

Usage: python bench/optics_roundtrip.py
"""
import numpy as np
from meteorspec.optics import PROJECTIONS, LensModel, GratingModel, SpectralGeometry
FOCAL = {"equidistant": 560.0, "equisolid": 600.0, "stereographic": 420.0, "orthographic": 900.0, "rectilinear": 900.0}
y, x = np.mgrid[0:960:1.0, 0:1280:1.0]
worst = 0.0
for p in PROJECTIONS:
    for k1, k2 in [(0, 0), (0.02, -0.004), (-0.03, 0.001)]:
        L = LensModel(p, FOCAL[p], 639.5, 479.5, k1=k1, k2=k2)
        u = L.pixel_to_direction(x + 0.37, y)
        xx, yy = L.direction_to_pixel(u)
        e = np.nanmax(np.hypot(xx - x - 0.37, yy - y))
        worst = max(worst, e)
    th = np.radians(np.linspace(0, 89, 891)); ph = np.radians(np.linspace(-180, 180, 891))
    u = np.stack([np.sin(th)*np.cos(ph), np.sin(th)*np.sin(ph), np.cos(th)], -1)
    L = LensModel(p, 300.0, 0, 0); a, b = L.direction_to_pixel(u); a2, b2 = L.direction_to_pixel(L.pixel_to_direction(a, b))
    print(f"{p:14s} whole-sensor max round trip (1280x960, 3 distortion sets) {worst:.2e} px; 0-89 deg {np.max(np.hypot(a2-a,b2-b)):.2e} px")
g = SpectralGeometry(LensModel("equisolid", 600.0, 639.5, 479.5, k1=-0.01, k2=0.001), GratingModel(300.0, -20.0, 2.0, 50.0))
rng = np.random.default_rng(3); x0 = rng.uniform(100, 1180, 2000); y0 = rng.uniform(100, 860, 2000); lam = rng.uniform(380, 850, 2000)
xs, ys = g.spectrum_pixel(x0, y0, lam); ok = np.isfinite(xs)
l2, off = g.locate(x0, y0, xs, ys)
print("locate round trip: max |dlambda|", np.nanmax(np.abs(l2-lam)[ok]), "nm, max |offset|", np.nanmax(np.abs(off[ok])), "px over", ok.sum(), "points")
print("grating 600/mm 500 nm normal incidence:", np.degrees(np.arccos(GratingModel(600.0, 0.0).diffract([0,0,1.0], 500.0, 1)[2])), "deg")
