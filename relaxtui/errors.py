"""Error types of relaxtui.

Every error a user can cause (a broken picture, a bad key in a case file, an
ill-posed domain, a wrong option) is raised as one of these. The command line
prints the message on one line and exits with status 2; nothing else is
written.
"""

import unicodedata


def printable(text) -> str:
    """``text`` with every control character escaped (``\\x1b``, ``\\n``, ...), safe to print on a terminal.

    A name or title from a case file can hold an escape sequence that would
    clear or retitle the user's terminal; what relaxtui prints never carries one.
    """
    text = str(text)
    if text.isprintable():
        return text
    out = []
    for ch in text:
        # str.isprintable() also refuses the spaces of category Zs (no-break, narrow no-break, thin),
        # which print as spaces and which relaxtui uses as thousands separators: keep those
        if ch.isprintable() or unicodedata.category(ch) == "Zs":
            out.append(ch)
        else:
            out.append(ch.encode("unicode_escape").decode("ascii"))
    return "".join(out)


class RelaxError(Exception):
    """Base class of the errors relaxtui reports to the user (the message printed with control
    characters escaped, on one line)."""

    exit_code = 2

    def __str__(self) -> str:
        return printable(super().__str__())


class CaseError(RelaxError):
    """A case file or its picture cannot be turned into a well-posed problem.

    The message names the file and, where it can, the key and the line.
    """


class UsageError(RelaxError):
    """An option or argument value is not acceptable (e.g. omega outside (0, 2))."""


class OutputError(RelaxError):
    """An output cannot be written (missing folder, permission)."""


class WriteRefused(OutputError, OSError):
    """The system refused to write an output (a full disk, a file size limit, a read-only or pseudo file
    system): an :class:`OutputError` for the command line, and still an ``OSError`` for callers that catch those."""
