"""The emission spectrum of a simulated meteor: lines, N2 bands and continuum.

The spectrum is a list of discrete components (a wavelength and a share of the
total emitted energy each). Its shape is fixed for the whole flight; the light
curve of :mod:`.scene` scales it in time.

Model
-----
* **Main component**: LTE (Boltzmann) line emission at ``temperature_k``
  (~4500 K) from :func:`meteorspec.atomic.line_energy_rate` for Na I, Mg I,
  Fe I, Ca I, Cr I and Mn I. Column densities start from CI-like abundance
  ratios to Fe (below) times a seeded log-normal factor; then each of Na I,
  Mg I and Fe I is rescaled so that the energies of the contract's ``na``,
  ``mg`` and ``fe`` groups (section 6) have *exactly* the spec's ratios.
* **Hot component** (~10 000 K): Ca II, Mg II, Si II, Fe II and H I. Its share
  of the main component's line energy grows with speed (:func:`hot_fraction_for_speed`).
* **Atmosphere**: O I (777.2, 844.6 nm, ...) and N I from the line list at the
  hot temperature, and N2 first-positive bands; share grows with speed.
* **Continuum**: Planck at the main temperature, a small share.

Mg II and Fe II follow the same rescaling as Mg I and Fe I (same element).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from .. import atomic
from .spec import EventSpec

WAVELENGTH_RANGE_NM = (350.0, 900.0)
# Components below this share of the total are dropped from render and truth alike.
_MIN_SHARE = 1e-6
# Nominal Fe column (m^-2); only ratios matter, the light curve sets the brightness.
_N_FE_M2 = 1e18

# CI-chondrite abundances log eps (H = 12), from memory after Lodders (2003, ApJ 591, 1220)
# and Asplund et al. (2009, ARA&A 47, 481): Na 6.27, Mg 7.53, Si 7.51, Ca 6.29, Cr 5.63,
# Mn 5.47, Fe 7.45. H has no meaningful CI value for a meteor plasma (it comes from
# organics, water and the air); 3 x Fe is an invented round number.
_LOG_EPS = {"Na": 6.27, "Mg": 7.53, "Si": 7.51, "Ca": 6.29, "Cr": 5.63, "Mn": 5.47, "Fe": 7.45}
_RATIO_TO_FE = {el: 10.0 ** (v - _LOG_EPS["Fe"]) for el, v in _LOG_EPS.items()}
_RATIO_TO_FE["H"] = 3.0

MAIN_SPECIES = ("Na I", "Mg I", "Fe I", "Ca I", "Cr I", "Mn I")
HOT_SPECIES = ("Ca II", "Mg II", "Si II", "Fe II", "H I")
AIR_SPECIES = ("O I", "N I")
_NUISANCE_KEY = {"Ca I": "ca_i", "Cr I": "cr_i", "Mn I": "mn_i", "Ca II": "ca_ii", "Mg II": "mg_ii",
                 "Si II": "si_ii", "Fe II": "fe_ii", "H I": "h_i", "O I": "o_i", "N I": "n_i"}
_GROUP_SPECIES = {"na": "Na I", "mg": "Mg I", "fe": "Fe I"}

# N2 first-positive band heads (B3Pi_g - A3Sigma_u+), nm, with invented relative strengths.
# Positions from memory, approximate (+-1 nm); the bands are drawn degraded to the violet
# (from memory) with an exponential tail. (v', v'') sequences dv = 1..4.
N2_BAND_HEADS_NM = {
    "(11,7)": (585.4, 0.25), "(10,6)": (590.6, 0.3), "(9,5)": (595.9, 0.3), "(8,4)": (601.4, 0.3),
    "(7,3)": (606.9, 0.3), "(6,2)": (612.7, 0.25), "(11,8)": (625.3, 0.4), "(10,7)": (632.3, 0.5),
    "(9,6)": (639.5, 0.6), "(8,5)": (646.9, 0.7), "(7,4)": (654.5, 0.8), "(6,3)": (662.4, 0.8),
    "(5,2)": (670.5, 0.7), "(4,1)": (678.9, 0.6), "(3,0)": (687.5, 0.4), "(6,4)": (727.3, 0.4),
    "(5,3)": (738.7, 0.6), "(4,2)": (750.4, 0.8), "(3,1)": (762.6, 1.0), "(2,0)": (775.3, 0.9),
    "(4,3)": (842.9, 0.3), "(3,2)": (857.5, 0.4), "(2,1)": (872.4, 0.5), "(1,0)": (888.3, 0.5),
}
_N2_TAIL_NM = 2.5  # e-folding length of the violet-degraded band profile (invented)
_N2_EXTENT_NM = 10.0
_N2_STEP_NM = 0.25


def hot_fraction_for_speed(speed_km_s: float) -> float:
    """Hot-component energy relative to the main component's line energy.

    Grows from 1 % at 11 km/s to 26 % at 72 km/s, quadratically in speed: the
    published trend that fast meteors show a stronger high-temperature
    component; the numbers are invented for the demo.
    """
    x = (speed_km_s - 11.0) / 61.0
    return 0.01 + 0.25 * x * x


def air_fraction_for_speed(speed_km_s: float) -> float:
    """Atmospheric (O I, N I, N2) energy relative to the main line energy; invented, grows with speed."""
    x = (speed_km_s - 11.0) / 61.0
    return 0.01 + 0.35 * x * x


@dataclass(frozen=True, eq=False)
class EmissionModel:
    """The spectrum as discrete components whose ``share`` sums to 1.

    Attributes
    ----------
    wavelength_nm, share : ndarray of shape (n,)
        Air wavelength and share of the total emitted energy.
    kind : ndarray of str
        ``"line"``, ``"band"`` (one sample of an N2 band) or ``"continuum"``.
    species, multiplet, group, component : ndarray of str
        For lines: ``"Fe I"``, multiplet label, composition group or ``""``, and
        ``"main"``, ``"hot"`` or ``"air"``. Bands: species ``"N2"``, multiplet the
        band label. Continuum: species ``"continuum"``.
    temperature_k, hot_temperature_k, hot_fraction, air_fraction : float
    continuum_step_nm : float
        Sampling step of the continuum components.
    """

    wavelength_nm: np.ndarray
    share: np.ndarray
    kind: np.ndarray
    species: np.ndarray
    multiplet: np.ndarray
    group: np.ndarray
    component: np.ndarray
    temperature_k: float
    hot_temperature_k: float
    hot_fraction: float
    air_fraction: float
    continuum_step_nm: float

    @property
    def is_line(self) -> np.ndarray:
        return self.kind == "line"

    def group_share(self, group: str) -> float:
        return float(self.share[self.group == group].sum())


@lru_cache(maxsize=1)
def _line_list() -> atomic.LineList:
    lines = atomic.load_line_list()
    lo, hi = WAVELENGTH_RANGE_NM
    keep = (lines.transition_type == "E1") & (lines.wavelength_nm >= lo) & (lines.wavelength_nm <= hi)
    return lines.select(keep)


def _species_energy(lines: atomic.LineList, species: tuple[str, ...], temperature_k: float,
                    columns_m2: dict[str, float]) -> tuple[atomic.LineList, np.ndarray]:
    sel = lines.select(np.isin(lines.species, species))
    return sel, atomic.line_energy_rate(sel, temperature_k, {s: columns_m2[s] for s in species})


def build_emission(spec: EventSpec, *, continuum_step_nm: float = 0.25) -> EmissionModel:
    """The emission spectrum of ``spec``, deterministic in ``spec.seed``.

    Parameters
    ----------
    spec : EventSpec
    continuum_step_nm : float
        Sampling step of the continuum; the renderer asks for less than half a
        pixel of dispersion so the sampled continuum renders smooth.

    Returns
    -------
    EmissionModel
    """
    rng = np.random.default_rng([spec.seed, 101])
    nz = spec.nuisance
    lines = _line_list()
    jitter = {el: 10.0 ** (spec.abundance_jitter_dex * rng.standard_normal()) for el in sorted(_RATIO_TO_FE)}

    # --- main component at the LTE temperature, nominal CI-like columns
    columns = {}
    for sp in MAIN_SPECIES + HOT_SPECIES:
        el = sp.split()[0]
        factor = 1.0 if sp in _GROUP_SPECIES.values() else jitter[el]
        columns[sp] = _N_FE_M2 * _RATIO_TO_FE[el] * factor
    main_lines, main_e = _species_energy(lines, MAIN_SPECIES, spec.temperature_k, columns)

    # exact group ratios: rescale Na I, Mg I and Fe I as whole species
    g0 = {g: main_e[main_lines.group == g].sum() for g in _GROUP_SPECIES}
    total0 = sum(g0.values())
    comp = spec.composition
    scale = {g: comp[g] * total0 / g0[g] for g in _GROUP_SPECIES}
    element_scale = {"Na": scale["na"], "Mg": scale["mg"], "Fe": scale["fe"]}
    for g, sp in _GROUP_SPECIES.items():
        main_e = np.where(main_lines.species == sp, main_e * scale[g], main_e)
    main_e = np.where((main_lines.species == "Fe I") & (main_lines.group == ""), main_e * nz.fe_other, main_e)
    for sp, key in _NUISANCE_KEY.items():
        if sp in MAIN_SPECIES:
            main_e = np.where(main_lines.species == sp, main_e * getattr(nz, key), main_e)
    main_total = float(main_e.sum())

    # --- hot component: same element scaling, share of the main line energy set by speed
    hot_f = hot_fraction_for_speed(spec.speed_km_s) if spec.hot_fraction is None else float(spec.hot_fraction)
    hot_columns = {sp: columns[sp] * element_scale.get(sp.split()[0], 1.0) * getattr(nz, _NUISANCE_KEY[sp])
                   for sp in HOT_SPECIES}
    hot_lines, hot_e = _species_energy(lines, HOT_SPECIES, spec.hot_temperature_k, hot_columns)
    # normalise with the nuisance-free sum so that a strength of 0 removes a species only
    ref_columns = {sp: columns[sp] * element_scale.get(sp.split()[0], 1.0) for sp in HOT_SPECIES}
    _, hot_ref = _species_energy(lines, HOT_SPECIES, spec.hot_temperature_k, ref_columns)
    hot_e = hot_e * (hot_f * main_total / hot_ref.sum()) if hot_ref.sum() > 0 else hot_e * 0.0

    # --- atmosphere: O I and N I lines (N:O atoms 2:1, invented), N2 bands
    air_f = air_fraction_for_speed(spec.speed_km_s)
    air_columns = {"O I": 1.0 * nz.o_i, "N I": 2.0 * nz.n_i}
    air_lines, air_e = _species_energy(lines, AIR_SPECIES, spec.hot_temperature_k, air_columns)
    _, air_ref = _species_energy(lines, AIR_SPECIES, spec.hot_temperature_k, {"O I": 1.0, "N I": 2.0})
    air_e = air_e * (0.7 * air_f * main_total / air_ref.sum())

    band_wl, band_e, band_label = [], [], []
    strengths = np.array([s for _, s in N2_BAND_HEADS_NM.values()])
    offsets = np.arange(0.0, _N2_EXTENT_NM, _N2_STEP_NM)
    profile = np.exp(-offsets / _N2_TAIL_NM)
    profile /= profile.sum()
    band_total = 0.3 * air_f * main_total * nz.n2
    for (label, (head, _)), s in zip(N2_BAND_HEADS_NM.items(), strengths / strengths.sum()):
        band_wl.append(head - offsets)
        band_e.append(band_total * s * profile)
        band_label += [label] * offsets.size

    # --- continuum: Planck at the main temperature, 3 % of the main line energy
    lo, hi = WAVELENGTH_RANGE_NM
    n_cont = int(np.ceil((hi - lo) / continuum_step_nm))
    step = (hi - lo) / n_cont
    cont_wl = lo + step * (np.arange(n_cont) + 0.5)
    planck = atomic.planck_radiance(cont_wl, spec.temperature_k)
    cont_e = 0.03 * main_total * nz.continuum * planck / planck.sum()

    def strs(values, n):
        return np.asarray(values, dtype=str) if n else np.zeros(0, dtype=str)

    parts = [
        (main_lines, main_e, "main"), (hot_lines, hot_e, "hot"), (air_lines, air_e, "air"),
    ]
    wl = np.concatenate([p[0].wavelength_nm for p in parts] + band_wl + [cont_wl])
    energy = np.concatenate([p[1] for p in parts] + band_e + [cont_e])
    n_lines = sum(len(p[0]) for p in parts)
    n_band = sum(b.size for b in band_wl)
    kind = np.array(["line"] * n_lines + ["band"] * n_band + ["continuum"] * n_cont)
    species = np.concatenate([p[0].species for p in parts] + [strs(["N2"] * n_band, n_band),
                                                              strs(["continuum"] * n_cont, n_cont)])
    multiplet = np.concatenate([p[0].multiplet for p in parts] + [strs(band_label, n_band),
                                                                  strs([""] * n_cont, n_cont)])
    group = np.concatenate([p[0].group for p in parts] + [strs([""] * (n_band + n_cont), n_band + n_cont)])
    component = np.array([c for p in parts for c in [p[2]] * len(p[0])] + ["air"] * n_band
                         + ["main"] * n_cont)

    share = energy / energy.sum()
    keep = (share >= _MIN_SHARE) | (group != "")
    order = np.argsort(wl[keep], kind="stable")
    sel = np.flatnonzero(keep)[order]
    share = share[sel] / share[sel].sum()
    return EmissionModel(
        wavelength_nm=wl[sel], share=share, kind=kind[sel], species=species[sel].astype(str),
        multiplet=multiplet[sel].astype(str), group=group[sel].astype(str),
        component=component[sel], temperature_k=float(spec.temperature_k),
        hot_temperature_k=float(spec.hot_temperature_k), hot_fraction=hot_f, air_fraction=air_f,
        continuum_step_nm=step,
    )
