"""Reading and writing event video: the only module that touches OpenCV and FITS.

Video forms (contract section 4): any container OpenCV's FFmpeg backend reads,
a FITS cube (``NAXIS3`` = frames), or a folder of numbered single-frame PNG,
TIFF or FITS images. Stored values are camera ADU (never rescaled); this module
turns them into linear signal ``L`` (contract section 3, "Pixel values") and,
for interlaced cameras, splits each stored frame into its two fields in time
order.

Every problem with an input file raises :class:`~meteorspec.errors.InputError`
with a one-line message naming the file; OpenCV and astropy errors and warnings
never escape. Readers stream: one frame in memory at a time.
"""

from __future__ import annotations

import math
import mmap
import os
import queue

# OpenCV and its FFmpeg backend print decoder complaints straight to stderr; the
# reader reports problems itself, so keep them quiet unless the user asked for logs.
os.environ.setdefault("OPENCV_LOG_LEVEL", "OFF")
os.environ.setdefault("OPENCV_FFMPEG_LOGLEVEL", "-8")  # AV_LOG_QUIET

import re
import shutil
import threading
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import cv2
import numpy as np
from astropy.io import fits

from .config import Camera, Event, Station
from .errors import InputError

try:  # silence OpenCV's own logger as well, in case cv2 was imported before us
    cv2.utils.logging.setLogLevel(cv2.utils.logging.LOG_LEVEL_SILENT)
except AttributeError:  # pragma: no cover - very old builds without cv2.utils.logging
    pass

__all__ = [
    "Frame",
    "StoredFrame",
    "FrameStack",
    "linearize",
    "encode",
    "read_raw_frames",
    "iter_frames",
    "count_frames",
    "write_video",
    "AVI_FOURCC",
    "FRAME_FORMATS",
]

#: Lossless codec used for AVI output; checked to round-trip 8-bit grey exactly.
AVI_FOURCC = "FFV1"
#: Single-frame formats accepted for a folder of frames, by file suffix.
_FRAME_SUFFIXES = {".png": "png", ".tif": "tiff", ".tiff": "tiff", ".fits": "fits", ".fit": "fits",
                   ".fts": "fits"}
FRAME_FORMATS = ("png", "tiff", "fits")
_FITS_SUFFIXES = (".fits", ".fit", ".fts")
# ITU-R BT.601 luma weights (R, G, B), from memory; the usual choice for video luminance.
_BT601_RGB = (0.299, 0.587, 0.114)
_DIGITS_RE = re.compile(r"(\d+)")


# --------------------------------------------------------------------------- frame container


@dataclass(frozen=True, eq=False)
class Frame:
    """One linearised frame, or one field of an interlaced frame.

    Parameters
    ----------
    index : int
        Frame number from 0; for interlaced video the field number in time order.
    time_s : float
        Middle of the exposure, seconds since the start of the first frame
        (contract section 1): ``(k + 0.5) / fps``, fields ``(j + 0.5) / (2 fps)``.
    exposure_s : float
        ``1 / fps``, or ``1 / (2 fps)`` for a field.
    signal : ndarray of shape (n_rows, width), float32
        Linear signal ``L`` in ADU above the black level.
    saturated : ndarray of shape (n_rows, width), bool
        True where the stored value was at or above ``saturation_adu``.
    y_start_px : int
        Image row (y) of ``signal[0]``.
    y_step_px : int
        Image rows between consecutive rows of ``signal``: 1, or 2 for a field.
    """

    index: int
    time_s: float
    exposure_s: float
    signal: np.ndarray
    saturated: np.ndarray
    y_start_px: int = 0
    y_step_px: int = 1

    def __post_init__(self) -> None:
        if self.signal.ndim != 2 or self.saturated.shape != self.signal.shape:
            raise ValueError("signal must be 2-D and saturated must have the same shape")
        if self.y_step_px < 1:
            raise ValueError(f"y_step_px must be >= 1, got {self.y_step_px}")

    @property
    def shape(self) -> tuple[int, int]:
        """``(n_rows, width)`` of ``signal``."""
        return self.signal.shape

    def pixels(self, rows, cols) -> tuple[np.ndarray, np.ndarray]:
        """``signal`` and ``saturated`` at ``[rows, cols]`` (slices or integer index arrays).

        Stages that read a few pixels of a frame ask for them here, so that a
        :class:`StoredFrame` linearises only those.
        """
        return self.signal[rows, cols], self.saturated[rows, cols]

    def y_px(self) -> np.ndarray:
        """Image y of every row of ``signal``, ndarray of shape (n_rows,)."""
        return self.y_start_px + self.y_step_px * np.arange(self.shape[0], dtype=float)

    def row_of_y(self, y_px: float | np.ndarray) -> np.ndarray:
        """Fractional row index into ``signal`` for image ``y_px`` (vectorised).

        Rows of a field are ``y_step_px`` image rows apart, so image y halfway
        between two field rows maps to a half-integer row index.
        """
        return (np.asarray(y_px, dtype=float) - self.y_start_px) / self.y_step_px


# --------------------------------------------------------------------------- pixel values


