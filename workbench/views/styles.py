"""Shared drawing conventions of the page (Bokeh, :mod:`workbench.views.interactive`) and the
figures and briefing (matplotlib, :mod:`workbench.views.static`), and the place-name formatters
used by the command line as well.

This module imports nothing heavier than the standard library, so the command line
(``pvwb info`` / ``invert``) can format longitudes without loading a plotting library.

Line styles are given as the words both libraries accept ("solid", "dashed", "dotted");
widths are in points for matplotlib and screen pixels for Bokeh (the same numbers).
"""
from __future__ import annotations

__all__ = ["HEIGHT_POSITIVE", "HEIGHT_NEGATIVE", "OMEGA_ASCENT", "OMEGA_DESCENT",
           "OMEGA_COLOURS", "height_key", "omega_key", "lon_label", "lat_label", "lon_range",
           "lat_range", "domain_label"]

#: Height anomaly of the balanced flow: positive (anticyclonic in the north) and negative.
HEIGHT_POSITIVE = {"colour": "#d55e00", "dash": "solid", "width": 2.0}
HEIGHT_NEGATIVE = {"colour": "#5e3c99", "dash": "dashed", "width": 2.0}

#: QG omega: ascent (omega < 0) and descent (omega > 0), one colour, told apart by the dash.
OMEGA_ASCENT = {"colour": "#cc79a7", "dash": "dashed", "width": 2.0}
OMEGA_DESCENT = {"colour": "#cc79a7", "dash": "solid", "width": 1.2}
#: colours for a second and third omega field drawn on one figure (the first is OMEGA_ASCENT's)
OMEGA_COLOURS = ("#cc79a7", "#7a2e5d", "#e3b5cf")


def height_key(step) -> str:
    """The legend text of the height-anomaly contours, the same in the page and the figures."""
    return f"Z′ every {step:g} m (orange positive, purple dashed negative)"


def omega_key(what: str, step) -> str:
    """The legend text of QG ω contours (``what``: e.g. "due to the pieces")."""
    return f"QG ω {what} every {step:g} Pa/s (dashed: ascent, solid: descent)"


def _deg(value: float, digits) -> str:
    return f"{value:g}" if digits is None else f"{value:.{digits}f}"


def lon_label(lon: float, digits: int | None = 1) -> str:
    """A longitude as °E / °W (0 and 180 without a letter), e.g. ``-43.5`` -> ``43.5°W``;
    ``digits=None`` writes the shortest form (``-40`` -> ``40°W``)."""
    x = (float(lon) + 180.0) % 360.0 - 180.0
    tol = 1e-9 if digits is None else 0.5 * 10 ** -digits
    if abs(x) < tol or abs(abs(x) - 180.0) < tol:
        return f"{_deg(abs(x), digits)}°"
    return f"{_deg(abs(x), digits)}°{'E' if x > 0 else 'W'}"


def lat_label(lat: float, digits: int | None = 1) -> str:
    """A latitude as °N / °S, e.g. ``-33`` -> ``33.0°S`` (``digits=None``: ``33°S``)."""
    y = float(lat)
    tol = 1e-9 if digits is None else 0.5 * 10 ** -digits
    if abs(y) < tol:
        return f"{_deg(0.0, digits)}°"
    return f"{_deg(abs(y), digits)}°{'N' if y > 0 else 'S'}"


def lon_range(west: float, east: float) -> str:
    """A longitude span as ``80°W..20°E`` (shortest numbers)."""
    return f"{lon_label(west, None)}..{lon_label(east, None)}"


def lat_range(south: float, north: float) -> str:
    """A latitude span as ``20°N..75°N``."""
    return f"{lat_label(south, None)}..{lat_label(north, None)}"


def domain_label(d: dict) -> str:
    """A Case.domain dict as ``20°N..75°N, 80°W..20°E``."""
    return f"{lat_range(d['lat_min'], d['lat_max'])}, {lon_range(d['lon_min'], d['lon_max'])}"
