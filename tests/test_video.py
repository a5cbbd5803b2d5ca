"""Tests for meteorspec.video: pixel-value model, every video form, fields, bad input.

External facts used here: the pixel-value formula of contract section 3; ITU-R
BT.601 luma weights 0.299, 0.587, 0.114 (from memory) for colour -> grey; the
FITS convention that unsigned 16-bit data is stored as int16 with BZERO = 32768
(FITS standard 4.0, from memory). Everything else is checked by hand or by a
write/read round trip through the real codecs.
"""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import cv2  # only to build colour fixtures that meteorspec itself never writes
import numpy as np
import pytest
from astropy.io import fits
from numpy.testing import assert_allclose, assert_array_equal

from meteorspec.config import Camera, Event, Grating, Lens, Station
from meteorspec.errors import InputError
from meteorspec.video import (
    AVI_FOURCC,
    Frame,
    count_frames,
    encode,
    iter_frames,
    linearize,
    read_raw_frames,
    read_stack,
    write_video,
)

W, H = 32, 24


def make_camera(*, bit_depth: int = 8, gamma: float = 1.0, black: float = 0.0, saturation: float | None = None,
                interlaced: bool = False, field_order: str = "top", width: int = W, height: int = H) -> Camera:
    max_adu = 2**bit_depth - 1
    return Camera(width=width, height=height, bit_depth=bit_depth, gamma=gamma,
                  saturation_adu=max_adu if saturation is None else saturation, interlaced=interlaced,
                  black_level_adu=black, field_order=field_order)


def make_event(video: Path, camera: Camera, *, fps: float = 25.0) -> tuple[Event, Station]:
    """A fictional station 'TST1' and one event for ``video``."""
    station = Station(id="TST1", camera=camera, lens=Lens("equidistant", 700.0, W / 2 - 0.5, H / 2 - 0.5),
                      grating=Grating(600.0, 0.0), path=video.parent / "TST1.toml")
    event = Event(id="evt_test", station="TST1", start_utc=datetime(2026, 1, 1, tzinfo=timezone.utc),
                  fps=fps, video=video, path=video.parent / "event.toml")
    return event, station


def random_frames(rng: np.random.Generator, camera: Camera, n: int = 5) -> np.ndarray:
    dtype = np.uint8 if camera.bit_depth == 8 else np.uint16
    return rng.integers(0, 2**camera.bit_depth, size=(n, camera.height, camera.width)).astype(dtype)


def read_all(path: Path, camera: Camera) -> np.ndarray:
    return np.stack(list(read_raw_frames(path, camera=camera)))


def assert_one_line_error(exc_info: pytest.ExceptionInfo, name: str) -> None:
    msg = str(exc_info.value)
    assert "\n" not in msg
    assert name in msg, msg


# --------------------------------------------------------------------------- pixel values


