"""Exception hierarchy of kinkfit.

Every error a user can cause is a :class:`KinkfitError` carrying the
offending file, key and value as attributes.  The CLI prints
``kinkfit: error: <message>`` and exits with :attr:`KinkfitError.exit_code`.
"""

from __future__ import annotations

__all__ = [
    "KinkfitError",
    "InputFileError",
    "ConfigError",
    "PhysicsRangeError",
    "ResultFileError",
    "ConvergenceError",
]


class KinkfitError(Exception):
    """Base class of all kinkfit errors.

    Parameters
    ----------
    message : str
        One-line description of the problem, naming what is wrong.
    file : str, optional
        Path of the offending file.
    key : str, optional
        Offending config key or FITS keyword.
    value : object, optional
        Offending value.
    """

    exit_code = 2

    def __init__(self, message: str, *, file=None, key=None, value=None):
        super().__init__(message)
        self.message = message
        self.file = None if file is None else str(file)
        self.key = key
        self.value = value

    def __str__(self) -> str:  # one line, prefixed with the file if known
        text = " ".join(str(self.message).split())
        if self.file and self.file not in text:
            text = f"{self.file}: {text}"
        return text


class InputFileError(KinkfitError):
    """A data file (FITS cube, manifest) is unreadable or malformed."""


class ConfigError(KinkfitError):
    """A configuration file or value is invalid."""


class PhysicsRangeError(KinkfitError):
    """A physical parameter is outside the range the model supports."""


class ResultFileError(KinkfitError):
    """A result file is missing, corrupt, mismatched or would be overwritten."""


class ConvergenceError(KinkfitError):
    """A fit ran but did not converge; the result file says so."""

    exit_code = 1
