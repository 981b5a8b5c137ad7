"""Units and physical constants shared by every module.

All constants come from :mod:`metpy.constants` so that every layer agrees.
``PVU`` (1 PVU = 1e-6 K m2 kg-1 s-1) is not in MetPy's registry; it is
defined here, once, on MetPy's registry.
"""
from __future__ import annotations

import metpy.constants as _mc
from metpy.units import units

if "PVU" not in units:
    units.define("PVU = 1e-6 * kelvin * meter**2 / kilogram / second")

#: Gravitational acceleration (m s-2).
G = float(_mc.g.m_as("m/s**2"))
#: Gas constant of dry air (J kg-1 K-1).
RD = float(_mc.Rd.m_as("J/kg/K"))
#: Specific heat of dry air at constant pressure (J kg-1 K-1).
CP = float(_mc.Cp_d.m_as("J/kg/K"))
#: Poisson constant R_d / c_p.
KAPPA = float(_mc.kappa.m_as(""))
#: Earth's angular velocity (s-1).
OMEGA = float(_mc.omega.m_as("1/s"))
#: Mean Earth radius (m).
EARTH_RADIUS = float(_mc.earth_avg_radius.m_as("m"))
#: Reference pressure for potential temperature (Pa).
P0 = 100000.0
#: One potential-vorticity unit in SI (K m2 kg-1 s-1).
PVU = 1.0e-6

__all__ = ["units", "G", "RD", "CP", "KAPPA", "OMEGA", "EARTH_RADIUS", "P0", "PVU", "coriolis"]


def coriolis(lat_deg):
    """Coriolis parameter f = 2 Omega sin(lat) (s-1) for latitude in degrees (numpy)."""
    import numpy as np

    return 2.0 * OMEGA * np.sin(np.deg2rad(lat_deg))
