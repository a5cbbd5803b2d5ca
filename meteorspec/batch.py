"""A whole night of events: find them, skip what is up to date, run the rest, keep a table.

One function, :func:`run_night`, takes the event files and runs :func:`run_event`
on each: serially in this process, on a local Dask cluster (``workers > 1``) or
on an existing Dask distributed cluster (``scheduler="tcp://host:port"``). The
same function runs in every case, so parallel output equals serial output.

Design
------
- **Workers write their own HDF5 file** (through :func:`meteorspec.store.write_event`,
  which is atomic) and return only a small :class:`EventRow`. The driver never
  holds spectra or frames, so it stays light for thousands of events, and no
  arrays cross the network on a cluster. Every event has its own output file,
  so workers never write the same file; duplicate event ids are caught in the
  driver before anything runs. On a cluster the event folders and ``out_dir``
  must be on a file system that every worker sees under the same path.
- **Up to date** means: the output exists and is readable, carries this
  software version, and records the same SHA-256 for every input (event,
  station, video, response) as the files now on disk. The check runs inside the
  task, so hashing is spread over the workers too. ``force=True`` redoes all.
- **Failures never stop the night**: bad input ends as ``failed`` with the
  pipeline's one-line reason; an unexpected exception inside a stage is caught
  in :func:`run_event` and recorded the same way; a worker process that dies is
  recorded by the driver.
- **A failure never replaces a result**: where the output already holds an
  ``ok`` or ``partial`` result (and its review log) from earlier inputs, a run
  that fails (an input since damaged, or ``force`` on one) leaves that file as
  it is and says so in its one-line reason; the failure is in the night table.
- **Killed runs**: outputs are renamed into place only when complete; stale
  temporary files (``.<name>.*.tmp``) from a killed run are removed at start,
  and the night table is rewritten atomically after events complete, so a
  killed run leaves only whole files. Run one batch per output folder at a time.

Dask is imported only here, and only when a cluster is used.
"""

from __future__ import annotations

import csv
import io
import logging
import math
import os
import sys
import tempfile
import time
import traceback
import uuid
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TextIO

from .version import software_version

NIGHT_TABLE = "night.csv"

# Imported by every local Dask worker as it starts.
PIPELINE_MODULE = "meteorspec.pipeline"

# Thread-count variables of the BLAS libraries numpy and scipy may load (see meteorspec.cli).
SINGLE_THREAD_BLAS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")

# Root attributes and composition values copied into the night table, in column order.
TABLE_COLUMNS = ("event_id", "status", "class", "na", "na_err", "mg", "mg_err", "fe", "fe_err",
                 "speed_km_s", "flags", "error", "output", "event")


@dataclass(frozen=True)
class EventJob:
    """One event to run: its ``event.toml``, where the station search stops, where output goes."""

    event_path: str
    run_root: str
    out_dir: str
    stations_dir: str | None = None
    force: bool = False


@dataclass(frozen=True)
class EventRow:
    """One line of the night table, plus what the batch did (``action``)."""

    event_id: str
    status: str                 # "ok", "partial", "failed" (or "pending" in an interim table)
    event: str                  # path of event.toml
    output: str = ""            # file name of the HDF5 output in out_dir ("" if none written)
    flags: tuple[str, ...] = ()
    error: str = ""
    klass: str = ""             # "class" in the table (a Python keyword)
    na: float = math.nan
    na_err: float = math.nan
    mg: float = math.nan
    mg_err: float = math.nan
    fe: float = math.nan
    fe_err: float = math.nan
    speed_km_s: float = math.nan
    action: str = "processed"   # "processed", "skipped" (up to date) or "not run"
    seconds: float = 0.0        # wall time of the task (not written to any file)

    def table_row(self) -> dict[str, str]:
        """The row as written to ``night.csv`` (numbers with full precision, NaN as empty)."""
        out: dict[str, str] = {}
        for col in TABLE_COLUMNS:
            value = getattr(self, "klass" if col == "class" else col)
            if col == "flags":
                value = ";".join(value)
            elif isinstance(value, float):
                value = "" if math.isnan(value) else repr(value)
            out[col] = str(value)
        return out


# --------------------------------------------------------------------------- finding events


