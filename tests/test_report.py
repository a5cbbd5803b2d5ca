"""Night report: figures for every part that exists, notes for the rest, checked in a real browser."""

from __future__ import annotations

import html
import shutil
import urllib.parse
from pathlib import Path

import numpy as np
import pytest

from meteorspec.batch import find_events, run_night
from meteorspec.report import write_report
from meteorspec.report.figures import (plot_composition, plot_light_curves, plot_spectrogram, plot_spectrum,
                                       plot_stack, plot_ternary, ternary_xy, window_light_curves)
from meteorspec.store import read_event
from test_batch import (BLANK_ID, CORRUPT_ID, SAMPLE_SUBSET, make_night, no_plasma_output,  # noqa: F401
                        sample_night)

COMPLETE_ID, NO_PLASMA_ID = SAMPLE_SUBSET[1], SAMPLE_SUBSET[0]  # the second's outputs as run; the first's fit forced to fail
MOVED_ID = "20261114T030200Z_TB01"


@pytest.fixture(scope="module")
def night_report(sample_night, no_plasma_output, tmp_path_factory):
    """The sample night's outputs plus one more blank event whose video has been moved since, and its report.

    Outputs are copied, so the shared serial outputs stay untouched.
    """
    root = tmp_path_factory.mktemp("report")
    out = root / "out"
    shutil.copytree(sample_night.out, out)
    shutil.copy(no_plasma_output, out / no_plasma_output.name)  # the first sample event, its fit forced to fail
    (moved,) = make_night(root / "night", 1, first=2)
    run_night(find_events([root / "night"]), out_dir=out)
    # the stacked image of an event whose video is gone is skipped with a note
    shutil.move(moved / "video.fits", root / "moved.fits")
    index = write_report(out, report_dir=root / "html")
    return out, index


def test_every_page_and_figure_is_written(night_report):
    out, index = night_report
    rep = index.parent
    assert sorted(p.name for p in (rep / "events").iterdir()) == sorted(p.stem + ".html" for p in out.glob("*.h5"))
    imgs = {p.name for p in (rep / "img").iterdir()}
    for kind in ("stack", "spectrum", "spectrogram", "lightcurves", "composition"):
        assert f"{COMPLETE_ID}_{kind}.png" in imgs
    assert "ternary.png" in imgs
    page = (rep / "events" / f"{COMPLETE_ID}.html").read_text()
    assert "Na I 589.0" not in page  # labels live in the figure, the table lists the lines
    ev = read_event(out / f"{COMPLETE_ID}.h5")
    lines = ev["datasets"]["lines"]
    assert len(lines["lab_nm"]) > 0
    for lab in lines["lab_nm"]:  # every identified line is in the table, as written in the file
        assert f"{lab:.3f}" in page
    assert f"Class <b>{ev['groups']['composition']['attrs']['class']}</b>" in page
    assert "has not run" not in page


def test_missing_parts_say_which_stage_has_not_run_and_why(night_report):
    from meteorspec.report.html import STAGE_NAMES

    out, index = night_report
    events = index.parent / "events"
    # a sky without a meteor: tracking ran and found nothing, so extraction, lines and composition did not run
    ev = read_event(out / f"{BLANK_ID}.h5")
    missing = sorted(f.split(":", 1)[1] for f in ev["attrs"]["flags"] if f.startswith("stage_missing:"))
    assert missing == ["composition", "lines", "spectrum"] and "no_meteor" in ev["attrs"]["flags"]
    assert not {"spectrum", "composition"} & set(ev["groups"]) and "lines" not in ev["datasets"]
    page = (events / f"{BLANK_ID}.html").read_text()
    for stage in missing:
        if stage == "lines":
            continue  # without a spectrum the page says so once, for the spectrum
        assert f"{STAGE_NAMES[stage]} has not run" in page, stage
    assert "no meteor found" in page
    # a real event whose plasma fit failed: spectrum and lines exist, composition does not, and the page says why
    ev = read_event(out / f"{NO_PLASMA_ID}.h5")
    assert "plasma_fit_failed" in ev["attrs"]["flags"] and "stage_missing:composition" in ev["attrs"]["flags"]
    page = (events / f"{NO_PLASMA_ID}.html").read_text()
    assert f"{STAGE_NAMES['composition']} has not run" in page and f"{NO_PLASMA_ID}_spectrum.png" in page
    reason = ev["groups"]["plasma"]["attrs"]["reason"]
    assert reason and html.escape(reason) in page
    moved = (events / f"{MOVED_ID}.html").read_text()
    assert "Stacked image skipped" in moved and "not found" in moved
    failed = (events / f"{CORRUPT_ID}.html").read_text()
    assert "not a readable FITS file" in failed and "badge failed" in failed


