"""Exceptions that the command line turns into one clear line and an exit status."""


class CircError(Exception):
    """The data could not be processed (exit status 1). The message names the file and the fix."""

    exit_code = 1


class UsageError(CircError):
    """The command was used wrongly (exit status 2)."""

    exit_code = 2


class InputError(CircError):
    """A file or variable could not be used (exit status 1)."""


class ManyLines:
    """Mix-in: the message holds several lines, each printed as a ``circtrack: error:`` line of its own
    (e.g. one per implausible variable)."""
