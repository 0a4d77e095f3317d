"""Typed errors that the command line turns into one line and an exit status."""


class BigpruneError(Exception):
    """Base class: a problem the user can fix; the message is one line."""

    exit_code = 1


class InputError(BigpruneError):
    """Bad input or usage: a file, column, option or value is wrong (exit 2)."""

    exit_code = 2


class BudgetError(BigpruneError):
    """The memory budget cannot hold the planned work (exit 3)."""

    exit_code = 3


class LockedError(BigpruneError):
    """Another live process holds the store (exit 4: try again later)."""

    exit_code = 4