def test_ternary_corners_follow_the_layout():
    # Mg at the origin, Fe at (1, 0), Na at the apex (as classify.ternary_figure): pure compositions on the corners
    x, y = ternary_xy(np.array([0, 0, 1.0]), np.array([1.0, 0, 0]), np.array([0, 1.0, 0]))
    np.testing.assert_allclose(x, [0, 1, 0.5], atol=1e-15)
    np.testing.assert_allclose(y, [0, 0, np.sqrt(3) / 2], atol=1e-15)


def test_window_light_curves_sum_the_group_windows():
    wl = np.arange(500.0, 600.0, 1.0)
    per_frame = np.ones((3, wl.size))
    curves = window_light_curves(per_frame, wl)
    # 588..590.6 holds 588, 589, 590 -> 3 samples; 515.7..519.4: 516-519 -> 4; 526..546 -> 21
    np.testing.assert_array_equal(curves["na"], [3, 3, 3])
    np.testing.assert_array_equal(curves["mg"], [4, 4, 4])
    np.testing.assert_array_equal(curves["fe"], [21, 21, 21])


def test_figures_draw_on_a_given_axes_and_return_its_figure():
    from matplotlib.figure import Figure

    fig = Figure()
    axes = fig.subplots(2, 3).ravel()
    wl = np.linspace(400, 700, 50)
    assert plot_ternary([0.2], [0.5], [0.3], classes=["iron"], ax=axes[0]) is fig
    assert plot_stack(np.ones((8, 10)), ax=axes[1]) is fig
    assert plot_spectrum(wl, np.ones(50), ax=axes[2]) is fig
    assert plot_spectrogram(np.ones((4, 50)), wl, np.arange(4.0), ax=axes[3]) is fig
    assert plot_light_curves(np.arange(4.0), {"na": np.arange(4.0)}, ax=axes[4]) is fig
    assert plot_composition({"na": 0.2, "mg": 0.5, "fe": 0.3, "class": "normal"}, ax=axes[5]) is fig


def test_a_kept_result_after_a_failed_rerun_says_so(tmp_path):
    # a rerun that fails keeps the earlier file (meteorspec.batch.run_event); the report must not
    # show that file as the current result without saying the latest run failed
    folders = make_night(tmp_path / "night", 2)
    events = find_events([tmp_path / "night"])
    out = tmp_path / "out"
    first = run_night(events, out_dir=out).rows
    (folders[0] / "video.fits").write_bytes(b"not a FITS file")
    rows = run_night(events, out_dir=out).rows
    assert rows[0].status == "failed" and "keeps its earlier" in rows[0].error
    index = write_report(out, report_dir=tmp_path / "html")
    text = html.unescape(index.read_text())
    failed_row = next(r for r in text.split("<tr>") if first[0].event_id in r)
    kept_row = next(r for r in text.split("<tr>") if first[1].event_id in r)
    assert "latest run" in failed_row and "video.fits" in failed_row
    assert "latest run" not in kept_row
    page = html.unescape((tmp_path / "html" / "events" / f"{first[0].event_id}.html").read_text())
    assert "The latest run of this event failed" in page and "video.fits" in page
    other = html.unescape((tmp_path / "html" / "events" / f"{first[1].event_id}.html").read_text())
    assert "latest run" not in other
    # a later run that succeeds rewrites the table: the note goes
    (folders[0] / "video.fits").unlink()
    make_night(tmp_path / "again", 1)  # the same seeded video of the first event
    (folders[0] / "video.fits").write_bytes((tmp_path / "again" / "cam" / "ev000" / "video.fits").read_bytes())
    assert run_night(events, out_dir=out).rows[0].status in ("ok", "partial")
    write_report(out, report_dir=tmp_path / "html")
    page = html.unescape((tmp_path / "html" / "events" / f"{first[0].event_id}.html").read_text())
    assert "latest run" not in page


