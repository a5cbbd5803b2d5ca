"""Command line: parses arguments and calls the public API, nothing more.

Commands
--------
``meteorspec process EVENT... --out DIR [--stations DIR] [--workers N | --scheduler ADDRESS] [--force]``
    Reduce events (event folders, ``event.toml`` files, or folders holding
    events at any depth) into ``DIR/<event id>.h5`` and the night table
    ``DIR/night.csv``; events already up to date are skipped.
``meteorspec report OUT_DIR [--html DIR]``
    Static HTML night report (default ``OUT_DIR/report/index.html``).
``meteorspec show EVENT.h5``
    Text summary of one event file.
``meteorspec review EVENT.h5 [--frames A:B] [--drop-frames LIST] [--shift-nm NM] [--stretch F] [--pin SEEN=LINE]
[--reject-line LINE] [--ignore-nm LO-HI] [--verdict V --reviewer NAME --note TEXT] [--dry-run] [--figures DIR]
[--window] [--history]``
    Review one fireball by hand: correct frames, wavelength scale and line
    identifications, re-derive lines, plasma fit, composition and class from the
    stored per-frame spectra, and append the verdict to the event's ``/review`` log.
``meteorspec simulate --out DIR [--preset NAME ...] [--random N --seed S]``
    Write synthetic events (the bundled sample set by default).
``meteorspec response SOURCE --star X Y TEFF [--star ...] --out FILE [--station FILE | --stations DIR] [--force]``
    Derive a station response curve (contract section 3) from the first-order
    spectra of one or more stars of known effective temperature in an event or a
    clip (several stars are scaled to each other and combined).
"""

from __future__ import annotations

import os

# Small matrix steps dominate the fits; multithreaded BLAS only adds contention
# on the cores that worker processes already use. Set before numpy loads.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from . import __version__


def find_events(paths: Sequence[str | Path]) -> list[tuple[Path, Path]]:
    """Expand command-line paths into ``(event.toml, run root)`` pairs (see :func:`meteorspec.batch.find_events`)."""
    from .batch import find_events as _find

    return _find(paths)


def _cmd_process(args: argparse.Namespace) -> int:
    from .batch import Progress, run_night

    events = find_events(args.events)
    if not events:
        print(f"meteorspec: no event.toml found under {' '.join(args.events)}", file=sys.stderr)
        return 2
    if args.workers < 1:
        print(f"meteorspec: --workers must be at least 1, got {args.workers}", file=sys.stderr)
        return 2
    progress = Progress(len(events), stream=sys.stderr) if not args.quiet else None
    if progress is not None:
        progress.draw()  # on a terminal: the bar from the start (no-op in a log)
    out_dir = Path(args.out)

    def on_row(row) -> None:
        line = f"{row.event_id}: {row.status}"
        if row.status == "failed":
            line += f": {row.error}"
        elif row.flags:
            line += f" [{', '.join(row.flags)}]"
        if row.action == "skipped":
            line += " (up to date, skipped)"
        if row.output:
            line += f" -> {out_dir / row.output}"
        if progress is not None:
            progress.clear()
        print(line, flush=True)
        if progress is not None:
            progress.step()

    night = run_night(events, out_dir=out_dir, stations_dir=args.stations, workers=args.workers,
                      scheduler=args.scheduler, force=args.force, on_row=on_row)
    if progress is not None:
        progress.close()
    n = len(night.rows)
    print(f"{n - night.n_failed}/{n} events processed without failure; table: {night.table}")
    return 1 if night.n_failed else 0


def _cmd_report(args: argparse.Namespace) -> int:
    from .report import write_report

    try:
        index = write_report(args.out_dir, report_dir=args.html)
    except (FileNotFoundError, NotADirectoryError) as exc:
        print(f"meteorspec: {exc}", file=sys.stderr)
        return 2
    print(f"report: {index}")
    return 0


def _cmd_show(args: argparse.Namespace) -> int:
    from .errors import InputError
    from .show import summarise

    try:
        print(summarise(args.event_file))
    except InputError as exc:
        print(f"meteorspec: {exc}", file=sys.stderr)
        return 2
    return 0


