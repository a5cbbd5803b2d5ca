"""The one error type for bad input.

Every problem with a user's files (station, event, video, response curve) is
reported as an :class:`InputError` whose message is a single line naming the
file, the key or place, and the problem, so that a batch log line is enough to
fix the input.
"""

from __future__ import annotations

from os import PathLike


class InputError(ValueError):
    """Bad or unreadable input, reported as ``<file>: <where>: <problem>``.

    Parameters
    ----------
    path : str or PathLike
        The file (or folder) at fault.
    problem : str
        What is wrong, in words an operator understands.
    key : str, optional
        The key, section or frame where the problem is (e.g. ``"[lens] focal_px"``).
    """

    def __init__(self, path: str | PathLike[str], problem: str, *, key: str | None = None):
        self.path = str(path)
        self.key = key
        self.problem = " ".join(str(problem).split())  # keep it on one line
        where = f"{self.path}: {key}: " if key else f"{self.path}: "
        super().__init__(where + self.problem)
