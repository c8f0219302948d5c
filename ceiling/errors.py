"""The project's exceptions.

Every user-facing error is a :class:`CeilingError`. Each subclass also derives from the
matching built-in exception, so library users can catch ``ValueError`` or
``FileNotFoundError`` as usual. The message is one line that names the file, layer, field or
value at fault and says how to fix it; the CLI prints it and exits with code 2.
"""

from __future__ import annotations

__all__ = [
    "CeilingError",
    "ConfigError",
    "InputFileError",
    "DataError",
    "FitError",
    "ModelFileError",
    "OutputError",
    "CeilingWarning",
    "DroppedPointsWarning",
    "ConvergenceWarning",
]


class CeilingError(Exception):
    """Base class of every error the tool reports to a user."""

    def __str__(self) -> str:  # always one line
        return " ".join(str(self.args[0]).split()) if self.args else ""


class ConfigError(CeilingError, ValueError):
    """A configuration file or a parameter has a bad value."""


class InputFileError(CeilingError, FileNotFoundError):
    """An input file is missing, unreadable or of the wrong format."""


class DataError(CeilingError, ValueError):
    """The content of an input (table, layer) cannot be used as it is."""


class FitError(CeilingError, ValueError):
    """A boundary model cannot be fitted to the data given."""


class ModelFileError(CeilingError, ValueError):
    """A model file is invalid, edited inconsistently or from an unknown schema version."""


class OutputError(CeilingError, OSError):
    """An output location cannot be used (exists, not writable, inside an input folder)."""


class CeilingWarning(UserWarning):
    """Base class of the tool's warnings."""


class DroppedPointsWarning(CeilingWarning):
    """Survey points were dropped (outside the grid, on nodata, missing values)."""


class ConvergenceWarning(CeilingWarning):
    """An iterative solver stopped before reaching its tolerance."""
