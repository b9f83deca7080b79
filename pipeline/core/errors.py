"""The error types every module raises, and the exit code each one maps to."""


class LoamError(Exception):
    """Base class; ``exit_code`` is what the command line returns."""

    exit_code = 1


class UsageError(LoamError):
    """Bad command line, unreadable or invalid configuration: exit 2."""

    exit_code = 2


class ConfigError(UsageError):
    """The configuration file breaks its schema."""


class DataError(LoamError):
    """Input or manifest data stopped the run: exit 1."""


class ManifestError(DataError):
    """A manifest breaks its JSON Schema or Arrow schema."""


class ParameterError(ValueError):
    """A function was called with a parameter value it cannot use.

    The message always names the parameter and the value, like
    ``ParameterError("sample_rate=11025 is not one of 8000, 16000, 32000, 48000")``.
    """


class LockedError(UsageError):
    """Another run holds the output folder."""