@pytest.mark.parametrize("bit_depth", [8, 10, 12, 16])
@pytest.mark.parametrize("gamma", [1.0, 0.45])
def test_encode_linearize_round_trip(bit_depth, gamma):
    rng = np.random.default_rng(1)
    black = float(2**bit_depth // 64)
    cam = make_camera(bit_depth=bit_depth, gamma=gamma, black=black)
    full = cam.full_scale_adu
    lin = rng.uniform(0.0, full, size=2000)
    stored = encode(lin, cam)
    assert stored.dtype == (np.uint8 if bit_depth == 8 else np.uint16)
    back, _ = linearize(stored, cam)
    assert back.dtype == np.float32

    # Tolerance: encoding rounds to the nearest ADU (half a step each way); that step,
    # mapped back through the inverse gamma, bounds the error in L. Plus float32 rounding.
    def inverse(s):
        return full * (np.clip(s - black, 0, full) / full) ** (1 / gamma)

    s = stored.astype(float)
    tol = np.maximum(np.abs(inverse(s + 0.5) - inverse(s)), np.abs(inverse(s) - inverse(s - 0.5)))
    assert np.all(np.abs(back - lin) <= tol + 1e-6 * full)
    # The other way round is exact: every stored level survives linearise -> encode.
    levels = np.arange(int(black), 2**bit_depth, dtype=np.int64)
    assert_array_equal(encode(linearize(levels, cam)[0], cam), levels)


def test_linearize_by_hand():
    # full = 255 - 15 = 240; gamma 0.5 so L = full * (d / full)**2 (contract section 3).
    cam = make_camera(gamma=0.5, black=15.0)
    signal, sat = linearize(np.array([0, 15, 75, 135, 255], dtype=np.uint8), cam)
    assert_allclose(signal, [0.0, 0.0, 240 / 16, 240 / 4, 240.0], rtol=1e-6)  # float32 precision
    assert not sat[:-1].any() and sat[-1]


def test_saturation_mask_and_clipping():
    cam = make_camera(bit_depth=12, saturation=4000.0)
    _, sat = linearize(np.array([3999, 4000, 4095], dtype=np.uint16), cam)
    assert_array_equal(sat, [False, True, True])
    # Encoding clips at saturation_adu and at 0; negative light is clipped before the power.
    gam = make_camera(bit_depth=12, gamma=0.45, saturation=4000.0, black=64.0)
    assert_array_equal(encode(np.array([-5.0, 0.0, 1e9]), gam), [64, 64, 4000])
    with pytest.raises(ValueError):
        encode(np.array([np.nan]), cam)


# --------------------------------------------------------------------------- each form round trip


FORMS = [
    ("video.avi", 8, None),
    ("video.fits", 12, None),
    ("frames_png", 16, "png"),
    ("frames_tiff/", 12, "tiff"),
    ("frames_fits", 10, "fits"),
]


@pytest.mark.parametrize("name,bit_depth,frame_format", FORMS)
def test_write_read_exact(tmp_path, name, bit_depth, frame_format):
    rng = np.random.default_rng(2)
    cam = make_camera(bit_depth=bit_depth)
    frames = random_frames(rng, cam, n=6)
    frames[0, 0, 0] = 2**bit_depth - 1  # the full camera range must survive unscaled
    out = write_video(tmp_path / name, frames, camera=cam, fps=25.0, frame_format=frame_format)
    got = read_all(out, cam)
    assert got.dtype == frames.dtype
    assert_array_equal(got, frames)
    assert count_frames(out) == 6
    # Nothing else left beside the output (no temporary files).
    assert sorted(p.name for p in tmp_path.iterdir()) == [out.name]


@pytest.mark.parametrize("name,bit_depth,frame_format", FORMS)
def test_write_is_deterministic(tmp_path, name, bit_depth, frame_format):
    cam = make_camera(bit_depth=bit_depth)
    frames = random_frames(np.random.default_rng(3), cam, n=3)
    a = write_video(tmp_path / "a" / name, frames, camera=cam, fps=25.0, frame_format=frame_format)
    b = write_video(tmp_path / "b" / name, frames, camera=cam, fps=25.0, frame_format=frame_format)
    files_a = sorted(a.iterdir()) if a.is_dir() else [a]
    files_b = sorted(b.iterdir()) if b.is_dir() else [b]
    assert [p.name for p in files_a] == [p.name for p in files_b]
    for pa, pb in zip(files_a, files_b):
        assert pa.read_bytes() == pb.read_bytes()


def test_avi_codec_is_lossless_ffv1(tmp_path):
    cam = make_camera()
    out = write_video(tmp_path / "v.avi", random_frames(np.random.default_rng(4), cam), camera=cam, fps=30.0)
    assert AVI_FOURCC == "FFV1"
    assert b"FFV1" in out.read_bytes()[:1024]  # fourcc in the AVI stream header


def test_fits_cube_layout(tmp_path):
    cam = make_camera(bit_depth=16)
    frames = random_frames(np.random.default_rng(5), cam, n=4)
    out = write_video(tmp_path / "c.fits", frames, camera=cam, fps=25.0)
    header = fits.getheader(out)
    assert (header["NAXIS"], header["NAXIS1"], header["NAXIS2"], header["NAXIS3"]) == (3, W, H, 4)
    # FITS standard (from memory): unsigned 16-bit is int16 with BZERO = 32768.
    assert header["BITPIX"] == 16 and header["BZERO"] == 32768
    assert "DATE" not in header


def test_folder_sorted_by_number_not_name(tmp_path):
    cam = make_camera()
    folder = tmp_path / "frames"
    folder.mkdir()
    for k in range(1, 12):  # img_2 sorts after img_10 lexically
        frame = np.full((H, W), k, dtype=np.uint8)
        (folder / f"img_{k}.png").write_bytes(cv2.imencode(".png", frame)[1].tobytes())
    (folder / "notes.txt").write_text("ignored")
    got = [int(f[0, 0]) for f in read_raw_frames(folder, camera=cam)]
    assert got == list(range(1, 12))


def test_write_refuses_bad_requests(tmp_path):
    cam12 = make_camera(bit_depth=12)
    frames = random_frames(np.random.default_rng(6), cam12, n=2)
    with pytest.raises(ValueError, match="8-bit"):
        write_video(tmp_path / "v.avi", frames, camera=cam12, fps=25.0)
    with pytest.raises(ValueError, match="2x"):
        write_video(tmp_path / "v.fits", frames[:, :2], camera=cam12, fps=25.0)
    with pytest.raises(ValueError):
        write_video(tmp_path / "v.fits", frames + 4096, camera=cam12, fps=25.0)
    with pytest.raises(ValueError):
        write_video(tmp_path / "v.mov", frames, camera=cam12, fps=25.0)
    odd = make_camera(width=W + 1)
    with pytest.raises(ValueError, match="even"):
        write_video(tmp_path / "v.avi", np.zeros((1, H, W + 1), np.uint8), camera=odd, fps=25.0)
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "keep.txt").write_text("x")
    with pytest.raises(FileExistsError):
        write_video(tmp_path / "full", frames, camera=cam12, fps=25.0, frame_format="png")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["full"]