def find_events(paths: Sequence[str | Path]) -> list[tuple[Path, Path]]:
    """Expand command-line paths into ``(event.toml, run root)`` pairs, sorted, no repeats.

    A folder without ``event.toml`` is searched at any depth; it is then the run
    root where the search for station files stops. An event named directly has
    the current folder as its run root when it lies below it (else the file-system
    root), so station files in its parent folders are found. A path that does not
    exist is kept, so that it is reported as a failed event.
    """
    cwd = Path.cwd().resolve()

    def direct_root(event_dir: Path) -> Path:
        return cwd if event_dir.is_relative_to(cwd) else Path(event_dir.anchor)

    found: dict[Path, Path] = {}
    for raw in paths:
        path = Path(raw)
        if path.is_file():
            found.setdefault(path.resolve(), direct_root(path.resolve().parent))
        elif (path / "event.toml").is_file():
            found.setdefault((path / "event.toml").resolve(), direct_root(path.resolve()))
        elif path.is_dir():
            for toml in sorted(path.rglob("event.toml")):
                found.setdefault(toml.resolve(), path.resolve())
        else:
            found.setdefault(path.resolve(), path.resolve().parent)
    return sorted(found.items())


def _expected_id(event_path: Path) -> str:
    """The event id the pipeline will use: from ``event.toml``, or the folder name if unreadable."""
    from .config import load_event
    from .errors import InputError

    try:
        return load_event(event_path).id
    except InputError:
        folder = event_path if event_path.is_dir() else event_path.parent
        return folder.name


# --------------------------------------------------------------------------- one event


def current_input_hashes(job: EventJob) -> dict[str, str] | None:
    """SHA-256 of every input file of the event as it is on disk now, by role.

    Returns ``None`` if the inputs cannot be resolved (the event will then be
    processed and fail with the pipeline's reason).
    """
    from .config import find_station_file, load_event, load_station
    from .errors import InputError
    from .pipeline import file_sha256

    try:
        event = load_event(job.event_path)
        station_path = find_station_file(event, stations_dir=job.stations_dir, run_root=job.run_root)
        station = load_station(station_path)
    except InputError:
        return None
    files = {"event": event.path, "station": station.path, "video": event.video}
    if station.response is not None:
        files["response"] = station.response.path
    try:
        return {role: file_sha256(Path(p)) for role, p in files.items()}
    except OSError:
        return None


def is_up_to_date(output: Path, job: EventJob) -> bool:
    """True if ``output`` was made by this software version from the inputs now on disk."""
    from .store import read_inputs

    if not output.is_file():
        return False
    try:
        version, recorded = read_inputs(output)
    except Exception:  # noqa: BLE001 - any unreadable file means "redo it"
        return False
    if version != software_version() or not recorded:
        return False
    return recorded == current_input_hashes(job)


def row_from_file(output: Path, *, event_path: str, action: str) -> EventRow:
    """The night-table row of a written event file."""
    from .store import read_summary

    s = read_summary(output)
    comp = s.get("composition", {})

    def num(key: str) -> float:
        try:
            return float(comp.get(key, math.nan))
        except (TypeError, ValueError):
            return math.nan

    return EventRow(event_id=str(s.get("event_id", output.stem)), status=str(s.get("status", "")),
                    event=event_path, output=output.name, flags=tuple(s.get("flags", ())),
                    error=str(s.get("error", "")), klass=str(comp.get("class", "")),
                    na=num("na"), na_err=num("na_err"), mg=num("mg"), mg_err=num("mg_err"),
                    fe=num("fe"), fe_err=num("fe_err"), speed_km_s=num("speed_km_s"), action=action)


def _one_line(exc: BaseException) -> str:
    return " ".join(f"{exc.__class__.__name__}: {exc}".split())


