"""Batch runner: a failing event never stops the night, resumable, parallel equals serial."""

from __future__ import annotations

from pathlib import Path

import numpy as np

STATION_TOML = """\
# Invented test camera (not part of the demo network): small frames keep the tests fast.
[station]
id = "{sid}"

[camera]
width = 64
height = 48
bit_depth = 8
gamma = 1.0
saturation_adu = 255
interlaced = false

[lens]
projection = "equidistant"
focal_px = 60.0
cx = 31.5
cy = 23.5

[grating]
grooves_per_mm = 300.0
dispersion_angle_deg = 0.0
"""

EVENT_TOML = """\
[event]
id = "{eid}"
station = "{sid}"
start_utc = "2026-11-14T03:{minute:02d}:00.000Z"
fps = 25.0
video = "video.fits"
"""


def make_night(root: Path, n_events: int, *, corrupt: int = 0, seed: int = 0, n_frames: int = 12,
               first: int = 0) -> list[Path]:
    """A small invented night: ``n_events`` event folders two levels deep, one shared station file.

    Each video is seeded sky noise without a meteor: the pipeline reads it, models
    the background, finds no meteor and flags the later stages as missing, all in
    about 0.05 s. That is all the batch machinery needs (outputs, hashes, table,
    failures); the science stages run on the real sample events (:func:`sample_night`).
    The last ``corrupt`` events get a video file that is not a FITS file at all.
    Event ids count from ``first`` (``20261114T03<first>00Z_TB01``, ...).
    """
    from meteorspec.config import load_station
    from meteorspec.video import write_video

    rng = np.random.default_rng(seed)
    root.mkdir(parents=True, exist_ok=True)
    (root / "stations").mkdir(exist_ok=True)
    sid = "TB01"
    (root / "stations" / f"{sid}.toml").write_text(STATION_TOML.format(sid=sid))
    camera = load_station(root / "stations" / f"{sid}.toml").camera
    folders = []
    for i in range(first, first + n_events):
        eid = f"20261114T03{i:02d}00Z_{sid}"
        folder = root / "cam" / f"ev{i:03d}"
        folder.mkdir(parents=True)
        (folder / "event.toml").write_text(EVENT_TOML.format(eid=eid, sid=sid, minute=i))
        if i >= first + n_events - corrupt:
            (folder / "video.fits").write_bytes(b"this is not a FITS cube\n" * 10)
        else:
            frames = rng.normal(20.0, 2.0, size=(n_frames, camera.height, camera.width))
            write_video(folder / "video.fits", np.clip(np.rint(frames), 0, 255).astype(np.uint8),
                        camera=camera, fps=25.0)
        folders.append(folder)
    return folders


# --------------------------------------------------------------------------- helpers

import contextlib
import io
import math
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass

import h5py
import pytest

from meteorspec import batch
from meteorspec.batch import EventRow, Progress, find_events, read_table, run_night
from meteorspec.cli import main

REPO = Path(__file__).resolve().parents[1]


def hdf5_differences(a: Path, b: Path) -> list[str]:
    """Every difference between two HDF5 files in structure, datasets and attributes.

    Bytes are not compared: HDF5 files hold object addresses and free-space
    layout that legitimately differ between equal contents.
    """
    diffs: list[str] = []

    def same(x, y) -> bool:
        x, y = np.asarray(x), np.asarray(y)
        if x.shape != y.shape or x.dtype.kind != y.dtype.kind:
            return False
        if x.dtype.names:
            return all(same(x[n], y[n]) for n in x.dtype.names)
        if x.dtype.kind in "fc":
            return bool(np.array_equal(x, y, equal_nan=True))
        return bool(np.array_equal(x, y))

    def walk(ga: h5py.Group, gb: h5py.Group) -> None:
        for key in sorted(set(ga.attrs) | set(gb.attrs)):
            if key not in ga.attrs or key not in gb.attrs or not same(ga.attrs[key], gb.attrs[key]):
                diffs.append(f"{ga.name} attribute {key}")
        for name in sorted(set(ga) | set(gb)):
            if name not in ga or name not in gb:
                diffs.append(f"{ga.name}/{name} present in one file only")
                continue
            oa, ob = ga[name], gb[name]
            if isinstance(oa, h5py.Group) and isinstance(ob, h5py.Group):
                walk(oa, ob)
            elif isinstance(oa, h5py.Dataset) and isinstance(ob, h5py.Dataset):
                if not same(oa[()], ob[()]):
                    diffs.append(f"{oa.name} data")
                walk_attrs = [k for k in sorted(set(oa.attrs) | set(ob.attrs))
                              if k not in oa.attrs or k not in ob.attrs or not same(oa.attrs[k], ob.attrs[k])]
                diffs.extend(f"{oa.name} attribute {k}" for k in walk_attrs)
            else:
                diffs.append(f"{oa.name} kind differs")

    with h5py.File(a, "r") as fa, h5py.File(b, "r") as fb:
        walk(fa, fb)
    return diffs