def test_crash_mid_write_leaves_nothing(tmp_path, monkeypatch):
    import meteorspec.video as video

    calls = []

    def failing(frame, fmt):
        calls.append(1)
        if len(calls) == 2:
            raise OSError("disk full (simulated)")
        return cv2.imencode(".png", frame)[1].tobytes()

    monkeypatch.setattr(video, "_encode_image", failing)
    cam = make_camera()
    with pytest.raises(OSError, match="simulated"):
        write_video(tmp_path / "frames", random_frames(np.random.default_rng(7), cam), camera=cam, fps=25.0)
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- colour, frames, fields


def test_colour_avi_to_bt601_luminance(tmp_path):
    rng = np.random.default_rng(8)
    bgr = rng.integers(0, 256, size=(3, H, W, 3), dtype=np.uint8)
    path = tmp_path / "colour.avi"
    writer = cv2.VideoWriter(str(path), cv2.CAP_FFMPEG, cv2.VideoWriter_fourcc(*"FFV1"), 25.0, (W, H), True)
    for f in bgr:
        writer.write(f)
    writer.release()
    got = read_all(path, make_camera())
    b, g, r = (bgr[..., i].astype(float) for i in range(3))
    # ITU-R BT.601 luma weights (from memory); float32 arithmetic -> 1e-4 ADU.
    assert_allclose(got, 0.299 * r + 0.587 * g + 0.114 * b, rtol=0, atol=1e-4)