def run_event(job: EventJob) -> EventRow:
    """Process one event (or skip it if up to date) and write its HDF5 file.

    Never raises: bad input and unexpected errors inside a stage both end as a
    ``failed`` row with a one-line reason (and a ``failed`` file when one can be
    written without destroying a file we cannot read or an earlier result).
    """
    from .errors import InputError
    from .pipeline import process_event
    from .result import EventResult
    from .store import output_path, write_event

    t0 = time.perf_counter()
    event_path = Path(job.event_path)
    event_id = _expected_id(event_path)
    output = output_path(job.out_dir, event_id)
    try:
        if not job.force and is_up_to_date(output, job):
            return _timed(row_from_file(output, event_path=job.event_path, action="skipped"), t0)
        try:
            result = process_event(event_path, stations_dir=job.stations_dir, run_root=job.run_root)
        except Exception as exc:  # noqa: BLE001 - a bug in one stage must not stop the night
            logging.getLogger(__name__).debug("event %s raised\n%s", event_path, traceback.format_exc())
            result = EventResult(event_id=event_id, station="", start_utc="", software_version=software_version(),
                                 status="failed", error=f"{event_path}: internal error: {_one_line(exc)}")
        target = output_path(job.out_dir, result.event_id)
        kept = _result_status(target) if result.status == "failed" else None
        if kept is not None:
            return _timed(EventRow(event_id=result.event_id, status="failed", event=job.event_path,
                                   output=target.name, action="processed",
                                   error=f"{result.error}; {target.name} keeps its earlier {kept} result"), t0)
        written = write_event(target, result)
        return _timed(row_from_file(written, event_path=job.event_path, action="processed"), t0)
    except InputError as exc:  # e.g. an unreadable previous output that we refuse to overwrite
        return _timed(EventRow(event_id=event_id, status="failed", event=job.event_path, error=str(exc)), t0)
    except Exception as exc:  # noqa: BLE001
        return _timed(EventRow(event_id=event_id, status="failed", event=job.event_path,
                               error=f"{event_path}: {_one_line(exc)}"), t0)


def _result_status(output: Path) -> str | None:
    """``"ok"`` or ``"partial"`` when ``output`` is a readable event file holding a result, else None."""
    from .store import read_root

    if not output.is_file():
        return None
    try:
        status = str(read_root(output).get("status", ""))
    except Exception:  # noqa: BLE001 - unreadable: the store decides whether it may be replaced
        return None
    return status if status in ("ok", "partial") else None


def _timed(row: EventRow, t0: float) -> EventRow:
    return EventRow(**{**asdict(row), "seconds": time.perf_counter() - t0})


# --------------------------------------------------------------------------- the night table


def write_table(path: str | Path, rows: Iterable[EventRow]) -> Path:
    """Write the night table atomically (temporary file, then rename), rows sorted by event path."""
    path = Path(path)
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=TABLE_COLUMNS, lineterminator="\n")
    writer.writeheader()
    for row in sorted(rows, key=lambda r: r.event):
        writer.writerow(row.table_row())
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; the table is for everyone who reads the night
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(buf.getvalue())
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def read_table(path: str | Path) -> list[dict[str, str]]:
    """Rows of a night table as dictionaries of strings."""
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


def remove_stale_temporaries(out_dir: str | Path) -> list[Path]:
    """Delete hidden temporary files (``.<name>.*.tmp``) left by a killed run in ``out_dir``."""
    out = Path(out_dir)
    if not out.is_dir():
        return []
    stale = [p for p in out.glob(".*.tmp") if p.is_file()]
    for p in stale:
        p.unlink(missing_ok=True)
    return stale


# --------------------------------------------------------------------------- progress


class Progress:
    """Plain-text progress with ETA on a stream (stderr by default).

    On a terminal one line is redrawn in place; otherwise one line is written
    per finished event, so logs stay readable.
    """

    def __init__(self, total: int, *, stream: TextIO | None = None, width: int = 28,
                 clock: Callable[[], float] = time.monotonic):
        self.clock = clock
        self.total = total
        self.done = 0
        self.stream = sys.stderr if stream is None else stream
        self.width = width
        self.t0 = clock()
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())

    @staticmethod
    def _clock(seconds: float) -> str:
        if not math.isfinite(seconds):
            return "--:--"
        m, s = divmod(int(round(seconds)), 60)
        h, m = divmod(m, 60)
        return f"{h}:{m:02d}:{s:02d}" if h else f"{m:02d}:{s:02d}"

    def text(self) -> str:
        elapsed = self.clock() - self.t0
        eta = elapsed / self.done * (self.total - self.done) if self.done else math.nan
        frac = self.done / self.total if self.total else 1.0
        filled = int(round(frac * self.width))
        bar = "#" * filled + "." * (self.width - filled)
        return (f"[{bar}] {self.done}/{self.total} {100 * frac:3.0f}%  "
                f"elapsed {self._clock(elapsed)}  eta {self._clock(eta)}")

    def clear(self) -> None:
        if self.tty:
            self.stream.write("\r\x1b[K")
            self.stream.flush()

    def draw(self) -> None:
        if self.tty:
            self.stream.write("\r" + self.text())
            self.stream.flush()

    def step(self) -> None:
        self.done += 1
        if self.tty:
            self.draw()
        else:
            self.stream.write(self.text() + "\n")
            self.stream.flush()

    def close(self) -> None:
        if self.tty:
            self.stream.write("\n")
            self.stream.flush()


