"""How each map field is presented, shared by the static and the interactive views.

Plain data (no plotting import): field -> colour-map key (see ``views.static.COLOUR_MAPS``),
full label, short label for the page, display units, diverging or not.
"""
from __future__ import annotations

from typing import NamedTuple

__all__ = ["FieldStyle", "FIELDS"]


class FieldStyle(NamedTuple):
    cmap: str
    label: str
    short: str
    units: str
    diverging: bool


FIELDS: dict[str, FieldStyle] = {
    "ertel_pv": FieldStyle("pv", "Ertel PV", "PV", "PVU", False),
    "ertel_pv_anomaly": FieldStyle("anomaly", "Ertel PV anomaly", "PV anomaly", "PVU", True),
    "potential_temperature": FieldStyle("theta", "potential temperature", "potential temperature", "K", False),
    "pressure": FieldStyle("pressure", "pressure", "pressure", "hPa", False),
    "wind_speed": FieldStyle("speed", "wind speed", "wind speed", "m s-1", False),
    "geopotential_height": FieldStyle("height", "geopotential height", "geopotential height", "m", False),
    "u": FieldStyle("anomaly", "eastward wind", "eastward wind", "m s-1", True),
    "v": FieldStyle("anomaly", "northward wind", "northward wind", "m s-1", True),
}
