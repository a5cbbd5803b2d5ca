"""meteorspec show: a readable one-screen summary of an event file."""

from __future__ import annotations

import pytest

from meteorspec.batch import find_events, run_night
from meteorspec.cli import main
from meteorspec.show import summarise
from test_batch import make_night
from test_report import complete_event


def test_summary_of_a_complete_event(tmp_path):
    folders = make_night(tmp_path / "night", 1)
    path = complete_event(folders[0], tmp_path / "out")
    text = summarise(path)
    assert text.splitlines()[0].startswith("event    20261114T030000Z_TB01")
    assert "Na 0.300 +/- 0.030, Mg 0.450 +/- 0.040, Fe 0.250 +/- 0.030" in text
    assert "class    normal (confidence 0.80), speed 35.0 km/s" in text
    assert "lines    9 identified" in text and "Na I" in text
    assert "track    12 points" in text


def test_summary_names_missing_stages_and_failures(tmp_path, capsys):
    make_night(tmp_path / "night", 2, corrupt=1)
    night = run_night(find_events([tmp_path / "night"]), out_dir=tmp_path / "out")
    partial = summarise(tmp_path / "out" / night.rows[0].output)
    assert "composition and class (classify stage) has not run" in partial
    assert main(["show", str(tmp_path / "out" / night.rows[1].output)]) == 0
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
    assert missing in capsys.readouterr().err
