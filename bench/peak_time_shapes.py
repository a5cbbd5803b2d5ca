"""How well the light-curve peak time (``meteorspec.classify._peak_time_err``) finds the maximum
of light curves whose shape comes from outside the pipeline.

For each shape, 100 seeded curves (their width and skew drawn at random) are integrated over
exposures of 0.04 s (exposure means, as a camera records them), white noise of the peak over
the S/N is added, and the estimate is counted when it lies within one exposure of the middle
of the brightest noise-free exposure (the issue-5 criterion for the Na peak). Shapes:

* ``single-body``: the classical light curve of a meteoroid that does not fragment,
  I / I_max = 9/4 x (1 - x/3)^2 with x the air density over that at the maximum, in an
  exponential atmosphere at constant speed (Opik's single-body theory; common practice, the
  form from memory): a long rise, a fall ending at x = 3;
* ``gamma`` and ``skew-normal``: ``scipy.stats.gamma`` and ``scipy.stats.skewnorm`` densities;
* ``simulator``: the simulator's own shape (:class:`meteorspec.simulate.scene.LightCurve`);
* ``split-Gaussian``: different Gaussian widths before and after the maximum (a curvature
  jump at the top, which smooth light curves do not have).

No assertions; a table of counts (of 100) per shape and S/N.
Run: ``python bench/peak_time_shapes.py`` (a few seconds).
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from meteorspec.classify import _peak_time_err  # noqa: E402
from meteorspec.simulate.scene import LightCurve  # noqa: E402

EXPOSURE_S = 0.04
N_EXPOSURES = 90
SHAPES = ("simulator", "single-body", "skew-normal", "gamma", "split-Gaussian")


def exposure_means(shape: str, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Mid-exposure times and the noise-free energy per exposure of one random curve of ``shape``."""
    dt, n = EXPOSURE_S, N_EXPOSURES
    t_mid = (np.arange(n) + 0.5) * dt
    edges = np.arange(n + 1) * dt
    n_lit = rng.uniform(8, 50)   # a width of 8-50 exposures
    sub = 20                     # samples per exposure for the shapes given as rates
    fine = np.linspace(0.0, n * dt, n * sub + 1)[:-1] + dt / (2 * sub)
    if shape == "simulator":
        lc = LightCurve(t0_s=0.3, duration_s=n_lit * dt * 1.5, peak_time_frac=rng.uniform(0.3, 0.8),
                        flare_amplitude=0.0)
        return t_mid, lc.integral(edges[:-1], edges[1:])
    if shape == "single-body":
        x = np.exp((fine - rng.uniform(1.5, 2.2)) / (n_lit * dt / 6))
        rate = np.where(x < 3.0, 2.25 * x * (1.0 - x / 3.0) ** 2, 0.0)
        return t_mid, rate.reshape(n, sub).mean(axis=1)
    if shape == "split-Gaussian":
        t_peak = rng.uniform(1.5, 2.0)
        w_rise, w_fall = n_lit * dt / 3 * rng.uniform(0.5, 1.5, 2)
        rate = np.exp(-0.5 * ((fine - t_peak) / np.where(fine < t_peak, w_rise, w_fall)) ** 2)
        return t_mid, rate.reshape(n, sub).mean(axis=1)
    if shape == "skew-normal":
        dist = stats.skewnorm(rng.uniform(-6, 6), loc=1.8, scale=n_lit * dt / 3)
    elif shape == "gamma":
        a = rng.uniform(2, 8)
        dist = stats.gamma(a, loc=0.3, scale=n_lit * dt / 2 / a)
    else:
        raise ValueError(f"unknown shape {shape!r}")
    return t_mid, dist.cdf(edges[1:]) - dist.cdf(edges[:-1])


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--n", type=int, default=100, help="curves per shape and S/N")
    ap.add_argument("--snr", type=float, nargs="+", default=[200.0, 30.0], help="peak S/N levels")
    ap.add_argument("--seed", type=int, default=3)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(args.seed)
    print(f"within one exposure of the brightest exposure, of {args.n} curves each")
    for snr in args.snr:
        counts = []
        for shape in SHAPES:
            ok = 0
            for _ in range(args.n):
                t, energy = exposure_means(shape, rng)
                sigma = energy.max() / snr
                flux = energy + rng.normal(0.0, sigma, energy.size)
                peak, _ = _peak_time_err(t, flux, np.full(energy.size, sigma))
                ok += abs(peak - t[np.argmax(energy)]) <= EXPOSURE_S + 1e-9
            counts.append(ok)
        print(f"  peak S/N {snr:5.0f}: " + ", ".join(f"{s} {c}" for s, c in zip(SHAPES, counts)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