def test_progressive_frames_times(tmp_path):
    cam = make_camera(gamma=0.45, black=10.0, saturation=250.0)
    frames = random_frames(np.random.default_rng(9), cam, n=4)
    video = write_video(tmp_path / "v.avi", frames, camera=cam, fps=20.0)
    event, station = make_event(video, cam, fps=20.0)
    out = list(iter_frames(event, station))
    assert [f.index for f in out] == [0, 1, 2, 3]
    # Contract section 1: frame k is exposed during [k/fps, (k+1)/fps); time is the middle.
    assert_allclose([f.time_s for f in out], [0.025, 0.075, 0.125, 0.175])
    assert all(f.exposure_s == pytest.approx(0.05) for f in out)
    for f, raw in zip(out, frames):
        sig, sat = linearize(raw, cam)
        assert_array_equal(f.signal, sig)
        assert_array_equal(f.saturated, raw >= 250)
        assert (f.y_start_px, f.y_step_px) == (0, 1)
        assert_array_equal(f.y_px(), np.arange(H))


def test_grey_avi_decodes_into_the_callers_buffer(tmp_path):
    # An 8-bit grey FFV1 stream is decoded straight into the slot offered (no colour round
    # trip); the values are exactly those written, and the stack's frames match linearize().
    cam = make_camera(gamma=0.45, black=10.0, saturation=250.0)
    frames = random_frames(np.random.default_rng(12), cam, n=4)
    video = write_video(tmp_path / "v.avi", frames, camera=cam, fps=20.0)
    slots = np.zeros_like(frames)
    got = list(read_raw_frames(video, camera=cam, slot=lambda k: slots[k] if k < len(slots) else None))
    assert all(np.shares_memory(g, slots[k]) for k, g in enumerate(got))
    assert_array_equal(slots, frames)
    event, station = make_event(video, cam, fps=20.0)
    stack = read_stack(event, station)
    assert_array_equal(stack.stored, frames)
    for k, raw in enumerate(frames):
        sig, sat = linearize(raw, cam)
        assert_array_equal(stack[k].signal, sig)
        assert_array_equal(stack[k].saturated, sat)


