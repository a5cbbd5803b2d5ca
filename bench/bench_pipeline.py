"""Streaming cost of the front of the pipeline: decode, background, track, extract (issue 3 targets).

Targets, for a 1280 x 960 x 250-frame 8-bit event: peak memory at most 2x the
raw uint8 size of the video, time per event at most 1.5x the bare decode time.

Usage (from the top of the repository)::

    python bench/bench_pipeline.py [--cache DIR] [--frames 250] [--rounds 3] [--samples]

The event is simulated once (QM01 station, full 1280 x 960, lossless 8-bit
AVI) into ``--cache`` (default ``$TMPDIR/meteorspec-bench``) and reused. Each
measurement then runs in a fresh Python subprocess, so that nothing a previous
step allocated counts:

- ``decode``: the bare decode, a loop over :func:`read_raw_frames` that keeps
  nothing (the floor any reader must pay);
- ``pipeline``: :func:`read_stack` with the binned copy made while decoding
  (:class:`StoredFrameBinner`) and the saturated-pixel counts (:func:`frame_times`)
  ("read_stack"), :func:`estimate_background` ("background"), :func:`find_track`,
  :func:`refine_background` + :func:`find_track` again (:func:`remeasure_light_curve` when it
  loses the meteor) ("refine") and
  :func:`extract_spectra` as :func:`process_event` calls them, each timed;
- memory: the resident-set high-water mark (``VmHWM`` of ``/proc/self/status``,
  which restarts at exec, unlike ``ru_maxrss``) of the subprocess minus its
  value after the imports (the resident-set peak that the stages
  add, everything included: numpy, OpenCV buffers, Python objects), and in a
  separate run the ``tracemalloc`` peak (Python and numpy allocations only;
  tracemalloc slows the run, so its times are not used). The stored video cube is an
  anonymous memory map (``video._empty_cube``), which tracemalloc does not see: its
  figure is the memory of everything but the cube, and the resident-set figure is the
  one judged against the target.

Ratios printed: pipeline time / decode time, and peak memory / raw size. The CPU time of
both (``time.process_time``, every thread of the process) is printed beside the wall time:
the decoder (FFmpeg's FFV1) spreads over the second core when it is free, the stages after
it run on one, so on an otherwise idle machine the wall-time ratio is higher than the
CPU-time ratio. A night's batch keeps every core busy with one event per worker, and there
the CPU time is what an event costs.
With ``--samples`` every event of ``sample_events/`` is also timed through
the same stages. Timings only, no assertions (brief: targets are ratios
measured here, never timed tests).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]

_CHILD = r"""
import json, resource, sys, time, tracemalloc
sys.path.insert(0, {repo!r})
from meteorspec.background import StoredFrameBinner, bin_frames, estimate_background, refine_background
from meteorspec.config import find_station_file, load_event, load_station
from meteorspec.extract import extract_spectra
from meteorspec.optics import SpectralGeometry
from meteorspec.pipeline import frame_times, same_path
from meteorspec.track import find_track, remeasure_light_curve
from meteorspec.video import read_raw_frames, read_stack

mode, event_dir, use_tm = sys.argv[1], sys.argv[2], sys.argv[3] == "1"
event = load_event(event_dir)
station = load_station(find_station_file(event))
def hwm_kb():
    # VmHWM restarts at exec; ru_maxrss would carry the parent's peak over (Linux)
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
base_kb = hwm_kb()
if use_tm:
    tracemalloc.start()
out = {{}}
c0 = time.process_time()
t0 = time.perf_counter()
if mode == "decode":
    n = 0
    for raw in read_raw_frames(event.video, camera=station.camera):
        n += 1
    out["decode_s"] = time.perf_counter() - t0
    out["decode_cpu_s"] = time.process_time() - c0
    out["n_frames"] = n
    out["raw_bytes"] = n * raw.size * raw.itemsize
else:
    binner = StoredFrameBinner(station.camera, float(event.fps))
    stack = read_stack(event, station, on_frame=binner.add)
    frame_times(stack)  # the saturated-pixel count of every frame
    t1 = time.perf_counter()
    c1 = time.process_time()
    cam = station.camera
    geo = SpectralGeometry.from_station(station)
    orders = [o for o in station.grating.orders if o != 0]
    binned = binner.result()
    if binned is None:
        binned = bin_frames(stack, camera=cam)
    bg = estimate_background(stack, camera=cam, seed=0, binned=binned)
    t2 = time.perf_counter()
    tr = find_track(stack, bg, geo, camera=cam, orders=orders, seed=0, binned=binned)
    t3 = time.perf_counter()
    refined = refine_background(stack, bg, tr, geo, camera=cam, orders=orders) if tr else bg
    if refined is not bg:  # as pipeline.locate_meteor: the meteor tracked again against it
        again = find_track(stack, refined, geo, camera=cam, orders=orders, seed=0, binned=binned)
        tr = again if same_path(tr, again) else remeasure_light_curve(stack, refined, tr)
        bg = refined
    del binned
    t3r = time.perf_counter()
    fs = extract_spectra(stack, bg, tr, geo, camera=cam, order=orders[0]) if tr else None
    t4 = time.perf_counter()
    out.update(read_stack_s=t1 - t0, background_s=t2 - t1, track_s=t3 - t2, refine_s=t3r - t3,
               extract_s=t4 - t3r,
               total_s=t4 - t0, read_stack_cpu_s=c1 - c0, total_cpu_s=time.process_time() - c0, found=bool(tr), raw_bytes=int(stack.stored.nbytes),
               flags=list(fs.flags) if fs is not None else [])
