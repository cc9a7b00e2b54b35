"""The one family of errors a user can cause.

Every error that a user can fix (a bad file, a bad option, an unreachable analyzer) is a
:class:`MatchbayError`. The CLI prints ``str(error)`` as one line on stderr and exits with
status 2; anything else is a bug and keeps its traceback.
"""

from __future__ import annotations


class MatchbayError(Exception):
    """A mistake in the user's input or environment, reported on one line.

    ``where`` names the file (or resource, or option), ``line`` the 1-based line number
    inside it when there is one, ``key`` the configuration key when there is one.
    """

    def __init__(self, message: str, *, where: str | None = None,
                 line: int | None = None, key: str | None = None):
        super().__init__(message)
        self.message = message
        self.where = where
        self.line = line
        self.key = key

    def __str__(self) -> str:
        place = ""
        if self.where:
            place = str(self.where)
            if self.line is not None:
                place += f":{self.line}"
            place += ": "
        key = f"{self.key}: " if self.key else ""
        return f"{place}{key}{self.message}".replace("\n", " ")


class InputFileError(MatchbayError):
    """A measurement file that cannot be read or fails validation."""


class ConfigError(MatchbayError):
    """A configuration file, fixture chain, parts file or option value that is wrong."""


class MatchError(MatchbayError):
    """A load that cannot be matched as asked (R <= 0, band outside the sweep...)."""


class InstrumentError(MatchbayError):
    """An analyzer that cannot be reached, times out, or reports an error."""


class StoreError(MatchbayError):
    """A results store that cannot be opened or written."""