def assert_same_outputs(dir_a: Path, dir_b: Path) -> None:
    from meteorspec.store import read_root

    names_a = sorted(p.name for p in dir_a.glob("*.h5"))
    assert names_a == sorted(p.name for p in dir_b.glob("*.h5"))
    assert names_a
    for name in names_a:
        diffs = hdf5_differences(dir_a / name, dir_b / name)
        a, b = read_root(dir_a / name), read_root(dir_b / name)
        why = ""
        if a["software_version"] != b["software_version"]:
            why = " (different software versions: the meteorspec source was edited between the two runs)"
        elif a["status"] != b["status"]:
            why = f" (status {a['status']!r}: {a['error']!r} versus {b['status']!r}: {b['error']!r})"
        assert diffs == [], f"{name}: {diffs}{why}"
    assert (dir_a / "night.csv").read_text() == (dir_b / "night.csv").read_text()


def _no_temporaries(out: Path) -> None:
    assert [p.name for p in out.iterdir() if p.name.endswith(".tmp")] == []


# --------------------------------------------------------------------------- the sample night

# The two cheapest bundled sample events (CPU time of `pipeline.process_event` on this 2-core
# machine with nothing else running: about 20 s and 18 s, half or more of it the plasma fit and
# its group-error bootstrap; the other three take 23-42 s each). Both run every stage. Together
# with an invented sky without a meteor and a corrupt video they are the night that every batch,
# report and show test reads; the first is processed once more with its plasma fit forced to fail.
SAMPLE_SUBSET = ("20260812T015840Z_QM01", "20261113T230251Z_QM03")
BLANK_ID, CORRUPT_ID = "20261114T030000Z_TB01", "20261114T030100Z_TB01"


@dataclass(frozen=True)
class SampleNight:
    """A night processed once, serially, through the command line."""

    root: Path          # the input night: sample/<event>/, sample/stations/, invented/cam/ev000, ev001
    out: Path           # serial outputs: <event id>.h5 and night.csv (read only: tests copy what they change)
    exit_code: int
    stdout: str


_SAMPLE_NIGHT: dict[str, SampleNight] = {}


@pytest.fixture(scope="session")
def sample_night(tmp_path_factory) -> SampleNight:
    """Two real sample events, a blank sky and a corrupt video, processed once per test session.

    The expensive part of the night (every stage on real events) runs once; the
    parallel test compares against these outputs and the report and show tests
    read them. Memoised at module level because test_report and test_show import
    this fixture, which gives each importing module its own fixture definition.
    """
    if "night" not in _SAMPLE_NIGHT:
        missing = [n for n in SAMPLE_SUBSET if not (REPO / "sample_events" / n / "event.toml").is_file()]
        if missing:
            pytest.skip(f"sample events {', '.join(missing)} not found "
                        "(written by 'meteorspec simulate --out sample_events')")
        base = tmp_path_factory.mktemp("sample_night")
        root = base / "night"
        for name in (*SAMPLE_SUBSET, "stations"):
            shutil.copytree(REPO / "sample_events" / name, root / "sample" / name)
        make_night(root / "invented", 2, corrupt=1)
        out = base / "serial"
        buf = io.StringIO()
        with contextlib.redirect_stdout(buf):
            code = main(["process", str(root), "--out", str(out), "--quiet"])
        _SAMPLE_NIGHT["night"] = SampleNight(root=root, out=out, exit_code=code, stdout=buf.getvalue())
    return _SAMPLE_NIGHT["night"]


