"""Errors of the driver layer.

Two families: problems with the instrument or its link at run time (`InstrumentError` and
its subclasses), and bad input caught before anything is sent (`ProfileError`,
`InvalidValueError`, both ValueError so that the benchkit layer can turn them into one
clear line for the user). Every message names the role, the resource, the command and what
to check.
"""

from __future__ import annotations


class InstrumentError(Exception):
    """The instrument refused, reported an error, or answered something unusable."""

    def __init__(self, message: str, *, role: str | None = None, resource: str | None = None,
                 command: str | None = None, errors: tuple[str, ...] = ()):
        super().__init__(message)
        self.role = role
        self.resource = resource
        self.command = command
        self.errors = tuple(errors)


class InstrumentTimeout(InstrumentError):
    """No (complete) reply within the timeout, even after resynchronising and retrying."""


class InstrumentLinkError(InstrumentError):
    """The link could not be opened, or was lost and could not be reopened."""


class ProfileError(ValueError):
    """A profile file is missing, unreadable or breaks the profile rules (PROFILES.md)."""


class InvalidValueError(ValueError):
    """A value meant for a command is of the wrong type, not finite, or out of range.

    Raised before anything is written to the instrument.
    """


class UnsafeCommandError(InvalidValueError):
    """A command string would carry a separator, terminator or control character."""
