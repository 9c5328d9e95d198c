"""Exceptions raised by sounding.

Every message names the bad value and says what to do; the CLI prints the
message as one line and exits non-zero, the service turns it into a 4xx.

    SoundingError                  base of everything below
    ├── SettingsError              a setting has a value that cannot work
    ├── ModelError                 the encoder folder is missing or unreadable
    ├── LoadError                  one file cannot be read; the run skips it
    ├── QueryError                 a search request cannot be answered as asked
    ├── AccessError                an API key or group is malformed, unknown or refused
    └── IndexStoreError            the on-disk index cannot be used
        ├── IndexMissingError      no index at the given folder
        ├── IndexMismatchError     index built with another model, dimension
        │                          or chunk settings than the current ones
        ├── IndexCorruptError      files disagree with each other
        └── IndexLockedError       another run is updating the index
"""

from __future__ import annotations


class SoundingError(Exception):
    """Base class of all errors sounding raises on purpose."""

    exit_code = 1


class SettingsError(SoundingError):
    """A setting has a value that cannot work."""

    exit_code = 2


class ModelError(SoundingError):
    """The encoder folder is missing or cannot be loaded."""

    exit_code = 3


class LoadError(SoundingError):
    """One file cannot be turned into a document; the run skips it."""


class QueryError(SoundingError):
    """A search request cannot be answered as asked."""

    exit_code = 2


class AccessError(SoundingError):
    """An API key, key name, scope or group is malformed, unknown or refused."""

    exit_code = 2


class IndexStoreError(SoundingError):
    """The on-disk index cannot be used."""

    exit_code = 4


class IndexMissingError(IndexStoreError):
    """No index exists at the given folder."""


class IndexMismatchError(IndexStoreError):
    """The index was built with other settings than the current ones."""


class IndexCorruptError(IndexStoreError):
    """Files of the index disagree with each other."""


class IndexLockedError(IndexStoreError):
    """Another ``sounding index`` holds the index folder's lock."""

    # EX_TEMPFAIL of sysexits.h: try again later.
    exit_code = 75
