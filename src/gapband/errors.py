"""The exception and warning types gapband users see.

Every error message names the place (file, line, column, series or option)
and says what to do about it. The command line maps these types to exit
codes: :class:`InputError` and its subclasses to 3, :class:`UsageError` to 2.
"""

from __future__ import annotations


class GapbandError(Exception):
    """Base class of every error gapband raises on purpose."""


class InputError(GapbandError):
    """The input data cannot be turned into a valid Panel."""


class TimestampError(InputError):
    """Timestamps that cannot be parsed, mix time zones or sit off the grid."""


class DuplicateError(InputError):
    """The same (time, series) pair appears more than once."""


class ValueParseError(InputError):
    """A cell holds text that is neither a number nor a missing-value token."""


class SpecError(GapbandError):
    """A model specification (TOML) is invalid."""


class UsageError(GapbandError):
    """An option or argument has an invalid value."""


class FitError(GapbandError):
    """A model could not be fitted to the data as given."""


class GapbandWarning(UserWarning):
    """A warning about data or a fit that the user should act on."""