def test_report_of_a_missing_folder_is_a_clear_error(tmp_path):
    with pytest.raises(FileNotFoundError, match="no such folder"):
        write_report(tmp_path / "nope")


# --------------------------------------------------------------------------- real browser

CHROMIUM, CHROMEDRIVER = Path("/usr/bin/chromium"), Path("/usr/bin/chromedriver")


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
        pytest.skip("Debian chromium and chromium-driver are not installed (.ci/run installs them)")
    webdriver = pytest.importorskip("selenium.webdriver", reason="selenium (test extra) not installed")
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = str(CHROMIUM)
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--no-first-run", f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}"):
        opts.add_argument(flag)
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=opts)
    driver.set_page_load_timeout(30)
    yield driver
    driver.quit()


def _file_of(url: str) -> Path:
    parts = urllib.parse.urlsplit(url)
    assert parts.scheme == "file", url
    return Path(urllib.parse.unquote(parts.path))


def test_pages_render_in_a_headless_browser(night_report, browser):
    _, index = night_report
    to_visit, seen = [index.resolve().as_uri()], set()
    n_images = 0
    while to_visit:
        url = to_visit.pop()
        if url in seen:
            continue
        seen.add(url)
        browser.get(url)
        assert browser.execute_script("return document.readyState") == "complete"
        assert browser.title, url
        # every image decoded: complete and a natural width > 0 (a broken image has 0)
        widths = browser.execute_script(
            "return Array.from(document.images).map(i => [i.getAttribute('src'), i.complete, i.naturalWidth]);")
        for src, complete, width in widths:
            assert complete and width > 0, f"{url}: image {src} did not render"
        n_images += len(widths)
        # every link resolves: local files exist; pages are visited in turn
        for href in browser.execute_script("return Array.from(document.links).map(a => a.href);"):
            target = _file_of(href.split("#")[0])
            assert target.is_file(), f"{url}: broken link {href}"
            if target.suffix == ".html":
                to_visit.append(target.as_uri())
    assert len(seen) == 1 + 5  # index and one page per event
    assert n_images >= 1 + 5   # ternary, and at least the complete event's five figures


def test_the_normal_band_follows_the_classify_stage():
    from matplotlib.patches import Polygon

    from meteorspec.classify import expected_normal, load_class_table
    from meteorspec.report.html import normal_band

    band, note = normal_band(np.array([20.0, 40.0, 60.0]))
    assert note == ""
    np.testing.assert_allclose(band["centre"], expected_normal(np.array([20.0, 40.0, 60.0])))
    # the edges keep Fe/Mg and scale Na/Mg by the class table's Na-poor and Na-enhanced factors
    table = load_class_table()
    for edge, cls in (("lower", "Na-poor"), ("upper", "Na-enhanced")):
        ratio = (band[edge][:, 0] / band[edge][:, 1]) / (band["centre"][:, 0] / band["centre"][:, 1])
        np.testing.assert_allclose(ratio, table.threshold(cls, "na_mg_rel"), rtol=1e-12)
        np.testing.assert_allclose(band[edge][:, 2] / band[edge][:, 1], band["centre"][:, 2] / band["centre"][:, 1],
                                   rtol=1e-12)
    np.testing.assert_allclose(band["lower"].sum(axis=1), 1.0, rtol=1e-12)
    fig = plot_ternary([0.2], [0.4], [0.4], classes=["normal"], band=band)
    ax = fig.axes[0]
    assert any(isinstance(p, Polygon) for p in ax.patches)
    assert "expected normal (by speed)" in ax.get_legend_handles_labels()[1]
