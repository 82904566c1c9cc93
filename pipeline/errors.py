"""The project's small exception hierarchy.

Every error a user can cause (a bad file, a wrong key, an impossible
parameter) is raised as a :class:`LightledgerError` subclass whose message is
one line that names the file or parameter and says what is wrong.  The command
line prints that line and exits non-zero without a traceback; anything else is
a bug and keeps its traceback.
"""

__all__ = [
    "LightledgerError",
    "InputFileError",
    "ConfigError",
    "ParameterError",
    "AllMaskedError",
]


class LightledgerError(Exception):
    """Base class of every error that a user's input can cause."""


class InputFileError(LightledgerError):
    """A file is missing, unreadable or does not follow the expected layout."""


class ConfigError(LightledgerError):
    """A TOML profile or visit description has a wrong, missing or unknown key."""


class ParameterError(LightledgerError, ValueError):
    """A function or stage parameter is outside its allowed values."""


class AllMaskedError(LightledgerError, ValueError):
    """Every element that a computation needs is masked or non-finite."""