@pytest.fixture(scope="session")
def no_plasma_output(sample_night) -> Path:
    """The first sample event processed again with the plasma fit forced to fail.

    No sample event fails its fit any more (a saturated one falls back to its unsaturated
    frames), yet show and the report must say why a composition is missing; the pipeline's
    own failure path is taken by making both fits return their failed result. Written into
    its own folder, so the shared outputs stay untouched.
    """
    if "no_plasma" not in _SAMPLE_NIGHT:
        from meteorspec import pipeline
        from meteorspec.plasma import PlasmaFit
        from meteorspec.store import output_path, write_event

        out = sample_night.out.parent / "no_plasma"
        event = sample_night.root / "sample" / SAMPLE_SUBSET[0] / "event.toml"
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(pipeline, "fit_plasma", lambda *a, **k: PlasmaFit.failed("forced by the test: no convergence"))
            mp.setattr(pipeline, "fit_unsaturated_frames", lambda *a, **k: None)
            result = pipeline.process_event(event, run_root=sample_night.root)
        _SAMPLE_NIGHT["no_plasma"] = write_event(output_path(out, result.event_id), result)
    return _SAMPLE_NIGHT["no_plasma"]


# --------------------------------------------------------------------------- tests


def test_hdf5_comparison_sees_a_changed_value(tmp_path):
    # the comparison helper must not pass everything: a one-ulp change is seen
    for name, value in (("a.h5", 1.0), ("b.h5", np.nextafter(1.0, 2.0))):
        with h5py.File(tmp_path / name, "w") as f:
            f.create_dataset("g/x", data=[0.0, value])
            f["g"].attrs["n"] = 1
    assert hdf5_differences(tmp_path / "a.h5", tmp_path / "b.h5") == ["/g/x data"]
    assert hdf5_differences(tmp_path / "a.h5", tmp_path / "a.h5") == []


def test_a_corrupt_event_fails_with_one_line_and_the_night_goes_on(sample_night):
    from meteorspec.store import read_root

    out = sample_night.out
    assert sample_night.exit_code == 1  # one failed event
    table = read_table(out / "night.csv")
    assert list(table[0]) == list(batch.TABLE_COLUMNS)
    assert [r["event_id"] for r in table] == [BLANK_ID, CORRUPT_ID, *SAMPLE_SUBSET]  # sorted by event path
    by_id = {r["event_id"]: r for r in table}
    bad = by_id.pop(CORRUPT_ID)
    assert bad["status"] == "failed"
    assert "ev001" in bad["error"] and "video.fits" in bad["error"] and "\n" not in bad["error"]
    printed = [ln for ln in sample_night.stdout.splitlines() if ln.startswith(f"{CORRUPT_ID}: ")]
    assert printed == [f"{CORRUPT_ID}: failed: {bad['error']} -> {out / bad['output']}"]
    # the failed event also has its file, saying why
    root = read_root(out / bad["output"])
    assert root["status"] == "failed" and root["error"] == bad["error"]
    # the night went on: every other event has its whole file, and a real one ran every stage
    for eid, row in by_id.items():
        assert row["status"] in ("ok", "partial") and row["error"] == "", eid
        assert read_root(out / row["output"])["status"] == row["status"]
    assert "ok" in {by_id[e]["status"] for e in SAMPLE_SUBSET}


def test_exit_code_and_lines_of_the_command(tmp_path, capsys):
    make_night(tmp_path / "night", 2, corrupt=1)
    assert main(["process", str(tmp_path / "night"), "--out", str(tmp_path / "out")]) == 1
    out = capsys.readouterr()
    lines = out.out.strip().splitlines()
    assert len(lines) == 3 and "failed: " in lines[1] and lines[2].startswith("1/2 events")
    # stderr is not a terminal under pytest: one progress line per event, with an ETA
    progress = [ln for ln in out.err.splitlines() if ln.startswith("[")]
    assert len(progress) == 2 and all("eta" in ln for ln in progress)


def test_an_exception_inside_a_stage_is_recorded_not_raised(tmp_path, monkeypatch):
    import meteorspec.pipeline as pipeline

    make_night(tmp_path / "night", 2)
    real = pipeline.process_event

    def flaky(event_path, **kw):
        if "ev000" in str(event_path):
            raise ZeroDivisionError("simulated bug")
        return real(event_path, **kw)

    monkeypatch.setattr(pipeline, "process_event", flaky)
    night = run_night(find_events([tmp_path / "night"]), out_dir=tmp_path / "out")
    assert night.rows[0].status == "failed"
    assert "internal error: ZeroDivisionError: simulated bug" in night.rows[0].error
    assert night.rows[1].status != "failed"


