"""The exception and warning types gapband users see.

Every error message names the place (file, line, column, series or option)
and says what to do about it. The command line maps these types to exit
codes: :class:`InputError` and its subclasses to 3, :class:`UsageError` to 2.
"""

from __future__ import annotations

import signal


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


class MemoryLimitError(UsageError):
    """A fill would need more memory than the machine has available."""


class FitError(GapbandError):
    """A model could not be fitted to the data as given."""


class Interrupted(BaseException):
    """The run was stopped by SIGINT (Ctrl-C) or SIGTERM.

    Raised by the command line's signal handler. A BaseException, like
    KeyboardInterrupt, so that no ``except Exception`` swallows it on the way
    out, while the writers' clean-up (which catches BaseException) still runs.
    """

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum

    def __str__(self) -> str:
        return f"stopped by {signal.Signals(self.signum).name}"


class GapbandWarning(UserWarning):
    """A warning about data or a fit that the user should act on."""
