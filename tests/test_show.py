"""meteorspec show: a readable one-screen summary of an event file."""

from __future__ import annotations

import numpy as np
import pytest

from meteorspec.cli import main
from meteorspec.report.html import STAGE_NAMES
from meteorspec.show import summarise
from meteorspec.store import read_event
from test_batch import BLANK_ID, CORRUPT_ID, SAMPLE_SUBSET, no_plasma_output, sample_night  # noqa: F401 (fixtures)


def test_summary_of_a_complete_event(sample_night):
    # a real sample event through every stage: the summary shows the file's values, formatted
    path = sample_night.out / f"{SAMPLE_SUBSET[1]}.h5"
    ev = read_event(path)
    c = ev["groups"]["composition"]["attrs"]
    text = summarise(path)
    assert text.splitlines()[0] == f"event    {SAMPLE_SUBSET[1]}   [{ev['attrs']['status']}]"
    assert (f"Na {c['na']:.3f} +/- {c['na_err']:.3f}, Mg {c['mg']:.3f} +/- {c['mg_err']:.3f}, "
            f"Fe {c['fe']:.3f} +/- {c['fe_err']:.3f}") in text
    speed = "n/a" if not np.isfinite(c["speed_km_s"]) else f"{c['speed_km_s']:.1f}"
    assert f"class    {c['class']} (confidence {c['class_confidence']:.2f})" in text
    assert f"speed {speed} km/s" in text
    lines = ev["datasets"]["lines"]
    assert f"lines    {len(lines['lab_nm'])} identified" in text
    strongest = int(np.nanargmax(lines["intensity"]))
    assert f"  {lines['species'][strongest]:<6} {lines['lab_nm'][strongest]:8.3f} nm" in text
    assert f"track    {len(ev['groups']['track']['datasets']['time_s'])} points" in text
    assert "has not run" not in text


def test_summary_names_missing_stages_and_failures(sample_night, no_plasma_output, capsys):
    out = sample_night.out
    blank = summarise(out / f"{BLANK_ID}.h5")  # a sky without a meteor
    for stage in ("spectrum", "lines", "composition"):
        assert f"{stage:<8} not in file: {STAGE_NAMES[stage]} has not run (no meteor found in the video)" in blank
    no_plasma = summarise(no_plasma_output)  # a real event whose plasma fit failed
    assert f"{STAGE_NAMES['composition']} has not run (the plasma fit failed" in no_plasma
    assert "spectrum not in file" not in no_plasma
    assert main(["show", str(out / f"{CORRUPT_ID}.h5")]) == 0
    failed = capsys.readouterr().out
    assert "[failed]" in failed and "error    " in failed and "not a readable FITS file" in failed


def test_show_of_a_file_that_is_not_hdf5_is_one_line(tmp_path, capsys):
    bad = tmp_path / "x.h5"
    bad.write_text("nope")
    assert main(["show", str(bad)]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "x.h5" in err and "not a readable HDF5 file" in err


@pytest.mark.parametrize("missing", ["missing.h5"])
def test_show_of_a_missing_file(tmp_path, capsys, missing):
    assert main(["show", str(tmp_path / missing)]) == 2
    err = capsys.readouterr().err.strip()
    assert err == f"meteorspec: {tmp_path / missing}: no such file", err