def test_resume_skips_up_to_date_events_and_force_redoes_them(tmp_path, monkeypatch):
    folders = make_night(tmp_path / "night", 3)
    events = find_events([tmp_path / "night"])
    first = run_night(events, out_dir=tmp_path / "out")
    assert {r.action for r in first.rows} == {"processed"}
    again = run_night(events, out_dir=tmp_path / "out")
    assert {r.action for r in again.rows} == {"skipped"}
    assert [r.table_row() for r in again.rows] == [r.table_row() for r in first.rows]

    # a changed input (new video bytes) makes only that event out of date
    make_night(tmp_path / "other", 3, seed=7)
    (folders[1] / "video.fits").write_bytes((tmp_path / "other/cam/ev001/video.fits").read_bytes())
    third = run_night(events, out_dir=tmp_path / "out")
    assert [r.action for r in third.rows] == ["skipped", "processed", "skipped"]

    assert {r.action for r in run_night(events, out_dir=tmp_path / "out", force=True).rows} == {"processed"}
    # a new software version makes every output out of date
    monkeypatch.setattr(batch, "software_version", lambda: "999.0")
    assert {r.action for r in run_night(events, out_dir=tmp_path / "out").rows} == {"processed"}


def test_an_unreadable_output_is_redone_only_if_it_can_be_replaced_safely(tmp_path):
    make_night(tmp_path / "night", 2)
    events = find_events([tmp_path / "night"])
    night = run_night(events, out_dir=tmp_path / "out")
    broken = tmp_path / "out" / night.rows[0].output
    broken.write_bytes(b"garbage")
    rows = run_night(events, out_dir=tmp_path / "out").rows
    # the store refuses to overwrite a file it cannot read (it may hold a review log)
    assert rows[0].status == "failed" and "existing output cannot be read" in rows[0].error
    assert broken.read_bytes() == b"garbage"
    assert rows[1].action == "skipped"


def test_a_failed_rerun_keeps_the_earlier_result(tmp_path):
    from meteorspec.store import read_root

    folders = make_night(tmp_path / "night", 2)
    events = find_events([tmp_path / "night"])
    first = run_night(events, out_dir=tmp_path / "out").rows
    assert {r.status for r in first} <= {"ok", "partial"}
    kept = tmp_path / "out" / first[0].output
    before = kept.read_bytes()
    # the video of a processed event is damaged later: the rerun fails, the earlier result stays
    (folders[0] / "video.fits").write_bytes(b"not a FITS file")
    for force in (False, True):
        rows = run_night(events, out_dir=tmp_path / "out", force=force).rows
        assert rows[0].status == "failed" and rows[0].output == kept.name
        assert "video.fits" in rows[0].error and "keeps its earlier" in rows[0].error and "\n" not in rows[0].error
        assert kept.read_bytes() == before
        assert read_root(kept)["status"] == first[0].status
        assert rows[1].status == first[1].status
    table = {r["event_id"]: r for r in read_table(tmp_path / "out" / "night.csv")}
    assert table[first[0].event_id]["status"] == "failed"


def test_duplicate_event_ids_are_not_run(tmp_path):
    folders = make_night(tmp_path / "night", 2)
    text = (folders[0] / "event.toml").read_text()
    (folders[1] / "event.toml").write_text(text)
    night = run_night(find_events([tmp_path / "night"]), out_dir=tmp_path / "out")
    assert night.rows[0].status != "failed"
    assert night.rows[1].status == "failed" and "also used by" in night.rows[1].error


def test_stale_temporaries_are_removed_at_start(tmp_path):
    make_night(tmp_path / "night", 1)
    out = tmp_path / "out"
    out.mkdir()
    (out / ".20261114T030000Z_TB01.h5.abc123.tmp").write_bytes(b"half")
    (out / ".night.csv.xyz.tmp").write_bytes(b"half")
    run_night(find_events([tmp_path / "night"]), out_dir=out)
    _no_temporaries(out)


class _FakeTerminal:
    def __init__(self, tty: bool):
        self.text, self.tty = "", tty

    def write(self, s: str) -> None:
        self.text += s

    def flush(self) -> None:
        pass

    def isatty(self) -> bool:
        return self.tty