def linearize(raw: np.ndarray, camera: Camera) -> tuple[np.ndarray, np.ndarray]:
    """Stored ADU -> linear signal and saturation mask.

    Parameters
    ----------
    raw : ndarray
        Stored pixel values (any shape, integer or float).
    camera : Camera
        Bit depth, gamma, black level and saturation level.

    Returns
    -------
    signal : ndarray, float32
        Linear signal ``L`` in ADU above black, same shape as ``raw``.
    saturated : ndarray, bool
        True where ``raw >= camera.saturation_adu``.

    Notes
    -----
    Inverse of contract section 3 "Pixel values": with
    ``full = 2**bit_depth - 1 - black_level_adu``,
    ``L = full * (max(stored - black, 0) / full) ** (1 / gamma)``.
    A saturated pixel's ``L`` is only a lower bound; use the mask.
    """
    stored = np.asarray(raw, dtype=np.float64)
    full = camera.full_scale_adu
    above = np.clip(stored - camera.black_level_adu, 0.0, None)
    if camera.gamma == 1.0:
        signal = above
    else:
        signal = full * (above / full) ** (1.0 / camera.gamma)
    return signal.astype(np.float32), stored >= camera.saturation_adu


def encode(linear: np.ndarray, camera: Camera) -> np.ndarray:
    """Linear signal -> stored values, as the camera would write them.

    Parameters
    ----------
    linear : ndarray
        Linear signal ``L`` in ADU above black (negative values are clipped to 0).
    camera : Camera

    Returns
    -------
    ndarray
        ``black + full * (L / full) ** gamma``, rounded to the nearest integer and
        clipped to ``[0, saturation_adu]``; uint8 for 8-bit cameras, else uint16.

    Raises
    ------
    ValueError
        If ``linear`` holds NaN.
    """
    lin = np.asarray(linear, dtype=np.float64)
    if np.isnan(lin).any():
        raise ValueError("encode: linear signal holds NaN")
    full = camera.full_scale_adu
    lin = np.clip(lin, 0.0, None)
    coded = lin if camera.gamma == 1.0 else full * (lin / full) ** camera.gamma
    stored = np.clip(np.rint(camera.black_level_adu + coded), 0.0, np.floor(camera.saturation_adu))
    return stored.astype(_stored_dtype(camera.bit_depth))


def _stored_dtype(bit_depth: int) -> type:
    return np.uint8 if bit_depth <= 8 else np.uint16


# --------------------------------------------------------------------------- reading


def read_raw_frames(video: str | Path, *, camera: Camera,
                    slot: Callable[[int], np.ndarray | None] | None = None) -> Iterator[np.ndarray]:
    """Stream the stored frames of a video, one at a time.

    Parameters
    ----------
    video : str or Path
        A container OpenCV reads, a FITS cube, or a folder of numbered frames.
    camera : Camera
        Expected frame size and bit depth.
    slot : callable, optional
        ``slot(n)`` may return a C-contiguous ``(height, width)`` uint8 array for
        stored frame ``n``; a reader that can decode straight into it (8-bit
        grey containers) does so and yields that array, which spares the caller
        a copy. Any other reader ignores it.

    Yields
    ------
    ndarray of shape (height, width)
        Stored values: uint8 (8-bit cameras) or uint16 for integer data; float32
        for colour sources (BT.601 luminance) and float64 for floating-point FITS.

    Raises
    ------
    InputError
        Missing, unreadable, corrupt, truncated or empty video; a frame of the
        wrong size or dimensionality; NaN; values outside ``[0, 2**bit_depth - 1]``;
        a folder with a missing frame number. A truncated stream raises after the
        frames that did decode were yielded.
    """
    path = Path(video)
    if not path.exists():
        raise InputError(path, "video not found")
    if path.is_dir():
        frames = _read_folder(path, camera)
    elif path.suffix.lower() in _FITS_SUFFIXES:
        frames = _read_fits_cube(path, camera)
    elif path.suffix.lower() in _FRAME_SUFFIXES:
        raise InputError(path, "a single image is not a video; put numbered frames in a folder")
    else:
        frames = _read_container(path, camera, slot=slot)
    yield from frames


def _check_station(event: Event, station: Station) -> None:
    if event.station != station.id:
        raise InputError(event.path, f"event is from station {event.station!r} but station file "
                         f"{station.path} is {station.id!r}", key="[event] station")


def _lookup_table(camera: Camera, dtype: np.dtype) -> tuple[np.ndarray, np.ndarray] | None:
    """Linear value and saturation of every possible stored integer, for fast linearisation."""
    if dtype.kind != "u" or dtype.itemsize > 2:
        return None
    return linearize(np.arange(2 ** (8 * dtype.itemsize)), camera)


def _linearized(raw: np.ndarray, camera: Camera,
                lut: tuple[np.ndarray, np.ndarray] | None) -> tuple[np.ndarray, np.ndarray]:
    """:func:`linearize` of stored values, through the table of all stored values when there is one."""
    if lut is None:
        return linearize(raw, camera)
    # OpenCV's table lookup is about 3x numpy's gather on 8-bit frames; a comparison is
    # 40x cheaper than gathering the saturation table (same values: both are exact).
    signal = cv2.LUT(raw, lut[0]) if raw.dtype == np.uint8 else lut[0][raw]
    return signal, raw >= camera.saturation_adu


