"""meteorspec review: corrections re-derived from the stored spectra, the append-only /review log.

The event under review is built once per module: a two-temperature LTE spectrum of the
project's forward model (:func:`meteorspec.plasma.synthetic_spectrum`, NIST line list)
spread over ten frames with a known light curve and seeded noise, and stored with a known
error of its wavelength scale, as ``meteorspec process`` writes an event. Physics checks
compare with the NIST air wavelengths of the line list (``calibration/atomic/lines.csv``).
Fits use the optically thin model with few evaluations (``FAST``): the review's own logic
is under test here, not the plasma fit (tests/test_plasma.py).
"""

from __future__ import annotations

import hashlib
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from meteorspec.atomic import load_line_list
from meteorspec.classify import classify
from meteorspec.cli import main
from meteorspec.errors import InputError
from meteorspec.extract import FrameSpectra
from meteorspec.lines import find_peaks, identify_lines
from meteorspec.pipeline import spectrum_part
from meteorspec.plasma import fit_plasma, select_model_lines, synthetic_spectrum
from meteorspec.result import EventResult
from meteorspec.review import Corrections, build_corrections, open_event, rederive, review_event
from meteorspec.review.rework import combine_frames, kept_frames, parse_line
from meteorspec.store import read_event, read_reviews, write_event
from meteorspec.version import software_version

EVENT_ID = "20261114T031522Z_TR01"   # invented event of an invented test camera
STEP_NM = 0.2
FWHM_NM = 0.7                        # about 3.5 bins: peaks well sampled
SHIFT_NM = 2.5                       # error put into the stored wavelength scale (beyond the fit's +-1.5 nm)
WEIGHTS = np.array([0.0, 0.2, 0.6, 1.0, 0.9, 0.7, 0.5, 0.3, 0.1, 0.0])  # light curve; frames 0 and 9 dark
FAST = {"self_absorption": False, "max_nfev": 40, "fit_width": False}
# invented demo column densities (m^-2)
COLUMNS = {"Na I": 3e15, "Mg I": 3e17, "Fe I": 1e18, "Ca I": 3e16, "Cr I": 1e16, "Mn I": 1e16,
           "Ca II": 1e15, "Mg II": 1e16, "Si II": 1e16, "Fe II": 1e16}
MG_518_NM = 518.3604                 # Mg I 3p 3P2 - 4s 3S1, NIST ASD air wavelength


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _same_attrs(a: dict, b: dict) -> bool:
    return a.keys() == b.keys() and all(np.array_equal(a[k], b[k]) for k in a)


def _true_frames(seed: int = 0) -> FrameSpectra:
    """Per-frame spectra on the true wavelength grid."""
    line_list = load_line_list()
    wl = np.arange(505.0, 600.0, STEP_NM) + STEP_NM / 2
    bw = np.full(wl.size, STEP_NM)
    index, component = select_model_lines(line_list, wl[0] - 10, wl[-1] + 10)
    metal = line_list.select(index[component != "air"])
    cols = {s: COLUMNS.get(s, 1e15) for s in set(metal.species.tolist())}
    shape = synthetic_spectrum(wl, bw, lines=metal, temperature_k=4600.0, column_density_m2=cols,
                               fwhm_nm=FWHM_NM, area_scale=1e4, self_absorption=False)
    rng = np.random.default_rng(seed)
    sigma = 2e-3 * shape.max()
    flux = WEIGHTS[:, None] * shape[None, :] + rng.normal(0.0, sigma, (WEIGHTS.size, wl.size))
    mask = np.repeat((WEIGHTS == 0)[:, None], wl.size, axis=1)
    flux[mask] = np.nan
    variance = np.where(mask, np.nan, sigma ** 2)
    time_s = (np.arange(WEIGHTS.size) + 0.5) / 25.0
    return FrameSpectra(wl, bw, flux, variance, mask, time_s, (), frame_weight=WEIGHTS.copy())


def _stored(frames: FrameSpectra, *, shift_nm: float, stretch: float = 1.0) -> FrameSpectra:
    """The same frames as a calibration off by ``shift_nm`` and ``stretch`` (about 550 nm) records them."""
    wl = frames.wavelength_nm + shift_nm + (stretch - 1.0) * (frames.wavelength_nm - 550.0)
    return replace(frames, wavelength_nm=wl, bin_width_nm=frames.bin_width_nm * stretch,
                   flux=frames.flux / stretch, variance=frames.variance / stretch ** 2)


