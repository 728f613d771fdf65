"""One family of errors for everything a user can get wrong.

The CLI prints a :class:`DiscoverError` as one line and exits with the class's
``exit_code``; any other exception is a bug and keeps its traceback.
"""


class DiscoverError(Exception):
    """Base class of every user-facing failure."""

    exit_code = 1


class ConfigError(DiscoverError):
    """A config key is unknown, missing, of the wrong type or out of range."""

    exit_code = 2


class DataError(DiscoverError):
    """A data file cannot be read or fails a check (columns, time, NaN...)."""

    exit_code = 3


class ExpressionError(ConfigError):
    """A term expression does not parse or names something not allowed."""

    exit_code = 4


class ModelFileError(DiscoverError):
    """A model file is missing, unreadable or breaks the model-file contract."""

    exit_code = 5


class OutputError(DiscoverError):
    """The output folder exists already or cannot be written."""

    exit_code = 6


class ExportError(DiscoverError):
    """The arguments of an export do not fit the model: operating point, format or output path.

    Exit code 7. A model file that cannot be read, or breaks the contract, stays a
    :class:`ModelFileError` (exit code 5) also during an export.
    """

    exit_code = 7