class StoredFrame(Frame):
    """A :class:`Frame` of a :class:`FrameStack`, linearised when its pixels are read.

    ``signal`` and ``saturated`` are computed from the stored values on first
    access (and kept); :meth:`pixels` linearises only the pixels asked for. The
    tracker, the background refit and the extraction read a small window or band
    of each frame: a whole 1280x960 frame costs a 5 MB float32 copy and its page
    faults, the band a few thousand values. The values are those of
    :func:`linearize` either way.

    Parameters
    ----------
    index, time_s, exposure_s, y_start_px, y_step_px
        As :class:`Frame`.
    stored : ndarray of shape (n_rows, width)
        The frame's (or field's) stored values; a view into the stack.
    camera : Camera
    lut : tuple of ndarray or None
        Linear value and saturation of every possible stored integer, or None.
    """

    def __init__(self, index: int, time_s: float, exposure_s: float, stored: np.ndarray, camera: Camera,
                 lut: tuple[np.ndarray, np.ndarray] | None, y_start_px: int = 0, y_step_px: int = 1) -> None:
        # Frame is a frozen dataclass; signal and saturated are the lazy attributes below
        for name, value in (("index", index), ("time_s", time_s), ("exposure_s", exposure_s),
                            ("stored", stored), ("camera", camera), ("_table", lut),
                            ("y_start_px", y_start_px), ("y_step_px", y_step_px)):
            object.__setattr__(self, name, value)
        if stored.ndim != 2 or y_step_px < 1:
            raise ValueError("stored must be 2-D and y_step_px >= 1")

    @cached_property
    def _linear(self) -> tuple[np.ndarray, np.ndarray]:
        return _linearized(np.ascontiguousarray(self.stored), self.camera, self._table)

    @property
    def signal(self) -> np.ndarray:  # type: ignore[override]
        return self._linear[0]

    @property
    def saturated(self) -> np.ndarray:  # type: ignore[override]
        return self._linear[1]

    @property
    def shape(self) -> tuple[int, int]:
        return self.stored.shape

    def pixels(self, rows, cols) -> tuple[np.ndarray, np.ndarray]:
        if "_linear" in self.__dict__:
            return super().pixels(rows, cols)
        values = self.stored[rows, cols]
        if self._table is None or values.ndim == 2:  # a window: OpenCV's lookup on a contiguous copy
            return _linearized(np.ascontiguousarray(values), self.camera, self._table)
        return self._table[0][values], values >= self.camera.saturation_adu


def _frames_of(k: int, raw: np.ndarray, camera: Camera, fps: float,
               lut: tuple[np.ndarray, np.ndarray] | None) -> list[Frame]:
    """The frame, or its two fields in time order, of stored frame ``k`` (linearised now)."""
    signal, saturated = _linearized(raw, camera, lut)
    if not camera.interlaced:
        return [Frame(index=k, time_s=(k + 0.5) / fps, exposure_s=1.0 / fps,
                      signal=signal, saturated=saturated)]
    first_row = 0 if camera.field_order == "top" else 1
    fields = []
    for half, start in enumerate((first_row, 1 - first_row)):
        j = 2 * k + half
        fields.append(Frame(index=j, time_s=(j + 0.5) / (2.0 * fps), exposure_s=1.0 / (2.0 * fps),
                            signal=np.ascontiguousarray(signal[start::2]),
                            saturated=np.ascontiguousarray(saturated[start::2]),
                            y_start_px=start, y_step_px=2))
    return fields


def iter_frames(event: Event, station: Station) -> Iterator[Frame]:
    """Stream the event's video as linearised :class:`Frame` objects.

    For an interlaced camera each stored frame yields two fields in time order
    (``field_order = "top"``: even rows first), each with half the rows.

    Raises
    ------
    InputError
        As :func:`read_raw_frames`, or if the station is not the event's station.
    """
    _check_station(event, station)
    camera = station.camera
    lut = None
    for k, raw in enumerate(read_raw_frames(event.video, camera=camera)):
        if k == 0:
            lut = _lookup_table(camera, raw.dtype)
        yield from _frames_of(k, raw, camera, float(event.fps), lut)