def _cmd_review(args: argparse.Namespace) -> int:
    from .errors import InputError
    from .review import build_corrections, compare_text, open_event, review_event
    from .review.desk import has_display, history_text, run_desk, write_figures

    path = Path(args.event_file)
    try:
        corrections = build_corrections(path, frames=args.frames, drop_frames=args.drop_frames,
                                        shift_nm=args.shift_nm, stretch=args.stretch, pins=tuple(args.pin or ()),
                                        reject=tuple(args.reject_line or ()), ignore_nm=tuple(args.ignore_nm or ()))
        view = open_event(path)
        if args.history:
            print(history_text(path))
            if corrections.is_empty and args.verdict is None and not (args.window or args.figures):
                return 0
        verdict = args.verdict
        figures = args.figures
        if args.window and not has_display():
            figures = figures if figures is not None else str(path.with_name(f"{path.stem}_review"))
            print(f"no display for the review window: figures go to {figures} instead")
        elif args.window:
            choice = run_desk(view, corrections)
            if choice is None:
                print("meteorspec: review window closed without a decision; nothing recorded")
                return 0
            corrections, verdict = choice.corrections, choice.verdict or verdict
        outcome = review_event(path, corrections, verdict=verdict, reviewer=args.reviewer,
                               note=args.note or "", dry_run=args.dry_run, view=view)
        if figures:
            for figure in write_figures(view, outcome.rework, figures):
                print(f"figure: {figure}")
    except InputError as exc:
        print(f"meteorspec: {exc}", file=sys.stderr)
        return 2
    print(compare_text(outcome))
    if outcome.written is not None:
        print(f"recorded: {path}:/review/{outcome.written} ({verdict}, {args.reviewer.strip()})")
    elif args.dry_run:
        print("dry run: nothing written" + (f" (would record /review entry: {verdict})" if verdict else ""))
    elif verdict is None:
        print("nothing recorded: give --verdict and --reviewer to record this review")
    return 0


def _cmd_simulate(args: argparse.Namespace) -> int:
    from .simulate import SAMPLE_SPECS, random_specs, simulate_event, write_samples

    out = Path(args.out)
    if args.random:
        truth = Path(args.truth) if args.truth else out / "truth"
        for spec in random_specs(args.random, seed=args.seed, perturb=args.perturb):
            sim = simulate_event(spec, out, truth_dir=truth)
            print(f"wrote {sim.event_dir}")
        return 0
    names = args.preset or None
    unknown = [n for n in names or [] if n not in SAMPLE_SPECS]
    if unknown:
        print(f"meteorspec: unknown preset {', '.join(unknown)}; known: {', '.join(SAMPLE_SPECS)}",
              file=sys.stderr)
        return 2
    for sim in write_samples(out, names):
        print(f"wrote {sim.event_dir}")
    return 0


def _cmd_calibrate(args: argparse.Namespace) -> int:
    from .calibrate import calibrate_event, calibrate_night
    from .config import find_station_file, load_event, load_station
    from .errors import InputError
    from .optics import SpectralGeometry
    from .pipeline import locate_meteor, recorded_orders
    from .startrace import StarTraces, measure_star_traces
    from .video import read_stack

    by_station: dict[str, tuple] = {}
    ridges: dict[str, list] = {}
    for toml, root in find_events(args.events):
        try:
            event = load_event(toml)
            station = load_station(find_station_file(event, stations_dir=args.stations, run_root=root))
            stack = read_stack(event, station)
        except InputError as exc:
            print(f"skipped: {exc}")
            continue
        background, track = locate_meteor(stack, station)
        if not args.no_stars:
            # the stars are there whether or not a meteor was found
            traces = measure_star_traces(background.level_adu, background.noise_adu,
                                         SpectralGeometry.from_station(station), n_frames=len(background.frames_used),
                                         sky_adu=background.sky_adu, order=recorded_orders(station)[0], event=event.id)
            ridges.setdefault(station.id, []).append(traces)
            if len(traces):
                print(f"{event.id}: {traces.n_stars} star ridges ({len(traces)} points)")
        if not track:
            print(f"{event.id}: no meteor ({track.reason})")
            continue
        solution = calibrate_event(stack, background, track, SpectralGeometry.from_station(station),
                                   camera=station.camera, order=recorded_orders(station)[0], event=event.id,
                                   response=station.response)
        print(f"{event.id}: {solution.source}, {solution.n_lines} lines, rms {solution.rms_nm:.3f} nm")
        by_station.setdefault(station.id, (station, []))[1].append(solution)
    if not by_station:
        print("meteorspec: no event could be calibrated", file=sys.stderr)
        return 1
    status = 0
    for station, solutions in by_station.values():
        try:
            night = calibrate_night(solutions, station, fit_lens=not args.fix_lens, date=args.date,
                                    out_dir=args.out_dir, traces=StarTraces.concat(ridges.get(station.id, [])),
                                    order=recorded_orders(station)[0])
        except ValueError as exc:
            print(f"{station.id}: not refined: {exc}")
            status = 1
            continue
        print(night.report())
    return status


