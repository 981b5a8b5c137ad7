"""Place names as every message, table and figure of the workbench writes them: longitudes
as °E/°W (``43.5°W``), latitudes as °N/°S, spans as ``80°W..20°E`` (common practice in
forecast products). Standard library only, so computation, the command line and the views
share one spelling.
"""
from __future__ import annotations

__all__ = ["lon_label", "lat_label", "lon_range", "lat_range", "domain_label", "point_label"]


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


def point_label(lon: float, lat: float, digits: int | None = 1) -> str:
    """A point as ``43.5°W, 52.0°N``."""
    return f"{lon_label(lon, digits)}, {lat_label(lat, digits)}"
