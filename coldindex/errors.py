"""Errors a user can act on.

Every error raised for bad input carries one sentence that names the file,
row or column at fault and says what to do. The CLI prints that sentence and
exits with a non-zero code; it never shows a traceback for these.
"""


class ColdindexError(Exception):
    """Base class of every error the CLI turns into a one-line message."""

    exit_code = 2


class InputError(ColdindexError):
    """An input file, column or value cannot be used as given."""


class ConfigError(ColdindexError):
    """A configuration file or option is invalid."""


class OutputError(ColdindexError):
    """An output location cannot be written."""

    exit_code = 3


class TooFewDataError(ColdindexError):
    """Valid input, but too little of it for the requested computation."""
