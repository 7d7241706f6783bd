"""Error types of relaxtui.

Every error a user can cause (a broken picture, a bad key in a case file, an
ill-posed domain, a wrong option) is raised as one of these. The command line
prints the message on one line and exits with status 2; nothing else is
written.
"""


class RelaxError(Exception):
    """Base class of the errors relaxtui reports to the user."""

    exit_code = 2


class CaseError(RelaxError):
    """A case file or its picture cannot be turned into a well-posed problem.

    The message names the file and, where it can, the key and the line.
    """


class UsageError(RelaxError):
    """An option or argument value is not acceptable (e.g. omega outside (0, 2))."""


class OutputError(RelaxError):
    """An output cannot be written (missing folder, permission)."""
