"""The software version written into every output.

The package version alone does not change while the code is developed, so a
re-run would wrongly treat old outputs as up to date. The version written is
``<package version>+<12 hex digits>``, a digest of the package's source and of
the calibration tables it reads (line list, class boundaries), so any change
to either makes earlier outputs out of date.
"""

from __future__ import annotations

import hashlib
from functools import lru_cache
from pathlib import Path

from . import __version__
from .resources import calibration_dir


@lru_cache(maxsize=1)
def software_version() -> str:
    """``<package version>+<digest of source and calibration tables>``."""
    digest = hashlib.sha256()
    package = Path(__file__).resolve().parent
    files = sorted(package.rglob("*.py"))
    calib = calibration_dir()
    files += sorted(p for p in calib.rglob("*.csv") if "stations" not in p.parts and "responses" not in p.parts)
    for path in files:
        digest.update(path.name.encode())
        digest.update(path.read_bytes())
    return f"{__version__}+{digest.hexdigest()[:12]}"
