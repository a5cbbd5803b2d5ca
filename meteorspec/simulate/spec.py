"""Every choice of one simulated event, in one frozen object, and the station it runs on.

:class:`EventSpec` holds the scene (trajectory, light curve, stars, sky), the
meteor (composition, temperatures, speed, nuisance emission) and the camera
(a station base file from ``calibration/stations/`` plus overrides, and the
perturbation of the grating values written to the station file). Nothing here
draws random numbers: the same spec always gives the same event.
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass, field
from typing import Any

from ..config import Camera, Grating, Lens, Station, load_station
from ..extinction import ExtinctionModel
from ..resources import calibration_dir

VIDEO_FORMS = ("avi", "fits", "png", "tiff", "fits-frames")
LIGHT_CURVES = ("classic", "flare")
_OVERRIDE_SECTIONS = {"camera": Camera, "lens": Lens, "grating": Grating}
_UTC_RE = re.compile(r"(\d{4})-(\d{2})-(\d{2})T(\d{2}):(\d{2}):(\d{2})(\.\d+)?Z\Z")


@dataclass(frozen=True)
class NuisanceStrengths:
    """Multipliers (1.0 = the model's default level) of the emission that is not a group.

    ``fe_other`` scales the Fe I lines outside the contract's ``fe`` group; the
    other names are species (``ca_ii`` = Ca II), ``n2`` the N2 first-positive
    bands and ``continuum`` the thermal continuum.
    """

    fe_other: float = 1.0
    ca_i: float = 1.0
    ca_ii: float = 1.0
    cr_i: float = 1.0
    mn_i: float = 1.0
    mg_ii: float = 1.0
    si_ii: float = 1.0
    fe_ii: float = 1.0
    h_i: float = 1.0
    o_i: float = 1.0
    n_i: float = 1.0
    n2: float = 1.0
    continuum: float = 1.0

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if not (isinstance(value, (int, float)) and value >= 0):
                raise ValueError(f"nuisance strength {f.name} must be a number >= 0, got {value!r}")


@dataclass(frozen=True)
class EventSpec:
    """One synthetic event, fully specified.

    Parameters
    ----------
    station : str
        Base station file name in ``calibration/stations/`` (without ``.toml``).
    station_id : str, optional
        Station id written to the event and station files; default the base id.
        Give a new id whenever ``overrides`` or the perturbation differ from
        another event written into the same folder.
    overrides : tuple of (key, value)
        Station values replaced before rendering, keys ``"camera.width"``,
        ``"lens.projection"``, ``"grating.grooves_per_mm"``, ... A dict is accepted
        and stored as a sorted tuple.
    start_utc : str
        Start of the first frame, ``YYYY-MM-DDThh:mm:ss[.fff]Z``; the event id is
        ``YYYYMMDDThhmmssZ_<station id>``.
    video_form : str
        ``"avi"`` (FFV1, 8-bit only), ``"fits"`` (cube), or a folder of
        ``"png"``, ``"tiff"`` or ``"fits-frames"`` images.
    fps, n_frames : float, int
        Frame rate and number of stored frames.
    meteor_start_s, meteor_duration_s : float
        The luminous flight, seconds since the start of the first frame.
    start_px : (float, float)
        Zeroth-order pixel at the start of the luminous flight.
    end_px : (float, float), optional
        Zeroth-order pixel at its end; if given, ``direction_deg`` and
        ``speed_deg_s`` are ignored and the meteor moves at constant angular
        speed along the great circle through both.
    direction_deg : float
        Direction of motion in the image at ``start_px``, from +x towards +y.
    speed_deg_s : float
        Angular speed on the sky along the great circle.
    peak_energy_adu_s : float
        Total emitted energy rate at the light-curve maximum (lines, bands and
        continuum, in the truth's ADU units before response and order shares).
    light_curve : {"classic", "flare"}
        Smooth rise and fall peaking at ``peak_time_frac`` of the flight, or the
        same with a short terminal flare of relative height ``flare_amplitude``.
    na, mg, fe : float
        Composition (contract section 6), >= 0, summing to 1.
    temperature_k, hot_temperature_k : float
        Main (LTE, ~4500 K) and hot (~10 000 K) component temperatures.
    hot_fraction : float, optional
        Hot-component energy as a fraction of the main component's line energy;
        default grows with ``speed_km_s`` (see :mod:`.emission`).
    speed_km_s : float
        Entry speed, 11-72 km/s; sets the hot and atmospheric shares.
    write_speed : bool
        Write ``[trajectory] speed_km_s`` into ``event.toml``.
    nuisance : NuisanceStrengths
    abundance_jitter_dex : float
        1-sigma scatter (dex) of the random factor on the CI-like abundances of
        the non-group elements.
    n_stars : int
    sky_adu : float
        Sky background per pixel per frame, linear ADU.
    noise : bool
        False: no sky, photon or read noise, no stars' scintillation (exact render).
    flat_response : bool
        True: render and write a response of 1.0 at all wavelengths.
    psf_sigma_px : float
        Gaussian PSF sigma.
    delta_grooves_frac, delta_dispersion_deg, delta_tilt_deg : float
        Written station file = true values plus these (the render uses the true values).
    atmosphere : bool, optional
        Attenuate the light of the meteor and the stars by the atmosphere between them and
        the camera (:func:`meteorspec.extinction.transmission` at their own altitude, with
        :meth:`ExtinctionModel.for_station`). Default (None): on when the true station has
        ``[pointing]`` (without it there is no altitude); True without ``[pointing]`` is an
        error at render time.
    seed : int
    noise_draw : int
        Another draw of the sky, photon and read noise and of the stars' twinkle of the same
        scene (0: the seed's own): the scene, the stars and the emission stay those of ``seed``.
    """

    station: str
    station_id: str | None = None
    overrides: tuple[tuple[str, Any], ...] = ()
    start_utc: str = "2026-11-14T03:15:22.120Z"
    video_form: str = "avi"
    fps: float = 25.0
    n_frames: int = 40
    meteor_start_s: float = 0.2
    meteor_duration_s: float = 1.2
    start_px: tuple[float, float] = (200.0, 150.0)
    end_px: tuple[float, float] | None = None
    direction_deg: float = 25.0
    speed_deg_s: float = 12.0
    peak_energy_adu_s: float = 2.0e6
    light_curve: str = "classic"
    peak_time_frac: float = 0.6
    flare_amplitude: float = 0.0
    na: float = 0.2
    mg: float = 0.3
    fe: float = 0.5
    temperature_k: float = 4500.0
    hot_temperature_k: float = 10000.0
    hot_fraction: float | None = None
    speed_km_s: float = 35.0
    write_speed: bool = True
    nuisance: NuisanceStrengths = field(default_factory=NuisanceStrengths)
    abundance_jitter_dex: float = 0.15
    n_stars: int = 25
    sky_adu: float = 6.0
    noise: bool = True
    flat_response: bool = False
    psf_sigma_px: float = 1.2
    delta_grooves_frac: float = 0.0
    delta_dispersion_deg: float = 0.0
    delta_tilt_deg: float = 0.0
    atmosphere: bool | None = None
    seed: int = 0
    noise_draw: int = 0

    def __post_init__(self) -> None:
        if isinstance(self.overrides, dict):
            object.__setattr__(self, "overrides", tuple(sorted(self.overrides.items())))
        object.__setattr__(self, "start_px", tuple(float(v) for v in self.start_px))
        if self.end_px is not None:
            object.__setattr__(self, "end_px", tuple(float(v) for v in self.end_px))
        problems = []
        if self.video_form not in VIDEO_FORMS:
            problems.append(f"video_form must be one of {VIDEO_FORMS}, got {self.video_form!r}")
        if self.light_curve not in LIGHT_CURVES:
            problems.append(f"light_curve must be one of {LIGHT_CURVES}, got {self.light_curve!r}")
        if not _UTC_RE.match(self.start_utc):
            problems.append(f"start_utc must look like 2026-11-14T03:15:22.120Z, got {self.start_utc!r}")
        comp = (self.na, self.mg, self.fe)
        if min(comp) < 0 or abs(sum(comp) - 1.0) > 1e-9:
            problems.append(f"na, mg, fe must be >= 0 and sum to 1, got {comp}")
        if not (hasattr(self.noise_draw, "__index__") and self.noise_draw.__index__() >= 0):
            problems.append(f"noise_draw must be an integer >= 0, got {self.noise_draw!r}")
        if not 11.0 <= self.speed_km_s <= 72.0:
            problems.append(f"speed_km_s must be within [11, 72], got {self.speed_km_s}")
        if not (self.fps > 0 and self.n_frames >= 2):
            problems.append("fps must be > 0 and n_frames >= 2")
        if not (self.meteor_duration_s > 0 and 0 < self.peak_time_frac < 1):
            problems.append("meteor_duration_s must be > 0 and peak_time_frac within (0, 1)")
        if not (self.peak_energy_adu_s >= 0 and self.sky_adu >= 0 and self.psf_sigma_px > 0.3):
            problems.append("peak_energy_adu_s and sky_adu must be >= 0, psf_sigma_px > 0.3")
        if not 1000.0 <= self.temperature_k <= 20000.0 or not 1000.0 <= self.hot_temperature_k <= 40000.0:
            problems.append("temperatures must be within 1000-20000 K (main) and 1000-40000 K (hot)")
        for key, _ in self.overrides:
            section, _, name = key.partition(".")
            cls = _OVERRIDE_SECTIONS.get(section)
            if cls is None or name not in {f.name for f in dataclasses.fields(cls)}:
                problems.append(f"unknown override {key!r}")
        if problems:
            raise ValueError("EventSpec: " + "; ".join(problems))

    @property
    def composition(self) -> dict[str, float]:
        return {"na": float(self.na), "mg": float(self.mg), "fe": float(self.fe)}

    def base_station(self) -> Station:
        """The base station file from ``calibration/stations/`` (with its response curve)."""
        return load_station(calibration_dir() / "stations" / f"{self.station}.toml")

    def true_station(self) -> Station:
        """The base station with the overrides applied and the id set: what the render uses."""
        base = self.base_station()
        changes: dict[str, dict[str, Any]] = {"camera": {}, "lens": {}, "grating": {}}
        for key, value in self.overrides:
            section, _, name = key.partition(".")
            changes[section][name] = tuple(value) if isinstance(value, list) else value
        camera = dataclasses.replace(base.camera, **changes["camera"])
        lens = dataclasses.replace(base.lens, **changes["lens"])
        grating = dataclasses.replace(base.grating, **changes["grating"])
        sid = base.id if self.station_id is None else self.station_id
        return dataclasses.replace(base, id=sid, camera=camera, lens=lens, grating=grating)

    def atmosphere_model(self, station: Station) -> ExtinctionModel | None:
        """The atmosphere the render applies at ``station`` (None: no attenuation).

        Raises
        ------
        ValueError
            ``atmosphere=True`` and the station has no ``[pointing]``.
        """
        if self.atmosphere is False:
            return None
        if station.pointing is None:
            if self.atmosphere:
                raise ValueError(f"EventSpec: atmosphere=True needs [pointing] in station {station.id}")
            return None
        return ExtinctionModel.for_station(station)

    def event_id(self, station_id: str) -> str:
        m = _UTC_RE.match(self.start_utc)
        return f"{m[1]}{m[2]}{m[3]}T{m[4]}{m[5]}{m[6]}Z_{station_id}"


def written_grating(spec: EventSpec, grating: Grating) -> Grating:
    """Grating values as written to the station file: the true ones plus the spec's deltas.

    A tilt that the delta would make negative is written as its absolute value with
    the azimuth turned by 180 deg, which is the same grating normal.
    """
    tilt = grating.tilt_deg + spec.delta_tilt_deg
    azimuth = grating.tilt_azimuth_deg
    if tilt < 0:
        tilt, azimuth = -tilt, (azimuth + 180.0) % 360.0
    return dataclasses.replace(
        grating,
        grooves_per_mm=grating.grooves_per_mm * (1.0 + spec.delta_grooves_frac),
        dispersion_angle_deg=grating.dispersion_angle_deg + spec.delta_dispersion_deg,
        tilt_deg=tilt, tilt_azimuth_deg=azimuth,
    )
