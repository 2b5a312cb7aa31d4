"""Exception hierarchy of mapper.

Every error a person can act on derives from :class:`MapperError`. Subclasses also
derive from the matching builtin, so callers that already catch ``ValueError`` or
``LookupError`` keep working. A message says what was wrong, where (file, row,
column), the value seen, and what to do next; the command line prints it and exits 1.
"""

from __future__ import annotations


class MapperError(Exception):
    """Base of every error mapper raises on purpose."""

    def __init__(self, message: str, *, hint: str | None = None) -> None:
        self.hint = hint
        super().__init__(message)

    def __str__(self) -> str:  # message first, then what to do
        text = super().__str__()
        if self.hint:
            return f"{text}\n  hint: {self.hint}"
        return text


class DataError(MapperError, ValueError):
    """A data file cannot be used: unreadable, missing columns, bad values, no step."""


class CampaignFileError(MapperError, ValueError):
    """The campaign file (``campaign.toml``) is malformed or points outside its folder."""


class StoreError(MapperError, RuntimeError):
    """The store cannot be opened or written."""


class NotAStoreError(StoreError):
    """The file given as store exists but is not a mapper store; it is left untouched."""


class StoreInUseError(StoreError):
    """Another process holds the store for writing."""


class NotFoundError(MapperError, LookupError):
    """A campaign, test or fit that was asked for is not in the store."""


class IdentificationError(MapperError, ValueError):
    """No usable model could be identified (raised only when there is no result at all)."""


class OutOfRangeError(MapperError, ValueError):
    """A query asks for an operating level outside the tested range."""


class UsageError(MapperError, ValueError):
    """The command was asked wrongly (e.g. no campaign named in a store holding several);
    the command line exits 2 and nothing is changed."""
