"""One exception hierarchy and the warning classes of iqstat.

Every error a user can cause (a bad file, a bad option, a profile with a typo) is an
:class:`IqstatError`; its message says what is wrong and how to fix it, in one line. The
command line prints that line and exits with status 2.
"""

from __future__ import annotations


class IqstatError(Exception):
    """Base class of every error iqstat raises on bad input."""


class CaptureError(IqstatError):
    """A recording cannot be read: missing files, bad metadata, bad datatype, empty data."""


class ProfileError(IqstatError):
    """A link profile or a scenario file is malformed or inconsistent."""


class ParameterError(IqstatError):
    """A parameter given on the command line or through the API is out of range."""


class MeasurementError(IqstatError):
    """The measurement chain cannot proceed on this capture (reported, not crashed)."""


class IqstatWarning(UserWarning):
    """Base class of iqstat's warnings."""


class CaptureWarning(IqstatWarning):
    """A recording is readable but something about it is off (trailing bytes, NaN samples)."""


class MeasurementWarning(IqstatWarning):
    """A figure was computed but deserves caution (few symbols, poor fit)."""
