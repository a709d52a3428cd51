"""The project's exception type: one line naming the step, the file and the problem."""

from __future__ import annotations

from os import PathLike

__all__ = ["WetpathError"]


class WetpathError(Exception):
    """An error the user can act on: bad input, bad configuration, undefined request.

    The message reads ``"<step>: <file>: <problem>"`` so that the command-line interface can print it
    as one line on stderr and exit non-zero.

    Parameters
    ----------
    problem : str
        What is wrong, in one sentence.
    step : str, optional
        The workflow step or function that found it (``"ingest"``, ``"measure"``, ...).
    path : str or path-like, optional
        The file or store concerned.
    """

    def __init__(self, problem: str, *, step: str | None = None, path: str | PathLike | None = None):
        self.problem = problem
        self.step = step
        self.path = None if path is None else str(path)
        parts = [p for p in (step, self.path) if p]
        super().__init__(": ".join([*parts, problem]).replace("\n", " "))
