"""One review as a log entry (the ``/review`` group's subgroups), and how it reads back.

An entry holds who, when, what and why: ``verdict``, ``reviewer``, ``note``, ``time_utc``
(ISO 8601, UTC), ``software_version`` (of the review) and ``automatic_software_version``
(of the result reviewed), the corrections (both as readable lines and as values), the
automatic class at the time of the review, and, under ``result``, the
re-derived composition and class with the fit summary, the frames used and the new line
table. An entry without corrections confirms (or rejects) the automatic result as it is.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime, timezone
from typing import Any

import numpy as np

from .rework import PIVOT_NM, Corrections, EventView, Rework

__all__ = ["make_entry", "latest_review", "utc_now"]


def utc_now() -> str:
    """``2026-11-14T07:02:13Z`` (seconds are enough for a person's decision)."""
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _corrections_attrs(c: Corrections) -> dict[str, Any]:
    return {
        "corrections": c.describe() or ["none"],
        "first_frame": -1 if c.first_frame is None else c.first_frame,
        "last_frame": -1 if c.last_frame is None else c.last_frame,
        "dropped_frames": np.asarray(c.dropped_frames, dtype=np.int64),
        "manual_shift_nm": c.shift_nm,
        "manual_stretch": c.stretch,
        "stretch_pivot_nm": PIVOT_NM,
        "pins": [f"{p.seen_nm:g}={p.label}" for p in c.pins] or [""],
        "rejected_lines": [f"{r.species} {r.lab_nm:.3f}" for r in c.rejected] or [""],
        "ignored_nm": np.asarray(c.ignored_nm, dtype=float).reshape(-1, 2),
    }


def make_entry(view: EventView, rework: Rework | None, *, verdict: str, reviewer: str, note: str,
               time_utc: str, software_version: str) -> dict[str, Any]:
    """The ``/review/<n>`` part for :func:`meteorspec.store.append_review`.

    ``rework`` is None for a verdict on the automatic result without corrections.
    """
    auto = view.composition
    attrs: dict[str, Any] = {"verdict": verdict, "reviewer": reviewer, "note": note, "time_utc": time_utc,
                             "software_version": software_version,
                             "automatic_class": str(auto.get("class", "")) if auto else "",
                             "automatic_software_version": view.software_version,
                             "rederived": rework is not None}
    attrs.update(_corrections_attrs(Corrections() if rework is None else rework.corrections))
    entry: dict[str, Any] = {"attrs": attrs, "datasets": {}, "groups": {}}
    if rework is None:
        result = {k: auto[k] for k in ("na", "mg", "fe", "na_err", "mg_err", "fe_err", "class",
                                       "class_confidence", "class_reason") if k in auto}
        result.setdefault("class", "")
        entry["groups"]["result"] = {"attrs": result | {"source": "automatic result, unchanged"}}
        return entry
    summary = rework.summary()
    attrs["shift_nm"] = rework.shift_nm
    attrs["stretch"] = rework.stretch
    attrs["pinned_peak_nm"] = np.array([p.peak_nm for p in rework.pinned], dtype=float)
    attrs["notes"] = list(rework.notes) or [""]
    entry["groups"]["result"] = {
        "attrs": summary | {"source": "re-derived from the stored per-frame spectra"},
        "datasets": {"frames_used": (rework.frames_kept.astype(np.int64), "1"),
                     "lines": (rework.lines.to_records(), "flux x nm (lab_nm, measured_nm: nm)")},
    }
    return entry


def latest_review(review_group: Mapping[str, Any] | None) -> tuple[str, dict[str, Any]] | None:
    """``(name, entry)`` of the newest entry of a ``read_event`` ``/review`` group, or None."""
    if review_group is None:
        return None
    names = sorted(n for n in review_group["groups"] if n.isdigit())
    if not names:
        return None
    return names[-1], review_group["groups"][names[-1]]


def reviewed_class(entry: Mapping[str, Any]) -> str:
    """The class an entry records (re-derived, or the automatic one it confirmed)."""
    result = entry.get("groups", {}).get("result")
    return str(result["attrs"].get("class", "")) if result is not None else ""
