"""One base exception for everything halfrail reports to a user.

The CLI catches :class:`HalfrailError`, prints ``str(error)`` and exits with
``error.exit_status``: no traceback ever reaches the user for these.
"""

from __future__ import annotations


class HalfrailError(Exception):
    """Base class: a problem the user can fix; printed without a traceback."""

    exit_status = 1


class PatchError(HalfrailError):
    """A patch file (or a command-line override of it) is malformed.

    The message reads ``FILE:LINE: part REF: what is wrong; what is expected``.
    """

    exit_status = 2

    def __init__(self, message: str, *, file: str | None = None, line: int | None = None,
                 part: str | None = None):
        self.file, self.line, self.part, self.detail = file, line, part, message
        where = ""
        if file is not None:
            where = f"{file}:{line}: " if line is not None else f"{file}: "
        who = f"part {part}: " if part else ""
        super().__init__(f"{where}{who}{message}")


class UsageError(HalfrailError):
    """A command-line option is wrong (not the patch itself)."""

    exit_status = 2


class SolverError(HalfrailError):
    """The time integration could not continue (Newton failed at the smallest step)."""

    exit_status = 3

    def __init__(self, message: str, *, seconds: float | None = None,
                 nets: tuple[str, ...] = ()):
        self.seconds, self.nets = seconds, nets
        super().__init__(message)
