"""The one family of user-facing errors.

Anything a user can cause (bad file, bad setting, impossible goal) raises a
`CalibrationError`; the CLI prints its message as one line and exits 1.
"""

from __future__ import annotations


class CalibrationError(Exception):
    """An error caused by user input, reported as one line without a traceback."""


class InputError(CalibrationError):
    """A file, row, column or setting the user wrote is wrong.

    Parameters
    ----------
    where : str
        File (and section/key, or row/column) the problem is in.
    what : str
        What is wrong, stated plainly.
    """

    def __init__(self, where: str, what: str):
        self.where = where
        self.what = what
        super().__init__(f"{where}: {what}")