@dataclass(frozen=True, eq=False)
class FrameStack:
    """A whole video decoded once and kept as stored values; frames are linearised on access.

    The stored cube (uint8 or uint16) is the cheapest complete copy of the
    event: every later stage can visit frames several times without decoding
    again and without a float copy of the whole video.

    Supports ``len()``, indexing (returns :class:`Frame`; fields for an
    interlaced camera) and iteration.
    """

    stored: np.ndarray   # (n_stored_frames, height, width)
    camera: Camera
    fps: float

    @cached_property
    def _lut(self) -> tuple[np.ndarray, np.ndarray] | None:
        return _lookup_table(self.camera, self.stored.dtype)

    @property
    def fields_per_frame(self) -> int:
        return 2 if self.camera.interlaced else 1

    def __len__(self) -> int:
        return self.stored.shape[0] * self.fields_per_frame

    def __getitem__(self, index: int) -> Frame:
        n = len(self)
        if not -n <= index < n:
            raise IndexError(f"frame {index} out of range for {n} frames")
        index %= n
        k, half = divmod(index, self.fields_per_frame)
        return self._frame(k, half)

    def __iter__(self) -> Iterator[Frame]:
        for k in range(self.stored.shape[0]):
            for half in range(self.fields_per_frame):
                yield self._frame(k, half)

    def _frame(self, k: int, half: int) -> StoredFrame:
        """Stored frame ``k`` (``half`` 0), or its field ``half`` in time order, as :func:`_frames_of` gives it."""
        if not self.camera.interlaced:
            return StoredFrame(k, (k + 0.5) / self.fps, 1.0 / self.fps, self.stored[k], self.camera, self._lut)
        first = 0 if self.camera.field_order == "top" else 1
        start = first if half == 0 else 1 - first
        j = 2 * k + half
        return StoredFrame(j, (j + 0.5) / (2.0 * self.fps), 1.0 / (2.0 * self.fps), self.stored[k, start::2],
                           self.camera, self._lut, y_start_px=start, y_step_px=2)

    def saturated_px_counts(self) -> np.ndarray:
        """Saturated pixels of every frame (or field), counted on the stored values.

        The same count as ``Frame.saturated`` (``stored >= saturation_adu``) without
        linearising every frame.
        """
        sat = self.camera.saturation_adu
        if self.stored.dtype.kind == "u":  # an integer threshold keeps the comparison in the stored type
            sat = math.ceil(sat)
            if sat > np.iinfo(self.stored.dtype).max:
                return np.zeros(len(self), dtype=np.int64)
            sat = self.stored.dtype.type(sat)
        fpf = self.fields_per_frame
        starts = (0,) if fpf == 1 else ((0, 1) if self.camera.field_order == "top" else (1, 0))
        counts = np.empty(len(self), dtype=np.int64)
        for k in range(self.stored.shape[0]):
            for half, start in enumerate(starts):
                counts[fpf * k + half] = np.count_nonzero(self.stored[k, start::fpf] >= sat)
        return counts

    @property
    def time_s(self) -> np.ndarray:
        """Mid-exposure time of every frame (or field)."""
        rate = self.fps * self.fields_per_frame
        return (np.arange(len(self)) + 0.5) / rate

    @property
    def exposure_s(self) -> float:
        return 1.0 / (self.fps * self.fields_per_frame)


def read_stack(event: Event, station: Station, *,
               on_frame: Callable[[int, np.ndarray], None] | None = None) -> FrameStack:
    """Decode the event's video once into a :class:`FrameStack` (stored values, no float copy).

    Parameters
    ----------
    event, station : Event, Station
    on_frame : callable, optional
        ``on_frame(k, stored_frame)`` is called in the caller's thread for every
        stored frame ``k`` in order, while a second thread decodes the frames after
        it: per-frame work (such as the background's binned copy,
        :class:`meteorspec.background.StoredFrameBinner`) then overlaps with the
        decoding instead of needing a pass of its own. The array is the frame's
        place in the stack; it must not be modified.

    Raises
    ------
    InputError
        As :func:`read_raw_frames`; also for fewer than two frames.
    """
    _check_station(event, station)
    # Fill a cube sized from the header so the peak stays near one copy of the video.
    cube: np.ndarray | None = None
    extra: list[np.ndarray] = []
    n = 0

    def slot(k: int) -> np.ndarray | None:
        return cube[k] if cube is not None and cube.dtype == np.uint8 and k < cube.shape[0] else None

    def decode() -> Iterator[tuple[int, np.ndarray]]:
        nonlocal cube, n
        for raw in read_raw_frames(event.video, camera=station.camera, slot=slot):
            if cube is None:
                n_hint = max(count_frames(event.video), 1)
                cube = _empty_cube((n_hint,) + raw.shape, raw.dtype)
            if n < cube.shape[0]:
                if not np.may_share_memory(raw, cube):  # not decoded in place
                    cube[n] = raw
                kept = cube[n]
            else:
                extra.append(raw)
                kept = raw
            n += 1
            yield n - 1, kept

    if on_frame is None:
        for _ in decode():
            pass
    else:
        for k, frame in _decoded_ahead(decode()):
            on_frame(k, frame)
    if n < 2:
        raise InputError(event.video, f"needs at least 2 frames, found {n}")
    stored = np.concatenate([cube, np.stack(extra)]) if extra else cube[:n]
    return FrameStack(stored=stored, camera=station.camera, fps=float(event.fps))


def _empty_cube(shape: tuple[int, ...], dtype: np.dtype) -> np.ndarray:
    """An uninitialised array for a whole video, on ordinary (4 KiB) pages where the system allows.

    numpy asks Linux for transparent huge pages on large arrays. On first touch the
    kernel then zeroes, and may first have to compact, 2 MiB at a time; for the
    293 MiB cube of a 1280x960x250 video that cost 0.46-0.79 s of system time per
    event on a 2-core virtual machine, against 0.16-0.22 s on ordinary pages
    (``getrusage``, three alternated runs each). The cube is written once and read
    sparsely, so huge pages gain little here.
    """
    n_bytes = math.prod(shape) * np.dtype(dtype).itemsize
    advice = getattr(mmap, "MADV_NOHUGEPAGE", None)
    if advice is None or n_bytes == 0:
        return np.empty(shape, dtype=dtype)
    buffer = mmap.mmap(-1, n_bytes)
    buffer.madvise(advice)
    return np.frombuffer(buffer, dtype=dtype).reshape(shape)


