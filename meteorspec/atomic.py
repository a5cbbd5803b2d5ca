"""Atomic data and the pure physics on it: line list, partition functions, Boltzmann, Saha,
optically thin line emission, self-absorption depth, Planck radiance, air/vacuum wavelengths.

All data come from the NIST Atomic Spectra Database (Kramida, Ralchenko, Reader and NIST ASD
Team, https://doi.org/10.18434/T4W30F) as copied into ``calibration/atomic/`` by
``calibration/build_linelist.py``; see ``calibration/atomic/SOURCES.md``. Physical constants
are CODATA values from :mod:`astropy.constants`.

Species are written in spectroscopic notation, ``"Fe I"`` (neutral) or ``"Fe II"`` (singly
ionised); ``ion`` is the stage number (1 = I, 2 = II). Wavelengths are standard air unless the
name says ``vac``. Every function is vectorised with numpy broadcasting.
"""

from __future__ import annotations

import csv
import functools
from dataclasses import dataclass, field, fields
from pathlib import Path

import numpy as np
from astropy import constants as _const
from numpy.typing import ArrayLike, NDArray

from .errors import InputError
from .resources import calibration_dir

__all__ = [
    "COMPOSITION_GROUPS",
    "LineList",
    "air_to_vac_nm",
    "boltzmann_fraction",
    "group_mask",
    "ionization_energy_ev",
    "line_energy_rate",
    "line_optical_depth",
    "load_line_list",
    "parse_species",
    "partition_function",
    "planck_radiance",
    "saha_ratio",
    "species_name",
    "vac_to_air_nm",
]

# CODATA constants (astropy.constants), SI.
_H_J_S = _const.h.si.value
_C_M_S = _const.c.si.value
_K_J_K = _const.k_B.si.value
_M_E_KG = _const.m_e.si.value
_EV_J = _const.e.si.value  # 1 eV in joules
_K_EV_K = _K_J_K / _EV_J  # Boltzmann constant in eV/K

COMPOSITION_GROUPS: dict[str, str] = {
    "na": "Na I multiplet 1",
    "mg": "Mg I multiplet 2",
    "fe": "Fe I multiplet 15",
}
"""The three line groups of contract section 6, with a human label."""

DEFAULT_LOWERING_EV = 0.1
"""Partition-function cut-off: levels of stage ``ion`` count only if E < IE - ion * 0.1 eV."""

_ROMAN = {1: "I", 2: "II", 3: "III", 4: "IV"}
_FROM_ROMAN = {v: k for k, v in _ROMAN.items()}
# Atomic numbers of the elements in the shared extracts: needed only to know when a stage is a
# bare nucleus (partition function exactly 1, no levels listed), e.g. H II.
_ATOMIC_NUMBER = {"H": 1, "Li": 3, "N": 7, "O": 8, "Na": 11, "Mg": 12, "Al": 13, "Si": 14,
                  "K": 19, "Ca": 20, "Ti": 22, "Cr": 24, "Mn": 25, "Fe": 26, "Ni": 28}


def species_name(element: str, ion: int) -> str:
    """Spectroscopic name of a species, ``("Fe", 1) -> "Fe I"``."""
    try:
        return f"{element} {_ROMAN[int(ion)]}"
    except KeyError:
        raise ValueError(f"ionisation stage {ion!r} out of range 1..4 for {element}") from None


def parse_species(species: str) -> tuple[str, int]:
    """Split a spectroscopic name, ``"Fe I" -> ("Fe", 1)``."""
    parts = str(species).split()
    if len(parts) != 2 or parts[1] not in _FROM_ROMAN:
        raise ValueError(f"species {species!r} is not of the form 'Fe I' / 'Mg II'")
    return parts[0], _FROM_ROMAN[parts[1]]


