"""The one error type of ringid.

Every problem with an input is raised as :class:`RingidError` naming the file
and the problem; the CLI prints it as one line, ``ringid: error: FILE: problem``.
"""

from __future__ import annotations

import os


class RingidError(Exception):
    """A problem with an input file or value, stated in one line.

    Parameters
    ----------
    path : str or os.PathLike or None
        The file (or sheet, or config key) the problem is in.
    problem : str
        What is wrong, in plain words, without a trailing period.
    """

    def __init__(self, path: str | os.PathLike | None, problem: str):
        self.path = None if path is None else os.fspath(path)
        self.problem = " ".join(str(problem).split())  # always one line
        super().__init__(str(self))

    def __str__(self) -> str:
        return f"{self.path}: {self.problem}" if self.path else self.problem
