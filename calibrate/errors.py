"""The one family of user-facing errors, and the command line's exit codes.

Anything a user can cause (bad file, bad setting) raises a `CalibrationError`; the
CLI prints its message as one line and exits `BAD_INPUT`. A `UsageError` (options
that do not go together) exits `USAGE`, as argparse does for its own errors.
"""

from __future__ import annotations

# exit codes of `calibrate` (listed in the README); 130 and 143 (Ctrl-C, SIGTERM) are
# 128 + the signal's number, set in calibrate.cli
OK = 0
BAD_INPUT = 1
USAGE = 2
GOAL_NOT_MET = 3


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


class UsageError(CalibrationError):
    """Command-line options that do not go together (exit `USAGE`)."""