def write_synthetic_event(path: Path, frames: FrameSpectra, *, extra_plasma: dict | None = None) -> Path:
    """The automatic run on ``frames``: whole flight, plasma fit, lines, class, as the pipeline stores them."""
    whole = frames.whole_flight()
    fwhm = np.full(whole.wavelength_nm.size, FWHM_NM)
    fit = fit_plasma(whole, fwhm_nm=fwhm, speed_km_s=40.0, **FAST)
    assert fit, fit.reason
    table = identify_lines(whole, fwhm_nm=fwhm, plasma_fit=fit)
    comp = classify(fit.group_intensity, fit.group_covariance, speed_km_s=40.0, seed=0)
    result = EventResult(event_id=EVENT_ID, station="TR01", start_utc="2026-11-14T03:15:22.120Z",
                         software_version=software_version(), status="ok")
    result.parts["spectrum"] = spectrum_part(frames, flux_unit="adu")
    result.parts["plasma"] = {"attrs": {"success": True},
                              "datasets": {"instrument_fwhm_nm": (fwhm, "nm")} | dict(extra_plasma or {})}
    result.parts["lines"] = {"table": (table.to_records(), "adu nm")}
    result.parts["composition"] = {"attrs": {
        "na": comp.na, "mg": comp.mg, "fe": comp.fe, "na_err": comp.na_err, "mg_err": comp.mg_err,
        "fe_err": comp.fe_err, "class": comp.class_name, "class_confidence": comp.class_confidence,
        "class_reason": comp.class_reason, "speed_km_s": 40.0}}
    return write_event(path, result)


@pytest.fixture(scope="module")
def event(tmp_path_factory):
    """(true frames, event file with the shifted scale); tests copy the file before changing it."""
    frames = _true_frames()
    path = write_synthetic_event(tmp_path_factory.mktemp("review") / f"{EVENT_ID}.h5",
                                 _stored(frames, shift_nm=SHIFT_NM))
    return frames, path


@pytest.fixture()
def copy(event, tmp_path):
    dest = tmp_path / event[1].name
    shutil.copyfile(event[1], dest)
    return dest


def _true_peaks(frames: FrameSpectra) -> np.ndarray:
    whole = frames.whole_flight()
    return find_peaks(whole, fwhm_nm=np.full(whole.wavelength_nm.size, FWHM_NM)).position_nm


# --------------------------------------------------------------------------- frames


def test_dropping_frames_sums_exactly_the_remaining_frames(event):
    frames, path = event
    view = open_event(path)
    keep = kept_frames(view, Corrections(first_frame=1, last_frame=8, dropped_frames=(3, 4)))
    assert np.flatnonzero(keep).tolist() == [1, 2, 5, 6, 7, 8]
    whole = combine_frames(view, keep)
    # no sample of a kept frame is masked: the whole flight is the plain sum, errors add in quadrature
    assert_allclose(whole.flux, view.per_frame[keep].sum(axis=0), rtol=1e-12, atol=0)
    assert_allclose(whole.flux_err, np.sqrt((view.per_frame_err[keep] ** 2).sum(axis=0)), rtol=1e-12)
    # and it differs from the stored whole flight by exactly the dropped frames (and the dark ones, NaN)
    dropped = view.per_frame[[3, 4]].sum(axis=0)
    assert_allclose(whole.flux, view.flux - dropped, rtol=1e-9, atol=1e-9 * np.nanmax(view.flux))