out["maxrss_delta_bytes"] = (hwm_kb() - base_kb) * 1024
if use_tm:
    out["tracemalloc_peak_bytes"] = tracemalloc.get_traced_memory()[1]
print("RESULT " + json.dumps(out))
"""


def make_event(cache: Path, n_frames: int) -> Path:
    """Simulate the benchmark event once (deterministic spec) and return its folder."""
    from meteorspec.simulate import EventSpec, simulate_event

    spec = EventSpec(station="QM01", station_id="QM01-BENCH", start_utc="2026-11-14T02:00:00.000Z",
                     video_form="avi", fps=25.0, n_frames=n_frames, meteor_start_s=2.0,
                     meteor_duration_s=1.6, start_px=(300.0, 300.0), direction_deg=30.0, speed_deg_s=10.0,
                     peak_energy_adu_s=2.0e7, n_stars=40, sky_adu=5.0, seed=7)
    folder = cache / spec.event_id("QM01-BENCH")
    if not (folder / "event.toml").exists():
        t0 = time.perf_counter()
        simulate_event(spec, cache, truth_dir=cache / "truth")
        print(f"simulated {folder.name} ({n_frames} frames) in {time.perf_counter() - t0:.0f} s", flush=True)
    return folder


def run_child(mode: str, event_dir: Path, tracemalloc_on: bool = False) -> dict:
    code = _CHILD.format(repo=str(REPO))
    proc = subprocess.run([sys.executable, "-c", code, mode, str(event_dir), "1" if tracemalloc_on else "0"],
                          capture_output=True, text=True, check=False)
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"{mode} run failed:\n{proc.stderr[-2000:]}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cache", type=Path, default=Path(tempfile.gettempdir()) / "meteorspec-bench")
    ap.add_argument("--frames", type=int, default=250)
    ap.add_argument("--rounds", type=int, default=3, help="decode + pipeline rounds (median ratio reported)")
    ap.add_argument("--samples", action="store_true", help="also time every sample event")
    args = ap.parse_args(argv)
    sys.path.insert(0, str(REPO))
    event = make_event(args.cache, args.frames)
    # Rounds of (decode, pipeline) back to back: the machine's speed drifts by 10-40 % over
    # minutes, so each pipeline run is compared with the decode run just before it, and the
    # median of those ratios is the figure (the spread shows how far one round can be trusted).
    rounds = [(run_child("decode", event), run_child("pipeline", event)) for _ in range(args.rounds)]
    ratios = sorted(p["total_s"] / d["decode_s"] for d, p in rounds)
    cpu_ratios = sorted(p["total_cpu_s"] / d["decode_cpu_s"] for d, p in rounds)
    median_round = sorted(rounds, key=lambda r: r[1]["total_s"] / r[0]["decode_s"])[len(rounds) // 2]
    dec, pipe = median_round
    tm = run_child("pipeline", event, tracemalloc_on=True)
    raw = dec["raw_bytes"]
    mb = 1 / 2**20
    print(f"event {event.name}: {dec['n_frames']} frames, raw uint8 {raw * mb:.0f} MiB; "
          f"{args.rounds} rounds, the median one shown")
    print(f"bare decode          {dec['decode_s']:7.2f} s   (maxrss +{dec['maxrss_delta_bytes'] * mb:.0f} MiB)")
    for k in ("read_stack_s", "background_s", "track_s", "refine_s", "extract_s", "total_s"):
        print(f"{k[:-2]:20s} {pipe[k]:7.2f} s   {pipe[k] / dec['decode_s']:5.2f} x decode")
    print(f"time ratio per round (read_stack..extract / bare decode): {' '.join(f'{r:.2f}' for r in ratios)}; "
          f"median {statistics.median(ratios):.2f} (target <= 1.5)")
    print(f"CPU-time ratio per round: {' '.join(f'{r:.2f}' for r in cpu_ratios)}; median {statistics.median(cpu_ratios):.2f}")
    print(f"CPU-time ratio (all threads; read_stack {pipe['read_stack_cpu_s']:.2f} s, total {pipe['total_cpu_s']:.2f} s, "
          f"decode {dec['decode_cpu_s']:.2f} s): {pipe['total_cpu_s'] / dec['decode_cpu_s']:.2f}")
    print(f"peak memory, ru_maxrss delta: {pipe['maxrss_delta_bytes'] * mb:.0f} MiB = "
          f"{pipe['maxrss_delta_bytes'] / raw:.2f} x raw (target <= 2)")
    print(f"peak memory, tracemalloc:     {tm['tracemalloc_peak_bytes'] * mb:.0f} MiB = "
          f"{tm['tracemalloc_peak_bytes'] / raw:.2f} x raw (without the memory-mapped video cube)")
    print(f"track found: {pipe['found']}, extraction flags: {pipe['flags']}")
    if args.samples:
        for toml in sorted((REPO / "sample_events").glob("*/event.toml")):
            d = run_child("decode", toml.parent)
            p = run_child("pipeline", toml.parent)
            print(f"{toml.parent.name:28s} decode {d['decode_s']:.2f} s  pipeline {p['total_s']:.2f} s "
                  f"(bg {p['background_s']:.2f}, track {p['track_s']:.2f}, extract {p['extract_s']:.2f}) "
                  f"ratio {p['total_s'] / d['decode_s']:.1f}  maxrss {p['maxrss_delta_bytes'] / p['raw_bytes']:.1f} x raw")
    return 0


if __name__ == "__main__":
    sys.exit(main())
