"""Forward simulator: synthetic events that follow the contract, with their truth.

Public API (the CLI's ``meteorspec simulate`` calls exactly these)::

    EventSpec, NuisanceStrengths          every choice of one event (frozen)
    simulate_event(spec, out_dir, *, truth_dir) -> SimulatedEvent
    SAMPLE_SPECS, write_samples(out_dir, names=None)
    random_specs(n, *, seed, perturb=False) -> list[EventSpec]
    render_event(spec) -> Rendered        frames and per-exposure truth, nothing written

Beside it, ``true_geometry(base, truth)`` gives the geometry a truth JSON was rendered with.

Modules: :mod:`.spec` (EventSpec), :mod:`.scene` (great-circle path, light
curve, stars), :mod:`.emission` (LTE spectrum with exact group ratios),
:mod:`.render` (frames through :class:`~meteorspec.optics.SpectralGeometry`),
:mod:`.writer` (event folders and truth JSON), :mod:`.presets` (sample and
random events).

Truth JSON (``<truth_dir>/<event id>.json``, schema
``meteorspec-simulation-truth/1``): true and written station geometry, the
spec, composition (na + mg + fe = 1, exactly the spec's), temperatures and
speed; per frame (or field) time, zeroth-order x/y at mid-exposure and its
exposure-averaged centroid, zeroth-order flux (linear ADU, noise-free),
energy fraction, share of the first order on the sensor and
saturated/off-frame flags; per line species, lab
wavelength, multiplet, group, component and whole-flight energy, per-frame
energies of the groups and strongest lines (any line: energy x
energy_fraction of the frame); N2 band and continuum totals; stars.
Energies are linear ADU on the sensor in first order for a response of 1,
above the atmosphere; with ``[pointing]`` in the true station the render
attenuates the meteor and the stars by :func:`meteorspec.extinction.transmission`
at their altitude (``EventSpec.atmosphere``), and the truth adds the atmosphere
used, per-frame ``altitude_deg`` and ``airmass``, stars' ``altitude_deg`` and
``energy_observed`` (after the atmosphere) beside ``energy``.
"""

from .presets import SAMPLE_SPECS, binned_overrides, peak_for_line_snr, random_specs, write_samples
from .render import FIRST_ORDER_SHARE, ZEROTH_ORDER_SHARE, Rendered, render_event
from .spec import VIDEO_FORMS, EventSpec, NuisanceStrengths
from .writer import SimulatedEvent, simulate_event, true_geometry

__all__ = [
    "EventSpec",
    "NuisanceStrengths",
    "SimulatedEvent",
    "simulate_event",
    "true_geometry",
    "SAMPLE_SPECS",
    "write_samples",
    "random_specs",
    "render_event",
    "Rendered",
    "binned_overrides",
    "peak_for_line_snr",
    "FIRST_ORDER_SHARE",
    "ZEROTH_ORDER_SHARE",
    "VIDEO_FORMS",
]
