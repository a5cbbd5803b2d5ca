"""Where the project's calibration data live.

Rule: the folder named by the environment variable ``METEORSPEC_CALIBRATION``
if set, else the ``calibration/`` folder at the top of the source tree this
package was installed from (README installs in editable mode).
"""

from __future__ import annotations

import os
from pathlib import Path

from .errors import InputError


def calibration_dir() -> Path:
    """The calibration data folder (line list, atomic data, example stations)."""
    env = os.environ.get("METEORSPEC_CALIBRATION")
    folder = Path(env) if env else Path(__file__).resolve().parent.parent / "calibration"
    if not folder.is_dir():
        raise InputError(folder, "calibration data folder not found; set METEORSPEC_CALIBRATION")
    return folder