def _decoded_ahead(frames: Iterator[tuple[int, np.ndarray]]) -> Iterator[tuple[int, np.ndarray]]:
    """Run ``frames`` (the decoder) in a thread of its own and hand its items over in order.

    OpenCV and FFmpeg release the GIL while they decode, so the caller's per-frame
    work runs beside the decoding. The queue is unbounded: every decoded frame
    already has its place in the stack, so running ahead costs no memory. An
    error in the decoder is raised here, in the caller's thread; if the caller
    stops early (an error of its own), the decoder stops after its current frame.
    """
    items: queue.SimpleQueue = queue.SimpleQueue()
    stop = threading.Event()
    done = object()

    def produce() -> None:
        try:
            for item in frames:
                if stop.is_set():
                    return
                items.put((item, None))
            items.put((done, None))
        except BaseException as exc:  # noqa: BLE001 - handed to the caller's thread
            items.put((done, exc))
        finally:
            frames.close()

    thread = threading.Thread(target=produce, name="meteorspec-decode", daemon=True)
    thread.start()
    try:
        while True:
            item, exc = items.get()
            if exc is not None:
                raise exc
            if item is done:
                return
            yield item
    finally:
        stop.set()
        thread.join()


def count_frames(video: str | Path) -> int:
    """Number of stored frames (not fields) in a video.

    Read from the header for FITS and for containers that record it, from the
    file listing for folders; otherwise by decoding the whole stream.

    Raises
    ------
    InputError
        Missing, unreadable or empty video, or a folder with a gap in its numbering.
    """
    path = Path(video)
    if not path.exists():
        raise InputError(path, "video not found")
    if path.is_dir():
        return len(_list_frame_files(path))
    if path.suffix.lower() in _FITS_SUFFIXES:
        hdul, hdu = _open_fits(path, memmap=True)
        try:
            return _cube_shape(path, hdu)[0]
        finally:
            hdul.close()
    if path.suffix.lower() in _FRAME_SUFFIXES:
        raise InputError(path, "a single image is not a video; put numbered frames in a folder")
    cap = _open_capture(path)
    try:
        claimed = int(cap.get(cv2.CAP_PROP_FRAME_COUNT))
        if claimed > 0:
            return claimed
        n = 0
        while cap.grab():
            n += 1
    finally:
        cap.release()
    if n == 0:
        raise InputError(path, "no frames could be decoded")
    return n


# ..................................................................... common checks


def _check_frame(img: np.ndarray, path: Path, camera: Camera, *, key: str) -> np.ndarray:
    """Size, dimensionality, NaN and range checks; integer data -> uint8/uint16."""
    if img.ndim != 2:
        raise InputError(path, f"expected a 2-D frame, got {img.ndim} dimensions {img.shape}", key=key)
    if img.shape != (camera.height, camera.width):
        raise InputError(path, f"frame is {img.shape[1]}x{img.shape[0]} (width x height) but the camera is "
                         f"{camera.width}x{camera.height}", key=key)
    max_adu = 2**camera.bit_depth - 1
    if img.dtype.kind == "f":
        if not np.isfinite(img).all():
            raise InputError(path, "frame holds NaN or infinite values", key=key)
    elif img.dtype.kind not in "ui":
        raise InputError(path, f"unsupported pixel type {img.dtype}", key=key)
    lo, hi = img.min(), img.max()
    if lo < 0:
        raise InputError(path, f"negative pixel value {lo}; stored values must be camera ADU", key=key)
    if hi > max_adu:
        raise InputError(path, f"pixel value {hi} is above {max_adu}, the {camera.bit_depth}-bit camera "
                         "maximum (values must be camera ADU, never rescaled)", key=key)
    if img.dtype.kind in "ui":
        return img.astype(_stored_dtype(camera.bit_depth), copy=False)
    return img


def _to_luminance(img: np.ndarray, path: Path, *, key: str) -> np.ndarray:
    """Colour (OpenCV channel order B, G, R[, A]) -> luminance; grey passes unchanged."""
    if img.ndim == 2:
        return img
    if img.ndim != 3:
        raise InputError(path, f"expected a 2-D frame, got {img.ndim} dimensions {img.shape}", key=key)
    n_ch = img.shape[2]
    if n_ch in (1, 2):  # grey, or grey + alpha
        return img[:, :, 0]
    if n_ch not in (3, 4):
        raise InputError(path, f"unsupported number of colour channels: {n_ch}", key=key)
    b, g, r = img[:, :, 0], img[:, :, 1], img[:, :, 2]
    # Grey video is often decoded as three equal channels: keep its exact integer values.
    if np.array_equal(b, g) and np.array_equal(g, r):
        return np.ascontiguousarray(b)
    w_r, w_g, w_b = _BT601_RGB
    return (w_r * r.astype(np.float32) + w_g * g.astype(np.float32) + w_b * b.astype(np.float32))