# --------------------------------------------------------------------------- the night


@dataclass
class NightResult:
    """What :func:`run_night` did: one row per event (sorted by event path) and the table file."""

    rows: list[EventRow] = field(default_factory=list)
    table: Path | None = None

    @property
    def n_failed(self) -> int:
        return sum(r.status == "failed" for r in self.rows)


def run_night(events: Sequence[tuple[str | Path, str | Path]], *, out_dir: str | Path,
              stations_dir: str | Path | None = None, workers: int = 1, scheduler: str | None = None,
              force: bool = False, on_row: Callable[[EventRow], None] | None = None,
              table_every_s: float = 1.0) -> NightResult:
    """Process a night of events into ``out_dir`` and write ``out_dir/night.csv``.

    Parameters
    ----------
    events : sequence of (event path, run root)
        As returned by :func:`find_events`.
    out_dir : str or Path
        Output folder for ``<event id>.h5`` and the night table.
    stations_dir : str or Path, optional
        Folder of station files (default: search beside the events).
    workers : int
        1: serial, in this process, no Dask. N > 1: a local Dask cluster of N
        single-threaded worker processes.
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:port``); overrides ``workers``.
    force : bool
        Redo events whose output is up to date.
    on_row : callable, optional
        Called in the driver with each finished :class:`EventRow`, in completion order.
    table_every_s : float
        The table is rewritten (atomically) at most this often while the night
        runs, and always at the end.

    Returns
    -------
    NightResult
    """
    if workers < 1:
        raise ValueError(f"workers must be >= 1, got {workers}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    remove_stale_temporaries(out)
    table_path = out / NIGHT_TABLE
    stations = None if stations_dir is None else str(Path(stations_dir).resolve())

    jobs: list[EventJob] = []
    rows: dict[str, EventRow] = {}
    seen: dict[str, str] = {}
    for event_path, root in events:
        event_path = str(Path(event_path).resolve())
        eid = _expected_id(Path(event_path))
        if eid in seen:  # two events would overwrite one output file
            rows[event_path] = EventRow(event_id=eid, status="failed", event=event_path, action="not run",
                                        error=f"{event_path}: event id {eid!r} is also used by {seen[eid]}")
            continue
        seen[eid] = event_path
        jobs.append(EventJob(event_path=event_path, run_root=str(Path(root).resolve()), out_dir=str(out.resolve()),
                             stations_dir=stations, force=force))
        rows[event_path] = EventRow(event_id=eid, status="pending", event=event_path, action="not run")

    last_table = -math.inf

    def finished(row: EventRow) -> None:
        nonlocal last_table
        rows[row.event] = row
        if on_row is not None:
            on_row(row)
        now = time.monotonic()
        if now - last_table >= table_every_s:
            write_table(table_path, rows.values())
            last_table = now

    for row in list(rows.values()):
        if row.status == "failed":
            finished(row)
    write_table(table_path, rows.values())  # a valid (all pending) table from the start

    if scheduler is None and workers == 1:
        for job in jobs:
            finished(run_event(job))
    else:
        _run_on_dask(jobs, finished, workers=workers, scheduler=scheduler)

    write_table(table_path, rows.values())
    return NightResult(rows=sorted(rows.values(), key=lambda r: r.event), table=table_path)


# Housekeeping timers of the scheduler, nannies, workers and client, set slower than distributed's
# defaults. Every timer wakes an event loop that takes the GIL (in a worker, from the event being
# processed) and a core (on a machine whose cores all run events). Measured on the 2-core machine,
# an idle LocalCluster of 2 workers with its client (30 s, psutil CPU times): the command's process
# 6.8 % of a core and each worker 2.5 % with the defaults; 0.8 % and 0.35 % with these. The
# event-loop watchdog tick (20 ms by default; it only warns about a blocked loop) is most of it.
# Work stealing is off: tasks wait on the scheduler until a worker is free (queuing), so there is
# nothing to steal, only a timer. The nanny's memory check (it restarts a worker above its memory
# limit) once a second is ample for events that take seconds.
QUIET_CLUSTER = {
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.tick.limit": "30s",
    "distributed.scheduler.work-stealing": False,
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.admin.system-monitor.interval": "5s",
}


def start_local_cluster(workers: int):
    """A Dask LocalCluster of ``workers`` single-threaded processes on the loopback interface.

    One thread per process: the stages are numpy/OpenCV code that holds the GIL for long
    stretches, and each process then owns one event's memory. Everything listens on the
    loopback interface only; the scheduler's HTTP server (which distributed starts even
    without a dashboard, by default on 0.0.0.0:8787) gets a free loopback port, so two
    nights on one machine do not collide.

    The workers' environment is set before they import numpy (the nanny's pre-spawn
    environment): single-threaded BLAS, as the command line sets for itself, so results
    match a serial run bit for bit; and not distributed's ``MALLOC_TRIM_THRESHOLD_=65536``,
    which makes glibc hand every large numpy buffer back to the OS (measured: one sample
    event 5.8 s -> 8.6 s); the pipeline allocates and frees large arrays per frame.

    Each worker imports the pipeline (numpy, scipy, astropy, OpenCV; about 1 s of CPU) while
    it starts, not inside its first event. The workers' statistical profiler (a thread that
    samples the running task's stack every 10 ms, for the dashboard) is off: nobody watches
    a night's dashboard, and the samples take the GIL from the event being processed. The
    cluster's housekeeping runs less often (:data:`QUIET_CLUSTER`).
    """
    import dask
    from distributed import LocalCluster

    pre_spawn = {key: value
                 for key, value in dask.config.get("distributed.nanny.pre-spawn-environ", default={}).items()
                 if key != "MALLOC_TRIM_THRESHOLD_"}
    pre_spawn.update({var: "1" for var in SINGLE_THREAD_BLAS})
    with dask.config.set({**QUIET_CLUSTER, "distributed.nanny.pre-spawn-environ": pre_spawn,
                          "distributed.worker.profile.enabled": False}):
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                            dashboard_address="127.0.0.1:0", host="127.0.0.1", silence_logs=logging.ERROR,
                            preload=[PIPELINE_MODULE])


