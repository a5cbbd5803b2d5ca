"""Composition and spectral class of the meteoroid from the Na I, Mg I and Fe I line groups.

Three parts:

* **Composition** (contract section 6): the group intensities normalised to
  ``na + mg + fe = 1``, with errors propagated through the normalisation.
* **Class** in the published vocabulary (Borovicka et al. 2005, Icarus 174, 15; Vojacek et al.
  2015, A&A 580, A67; Matlovic et al. 2019, A&A 629, A71): ``normal``, ``Na-poor``,
  ``Na-free``, ``Na-enhanced``, ``Fe-poor``, ``iron`` or ``unclassified`` with the reason. The
  class is judged relative to the *expected normal* (chondritic) position at the meteor's
  speed, built here from the project's LTE model (:mod:`meteorspec.atomic`); the class
  boundaries live in one table, ``calibration/classes.csv``, with a source for every number.
* **Time-resolved composition**: per-frame ``na``, ``mg``, ``fe``, monochromatic light curves
  of Na I, Mg I, Fe I and the atmospheric O I 777 nm triplet, and the differential-ablation
  measure of Vojacek et al. (2019, A&A 621, A68): how early Na peaks relative to Mg and Fe.

The expected-normal model
-------------------------
Optically thin LTE emission (:func:`meteorspec.atomic.line_energy_rate`) of the three groups for
CI-chondrite element ratios (Lodders 2003, ApJ 591, 1220), with the neutral fraction of each
element from the Saha equation (:func:`meteorspec.atomic.saha_ratio`) at one electron density,
at a speed-dependent temperature

    T(v) = T_high - (T_high - T_ref) * max(0, (v_flat - v) / (v_flat - v_ref))**2 .

Above ``v_flat`` the temperature, and so the expected position, is constant (Na/Mg "about
constant at high speed"); below it the plasma cools and the Na/Mg intensity ratio rises steeply
(the Na line has a 2.1 eV upper level and a 5.1 eV ionisation energy, the Mg b lines 5.1 eV
and 7.6 eV). Two numbers are calibrated, both by :func:`calibrate_normal_model`:

1. a constant factor on the Na group, so that Na/Mg at high speed equals a target value
   (``target_na_mg_high``, read from the published ternaries *from memory*); it stands in for
   what the thin one-temperature model leaves out, above all self-absorption of the Na D
   resonance lines;
2. ``T_ref`` = T(10 km/s), so that Na/Mg at 10 km/s is enhanced over the high-speed value by
   the geometric middle (61.6) of the factor 40 to 95 that Matlovic et al. (2020,
   arXiv:2004.11109) estimate for an H chondrite at about 10 km/s.

Every parameter, its unit and source are in ``calibration/classes_expected.csv``; see
``calibration/classes_SOURCES.md`` for the reasoning and the reading of the published facts.

Classification geometry
-----------------------
With the expected normal point ``(na0, mg0, fe0)`` at the speed, each class rule compares one
of ``na_mg_rel = (na/mg) / (na0/mg0)``, ``fe_mg_rel = (fe/mg) / (fe0/mg0)``, the fractions
``na_fraction``, ``mg_fraction``, ``fe_fraction`` or ``total_snr`` (summed group intensity over
its error) with a threshold. In the ternary these are straight lines: constant Na/Mg is a ray
from the Fe corner, constant Fe/Mg a ray from the Na corner. Rules of one ``order`` are
combined with AND; the first order that matches gives the class.

The class is that of the measured point; ``class_confidence`` is the fraction of Monte Carlo
draws (group intensities from a multivariate normal with the covariance, speed from a normal
with its error) that fall in the same class.
"""

from __future__ import annotations

import csv
import functools
import math
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import brentq, least_squares
from scipy.stats import chi2 as chi2_dist

from . import atomic
from .errors import InputError
from .plasma import multiplet_templates
from .resources import calibration_dir

__all__ = [
    "CLASS_NAMES",
    "DEEP_SATURATED_SHARE",
    "ClassRule",
    "ClassTable",
    "Composition",
    "GROUPS",
    "LIGHT_CURVE_BANDS_NM",
    "NormalModel",
    "TimeResolved",
    "boundary_distance_sigma",
    "calibrate_normal_model",
    "classify",
    "classify_points",
    "composition_from_groups",
    "cover_other_fit",
    "deep_wing_peak",
    "expected_normal",
    "light_curve_from_spectra",
    "load_class_table",
    "load_normal_model",
    "normal_group_intensity",
    "ternary_figure",
    "time_resolved",
    "time_resolved_from_fits",
    "weak_line_curve",
    "weak_line_curves",
]

GROUPS = ("na", "mg", "fe")
"""Order of the groups in every array and covariance here (contract section 6)."""

CLASS_NAMES = ("normal", "Na-poor", "Na-enhanced", "Na-free", "Fe-poor", "iron", "unclassified")
"""Contract vocabulary (section 6)."""

_QUANTITIES = ("na_mg_rel", "fe_mg_rel", "na_fraction", "mg_fraction", "fe_fraction",
               "total_snr", "otherwise")
_OPERATORS = {"<": np.less, "<=": np.less_equal, ">": np.greater, ">=": np.greater_equal}
_QUANTITY_LABEL = {"na_mg_rel": "Na/Mg / normal", "fe_mg_rel": "Fe/Mg / normal",
                   "na_fraction": "na", "mg_fraction": "mg", "fe_fraction": "fe",
                   "total_snr": "total S/N"}
_ELEMENT = {"na": "Na", "mg": "Mg", "fe": "Fe"}

# Monochromatic bands for :func:`light_curve_from_spectra`: centre and half width, nm (air).
# Centres from the NIST ASD lines of calibration/atomic/lines.csv (Na D 588.995/589.592;
# Mg b 516.73-518.36; Fe I multiplet 15 members 537.15, 539.71 and 540.58, away from the Mg b
# and Cr I 520.8 nm lines; O I 777.19/777.42/777.54). Half widths are a
# project choice for ~1 nm resolution video spectra; pass your own for other instruments.
LIGHT_CURVE_BANDS_NM: dict[str, tuple[float, float]] = {
    "Na I": (589.29, 1.5),
    "Mg I": (517.55, 1.8),
    "Fe I": (538.86, 2.6),
    "O I 777": (777.40, 1.5),
}


# --------------------------------------------------------------------------------------------
# Data objects
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Composition:
    """Composition and class of one meteor (contract section 5, ``/composition``).

    Attributes
    ----------
    na, mg, fe : float
        Relative group intensities, ``na + mg + fe = 1`` (NaN if nothing was measured).
    na_err, mg_err, fe_err : float
        1-sigma errors, propagated through the normalisation.
    class_name : str
        One of :data:`CLASS_NAMES`.
    class_confidence : float
        Fraction (0..1) of Monte Carlo draws in ``class_name``; 0 when unclassified.
    class_reason : str
        Why this class (for ``unclassified`` the problem with the input).
    speed_km_s : float
        The speed given, NaN if unknown.
    flags : tuple of str
        ``"speed_unknown"``, ``"speed_outside_model"``, ``"negative_intensity"``,
        ``"class_uncertain"`` (confidence < 0.5).
    speed_used_km_s : float
        Speed at which the expected normal position was taken (the default when unknown).
    expected_normal : tuple of float
        ``(na0, mg0, fe0)`` at ``speed_used_km_s``.
    class_probabilities : tuple of (str, float)
        Share of the Monte Carlo draws in each class, largest first.
    """

    na: float
    mg: float
    fe: float
    na_err: float
    mg_err: float
    fe_err: float
    class_name: str
    class_confidence: float
    class_reason: str
    speed_km_s: float
    flags: tuple[str, ...] = ()
    speed_used_km_s: float = math.nan
    expected_normal: tuple[float, float, float] = (math.nan, math.nan, math.nan)
    class_probabilities: tuple[tuple[str, float], ...] = ()

    @property
    def values(self) -> NDArray[np.float64]:
        """``[na, mg, fe]``."""
        return np.array([self.na, self.mg, self.fe])

    @property
    def errors(self) -> NDArray[np.float64]:
        """``[na_err, mg_err, fe_err]``."""
        return np.array([self.na_err, self.mg_err, self.fe_err])


@dataclass(frozen=True)
class ClassRule:
    """One row of ``calibration/classes.csv``: ``quantity operator value`` gives ``class_name``."""

    order: int
    class_name: str
    quantity: str
    operator: str
    value: float
    source: str

    def describe(self) -> str:
        if self.quantity == "otherwise":
            return "no other class matched"
        return f"{_QUANTITY_LABEL[self.quantity]} {self.operator} {self.value:g}"


@dataclass(frozen=True)
class ClassTable:
    """The class boundaries, in evaluation order (see :func:`load_class_table`)."""

    rules: tuple[ClassRule, ...]
    path: str = ""

    def orders(self) -> list[tuple[int, str, tuple[ClassRule, ...]]]:
        """``(order, class_name, rules)`` for each order, ascending."""
        out = []
        for order in sorted({r.order for r in self.rules}):
            rules = tuple(r for r in self.rules if r.order == order)
            out.append((order, rules[0].class_name, rules))
        return out

    def threshold(self, class_name: str, quantity: str) -> float:
        """The value of the rule for ``class_name`` on ``quantity`` (NaN if there is none)."""
        for r in self.rules:
            if r.class_name == class_name and r.quantity == quantity:
                return r.value
        return math.nan


@dataclass(frozen=True)
class NormalModel:
    """Parameters of the expected-normal curve (``calibration/classes_expected.csv``).

    Attributes
    ----------
    abundance_na, abundance_mg, abundance_fe : float
        CI-chondrite atoms per 1e6 Si atoms (Lodders 2003).
    temperature_high_k : float
        Plasma temperature at and above ``speed_flat_km_s``.
    temperature_reference_k : float
        Temperature at ``speed_reference_km_s`` (calibrated).
    speed_flat_km_s, speed_reference_km_s : float
        Knee of T(v) and the speed of the low-speed calibration point.
    electron_density_m3 : float
        Free-electron density of the Saha balance.
    na_effective_factor : float
        Multiplies the thin-LTE Na group energy (calibrated): stands for what the one-temperature
        optically thin model leaves out, above all self-absorption of the Na D resonance lines.
    speed_min_km_s, speed_max_km_s : float
        Range of the model; speeds outside are clipped (and flagged by :func:`classify`).
    default_speed_km_s, default_speed_err_km_s : float
        Used when the speed is unknown.
    target_na_mg_high, target_enhancement_reference : float
        Calibration targets (see the module notes).
    """

    abundance_na: float
    abundance_mg: float
    abundance_fe: float
    temperature_high_k: float
    temperature_reference_k: float
    speed_flat_km_s: float
    speed_reference_km_s: float
    electron_density_m3: float
    na_effective_factor: float
    speed_min_km_s: float
    speed_max_km_s: float
    default_speed_km_s: float
    default_speed_err_km_s: float
    target_na_mg_high: float
    target_enhancement_reference: float
    sources: tuple[tuple[str, str], ...] = field(default=(), compare=False)

    def temperature_k(self, speed_km_s: ArrayLike) -> NDArray[np.float64]:
        """T(v) of the module notes; speeds are clipped to the model range first."""
        v = np.clip(np.asarray(speed_km_s, dtype=float), self.speed_min_km_s, self.speed_max_km_s)
        x = np.clip((self.speed_flat_km_s - v) / (self.speed_flat_km_s - self.speed_reference_km_s),
                    0.0, None)
        drop = self.temperature_high_k - self.temperature_reference_k
        return self.temperature_high_k - drop * x**2


@dataclass(frozen=True, eq=False)
class TimeResolved:
    """Per-frame composition, light curves and the differential-ablation measure.

    Attributes
    ----------
    time_s : ndarray of shape (n_frames,)
    na, mg, fe, na_err, mg_err, fe_err : ndarray of shape (n_frames,)
        Per-frame composition (NaN where the frame's summed group light is below 3 sigma).
    light_curves, light_curve_errs : dict of str to ndarray of shape (n_frames,)
        Keys ``"Na I"``, ``"Mg I"``, ``"Fe I"``, ``"O I 777"`` (NaN where not measured).
    peak_time_s : dict of str to float
        Time of the maximum of each light curve (NaN if it has no significant point).
    peak_time_err_s : dict of str to float
        1-sigma of each peak time (fit covariance of the light-curve top).
    na_peak_lead_s : float
        Na peak time minus the mean of the Mg and Fe peak times; negative = Na peaks early.
    na_peak_lead_fraction : float
        ``na_peak_lead_s`` over ``duration_s``.
    duration_s : float
        Luminous duration: first to last frame whose summed group light is above 3 sigma,
        plus one frame interval.
    flags : tuple of str
    """

    time_s: NDArray[np.float64]
    na: NDArray[np.float64]
    mg: NDArray[np.float64]
    fe: NDArray[np.float64]
    na_err: NDArray[np.float64]
    mg_err: NDArray[np.float64]
    fe_err: NDArray[np.float64]
    light_curves: dict[str, NDArray[np.float64]]
    light_curve_errs: dict[str, NDArray[np.float64]]
    peak_time_s: dict[str, float]
    na_peak_lead_s: float
    na_peak_lead_fraction: float
    duration_s: float
    flags: tuple[str, ...] = ()
    peak_time_err_s: dict[str, float] = field(default_factory=dict)


# --------------------------------------------------------------------------------------------
# Tables
# --------------------------------------------------------------------------------------------

