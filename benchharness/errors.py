"""The exception family of benchharness.

Every error the library raises on purpose derives from `BenchharnessError`; the
command line maps the family to exit code 2 and prints the message as one line.
Messages about an input file follow ``FILE:LINE:COL: what is wrong; what would be
right`` so a user can jump straight to the spot.
"""

from __future__ import annotations


class BenchharnessError(Exception):
    """Root of all errors benchharness raises deliberately."""

    #: The command line's exit code for this error (2: bad input or usage).
    exit_code = 2


class ExperimentError(BenchharnessError):
    """The experiment file is malformed or inconsistent."""

    def __init__(self, message: str, path: str | None = None, line: int | None = None,
                 col: int | None = None):
        self.path = path
        self.line = line
        self.col = col
        self.bare = message
        where = ""
        if path is not None:
            where = str(path)
            if line is not None:
                where += f":{line}"
                if col is not None:
                    where += f":{col}"
            where += ": "
        super().__init__(where + message)


class UsageError(BenchharnessError):
    """Bad command-line usage or option value."""


class DataError(BenchharnessError):
    """Input data (a CSV or results folder) cannot be analysed as asked."""


class ResultsFolderError(BenchharnessError):
    """A results folder is missing, locked, or must not be written into."""


class ExecutionError(BenchharnessError):
    """The harness could not start or measure a run (not a failing command)."""


#: Exit code after a full disk: a temporary failure, to retry once space is freed
#: (``EX_TEMPFAIL`` of sysexits.h; common practice, as 70 is ``EX_SOFTWARE``).
DISK_FULL_EXIT = 75


class DiskFullError(BenchharnessError):
    """No space left on the device (or quota): what was recorded is kept, and the
    message says where and how to go on once space is freed."""

    exit_code = DISK_FULL_EXIT


def disk_full_writing(path) -> DiskFullError:
    """The one line for an output file (a report, ``--json``, a summary) that a full disk
    stopped: where, and what to do. Exit code 75 like every full disk, never 2 (bad input)."""
    return DiskFullError(f"the disk is full (no space left on the device writing {path}); "
                         "free some space and run the command again")


def is_disk_full(exc: BaseException) -> bool:
    """Whether ``exc`` is the operating system saying the disk (or quota) is full."""
    import errno

    return isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT)