def input_size_bytes(job: EventJob) -> int:
    """Bytes of the event's folder on disk (video file or frame folder): a cheap estimate of its cost.

    Decoding, background and extraction scale with the frames times pixels that the
    video holds; 0 if the folder cannot be read (the event then fails quickly anyway).
    """
    folder = Path(job.event_path).parent
    try:
        return sum(f.stat().st_size for f in folder.rglob("*") if f.is_file())
    except OSError:
        return 0


def _run_on_dask(jobs: list[EventJob], finished: Callable[[EventRow], None], *, workers: int,
                 scheduler: str | None) -> None:
    """Submit every job as a Dask future and hand rows to ``finished`` as they complete."""
    import dask
    from distributed import Client, as_completed

    if not jobs:
        return
    cluster = None
    with dask.config.set(QUIET_CLUSTER):  # the client's own timers too (on a remote cluster, only they)
        if scheduler is None:
            cluster = start_local_cluster(workers)
            client = Client(cluster)
        else:
            client = Client(scheduler)
    try:
        # A fresh key per submission: a re-run must run again (inputs may have changed on disk),
        # and two nights sent to one shared cluster must never be taken for the same task.
        run_id = uuid.uuid4().hex[:12]
        # Largest inputs first (longest processing time first): the last events of a night then
        # are short ones, so no worker idles for long while another finishes a fireball.
        order = sorted(range(len(jobs)), key=lambda i: -input_size_bytes(jobs[i]))
        futures = {client.submit(run_event, jobs[i], priority=len(jobs) - rank,
                                 key=f"meteorspec-{run_id}-{i}-{Path(jobs[i].event_path).parent.name}"): jobs[i]
                   for rank, i in enumerate(order)}
        for future in as_completed(futures):
            job = futures[future]
            try:
                row = future.result()
            except Exception as exc:  # noqa: BLE001 - e.g. a worker process killed by the OS
                row = EventRow(event_id=_expected_id(Path(job.event_path)), status="failed",
                               event=job.event_path, error=f"{job.event_path}: worker lost: {_one_line(exc)}")
            future.release()
            finished(row)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