def test_recombined_frames_keep_the_stored_error_structure(tmp_path):
    # frames whose bins correlate (shared pixels) and share an error (twinkle): the file keeps the
    # whole flight's structure; with every frame kept the review reproduces it exactly, with
    # frames dropped it keeps the coefficients and never states less than the frames' quadrature sum
    frames = _true_frames()
    n_f, n_wl = frames.flux.shape
    corr = np.zeros((n_f, n_wl, 2), np.float32)
    corr[:, :, 0], corr[:, :, 1] = 0.6, 0.2
    twinkle = np.where(frames.mask, 0.0, 0.3)
    frames = replace(frames, correlation=corr, twinkle_share=twinkle, twinkle_group=np.zeros(n_f, int),
                     twinkle_level=0.1)
    path = write_synthetic_event(tmp_path / f"{EVENT_ID}.h5", frames)
    view = open_event(path)
    assert view.correlation.shape == (n_wl, 2) and view.common_share.shape[1] > 0
    stored = frames.whole_flight()
    every = combine_frames(view, np.ones(n_f, bool))
    assert_allclose(every.flux_err, stored.flux_err, rtol=1e-6)
    assert_allclose(every.covariance(), stored.covariance(), rtol=1e-5, atol=1e-12 * np.nanmax(stored.covariance()))
    keep = kept_frames(view, Corrections(dropped_frames=(3, 4)))
    some = combine_frames(view, keep)
    quadrature = np.sqrt(np.nansum(view.per_frame_err[keep] ** 2, axis=0))
    assert np.all(some.flux_err >= quadrature * (1 - 1e-9))
    assert np.all(some.flux_err > 1.01 * quadrature)  # the twinkle, common to frames, adds coherently
    assert some.correlation.shape == (n_wl, 2)


def test_a_masked_sample_is_scaled_by_the_light_share_of_the_kept_frames(event):
    # FrameSpectra.whole_flight's rule: the unmasked samples' sum over the share of the light they carry
    frames, path = event
    view = open_event(path)
    mask = view.per_frame_mask.copy()
    mask[3, 100] = True  # e.g. a saturated sample in the brightest frame
    view = replace(view, per_frame_mask=mask)
    keep = kept_frames(view, Corrections(dropped_frames=(5,)))
    whole = combine_frames(view, keep)
    w = view.frame_weight
    share = (w[keep].sum() - w[3]) / w[keep].sum()
    unmasked = np.where(mask, 0.0, view.per_frame)[keep]  # the dark frames 0 and 9 are masked too
    expected = unmasked.sum(axis=0)[100] / share
    assert_allclose(whole.flux[100], expected, rtol=1e-12)
    # the estimated light curve is the simulated one, up to the scale that cancels in the share
    lit = WEIGHTS > 0
    assert_allclose(w[lit] / w[lit].sum(), WEIGHTS[lit] / WEIGHTS[lit].sum(), atol=2e-3)  # noise 0.2 % of peak
    assert np.all(w[~lit] == 0)


# --------------------------------------------------------------------------- wavelength scale


def test_pinning_a_line_undoes_a_known_shift(event, copy):
    frames, _ = event
    stored_peaks = _true_peaks(frames) + SHIFT_NM
    # the Mg I 518.36 peak sits near 520.9 nm on the shifted scale; a person reads "520.7" off the plot
    corrections = build_corrections(copy, pins=("520.7=Mg I 518.4",), reject=("Cr I 520.8",),
                                    drop_frames="3")
    outcome = review_event(copy, corrections, verdict="accepted", reviewer="R. Vega", note="scale off by 2.5 nm",
                           plasma_options=FAST)
    rework = outcome.rework
    true_peaks = _true_peaks(frames)
    mg = true_peaks[np.argmin(np.abs(true_peaks - MG_518_NM))]
    # the peak finder puts an isolated line within 0.05 nm (a quarter bin) of its NIST wavelength
    assert abs(mg - MG_518_NM) < 0.05
    # the pin moves every peak by the same amount: each one lands on its true position, off only by
    # the pinned peak's own centroid offset from the NIST wavelength (and the dropped frame's noise)
    assert_allclose(rework.shift_nm, -SHIFT_NM + (MG_518_NM - mg), atol=0.01)
    assert rework.stretch == 1.0
    got = np.asarray(rework.lines.measured_nm)
    nearest = true_peaks[np.argmin(np.abs(got[:, None] - true_peaks[None, :]), axis=1)]
    # every peak moves by the pin's shift: on its true position plus the pinned peak's offset from NIST;
    # 0.03 nm: without frame 3 (a tenth of the light) the noise moves the weaker centroids by up to ~0.02 nm
    assert_allclose(got, nearest + (MG_518_NM - mg), atol=0.03)
    assert np.min(np.abs(stored_peaks - (mg + SHIFT_NM))) < 1e-6  # where the automatic scale put it
    # the re-derived Mg I row is the NIST line
    mg_rows = [i for i, s in enumerate(rework.lines.species) if s == "Mg I"]
    assert any(abs(rework.lines.measured_nm[i] - MG_518_NM) < 0.05 for i in mg_rows)
    # the rejected identification is gone from the re-derived table
    assert not any("520.84" in m for m in rework.lines.multiplet)
    assert rework.frames_kept.tolist() == [0, 1, 2, 4, 5, 6, 7, 8, 9]

    # recorded as the first entry of the log, with the corrections and the re-derived class
    (entry,) = read_reviews(copy)
    a = entry["attrs"]
    assert entry["name"] == "0001"
    assert (a["verdict"], a["reviewer"], a["note"]) == ("accepted", "R. Vega", "scale off by 2.5 nm")
    assert a["time_utc"].endswith("Z") and a["rederived"]
    assert a["pins"] == ["520.7=Mg I 518.360"] and a["rejected_lines"] == ["Cr I 520.843"]
    assert a["dropped_frames"].tolist() == [3]
    assert_allclose(a["shift_nm"], rework.shift_nm)
    res = entry["groups"]["result"]
    assert res["attrs"]["class"] == rework.composition.class_name
    assert_allclose([res["attrs"][k] for k in ("na", "mg", "fe")], rework.composition.values)
    assert res["datasets"]["frames_used"].tolist() == rework.frames_kept.tolist()
    assert_allclose(res["datasets"]["lines"]["measured_nm"], rework.lines.measured_nm)
    assert res["units"]["frames_used"] == "1"  # a unit on every dataset (store rule)


