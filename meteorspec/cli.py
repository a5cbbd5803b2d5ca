"""Command line: parses arguments and calls the public API, nothing more.

Commands
--------
``meteorspec process EVENT... --out DIR [--stations DIR]``
    Reduce events (event folders, ``event.toml`` files, or folders holding
    events at any depth) into ``DIR/<event id>.h5``.
``meteorspec simulate --out DIR [--preset NAME ...] [--random N --seed S]``
    Write synthetic events (the bundled sample set by default).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from . import __version__


def find_events(paths: Sequence[str | Path]) -> list[tuple[Path, Path]]:
    """Expand command-line paths into ``(event.toml, run root)`` pairs, sorted, no repeats.

    A folder without ``event.toml`` is searched at any depth; it is then the run
    root where the search for station files stops.
    """
    found: dict[Path, Path] = {}
    for raw in paths:
        path = Path(raw)
        if path.is_file():
            found.setdefault(path.resolve(), path.resolve().parent)
        elif (path / "event.toml").is_file():
            found.setdefault((path / "event.toml").resolve(), path.resolve())
        elif path.is_dir():
            for toml in sorted(path.rglob("event.toml")):
                found.setdefault(toml.resolve(), path.resolve())
        else:
            found.setdefault(path.resolve(), path.resolve().parent)  # reported as failed later
    return sorted(found.items())


def _cmd_process(args: argparse.Namespace) -> int:
    from .pipeline import process_event
    from .store import output_path, write_event

    events = find_events(args.events)
    if not events:
        print(f"meteorspec: no event.toml found under {' '.join(args.events)}", file=sys.stderr)
        return 2
    n_failed = 0
    for toml, root in events:
        result = process_event(toml, stations_dir=args.stations, run_root=root)
        out = write_event(output_path(args.out, result.event_id), result)
        line = f"{result.event_id}: {result.status}"
        if result.status == "failed":
            n_failed += 1
            line += f": {result.error}"
        elif result.flags:
            line += f" [{', '.join(result.flags)}]"
        print(f"{line} -> {out}")
    print(f"{len(events) - n_failed}/{len(events)} events processed without failure")
    return 1 if n_failed else 0


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


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="meteorspec", description="Reduce meteor spectra from grating cameras.")
    parser.add_argument("--version", action="version", version=f"meteorspec {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("process", help="reduce events into per-event HDF5 files")
    p.add_argument("events", nargs="+", help="event folders, event.toml files, or folders of events")
    p.add_argument("--out", required=True, help="output folder for <event id>.h5")
    p.add_argument("--stations", help="folder of <station>.toml files (default: search beside the events)")
    p.set_defaults(func=_cmd_process)

    s = sub.add_parser("simulate", help="write synthetic events from the forward model")
    s.add_argument("--out", required=True, help="folder for the event folders and stations/")
    s.add_argument("--preset", action="append", help="a sample preset to write (repeatable; default all)")
    s.add_argument("--random", type=int, default=0, metavar="N", help="write N seeded random events instead")
    s.add_argument("--seed", type=int, default=0, help="seed of the random set")
    s.add_argument("--perturb", action="store_true", help="random set: perturb the written grating values")
    s.add_argument("--truth", help="folder for truth JSON (default: OUT/truth)")
    s.set_defaults(func=_cmd_simulate)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