def _why(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return f"{exc.__class__.__name__}: {text}" if text else exc.__class__.__name__


# ..................................................................... OpenCV containers


def _open_capture(path: Path) -> cv2.VideoCapture:
    # The FFmpeg backend only: CAP_ANY would also treat '%' in a name as an image-sequence pattern.
    try:
        cap = cv2.VideoCapture(str(path), cv2.CAP_FFMPEG)
        opened = cap.isOpened()
    except cv2.error as exc:
        raise InputError(path, f"cannot open video ({_why(exc)})") from None
    if not opened:
        cap.release()
        size = path.stat().st_size if path.is_file() else 0
        problem = "empty file" if size == 0 else "not a video OpenCV can decode (corrupt or unknown format)"
        raise InputError(path, problem)
    return cap


def _is_grey8(cap: cv2.VideoCapture) -> bool:
    # 'Y800' is FFmpeg's gray (8-bit) pixel format. Only for it is the unconverted frame the
    # stored values themselves; other formats come back as packed or planar bytes.
    code = int(cap.get(cv2.CAP_PROP_CODEC_PIXEL_FORMAT))
    return code > 0 and code.to_bytes(4, "little") == b"Y800"


def _read_container(path: Path, camera: Camera, *,
                    slot: Callable[[int], np.ndarray | None] | None = None) -> Iterator[np.ndarray]:
    cap = _open_capture(path)
    n = 0
    try:
        claimed = int(cap.get(cv2.CAP_PROP_FRAME_COUNT))
        # Grey video decoded as grey: the default conversion to three equal colour channels (and
        # the check that they are equal) cost about a third of the decode on a 1280x960 stream.
        grey = _is_grey8(cap) and bool(cap.set(cv2.CAP_PROP_CONVERT_RGB, 0))
        while True:
            target = slot(n) if grey and slot is not None else None
            try:
                ok, img = cap.read() if target is None else cap.read(target)
            except cv2.error as exc:
                raise InputError(path, f"decoding failed ({_why(exc)})", key=f"frame {n}") from None
            if not ok:
                break
            key = f"frame {n}"
            if img.dtype == np.uint8 and camera.bit_depth > 8:
                raise InputError(path, f"decodes as 8-bit but the camera is {camera.bit_depth}-bit; store such "
                                 "video as a FITS cube or 16-bit PNG/TIFF frames", key=key)
            yield _check_frame(_to_luminance(img, path, key=key), path, camera, key=key)
            n += 1
    finally:
        cap.release()
    if n == 0:
        raise InputError(path, "no frames could be decoded")
    if 0 < n < claimed:
        raise InputError(path, f"truncated or corrupt: the header claims {claimed} frames but only {n} decode")


# ..................................................................... FITS


def _open_fits(path: Path, *, memmap: bool) -> tuple[fits.HDUList, fits.hdu.base._BaseHDU]:
    """Open a FITS file and return it with its first image HDU holding data."""
    with warnings.catch_warnings(record=True) as caught:
        # astropy reports truncation and other defects as warnings. Record them (turning
        # them into errors inside fits.open would leave its file handle open) and fail below.
        warnings.simplefilter("always")
        try:
            hdul = fits.open(path, memmap=memmap, do_not_scale_image_data=True, mode="readonly")
        except Exception as exc:
            raise InputError(path, f"not a readable FITS file ({_why(exc)})") from None
        problem = None
        try:
            for hdu in hdul:
                if isinstance(hdu, (fits.PrimaryHDU, fits.ImageHDU)) and hdu.header.get("NAXIS", 0) > 0:
                    _ = hdu.data  # maps the data: truncation shows up here
                    break
            else:
                problem = "no image data in any HDU"
        except Exception as exc:
            problem = f"corrupt FITS data ({_why(exc)})"
    if caught:  # astropy's warning (e.g. "File may have been truncated ...") says most
        problem = f"damaged FITS file ({_why(caught[0].message)})"
    if problem is not None:
        hdul.close()
        raise InputError(path, problem)
    return hdul, hdu


def _cube_shape(path: Path, hdu) -> tuple[int, int, int]:
    naxis = hdu.header.get("NAXIS", 0)
    if naxis != 3:
        raise InputError(path, f"a FITS video must be a cube with NAXIS = 3 (NAXIS3 = frames), got NAXIS = {naxis}")
    shape = tuple(int(s) for s in hdu.data.shape)
    if shape[0] == 0:
        raise InputError(path, "FITS cube holds no frames (NAXIS3 = 0)")
    return shape


def _fits_values(raw: np.ndarray, header, path: Path, *, key: str) -> np.ndarray:
    """Apply BSCALE/BZERO to one frame of unscaled FITS data; BLANK pixels are an error."""
    bscale = float(header.get("BSCALE", 1.0))
    bzero = float(header.get("BZERO", 0.0))
    raw = np.asarray(raw)
    if raw.dtype.kind in "ui":
        blank = header.get("BLANK")
        if blank is not None and np.any(raw == blank):
            raise InputError(path, f"frame holds undefined (BLANK = {blank}) pixels", key=key)
        if bscale == 1.0 and bzero.is_integer():
            # Exact integer path; covers unsigned 16-bit stored as int16 with BZERO = 32768.
            return raw.astype(np.int64) + int(bzero)
    return raw.astype(np.float64) * bscale + bzero


def _read_fits_cube(path: Path, camera: Camera) -> Iterator[np.ndarray]:
    hdul, hdu = _open_fits(path, memmap=True)
    data = None
    try:
        n = _cube_shape(path, hdu)[0]
        header, data = hdu.header, hdu.data
        for k in range(n):
            key = f"frame {k}"
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("error")
                    raw = np.array(data[k])  # copy: nothing may keep the memory map alive
            except Exception as exc:
                raise InputError(path, f"cannot read FITS data ({_why(exc)})", key=key) from None
            yield _check_frame(_fits_values(raw, header, path, key=key), path, camera, key=key)
    finally:
        del data
        hdul.close()


def _read_fits_image(path: Path, *, key: str) -> np.ndarray:
    hdul, hdu = _open_fits(path, memmap=False)
    try:
        naxis = hdu.header.get("NAXIS", 0)
        if naxis != 2:
            raise InputError(path, f"a FITS frame must be a 2-D image, got NAXIS = {naxis}", key=key)
        return _fits_values(np.array(hdu.data), hdu.header, path, key=key)
    finally:
        hdul.close()


# ..................................................................... folder of frames


def _list_frame_files(folder: Path) -> list[Path]:
    """Numbered frame files of one format, sorted by number; gaps and duplicates are errors."""
    try:
        entries = [p for p in folder.iterdir() if not p.name.startswith(".") and p.is_file()]
    except OSError as exc:
        raise InputError(folder, f"cannot list folder ({_why(exc)})") from None
    images = [p for p in entries if p.suffix.lower() in _FRAME_SUFFIXES]
    if not images:
        raise InputError(folder, "no PNG, TIFF or FITS frames in the video folder")
    kinds = sorted({_FRAME_SUFFIXES[p.suffix.lower()] for p in images})
    if len(kinds) > 1:
        raise InputError(folder, f"mixed frame formats ({', '.join(kinds)}); use one")
    numbered: dict[int, Path] = {}
    for p in images:
        runs = _DIGITS_RE.findall(p.stem)
        if not runs:
            raise InputError(folder, f"frame file {p.name!r} has no frame number in its name")
        num = int(runs[-1])  # the last run of digits is the frame number (frame_00012.png)
        if num in numbered:
            raise InputError(folder, f"frame number {num} appears twice ({numbered[num].name}, {p.name})")
        numbered[num] = p
    order = sorted(numbered)
    first, last = order[0], order[-1]
    if last - first + 1 != len(order):
        missing = sorted(set(range(first, last + 1)) - set(order))
        more = f" and {len(missing) - 1} more" if len(missing) > 1 else ""
        raise InputError(folder, f"frame number {missing[0]}{more} missing (frames run {first}..{last})")
    return [numbered[i] for i in order]


def _read_image_file(path: Path, *, key: str) -> np.ndarray:
    if _FRAME_SUFFIXES[path.suffix.lower()] == "fits":
        return _read_fits_image(path, key=key)
    try:
        buf = np.fromfile(path, dtype=np.uint8)  # imdecode: no path-encoding issues, no stderr
    except OSError as exc:
        raise InputError(path, f"cannot read file ({_why(exc)})", key=key) from None
    if buf.size == 0:
        raise InputError(path, "empty file", key=key)
    try:
        img = cv2.imdecode(buf, cv2.IMREAD_UNCHANGED)
    except cv2.error as exc:
        raise InputError(path, f"cannot decode image ({_why(exc)})", key=key) from None
    if img is None:
        raise InputError(path, "cannot decode image (corrupt, truncated or unknown format)", key=key)
    return _to_luminance(img, path, key=key)


def _read_folder(folder: Path, camera: Camera) -> Iterator[np.ndarray]:
    for k, p in enumerate(_list_frame_files(folder)):
        key = f"frame {k}"
        yield _check_frame(_read_image_file(p, key=key), p, camera, key=key)


# --------------------------------------------------------------------------- writing


def write_video(path: str | Path, frames: np.ndarray, *, camera: Camera, fps: float,
                frame_format: str | None = None) -> Path:
    """Write stored-value frames as a video in the form chosen by ``path``.

    Parameters
    ----------
    path : str or Path
        ``*.avi``: lossless FFV1 grey AVI through OpenCV (8-bit cameras only).
        ``*.fits``: FITS cube, ``NAXIS3`` = frames. A path with no suffix or
        ending in ``/``: a folder of ``frame_00000.<ext>`` single-frame images.
    frames : ndarray of shape (n_frames, height, width)
        Stored camera values (integers in ``[0, 2**bit_depth - 1]``), e.g. from
        :func:`encode`. Written as camera ADU, never rescaled.
    camera : Camera
        Frame size and bit depth.
    fps : float
        Frame rate recorded in the AVI header (and as ``FPS`` in FITS headers).
    frame_format : {"png", "tiff", "fits"}, optional
        Image format for a folder (default ``"png"``); not allowed for files.

    Returns
    -------
    Path
        The file or folder written.

    Raises
    ------
    ValueError
        Frames of the wrong shape or values, a form the bit depth cannot hold
        (AVI for more than 8 bits), odd frame sizes for AVI, unknown suffix.
    FileExistsError
        The target folder exists and is not empty.
    OSError
        Writing failed; no partial output is left under the final name.

    Notes
    -----
    Output goes to a hidden temporary name beside the target and is renamed
    into place, so a crash never leaves a half-written file under the final
    name. Identical input gives identical bytes (no dates are written).
    """
    text = os.fspath(path)
    is_folder = text.endswith(("/", os.sep))
    path = Path(text)
    suffix = "" if is_folder else path.suffix.lower()
    if suffix and frame_format is not None:
        raise ValueError(f"frame_format is only for a folder of frames, not for {path.name!r}")
    if suffix not in ("", ".avi", ".fits"):
        raise ValueError(f"unknown video form {suffix!r}: use '.avi', '.fits' or a folder path")
    if not (np.isfinite(fps) and fps > 0):
        raise ValueError(f"fps must be positive, got {fps}")
    stored = _check_stored(frames, camera)

    if suffix == ".avi":
        if camera.bit_depth != 8:
            raise ValueError(f"AVI (FFV1 through OpenCV) holds 8-bit frames only; a {camera.bit_depth}-bit "
                             "camera needs '.fits' or a PNG/TIFF/FITS folder")
        if camera.width % 2 or camera.height % 2:
            # This OpenCV/FFmpeg build silently crops odd sizes to even ones.
            raise ValueError(f"AVI output needs an even frame size, got {camera.width}x{camera.height}")
        return _write_atomic_file(path, lambda tmp: _write_avi(tmp, stored, fps))
    if suffix == ".fits":
        return _write_atomic_file(path, lambda tmp: _write_fits(tmp, stored, fps=fps))

    fmt = "png" if frame_format is None else frame_format
    if fmt not in FRAME_FORMATS:
        raise ValueError(f"frame_format must be one of {FRAME_FORMATS}, got {frame_format!r}")
    return _write_folder(path, stored, fmt, fps=fps)


def _check_stored(frames: np.ndarray, camera: Camera) -> np.ndarray:
    arr = np.asarray(frames)
    if arr.ndim != 3 or arr.shape[0] == 0:
        raise ValueError(f"frames must have shape (n_frames >= 1, height, width), got {arr.shape}")
    if arr.shape[1:] != (camera.height, camera.width):
        raise ValueError(f"frames are {arr.shape[2]}x{arr.shape[1]} but the camera is "
                         f"{camera.width}x{camera.height}")
    if arr.dtype.kind not in "uif":
        raise ValueError(f"frames must be numeric, got {arr.dtype}")
    if arr.dtype.kind == "f" and not (np.isfinite(arr).all() and np.array_equal(arr, np.rint(arr))):
        raise ValueError("stored frames must hold whole numbers of ADU")
    max_adu = 2**camera.bit_depth - 1
    if arr.min() < 0 or arr.max() > max_adu:
        raise ValueError(f"stored values must lie in [0, {max_adu}] for a {camera.bit_depth}-bit camera")
    return np.ascontiguousarray(arr, dtype=_stored_dtype(camera.bit_depth))


def _temp_sibling(path: Path, suffix: str) -> Path:
    # Same folder (so the rename is atomic), hidden, and keeping the suffix OpenCV needs.
    return path.parent / f".{path.stem}.partial-{os.getpid()}{suffix}"


def _write_atomic_file(path: Path, write) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _temp_sibling(path, path.suffix)
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def _write_avi(tmp: Path, stored: np.ndarray, fps: float) -> None:
    n, height, width = stored.shape
    writer = cv2.VideoWriter(str(tmp), cv2.CAP_FFMPEG, cv2.VideoWriter_fourcc(*AVI_FOURCC), float(fps),
                             (width, height), False)
    try:
        if not writer.isOpened():
            raise OSError(f"{tmp}: OpenCV cannot open an {AVI_FOURCC} AVI writer")
        for frame in stored:
            writer.write(frame)
    finally:
        writer.release()
    # Lossless is the point of this form: prove it before the file gets its final name.
    cap = cv2.VideoCapture(str(tmp), cv2.CAP_FFMPEG)
    try:
        for k in range(n):
            ok, img = cap.read()
            if not ok or not np.array_equal(img[:, :, 0] if img.ndim == 3 else img, stored[k]):
                raise OSError(f"{tmp}: {AVI_FOURCC} AVI did not read back exactly at frame {k}")
    finally:
        cap.release()


def _fits_hdu(data: np.ndarray, *, fps: float) -> fits.PrimaryHDU:
    hdu = fits.PrimaryHDU(data=data)  # uint16 is stored as int16 + BZERO 32768 (FITS standard)
    hdu.header["BUNIT"] = ("adu", "stored camera values, not rescaled")
    hdu.header["FPS"] = (float(fps), "frames per second")
    return hdu


def _write_fits(tmp: Path, data: np.ndarray, *, fps: float) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _fits_hdu(data, fps=fps).writeto(tmp, output_verify="exception")


def _encode_image(frame: np.ndarray, fmt: str) -> bytes:
    ok, buf = cv2.imencode(".png" if fmt == "png" else ".tiff", frame)
    if not ok:
        raise OSError(f"OpenCV could not encode a {fmt.upper()} frame")
    return buf.tobytes()


def _write_folder(path: Path, stored: np.ndarray, fmt: str, *, fps: float) -> Path:
    if path.exists():
        if not path.is_dir():
            raise FileExistsError(f"{path}: exists and is not a folder")
        if any(path.iterdir()):
            raise FileExistsError(f"{path}: folder exists and is not empty; refusing to mix frames")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _temp_sibling(path, "")
    ext = {"png": ".png", "tiff": ".tiff", "fits": ".fits"}[fmt]
    try:
        tmp.mkdir()
        for k, frame in enumerate(stored):
            target = tmp / f"frame_{k:05d}{ext}"
            if fmt == "fits":
                _write_fits(target, frame, fps=fps)
            else:
                target.write_bytes(_encode_image(frame, fmt))
        if path.exists():
            path.rmdir()  # empty, checked above
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp)
    return path
