"""Exceptions raised by toothcomb.

Every exception derives from :class:`ToothcombError` and also from the matching built-in, so a
caller can catch either. Each carries the process exit code the command line uses for it (see
DESIGN.md: 2 bad input or usage, 3 could not decode). Messages are one sentence that names the
thing, quotes the value and, where possible, says what would work.

>>> try:
...     raise CaptureError("capture.csv: line 12 has 2 columns, the header has 3")
... except ValueError as e:
...     print(e.exit_code, e)
2 capture.csv: line 12 has 2 columns, the header has 3
"""

from __future__ import annotations


class ToothcombError(Exception):
    """Base class of every error toothcomb raises on purpose."""

    #: process exit code the command line ends with for this error
    exit_code: int = 2


class UsageError(ToothcombError, ValueError):
    """An option or argument is wrong (unknown channel name, bad wheel notation, ...)."""


class CaptureError(ToothcombError, ValueError):
    """The capture file cannot be read: missing, truncated, malformed or of an unknown format."""


class SignalError(ToothcombError, ValueError):
    """The samples are unusable as given: NaN values, a flat channel, clipping everywhere."""


class DecodeError(ToothcombError, RuntimeError):
    """The signal was read but could not be decoded (no crank sync, unknown pattern)."""

    exit_code = 3


class PluginError(ToothcombError, RuntimeError):
    """A plugin found through an entry point could not be loaded or does not fit its group."""
