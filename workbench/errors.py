"""The package's exceptions.

Every message names the variable (or file, or setting) at fault and says what
to do about it. The app shows ``str(exc)`` in its status area.
"""
from __future__ import annotations


class WorkbenchError(Exception):
    """Base class of every error the package raises on purpose."""


class InputError(WorkbenchError, ValueError):
    """The input data cannot be used as given."""


class FileFormatError(InputError):
    """A file is empty, truncated, or not a format we read (netCDF, GRIB2, Zarr)."""


class MissingVariableError(InputError, KeyError):
    """A required variable (temperature, winds, geopotential) was not found."""

    def __str__(self):  # KeyError would otherwise quote the message
        return str(self.args[0]) if self.args else ""


class UnitsError(InputError):
    """A variable has missing or unrecognised units."""


class GridError(InputError):
    """Coordinates are missing, duplicated, non-monotonic or too few."""


class DomainError(WorkbenchError, ValueError):
    """The domain or reference state does not allow the computation (equator, sigma <= 0)."""


class SessionError(WorkbenchError):
    """A session file cannot be written or read back (schema, checksum, overwrite)."""


class PieceError(WorkbenchError, ValueError):
    """A piece definition is invalid (empty polygon, bad layer, unknown kind)."""


class AccessError(WorkbenchError, PermissionError):
    """A path outside the configured data folders was requested."""


class AnnotationError(WorkbenchError, ValueError):
    """An annotation (label, arrow, region) is invalid: bad position, colour, field or type."""


class ExportError(WorkbenchError):
    """A figure, briefing or netCDF export cannot be written (exists, bad path or format)."""


class Cancelled(WorkbenchError):
    """A long job was cancelled by the user (raised from its progress callback)."""