def _cmd_response(args: argparse.Namespace) -> int:
    import numpy as np

    from .errors import InputError
    from .extinction import ExtinctionModel
    from .optics import SpectralGeometry
    from .starspec import (TEMPERATURE_RANGE_K, combine_responses, open_clip, stack_clip, star_region,
                           star_response)

    out = Path(args.out)
    source = Path(args.source)
    try:
        if out.exists() and not args.force:
            raise InputError(out, "already exists; use --force to replace it")
        if out.is_dir():
            raise InputError(out, "is a folder; give the response file name")
        if args.station is not None and args.stations is not None:
            raise InputError(args.station, "give either --station or --stations, not both")
        video, station = open_clip(source, station_file=args.station, stations_dir=args.stations)
        lo_k, hi_k = TEMPERATURE_RANGE_K
        camera = station.camera
        for x_px, y_px, temperature_k in args.star:
            if not lo_k <= temperature_k <= hi_k:  # also false for NaN
                raise InputError(source, f"star temperature {temperature_k:g} K is not within "
                                 f"{lo_k:.0f}-{hi_k:.0f} K")
            if not (-0.5 <= x_px <= camera.width - 0.5 and -0.5 <= y_px <= camera.height - 0.5):
                raise InputError(video, f"star position ({x_px:g}, {y_px:g}) is outside the "
                                 f"{camera.width}x{camera.height} frame")
        if not (args.smooth_nm > 0 and args.step_nm > 0):  # also false for NaN
            raise InputError(source, "--smooth-nm and --step-nm must be positive")
        extinction = None
        if args.extinction:
            if station.pointing is None:
                raise InputError(station.path, "no [pointing] section: cannot correct extinction (drop --extinction)",
                                 key="[pointing]")
            extinction = ExtinctionModel.for_station(station)
        geometry = SpectralGeometry.from_station(station)
        stacks = [stack_clip(video, camera=camera, method=args.stack,
                             region=star_region(geometry, x_px, y_px, camera=camera, order=station.grating.orders[0]))
                  for x_px, y_px, _ in args.star]
    except InputError as exc:
        print(f"meteorspec: {exc}", file=sys.stderr)
        return 2
    results = []
    for (x_px, y_px, temperature_k), stack in zip(args.star, stacks):
        try:
            results.append(star_response(stack, station, x_px, y_px, temperature_k, geometry=geometry,
                                         extinction=extinction, smooth_nm=args.smooth_nm, step_nm=args.step_nm))
        except ValueError as exc:
            print(f"meteorspec: {video}: star near ({x_px:g}, {y_px:g}): {exc}", file=sys.stderr)
            return 1
    for k, (result, stack) in enumerate(zip(results, stacks), start=1):
        star = result.star
        alt = "" if result.altitude_deg != result.altitude_deg else f", altitude {result.altitude_deg:.1f} deg"
        label = "star" if len(results) == 1 else f"star {k}"
        print(f"{label}: zeroth order at ({star.x_px:.2f}, {star.y_px:.2f}), PSF sigma {star.psf_sigma_px:.2f} px{alt}, "
              f"{stack.n_frames} frames stacked ({stack.method}), spectrum SNR {star.snr:.0f}, "
              f"{result.temperature_k:.0f} K, {result.response.wavelength_nm[0]:.0f}-"
              f"{result.response.wavelength_nm[-1]:.0f} nm"
              + (f" [{', '.join(result.flags)}]" if result.flags else ""))
        if "star_trace_offset" in result.flags:
            print(f"note: the light of {label} runs up to {star.trace_offset_px:.1f} px beside the curve the station "
                  "file predicts (aperture widened); refine the grating values with 'meteorspec calibrate'")
    if len(results) == 1:
        resp = results[0].response
        comment = None
    else:
        try:
            combined = combine_responses([r.response for r in results])
        except ValueError as exc:
            print(f"meteorspec: {video}: {exc}", file=sys.stderr)
            return 1
        resp = combined.response
        for k, (scale, n_rows, rms, worst, used) in enumerate(zip(
                combined.scale, combined.n_rows, combined.agreement_rms, combined.agreement_max, combined.used),
                start=1):
            print(f"star {k}: scale {scale:.4g}, {n_rows} rows, deviation from the other stars "
                  f"{rms:.1f} sigma rms, {worst:.1f} sigma at most" + ("" if used else " [left out]"))
        odd = np.flatnonzero(combined.disagreeing())
        if len(results) == 2 and odd.size:  # two stars: either may be the wrong one
            print("note: the two stars disagree by more than 4 sigma: check their temperatures, and that no "
                  "other star's light falls on their spectra")
        elif odd.size:
            names = ", ".join(str(k + 1) for k in odd)
            print(f"note: star(s) {names} disagree with the others by more than 4 sigma (left out of the curve "
                  "where the rest still overlap): check the temperature, and that no other star's light falls "
                  "on the spectrum")
        temps = ", ".join(f"{r.temperature_k:.0f}" for r, u in zip(results, combined.used) if u)
        comment = f"combined by meteorspec from {int(combined.used.sum())} black-body stars ({temps} K)"
    try:
        resp.write_csv(out, overwrite=args.force, comment=comment)
    except FileExistsError:
        print(f"meteorspec: {out}: already exists; use --force to replace it", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"meteorspec: {out}: cannot write ({exc.strerror or exc.__class__.__name__})", file=sys.stderr)
        return 2
    rel = resp.response_err / resp.response
    source_text = (f"{results[0].temperature_k:.0f} K black body" if len(results) == 1
                   else f"{int(combined.used.sum())} of {len(results)} stars combined")
    print(f"wrote {out}: {resp.wavelength_nm.size} rows, {resp.wavelength_nm[0]:.0f}-{resp.wavelength_nm[-1]:.0f} nm, "
          f"{source_text}, 1-sigma {100 * float(np.median(rel)):.1f} % typical, "
          f"{100 * float(np.max(rel)):.1f} % at worst")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="meteorspec", description="Reduce meteor spectra from grating cameras.")
    parser.add_argument("--version", action="version", version=f"meteorspec {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("process", help="reduce events into per-event HDF5 files")
    p.add_argument("events", nargs="+", help="event folders, event.toml files, or folders of events")
    p.add_argument("--out", required=True, help="output folder for <event id>.h5")
    p.add_argument("--stations", help="folder of <station>.toml files (default: search beside the events)")
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="worker processes on this machine (default 1: serial, no Dask)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on an existing Dask cluster, e.g. tcp://10.0.0.5:8786 (overrides --workers)")
    p.add_argument("--force", action="store_true", help="redo events whose output is up to date")
    p.add_argument("--quiet", action="store_true", help="no progress bar (result lines only)")
    p.set_defaults(func=_cmd_process)

    r = sub.add_parser("report", help="write a static HTML night report from a folder of event files")
    r.add_argument("out_dir", help="folder holding <event id>.h5 (and night.csv) from 'process'")
    r.add_argument("--html", help="folder for the report (default: OUT_DIR/report)")
    r.set_defaults(func=_cmd_report)

    w = sub.add_parser("show", help="print a text summary of one event file")
    w.add_argument("event_file", help="an <event id>.h5 file")
    w.set_defaults(func=_cmd_show)

    v = sub.add_parser("review", help="review one fireball by hand and record the verdict in its event file")
    v.add_argument("event_file", help="an <event id>.h5 file")
    g = v.add_argument_group("frames (rows of /spectrum/per_frame, counted from 0)")
    g.add_argument("--frames", metavar="FIRST:LAST", help="use only this span of frames (inclusive; 5: or :20 "
                                                         "leave one end open)")
    g.add_argument("--drop-frames", metavar="LIST", help="leave these frames out, e.g. 12,17-19 (an aircraft, "
                                                         "a saturated flare)")
    g = v.add_argument_group("wavelength scale (new = old + shift + (stretch - 1)(old - 550 nm))")
    g.add_argument("--shift-nm", type=float, metavar="NM", help="add NM to every wavelength")
    g.add_argument("--stretch", type=float, metavar="FACTOR", help="scale wavelength offsets from 550 nm")
    g.add_argument("--pin", action="append", metavar="SEEN=LINE",
                   help="the peak seen near SEEN nm is LINE, e.g. '515.2=Mg I 517.3' or '515.2=517.268' "
                        "(repeatable: one pin shifts, two or more also stretch)")
    g = v.add_argument_group("lines")
    g.add_argument("--reject-line", action="append", metavar="LINE",
                   help="rule out a line identification for this event, e.g. 'Fe I 527.0' (repeatable)")
    g.add_argument("--ignore-nm", action="append", metavar="LO-HI",
                   help="leave a wavelength span out of the fit, e.g. 655-658 (repeatable)")
    g = v.add_argument_group("decision (recorded in /review; nothing is written without --verdict)")
    g.add_argument("--verdict", choices=("accepted", "rejected", "another-look"),
                   help="accepted, rejected, or another-look (needs another look)")
    g.add_argument("--reviewer", metavar="NAME", help="who reviewed (required with --verdict)")
    g.add_argument("--note", metavar="TEXT", help="why, in a sentence")
    g = v.add_argument_group("looking")
    g.add_argument("--dry-run", action="store_true", help="re-derive and print what would change; write nothing")
    g.add_argument("--figures", metavar="DIR", help="write the review figures (PNG) to DIR")
    g.add_argument("--window", action="store_true",
                   help="open the interactive review window (press h in it for the keys); without a display "
                        "the figures are written instead (to --figures DIR, default <event>_review/)")
    g.add_argument("--history", action="store_true", help="print the event's review log first")
    v.set_defaults(func=_cmd_review)

    c = sub.add_parser("calibrate", help="refine each station's grating (and lens) from a night of events")
    c.add_argument("events", nargs="+", help="event folders, event.toml files, or folders of events")
    c.add_argument("--stations", help="folder of <station>.toml files (default: search beside the events)")
    c.add_argument("--date", help="YYYYMMDD for the new file name (default: today, UTC)")
    c.add_argument("--fix-lens", action="store_true", help="keep focal_px and k1 at the station values")
    c.add_argument("--out-dir", help="folder for <id>.refined-<date>.toml (default: beside the station file)")
    c.add_argument("--no-stars", action="store_true",
                   help="leave out the ridges of the stars' first-order spectra in the events' backgrounds")
    c.set_defaults(func=_cmd_calibrate)

    s = sub.add_parser("simulate", help="write synthetic events from the forward model")
    s.add_argument("--out", required=True, help="folder for the event folders and stations/")
    s.add_argument("--preset", action="append", help="a sample preset to write (repeatable; default all)")
    s.add_argument("--random", type=int, default=0, metavar="N", help="write N seeded random events instead")
    s.add_argument("--seed", type=int, default=0, help="seed of the random set")
    s.add_argument("--perturb", action="store_true", help="random set: perturb the written grating values")
    s.add_argument("--truth", help="folder for truth JSON (default: OUT/truth)")
    s.set_defaults(func=_cmd_simulate)

    rs = sub.add_parser("response", help="derive a station response curve from a star of known temperature")
    rs.add_argument("source", help="an event folder (or its event.toml), or a clip: a video file or a folder "
                                   "of numbered frames")
    rs.add_argument("--star", nargs=3, type=float, required=True, action="append", metavar=("X", "Y", "TEFF"),
                    help="approximate zeroth-order pixel of the star and its effective temperature in K; "
                         "repeat for several stars (their curves are scaled to each other and combined)")
    rs.add_argument("--out", required=True, metavar="FILE",
                    help="response file to write (CSV wavelength_nm,response)")
    rs.add_argument("--station", metavar="FILE",
                    help="station file (required for a clip; for an event, default: found as 'process' does)")
    rs.add_argument("--stations", metavar="DIR", help="folder of <station>.toml files, for an event")
    rs.add_argument("--stack", choices=("clipped", "mean", "median"), default="clipped",
                    help="how frames are combined per pixel (default: clipped mean)")
    rs.add_argument("--extinction", action="store_true",
                    help="divide out the atmosphere towards the star (needs [pointing] in the station file)")
    rs.add_argument("--smooth-nm", type=float, default=25.0, metavar="NM",
                    help="smoothing scale of the curve (default 25)")
    rs.add_argument("--step-nm", type=float, default=5.0, metavar="NM",
                    help="row spacing of the written curve (default 5)")
    rs.add_argument("--force", action="store_true", help="replace an existing response file")
    rs.set_defaults(func=_cmd_response)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
