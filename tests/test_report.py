"""Night report: figures for every part that exists, notes for the rest, checked in a real browser."""

from __future__ import annotations

import shutil
import urllib.parse
from pathlib import Path

import numpy as np
import pytest

from meteorspec.batch import find_events, run_night
from meteorspec.pipeline import process_event
from meteorspec.report import write_report
from meteorspec.report.figures import (plot_composition, plot_light_curves, plot_spectrogram, plot_spectrum,
                                       plot_stack, plot_ternary, ternary_xy, window_light_curves)
from meteorspec.store import output_path, write_event
from test_batch import make_night

# Contract section 6 line positions (nm, air), NIST ASD values as listed in the contract.
NA_NM, MG_NM, FE_NM = (588.995, 589.592), (516.732, 517.268, 518.360), (526.954, 532.804, 537.149, 539.713)


def complete_event(event_folder: Path, out_dir: Path) -> Path:
    """Process a real (invented) event, then add every later stage's part with invented values.

    The display test needs each figure drawn; the numbers are for display only, not physics.
    """
    result = process_event(event_folder, run_root=event_folder.parents[1])
    assert result.status != "failed", result.error
    t = result.frames.time_s
    wl = np.arange(380.0, 880.0, 0.5)
    lab = np.array(NA_NM + MG_NM + FE_NM)
    amp = np.array([4, 2, 1, 2, 3, 1.5, 1.2, 1.0, 0.8])
    spectrum = 0.05 + (amp[:, None] * np.exp(-0.5 * ((wl - lab[:, None]) / 0.8) ** 2)).sum(axis=0)
    light = np.exp(-0.5 * ((t - t.mean()) / (0.2 * np.ptp(t))) ** 2)
    species = np.array([b"Na I"] * 2 + [b"Mg I"] * 3 + [b"Fe I"] * 4)
    result.parts.update({
        "track": {"datasets": {"time_s": (t, "s"), "x": (10 + 3 * np.arange(t.size, dtype=float), "px"),
                               "y": (12 + np.arange(t.size, dtype=float), "px"), "flux": (100 * light, "adu")}},
        "spectrum": {"datasets": {"wavelength_nm": (wl, "nm"), "flux": (spectrum, "relative"),
                                  "flux_err": (0.02 + 0.05 * spectrum, "relative"),
                                  "per_frame": (light[:, None] * spectrum[None, :], "relative")}},
        "lines": {"datasets": {"species": (species, ""), "lab_nm": (lab, "nm"), "measured_nm": (lab + 0.03, "nm"),
                               "intensity": (amp, "relative"), "intensity_err": (0.1 * amp, "relative"),
                               "snr": (10 * amp, "")}},
        "composition": {"attrs": {"na": 0.3, "mg": 0.45, "fe": 0.25, "na_err": 0.03, "mg_err": 0.04,
                                  "fe_err": 0.03, "class": "normal", "class_confidence": 0.8,
                                  "speed_km_s": 35.0}},
    })
    return write_event(output_path(out_dir, result.event_id), result)


@pytest.fixture(scope="module")
def night_report(tmp_path_factory):
    """A night with a complete event, skeleton-only events and a failed (corrupt) event, and its report."""
    root = tmp_path_factory.mktemp("report")
    folders = make_night(root / "night", 4, corrupt=1)
    out = root / "out"
    run_night(find_events([root / "night"]), out_dir=out)
    complete_event(folders[0], out)
    # an event whose video has been moved away since processing: the stacked image is skipped with a note
    shutil.move(folders[2] / "video.fits", root / "moved.fits")
    index = write_report(out)
    return out, index


def test_every_page_and_figure_is_written(night_report):
    out, index = night_report
    rep = index.parent
    assert sorted(p.name for p in (rep / "events").iterdir()) == sorted(p.stem + ".html" for p in out.glob("*.h5"))
    imgs = {p.name for p in (rep / "img").iterdir()}
    complete = "20261114T030000Z_TB01"
    for kind in ("stack", "spectrum", "spectrogram", "lightcurves", "composition"):
        assert f"{complete}_{kind}.png" in imgs
    assert "ternary.png" in imgs
    page = (rep / "events" / f"{complete}.html").read_text()
    assert "Na I 589.0" not in page  # labels live in the figure, the table lists the lines
    assert "588.995" in page and "normal" in page


def test_missing_parts_say_which_stage_has_not_run(night_report):
    from meteorspec.store import read_event
    from meteorspec.report.html import STAGE_NAMES

    out, index = night_report
    ev = read_event(out / "20261114T030100Z_TB01.h5")
    page = (index.parent / "events" / "20261114T030100Z_TB01.html").read_text()
    missing = [s for s in ("track", "spectrum", "lines", "composition")
               if s not in ev["groups"] and not (s == "lines" and "lines" in ev["datasets"])]
    assert missing, "some stage is expected not to have run on the invented test events"
    for stage in missing:
        if stage == "lines" and "spectrum" in missing:
            continue  # without a spectrum the page says so once, for the spectrum
        assert f"{STAGE_NAMES[stage]} has not run" in page, stage
    moved = (index.parent / "events" / "20261114T030200Z_TB01.html").read_text()
    assert "Stacked image skipped" in moved and "not found" in moved
    failed = (index.parent / "events" / "20261114T030300Z_TB01.html").read_text()
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
    assert len(seen) == 1 + 4  # index and one page per event
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
