"""The project's small exception hierarchy.

Every error a user can cause (a bad file, a wrong key, an impossible
parameter) is raised as a :class:`LightledgerError` subclass whose message is
one line that names the file or parameter and says what is wrong (a
validation of a whole visit may hold several such lines, one per problem).
The command line prints each line as ``lightledger: error: LINE`` and exits
with the error's :attr:`~LightledgerError.exit_status` without a traceback;
anything else is a bug and keeps its traceback.

Exit statuses of the command line: 0 success, 1 a bug (traceback shown), 2 a
user's mistake (:class:`LightledgerError`), 3 the environment failed
(:class:`EnvironmentFailure`: disk full, file-size limit, permission denied),
130 interrupted.
"""

__all__ = [
    "LightledgerError",
    "InputFileError",
    "ConfigError",
    "ParameterError",
    "AllMaskedError",
    "EnvironmentFailure",
]


class LightledgerError(Exception):
    """Base class of every error that a user's input can cause.

    The message holds one line per problem, each ``FILE: what is wrong``.
    """

    #: Exit status of the command line for this error.
    exit_status = 2

    def lines(self):
        """The message's problems, one per line."""
        return [line for line in str(self).splitlines() if line.strip()] or [type(self).__name__]


class InputFileError(LightledgerError):
    """A file is missing, unreadable or does not follow the expected layout."""


class ConfigError(LightledgerError):
    """A TOML profile or visit description has a wrong, missing or unknown key."""


class ParameterError(LightledgerError, ValueError):
    """A function or stage parameter is outside its allowed values."""


class AllMaskedError(LightledgerError, ValueError):
    """Every element that a computation needs is masked or non-finite."""


class EnvironmentFailure(LightledgerError):
    """The machine refused an operation: disk full, file-size limit, permission denied.

    Not a mistake in the user's input and not a bug: the message names the
    file and the condition; the command line exits with status 3.
    """

    exit_status = 3
