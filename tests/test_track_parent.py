"""The tracker finds the zeroth order through the lines of its own spectrum when the station's
grating values are a few degrees / per cent off (track._parent_link)."""
import dataclasses

import numpy as np
import pytest

from meteorspec.background import estimate_background
from meteorspec.optics import SpectralGeometry
from meteorspec.track import find_track


@pytest.mark.parametrize("k, d_grooves, d_angle_deg, d_tilt_deg", [
    # seed-5 event 023 of bench/plasma_end_to_end.py --n 36 with its bench perturbation: the
    # tracker first links O I 777; the zeroth order is five parents away and the last step needs
    # the angle allowance (3.3 deg off). Truth: the simulator's zeroth-order positions
    (23, 0.0288, -3.273, -0.814),
])
def test_zeroth_order_found_with_a_perturbed_station_grating(k, d_grooves, d_angle_deg, d_tilt_deg):
    sim = pytest.importorskip("meteorspec.simulate")
    from meteorspec.simulate.spec import written_grating
    spec = dataclasses.replace(sim.random_specs(36, seed=5)[k], atmosphere=False, delta_grooves_frac=d_grooves,
                               delta_dispersion_deg=d_angle_deg, delta_tilt_deg=d_tilt_deg)
    rendered = sim.render_event(spec)
    frames = rendered.frame_stack()
    station = rendered.station
    cam = station.camera
    geo = SpectralGeometry.from_station(dataclasses.replace(station, grating=written_grating(spec, station.grating)))
    assert abs(geo.grating.dispersion_angle_deg - SpectralGeometry.from_station(station).grating.dispersion_angle_deg) > 3
    track = find_track(frames, estimate_background(frames, camera=cam), geo, camera=cam,
                       orders=station.grating.orders)
    assert track, track.reason
    tx = np.array([t.x_mid_px for t in rendered.truths])
    ty = np.array([t.y_mid_px for t in rendered.truths])
    d = np.hypot(track.x_px - tx, track.y_px - ty)
    # saturated zeroth orders: the 1 px (as test_track.test_acceptance_against_simulator_truth)
    assert np.sqrt(np.nanmean(d ** 2)) <= 1.0
