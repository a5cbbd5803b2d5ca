"""Plain data objects that leave the pipeline and enter the store.

Each stage adds its own part; a part that is ``None`` was not produced, and the
pipeline records why in ``flags``. Nothing here does I/O or computation.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

STATUSES = ("ok", "partial", "failed")

# The stages of the data flow in order; a missing one is flagged "stage_missing:<name>".
STAGES = ("track", "spectrum", "calibration", "lines", "composition")


@dataclass(frozen=True, eq=False)
class FrameTimes:
    """What the video reader saw: one entry per frame (or field, in time order)."""

    time_s: np.ndarray          # middle of each exposure
    exposure_s: float
    n_saturated_px: np.ndarray  # saturated pixels per frame or field
    interlaced: bool


@dataclass(frozen=True)
class InputRecord:
    """A file the result depends on, for provenance and for skipping up-to-date work."""

    role: str        # "event", "station", "video", "response"
    path: str
    sha256: str
    size_bytes: int


@dataclass(eq=False)
class EventResult:
    """Everything known about one event after processing.

    Attributes
    ----------
    event_id, station, start_utc : str
        Identity (``start_utc`` as ISO 8601 with ``Z``).
    status : str
        ``"ok"``, ``"partial"`` or ``"failed"``.
    flags : list of str
        Short machine-readable notes (contract vocabulary plus ``stage_missing:<stage>``).
    error : str
        One-line reason when ``status == "failed"``.
    station_values : dict
        Lens, grating and camera values used, flattened as ``"grating.grooves_per_mm"`` etc.
    parts : dict
        Stage outputs by stage name (see :data:`STAGES`), each a dict of arrays and
        attributes written by :mod:`meteorspec.store`.
    """

    event_id: str
    station: str
    start_utc: str
    software_version: str
    status: str = "partial"
    flags: list[str] = field(default_factory=list)
    error: str = ""
    frames: FrameTimes | None = None
    inputs: list[InputRecord] = field(default_factory=list)
    station_values: dict[str, Any] = field(default_factory=dict)
    parts: dict[str, Any] = field(default_factory=dict)

    def add_flag(self, flag: str) -> None:
        if flag not in self.flags:
            self.flags.append(flag)