def test_two_pins_undo_a_shift_and_a_stretch(event):
    frames, path = event
    shift, stretch = 1.5, 1.005
    stored = _stored(frames, shift_nm=shift, stretch=stretch)
    base = open_event(path)
    view = replace(base, wavelength_nm=stored.wavelength_nm, bin_width_nm=stored.bin_width_nm,
                   per_frame=np.nan_to_num(stored.flux), per_frame_err=np.sqrt(np.nan_to_num(stored.variance)))
    true_peaks = _true_peaks(frames)
    blue, red = true_peaks[0], true_peaks[-1]
    seen = [p + shift + (stretch - 1) * (p - 550.0) + 0.3 for p in (blue, red)]  # read 0.3 nm off
    corrections = build_corrections(path, pins=(f"{seen[0]:.2f}={blue:.4f}", f"{seen[1]:.2f}={red:.4f}"))
    rework = rederive(view, corrections, plasma_options=FAST)
    # inverse of old = new + s + (k - 1)(new - 550): stretch 1/k, shift -s/k. Peaks found on the
    # relabelled grid move with it up to ~1e-3 nm (the matched filter sees bins 0.5 % wider than the
    # stated FWHM expects); over the 80 nm between the pins that is 2e-5 in stretch
    assert_allclose(rework.stretch, 1 / stretch, rtol=2e-5)
    assert_allclose(rework.shift_nm, -shift / stretch, atol=2e-3)
    assert_allclose(rework.spectrum.wavelength_nm, frames.wavelength_nm, atol=2e-3)
    # line energies (density x width) are unchanged by the relabelling
    whole = frames.whole_flight()
    good = np.isfinite(whole.flux)
    assert_allclose(np.sum(rework.spectrum.flux[good] * rework.spectrum.bin_width_nm[good]),
                    np.sum(whole.flux[good] * whole.bin_width_nm[good]), rtol=1e-9)
    got = np.asarray(rework.lines.measured_nm)
    nearest = true_peaks[np.argmin(np.abs(got[:, None] - true_peaks[None, :]), axis=1)]
    assert_allclose(got, nearest, atol=3e-3)


def test_a_shift_option_moves_the_scale(event):
    frames, path = event
    c = build_corrections(path, shift_nm=-SHIFT_NM)
    rework = rederive(open_event(path), c, plasma_options=FAST)
    assert_allclose(rework.spectrum.wavelength_nm, frames.wavelength_nm, atol=1e-9)


# --------------------------------------------------------------------------- the log


