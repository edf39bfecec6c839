"""Errors a user can act on.

Every error raised for bad input carries one sentence that names the file,
row or column at fault and says what to do. The CLI prints that sentence and
exits with a non-zero code; it never shows a traceback for these.

An error about an option names it once, as ``(table, key)``: the sentence says
``skill.lags`` inside ``coldindex update`` (the config key) and ``--lags`` on a
single command (the flag). The message holds ``{option}`` where the name goes;
:func:`coldindex.config.option_name` is the one mapping between the two.
"""

from __future__ import annotations

from collections.abc import Callable

Naming = Callable[[str, str], str]


def key_naming(table: str, key: str) -> str:
    """The config-file name of an option: ``table.key`` (a whole table: ``[key]``)."""
    return f"{table}.{key}" if table else f"[{key}]"


class ColdindexError(Exception):
    """Base class of every error the CLI turns into a one-line message.

    Parameters
    ----------
    message
        One sentence; ``{option}`` marks where the option's name goes (``{other}``
        where a second option's goes).
    option
        ``(table, key)`` of the option the sentence is about, or None.
    other
        ``(table, key)`` of a second option the sentence names, or None.
    """

    exit_code = 2

    def __init__(self, message: str, option: tuple[str, str] | None = None,
                 other: tuple[str, str] | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.option = option
        self.other = other

    def render(self, naming: Naming = key_naming) -> str:
        """The sentence, with the options named by ``naming`` (config keys by default)."""
        text = self.message
        for mark, opt in (("{option}", self.option), ("{other}", self.other)):
            if opt is not None:
                text = text.replace(mark, naming(*opt))
        return text

    def __str__(self) -> str:
        return self.render()

    def __reduce__(self) -> tuple[type, tuple[str, tuple[str, str] | None,
                                              tuple[str, str] | None]]:
        return (type(self), (self.message, self.option, self.other))  # survives processes


class InputError(ColdindexError):
    """An input file, column or value cannot be used as given."""


class ConfigError(ColdindexError):
    """A configuration file or option is invalid."""


class OutputError(ColdindexError):
    """An output location cannot be written."""

    exit_code = 3


class TooFewDataError(ColdindexError):
    """Valid input, but too little of it for the requested computation.

    Inside the yearly update a stage that raises it is skipped with this sentence as
    its reason; a single command refuses with it.
    """


class StageError(ColdindexError):
    """A step failed for a reason the input checks did not foresee."""

    exit_code = 5


class BusyError(ColdindexError):
    """Another run holds the output folder."""

    exit_code = 4


_ERRNO_ADVICE = {
    "ENOSPC": "the disk is full; free some space or choose another folder, then run again",
    "EDQUOT": "the disk quota is exhausted; free some space or choose another folder, then "
              "run again",
    "EROFS": "the file system is read-only; choose a writable folder",
    "EACCES": "permission denied; choose a location you can write to or fix its permissions",
    "EPERM": "the operation is not permitted; choose a location you can write to or fix its "
             "permissions",
    "ENOENT": "a folder on the way does not exist; check the path",
    "ENOTDIR": "a part of the path is not a folder; check the path",
    "EISDIR": "the path is a folder where a file is expected; remove it or choose another "
              "path",
    "ELOOP": "the path is a symbolic link, which coldindex does not follow; remove the link "
             "or choose another path",
    "EMFILE": "too many files are open; close other programs and run again",
    "EIO": "the storage reported an input/output error; check the disk and run again",
}


def os_error_sentence(exc: OSError, action: str, path: object = None) -> str:
    """One sentence for an operating-system error: what failed, where, and what to do.

    Parameters
    ----------
    exc
        The error.
    action
        What was being done, e.g. ``"writing"`` or ``"reading"``.
    path
        The file concerned (default: the error's own file name).

    Returns
    -------
    str
        E.g. ``"Writing out/fields.nc failed: the disk is full; free some space ..."``.
    """
    import errno

    name = errno.errorcode.get(exc.errno or 0, "")
    where = path if path is not None else (exc.filename or "a file")
    advice = _ERRNO_ADVICE.get(name)
    if advice is None:
        reason = exc.strerror or type(exc).__name__
        advice = f"{reason}; check the path, the free space and the permissions"
    return f"{action.capitalize()} {where} failed: {advice}."