def test_read_stack_hands_each_frame_over_while_decoding(tmp_path):
    # on_frame runs in the caller's thread, in frame order, on the frames as stored; the stack
    # is the same as without it. Errors of the decoder and of the caller both reach the caller,
    # and the decoding thread ends either way.
    import threading

    cam = make_camera()
    frames = random_frames(np.random.default_rng(21), cam, n=12)
    video = write_video(tmp_path / "v.avi", frames, camera=cam, fps=25.0)
    event, station = make_event(video, cam)
    seen = []

    def on_frame(k, raw):
        assert threading.current_thread() is threading.main_thread()
        seen.append((k, raw.copy()))

    stack = read_stack(event, station, on_frame=on_frame)
    assert [k for k, _ in seen] == list(range(12))
    assert_array_equal(np.stack([r for _, r in seen]), frames)
    assert_array_equal(stack.stored, read_stack(event, station).stored)

    cut = tmp_path / "cut.avi"
    cut.write_bytes(video.read_bytes()[: video.stat().st_size // 2])
    cut_event, _ = make_event(cut, cam)
    with pytest.raises(InputError) as info:
        read_stack(cut_event, station, on_frame=lambda k, raw: None)
    assert_one_line_error(info, "cut.avi")

    def fail_at_3(k, raw):
        if k == 3:
            raise RuntimeError("caller stops")

    with pytest.raises(RuntimeError, match="caller stops"):
        read_stack(event, station, on_frame=fail_at_3)
    assert not any(t.name == "meteorspec-decode" for t in threading.enumerate())


@pytest.mark.parametrize("bit_depth,saturation,interlaced", [(8, 250.0, False), (8, 200.5, True), (12, 4000.0, False)])
def test_saturated_counts_from_stored_values(bit_depth, saturation, interlaced):
    # The per-frame (per-field) count taken on the stored values equals the count of each
    # linearised frame's saturation mask, including a threshold between two stored values.
    from meteorspec.video import FrameStack

    cam = make_camera(bit_depth=bit_depth, saturation=saturation, interlaced=interlaced, gamma=0.6)
    stored = random_frames(np.random.default_rng(bit_depth), cam, n=6)
    stack = FrameStack(stored=stored, camera=cam, fps=25.0)
    expected = [int(np.count_nonzero(f.saturated)) for f in stack]
    assert sum(expected) > 0
    assert_array_equal(stack.saturated_px_counts(), expected)


@pytest.mark.parametrize("bit_depth,gamma,interlaced,field_order,as_float", [
    (8, 0.6, False, "top", False), (8, 1.0, True, "bottom", False), (12, 0.45, True, "top", False),
    (12, 1.0, False, "top", True)])
def test_stack_frames_linearise_on_demand(bit_depth, gamma, interlaced, field_order, as_float):
    # A FrameStack's frames read a window or scattered pixels without linearising the whole
    # frame; every way of reading gives the values of linearize() (contract section 3) on the
    # frame's (field's) stored rows. as_float: stored values without a lookup table.
    from meteorspec.video import FrameStack, StoredFrame

    cam = make_camera(bit_depth=bit_depth, gamma=gamma, black=3.0, saturation=2**bit_depth - 9.5,
                      interlaced=interlaced, field_order=field_order)
    stored = random_frames(np.random.default_rng(bit_depth), cam, n=3)
    if as_float:
        stored = stored.astype(np.float32)
    stack = FrameStack(stored=stored, camera=cam, fps=25.0)
    rng = np.random.default_rng(1)
    step = 2 if interlaced else 1
    first = 0 if field_order == "top" else 1
    n_saturated = 0
    for j in range(len(stack)):
        k, second = divmod(j, step)
        start = (first if not second else 1 - first) if interlaced else 0
        signal, saturated = linearize(stored[k, start::step], cam)
        frame = stack[j]
        assert isinstance(frame, StoredFrame) and frame.shape == signal.shape
        assert "_linear" not in frame.__dict__  # nothing linearised yet
        rows, cols = rng.integers(0, signal.shape[0], 50), rng.integers(0, W, 50)
        for index in ((rows, cols), (slice(2, 7), slice(5, 20))):
            got_signal, got_saturated = frame.pixels(*index)
            assert_array_equal(got_signal, signal[index])
            assert_array_equal(got_saturated, saturated[index])
        assert "_linear" not in frame.__dict__
        assert frame.signal.dtype == np.float32
        assert_array_equal(frame.signal, signal)
        assert_array_equal(frame.saturated, saturated)
        assert_array_equal(frame.pixels(rows, cols)[0], signal[rows, cols])
        assert (frame.index, frame.y_start_px, frame.y_step_px) == (j, start, step)
        assert frame.time_s == pytest.approx((j + 0.5) / (25.0 * step))
        n_saturated += int(saturated.sum())
    assert n_saturated > 0  # the saturation mask was exercised


@pytest.mark.parametrize("field_order", ["top", "bottom"])
def test_interlaced_fields(tmp_path, field_order):
    cam = make_camera(interlaced=True, field_order=field_order)
    # Each stored frame k: even rows hold 10 + k, odd rows hold 100 + k, so a field's origin is visible.
    frames = np.empty((2, H, W), np.uint8)
    for k in range(2):
        frames[k, 0::2] = 10 + k
        frames[k, 1::2] = 100 + k
    video = write_video(tmp_path / "v.fits", frames, camera=cam, fps=25.0)
    event, station = make_event(video, cam, fps=25.0)
    fields = list(iter_frames(event, station))
    assert [f.index for f in fields] == [0, 1, 2, 3]
    # Contract section 1: field j exposed during [j/(2 fps), (j+1)/(2 fps)); time is the middle.
    assert_allclose([f.time_s for f in fields], [(j + 0.5) / 50.0 for j in range(4)])
    assert all(f.exposure_s == pytest.approx(0.02) for f in fields)
    first = 0 if field_order == "top" else 1  # "top": even rows exposed first
    for j, f in enumerate(fields):
        k, second = divmod(j, 2)
        start = first if not second else 1 - first
        assert f.signal.shape == (H // 2, W)
        assert (f.y_start_px, f.y_step_px) == (start, 2)
        assert_array_equal(f.y_px(), np.arange(start, H, 2))
        assert np.all(f.signal == (10 if start == 0 else 100) + k)
        assert_allclose(f.row_of_y(f.y_px()), np.arange(H // 2))
        assert f.row_of_y(start + 3.0) == pytest.approx(1.5)


def test_frame_row_of_y_vectorised():
    f = Frame(index=0, time_s=0.01, exposure_s=0.02, signal=np.zeros((5, 3), np.float32),
              saturated=np.zeros((5, 3), bool), y_start_px=1, y_step_px=2)
    assert_allclose(f.row_of_y(np.array([1.0, 2.0, 9.0])), [0.0, 0.5, 4.0])


# --------------------------------------------------------------------------- bad input


def raises_input_error(path: Path, camera: Camera, name: str | None = None, *, count: bool = False):
    """Read everything (and optionally count); expect a one-line InputError naming the file."""
    with pytest.raises(InputError) as info:
        if count:
            count_frames(path)
        else:
            for _ in read_raw_frames(path, camera=camera):
                pass
    assert_one_line_error(info, path.name if name is None else name)
    return info


def write_fits(path: Path, data: np.ndarray) -> Path:
    fits.PrimaryHDU(data).writeto(path)
    return path


def test_missing_empty_and_garbage_files(tmp_path):
    cam = make_camera()
    raises_input_error(tmp_path / "absent.avi", cam)
    raises_input_error(tmp_path / "absent.avi", cam, count=True)
    (tmp_path / "empty.avi").write_bytes(b"")
    info = raises_input_error(tmp_path / "empty.avi", cam)
    assert "empty" in str(info.value)
    (tmp_path / "junk.avi").write_bytes(b"this is not a video" * 50)
    raises_input_error(tmp_path / "junk.avi", cam)
    raises_input_error(tmp_path / "junk.avi", cam, count=True)
    (tmp_path / "junk.fits").write_bytes(b"this is not FITS" * 300)
    raises_input_error(tmp_path / "junk.fits", cam)
    raises_input_error(tmp_path / "junk.fits", cam, count=True)
    (tmp_path / "one.png").write_bytes(cv2.imencode(".png", np.zeros((H, W), np.uint8))[1].tobytes())
    raises_input_error(tmp_path / "one.png", cam)


def test_truncated_avi_yields_good_frames_then_fails(tmp_path):
    cam = make_camera()
    frames = random_frames(np.random.default_rng(10), cam, n=20)
    whole = write_video(tmp_path / "whole.avi", frames, camera=cam, fps=25.0).read_bytes()
    cut = tmp_path / "cut.avi"
    cut.write_bytes(whole[: len(whole) // 2])
    got = []
    with pytest.raises(InputError) as info:
        for f in read_raw_frames(cut, camera=cam):
            got.append(f)
    assert_one_line_error(info, "cut.avi")
    assert "truncated" in str(info.value) and "20" in str(info.value)
    assert 0 < len(got) < 20
    assert_array_equal(np.stack(got[:-1]), frames[: len(got) - 1])  # frames before the cut are intact


def test_truncated_fits(tmp_path):
    cam = make_camera(bit_depth=12)
    whole = write_fits(tmp_path / "whole.fits", random_frames(np.random.default_rng(11), cam, n=8)).read_bytes()
    cut = tmp_path / "cut.fits"
    cut.write_bytes(whole[:-3000])
    raises_input_error(cut, cam)


def test_wrong_frame_size(tmp_path):
    cam = make_camera()
    other = make_camera(width=W + 2)
    avi = write_video(tmp_path / "v.avi", random_frames(np.random.default_rng(12), cam, n=2), camera=cam, fps=25.0)
    info = raises_input_error(avi, other)
    assert "frame 0" in str(info.value)
    cube = write_video(tmp_path / "v.fits", random_frames(np.random.default_rng(12), cam, n=2), camera=cam,
                       fps=25.0)
    raises_input_error(cube, other)


def test_fits_wrong_dimensionality_and_nan(tmp_path):
    cam = make_camera(bit_depth=16)
    raises_input_error(write_fits(tmp_path / "flat.fits", np.zeros((H, W), np.uint16)), cam)
    raises_input_error(tmp_path / "flat.fits", cam, count=True)
    raises_input_error(write_fits(tmp_path / "four.fits", np.zeros((2, 2, H, W), np.uint16)), cam)
    cube = np.ones((3, H, W), np.float32)
    cube[2, 5, 5] = np.nan
    info = raises_input_error(write_fits(tmp_path / "nan.fits", cube), cam)
    assert "NaN" in str(info.value) and "frame 2" in str(info.value)
    raises_input_error(write_fits(tmp_path / "none.fits", np.zeros((0, H, W), np.uint16)), cam)


def test_value_above_bit_depth(tmp_path):
    cam8 = make_camera(bit_depth=8)
    folder = tmp_path / "frames16"
    folder.mkdir()
    frame = np.full((H, W), 100, np.uint16)
    frame[3, 4] = 300  # a 16-bit PNG value an 8-bit camera cannot produce
    (folder / "frame_00000.png").write_bytes(cv2.imencode(".png", frame)[1].tobytes())
    info = raises_input_error(folder, cam8, "frame_00000.png")
    assert "300" in str(info.value)
    cam12 = make_camera(bit_depth=12)
    raises_input_error(write_fits(tmp_path / "big.fits", np.full((1, H, W), 5000, np.uint16)), cam12)


def test_eight_bit_container_for_deeper_camera(tmp_path):
    cam8 = make_camera()
    avi = write_video(tmp_path / "v.avi", random_frames(np.random.default_rng(13), cam8, n=1), camera=cam8,
                      fps=25.0)
    info = raises_input_error(avi, make_camera(bit_depth=12))
    assert "8-bit" in str(info.value)


def test_folder_errors(tmp_path):
    cam = make_camera()
    png = cv2.imencode(".png", np.zeros((H, W), np.uint8))[1].tobytes()
    empty = tmp_path / "empty"
    empty.mkdir()
    raises_input_error(empty, cam)
    raises_input_error(empty, cam, count=True)

    gap = tmp_path / "gap"
    gap.mkdir()
    for k in (0, 1, 3):
        (gap / f"frame_{k:05d}.png").write_bytes(png)
    info = raises_input_error(gap, cam)
    assert "frame number 2" in str(info.value)
    raises_input_error(gap, cam, count=True)

    mixed = tmp_path / "mixed"
    mixed.mkdir()
    (mixed / "frame_0.png").write_bytes(png)
    write_fits(mixed / "frame_1.fits", np.zeros((H, W), np.uint8))
    raises_input_error(mixed, cam)

    broken = tmp_path / "broken"
    broken.mkdir()
    (broken / "frame_0.png").write_bytes(png)
    (broken / "frame_1.png").write_bytes(png[: len(png) // 2])
    raises_input_error(broken, cam, "frame_1.png")

    cube_in_folder = tmp_path / "cubes"
    cube_in_folder.mkdir()
    write_fits(cube_in_folder / "frame_0.fits", np.zeros((2, H, W), np.uint8))
    raises_input_error(cube_in_folder, cam, "frame_0.fits")


def test_event_station_mismatch(tmp_path):
    cam = make_camera()
    video = write_video(tmp_path / "v.avi", random_frames(np.random.default_rng(14), cam, n=1), camera=cam,
                        fps=25.0)
    event, station = make_event(video, cam)
    wrong = Station(id="OTHER", camera=cam, lens=station.lens, grating=station.grating, path=station.path)
    with pytest.raises(InputError) as info:
        next(iter_frames(event, wrong))
    assert_one_line_error(info, "event.toml")