# --------------------------------------------------------------------------------------------
# Line list
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class LineList:
    """A table of spectral lines, one array per column (all of the same length).

    Parameters
    ----------
    species : ndarray of str
        Spectroscopic name, e.g. ``"Fe I"``.
    element : ndarray of str
        Element symbol, e.g. ``"Fe"``.
    ion : ndarray of int
        Stage, 1 = neutral, 2 = singly ionised.
    wavelength_nm : ndarray of float
        Standard air wavelength (contract section 1).
    wavelength_vac_nm : ndarray of float
        Vacuum (Ritz) wavelength.
    a_ki_s : ndarray of float
        Transition probability A_ki in s^-1.
    e_upper_ev, e_lower_ev : ndarray of float
        Upper and lower level energies above the ground state of the species, eV.
    g_upper, g_lower : ndarray of float
        Statistical weights 2J + 1.
    multiplet : ndarray of str
        Multiplet label from the lower and upper terms, e.g. ``"a 5F - z 5D*"``.
    group : ndarray of str
        Composition group (``"na"``, ``"mg"``, ``"fe"``) or ``""``.
    transition_type : ndarray of str, optional
        ``"E1"`` (allowed) or ``"M1"``, ``"E2"``, ``"M2"``, ``"M1+E2"`` (forbidden).
        Default: all ``"E1"``.
    accuracy : ndarray of str, optional
        NIST accuracy grade of A (AAA <= 0.3 %, A <= 3 %, B <= 10 %, C <= 25 %, D <= 50 %,
        E > 50 %). Default: all ``""`` (unknown).

    Notes
    -----
    The arrays are copied and made read-only, so a LineList can be shared between stages.
    """

    species: NDArray[np.str_]
    element: NDArray[np.str_]
    ion: NDArray[np.int64]
    wavelength_nm: NDArray[np.float64]
    wavelength_vac_nm: NDArray[np.float64]
    a_ki_s: NDArray[np.float64]
    e_upper_ev: NDArray[np.float64]
    e_lower_ev: NDArray[np.float64]
    g_upper: NDArray[np.float64]
    g_lower: NDArray[np.float64]
    multiplet: NDArray[np.str_]
    group: NDArray[np.str_]
    transition_type: NDArray[np.str_] | None = field(default=None)
    accuracy: NDArray[np.str_] | None = field(default=None)

    def __post_init__(self) -> None:
        n = len(np.atleast_1d(np.asarray(self.species)))
        defaults = {"transition_type": "E1", "accuracy": ""}
        kinds = {"ion": np.int64, "wavelength_nm": float, "wavelength_vac_nm": float,
                 "a_ki_s": float, "e_upper_ev": float, "e_lower_ev": float, "g_upper": float,
                 "g_lower": float}
        for f in fields(self):
            value = getattr(self, f.name)
            if value is None:
                value = np.full(n, defaults[f.name])
            dtype = kinds.get(f.name, str)
            arr = np.array(value, dtype=dtype, copy=True, ndmin=1)
            if arr.ndim != 1 or arr.shape[0] != n:
                raise ValueError(f"LineList column {f.name} has shape {arr.shape}, expected ({n},)")
            arr.flags.writeable = False
            object.__setattr__(self, f.name, arr)

    def __len__(self) -> int:
        return int(self.species.shape[0])

    def select(self, mask: ArrayLike) -> LineList:
        """The lines where ``mask`` is True (or at the given integer indices)."""
        index = np.asarray(mask)
        if index.dtype == bool and index.shape != (len(self),):
            raise ValueError(f"mask has shape {index.shape}, expected ({len(self)},)")
        return LineList(**{f.name: getattr(self, f.name)[index] for f in fields(self)})

    def for_species(self, species: str) -> LineList:
        """The lines of one species, e.g. ``"Fe I"``."""
        return self.select(self.species == species)

    def in_range(self, lo_nm: float, hi_nm: float) -> LineList:
        """The lines with ``lo_nm <= wavelength_nm <= hi_nm`` (air)."""
        return self.select((self.wavelength_nm >= lo_nm) & (self.wavelength_nm <= hi_nm))