def _read_csv(path: Path, columns: list[str]) -> list[dict[str, str]]:
    try:
        with path.open(newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            missing = [c for c in columns if c not in (reader.fieldnames or [])]
            if missing:
                raise InputError(path, f"missing column(s) {', '.join(missing)}")
            rows = [{k: (v or "").strip() for k, v in row.items() if k is not None}
                    for row in reader]
    except FileNotFoundError:
        raise InputError(path, "file not found") from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(path, f"cannot read: {exc}") from None
    if not rows:
        raise InputError(path, "no data rows")
    return rows


def load_class_table(path: str | Path | None = None) -> ClassTable:
    """Read the class boundaries.

    Parameters
    ----------
    path : path, optional
        CSV with columns ``order, class, quantity, operator, value, source``; default
        ``calibration/classes.csv``.

    Returns
    -------
    ClassTable

    Raises
    ------
    InputError
        Missing file or column, an unknown class, quantity or operator, a non-finite
        threshold, an empty source, or one order holding two classes.

    Notes
    -----
    Rules with the same ``order`` are combined with AND and give that row's class; orders are
    tried from low to high and the first match wins. ``quantity = otherwise`` matches
    everything (the fall-through class, ``normal``). A point that matches no order is
    ``unclassified``. Rules of class ``unclassified`` (e.g. on ``total_snr``) apply to the
    measured point only, not to the Monte Carlo draws.
    """
    path = calibration_dir() / "classes.csv" if path is None else Path(path)
    rows = _read_csv(path, ["order", "class", "quantity", "operator", "value", "source"])
    rules = []
    for i, row in enumerate(rows, start=1):
        where = f"data row {i}"
        try:
            order = int(row["order"])
        except ValueError:
            raise InputError(path, f"order {row['order']!r} is not an integer", key=where) from None
        name, quantity, op = row["class"], row["quantity"], row["operator"]
        if name not in CLASS_NAMES:
            raise InputError(path, f"class {name!r} not in {', '.join(CLASS_NAMES)}", key=where)
        if quantity not in _QUANTITIES:
            raise InputError(path, f"quantity {quantity!r} not in {', '.join(_QUANTITIES)}",
                             key=where)
        if not row["source"]:
            raise InputError(path, "empty source: every threshold needs one", key=where)
        if quantity == "otherwise":
            value = math.nan
        else:
            if op not in _OPERATORS:
                raise InputError(path, f"operator {op!r} not in {', '.join(_OPERATORS)}", key=where)
            try:
                value = float(row["value"])
            except ValueError:
                raise InputError(path, f"value {row['value']!r} is not a number",
                                 key=where) from None
            if not math.isfinite(value):
                raise InputError(path, "value must be finite", key=where)
        rules.append(ClassRule(order, name, quantity, op, value, row["source"]))
    table = ClassTable(tuple(sorted(rules, key=lambda r: r.order)), str(path))
    for order, _, group in table.orders():
        if len({r.class_name for r in group}) != 1:
            raise InputError(path, f"order {order} holds more than one class")
    return table


_MODEL_PARAMETERS = [f.name for f in fields(NormalModel) if f.name != "sources"]


def load_normal_model(path: str | Path | None = None) -> NormalModel:
    """Read the expected-normal model parameters.

    Parameters
    ----------
    path : path, optional
        CSV with columns ``parameter, value, unit, source``, one row per
        :class:`NormalModel` field; default ``calibration/classes_expected.csv``.

    Returns
    -------
    NormalModel

    Raises
    ------
    InputError
        Missing file, column or parameter; a non-numeric, non-finite or non-positive value;
        an empty source; inconsistent speeds or temperatures.
    """
    path = calibration_dir() / "classes_expected.csv" if path is None else Path(path)
    rows = _read_csv(path, ["parameter", "value", "unit", "source"])
    values: dict[str, float] = {}
    sources = []
    for i, row in enumerate(rows, start=1):
        name = row["parameter"]
        if name not in _MODEL_PARAMETERS:
            raise InputError(path, f"unknown parameter {name!r}", key=f"data row {i}")
        try:
            value = float(row["value"])
        except ValueError:
            raise InputError(path, f"value {row['value']!r} is not a number", key=name) from None
        if not (math.isfinite(value) and value > 0):
            raise InputError(path, "value must be finite and > 0", key=name)
        if not row["source"]:
            raise InputError(path, "empty source", key=name)
        values[name] = value
        sources.append((name, row["source"]))
    missing = [p for p in _MODEL_PARAMETERS if p not in values]
    if missing:
        raise InputError(path, f"missing parameter(s) {', '.join(missing)}")
    model = NormalModel(**values, sources=tuple(sources))
    if not (model.speed_min_km_s <= model.speed_reference_km_s < model.speed_flat_km_s
            <= model.speed_max_km_s):
        raise InputError(path, "need speed_min <= speed_reference < speed_flat <= speed_max")
    if not model.temperature_reference_k < model.temperature_high_k:
        raise InputError(path, "temperature_reference_k must be below temperature_high_k")
    return model


@functools.lru_cache(maxsize=2)
def _default_model() -> NormalModel:
    return load_normal_model()


@functools.lru_cache(maxsize=2)
def _default_table() -> ClassTable:
    return load_class_table()


# --------------------------------------------------------------------------------------------
# Expected normal position
# --------------------------------------------------------------------------------------------

@functools.lru_cache(maxsize=1)
def _group_lines() -> dict[str, atomic.LineList]:
    lines = atomic.load_line_list()
    allowed = lines.transition_type == "E1"
    return {g: lines.select(atomic.group_mask(lines, g) & allowed) for g in GROUPS}


def normal_group_intensity(temperature_k: ArrayLike, *, model: NormalModel | None = None,
                           na_effective_factor: float | None = None) -> NDArray[np.float64]:
    """LTE energy of the three groups for CI-chondrite element ratios.

    Parameters
    ----------
    temperature_k : array_like
        Plasma temperature(s), K.
    model : NormalModel, optional
        Abundances and electron density; default the project table.
    na_effective_factor : float, optional
        Override the model's Na factor (used by the calibration).

    Returns
    -------
    ndarray of shape T.shape + (3,)
        Energy of the ``na``, ``mg``, ``fe`` groups, arbitrary common scale.

    Notes
    -----
    For each element: abundance x neutral fraction 1 / (1 + N_II/N_I) (Saha,
    :func:`meteorspec.atomic.saha_ratio`, at the model's electron density) x the optically thin
    LTE energy of the group's allowed lines per neutral atom
    (:func:`meteorspec.atomic.line_energy_rate`); the Na group is then multiplied by
    ``na_effective_factor``.
    """
    model = _default_model() if model is None else model
    n_e = model.electron_density_m3
    na_factor = (model.na_effective_factor if na_effective_factor is None
                 else float(na_effective_factor))
    t = np.asarray(temperature_k, dtype=float)
    abundance = {"na": model.abundance_na, "mg": model.abundance_mg, "fe": model.abundance_fe}
    out = []
    for g, lines in _group_lines().items():
        neutral = 1.0 / (1.0 + atomic.saha_ratio(_ELEMENT[g], 1, t, n_e))
        per_atom = atomic.line_energy_rate(lines, t, 1.0).sum(axis=-1)
        out.append(abundance[g] * neutral * per_atom * (na_factor if g == "na" else 1.0))
    return np.stack(out, axis=-1)


@functools.lru_cache(maxsize=8)
def _normal_grid(model: NormalModel) -> tuple[NDArray, NDArray, NDArray]:
    """log(na/mg) and log(fe/mg) of the expected normal on a 0.1 km/s speed grid."""
    v = np.arange(model.speed_min_km_s, model.speed_max_km_s + 1e-9, 0.1)
    e = normal_group_intensity(model.temperature_k(v), model=model)
    return v, np.log(e[:, 0] / e[:, 1]), np.log(e[:, 2] / e[:, 1])


def _expected_log_ratios(speed_km_s: NDArray, model: NormalModel) -> tuple[NDArray, NDArray]:
    v_grid, log_na_mg, log_fe_mg = _normal_grid(model)
    v = np.clip(speed_km_s, model.speed_min_km_s, model.speed_max_km_s)
    return np.interp(v, v_grid, log_na_mg), np.interp(v, v_grid, log_fe_mg)


def expected_normal(speed_km_s: ArrayLike, *,
                    model: NormalModel | None = None) -> NDArray[np.float64]:
    """Expected ``(na, mg, fe)`` of a chondritic meteoroid at the given speed.

    Parameters
    ----------
    speed_km_s : array_like
        Speed(s) at the start of the luminous trajectory, km/s. Values outside the model range
        (``speed_min_km_s`` .. ``speed_max_km_s``, 10 .. 73 km/s in the project table) are
        clipped to it; NaN gives NaN.
    model : NormalModel, optional
        Default: ``calibration/classes_expected.csv``.

    Returns
    -------
    ndarray of shape speed.shape + (3,)
        ``na + mg + fe = 1``.

    Notes
    -----
    See the module notes; the curve is tabulated on a 0.1 km/s grid and interpolated linearly
    in log(Na/Mg) and log(Fe/Mg) (interpolation error < 1e-4 relative).
    """
    model = _default_model() if model is None else model
    v = np.asarray(speed_km_s, dtype=float)
    a, b = _expected_log_ratios(v, model)
    ratios = np.stack([np.exp(a), np.ones_like(a), np.exp(b)], axis=-1)
    out = ratios / ratios.sum(axis=-1, keepdims=True)
    return np.where(np.isnan(v)[..., None], np.nan, out)


def calibrate_normal_model(model: NormalModel | None = None) -> tuple[float, float]:
    """Solve the two calibrated parameters of the expected-normal model.

    Parameters
    ----------
    model : NormalModel, optional
        Its targets, abundances, ``temperature_high_k`` and speeds are used; its calibrated
        values are ignored. Default: the project table.

    Returns
    -------
    na_effective_factor : float
        Such that Na/Mg at ``temperature_high_k`` equals ``target_na_mg_high``.
    temperature_reference_k : float
        Such that Na/Mg at T_ref over Na/Mg at T_high equals
        ``target_enhancement_reference``.

    Notes
    -----
    The Na factor scales Na/Mg linearly, so it is a ratio; T_ref is a one-dimensional monotonic
    root find (Brent's method): a lower temperature raises Na/Mg through both the Boltzmann
    factor and the Saha balance (the factor cancels in the enhancement). The values written in
    ``calibration/classes_expected.csv`` came from
    this function; ``tests/test_classify.py`` checks that they still do.
    """
    model = _default_model() if model is None else model
    t_hi = model.temperature_high_k

    def na_mg(t: float) -> float:
        e = normal_group_intensity(t, model=model, na_effective_factor=1.0)
        return float(e[0] / e[1])

    high = na_mg(t_hi)
    factor = model.target_na_mg_high / high
    t_ref = brentq(lambda t: math.log(na_mg(t) / high / model.target_enhancement_reference),
                   1500.0, t_hi - 1e-3, xtol=1e-6)
    return factor, t_ref


# --------------------------------------------------------------------------------------------
# Composition
# --------------------------------------------------------------------------------------------

def _intensity_vector(intensity: dict[str, float] | ArrayLike) -> NDArray[np.float64]:
    if isinstance(intensity, dict):
        missing = [g for g in GROUPS if g not in intensity]
        if missing:
            raise ValueError(f"group intensity lacks {', '.join(missing)} (need na, mg, fe)")
        return np.array([float(intensity[g]) for g in GROUPS])
    arr = np.asarray(intensity, dtype=float)
    if arr.shape != (3,):
        raise ValueError(f"group intensity has shape {arr.shape}, expected (3,) "
                         "in order na, mg, fe")
    return arr


def _covariance_matrix(covariance: ArrayLike) -> NDArray[np.float64]:
    cov = np.asarray(covariance, dtype=float)
    if cov.shape != (3, 3):
        raise ValueError(f"group covariance has shape {cov.shape}, expected (3, 3) (na, mg, fe)")
    return cov


def _normalise(intensity: NDArray) -> tuple[NDArray, NDArray]:
    """Fractions of the clipped intensities (..., 3) and their sum (...)."""
    clipped = np.clip(intensity, 0.0, None)
    total = clipped.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = clipped / total[..., None]
    frac = np.where((total > 0)[..., None], frac, np.nan)
    return frac, total


def composition_from_groups(
        intensity: dict[str, float] | ArrayLike,
        covariance: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Normalised composition ``(na, mg, fe)`` and its 1-sigma errors.

    Parameters
    ----------
    intensity : dict or array_like
        Group intensities ``{"na": ..., "mg": ..., "fe": ...}`` (or an array in that order),
        response-corrected energy, any common scale.
    covariance : array_like of shape (3, 3)
        Their covariance, order na, mg, fe.

    Returns
    -------
    values : ndarray of shape (3,)
        ``na + mg + fe = 1``; all NaN if an intensity is not finite or no group is positive.
    errors : ndarray of shape (3,)
        1-sigma; NaN if the covariance is not finite.

    Raises
    ------
    ValueError
        If a group is missing or the covariance is not 3 x 3.

    Notes
    -----
    A negative intensity (noise around zero) counts as zero in the fractions. The errors are
    first-order propagation, sigma_f^2 = diag(J C J^T), with the Jacobian of the
    normalisation f_i = I_i / S, S = sum(I), J_ij = (delta_ij - f_i) / S, taken at the clipped
    point *without* the zero slope of the clipping, so a group measured at or below zero still
    carries its own error (sigma_i / S) instead of none.
    """
    vec = _intensity_vector(intensity)
    cov = _covariance_matrix(covariance)
    nan3 = np.full(3, np.nan)
    if not np.all(np.isfinite(vec)):
        return nan3, nan3.copy()
    frac, total = _normalise(vec)
    if not total > 0:
        return nan3, nan3.copy()
    if not np.all(np.isfinite(cov)):
        return frac, nan3
    jac = (np.eye(3) - frac[:, None]) / total
    var = np.einsum("ij,jk,ik->i", jac, cov, jac)
    return frac, np.sqrt(np.clip(var, 0.0, None))


FITS_DISAGREE_SIGMA = 2.0
"""Disagreement (in combined sigma) between two fits of one meteor's composition beyond which
:func:`cover_other_fit` widens the kept fit's covariance to reach the other's value. The two
errors are combined as if independent; the fits share data (a subset of the frames is part of
the whole flight), so their difference scatters less than that, and noise alone passes the
threshold less often than the 5 % of a two-sided 2-sigma test on one value, times up to three
for the largest of the three fractions (invented, round value)."""


def cover_other_fit(intensity: dict[str, float] | ArrayLike, covariance: ArrayLike,
                    other_intensity: dict[str, float] | ArrayLike, other_covariance: ArrayLike, *,
                    max_sigma: float = FITS_DISAGREE_SIGMA) -> tuple[NDArray[np.float64], float]:
    """A composition's group covariance widened to cover a second fit of the same meteor.

    Parameters
    ----------
    intensity, covariance
        The kept fit's group intensities (na, mg, fe) and their 3 x 3 covariance.
    other_intensity, other_covariance
        The other fit's (e.g. the whole flight's where the frames without saturated group
        lines were kept, or the reverse).
    max_sigma : float
        Largest disagreement, in combined sigma, left as noise (:data:`FITS_DISAGREE_SIGMA`).

    Returns
    -------
    covariance : ndarray of shape (3, 3)
        ``covariance`` unchanged when the two compositions agree (or either is undefined),
        else ``covariance + S^2 d d^T`` (see Notes).
    disagreement_sigma : float
        The largest of ``|d_i| / sqrt(s_i^2 + t_i^2)`` over na, mg, fe (``s``, ``t`` the two
        fits' composition errors); NaN when either composition is undefined.

    Notes
    -----
    Two fits of one meteor that differ by more than their errors allow show that at least one
    of them carries a systematic error its covariance does not hold, and the data do not say
    which. The difference of the two methods is then taken as a systematic error of the kept
    one (common practice in error budgets): with ``d`` the other composition minus the kept
    one (``sum d = 0``) and ``S`` the kept intensities' sum, adding ``S^2 d d^T`` to the group
    covariance adds exactly ``d d^T`` to the composition's (the normalisation's Jacobian
    ``(I - f 1^T) / S`` maps ``S d`` to ``d``), so each fraction's error becomes
    ``sqrt(s_i^2 + d_i^2)`` and the other fit's value lies within one sigma of the kept one.
    """
    vec, cov = _intensity_vector(intensity), _covariance_matrix(covariance)
    frac, err = composition_from_groups(vec, cov)
    other, other_err = composition_from_groups(other_intensity, other_covariance)
    if not (np.all(np.isfinite(frac)) and np.all(np.isfinite(other))):
        return cov, math.nan
    d = other - frac
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.abs(d) / np.hypot(err, other_err)
    z = np.where(np.abs(d) > 0, z, 0.0)
    worst = float(np.max(np.where(np.isnan(z), 0.0, z)))
    if not worst > max_sigma:
        return cov, worst
    _, total = _normalise(vec)
    return cov + float(total) ** 2 * np.outer(d, d), worst


# --------------------------------------------------------------------------------------------
# Classification
# --------------------------------------------------------------------------------------------

def _quantities(intensity: NDArray, speed_km_s: NDArray, model: NormalModel) -> dict[str, NDArray]:
    """The rule quantities for points (..., 3) at speeds (...)."""
    frac, _ = _normalise(intensity)
    clipped = np.clip(intensity, 0.0, None)
    log_na_mg0, log_fe_mg0 = _expected_log_ratios(speed_km_s, model)
    na, mg, fe = clipped[..., 0], clipped[..., 1], clipped[..., 2]
    with np.errstate(invalid="ignore", divide="ignore"):
        na_mg_rel = na / mg / np.exp(log_na_mg0)  # x/0 -> inf, 0/0 -> NaN (compares False)
        fe_mg_rel = fe / mg / np.exp(log_fe_mg0)
    return {"na_mg_rel": na_mg_rel, "fe_mg_rel": fe_mg_rel, "na_fraction": frac[..., 0],
            "mg_fraction": frac[..., 1], "fe_fraction": frac[..., 2]}


def _evaluate(quantities: dict[str, NDArray], table: ClassTable, *,
              apply_unclassified_rules: bool) -> tuple[NDArray, NDArray]:
    """Class name and matched order per point."""
    shape = quantities["na_fraction"].shape
    name = np.full(shape, "unclassified", dtype=object)
    matched_order = np.full(shape, -1)
    done = ~np.isfinite(quantities["na_fraction"])  # no positive group: stays unclassified
    for order, class_name, rules in table.orders():
        if class_name == "unclassified" and not apply_unclassified_rules:
            continue
        cond = np.ones(shape, dtype=bool)
        for r in rules:
            if r.quantity == "otherwise":
                continue
            with np.errstate(invalid="ignore"):
                cond &= _OPERATORS[r.operator](quantities[r.quantity], r.value)
        new = cond & ~done
        name[new] = class_name
        matched_order[new] = order
        done |= new
    return name, matched_order


def classify_points(intensity: ArrayLike, speed_km_s: ArrayLike, *,
                    table: ClassTable | None = None,
                    model: NormalModel | None = None) -> NDArray[np.object_]:
    """Class of noise-free points (vectorised; no confidence, no S/N rule).

    Parameters
    ----------
    intensity : array_like of shape (..., 3)
        Group intensities or fractions, order na, mg, fe.
    speed_km_s : array_like
        Broadcast against ``intensity[..., 0]``.
    table, model : optional
        Default: the project tables.

    Returns
    -------
    ndarray of object (str), shape intensity.shape[:-1]
    """
    table = _default_table() if table is None else table
    model = _default_model() if model is None else model
    arr = np.asarray(intensity, dtype=float)
    speed = np.broadcast_to(np.asarray(speed_km_s, dtype=float), arr.shape[:-1])
    q = _quantities(arr, speed, model)
    return _evaluate(q, table, apply_unclassified_rules=False)[0]


def _unclassified(values: NDArray, errors: NDArray, reason: str, speed: float, used: float,
                  expected: NDArray, flags: list[str]) -> Composition:
    return Composition(*map(float, values), *map(float, errors), class_name="unclassified",
                       class_confidence=0.0, class_reason=reason, speed_km_s=speed,
                       flags=tuple(flags), speed_used_km_s=used,
                       expected_normal=tuple(map(float, expected)))


def _speed_inputs(speed_km_s: float | None, speed_err_km_s: float | None,
                  model: NormalModel) -> tuple[float, float, float, list[str]]:
    """(speed reported, speed used, its error, flags)."""
    flags: list[str] = []
    if speed_km_s is None or math.isnan(float(speed_km_s)):
        return (math.nan, model.default_speed_km_s, model.default_speed_err_km_s,
                ["speed_unknown"])
    speed = float(speed_km_s)
    if not (math.isfinite(speed) and speed > 0):
        raise ValueError("speed_km_s must be finite and > 0 (or None / NaN if unknown), "
                         f"got {speed}")
    unknown_err = speed_err_km_s is None or math.isnan(float(speed_err_km_s))
    err = 0.0 if unknown_err else float(speed_err_km_s)
    if not (math.isfinite(err) and err >= 0):
        raise ValueError(f"speed_err_km_s must be finite and >= 0, got {err}")
    if not model.speed_min_km_s <= speed <= model.speed_max_km_s:
        flags.append("speed_outside_model")
    return speed, speed, err, flags


def _psd_problem(cov: NDArray) -> str:
    if not np.all(np.isfinite(cov)):
        return "covariance has non-finite values"
    scale = float(np.max(np.abs(np.diag(cov)))) if np.any(cov) else 0.0
    if not np.allclose(cov, cov.T, rtol=1e-6, atol=1e-12 * max(scale, 1e-300)):
        return "covariance is not symmetric"
    if np.any(np.linalg.eigvalsh(cov) < -1e-9 * scale):
        return "covariance is not positive semi-definite"
    return ""


def _reason(name: str, rules: tuple[ClassRule, ...], q: dict[str, NDArray], speed: float) -> str:
    at = f"at {speed:.1f} km/s"
    if name == "normal":
        return (f"Na/Mg {float(q['na_mg_rel']):.2f} x and Fe/Mg {float(q['fe_mg_rel']):.2f} x the "
                f"expected normal values {at}")
    parts = [f"{_QUANTITY_LABEL[r.quantity]} = {float(q[r.quantity]):.3g} "
             f"({r.operator} {r.value:g})" for r in rules if r.quantity != "otherwise"]
    return f"{'; '.join(parts)} {at}"


def classify(intensity: dict[str, float] | ArrayLike, covariance: ArrayLike, *,
             speed_km_s: float | None, speed_err_km_s: float | None = None,
             seed: int | np.random.Generator | None = 0, n_draws: int = 2000,
             table: ClassTable | None = None, model: NormalModel | None = None) -> Composition:
    """Composition and spectral class of one meteor.

    Parameters
    ----------
    intensity : dict or array_like
        Whole-flight group intensities ``{"na", "mg", "fe"}`` (contract section 6).
    covariance : array_like of shape (3, 3)
        Their covariance, order na, mg, fe.
    speed_km_s : float or None
        Speed at the start of the luminous trajectory; None or NaN = unknown, then the model's
        default speed and its broad error are used and the result is flagged
        ``"speed_unknown"``.
    speed_err_km_s : float, optional
        1-sigma speed error (None = 0).
    seed : int, Generator or None
        For the Monte Carlo confidence (``np.random.default_rng(seed)``).
    n_draws : int
        Monte Carlo draws, >= 1.
    table, model : optional
        Class boundaries and expected-normal model; default the project tables.

    Returns
    -------
    Composition
        ``unclassified`` (with the reason) for a non-finite intensity or covariance, a
        covariance that is not symmetric positive semi-definite, no positive group, or a summed
        group intensity below the table's S/N rule.

    Raises
    ------
    ValueError
        For a missing group, a covariance that is not 3 x 3, a speed <= 0 or infinite, a
        negative speed error, or ``n_draws < 1``.

    Notes
    -----
    The class is that of the measured point at the (used) speed; the confidence is the share
    of ``n_draws`` Monte Carlo draws in that class, with intensities drawn from
    N(intensity, covariance) and speeds from N(speed, speed_err) clipped to the model range.
    See the module notes for the geometry and ``calibration/classes.csv`` for the boundaries.
    """
    table = _default_table() if table is None else table
    model = _default_model() if model is None else model
    if int(n_draws) < 1:
        raise ValueError(f"n_draws must be >= 1, got {n_draws}")
    vec = _intensity_vector(intensity)
    cov = _covariance_matrix(covariance)
    speed, used, speed_err, flags = _speed_inputs(speed_km_s, speed_err_km_s, model)
    expected = expected_normal(used, model=model)
    values, errors = composition_from_groups(vec, cov)
    if np.any(vec < 0):
        flags.append("negative_intensity")

    if not np.all(np.isfinite(vec)):
        bad = ", ".join(g for g, x in zip(GROUPS, vec) if not np.isfinite(x))
        return _unclassified(values, errors, f"non-finite group intensity ({bad})", speed, used,
                             expected, flags)
    problem = _psd_problem(cov)
    if problem:
        return _unclassified(values, errors, problem, speed, used, expected, flags)
    if not np.any(vec > 0):
        return _unclassified(values, errors, "no group intensity above zero", speed, used,
                             expected, flags)
    total_err = math.sqrt(max(float(cov.sum()), 0.0))
    total_snr = float(np.clip(vec, 0, None).sum()) / total_err if total_err > 0 else math.inf

    q = _quantities(vec, np.asarray(used), model)
    q["total_snr"] = np.asarray(total_snr)
    name_arr, order_arr = _evaluate(q, table, apply_unclassified_rules=True)
    name, order = str(name_arr), int(order_arr)
    rules = next((r for o, _, r in table.orders() if o == order), ())
    if name == "unclassified":
        why = _reason(name, rules, q, used) if rules else "outside every class region"
        return _unclassified(values, errors, why, speed, used, expected, flags)

    rng = np.random.default_rng(seed)
    draws = rng.multivariate_normal(vec, cov, size=int(n_draws), method="eigh")
    speeds = np.clip(used + speed_err * rng.standard_normal(int(n_draws)),
                     model.speed_min_km_s, model.speed_max_km_s)
    draw_names, _ = _evaluate(_quantities(draws, speeds, model), table,
                              apply_unclassified_rules=False)
    labels, counts = np.unique(draw_names.astype(str), return_counts=True)
    probabilities = sorted(((str(k), float(c) / n_draws) for k, c in zip(labels, counts)),
                           key=lambda kv: (-kv[1], kv[0]))
    confidence = float(np.mean(draw_names == name))
    if confidence < 0.5:
        flags.append("class_uncertain")
    return Composition(*map(float, values), *map(float, errors), class_name=name,
                       class_confidence=confidence, class_reason=_reason(name, rules, q, used),
                       speed_km_s=speed, flags=tuple(flags), speed_used_km_s=used,
                       expected_normal=tuple(map(float, expected)),
                       class_probabilities=tuple(probabilities))


def boundary_distance_sigma(intensity: dict[str, float] | ArrayLike, covariance: ArrayLike, *,
                            speed_km_s: float, speed_err_km_s: float = 0.0,
                            max_sigma: float = 4.0, step_sigma: float = 0.05,
                            n_directions: int = 400, seed: int | None = 0,
                            table: ClassTable | None = None,
                            model: NormalModel | None = None) -> float:
    """Distance, in standard deviations, from a point to the nearest class boundary.

    Parameters
    ----------
    intensity : dict or array_like
        Group intensities, order na, mg, fe (a noise-free "truth" point).
    covariance : array_like of shape (3, 3)
        Measurement covariance of the intensities.
    speed_km_s, speed_err_km_s : float
        Speed and its error (0 = exact); with an error the speed is a fourth dimension.
    max_sigma, step_sigma : float
        Search radius and step, in sigma.
    n_directions : int
        Random directions (seeded) in the whitened space, plus the +- coordinate axes.
    seed, table, model : optional

    Returns
    -------
    float
        Smallest whitened (Mahalanobis) distance at which the class differs from the point's
        own, to within ``step_sigma``; ``inf`` if none within ``max_sigma``.

    Notes
    -----
    Used to pick the events "more than 2 sigma from a boundary" of the acceptance criterion.
    The class regions are bounded by straight lines in the ternary, so the nearest boundary is
    found by marching along many directions from the point in the space whitened by the
    covariance (x = I + L z with C = L L^T).
    """
    vec = _intensity_vector(intensity)
    cov = _covariance_matrix(covariance)
    w, u = np.linalg.eigh(cov)
    root = u * np.sqrt(np.clip(w, 0.0, None))
    dim = 4 if speed_err_km_s > 0 else 3
    rng = np.random.default_rng(seed)
    dirs = rng.standard_normal((int(n_directions), dim))
    dirs = np.vstack([dirs / np.linalg.norm(dirs, axis=1, keepdims=True),
                      np.eye(dim), -np.eye(dim)])
    radii = np.arange(step_sigma, max_sigma + 1e-12, step_sigma)
    z = dirs[:, None, :] * radii[None, :, None]  # (n_dir, n_r, dim)
    points = vec + z[..., :3] @ root.T
    speeds = speed_km_s + (z[..., 3] * speed_err_km_s if dim == 4 else np.zeros(z.shape[:2]))
    own = str(classify_points(vec, speed_km_s, table=table, model=model))
    names = classify_points(points, speeds, table=table, model=model)
    differs = names != own
    if not np.any(differs):
        return math.inf
    first = np.where(differs.any(axis=1), radii[np.argmax(differs, axis=1)], np.inf)
    return float(first.min())


# --------------------------------------------------------------------------------------------
# Time-resolved composition
# --------------------------------------------------------------------------------------------

#: Degrees of the polynomial in time whose exponential :func:`_peak_time_err` fits to a light
#: curve's top; the Akaike criterion picks one per curve.
_PEAK_LOG_DEGREES = (2, 3, 4)


def _peak_time(time_s: NDArray, flux: NDArray, err: NDArray, *, min_snr: float = 3.0,
               top_fraction: float = 0.4, exclude: NDArray | None = None,
               strict: bool = False) -> float:
    """Time of the light-curve maximum (see :func:`_peak_time_err`)."""
    return _peak_time_err(time_s, flux, err, min_snr=min_snr, top_fraction=top_fraction,
                          exclude=exclude, strict=strict)[0]


def _peak_time_err(time_s: NDArray, flux: NDArray, err: NDArray, *, min_snr: float = 3.0,
                   top_fraction: float = 0.4, exclude: NDArray | None = None,
                   strict: bool = False) -> tuple[float, float]:
    """Time of the light-curve maximum from smooth skewed fits to the curve's top.

    A 1-2-1 smoothing (normalised over the usable frames) picks the peak frame, so one noisy
    frame cannot win alone. The raw points of the frames around it whose smoothed flux is at
    least ``top_fraction`` of the smoothed maximum (at least +-3 frames; gaps of unusable
    frames inside are bridged) are then fitted, weighted by their errors, with
    ``a exp(P(t))`` for polynomials ``P`` of degree 2, 3 and 4 (:data:`_PEAK_LOG_DEGREES`;
    degree 2 is a Gaussian, higher degrees let the rise and fall differ smoothly, as meteor
    light curves do: common practice). The maximum is the root of ``P'`` inside the window;
    the degrees' maxima are averaged with Akaike weights (:func:`_log_poly_peak`): a noisy
    top falls back on the low degrees, a clean one uses the skew. Frames in ``exclude`` (e.g.
    lines saturated there) do not enter; the fit then bridges them from the rise and the
    fall, as one measures a saturated light curve from its unsaturated parts. Without a
    maximum inside the window the peak frame's time is returned, or NaN with ``strict``.

    Returns ``(t0, error)``: the 1-sigma of ``t0`` (model-averaged: each degree's covariance
    sigma, scaled by the reduced chi^2 when above 1, and the spread between the degrees), at
    least the spread of a uniform position within one sampling interval when no fit is used
    (``dt / sqrt(12)``, common practice).

    Why not a split Gaussian (``s_rise`` before the maximum, ``s_fall`` after; used before):
    its curvature jumps at the maximum, which smooth light curves do not do, and over a broad
    skewed top that biases it towards the slower side. On exposure means of curves with
    their maximum known (100 each, peak S/N 30, within one exposure of the brightest one):
    the classical single-body light curve (Opik's theory, I ~ x (1 - x/3)^2, x the air
    density over that at the maximum; common practice, from memory) 69 -> 100, scipy.stats
    gamma 77 -> 100, skew-normal 86 -> 100, the simulator's shape 72 -> 95; on a split
    Gaussian itself 94 -> 82 (``python bench/peak_time_shapes.py``; the split-Gaussian column
    from the same script on the code before this fit, commit 5fbfcc1).
    """
    good = np.isfinite(flux) & np.isfinite(err) & (err > 0)
    if exclude is not None:
        good &= ~np.asarray(exclude, dtype=bool)
    if not np.any(good & (flux > min_snr * np.where(good, err, np.inf))):
        return math.nan, math.nan
    f = np.where(good, flux, 0.0)
    kernel = [0.25, 0.5, 0.25]
    num = np.convolve(np.pad(f, 1), kernel, mode="valid")
    den = np.convolve(np.pad(good.astype(float), 1), kernel, mode="valid")
    with np.errstate(invalid="ignore", divide="ignore"):
        smooth = np.where(good, num / den, -np.inf)
    k = int(np.argmax(smooth))
    level = top_fraction * smooth[k]
    top = np.flatnonzero(good & (smooth >= level))
    # the run of frames around k down to the level, bridging unusable frames but not a
    # usable frame below the level (a second maximum stays out)
    below = np.flatnonzero(good & (smooth < level))
    left = below[below < k]
    right = below[below > k]
    lo = int(left.max()) + 1 if left.size else 0
    hi = int(right.min()) - 1 if right.size else len(f) - 1
    top = top[(top >= lo) & (top <= hi)]
    if top.size == 0:
        top = np.array([k])
    lo, hi = max(0, min(int(top.min()), k - 3)), min(len(f) - 1, max(int(top.max()), k + 3))
    sel = np.arange(lo, hi + 1)[good[lo:hi + 1]]
    t0 = float(time_s[k])
    step = float(np.median(np.diff(time_s))) if len(time_s) > 1 else math.nan
    fallback = (math.nan, math.nan) if strict else (t0, step / math.sqrt(12.0))
    if sel.size < min(_PEAK_LOG_DEGREES) + 2:  # more points than parameters
        return fallback
    # in units of the sampling interval: the coefficients stay of order one
    tau, y, w = (time_s[sel] - t0) / step, flux[sel], 1.0 / err[sel]
    found = [f for f in (_log_poly_peak(tau, y, w, degree, float(smooth[k])) for degree in _PEAK_LOG_DEGREES
                         if sel.size >= degree + 2) if f is not None and np.isfinite(f[2])]
    if not found:
        return fallback
    # Akaike weights over the degrees, and the model-averaged estimate whose variance holds
    # the spread between the degrees' peaks too (Burnham & Anderson 2002, Model Selection and
    # Multimodel Inference, section 4.3; from memory): the low degrees' own sigmas leave out
    # their bias on a skewed top
    aic, peak, sigma = (np.array(v) for v in zip(*found))
    weight = np.exp(-0.5 * (aic - aic.min()))
    weight /= weight.sum()
    mean = float(np.sum(weight * peak))
    spread = float(np.sum(weight * (sigma**2 + (peak - mean) ** 2)))
    return t0 + mean * step, math.sqrt(spread) * step


def _log_poly_peak(tau: NDArray, y: NDArray, w: NDArray, degree: int,
                   amp_start: float) -> tuple[float, float, float] | None:
    """Fit ``a exp(c_1 tau + ... + c_d tau^d)`` to ``y`` (weights ``w`` = 1 / error): the Akaike
    criterion ``chi^2 + 2 k`` (``k`` parameters), the maximum's position in ``tau`` and its 1-sigma
    (fit covariance, scaled by the reduced chi^2 when above 1; delta method). None when the fit
    fails or the curve has no maximum inside the fitted points.
    """
    powers = np.vander(tau, degree + 1, increasing=True)[:, 1:]   # tau, tau^2, ...

    def residuals(p: NDArray) -> NDArray:
        # the exponent is clipped where a trial step runs away (e^50: far above any flux here)
        return (p[0] * np.exp(np.clip(powers @ p[1:], -50.0, 50.0)) - y) * w

    start = np.zeros(degree + 1)
    start[0], start[2] = max(amp_start, 1e-300), -0.05
    pos = y > 0
    if pos.sum() > degree + 1:
        # the log-polynomial by weighted linear least squares (log error ~ err / flux) as the start
        lw = y[pos] * w[pos]
        c, *_ = np.linalg.lstsq(np.vander(tau[pos], degree + 1, increasing=True) * lw[:, None],
                                np.log(y[pos]) * lw, rcond=None)
        if np.all(np.isfinite(c)) and abs(c[0]) < 700:
            start = np.concatenate([[math.exp(c[0])], c[1:]])
    try:
        fit = least_squares(residuals, start, x_scale="jac")
    except (ValueError, np.linalg.LinAlgError):  # pragma: no cover - defensive
        return None
    c = np.asarray(fit.x[1:], float)
    if not (fit.success and fit.x[0] > 0):
        return None
    j = np.arange(1, degree + 1)
    # the maximum: a root of the exponent's derivative inside the window with negative curvature
    roots = np.roots((j * c)[::-1]) if np.any(c[1:] != 0) else np.array([])
    roots = np.array([float(r.real) for r in np.atleast_1d(roots) if abs(complex(r).imag) < 1e-9])
    if roots.size:
        curv = np.array([np.sum(j[1:] * (j[1:] - 1) * c[1:] * r ** (j[1:] - 2)) for r in roots])
        roots = roots[(roots > tau[0]) & (roots < tau[-1]) & (curv < 0)]
    if roots.size == 0:
        return None
    r = float(roots[np.argmax([np.sum(c * r**j) for r in roots])])
    curv_r = float(np.sum(j[1:] * (j[1:] - 1) * c[1:] * r ** (j[1:] - 2)))
    chi2 = float(np.sum(fit.fun**2))
    chi2_red = chi2 / max(tau.size - fit.x.size, 1)
    try:
        cov = np.linalg.pinv(fit.jac.T @ fit.jac) * max(1.0, chi2_red)
        # the root of P'(r) = sum j c_j r^(j-1) moves by -(dP'/dc . dc) / P''(r)
        grad = -np.concatenate([[0.0], j * r ** (j - 1)]) / curv_r
        sigma = float(math.sqrt(max(float(grad @ cov @ grad), 0.0)))
    except np.linalg.LinAlgError:  # pragma: no cover - defensive
        sigma = math.nan
    return chi2 + 2.0 * fit.x.size, r, sigma


def time_resolved(time_s: ArrayLike, group_intensity_per_frame: dict[str, ArrayLike],
                  errors: dict[str, ArrayLike], *, o777_per_frame: ArrayLike | None = None,
                  o777_err: ArrayLike | None = None, min_snr: float = 3.0,
                  unmeasured: dict[str, ArrayLike] | None = None,
                  window_curves: dict[str, tuple[ArrayLike, ArrayLike, ArrayLike]] | None = None,
                  weak_curves: dict[str, tuple[ArrayLike, ArrayLike, ArrayLike]] | None = None,
                  ) -> TimeResolved:
    """Per-frame composition, light curves and how early Na peaks.

    Parameters
    ----------
    time_s : array_like of shape (n_frames,)
        Middle of each exposure, increasing.
    group_intensity_per_frame : dict
        ``{"na", "mg", "fe"}`` to arrays of shape (n_frames,): group intensities per frame
        (from the per-frame plasma fit or :func:`light_curve_from_spectra`); NaN = not measured.
    errors : dict
        1-sigma errors of the same shape (groups taken as uncorrelated here).
    o777_per_frame, o777_err : array_like of shape (n_frames,), optional
        The atmospheric O I 777 nm light curve and its error; without them that curve is NaN
        and the result is flagged ``"o777_missing"``.
    min_snr : float
        A frame enters the per-frame composition and the luminous duration only if its summed
        group light has at least this S/N; a curve without a point above it has no peak.
    unmeasured : dict, optional
        Group -> boolean array of shape (n_frames,): frames whose value of that group rests on
        a model rather than on the group's own lines (saturated or masked there). They keep
        their values in the composition; the group's peak time is fitted without them when
        the frames around them allow it, and with them otherwise.
    window_curves : dict, optional
        Group -> ``(flux, err, saturated)`` arrays of shape (n_frames,) from
        :func:`window_light_curves`, or ``(flux, err, saturated, shape_err)`` (its
        ``shape_errors``; the peak sigma then holds :func:`_tilt_peak_err`): the monochromatic
        light curves then reported, and the peak times taken from them (all three groups
        alike, so that the differential-ablation measure compares like with like). A peak
        inside a run of ``saturated`` frames (NaN flux: more than :data:`WING_MAX_LOST_SHARE`
        of the group's profile light masked; a frame that lost less is measured from the rest
        of the profile) is bridged from the rise and the fall when the run is at most three
        frames long (flag
        ``"<group>_peak_bridged_saturated"``); a longer run cannot give the time within a
        frame: NaN and ``"<group>_peak_unbounded_saturated"``. A curve whose
        maximum is its first or last measured frame (cut by the record): NaN and
        ``"<group>_peak_outside_record"``.
    weak_curves : dict, optional
        Group -> ``(flux, err, saturated)`` of shape (n_frames,) from :func:`weak_line_curve`:
        the group's light from weaker lines of the same atom, in the group's units. Used only
        when the window curve's top is ``unbounded_saturated``: the peak time is then that of
        the weak-line curve (flag ``"<group>_peak_weak_lines"``) when it passes the checks of
        :func:`_weak_line_peak`, and the window curve's saturated frames are filled with the
        weak-line values scaled to it. Otherwise the flag stays ``unbounded_saturated``.

    Returns
    -------
    TimeResolved

    Raises
    ------
    ValueError
        For a missing group, arrays of different lengths, or times that do not increase.

    Notes
    -----
    Differential ablation after Vojacek et al. (2019, A&A 621, A68): Na, the most volatile of
    the three, is released early from a meteoroid that has kept its volatiles, so its light
    curve peaks before those of Mg and Fe. ``na_peak_lead_s`` = t_peak(Na) - mean(t_peak(Mg),
    t_peak(Fe)), and ``na_peak_lead_fraction`` divides it by the luminous duration. Peak
    times come from a 1-2-1 smoothed maximum refined by fits of skewed smooth tops to the
    curve's top (frames above 40 % of the maximum; sub-frame; :func:`_peak_time_err`); a window
    curve's peak sigma is at least the delete-one jackknife's (:func:`_jackknifed_peak`).
    Flags: ``"o777_missing"``, ``"na_peak_unreliable"`` (Na never above ``min_snr``, when no
    window-curve reason applies), ``"peak_at_edge"`` (a group peaks in the first or last
    luminous frame, so the meteor may have been cut), ``"no_luminous_frames"``.
    """
    t = np.asarray(time_s, dtype=float)
    if t.ndim != 1 or t.size == 0:
        raise ValueError(f"time_s must be a non-empty 1-D array, got shape {t.shape}")
    if t.size > 1 and not np.all(np.diff(t) > 0):
        raise ValueError("time_s must increase strictly")
    flux, err = {}, {}
    for g in GROUPS:
        if g not in group_intensity_per_frame or g not in errors:
            raise ValueError(f"per-frame intensities and errors need group {g!r}")
        flux[g] = np.asarray(group_intensity_per_frame[g], dtype=float)
        err[g] = np.asarray(errors[g], dtype=float)
        if flux[g].shape != t.shape or err[g].shape != t.shape:
            raise ValueError(f"group {g!r}: shapes {flux[g].shape} / {err[g].shape} differ from "
                             f"time_s {t.shape}")
    flags: list[str] = []
    if o777_per_frame is None:
        o_flux, o_err = np.full(t.shape, np.nan), np.full(t.shape, np.nan)
        flags.append("o777_missing")
    else:
        o_flux = np.asarray(o777_per_frame, dtype=float)
        o_err = (np.full(t.shape, np.nan) if o777_err is None
                 else np.asarray(o777_err, dtype=float))
        if o_flux.shape != t.shape or o_err.shape != t.shape:
            raise ValueError(f"O I 777 arrays must have shape {t.shape}")

    stack = np.stack([flux[g] for g in GROUPS], axis=-1)
    estack = np.stack([err[g] for g in GROUPS], axis=-1)
    frac, total = _normalise(stack)
    total_err = np.sqrt(np.sum(estack**2, axis=-1))
    with np.errstate(invalid="ignore", divide="ignore"):
        luminous = np.isfinite(total) & (total > min_snr * total_err)
        # Jacobian of the normalisation per frame, J[n, i, j] = (delta_ij - f_i) / S; the
        # groups are uncorrelated here, so var_i = sum_j J_ij^2 s_j^2.
        jac = (np.eye(3)[None] - frac[:, :, None]) / total[:, None, None]
        var = np.einsum("nij,nj->ni", jac**2, estack**2)
    frac = np.where(luminous[:, None], frac, np.nan)
    ferr = np.where(luminous[:, None], np.sqrt(var), np.nan)

    names = {"na": "Na I", "mg": "Mg I", "fe": "Fe I"}
    curves = {names[g]: flux[g] for g in GROUPS} | {"O I 777": o_flux}
    curve_errs = {names[g]: err[g] for g in GROUPS} | {"O I 777": o_err}
    skip = {names[g]: np.asarray(unmeasured[g], dtype=bool)
            for g in GROUPS if unmeasured is not None and g in unmeasured}
    for key, m in skip.items():
        if m.shape != t.shape:
            raise ValueError(f"unmeasured[{key!r}] must have shape {t.shape}")
    peaks, peak_errs = {}, {}
    window = {}
    if window_curves is not None:
        for g, parts in window_curves.items():
            if len(parts) not in (3, 4):
                raise ValueError(f"window_curves[{g!r}] must be (flux, err, saturated[, shape_err])")
            arrays = tuple(np.asarray(a, dtype=dt) for a, dt in zip(parts, (float, float, bool, float)))
            if any(a.shape != t.shape for a in arrays):
                raise ValueError(f"window_curves[{g!r}] arrays must have shape {t.shape}")
            window[names[g]] = arrays
            curves[names[g]], curve_errs[names[g]] = arrays[0], arrays[1]
    for k in curves:
        peaks[k], peak_errs[k] = math.nan, math.nan
        if k in window:
            peaks[k], peak_errs[k], status = _jackknifed_peak(t, curves[k], curve_errs[k], window[k][2],
                                                              min_snr=min_snr)
            if len(window[k]) == 4 and np.isfinite(peaks[k]):
                peak_errs[k] = math.hypot(peak_errs[k], _tilt_peak_err(t, curves[k], curve_errs[k], window[k][2],
                                                                       window[k][3], peaks[k], min_snr=min_snr))
            g = next(g for g, n in names.items() if n == k)
            if status == "unbounded_saturated" and weak_curves is not None and g in weak_curves:
                weak = tuple(np.asarray(a, dtype=dt) for a, dt in zip(weak_curves[g], (float, float, bool)))
                if any(a.shape != t.shape for a in weak):
                    raise ValueError(f"weak_curves[{g!r}] arrays must have shape {t.shape}")
                found = _weak_line_peak(t, curves[k], curve_errs[k], window[k][2], *weak,
                                        min_snr=min_snr)
                if found is not None:
                    peaks[k], peak_errs[k], curves[k], curve_errs[k] = found
                    status = "weak_lines"
            if status:
                flags.append(f"{g}_peak_{status}")
            continue
        if k in skip and skip[k].any():
            # bridged over the unmeasured frames; when the rise and fall around them do not
            # pin the top (too few usable frames), the model-based values are used instead
            peaks[k], peak_errs[k] = _peak_time_err(t, curves[k], curve_errs[k], min_snr=min_snr,
                                                    exclude=skip[k], strict=True)
        if not np.isfinite(peaks[k]):
            peaks[k], peak_errs[k] = _peak_time_err(t, curves[k], curve_errs[k], min_snr=min_snr)

    if np.any(luminous):
        idx = np.flatnonzero(luminous)
        dt = float(np.median(np.diff(t))) if t.size > 1 else 0.0
        duration = float(t[idx[-1]] - t[idx[0]] + dt)
        first, last = t[idx[0]], t[idx[-1]]
        for k in ("Na I", "Mg I", "Fe I"):
            if np.isfinite(peaks[k]) and (abs(peaks[k] - first) < 0.5 * dt
                                          or abs(peaks[k] - last) < 0.5 * dt):
                flags.append("peak_at_edge")
                break
    else:
        duration = math.nan
        flags.append("no_luminous_frames")
    others = [peaks[k] for k in ("Mg I", "Fe I") if np.isfinite(peaks[k])]
    if not np.isfinite(peaks["Na I"]) and not any(f.startswith("na_peak_") for f in flags):
        flags.append("na_peak_unreliable")
    lead = peaks["Na I"] - float(np.mean(others)) if others else math.nan
    lead_fraction = lead / duration if duration > 0 else math.nan
    return TimeResolved(time_s=t, na=frac[:, 0], mg=frac[:, 1], fe=frac[:, 2],
                        na_err=ferr[:, 0], mg_err=ferr[:, 1], fe_err=ferr[:, 2],
                        light_curves=curves, light_curve_errs=curve_errs, peak_time_s=peaks,
                        na_peak_lead_s=float(lead), na_peak_lead_fraction=float(lead_fraction),
                        duration_s=duration, flags=tuple(flags), peak_time_err_s=peak_errs)


def _tilt_peak_err(t: NDArray, flux: NDArray, err: NDArray, saturated: NDArray, shape_err: NDArray,
                   peak: float, *, min_snr: float) -> float:
    """Peak-time error from a bias of each frame bounded by ``shape_err`` (window curve's 4th array).

    The scale-up of saturated bins from their cross-dispersion wings carries a bias that the
    extraction states (``shape_rel_err``, taken here as a bound) but that is not noise: it is
    shared by neighbouring bins and frames, and the per-frame errors average it down over the
    top like noise. Of the
    biases within the bound, the one that moves the maximum most (to first order) lowers the
    frames on one side of it and raises those on the other: the curve is refitted with
    ``flux -/+ shape_err`` before / after the peak and with the opposite tilt, and the larger
    shift is returned (0 without such bins; where a tilted curve cannot be timed, the other
    one's shift; 0 when neither can).

    On bench/plasma_end_to_end.py --n 36 --seed 5 --modes true event 35 (Na 7.5 %, 28 nm FWHM:
    Na D on the wing of a saturated Mg I b / Fe I blend, every bin of 555-660 nm scaled up at
    L = 0.58-0.8 over the top, Na 13-44 % of those bins' light) the bound is 0.3-1.0 of the Na
    amplitude over the top (median 0.59), and the curve (over the truth, normalised by its median
    over the top) read 0.37-0.70 on the rise and 1.1-1.36 after it: 2.5 frames late, against a
    sigma of 0.52 from the noise, 1.95 with this term. Against the noise-free render its
    scaled-up bins read 4-8 % low (median per frame) on the rise and 4-6 % high after the top
    (bench/saturation_wings.py's oracle), beyond their stated 2-6 %. Where Na is most of its bins'
    light the bound is a few per cent (events 2, 8, 13, 23, 31: median 1.4-2.8 %, at most 4 %;
    sigmas 0.18-0.58 -> 0.43-0.78 frames); events 5 and 14 (25 and 21 nm FWHM, scaled-up
    Mg I b / Fe I bins in the Na window) 13 and 32 %. Over the 20 timed events the median
    |error| / sigma went from 1.01 to 0.62 (0.67 for a normal) and 14 -> 16 lie within 2 sigma; no
    peak time moved.
    """
    shape_err = np.where(np.isfinite(shape_err), shape_err, 0.0)
    if not np.any(shape_err > 0):
        return 0.0
    side = np.sign(t - peak)
    shifts = []
    for s in (1.0, -1.0):
        tilted = flux + s * side * shape_err
        moved = _window_peak(t, tilted, err, saturated, min_snr=min_snr)[0]
        if np.isfinite(moved):
            shifts.append(abs(moved - peak))
    return max(shifts, default=0.0)


def _window_peak(t: NDArray, flux: NDArray, err: NDArray, saturated: NDArray, *,
                 min_snr: float, max_gap: int = 3) -> tuple[float, float, str]:
    """Peak time, its 1-sigma and a status of a window light curve (saturated frames NaN).

    Status ``""``: the curve's own top. ``"bridged_saturated"``: the top lies in a run of at
    most ``max_gap`` saturated frames with usable frames on both sides, bridged from the
    rise and the fall (:func:`_peak_time_err`; error at least the spread of a uniform position over
    the run). ``"unbounded_saturated"``: the top lies in a longer run, or at its open end,
    so no time within a frame can be given (NaN). ``"outside_record"``: the curve is still
    rising (or already falling) at the first or last measured frame, e.g. the spectrum
    leaves the sensor (NaN).

    Not used to time a long saturated run: the extent of the saturated core. For a profile
    of peak A above the saturation level S the core's half-width is
    ``sigma sqrt(2 ln(A / S))`` (common practice, saturated-star photometry), so a 5 % change
    of A moves it by ``0.05 / (2 ln(A / S))`` of itself, 0.5-1 % for A / S = 10-100: a few
    hundredths of a pixel, below the sampling. Measured on bench/plasma_end_to_end.py
    --n 36 --seed 5 --modes true (events 1, 6, 7, 20, 26, 27, 28, 32, every one with D
    saturated in all its top frames): the masked and scaled-up bins around D are flat over
    the top or alternate with the field parity (event 7: 12 / 14 bins), and in the five
    fireballs every bin of the spectrum is masked from 6-35 % of the Na peak on; even the
    saturated pixels counted inside the D window (a scratch hook in the extraction) peak
    within one exposure of the truth for only 2 of the 8 (2 to 14 exposures off for the
    others). Extrapolating the wing fit beyond :data:`WING_MAX_LOST_SHARE` was no better:
    with a limit of 0.98 event 6's top frames (93-98 % lost) read 0.6-1.05 times their truth
    and it peaks 3 exposures late; event 1 needs 0.995, and its top frames then read -0.7 to
    2.6 times their truth.
    """
    good = np.isfinite(flux) & np.isfinite(err) & (err > 0)
    if not np.any(good & (flux > min_snr * np.where(good, err, np.inf))):
        return math.nan, math.nan, ""
    dt = float(np.median(np.diff(t))) if t.size > 1 else math.nan
    k = int(np.argmax(np.where(good, flux, -np.inf)))
    status = ""
    if saturated.any():
        # saturated runs next to the brightest usable frame, or whose neighbours are near
        # its level (saturation means bright: such a run holds the top)
        idx = np.arange(t.size)
        runs = np.split(np.flatnonzero(saturated), np.flatnonzero(np.diff(np.flatnonzero(saturated)) > 1) + 1)
        holding = []
        for run in runs:
            nb = np.array([run[0] - 1, run[-1] + 1])
            nb = nb[(nb >= 0) & (nb < t.size)]
            nb_good = nb[good[nb]]
            if abs(run[0] - k) <= 1 or abs(run[-1] - k) <= 1 or (
                    nb_good.size and np.max(flux[nb_good]) >= 0.5 * flux[k]):
                holding.append((run, nb_good))
        if holding:
            run, nb_good = max(holding, key=lambda r: np.max(flux[r[1]]) if r[1].size else 0.0)
            both = np.any(good & (idx < run[0])) and np.any(good & (idx > run[-1]))
            if run.size > max_gap or not both or nb_good.size < 2:
                return math.nan, math.nan, "unbounded_saturated"
            peak, peak_err = _peak_time_err(t, flux, err, min_snr=min_snr, exclude=saturated,
                                            strict=True)
            if not np.isfinite(peak):
                return math.nan, math.nan, "unbounded_saturated"
            return peak, max(peak_err, run.size * dt / math.sqrt(12.0)), "bridged_saturated"
    peak, peak_err = _peak_time_err(t, flux, err, min_snr=min_snr, exclude=saturated)
    used = np.flatnonzero(good)
    if np.isfinite(peak) and (peak < t[used[0]] + 0.5 * dt or peak > t[used[-1]] - 0.5 * dt):
        # a maximum at the first or last measured frame is a curve cut by the record
        return math.nan, math.nan, "outside_record"
    return peak, peak_err, status


# A frame whose group-line core is masked (saturated) is still measured from the rest of the
# group's profile while the masked bins carry at most this share of the profile's light: the
# fit then extrapolates by at most 1 / (1 - 0.8) = 5, the same limit as the extraction's
# scale-up of a cross-section from its unsaturated wings (extract.extract_spectra,
# max_saturated_fraction).
WING_MAX_LOST_SHARE = 0.8
# Relative error of the lost share L of a group's profile from the profile's shape (instrument
# width, streak): the amplitude measured from the unmasked part carries a relative error
# _WING_SHARE_ERR / (1 - L) on top of its noise. A Gaussian profile whose width is off by 3 %
# moves L = erf(z) by |dL / d ln sigma| = 2 z exp(-z^2) / sqrt(pi) = 0.45-0.48 times 3 % for
# L = 0.6-0.8 (Abramowitz & Stegun 7.1.19), i.e. 0.014; the extraction states the same 0.015
# (a 3 % width error) for the profile across the dispersion (extract._LOST_SHARE_ERR).
_WING_SHARE_ERR = 0.015


def window_light_curves(frame_spectra: Any, templates: dict[str, tuple[ArrayLike, ArrayLike]], *,
                        fwhm_nm: ArrayLike, window_fwhm: float = 1.5, core_fraction: float = 0.3,
                        free_rest: bool = True, max_lost_share: float = WING_MAX_LOST_SHARE,
                        shape_errors: bool = False) -> dict[str, tuple[NDArray, ...]]:
    """Monochromatic light curve of each composition group from the per-frame spectra.

    Parameters
    ----------
    frame_spectra : FrameSpectra-like
        ``wavelength_nm``, ``bin_width_nm``, ``flux``, ``variance``, ``mask`` (True = bad).
    templates : dict
        Group -> ``(profile, rest)`` on the same grid
        (:func:`meteorspec.plasma.group_templates`): the group's line profile for unit
        energy and the rest of the whole-flight model.
    fwhm_nm : array_like
        Instrument FWHM per bin (sets the window).
    window_fwhm : float
        The window runs from ``window_fwhm`` instrument FWHM below the group's bluest
        profile bin above 2 % of its peak to as far above its reddest.
    core_fraction : float
        Bins where the profile exceeds this share of its peak are the core. A frame with a
        masked (saturated) core bin is measured from the group profile's unmasked bins while
        the masked ones carry at most ``max_lost_share`` of the profile's light (its error
        then includes the profile-shape term ``_WING_SHARE_ERR / (1 - L)``, L the lost
        share); beyond that it is not measured (NaN, ``saturated`` True).
    max_lost_share : float
        See ``core_fraction`` (default :data:`WING_MAX_LOST_SHARE`; 0 restores "any masked
        core bin = not measured").
    shape_errors : bool
        Also return, per frame, the bound on the amplitude's bias from bins the extraction scaled
        up from their cross-dispersion wings (``frame_spectra.shape_rel_err``, see Notes).
    free_rest : bool
        True (default): the rest template's amplitude is fitted per frame. False: it is
        scaled to the frame by the flux outside the window (fewer parameters, but on the
        simulated binned-camera events the Na peak times were no better: Mg/Fe and N2
        change their share of a frame's light along the flight).

    Returns
    -------
    dict
        Group -> ``(flux, err, saturated)`` of shape (n_frames,): the group's energy per frame
        (data flux units x nm, through the response factor of the template), its 1-sigma and
        the saturated frames; with ``shape_errors`` a fourth array, the bound on the
        amplitude's bias from scaled-up bins, ``sum |g| eps |F|`` over the window's usable bins
        (``g`` the row of the fit's solution that gives the amplitude, ``eps`` the bins'
        ``shape_rel_err``, ``F`` their flux; 0 without scaled-up bins, NaN where the frame is
        not measured).

    Notes
    -----
    Per frame, a weighted linear least-squares fit over the window's usable bins of
    ``a profile + b rest + c0 + c1 x`` (x the wavelength across the window): the group's
    amplitude ``a`` over the rest of the spectrum scaled to the frame and a linear local
    continuum (the meteor continuum and N2 bands change from frame to frame). No plasma
    model is fitted per frame, so it works at any resolution and brightness; blends with
    other lines inside the profile are what the template separates, as well as the data
    allow (the error says how well). Error: the parameter covariance ``(A^T W A)^-1``.

    A saturated line core is measured from its unsaturated wings as a saturated stellar
    profile is from its wings (PSF fitting of saturated stars, common practice): the amplitude
    rests on the profile shape, so the share of light it has to extrapolate is limited and its
    shape error is carried. On simulated events (bench/plasma_end_to_end.py --seed 5, events
    13, 23 and 31, Na D, no lost-share limit) frames with L between 0.15 and 0.85 read 0.83 to
    1.11 times the truth, mostly a few per cent low, against 1.5-4 % noise: the shape term
    does not cover all of it, which is why the extrapolation is limited.

    Bins the extraction scaled up from their cross-dispersion wings (saturated pixels) carry a
    shape error relative to the whole bin (``shape_rel_err``, extract._LOST_SHARE_ERR / (1 - L)),
    which the extraction shares between neighbouring bins and frames and which is not noise:
    each bin moved by its bound in the direction that moves the amplitude, the fit's amplitude
    moves by ``sum |g| eps |F|`` (a linear estimator), the largest change any bias within those
    bounds can cause. A faint group on a bright blend is a small part of such bins, so the bound
    is a large part of its amplitude (the shape error is divided by the group's share of the
    bins' light); :func:`time_resolved` turns it into a peak-time error (:func:`_tilt_peak_err`).
    """
    wl = np.asarray(frame_spectra.wavelength_nm, dtype=float)
    flux = np.atleast_2d(np.asarray(frame_spectra.flux, dtype=float))
    variance = np.atleast_2d(np.asarray(frame_spectra.variance, dtype=float))
    mask = np.atleast_2d(np.asarray(frame_spectra.mask, dtype=bool))
    fw = np.broadcast_to(np.asarray(fwhm_nm, dtype=float), wl.shape)
    if not (flux.shape == variance.shape == mask.shape and flux.shape[-1] == wl.size):
        raise ValueError(f"frame spectra shapes disagree: flux {flux.shape}, variance "
                         f"{variance.shape}, mask {mask.shape}, wavelength {wl.shape}")
    n = flux.shape[0]
    bad = mask | ~np.isfinite(flux) | ~np.isfinite(variance) | ~(variance > 0)
    # a frame without meteor light (weight 0) is masked in full but is not saturated
    weight = np.asarray(getattr(frame_spectra, "frame_weight", np.ones(n)), dtype=float)
    lit = ~(weight == 0) if weight.shape == (n,) else np.ones(n, bool)
    rel = np.asarray(getattr(frame_spectra, "shape_rel_err", np.zeros((0, 0))), dtype=float)
    rel = rel if rel.shape == flux.shape else np.zeros(flux.shape)
    out = {}
    for g, (profile, rest) in templates.items():
        profile = np.asarray(profile, dtype=float)
        rest = np.asarray(rest, dtype=float)
        if profile.shape != wl.shape or rest.shape != wl.shape:
            raise ValueError(f"template of {g!r} does not match the wavelength grid")
        peak = float(np.max(profile)) if profile.size else 0.0
        if not peak > 0:
            continue
        on = np.flatnonzero(profile > 0.02 * peak)
        lo = wl[on[0]] - window_fwhm * fw[on[0]]
        hi = wl[on[-1]] + window_fwhm * fw[on[-1]]
        win = (wl >= lo) & (wl <= hi)
        core = profile > core_fraction * peak
        x = (wl - 0.5 * (lo + hi)) / max(0.5 * (hi - lo), 1e-9)
        basis = np.stack([profile, rest, np.ones_like(wl), x], axis=1)
        a = np.full(n, np.nan)
        a_err = np.full(n, np.nan)
        a_shape = np.full(n, np.nan)
        saturated = np.zeros(n, bool)
        profile_total = float(np.sum(profile))
        for i in range(n):
            lost = 0.0
            if np.any(core & bad[i]):
                # the share of the group's light on unusable bins: measured from the rest of
                # the profile (the wings) up to max_lost_share, otherwise not at all
                lost = float(np.sum(profile[bad[i]])) / profile_total
                if not lost <= max_lost_share:
                    saturated[i] = bool(lit[i]) and bool(np.any(core & mask[i]))
                    continue
            use = win & ~bad[i]
            if use.sum() < basis.shape[1] + 2:
                continue
            w = 1.0 / np.sqrt(variance[i, use])
            y = flux[i, use]
            cols = basis[use]
            if not free_rest:
                outside = ~win & ~bad[i]
                total = float(np.sum(rest[outside]))
                if not total > 0:
                    continue
                y = y - float(np.sum(flux[i, outside])) / total * rest[use]
                cols = cols[:, [0, 2, 3]]
            design = cols * w[:, None]
            keep = np.any(design != 0.0, axis=0)  # a rest template that is zero in the window
            design = design[:, keep]
            try:
                cov = np.linalg.inv(design.T @ design)
            except np.linalg.LinAlgError:
                continue
            coef = cov @ (design.T @ (y * w))
            a[i] = coef[0]
            shape_err = _WING_SHARE_ERR / (1.0 - lost) * abs(coef[0]) if lost > 0 else 0.0
            a_err[i] = math.sqrt(max(cov[0, 0], 0.0) + shape_err**2)
            # the amplitude's response to each bin (a row of the fit's solution), each bin moved
            # by its shape-error bound in the direction that moves the amplitude
            gain = (cov @ design.T)[0] * w
            a_shape[i] = float(np.sum(np.abs(gain) * rel[i, use] * np.abs(flux[i, use])))
        out[g] = (a, a_err, saturated, a_shape) if shape_errors else (a, a_err, saturated)
    return out


# Weaker lines of the group's atom (e.g. Na I 818.3/819.5 nm beside the D doublet): a frame is
# measured from them while their masked bins carry at most this share of their profile (error
# factor 1 / (1 - L) <= 2: they are faint, so extrapolating further adds mostly noise).
WEAK_MAX_LOST_SHARE = 0.5
# The weak-line curve times a peak only if its frames at the top reach this median S/N: the
# lowest level at which the sigma of _jackknifed_peak was checked (Monte Carlo there; it holds
# 97 % of the errors within 2 sigma at 8). A faint top is also where the weak line is itself
# saturated, or lost in a blend, and read from a fainter multiplet.
WEAK_MIN_PEAK_SNR = 8.0
# Relative error of the weak-to-group energy ratio of the whole-flight fit when no frame measures
# both: the ratio goes as exp(-dE / kT) (dE = 1.513 eV for Na I 3d - 3p), so a 300 K error at
# 4500 K moves it by exp(1.513 x 300 / (8.617e-5 x 4500^2)) - 1 = 0.30.
_WEAK_SCALE_REL_ERR = 0.3
# The weak-line curve times the group only if, scaled to it, it agrees with the group's own
# curve on the frames that measure both: a chi-square probability below this rejects it (the
# weak lines then follow something else as well, e.g. a blend or a masked part of their
# profile; a 3.3-sigma criterion, round value).
WEAK_MIN_AGREEMENT_P = 1e-3


def weak_line_curve(frame_spectra: Any, templates: dict[str, tuple[ArrayLike, ArrayLike, float]], *,
                    fwhm_nm: ArrayLike, reference_energy: float,
                    max_lost_share: float = WEAK_MAX_LOST_SHARE,
                    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]]:
    """Light curve of a composition group from weaker lines of the same atom, in the group's units.

    When the Na I D doublet saturates over the top of a bright meteor, the other Na I lines
    (3p 2P - 3d 2D at 818.33/819.48 nm, 3p - 4d at 568.26/568.82 nm, 3p - 5s at 615.42/616.07 nm;
    NIST ASD) still record the same atoms: in LTE each line's energy is the D energy times a
    ratio that depends on the temperature alone (same atom and ion, so the column, the partition
    function and the Saha balance cancel). The D lines of a real fireball are moreover
    self-absorbed (optically thick) while these stay thin, so they follow the sodium content
    better than D itself.

    Parameters
    ----------
    frame_spectra : FrameSpectra-like
        As for :func:`window_light_curves`; bins listed in ``recovered`` (saturated pixels
        scaled up from their wings by the extraction) count as masked here, see Notes.
    templates : dict
        Multiplet -> ``(profile, rest, energy)`` on the frames' grid
        (:func:`meteorspec.plasma.multiplet_templates`): the multiplet's lines for a unit energy,
        the rest of the whole-flight model and the multiplet's whole-flight energy.
    fwhm_nm : array_like
        Instrument FWHM per bin.
    reference_energy : float
        The group's whole-flight energy in the same fit (``PlasmaFit.group_intensity``): each
        multiplet's per-frame energy is multiplied by ``reference_energy / energy``.
    max_lost_share : float
        As in :func:`window_light_curves` (default :data:`WEAK_MAX_LOST_SHARE`).

    Returns
    -------
    flux, err : ndarray of shape (n_frames,)
        The inverse-variance mean of the multiplets' per-frame energies, each scaled to the
        group (NaN where none is measured), and its 1-sigma (noise and profile shape; the
        scale's own error is not in it: the peak time does not depend on it).
    saturated : ndarray of bool, shape (n_frames,)
        Frames where no multiplet is measured and one lost more than ``max_lost_share``.

    Raises
    ------
    ValueError
        For a template off the grid or a reference energy that is not positive and finite.

    Notes
    -----
    Each multiplet is measured as the groups are (:func:`window_light_curves`: its profile over
    the rest of the model and a local linear continuum, per frame), so N2 first-positive bands,
    O I 777/844 nm and N I lines beside 819 nm are taken by the rest template and the continuum.

    Recovered bins are left out: the extraction states their shape error as 1.5 % / (1 - L) of
    the bin, and on noise-free truth they read 2-7 % low (:mod:`meteorspec.extract`); a weak
    line adds only a few per cent to the bins it shares with brighter lines and bands, so such
    an error is of the order of its whole signal (simulated event 6 of
    bench/plasma_end_to_end.py --seed 5: with them, the 819 nm curve peaked 4.0 +- 1.2 frames
    late).

    The ratio to D moves with the temperature: energy ratio (818 + 819) / D is proportional to
    ``exp(-1.513 eV / kT)`` (upper levels 3.617 and 2.104 eV): 1.2 %, 2.0 % and 3.0 % at 4000,
    4500 and 5000 K by :func:`meteorspec.atomic.line_energy_rate` (568 nm: 0.06-0.2 %, 615 nm:
    0.01-0.04 %); d ln(ratio) / dT = 1.513 eV / (k T^2)
    = 8.7e-4 per K at 4500 K, so a 100 K change along the flight changes it by 9 %. A
    temperature that rises or falls through the top tilts the weak-line curve against D's and
    shifts its maximum by about ``(d ln ratio / dt) s^2`` (s the width of the top; common
    practice for the peak of a product of a Gaussian and an exponential): for a top of s = 5
    frames and 100 K over 10 frames, 0.2 frames. The camera response is lower in the near
    infrared, which the calibrated flux has taken out but whose noise remains.

    Measured on bench/plasma_end_to_end.py --n 36 --seed 5 --modes true: none of the eight
    events whose D top is unbounded gains a time. In the five fireballs and event 1 the
    818/819 nm bins are themselves masked over the top (69-100 % of the multiplet's light);
    in event 6 (70 km/s, 26 nm FWHM) 67-91 % of it lies on recovered bins; in event 7 (47 km/s,
    interlaced) the lines are clean but sit on N I 818-824 nm lines three times brighter, at an
    S/N of at most 3 per field. The same event 7 rendered 3-4 times as bright at 4000-5000 K
    (D saturated over 14 fields) is timed from the weak lines at -0.8 to +0.5 fields from the
    truth (sigma 1.3-1.6), twice as bright at 5000 K at +1.8 (sigma 1.0); twice as bright at
    4500 K and 8 times at 5000 K are refused (a flat top at S/N ~8; 819 nm saturated itself).
    Rendered at 20 km/s (less N I, O I and N2), event 6 as bright as in the set is timed at
    -0.2 frames (sigma 1.0) and event 7 twice as bright at +0.8 fields (sigma 1.2); event 7 as
    bright as in the set is still refused.
    """
    if not (math.isfinite(reference_energy) and reference_energy > 0):
        raise ValueError(f"reference energy must be positive and finite, got {reference_energy}")
    flux = np.atleast_2d(np.asarray(frame_spectra.flux, dtype=float))
    n = flux.shape[0]
    mask = np.atleast_2d(np.asarray(frame_spectra.mask, dtype=bool))
    recovered = np.asarray(getattr(frame_spectra, "recovered", np.zeros((0, 0), bool)), dtype=bool)
    if recovered.shape == mask.shape:
        mask = mask | recovered
    view = SimpleNamespace(wavelength_nm=frame_spectra.wavelength_nm, bin_width_nm=frame_spectra.bin_width_nm,
                           flux=flux, variance=frame_spectra.variance, mask=mask,
                           frame_weight=getattr(frame_spectra, "frame_weight", np.ones(n)))
    num, den = np.zeros(n), np.zeros(n)
    lost = np.zeros(n, bool)
    for label, (profile, rest, energy) in templates.items():
        if not (math.isfinite(energy) and energy > 0):
            continue
        curves = window_light_curves(view, {label: (profile, rest)}, fwhm_nm=fwhm_nm,
                                     max_lost_share=max_lost_share)
        if label not in curves:
            continue
        a, a_err, saturated = curves[label]
        scale = reference_energy / energy
        ok = np.isfinite(a) & np.isfinite(a_err) & (a_err > 0)
        w = np.where(ok, 1.0 / np.where(ok, a_err * scale, 1.0) ** 2, 0.0)
        num += np.where(ok, a * scale, 0.0) * w
        den += w
        lost |= saturated
    measured = den > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(measured, num / den, np.nan)
        out_err = np.where(measured, 1.0 / np.sqrt(den), np.nan)
    return out, out_err, lost & ~measured


def weak_line_curves(frame_spectra: Any, whole_flight_fit: Any, *, fwhm_nm: ArrayLike,
                     species: dict[str, str] | None = None,
                     ) -> dict[str, tuple[NDArray, NDArray, NDArray]]:
    """:func:`weak_line_curve` of each group from a whole-flight plasma fit.

    Parameters
    ----------
    frame_spectra : FrameSpectra-like
    whole_flight_fit : PlasmaFit
        Its model lines of the group's atom outside the group give the templates
        (:func:`meteorspec.plasma.multiplet_templates`), its ``group_intensity`` the scale.
    fwhm_nm : array_like
        Instrument FWHM per bin.
    species : dict, optional
        Group -> species; default ``{"na": "Na I"}`` (the Mg I and Fe I groups have strong
        other lines of their own in the fit and are not timed this way).

    Returns
    -------
    dict
        Group -> ``(flux, err, saturated)``; a group without such lines in the model, or
        without light in the fit, is left out (also when the fit failed).
    """
    species = {"na": "Na I"} if species is None else species
    if not whole_flight_fit:
        return {}
    out = {}
    for g, sp in species.items():
        reference = float(whole_flight_fit.group_intensity.get(g, math.nan))
        if not (math.isfinite(reference) and reference > 0):
            continue
        templates = multiplet_templates(whole_flight_fit, frame_spectra.wavelength_nm,
                                        frame_spectra.bin_width_nm, fwhm_nm=fwhm_nm, species=sp)
        if templates:
            out[g] = weak_line_curve(frame_spectra, templates, fwhm_nm=fwhm_nm, reference_energy=reference)
    return out


def _jackknifed_peak(t: NDArray, flux: NDArray, err: NDArray, saturated: NDArray, *,
                     min_snr: float) -> tuple[float, float, str]:
    """:func:`_window_peak` of a light curve, its sigma at least the jackknife's.

    Used for every window curve (:func:`time_resolved`), weak-line curve and deep-wing curve.
    A faint curve's top is fitted from a few noisy frames, and a broad top is not exactly any
    of the fitted shapes: the fit covariance then misses how much single frames move the
    peak. The delete-one jackknife over the measured frames (Efron and Stein 1981, Ann. Stat. 9,
    586; common practice) measures that directly: ``sqrt((n - 1) / n sum (t_i - mean)^2)`` of
    the n leave-one-out peak times. The larger of the two is returned.

    Measured with exposure means of the simulator's light-curve shape
    (:class:`meteorspec.simulate.scene.LightCurve`, 15-30 frames, peak at 45-75 % of the
    flight) and white noise, 120 seeded curves per level, against the continuous maximum: at
    a peak S/N of 8 / 12 / 16 the larger of the two holds the error within 2 sigma for 99 / 97 /
    96 % (median |error| / sigma 0.43 / 0.43 / 0.45: conservative by about 1.5); the peak is
    within one frame for 90 / 96 / 98 % (with the split-Gaussian top used before, 57 / 76 % at
    S/N 8 / 12). The same run at S/N 4 / 16 / 40 / 100 (120 curves each, seed 7): 97 / 98 / 98 /
    97 % within 2 sigma, where the fit's sigma alone holds 97 / 97 / 94 / 88 % (at high S/N the
    fitted tops' own shape error is what is left). On the Na window curve of simulated event
    25 of bench/plasma_end_to_end.py --seed 6 (Na-free, a flat top at S/N 3-6 per frame) the
    fit's sigma was 0.5 frames against an error of 3.3; the jackknife gives 6.7.
    On simulated event 7 of bench/plasma_end_to_end.py --seed 5 rendered twice as bright at
    4500 K (D saturated over 14 fields, 818/819 nm clean at S/N ~8 on a flat top) the (then
    split-Gaussian) fit put the peak 4.4 fields early with a covariance sigma of 0.6;
    the jackknife gave 13.
    """
    peak, peak_err, status = _window_peak(t, flux, err, saturated, min_snr=min_snr)
    if not np.isfinite(peak):
        return peak, peak_err, status
    loo = []
    measured = np.flatnonzero(np.isfinite(flux))
    k = int(np.argmax(np.where(np.isfinite(flux), flux, -np.inf)))
    for j in measured:
        if flux[j] < 0.25 * flux[k] and abs(j - k) > 4:
            # outside any top window the fit uses (40 % of the smoothed maximum, at least
            # +-3 frames): leaving it out keeps the peak, so no refit (saves half the time)
            loo.append(peak)
            continue
        held = flux.copy()
        held[j] = np.nan
        loo.append(_window_peak(t, held, err, saturated, min_snr=min_snr)[0])
    loo_t = np.array(loo)
    loo_t = loo_t[np.isfinite(loo_t)]
    if loo_t.size < 3:
        return math.nan, math.nan, status
    jack = math.sqrt((loo_t.size - 1) / loo_t.size * float(np.sum((loo_t - loo_t.mean()) ** 2)))
    return peak, max(peak_err, jack), status


def _weak_line_peak(t: NDArray, flux: NDArray, err: NDArray, saturated: NDArray, weak: NDArray,
                    weak_err: NDArray, weak_saturated: NDArray, *, min_snr: float,
                    ) -> tuple[float, float, NDArray, NDArray] | None:
    """Peak time of a group from its weak-line curve where its own top is saturated too long.

    Returns ``(peak, peak_err, flux, err)`` (the group's curve with its saturated frames filled
    by the weak-line values scaled to it) or None when the weak lines cannot time it:

    * the weak curve's own peak (:func:`_jackknifed_peak`) has a status other than ``""`` or
      ``"bridged_saturated"`` (saturated, cut by the record, or no point above ``min_snr``);
    * the median S/N of its frames within one frame interval of the peak is below
      :data:`WEAK_MIN_PEAK_SNR` (the sigma is then too often too small, see there);
    * the peak lies outside the group's saturated run (widened by one frame): the group's own
      measured frames there are below the top, so a weak-line maximum there contradicts them;
    * its sigma (:func:`_jackknifed_peak`) is above the spread of a uniform position over that
      run, ``n_run dt / sqrt(12)``: the weak lines then say less than the run itself;
    * scaled to the group's curve, it disagrees with it on the three or more frames that
      measure both (chi-square probability below :data:`WEAK_MIN_AGREEMENT_P`, the group's and
      the weak curve's errors in quadrature; one scale fitted). On simulated event 18 of
      bench/plasma_end_to_end.py --seed 6 the weak curve read 2.3 times the unsaturated D
      frame after the run (4.7 sigma; chi-square 36 on 6 degrees of freedom) and put the peak
      2.3 frames late with a sigma of 0.4; on event 0 of the same set it agrees (chi-square
      2.7 on 4) and times the peak 0.17 frames from the truth.

    The scale is the ratio of the sums of the group's curve and of the weak one over the frames
    that measure both, when it is significant (3 sigma); otherwise 1 (the whole-flight fit's
    ratio, :func:`weak_line_curve`) with the relative error ``_WEAK_SCALE_REL_ERR``.
    """
    peak, peak_err, status = _jackknifed_peak(t, weak, weak_err, weak_saturated, min_snr=min_snr)
    if status not in ("", "bridged_saturated") or not np.isfinite(peak):
        return None
    good = np.isfinite(weak) & np.isfinite(weak_err) & (weak_err > 0)
    dt = float(np.median(np.diff(t))) if t.size > 1 else math.nan
    # the top itself must be bright: a weak line saturated there too is measured from its
    # wings or from a fainter multiplet, while its flanks may still be well above the noise
    top = good & (np.abs(t - peak) <= dt)
    if not (np.any(top) and np.median(weak[top] / weak_err[top]) >= WEAK_MIN_PEAK_SNR):
        return None
    sat = np.flatnonzero(saturated)
    if sat.size == 0:
        return None
    near = sat[np.argmin(np.abs(t[sat] - peak))]
    runs = np.split(sat, np.flatnonzero(np.diff(sat) > 1) + 1)
    run = next(r for r in runs if near in r)
    if not t[run[0]] - dt <= peak <= t[run[-1]] + dt or not peak_err <= run.size * dt / math.sqrt(12.0):
        return None
    both = good & np.isfinite(flux) & np.isfinite(err) & (err > 0)
    scale, scale_rel = 1.0, _WEAK_SCALE_REL_ERR
    if np.count_nonzero(both) >= 2:
        # ratio of sums: a least-squares slope would carry the weak curve's noise in its
        # denominator (regression dilution: read 27 % low on the test's flanks at S/N ~3)
        s_w = float(np.sum(weak[both]))
        if s_w > 0:
            k = float(np.sum(flux[both])) / s_w
            k_err = math.sqrt(float(np.sum(err[both] ** 2)) + k**2 * float(np.sum(weak_err[both] ** 2))) / s_w
            if k > 3.0 * k_err:
                scale, scale_rel = k, k_err / k
            if np.count_nonzero(both) >= 3 and k > 0:
                pull = (flux[both] - k * weak[both]) / np.sqrt(err[both] ** 2 + (k * weak_err[both]) ** 2)
                if chi2_dist.sf(float(np.sum(pull**2)), np.count_nonzero(both) - 1) < WEAK_MIN_AGREEMENT_P:
                    return None
    fill = saturated & good
    out = np.where(fill, scale * weak, flux)
    out_err = np.where(fill, scale * np.hypot(weak_err, scale_rel * np.abs(weak)), err)
    return peak, peak_err, out, out_err


# Deeper scale-up of saturated bins for a peak time only: a group whose window curve is saturated
# over its top is measured again from an extraction that scales bins up from their unsaturated
# wings until their bad pixels carry this share of the profile (extract.extract_spectra,
# max_saturated_fraction). Set by the extraction's own error model, not by a bench: a bin scaled
# up by 1 / (1 - L) carries the relative shape error 0.015 / (1 - L) (extract._LOST_SHARE_ERR),
# 3 at L = 0.995, beyond which a bin is consistent with zero at a third of a sigma and says
# nothing. The composition keeps the extraction's default limit (0.8): there the recovered bins'
# 2-10 % low reading enters the energies, while a peak time needs only the shape of the top.
DEEP_SATURATED_SHARE = 0.995


def deep_wing_peak(timeline: TimeResolved, group: str,
                   deep_curve: tuple[ArrayLike, ArrayLike, ArrayLike], saturated: ArrayLike, *,
                   min_snr: float = 3.0) -> TimeResolved:
    """A group's peak time from a deeper wing scale-up where its own top is saturated too long.

    Parameters
    ----------
    timeline : TimeResolved
        From :func:`time_resolved`; returned unchanged unless it carries
        ``"<group>_peak_unbounded_saturated"``.
    group : str
        ``"na"``, ``"mg"`` or ``"fe"``.
    deep_curve : tuple of array_like
        ``(flux, err, saturated)`` of shape (n_frames,): the group's :func:`window_light_curves`
        on spectra extracted with ``max_saturated_fraction`` = :data:`DEEP_SATURATED_SHARE`
        (same units as the timeline's curve: the same extraction otherwise).
    saturated : array_like of bool, shape (n_frames,)
        The saturated frames of the group's window curve behind ``timeline``.
    min_snr : float
        As in :func:`time_resolved`.

    Returns
    -------
    TimeResolved
        With the group's peak time, its 1-sigma and its light curve (the saturated frames
        filled from ``deep_curve``) and the flag ``"<group>_peak_deep_wings"`` in place of
        ``"<group>_peak_unbounded_saturated"``, when the deep curve times the top:

        * its own peak (:func:`_jackknifed_peak`: the fit of :func:`_peak_time_err`, its sigma at least the
          delete-one jackknife's) has status ``""`` or ``"bridged_saturated"``;
        * the peak lies inside the saturated run nearest to it, widened by one frame (the
          frames measured outside it are below the top);
        * its sigma is below the spread of a uniform position over that run,
          ``n_run dt / sqrt(12)`` (otherwise it says less than the run itself).

        Otherwise ``timeline`` unchanged (still flagged unbounded).

    Notes
    -----
    The deep bins rest on the far wings of the cross profile: their stated errors carry the
    shape term 0.015 / (1 - L), and their reading falls increasingly low with L (on noise-free
    truth 2-2.5 % up to L = 0.7, 5.7 % to 0.9, 10 % beyond: :mod:`meteorspec.extract`). A low
    reading that grows with brightness flattens the top but keeps its maximum where the
    brightness peaks as long as the curve stays monotone in it; a bias that differs between
    rise and fall does shift it, and is not in the sigma.

    Measured on bench/plasma_end_to_end.py --n 36 --seed 5 --modes true, the events whose D top
    was unbounded: events 1 and 7 are timed at +0.11 (sigma 2.00) and -0.12 (sigma 1.30)
    frames from the truth, event 6 at +2.16 (sigma 0.91): its deep bins read 11-31 % low on the
    rise and up to 13 % high after the top against stated errors of 6-8 %, and the unsaturated
    cross-dispersion wings of the same frames (:func:`meteorspec.satlines.wing_amplitudes`,
    a scratch check) put the maximum two frames late as well, so the pattern is in the pixels,
    not in the scale-up. The six fireballs keep no clean cross profile in the extraction (too
    few unsaturated cross-sections) and gain nothing. Deep limits of 0.95 / 0.98 were also
    run (event 1: -0.38 / +0.61, event 6: +2.45 / +2.17, event 7: +1.40 / -0.12 frames); the
    limit in use is the one the error model sets (:data:`DEEP_SATURATED_SHARE`).
    """
    flag = f"{group}_peak_unbounded_saturated"
    if flag not in timeline.flags:
        return timeline
    t = timeline.time_s
    names = {"na": "Na I", "mg": "Mg I", "fe": "Fe I"}
    if group not in names:
        raise ValueError(f"unknown group {group!r}")
    flux, err, deep_sat = (np.asarray(a, dtype=dt) for a, dt in zip(deep_curve, (float, float, bool)))
    sat = np.asarray(saturated, dtype=bool)
    if any(a.shape != t.shape for a in (flux, err, deep_sat, sat)):
        raise ValueError(f"deep curve and saturated frames must have shape {t.shape}")
    peak, peak_err, status = _jackknifed_peak(t, flux, err, deep_sat, min_snr=min_snr)
    if status not in ("", "bridged_saturated") or not np.isfinite(peak):
        return timeline
    runs_idx = np.flatnonzero(sat)
    if runs_idx.size == 0 or t.size < 2:
        return timeline
    dt = float(np.median(np.diff(t)))
    runs = np.split(runs_idx, np.flatnonzero(np.diff(runs_idx) > 1) + 1)
    run = min(runs, key=lambda r: min(abs(t[r[0]] - peak), abs(t[r[-1]] - peak)))
    if not (t[run[0]] - dt <= peak <= t[run[-1]] + dt and peak_err <= run.size * dt / math.sqrt(12.0)):
        return timeline
    key = names[group]
    old, old_err = timeline.light_curves[key], timeline.light_curve_errs[key]
    fill = ~np.isfinite(old) & np.isfinite(flux)
    curves = dict(timeline.light_curves) | {key: np.where(fill, flux, old)}
    curve_errs = dict(timeline.light_curve_errs) | {key: np.where(fill, err, old_err)}
    peaks = dict(timeline.peak_time_s) | {key: float(peak)}
    peak_errs = dict(timeline.peak_time_err_s) | {key: float(peak_err)}
    flags = [f"{group}_peak_deep_wings" if f == flag else f for f in timeline.flags]
    lit = np.flatnonzero(np.isfinite(timeline.na))
    if lit.size and "peak_at_edge" not in flags and (abs(peak - t[lit[0]]) < 0.5 * dt
                                                     or abs(peak - t[lit[-1]]) < 0.5 * dt):
        flags.append("peak_at_edge")
    others = [peaks[k] for k in ("Mg I", "Fe I") if np.isfinite(peaks[k])]
    lead = peaks["Na I"] - float(np.mean(others)) if others else math.nan
    duration = timeline.duration_s
    lead_fraction = lead / duration if duration > 0 else math.nan
    return replace(timeline, light_curves=curves, light_curve_errs=curve_errs, peak_time_s=peaks,
                   peak_time_err_s=peak_errs, na_peak_lead_s=float(lead),
                   na_peak_lead_fraction=float(lead_fraction), flags=tuple(flags))


def time_resolved_from_fits(time_s: ArrayLike, fits: list[Any], *,
                            o777_per_frame: ArrayLike | None = None,
                            o777_err: ArrayLike | None = None,
                            min_snr: float = 3.0, min_coverage: float = 0.5,
                            window_curves: dict | None = None,
                            weak_curves: dict | None = None) -> TimeResolved:
    """:func:`time_resolved` from a list of per-frame plasma fits.

    Parameters
    ----------
    time_s : array_like of shape (n_frames,)
    fits : list
        One object per frame with ``group_intensity`` and ``group_intensity_err`` dicts
        (``meteorspec.plasma.PlasmaFit``), or None / a falsy failure object for a frame whose
        fit failed (NaN there).
    o777_per_frame, o777_err, min_snr
        As in :func:`time_resolved`.
    min_coverage : float
        A frame whose fit saw less than this share of a group's model light on usable bins
        (``group_coverage``; saturated group lines) counts as ``unmeasured`` for that group's
        peak time.
    window_curves, weak_curves : dict, optional
        As in :func:`time_resolved` (monochromatic light curves for the peak times; the
        group's weaker lines where its own are saturated over the top).
    """
    t = np.asarray(time_s, dtype=float)
    if len(fits) != t.size:
        raise ValueError(f"{len(fits)} plasma fits for {t.size} frame times")
    flux = {g: np.full(t.size, np.nan) for g in GROUPS}
    err = {g: np.full(t.size, np.nan) for g in GROUPS}
    unmeasured = {g: np.zeros(t.size, bool) for g in GROUPS}
    for i, fit in enumerate(fits):
        if fit is None or not fit:
            continue
        coverage = getattr(fit, "group_coverage", None) or {}
        for g in GROUPS:
            flux[g][i] = float(fit.group_intensity[g])
            err[g][i] = float(fit.group_intensity_err[g])
            # NaN (none of the group's lines in the frame's fitted range) is unmeasured too
            unmeasured[g][i] = not coverage.get(g, 1.0) >= min_coverage
    return time_resolved(t, flux, err, o777_per_frame=o777_per_frame, o777_err=o777_err,
                         min_snr=min_snr, unmeasured=unmeasured, window_curves=window_curves,
                         weak_curves=weak_curves)


def light_curve_from_spectra(frame_spectra: Any, *, center_nm: float, half_width_nm: float,
                             continuum_windows_nm: tuple[tuple[float, float], ...] | None = None,
                             ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Monochromatic light curve: band integral minus a local linear continuum, per frame.

    Parameters
    ----------
    frame_spectra : FrameSpectra-like
        Needs ``wavelength_nm`` and ``bin_width_nm`` (n_wl,), ``flux``, ``variance`` and ``mask``
        (n_frames, n_wl) (mask True = bad) (:class:`meteorspec.extract.FrameSpectra`).
    center_nm, half_width_nm : float
        The band ``[center - half_width, center + half_width]`` (air nm).
    continuum_windows_nm : tuple of (lo, hi), optional
        Where the continuum is measured. Default: one window on each side of the band, each as
        wide as the half band and starting half a band width away from it.

    Returns
    -------
    flux : ndarray of shape (n_frames,)
        Band integral of ``flux * bin_width_nm`` minus the continuum line integrated over the
        same bins; NaN for a frame with a masked bin inside the band or no unmasked continuum
        bin (two are needed for the slope; with one the continuum is taken flat).
    err : ndarray of shape (n_frames,)
        1-sigma from ``variance``, including the continuum estimate.

    Raises
    ------
    ValueError
        For missing attributes, shapes that disagree, a band without bins, or windows that
        overlap the band.

    Notes
    -----
    A model-free measure for when the per-frame plasma fit is not available: blends inside the
    band are counted. The continuum is an unweighted least-squares line through the window bins
    (unweighted so that bright frames do not bias the slope through their own variance), and its
    error is propagated exactly because it is linear in the data.
    """
    try:
        wl = np.asarray(frame_spectra.wavelength_nm, dtype=float)
        width = np.broadcast_to(np.asarray(frame_spectra.bin_width_nm, dtype=float), wl.shape)
        flux = np.atleast_2d(np.asarray(frame_spectra.flux, dtype=float))
        variance = np.atleast_2d(np.asarray(frame_spectra.variance, dtype=float))
        mask = np.atleast_2d(np.asarray(frame_spectra.mask, dtype=bool))
    except AttributeError as exc:
        raise ValueError(f"frame spectra lack an attribute: {exc}") from None
    if not (flux.shape == variance.shape == mask.shape and flux.shape[-1] == wl.size):
        raise ValueError(f"frame spectra shapes disagree: flux {flux.shape}, variance "
                         f"{variance.shape}, mask {mask.shape}, wavelength {wl.shape}")
    if not (math.isfinite(center_nm) and math.isfinite(half_width_nm) and half_width_nm > 0):
        raise ValueError("center_nm and half_width_nm must be finite, half_width_nm > 0")
    lo, hi = center_nm - half_width_nm, center_nm + half_width_nm
    if continuum_windows_nm is None:
        gap, w = half_width_nm, half_width_nm
        continuum_windows_nm = ((lo - gap - w, lo - gap), (hi + gap, hi + gap + w))
    band = (wl >= lo) & (wl <= hi)
    if not np.any(band):
        raise ValueError(f"no wavelength bin inside the band {lo:.2f}-{hi:.2f} nm")
    cont = np.zeros(wl.shape, dtype=bool)
    for a, b in continuum_windows_nm:
        if not a < b:
            raise ValueError(f"continuum window ({a}, {b}) is empty")
        if a < hi and b > lo:
            raise ValueError(f"continuum window ({a}, {b}) overlaps the band {lo:.2f}-{hi:.2f} nm")
        cont |= (wl >= a) & (wl <= b)

    bad = mask | ~np.isfinite(flux) | ~np.isfinite(variance)
    f = np.where(bad, 0.0, flux)
    v = np.where(bad, 0.0, variance)
    band_ok = ~np.any(bad[:, band], axis=1)
    raw = (f[:, band] * width[band]).sum(axis=1)
    raw_var = (v[:, band] * width[band] ** 2).sum(axis=1)

    # Continuum c(x) = a + b x with x = wl - center; integral over the band bins is
    # A a + B b with A = sum(width), B = sum(width * x). Least squares on the valid window bins.
    x = wl - center_nm
    use = cont[None, :] & ~bad
    n = use.sum(axis=1).astype(float)
    sx = (use * x).sum(axis=1)
    sxx = (use * x * x).sum(axis=1)
    det = n * sxx - sx * sx
    slope_ok = det > 1e-12 * np.maximum(n * sxx, 1e-300)
    a_band = width[band].sum()
    b_band = (width[band] * x[band]).sum()
    with np.errstate(invalid="ignore", divide="ignore"):
        # weight of each window bin in (A a + B b): linear coefficients of the LSQ solution
        coef_lin = ((sxx[:, None] - sx[:, None] * x) * a_band
                    + (n[:, None] * x - sx[:, None]) * b_band) / det[:, None]
        coef_flat = np.broadcast_to(a_band / n[:, None], coef_lin.shape)
        # frames with no usable window bin (n = 0) give NaN here and are dropped by `ok` below
        coef = np.where(slope_ok[:, None], coef_lin, coef_flat) * use
    continuum = (coef * f).sum(axis=1)
    continuum_var = (coef**2 * v).sum(axis=1)
    ok = band_ok & (n > 0)
    out = np.where(ok, raw - continuum, np.nan)
    out_err = np.where(ok, np.sqrt(raw_var + continuum_var), np.nan)
    return out, out_err


# --------------------------------------------------------------------------------------------
# Figure
# --------------------------------------------------------------------------------------------

def _ternary_xy(points: NDArray) -> tuple[NDArray, NDArray]:
    """Cartesian position: Mg corner (0, 0), Fe corner (1, 0), Na corner at the top."""
    na, fe = points[..., 0], points[..., 2]
    return fe + 0.5 * na, na * math.sqrt(3.0) / 2.0


def ternary_figure(points: ArrayLike | list[Composition], *, errors: ArrayLike | None = None,
                   class_names: list[str] | None = None,
                   speed_band_km_s: tuple[float, float] | None = None,
                   boundary_speed_km_s: float | None = None, labels: list[str] | None = None,
                   table: ClassTable | None = None, model: NormalModel | None = None,
                   title: str | None = None, ax: Any = None) -> Any:
    """Na-Mg-Fe ternary diagram with the expected normal curve and the class boundaries.

    Parameters
    ----------
    points : array_like of shape (n, 3) or list of Composition
        ``(na, mg, fe)`` of each meteor. For Composition objects the class and errors are
        taken from them unless given.
    errors : array_like of shape (n, 3), optional
        1-sigma errors, drawn as bars along the Na and Fe axes.
    class_names : list of str, optional
        Class per point (colours and legend).
    speed_band_km_s : (lo, hi), optional
        Highlight this stretch of the expected curve (e.g. the speed with its error).
    boundary_speed_km_s : float, optional
        Draw the class boundaries of ``calibration/classes.csv`` for this speed.
    labels : list of str, optional
        Text beside each point.
    table, model : optional
    title : str, optional
    ax : matplotlib Axes, optional
        Draw into it; default a new figure.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    table = _default_table() if table is None else table
    model = _default_model() if model is None else model
    if isinstance(points, (list, tuple)) and points and isinstance(points[0], Composition):
        comps = list(points)
        pts = np.array([c.values for c in comps])
        errors = np.array([c.errors for c in comps]) if errors is None else errors
        class_names = [c.class_name for c in comps] if class_names is None else class_names
    else:
        pts = np.asarray(points, dtype=float).reshape(-1, 3)
    if class_names is not None and len(class_names) != len(pts):
        raise ValueError(f"{len(class_names)} class names for {len(pts)} points")

    if ax is None:
        fig, ax = plt.subplots(figsize=(6.4, 5.8))
    else:
        fig = ax.figure
    h = math.sqrt(3.0) / 2.0
    ax.plot([0, 1, 0.5, 0], [0, 0, h, 0], color="0.2", lw=1.0)
    for frac in (0.2, 0.4, 0.6, 0.8):  # light grid of constant na and constant fe
        ax.plot([frac * 0.5, 1 - frac * 0.5], [frac * h, frac * h], color="0.88", lw=0.6, zorder=0)
        ax.plot([frac, frac + (1 - frac) * 0.5], [0, (1 - frac) * h], color="0.88", lw=0.6,
                zorder=0)
    ax.text(0.5, h + 0.03, "Na", ha="center", va="bottom", fontsize=11)
    ax.text(-0.03, -0.03, "Mg", ha="right", va="top", fontsize=11)
    ax.text(1.03, -0.03, "Fe", ha="left", va="top", fontsize=11)

    v = np.linspace(model.speed_min_km_s, model.speed_max_km_s, 300)
    cx, cy = _ternary_xy(expected_normal(v, model=model))
    ax.plot(cx, cy, color="k", lw=1.2, label="expected normal")
    last_xy = (math.inf, math.inf)
    for mark in range(10, int(model.speed_max_km_s) + 1, 5):
        if mark < model.speed_min_km_s:
            continue
        mx, my = (float(c) for c in _ternary_xy(expected_normal(float(mark), model=model)))
        if math.hypot(mx - last_xy[0], my - last_xy[1]) < 0.03:  # on the plateau: one label
            continue
        last_xy = (mx, my)
        ax.plot(mx, my, "k|", ms=6)
        ax.annotate(f"{mark} km/s" if mark == 10 else f"{mark}", (mx, my), xytext=(5, 2),
                    textcoords="offset points", fontsize=7)
    px_, py_ = (float(c) for c in _ternary_xy(expected_normal(model.speed_max_km_s, model=model)))
    ax.annotate(f"{model.speed_flat_km_s:.0f}-{model.speed_max_km_s:.0f}", (px_, py_),
                xytext=(-8, -4), textcoords="offset points", fontsize=7, ha="right", va="top")
    if speed_band_km_s is not None:
        lo, hi = sorted(speed_band_km_s)
        vb = np.linspace(lo, hi, 50)
        bx, by = _ternary_xy(expected_normal(vb, model=model))
        # a line for the stretch and a marker, so a band on the plateau is still visible
        ax.plot(bx, by, color="tab:orange", lw=5, alpha=0.5, solid_capstyle="round", zorder=2)
        ax.plot(bx[25], by[25], "o", ms=11, mfc="none", mec="tab:orange", mew=2, zorder=2,
                label=f"normal at {lo:.0f}-{hi:.0f} km/s")

    if boundary_speed_km_s is not None:
        n0 = expected_normal(float(boundary_speed_km_s), model=model)
        na_mg0, fe_mg0 = n0[0] / n0[1], n0[2] / n0[1]
        for rule in table.rules:
            if rule.quantity == "na_mg_rel":  # ray from the Fe corner
                r = rule.value * na_mg0
                seg = np.array([[0, 0, 1.0], [r / (1 + r), 1 / (1 + r), 0]])
            elif rule.quantity == "fe_mg_rel":  # ray from the Na corner
                r = rule.value * fe_mg0
                seg = np.array([[1.0, 0, 0], [0, 1 / (1 + r), r / (1 + r)]])
            elif rule.quantity in ("na_fraction", "mg_fraction", "fe_fraction"):
                i = ("na_fraction", "mg_fraction", "fe_fraction").index(rule.quantity)
                a, b = np.zeros(3), np.zeros(3)
                a[i] = b[i] = rule.value
                j, k = [m for m in range(3) if m != i]
                a[j] = b[k] = 1 - rule.value
                seg = np.array([a, b])
            else:
                continue
            sx, sy = _ternary_xy(seg)
            ax.plot(sx, sy, ls="--", lw=0.7, color="0.5", zorder=1)
        ax.text(0.0, h, f"boundaries at {boundary_speed_km_s:.0f} km/s", fontsize=7, va="top")

    colours = {"normal": "tab:green", "Na-poor": "tab:orange", "Na-enhanced": "tab:purple",
               "Na-free": "tab:red", "Fe-poor": "tab:cyan", "iron": "tab:brown",
               "unclassified": "0.6"}
    px, py = _ternary_xy(pts)
    if errors is not None:
        err = np.asarray(errors, dtype=float).reshape(-1, 3)
        ax.errorbar(px, py, xerr=err[:, 2], yerr=err[:, 0] * h, fmt="none", ecolor="0.6", lw=0.7,
                    zorder=2)
    if class_names is None:
        ax.scatter(px, py, s=22, color="tab:blue", zorder=3, label="meteors")
    else:
        cls = np.asarray(class_names, dtype=object)
        for name in dict.fromkeys(class_names):
            m = cls == name
            ax.scatter(px[m], py[m], s=24, color=colours.get(name, "k"), edgecolor="k", lw=0.3,
                       zorder=3, label=name)
    if labels is not None:
        for x, y, text in zip(px, py, labels):
            ax.annotate(str(text), (x, y), xytext=(3, -8), textcoords="offset points", fontsize=6)
    ax.set_xlim(-0.08, 1.08)
    ax.set_ylim(-0.08, h + 0.1)
    ax.set_aspect("equal")
    ax.axis("off")
    ax.legend(loc="upper right", fontsize=7, frameon=False)
    if title is not None:
        ax.set_title(title)
    return fig
