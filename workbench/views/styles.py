"""Shared drawing conventions of the page (Bokeh, :mod:`workbench.views.interactive`) and the
figures and briefing (matplotlib, :mod:`workbench.views.static`); the place-name formatters
(:mod:`workbench.places`) are re-exported here.

This module imports nothing heavier than the standard library, so the command line
(``pvwb info`` / ``invert``) can format longitudes without loading a plotting library.

Line styles are given as the words both libraries accept ("solid", "dashed", "dotted");
widths are in points for matplotlib and screen pixels for Bokeh (the same numbers).
"""
from __future__ import annotations

from ..places import domain_label, lat_label, lat_range, lon_label, lon_range  # re-exported

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