def test_the_log_is_append_only_and_atomic(copy):
    before = read_event(copy)
    first = review_event(copy, Corrections(), verdict="another-look", reviewer="R. Vega", note="Na looks odd",
                         time_utc="2026-11-14T07:00:00Z")
    assert first.written == "0001" and first.rework is None
    entry_1 = read_reviews(copy)[0]
    second = review_event(copy, Corrections(), verdict="rejected", reviewer="K. Oduya", note="aircraft, not a meteor")
    assert second.written == "0002"
    entries = read_reviews(copy)
    assert [e["name"] for e in entries] == ["0001", "0002"]
    assert _same_attrs(entries[0]["attrs"], entry_1["attrs"])  # nothing earlier changed
    assert entries[1]["attrs"]["verdict"] == "rejected"
    # a verdict without corrections confirms the automatic class
    assert entries[1]["groups"]["result"]["attrs"]["class"] == before["groups"]["composition"]["attrs"]["class"]
    after = read_event(copy)
    assert_allclose(after["groups"]["spectrum"]["datasets"]["per_frame"],
                    before["groups"]["spectrum"]["datasets"]["per_frame"])
    assert sorted(p.name for p in copy.parent.iterdir()) == [copy.name]  # no temporary left


def test_a_failed_write_keeps_the_old_file(copy, monkeypatch):
    import meteorspec.store as store

    sha = _sha(copy)

    def boom(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(store.os, "replace", boom)
    with pytest.raises(OSError):
        review_event(copy, Corrections(), verdict="accepted", reviewer="R. Vega")
    assert _sha(copy) == sha
    assert sorted(p.name for p in copy.parent.iterdir()) == [copy.name]


def test_the_review_survives_reprocessing(tmp_path, capsys):
    from test_batch import make_night

    make_night(tmp_path / "night", 1)
    out = tmp_path / "out"
    assert main(["process", str(tmp_path / "night"), "--out", str(out), "--quiet"]) == 0
    (path,) = out.glob("*.h5")
    assert main(["review", str(path), "--verdict", "rejected", "--reviewer", "R. Vega",
                 "--note", "blank sky, nothing to see"]) == 0
    logged = read_reviews(path)
    assert main(["process", str(tmp_path / "night"), "--out", str(out), "--quiet", "--force"]) == 0
    again = read_reviews(path)
    assert len(again) == 1 and _same_attrs(again[0]["attrs"], logged[0]["attrs"])
    assert f"recorded: {path}:/review/0001 (rejected, R. Vega)" in capsys.readouterr().out
    # and a second review after re-processing appends to it
    assert main(["review", str(path), "--verdict", "accepted", "--reviewer", "K. Oduya"]) == 0
    assert [e["name"] for e in read_reviews(path)] == ["0001", "0002"]


def test_dry_run_writes_nothing(copy, capsys):
    sha = _sha(copy)
    assert main(["review", str(copy), "--verdict", "accepted", "--reviewer", "R. Vega", "--dry-run"]) == 0
    out = capsys.readouterr().out
    assert "dry run: nothing written" in out and "automatic" in out
    outcome = review_event(copy, Corrections(dropped_frames=(4,)), verdict="accepted", reviewer="R. Vega",
                           dry_run=True, plasma_options=FAST)
    assert outcome.written is None and outcome.rework is not None
    assert _sha(copy) == sha and read_reviews(copy) == []


# --------------------------------------------------------------------------- bad input


@pytest.mark.parametrize("args, problem", [
    (["--frames", "0:99"], "frame 99 is outside the event (frames 0-9)"),
    (["--drop-frames", "12"], "frame 12 is outside the event"),
    (["--frames", "9:3"], "last frame before first"),
    (["--reject-line", "Xx I 500"], "no Xx I lines in the line list"),
    (["--pin", "520.7=Mg I 530"], "no Mg I line within 0.5 nm of 530 nm"),
    (["--pin", "nan=Mg I 518.4"], "seen wavelength must be finite"),
    (["--shift-nm", "nan"], "--shift-nm must be finite"),
    (["--stretch", "2"], "out of reach"),
    (["--pin", "520.7=Mg I 518.4", "--shift-nm", "1"], "either --pin or --shift-nm"),
    (["--verdict", "accepted"], "needs the reviewer's name"),
    (["--ignore-nm", "658-655"], "need 0 < LO < HI"),
])
def test_bad_options_are_one_line_and_write_nothing(copy, capsys, args, problem):
    sha = _sha(copy)
    assert main(["review", str(copy), *args]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and str(copy) in err and problem in err, err
    assert _sha(copy) == sha


def test_bad_files_are_one_line(tmp_path, capsys):
    import h5py

    text = tmp_path / "notes.h5"
    text.write_text("not hdf5\n")
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f.attrs["schema"] = "someone-else/3"
    for path, problem in ((tmp_path / "missing.h5", "no such file"), (text, "not a readable HDF5 file"),
                          (other, "not a meteorspec event file")):
        assert main(["review", str(path), "--verdict", "accepted", "--reviewer", "R. Vega"]) == 2
        err = capsys.readouterr().err.strip()
        assert "\n" not in err and str(path) in err and problem in err, err
    with h5py.File(other, "r") as f:
        assert "review" not in f


def test_parse_line_names_the_nist_line():
    ref = parse_line("Na I 589.0", load_line_list())
    assert ref.species == "Na I" and abs(ref.lab_nm - 588.995) < 1e-3  # Na D2, NIST ASD air
    with pytest.raises(ValueError, match="must look like"):
        parse_line("sodium", load_line_list())


# --------------------------------------------------------------------------- show and report


@pytest.fixture(scope="module")
def reviewed(event, tmp_path_factory):
    folder = tmp_path_factory.mktemp("reviewed")
    path = folder / event[1].name
    shutil.copyfile(event[1], path)
    review_event(path, Corrections(), verdict="another-look", reviewer="K. Oduya", note="first look")
    review_event(path, build_corrections(path, shift_nm=-SHIFT_NM), verdict="accepted", reviewer="R. Vega",
                 note="scale fixed by hand", time_utc="2026-11-14T08:00:00Z", plasma_options=FAST)
    return path


def test_show_gives_the_latest_verdict(reviewed):
    from meteorspec.show import summarise

    text = summarise(reviewed)
    entry = read_reviews(reviewed)[-1]
    auto = read_event(reviewed)["groups"]["composition"]["attrs"]["class"]
    assert ("review   2 manual decision(s) recorded; latest (0002): accepted by R. Vega, 2026-11-14T08:00:00Z"
            in text)
    assert f"  reviewed class {entry['groups']['result']['attrs']['class']} (automatic {auto})" in text
    assert "  corrections wavelength shift -2.500 nm" in text and "  note: scale fixed by hand" in text


def test_report_shows_the_review(reviewed):
    from meteorspec.report import write_report

    index = write_report(reviewed.parent)
    page = (index.parent / "events" / f"{EVENT_ID}.html").read_text()
    assert '<span class="verdict accepted">accepted</span> by <b>R. Vega</b>' in page
    assert "scale fixed by hand" in page and "entry 0002 of 2" in page
    assert "<th>automatic</th><th>reviewed</th>" in page
    assert page.count('<span class="verdict') == 3  # the latest, then both entries of the log
    night = index.read_text()
    assert "<th>reviewed</th>" in night and '<span class="verdict accepted">accepted</span>' in night


def test_history_and_figures(reviewed, tmp_path, capsys):
    assert main(["review", str(reviewed), "--history"]) == 0
    out = capsys.readouterr().out
    assert "2 entries" in out and "0001" in out and "another-look" in out and "note: first look" in out
    assert main(["review", str(reviewed), "--figures", str(tmp_path / "fig")]) == 0
    names = sorted(p.name for p in (tmp_path / "fig").iterdir())
    assert names == [f"{EVENT_ID}_review_{k}.png" for k in ("composition", "frames", "lightcurves", "spectrum")]
    assert all((tmp_path / "fig" / n).stat().st_size > 1000 for n in names)


# --------------------------------------------------------------------------- the window


def test_review_window_keys_and_clicks(event):
    from matplotlib.backend_bases import KeyEvent, MouseEvent
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from meteorspec.review.desk import ReviewDesk

    frames, path = event
    view = open_event(path)
    fig = Figure(figsize=(8, 6))
    FigureCanvasAgg(fig)
    calls = []

    def cheap(v, c):
        calls.append(c)
        return rederive(v, c, plasma_options=FAST)

    desk = ReviewDesk(view, fig=fig, rederive_fn=cheap)
    fig.canvas.draw()

    def click(ax, x, y):
        px, py = ax.transData.transform((x, y))
        fig.canvas.callbacks.process("button_press_event", MouseEvent("button_press_event", fig.canvas, px, py, 1))

    def key(k):
        fig.canvas.callbacks.process("key_press_event", KeyEvent("key_press_event", fig.canvas, k))

    click(desk.ax_frames, 560.0, 4)        # drop frame 4
    assert desk.corrections.dropped_frames == (4,)
    click(desk.ax_spec, MG_518_NM + SHIFT_NM, 0.0)   # the Mg peak on the stored scale
    offered = [f"{r.species} {r.lab_nm:.2f}" for r in desk.candidates]
    assert "Mg I 518.36" in offered
    for _ in range(offered.index("Mg I 518.36")):
        key("down")
    key("p")
    (pin,) = desk.corrections.pins
    assert pin.label == "Mg I 518.360" and abs(pin.seen_nm - (MG_518_NM + SHIFT_NM)) < 0.05
    key("right")                            # a manual shift replaces the pin ...
    assert desk.corrections.pins == () and desk.corrections.shift_nm == pytest.approx(0.1)
    key("u")                                # ... and undo brings it back
    assert desk.corrections.pins == (pin,)
    key("r")
    assert len(calls) == 1 and desk.rework is not None
    assert_allclose(desk.rework.shift_nm, -SHIFT_NM, atol=0.05)
    assert "re-derived" in desk.message
    key("a")
    choice = desk.choice()
    assert choice.verdict == "accepted" and choice.corrections.dropped_frames == (4,)
    assert choice.corrections.pins == (pin,)


def test_window_without_a_display_writes_the_figures(copy, capsys, monkeypatch):
    from meteorspec.review import desk

    monkeypatch.setattr(desk, "has_display", lambda: False)  # as on a server, whatever runs the tests
    with pytest.raises(InputError, match="no display"):
        desk.run_desk(open_event(copy), Corrections())
    assert main(["review", str(copy), "--window"]) == 0
    out = capsys.readouterr().out
    folder = copy.with_name(f"{copy.stem}_review")
    assert f"no display for the review window: figures go to {folder} instead" in out
    assert len(list(folder.glob("*.png"))) == 4


def test_reviewers_at_the_same_time_lose_nothing(copy):
    # two people appending at once: the lock orders them, every entry is kept once
    from concurrent.futures import ThreadPoolExecutor

    def review(i: int) -> str:
        return review_event(copy, Corrections(), verdict="accepted", reviewer=f"reviewer {i}").written

    with ThreadPoolExecutor(max_workers=3) as pool:
        names = list(pool.map(review, range(6)))
    entries = read_reviews(copy)
    assert sorted(names) == [e["name"] for e in entries] == [f"{k:04d}" for k in range(1, 7)]
    assert sorted(e["attrs"]["reviewer"] for e in entries) == [f"reviewer {i}" for i in range(6)]



def test_refit_uses_the_response_the_automatic_run_stored(tmp_path, monkeypatch):
    # the pipeline keeps the response the spectra were divided by in /plasma; the review's
    # refit must model blurred lines with it, or it disagrees with the automatic run
    resp_wl = np.array([400.0, 550.0, 700.0])
    resp = np.array([0.5, 1.0, 0.8])
    path = write_synthetic_event(tmp_path / f"{EVENT_ID}.h5", _stored(_true_frames(), shift_nm=SHIFT_NM),
                                 extra_plasma={"response_wavelength_nm": (resp_wl, "nm"), "response": (resp, "1")})
    view = open_event(path)
    assert view.response_nm is not None
    assert_allclose(view.response_nm[0], resp_wl)
    assert_allclose(view.response_nm[1], resp)
    seen = {}
    import meteorspec.plasma as plasma_module
    real = plasma_module.fit_plasma

    def spy(*args, **kwargs):
        seen.update(kwargs)
        return real(*args, **kwargs)

    monkeypatch.setattr(plasma_module, "fit_plasma", spy)
    rederive(view, Corrections(), plasma_options=FAST)
    assert_allclose(seen["response_nm"][1], resp)
    # a file without the curve (older runs) refits without it
    assert open_event(write_synthetic_event(tmp_path / "old" / f"{EVENT_ID}.h5",
                                            _stored(_true_frames(), shift_nm=SHIFT_NM))).response_nm is None