_LINE_COLUMNS = {  # LineList field -> lines.csv column
    "species": "species", "element": "element", "ion": "ion",
    "wavelength_nm": "wavelength_air_nm", "wavelength_vac_nm": "wavelength_vac_nm",
    "a_ki_s": "A_ki_s", "e_upper_ev": "E_upper_eV", "e_lower_ev": "E_lower_eV",
    "g_upper": "g_upper", "g_lower": "g_lower", "multiplet": "multiplet", "group": "group",
    "transition_type": "type", "accuracy": "acc",
}
_NUMERIC = ("ion", "wavelength_nm", "wavelength_vac_nm", "a_ki_s", "e_upper_ev", "e_lower_ev",
            "g_upper", "g_lower")


def _atomic_dir() -> Path:
    return calibration_dir() / "atomic"


def _read_table(path: Path, columns: list[str]) -> dict[str, list[str]]:
    """Read the named columns of a CSV file; one-line InputError on any problem."""
    try:
        with path.open(newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            header = reader.fieldnames or []
            missing = [c for c in columns if c not in header]
            if missing:
                raise InputError(path, f"missing column(s) {', '.join(missing)}")
            out: dict[str, list[str]] = {c: [] for c in columns}
            for row in reader:
                for c in columns:
                    out[c].append(row[c] if row[c] is not None else "")
            return out
    except FileNotFoundError:
        raise InputError(path, "file not found") from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(path, f"cannot read: {exc}") from None


def _to_float(path: Path, name: str, values: list[str]) -> NDArray[np.float64]:
    try:
        arr = np.array(values, dtype=float)
    except ValueError:
        bad = next(i for i, v in enumerate(values) if not _is_number(v))
        raise InputError(path, f"not a number: {values[bad]!r} (data row {bad + 1})",
                         key=name) from None
    if not np.all(np.isfinite(arr)):
        bad = int(np.flatnonzero(~np.isfinite(arr))[0])
        raise InputError(path, f"non-finite value (data row {bad + 1})", key=name)
    return arr


def _is_number(value: str) -> bool:
    try:
        float(value)
    except ValueError:
        return False
    return True


def load_line_list(path: Path | None = None) -> LineList:
    """Read the project line list.

    Parameters
    ----------
    path : Path, optional
        CSV file with the columns of ``calibration/atomic/lines.csv``. Default:
        ``calibration_dir() / "atomic" / "lines.csv"``.

    Returns
    -------
    LineList
        All lines in the file, allowed (E1) and forbidden, in file order (air wavelength).

    Raises
    ------
    InputError
        If the file is missing, lacks a column, or holds a non-numeric, non-finite or
        unphysical value (wavelength <= 0, A < 0, g <= 0, E_upper <= E_lower).

    Notes
    -----
    The file is built from NIST ASD (Kramida et al., doi:10.18434/T4W30F) by
    ``calibration/build_linelist.py``; air wavelengths were converted from Ritz vacuum
    wavelengths with Morton (2000, ApJS 130, 403), see :func:`vac_to_air_nm`.
    """
    path = _atomic_dir() / "lines.csv" if path is None else Path(path)
    table = _read_table(path, list(_LINE_COLUMNS.values()))
    cols: dict[str, object] = {}
    for name, column in _LINE_COLUMNS.items():
        values = table[column]
        if name in _NUMERIC:
            cols[name] = _to_float(path, column, values)
        else:
            cols[name] = np.array(values, dtype=str)
    checks = [
        ("wavelength_air_nm", cols["wavelength_nm"] <= 0, "wavelength must be > 0"),
        ("wavelength_vac_nm", cols["wavelength_vac_nm"] <= 0, "wavelength must be > 0"),
        ("A_ki_s", cols["a_ki_s"] < 0, "transition probability must be >= 0"),
        ("g_upper", cols["g_upper"] <= 0, "statistical weight must be > 0"),
        ("g_lower", cols["g_lower"] <= 0, "statistical weight must be > 0"),
        ("E_upper_eV", cols["e_upper_ev"] <= cols["e_lower_ev"], "upper level not above lower"),
        ("ion", ~np.isin(cols["ion"], list(_ROMAN)), "stage must be 1..4"),
    ]
    for column, bad, problem in checks:
        if np.any(bad):
            raise InputError(path, f"{problem} (data row {int(np.flatnonzero(bad)[0]) + 1})",
                             key=column)
    cols["ion"] = cols["ion"].astype(np.int64)
    return LineList(**cols)


def group_mask(lines: LineList, group: str) -> NDArray[np.bool_]:
    """Boolean mask of the lines belonging to a composition group.

    Parameters
    ----------
    lines : LineList
    group : str
        One of :data:`COMPOSITION_GROUPS` (``"na"``, ``"mg"``, ``"fe"``).

    Returns
    -------
    ndarray of bool, shape (len(lines),)

    Notes
    -----
    Membership is fixed by contract section 6 and written into ``lines.csv`` by
    ``calibration/build_linelist.py``: Na I 3s 2S - 3p 2P* (588.995, 589.592 nm);
    Mg I 3s3p 3P* - 3s4s 3S (516.732, 517.268, 518.360 nm); Fe I a 5F - z 5D*, the nine
    allowed members between 526 and 546 nm. Only allowed (E1) lines are members.
    """
    if group not in COMPOSITION_GROUPS:
        raise ValueError(f"unknown composition group {group!r}; expected one of "
                         f"{', '.join(COMPOSITION_GROUPS)}")
    return np.asarray(lines.group == group)


# --------------------------------------------------------------------------------------------
# Levels, ionisation energies, partition functions
# --------------------------------------------------------------------------------------------

@functools.lru_cache(maxsize=4)
def _levels_table(path_str: str) -> dict[tuple[str, int], tuple[NDArray, NDArray]]:
    path = Path(path_str)
    t = _read_table(path, ["element", "ion", "E_eV", "g"])
    ion = _to_float(path, "ion", t["ion"]).astype(int)
    energy = _to_float(path, "E_eV", t["E_eV"])
    g = _to_float(path, "g", t["g"])
    if np.any(energy < 0) or np.any(g <= 0):
        raise InputError(path, "negative level energy or non-positive statistical weight")
    element = np.array(t["element"], dtype=str)
    out = {}
    for key in sorted(set(zip(element.tolist(), ion.tolist()))):
        m = (element == key[0]) & (ion == key[1])
        out[key] = (energy[m], g[m])
    return out


@functools.lru_cache(maxsize=4)
def _ionization_table(path_str: str) -> dict[tuple[str, int], float]:
    path = Path(path_str)
    t = _read_table(path, ["element", "ion", "ionization_energy_eV"])
    ion = _to_float(path, "ion", t["ion"]).astype(int)
    energy = _to_float(path, "ionization_energy_eV", t["ionization_energy_eV"])
    return {(e, int(i)): float(x) for e, i, x in zip(t["element"], ion, energy)}


def ionization_energy_ev(element: str, ion: int) -> float:
    """Ionisation energy of stage ``ion`` of ``element`` (e.g. Fe, 1: Fe I -> Fe II), eV.

    Notes
    -----
    NIST ASD ionisation energies (Kramida et al., doi:10.18434/T4W30F), from
    ``calibration/atomic/ionization_energies.csv``.
    """
    path = _atomic_dir() / "ionization_energies.csv"
    table = _ionization_table(str(path))
    try:
        return table[(element, int(ion))]
    except KeyError:
        raise InputError(path, f"no ionization energy for {species_name(element, ion)}") from None


@functools.lru_cache(maxsize=256)
def _summed_levels(levels_path: str, ie_path: str, element: str, ion: int,
                   lowering_ev: float) -> tuple[NDArray, NDArray]:
    """Energies and weights of the levels kept by the cut-off rule (cached per species)."""
    table = _levels_table(levels_path)
    if (element, ion) not in table:
        if _ATOMIC_NUMBER.get(element) == ion - 1:  # bare nucleus: one state, U = 1
            return np.zeros(1), np.ones(1)
        raise InputError(levels_path, f"no energy levels for {species_name(element, ion)}")
    energy, g = table[(element, ion)]
    limit = _ionization_table(ie_path)[(element, ion)] - ion * lowering_ev
    keep = energy < limit
    return energy[keep], g[keep]


def _check_temperature(temperature_k: ArrayLike) -> NDArray[np.float64]:
    t = np.asarray(temperature_k, dtype=float)
    if not np.all(np.isfinite(t) & (t > 0)):
        raise ValueError("temperature_k must be finite and > 0")
    return t


def partition_function(element: str, ion: int, temperature_k: ArrayLike, *,
                       levels: tuple[ArrayLike, ArrayLike] | None = None,
                       lowering_ev: float = DEFAULT_LOWERING_EV) -> NDArray[np.float64]:
    """Internal partition function U(T) = sum_i g_i exp(-E_i / kT).

    Parameters
    ----------
    element : str
        Element symbol, e.g. ``"Fe"``.
    ion : int
        Stage, 1 = neutral.
    temperature_k : array_like
        Excitation temperature(s), K, > 0.
    levels : (energies_ev, g), optional
        Use these levels as given instead of the NIST table (no cut-off applied).
    lowering_ev : float, optional
        Cut-off parameter dE of the rule below (default 0.1 eV).

    Returns
    -------
    ndarray
        U(T), same shape as ``temperature_k``.

    Notes
    -----
    Sum over the bound NIST ASD levels of the stage (``calibration/atomic/levels.csv``;
    Kramida et al., doi:10.18434/T4W30F), keeping only levels with

        E < IE - z * dE,   z = ion (charge seen by the outer electron), dE = 0.1 eV.

    Without a cut-off the sum over Rydberg levels grows without bound as T rises (for Na I
    at 10 000 K the plain sum is 5.8 against 4.5 from Irwin 1981, ApJS 45, 621). dE scales
    with z as the Debye-Hueckel lowering of the ionisation limit does; for a neutral atom it
    removes levels with effective principal quantum number above sqrt(13.6 / 0.1) ~ 12.
    The choice is a convention, as is every cut-off (Irwin's tables used their own). At
    5000 K it changes U by < 0.2 % for every species here except K I (1.0 %); at 6000 K by
    < 1.1 % except K I (4.6 %); it brings Na I at 10 000 K to 4.6. Complex atoms (Fe I,
    Ti I) stay a few per cent below Irwin above 8000 K because ASD lacks high levels; that is
    a property of the data, not of the rule.
    """
    t = _check_temperature(temperature_k)
    if levels is None:
        energy, g = _summed_levels(str(_atomic_dir() / "levels.csv"),
                                   str(_atomic_dir() / "ionization_energies.csv"),
                                   element, int(ion), float(lowering_ev))
    else:
        energy = np.asarray(levels[0], dtype=float).ravel()
        g = np.asarray(levels[1], dtype=float).ravel()
        if energy.shape != g.shape or energy.size == 0:
            raise ValueError("levels must be two equal-length, non-empty arrays (E_eV, g)")
    kt_ev = _K_EV_K * t[..., None]
    return np.sum(g * np.exp(-energy / kt_ev), axis=-1)


def boltzmann_fraction(e_upper_ev: ArrayLike, g_upper: ArrayLike, partition: ArrayLike,
                       temperature_k: ArrayLike) -> NDArray[np.float64]:
    """Fraction of a species' atoms in one level, N_u / N = g_u exp(-E_u / kT) / U(T).

    Parameters
    ----------
    e_upper_ev : array_like
        Level energy above the ground state, eV.
    g_upper : array_like
        Statistical weight of the level.
    partition : array_like
        Partition function U(T) of the species (see :func:`partition_function`).
    temperature_k : array_like
        Excitation temperature, K.

    Returns
    -------
    ndarray
        Broadcast of the inputs.

    Notes
    -----
    The Boltzmann distribution in local thermodynamic equilibrium (e.g. Gray, *The
    Observation and Analysis of Stellar Photospheres*, ch. 1 and 8).
    """
    t = _check_temperature(temperature_k)
    return (np.asarray(g_upper, dtype=float) * np.exp(-np.asarray(e_upper_ev, dtype=float)
                                                      / (_K_EV_K * t))
            / np.asarray(partition, dtype=float))


def saha_ratio(element: str, ion: int, temperature_k: ArrayLike, electron_density_m3: ArrayLike,
               *, lowering_ev: float = DEFAULT_LOWERING_EV) -> NDArray[np.float64]:
    """Ratio of the next ionisation stage to this one, N_(ion+1) / N_ion, by the Saha equation.

    Parameters
    ----------
    element : str
        Element symbol.
    ion : int
        The lower stage (1: returns N(II) / N(I)).
    temperature_k : array_like
        Ionisation temperature, K.
    electron_density_m3 : array_like
        Free-electron number density, m^-3, > 0.
    lowering_ev : float, optional
        Cut-off parameter of :func:`partition_function` for both stages.

    Returns
    -------
    ndarray
        Broadcast of ``temperature_k`` and ``electron_density_m3``.

    Notes
    -----
    Saha equation (e.g. Gray, ch. 1; Carroll and Ostlie, *An Introduction to Modern
    Astrophysics*, sec. 8.1):

        N_(i+1) n_e / N_i = 2 U_(i+1) / U_i (2 pi m_e k T / h^2)^(3/2) exp(-chi_i / kT)

    with chi_i the NIST ionisation energy, not lowered, as in the textbook form: the cut-off
    only truncates the partition sums. (The Debye-Hueckel lowering itself is below 0.01 eV
    for n_e <= 1e21 m^-3 at 5000 K and above, so leaving it out of the exponent changes the
    ratio by < 3 %.) A bare nucleus (H II) has U = 1.
    """
    t = _check_temperature(temperature_k)
    n_e = np.asarray(electron_density_m3, dtype=float)
    if not np.all(np.isfinite(n_e) & (n_e > 0)):
        raise ValueError("electron_density_m3 must be finite and > 0")
    chi_ev = ionization_energy_ev(element, ion)
    u_lo = partition_function(element, ion, t, lowering_ev=lowering_ev)
    u_hi = partition_function(element, ion + 1, t, lowering_ev=lowering_ev)
    thermal = (2.0 * np.pi * _M_E_KG * _K_J_K * t / _H_J_S**2) ** 1.5  # m^-3
    return 2.0 * u_hi / u_lo * thermal * np.exp(-chi_ev / (_K_EV_K * t)) / n_e


# --------------------------------------------------------------------------------------------
# Line emission and absorption
# --------------------------------------------------------------------------------------------

def _line_populations(lines: LineList, temperature_k: ArrayLike,
                      column_density_m2: dict[str, float] | float,
                      lowering_ev: float) -> tuple[NDArray, NDArray, NDArray]:
    """Column density and partition function per line, each of shape T.shape + (n_lines,)."""
    t = _check_temperature(temperature_k)[..., None]
    n = len(lines)
    partition = np.ones(t.shape[:-1] + (n,))
    column = np.empty(n)
    species_list = list(dict.fromkeys(lines.species.tolist()))
    for species in species_list:
        m = lines.species == species
        element, ion = parse_species(species)
        partition[..., m] = partition_function(element, ion, t, lowering_ev=lowering_ev)
        if isinstance(column_density_m2, dict):
            if species not in column_density_m2:
                raise ValueError(f"column_density_m2 has no entry for {species!r} "
                                 f"(has {', '.join(column_density_m2) or 'nothing'})")
            column[m] = column_density_m2[species]
        else:
            column[m] = column_density_m2
    if not np.all(np.isfinite(column) & (column >= 0)):
        raise ValueError("column_density_m2 must be finite and >= 0")
    return t, column, partition


def line_energy_rate(lines: LineList, temperature_k: ArrayLike,
                     column_density_m2: dict[str, float] | float, *,
                     lowering_ev: float = DEFAULT_LOWERING_EV) -> NDArray[np.float64]:
    """Optically thin line radiance: energy emitted per line, per unit area and solid angle.

    Parameters
    ----------
    lines : LineList
    temperature_k : array_like
        Excitation temperature(s), K.
    column_density_m2 : dict or float
        Column density of each species (atoms in that ionisation stage) along the line of
        sight, m^-2: ``{"Fe I": 1e18, ...}`` with an entry for every species in ``lines``,
        or one number for all.
    lowering_ev : float, optional
        Cut-off parameter of :func:`partition_function`.

    Returns
    -------
    ndarray of shape T.shape + (len(lines),)
        Integrated line radiance in W m^-2 sr^-1.

    Notes
    -----
    In LTE, for an optically thin column (e.g. Thorne, Litzen and Johansson, *Spectrophysics*,
    ch. 9; common practice in LIBS and meteor spectroscopy),

        I = (h c / lambda) A_ki N g_u exp(-E_u / kT) / U(T) / (4 pi),

    with lambda the vacuum wavelength (photon energy) and U from :func:`partition_function`.
    """
    t, column, partition = _line_populations(lines, temperature_k, column_density_m2,
                                             lowering_ev)
    photon_j = _H_J_S * _C_M_S / (lines.wavelength_vac_nm * 1e-9)
    upper = lines.g_upper * np.exp(-lines.e_upper_ev / (_K_EV_K * t)) / partition
    return photon_j * lines.a_ki_s * column * upper / (4.0 * np.pi)


def line_optical_depth(lines: LineList, temperature_k: ArrayLike,
                       column_density_m2: dict[str, float] | float, *,
                       fwhm_nm: ArrayLike,
                       lowering_ev: float = DEFAULT_LOWERING_EV) -> NDArray[np.float64]:
    """Optical depth at line centre, for judging self-absorption.

    Parameters
    ----------
    lines : LineList
    temperature_k : array_like
        Excitation temperature(s), K.
    column_density_m2 : dict or float
        Column density per species, m^-2, as in :func:`line_energy_rate`.
    fwhm_nm : array_like
        Full width at half maximum of the (Gaussian) line profile, nm; a scalar or one per line.
    lowering_ev : float, optional
        Cut-off parameter of :func:`partition_function`.

    Returns
    -------
    ndarray of shape T.shape + (len(lines),)
        Dimensionless tau_0; tau_0 << 1 means optically thin.

    Notes
    -----
    Absorption from the lower level with the integrated cross-section
    int sigma d(lambda) = lambda^4 / (8 pi c) (g_u / g_l) A_ki (Einstein relations, e.g.
    Rybicki and Lightman, *Radiative Processes in Astrophysics*, sec. 1.6), corrected for
    stimulated emission in LTE, and a Gaussian profile whose peak is
    phi_0 = 2 sqrt(ln 2 / pi) / FWHM:

        tau_0 = N g_l exp(-E_l / kT) / U * lambda^4 / (8 pi c) * (g_u / g_l) A_ki
                * (1 - exp(-h c / (lambda k T))) * phi_0.
    """
    fwhm_m = np.asarray(fwhm_nm, dtype=float) * 1e-9
    if not np.all(np.isfinite(fwhm_m) & (fwhm_m > 0)):
        raise ValueError("fwhm_nm must be finite and > 0")
    t, column, partition = _line_populations(lines, temperature_k, column_density_m2,
                                             lowering_ev)
    lam_m = lines.wavelength_vac_nm * 1e-9
    lower = column * lines.g_lower * np.exp(-lines.e_lower_ev / (_K_EV_K * t)) / partition
    cross_m = lam_m**4 / (8.0 * np.pi * _C_M_S) * (lines.g_upper / lines.g_lower) * lines.a_ki_s
    stimulated = -np.expm1(-_H_J_S * _C_M_S / (lam_m * _K_J_K * t))
    phi0_per_m = 2.0 * np.sqrt(np.log(2.0) / np.pi) / fwhm_m
    return lower * cross_m * stimulated * phi0_per_m


# --------------------------------------------------------------------------------------------
# Continuum and wavelength scales
# --------------------------------------------------------------------------------------------

def planck_radiance(wavelength_nm: ArrayLike, temperature_k: ArrayLike) -> NDArray[np.float64]:
    """Black-body spectral radiance B_lambda(T) in W m^-2 sr^-1 nm^-1.

    Parameters
    ----------
    wavelength_nm : array_like
        Wavelength, nm, > 0.
    temperature_k : array_like
        Temperature, K, > 0; broadcast against ``wavelength_nm``.

    Returns
    -------
    ndarray

    Notes
    -----
    Planck's law, B_lambda = 2 h c^2 / lambda^5 / (exp(h c / (lambda k T)) - 1), with CODATA
    constants. The wavelength is used as given: feeding air wavelengths instead of vacuum
    ones changes B by ~5 x 0.03 % = 0.14 %, below any flux calibration of this kind.
    """
    t = _check_temperature(temperature_k)
    lam_m = np.asarray(wavelength_nm, dtype=float) * 1e-9
    if not np.all(np.isfinite(lam_m) & (lam_m > 0)):
        raise ValueError("wavelength_nm must be finite and > 0")
    x = _H_J_S * _C_M_S / (lam_m * _K_J_K * t)
    with np.errstate(over="ignore"):  # exp overflow -> inf -> B = 0, the right limit
        return 2.0 * _H_J_S * _C_M_S**2 / lam_m**5 / np.expm1(x) * 1e-9


def _air_index_morton(wavelength_vac_nm: NDArray[np.float64]) -> NDArray[np.float64]:
    sigma2 = (1e3 / wavelength_vac_nm) ** 2  # (vacuum wavenumber in um^-1)^2
    return 1.0 + 8.34254e-5 + 2.406147e-2 / (130.0 - sigma2) + 1.5998e-4 / (38.9 - sigma2)


def vac_to_air_nm(wavelength_vac_nm: ArrayLike) -> NDArray[np.float64]:
    """Convert vacuum wavelengths to standard air (IAU convention).

    Parameters
    ----------
    wavelength_vac_nm : array_like
        Vacuum wavelength, nm.

    Returns
    -------
    ndarray
        Air wavelength, nm; values below 200 nm are returned unchanged (IAU: vacuum there).

    Notes
    -----
    Morton (2000, ApJS 130, 403, eq. 8; Edlen 1966 / Birch and Downs 1994 based), the
    IAU standard: with sigma = 10^4 / lambda_vac[A] in um^-1,
    n = 1 + 8.34254e-5 + 2.406147e-2 / (130 - sigma^2) + 1.5998e-4 / (38.9 - sigma^2),
    lambda_air = lambda_vac / n. This is the formula used for the shared NIST extract
    (see calibration/atomic/SOURCES.md).
    """
    vac = np.asarray(wavelength_vac_nm, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        air = vac / _air_index_morton(vac)
    return np.where(vac >= 200.0, air, vac)


def air_to_vac_nm(wavelength_air_nm: ArrayLike) -> NDArray[np.float64]:
    """Convert standard air wavelengths to vacuum: the numerical inverse of :func:`vac_to_air_nm`.

    Parameters
    ----------
    wavelength_air_nm : array_like
        Air wavelength, nm (values below 200 nm are taken as vacuum already).

    Returns
    -------
    ndarray
        Vacuum wavelength, nm, such that ``vac_to_air_nm(result)`` equals the input to
        < 1e-12 relative.

    Notes
    -----
    Fixed-point iteration lambda_vac <- lambda_air * n(lambda_vac) on Morton (2000); n
    changes by ~1e-6 across the visible, so each step gains ~6 digits and four steps are
    more than enough.
    """
    air = np.asarray(wavelength_air_nm, dtype=float)
    vac = air.copy()
    with np.errstate(invalid="ignore", divide="ignore"):
        for _ in range(4):
            vac = air * _air_index_morton(vac)
    return np.where(air >= 200.0, vac, air)
