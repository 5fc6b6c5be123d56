"""The one exception type for the user's mistakes.

Everything a user can get wrong (a missing file, a mesh without UVs, a bad option value) raises
:class:`ThickbakeError`.  It carries the file it is about and the fix, so the command line can print
it as one line and exit with code 2.  Internal invariants are plain ``assert`` statements.
"""

from __future__ import annotations

import os


class ThickbakeError(Exception):
    """A user-facing error: what went wrong, with which file, and what to do about it.

    Parameters
    ----------
    message : str
        What is wrong, in plain words ("the mesh has no UV coordinates").
    path : str or os.PathLike, optional
        The file the problem is about; printed first.
    fix : str, optional
        What the user should do ("unwrap it in your modelling tool and export again").
    """

    def __init__(self, message: str, path: str | os.PathLike | None = None, fix: str | None = None):
        self.message = message
        self.path = None if path is None else os.fspath(path)
        self.fix = fix
        super().__init__(self.one_line())

    def one_line(self) -> str:
        """The whole error as a single line: ``PATH: MESSAGE; FIX``."""
        text = self.message
        if self.path:
            text = f"{self.path}: {text}"
        if self.fix:
            text = f"{text}; {self.fix}"
        return " ".join(text.split())