def test_progress_shows_an_eta_and_redraws_only_on_a_terminal():
    clock = iter([100.0, 110.0, 200.0, 210.0])
    term = _FakeTerminal(tty=True)
    p = Progress(4, stream=term, clock=lambda: next(clock))
    p.step()  # 1 of 4 after 10 s: 30 s left
    assert "1/4" in term.text and "eta 00:30" in term.text and "\n" not in term.text
    log = _FakeTerminal(tty=False)
    q = Progress(2, stream=log, clock=lambda: next(clock))
    q.step()
    assert log.text.count("\n") == 1 and "eta 00:10" in log.text
    assert Progress._clock(math.nan) == "--:--" and Progress._clock(3725) == "1:02:05"


def test_table_row_formats_numbers_and_flags():
    row = EventRow(event_id="e", status="ok", event="/x/event.toml", flags=("a", "b"), na=0.25, klass="normal")
    t = row.table_row()
    assert t["flags"] == "a;b" and t["na"] == "0.25" and t["mg"] == "" and t["class"] == "normal"


@pytest.fixture(scope="module")
def local_cluster():
    """A two-process Dask cluster on the loopback interface only (HTTP server included), quiet logs.

    Stands in for an existing cluster reached with ``--scheduler``.
    """
    import logging

    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0", silence_logs=logging.ERROR) as cluster:
        yield cluster


@pytest.mark.slow
def test_parallel_equals_serial(sample_night, tmp_path, local_cluster):
    # the sample night (two real events through every stage, a blank sky, a corrupt video) with
    # --workers 2 and on an existing cluster gives the serial run's HDF5 content and table exactly
    serial = read_table(sample_night.out / "night.csv")
    # a stage that raised in the serial run (e.g. a RuntimeWarning made an error by pytest's
    # filterwarnings=error, which Dask workers do not apply) would differ from the workers' result
    assert not [r["error"] for r in serial if "internal error" in r["error"]]
    night = str(sample_night.root)
    # the two parallel runs overlap (one worker of each idles once the short event is done):
    # --workers 2 through the installed command in a subprocess, --scheduler in this process
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    log = tmp_path / "two.log"
    with open(log, "w") as fh:  # a file, not a pipe: nothing blocks while this process is busy
        two = subprocess.Popen([sys.executable, "-m", "meteorspec.cli", "process", night,
                                "--out", str(tmp_path / "two"), "--workers", "2", "--quiet"],
                               env=env, stdin=subprocess.DEVNULL, stdout=fh, stderr=subprocess.STDOUT)
        try:
            code = main(["process", night, "--out", str(tmp_path / "cluster"), "--quiet",
                         "--scheduler", local_cluster.scheduler_address])
            two.wait(timeout=600)
        finally:
            if two.poll() is None:
                two.kill()
                two.wait()
    assert [two.returncode, code] == [sample_night.exit_code] * 2, log.read_text()
    assert "3/4 events processed without failure" in log.read_text()
    assert_same_outputs(sample_night.out, tmp_path / "two")
    assert_same_outputs(sample_night.out, tmp_path / "cluster")


def test_sigkill_mid_run_then_resume_completes_with_whole_files(tmp_path):
    # blank-sky events large enough (~0.1 s each) that the kill lands mid-night
    make_night(tmp_path / "night", 8, n_frames=150)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "meteorspec.cli", "process", str(tmp_path / "night"), "--out", str(out), "--quiet"]
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            stdin=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        while not list(out.glob("*.h5")) and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.005)
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    n_done = len(list(out.glob("*.h5")))
    assert proc.returncode == -signal.SIGKILL
    assert 1 <= n_done < 8, "the kill should land mid-night"
    for h5 in out.glob("*.h5"):  # whatever exists is whole
        with h5py.File(h5, "r") as f:
            assert f.attrs["status"] in ("ok", "partial")
    rows = read_table(out / "night.csv")  # the interim table is a valid CSV
    assert len(rows) == 8 and {r["status"] for r in rows} <= {"ok", "partial", "pending"}

    rerun = subprocess.run(cmd, env=env, capture_output=True, text=True, stdin=subprocess.DEVNULL, timeout=120)
    assert rerun.returncode == 0, rerun.stderr
    assert rerun.stdout.count("(up to date, skipped)") >= n_done - 1  # the last one may have been mid-write
    assert len(list(out.glob("*.h5"))) == 8
    _no_temporaries(out)
    assert {r["status"] for r in read_table(out / "night.csv")} <= {"ok", "partial"}
