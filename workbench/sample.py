"""The invented sample storm "Skerrywind": a small QG life-cycle model written as an analysis.

Everything about this storm is INVENTED: the scenario, the dates (in the year 2051), the
weather. It exists so that the notebooks, the app, the command line and the tests have a
developing extratropical cyclone to dissect without real data. It is not real weather, not a
forecast and not a warning.

How the case is made (all deterministic: no random numbers, no thread-dependent reductions):

1. **Reference state.** At every latitude the temperature follows a standard-atmosphere
   shaped profile: the U.S. Standard Atmosphere 1976 lapse rate of 6.5 K/km from the
   1013.25 hPa level up to a tropopause, isothermal above. The temperature at the
   1013.25 hPa level falls poleward across a baroclinic zone (288.15 K, the standard value,
   at the zone's centre) and the tropopause temperature varies so that the tropopause is high
   and cold in the south and low in the north. Geopotential follows by hydrostatic
   integration upward from the 1000 hPa level, whose height comes from an invented zonal-mean
   sea-level pressure. The geostrophic (thermal-wind) westerly jet peaks near 45-50 m/s around
   200-250 hPa at about 43 N.
2. **Model.** Quasi-geostrophic potential vorticity (QG PV) dynamics on the project's
   inversion engine (:mod:`workbench.inversion`): the interior QG PV anomaly q' on every
   level and the potential-temperature anomaly theta' on the bottom boundary (1000 hPa) are
   advected by the geostrophic flow of the jet plus the perturbation (Arakawa's energy- and
   enstrophy-conserving Jacobian on the sphere); the background QG PV includes the full
   Coriolis parameter f (so beta) and the jet's own PV gradient. The 100 hPa top is a lid
   with theta' = 0 (a lid carrying the stratosphere's strong theta gradient would grow
   spurious lid-trapped waves). Every stage inverts (q', theta'_bottom) for the geopotential
   anomaly with ``get_solver(QGGrid(...)).solve`` (phi' = 0 on the lateral boundary). Time
   stepping is the three-stage strong-stability-preserving Runge-Kutta scheme. Damping: a
   grid-scale fourth-order filter, a sponge near the lateral boundaries, a boundary-layer
   drag on the relative vorticity below 850 hPa and a relaxation of the surface theta'
   towards the (fixed) sea-surface state.
   The initial perturbation is an upper-level PV anomaly (a short-wave trough centred at
   380 hPa, its core surrounded by a ring of opposite sign so that its far field stays local)
   upstream of a weak surface warm anomaly (theta' = 4 K, likewise ringed).
3. **Latent heating, a demonstration simplification, not a moist model.** An invented
   relative-humidity field is high where the QG flow ascends (and in lower-tropospheric warm
   air) and low where it descends. Where the relative humidity exceeds a threshold and the QG
   vertical motion is upward, a heating rate offsets a fraction of the adiabatic cooling of
   the ascent, ``dtheta/dt = e * s(RH) * (-omega) * (-dthetabar/dp)``. The ascent omega is the
   adiabatic QG vertical motion diagnosed from the QG thermodynamic equation with the
   inverted geopotential tendency of the model itself (it agrees with the Q-vector omega of
   :mod:`workbench.inversion.omega` to a pattern correlation above 0.98). The heating's PV tendency
   ``-d/dp[(f0/sigma)(R_d Pi/p) dtheta/dt]`` creates a positive lower-tropospheric PV anomaly
   below the heating maximum (and a negative one above it); the column total is conserved.
4. **Output.** Every 6 h the state is written as full pressure-level fields that follow
   DEVELOPERS.md: temperature (background plus the hydrostatic T' = -(p/R_d) dphi'/dp),
   geopotential integrated hydrostatically from that temperature (so the hypsometric
   equation holds level to level), u and v as the geostrophic wind of the written
   geopotential with the full latitude-dependent f, relative humidity and sea-level
   pressure reduced from 1000 hPa with the standard lapse rate. Values are rounded to fixed
   binary quanta (see ``QUANTA``) so that the float32 file compresses well; the winds and the
   sea-level pressure are computed from the rounded geopotential and temperature.

Entry points: :func:`build_sample` (Python) and :func:`main` (``pvwb sample``). The committed
file is ``sample_cases/skerrywind.nc`` (:data:`DEFAULT_PATH`).
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import DomainError, InputError
from .units import EARTH_RADIUS, G, KAPPA, P0, RD, coriolis

__all__ = [
    "GENERATOR_VERSION", "SCENARIO", "DEFAULT_PATH", "LEVELS_HPA", "QUANTA", "CAUTION", "StormSettings",
    "build_sample", "main", "reference_state", "standard_lapse_temperature", "sea_level_pressure",
    "arakawa_jacobian", "track_low", "write_case",
]

#: Version of the generator; goes into the file's attributes. Bump when the output changes.
GENERATOR_VERSION = "1.0"
#: The invented scenario's name.
SCENARIO = "Skerrywind"
#: Where the committed sample case lives (the repository's ``sample_cases/`` folder).
DEFAULT_PATH = Path(__file__).resolve().parents[1] / "sample_cases" / "skerrywind.nc"
#: The standard pressure levels written (hPa), bottom to top.
LEVELS_HPA = (1000, 975, 950, 925, 900, 850, 800, 750, 700, 650, 600, 550, 500, 450, 400, 350, 300,
              250, 200, 150, 100)
#: Storage quanta (powers of two, exactly representable in float32): every written value is a
#: multiple of its quantum, which leaves trailing zero bits for the compressor.
QUANTA = {"geopotential": 2.0 ** -1, "temperature": 2.0 ** -7, "u": 2.0 ** -4, "v": 2.0 ** -4,
          "relative_humidity": 2.0 ** -1, "mslp": 1.0}
#: The caution that goes with every product made from this case.
CAUTION = ("Diagnostic analyses of model or analysis data, not forecasts or warnings; decisions follow "
           "the official warnings of the responsible meteorological service and local procedures.")

#: Standard-atmosphere constants (U.S. Standard Atmosphere 1976): sea-level pressure and
#: temperature, tropospheric lapse rate, tropopause temperature.
USSA_P0 = 101325.0
USSA_T0 = 288.15
USSA_LAPSE = 0.0065
USSA_TTROP = 216.65


@dataclass(frozen=True)
class StormSettings:
    """Every setting of the generator (defaults make the committed file).

    Distances are great-circle kilometres, pressures hPa, longitudes degrees east.
    """

    # domain and time
    lat_south: float = 20.0
    lat_north: float = 75.0
    lon_west: float = -80.0
    lon_east: float = 20.0
    resolution_deg: float = 1.0
    base_time: str = "2051-02-09T00:00"
    hours: float = 84.0
    output_every_hours: float = 6.0
    step_minutes: float = 15.0
    # reference state
    jet_latitude: float = 45.0
    surface_temperature_contrast: float = 34.0
    baroclinic_zone_width_deg: float = 12.0
    tropopause_break_latitude: float = 38.0
    tropopause_temperature_step: float = 10.0
    tropopause_break_width_deg: float = 6.0
    tropopause_corner_k: float = 4.0
    polar_tropopause_warming: float = 3.0
    mslp_mean_hpa: float = 1012.0
    mslp_contrast_hpa: float = 8.0
    # initial perturbation: upper PV anomaly (trough) and a surface warm anomaly
    upper_lon: float = -68.0
    upper_lat: float = 45.0
    upper_pressure_hpa: float = 380.0
    upper_depth_hpa: float = 220.0
    upper_radius_zonal_km: float = 500.0
    upper_radius_meridional_km: float = 700.0
    upper_ring_fraction: float = 1.0
    upper_height_anomaly_m: float = -210.0
    surface_lon: float = -57.0
    surface_lat: float = 45.0
    surface_theta_k: float = 4.0
    surface_radius_km: float = 550.0
    surface_ring_fraction: float = 1.0
    # the demonstration latent heating
    latent_heating: bool = True
    heating_efficiency: float = 0.85
    rh_heating_threshold: float = 70.0
    # surface exchange: boundary-layer drag on the relative vorticity below 850 hPa and
    # relaxation of the surface theta' towards the (fixed) sea-surface state
    drag_days: float = 5.0
    surface_relaxation_days: float = 3.0
    # numerics
    filter_hours: float = 3.0
    sponge_points: int = 6
    sponge_hours: float = 3.0

    @classmethod
    def from_overrides(cls, **overrides):
        """Settings with ``overrides`` applied; unknown names or bad values raise InputError."""
        names = {f.name: f for f in dataclasses.fields(cls)}
        unknown = sorted(set(overrides) - set(names))
        if unknown:
            raise InputError(
                f"sample setting(s) {', '.join(unknown)} unknown; valid settings are: {', '.join(names)}.")
        clean = {}
        for key, value in overrides.items():
            kind = names[key].type
            try:
                if kind in ("bool", bool):
                    if isinstance(value, str):
                        low = value.strip().lower()
                        if low not in ("true", "false", "yes", "no", "1", "0", "on", "off"):
                            raise ValueError(value)
                        value = low in ("true", "yes", "1", "on")
                    clean[key] = bool(value)
                elif kind in ("int", int):
                    fv = float(value)
                    if fv != int(fv):
                        raise ValueError(value)
                    clean[key] = int(fv)
                elif kind in ("float", float):
                    clean[key] = float(value)
                else:
                    clean[key] = str(value)
            except (TypeError, ValueError):
                raise InputError(
                    f"sample setting {key}: {value!r} is not a valid {kind}; give a {kind} value.") from None
        out = cls(**clean)
        out.validate()
        return out

    def to_json(self) -> str:
        """The settings as a sorted JSON object (stored in the file's attributes)."""
        return json.dumps(dataclasses.asdict(self), sort_keys=True)

    def validate(self):
        """Raise InputError (naming the setting and the fix) for settings the model cannot run."""
        s = self
        for name in dataclasses.fields(self):
            v = getattr(s, name.name)
            if isinstance(v, float) and not math.isfinite(v):
                raise InputError(f"sample setting {name.name}: {v} is not finite; give a finite number.")
        if not (0.0 < s.lat_south < s.lat_north < 89.0):
            raise InputError(
                f"sample settings lat_south/lat_north: {s.lat_south:g}..{s.lat_north:g} must satisfy "
                "0 < lat_south < lat_north < 89 (a northern-hemisphere domain off the equator).")
        if not (s.lon_west < s.lon_east <= s.lon_west + 180.0):
            raise InputError(
                f"sample settings lon_west/lon_east: {s.lon_west:g}..{s.lon_east:g} must increase and span "
                "at most 180 degrees.")
        if not (0.25 <= s.resolution_deg <= 3.0):
            raise InputError(f"sample setting resolution_deg: {s.resolution_deg:g} must be within 0.25..3 degrees.")
        for name, span in (("lat", s.lat_north - s.lat_south), ("lon", s.lon_east - s.lon_west)):
            n = span / s.resolution_deg
            if abs(n - round(n)) > 1e-6 or round(n) < 20:
                raise InputError(
                    f"sample setting resolution_deg: {s.resolution_deg:g} must divide the {name} span "
                    f"({span:g} degrees) into at least 20 intervals.")
        if not (0.0 < s.step_minutes <= 30.0):
            raise InputError(f"sample setting step_minutes: {s.step_minutes:g} must be in (0, 30].")
        if s.output_every_hours <= 0 or s.hours < 0:
            raise InputError("sample settings hours/output_every_hours: give hours >= 0 and output_every_hours > 0.")
        steps_per_output = s.output_every_hours * 60.0 / s.step_minutes
        if abs(steps_per_output - round(steps_per_output)) > 1e-9:
            raise InputError(
                f"sample setting step_minutes: {s.step_minutes:g} must divide output_every_hours "
                f"({s.output_every_hours:g} h) into whole steps.")
        nout = s.hours / s.output_every_hours
        if abs(nout - round(nout)) > 1e-9:
            raise InputError(
                f"sample setting hours: {s.hours:g} must be a whole multiple of output_every_hours "
                f"({s.output_every_hours:g}).")
        if s.hours > 240:
            raise InputError(f"sample setting hours: {s.hours:g} is more than the 240 h this model is meant for.")
        try:
            np.datetime64(s.base_time, "s")
        except ValueError:
            raise InputError(
                f"sample setting base_time: {s.base_time!r} is not an ISO date-time such as 2051-02-09T00:00.") from None
        for name in ("upper", "surface"):
            lon, lat = getattr(s, f"{name}_lon"), getattr(s, f"{name}_lat")
            if not (s.lon_west < lon < s.lon_east and s.lat_south < lat < s.lat_north):
                raise InputError(
                    f"sample settings {name}_lon/{name}_lat: ({lon:g}, {lat:g}) lies outside the domain; "
                    "put the anomaly inside it.")
        for name in ("upper_radius_zonal_km", "upper_radius_meridional_km", "surface_radius_km", "upper_depth_hpa",
                     "baroclinic_zone_width_deg", "filter_hours", "sponge_hours", "drag_days",
                     "surface_relaxation_days", "tropopause_break_width_deg", "tropopause_corner_k"):
            if getattr(s, name) <= 0:
                raise InputError(f"sample setting {name}: must be > 0.")
        if not (150.0 <= s.upper_pressure_hpa <= 600.0):
            raise InputError(f"sample setting upper_pressure_hpa: {s.upper_pressure_hpa:g} must lie in 150..600 hPa.")
        if not (0.0 <= s.heating_efficiency < 1.0):
            raise InputError(
                f"sample setting heating_efficiency: {s.heating_efficiency:g} must be in [0, 1) (the fraction of "
                "the adiabatic cooling of ascent offset by heating).")
        if not (0.0 <= s.rh_heating_threshold < 100.0):
            raise InputError(f"sample setting rh_heating_threshold: {s.rh_heating_threshold:g} must be in [0, 100).")
        if s.sponge_points < 1:
            raise InputError("sample setting sponge_points: must be at least 1.")
        if not (0.0 <= s.surface_temperature_contrast <= 60.0):
            raise InputError("sample setting surface_temperature_contrast: must be within 0..60 K.")


# ---------------------------------------------------------------------------------------------
# reference state
# ---------------------------------------------------------------------------------------------

def standard_lapse_temperature(pressure_pa, surface_temperature=USSA_T0, surface_pressure=USSA_P0,
                               lapse_rate=USSA_LAPSE):
    """Temperature (K) at ``pressure_pa`` in a layer of constant lapse rate (K/m).

    ``T = T_s (p / p_s)^(R_d lapse / g)`` (the tropospheric law of the U.S. Standard
    Atmosphere 1976 with its defaults).
    """
    return surface_temperature * (np.asarray(pressure_pa, dtype=float) / surface_pressure) ** (RD * lapse_rate / G)


def sea_level_pressure(geopotential_1000, temperature_1000, lapse_rate=USSA_LAPSE):
    """Sea-level pressure (Pa) reduced from the 1000 hPa surface with a constant lapse rate.

    The column between sea level and the 1000 hPa surface (at height Z = Phi/g) is taken to
    have the standard lapse rate, with ``T_msl = T_1000 + lapse * Z``; then
    ``p_msl = 1000 hPa * (T_msl / T_1000)^(g / (R_d lapse))``. Works for Z < 0 too.
    """
    z = np.asarray(geopotential_1000, dtype=float) / G
    t = np.asarray(temperature_1000, dtype=float)
    return 100000.0 * (1.0 + lapse_rate * z / t) ** (G / (RD * lapse_rate))


def _hypsometric(phi_bottom, temperature, pressure):
    """Geopotential on the levels, integrated upward from ``phi_bottom`` with the hypsometric
    equation, the layer-mean temperature being the mean of the two levels (exact for T linear in ln p)."""
    phi = np.empty(np.shape(temperature), dtype=float)
    phi[..., 0, :, :] = phi_bottom
    dlnp = np.log(pressure[:-1] / pressure[1:])
    for k in range(1, pressure.size):
        phi[..., k, :, :] = phi[..., k - 1, :, :] + RD * 0.5 * (temperature[..., k, :, :] + temperature[..., k - 1, :, :]) * dlnp[k - 1]
    return phi


def reference_state(settings: StormSettings, latitude, pressure):
    """The zonally uniform reference (background) state on ``latitude`` (deg) x ``pressure`` (Pa).

    Returns a dict of numpy arrays: ``temperature`` and ``geopotential`` (nz, ny), the surface
    temperature at 1013.25 hPa ``t_surface`` (ny), the tropopause temperature ``t_tropopause``
    and pressure ``p_tropopause`` (ny) and the invented zonal-mean sea-level pressure
    ``mslp`` (ny, Pa).
    """
    s = settings
    lat = np.asarray(latitude, dtype=float)
    p = np.asarray(pressure, dtype=float)
    zone = np.tanh((lat - s.jet_latitude) / s.baroclinic_zone_width_deg)
    t_surface = USSA_T0 - 0.5 * s.surface_temperature_contrast * zone

    def shape(x):
        return (s.tropopause_temperature_step * np.tanh((x - s.tropopause_break_latitude) / s.tropopause_break_width_deg)
                + s.polar_tropopause_warming * np.tanh((x - 55.0) / 10.0))

    t_trop = USSA_TTROP + shape(lat) - shape(s.jet_latitude)
    t_lapse = standard_lapse_temperature(p[:, None], t_surface[None, :])
    # smooth maximum of the lapse-rate profile and the isothermal stratosphere (a 1.5 K corner)
    delta = s.tropopause_corner_k
    temperature = t_trop[None, :] + delta * np.logaddexp(0.0, (t_lapse - t_trop[None, :]) / delta)
    mslp = 100.0 * (s.mslp_mean_hpa - 0.5 * s.mslp_contrast_hpa * np.tanh((lat - s.jet_latitude) / 10.0))
    # height of the 1000 hPa surface above sea level: inverse of sea_level_pressure()
    t1000 = temperature[0]
    z1000 = (t1000 / USSA_LAPSE) * ((mslp / 100000.0) ** (RD * USSA_LAPSE / G) - 1.0)
    phi = _hypsometric((G * z1000)[:, None], temperature[:, :, None], p)[:, :, 0]
    p_trop = USSA_P0 * (t_trop / t_surface) ** (G / (RD * USSA_LAPSE))
    return dict(temperature=temperature, geopotential=phi, t_surface=t_surface, t_tropopause=t_trop,
                p_tropopause=p_trop, mslp=mslp)


def _static_stability(temperature_zonal, latitude, pressure):
    """sigma(p) = -(R_d Tbar/(p thetabar)) dthetabar/dp of the cos-weighted area mean (Holton & Hakim ch. 6)."""
    w = np.cos(np.deg2rad(latitude))
    tbar = (temperature_zonal * w[None, :]).sum(axis=1) / w.sum()
    pi = (pressure / P0) ** KAPPA
    thbar = tbar / pi
    dth = np.gradient(thbar, pressure, edge_order=2)
    sigma = -(RD * tbar / (pressure * thbar)) * dth
    if not np.all(sigma > 0):
        raise DomainError("sample reference state: sigma(p) is not positive at every level; "
                          "reduce surface_temperature_contrast or restore the default tropopause settings.")
    return sigma


# ---------------------------------------------------------------------------------------------
# numerics
# ---------------------------------------------------------------------------------------------

def arakawa_jacobian(psi, q):
    """Arakawa's (1966) Jacobian J(psi, q) in index space at the interior nodes.

    ``psi`` and ``q`` are arrays (..., ny, nx) on a grid uniform in both index directions (the
    last axis is x, the one before y). Returns (..., ny-2, nx-2) equal to
    ``dx dy (psi_x q_y - psi_y q_x)`` in grid units, the average of the three second-order
    forms J++, J+x and Jx+, which conserves the domain sums of q, q**2 and psi*q (energy and
    enstrophy) when psi and q vanish or are constant on the boundary.
    """
    p, c = psi, q
    pE, pW, pN, pS = p[..., 1:-1, 2:], p[..., 1:-1, :-2], p[..., 2:, 1:-1], p[..., :-2, 1:-1]
    pNE, pNW, pSE, pSW = p[..., 2:, 2:], p[..., 2:, :-2], p[..., :-2, 2:], p[..., :-2, :-2]
    cE, cW, cN, cS = c[..., 1:-1, 2:], c[..., 1:-1, :-2], c[..., 2:, 1:-1], c[..., :-2, 1:-1]
    cNE, cNW, cSE, cSW = c[..., 2:, 2:], c[..., 2:, :-2], c[..., :-2, 2:], c[..., :-2, :-2]
    j1 = (pE - pW) * (cN - cS) - (pN - pS) * (cE - cW)
    j2 = pE * (cNE - cSE) - pW * (cNW - cSW) - pN * (cNE - cNW) + pS * (cSE - cSW)
    j3 = cN * (pNE - pNW) - cS * (pSE - pSW) - cE * (pNE - pSE) + cW * (pNW - pSW)
    return (j1 + j2 + j3) / 12.0


def _second_difference_zero_ghost(a, axis):
    """a[i+1] - 2 a[i] + a[i-1] along ``axis`` with zero values beyond the ends."""
    out = -2.0 * a
    sl_hi = [slice(None)] * a.ndim
    sl_lo = [slice(None)] * a.ndim
    sl_hi[axis] = slice(1, None)
    sl_lo[axis] = slice(None, -1)
    out[tuple(sl_lo)] += a[tuple(sl_hi)]
    out[tuple(sl_hi)] += a[tuple(sl_lo)]
    return out


def _filter4(a):
    """Index-space fourth-order difference (del-4 in grid units) over the last two axes."""
    d2x = _second_difference_zero_ghost(a, -1)
    d2y = _second_difference_zero_ghost(a, -2)
    return _second_difference_zero_ghost(d2x, -1) + _second_difference_zero_ghost(d2y, -2)


def _distance_km(lat, lon, lat0, lon0):
    """Great-circle distance (km) on the sphere of the project's Earth radius."""
    la, lo = np.deg2rad(lat), np.deg2rad(lon)
    la0, lo0 = np.deg2rad(lat0), np.deg2rad(lon0)
    c = np.sin(la) * np.sin(la0) + np.cos(la) * np.cos(la0) * np.cos(lo - lo0)
    return EARTH_RADIUS * np.arccos(np.clip(c, -1.0, 1.0)) / 1000.0


class _LifeCycleModel:
    """The QG model: grid, solver, background and the tendencies (internal)."""

    def __init__(self, s: StormSettings):
        from .inversion.operator import QGGrid, apply_qg_operator
        from .inversion.solver import get_solver

        self.s = s
        d = s.resolution_deg
        self.lat = s.lat_south + d * np.arange(round((s.lat_north - s.lat_south) / d) + 1)
        self.lon = s.lon_west + d * np.arange(round((s.lon_east - s.lon_west) / d) + 1)
        self.p = np.array(LEVELS_HPA, dtype=float) * 100.0
        nz, ny, nx = self.p.size, self.lat.size, self.lon.size
        self.shape = (nz, ny, nx)
        self.dt = s.step_minutes * 60.0
        self.dlam = np.deg2rad(d)
        self.dphi = np.deg2rad(d)

        ref = reference_state(s, self.lat, self.p)
        self.ref = ref
        self.sigma = _static_stability(ref["temperature"], self.lat, self.p)
        self.f0 = float(coriolis(0.5 * (self.lat[0] + self.lat[-1])))
        self.exner = (self.p / P0) ** KAPPA
        with warnings.catch_warnings():
            # |f| varies by more than a factor 2 over 20-75 N: constant-f0 QG is the model's choice
            warnings.filterwarnings("ignore", message=r"latitude: \|f\| varies")
            self.grid = QGGrid(self.lat, self.lon, self.p, self.sigma, self.f0)
            # background QG PV on every latitude: the operator on a grid one row wider each side
            lat_ext = np.concatenate([[self.lat[0] - d], self.lat, [self.lat[-1] + d]])
            ref_ext = reference_state(s, lat_ext, self.p)
            grid_ext = QGGrid(lat_ext, self.lon[:3], self.p, self.sigma, self.f0)
        self.solver = get_solver(self.grid)
        phi_ext = np.repeat(ref_ext["geopotential"][:, :, None], 3, axis=2)
        th_ext = ref_ext["temperature"] / self.exner[:, None]
        qbar = apply_qg_operator(grid_ext, phi_ext, np.repeat(th_ext[0][:, None], 3, axis=1),
                                 np.repeat(th_ext[-1][:, None], 3, axis=1))[:, 1:-1, 1]
        qbar = qbar + coriolis(self.lat)[None, :]
        theta_bar = ref["temperature"] / self.exner[:, None]
        # stacked background: interior PV on nz levels, then bottom and top theta
        self.xbar = np.concatenate([qbar, theta_bar[:1], theta_bar[-1:]], axis=0)[:, :, None]
        self.phibar = ref["geopotential"][:, :, None]
        self.theta_bar = theta_bar

        # metric of the Jacobian: J = J_index / (12 dlam dphi a^2 cos(phi)) -> tendency factor
        cosphi = np.cos(np.deg2rad(self.lat[1:-1]))
        self.jac_factor = (1.0 / (self.dlam * self.dphi * EARTH_RADIUS ** 2 * cosphi))[:, None]
        # damping rates
        self.filter_coef = 1.0 / (16.0 * s.filter_hours * 3600.0)
        jj = np.arange(ny)
        ii = np.arange(nx)
        dj = np.minimum(jj, ny - 1 - jj)[:, None]
        di = np.minimum(ii, nx - 1 - ii)[None, :]
        w = s.sponge_points
        ramp = np.maximum(np.maximum(0.0, 1.0 - dj / w), np.maximum(0.0, 1.0 - di / w)) ** 2
        self.sponge = ramp / (s.sponge_hours * 3600.0)
        self.interior = np.zeros((ny, nx), dtype=bool)
        self.interior[1:-1, 1:-1] = True
        # heating and the ascent that drives it fade out across the sponge
        self.inner_weight = (1.0 - ramp) * self.interior
        # boundary-layer drag: 1/drag_days at 1000 hPa, falling linearly to zero at 850 hPa
        ph = self.p / 100.0
        self.drag = np.clip((ph - 850.0) / 150.0, 0.0, 1.0) / (s.drag_days * 86400.0)
        self.relax = 1.0 / (s.surface_relaxation_days * 86400.0)
        vc = self.grid.vertical()
        self.h = vc["h"]
        # heating profile: zero at the bottom boundary and above 250 hPa, one in 950..350 hPa
        ph = self.p / 100.0
        self.heat_profile = np.clip((1000.0 - ph) / 50.0, 0.0, 1.0) * np.clip((ph - 250.0) / 100.0, 0.0, 1.0)
        self.max_cfl = 0.0

    # -------------------------------------------------------------------- state <-> fields
    def invert(self, x):
        nz = self.p.size
        return self.solver.solve(x[:nz], bottom_theta=x[nz], top_theta=x[nz + 1])

    def total_psi(self, phi_anom):
        return (self.phibar + phi_anom) / self.f0

    def advection(self, x, phi_anom):
        """-J(psi, q_total) for the stacked state (interior PV, bottom theta; the top theta' stays 0)."""
        nz = self.p.size
        psi = self.total_psi(phi_anom)
        psi_stack = np.concatenate([psi, psi[:1]], axis=0)
        tend = np.zeros_like(x)
        tend[:nz + 1, 1:-1, 1:-1] = -arakawa_jacobian(psi_stack, self.xbar[:nz + 1] + x[:nz + 1]) * self.jac_factor
        return tend, psi

    def damping(self, x, phi_anom):
        """Grid-scale filter, sponge, boundary-layer drag and surface theta' relaxation."""
        from .inversion.operator import horizontal_laplacian

        nz = self.p.size
        out = -self.filter_coef * _filter4(x) * self.interior - self.sponge * x
        low = np.flatnonzero(self.drag > 0)
        if low.size:
            # d(q')/dt = -zeta'/tau with zeta' = lap(phi')/f0 on the lowest levels
            zeta = np.nan_to_num(horizontal_laplacian(self.grid, phi_anom[low])) / self.f0
            out[low] -= self.drag[low, None, None] * zeta
        out[nz] -= self.relax * x[nz]
        return out

    def cfl(self, psi):
        """Largest advective Courant number |u| dt/dx + |v| dt/dy of the QG flow."""
        a = EARTH_RADIUS
        cos = np.cos(np.deg2rad(self.lat))[:, None]
        u = -np.gradient(psi, self.dphi, axis=-2) / a
        v = np.gradient(psi, self.dlam, axis=-1) / (a * cos)
        c = np.abs(u) * self.dt / (a * cos * self.dlam) + np.abs(v) * self.dt / (a * self.dphi)
        return float(c.max())

    def omega(self, x, phi_anom, adv, psi):
        """Adiabatic QG vertical motion (Pa s-1) from the QG thermodynamic equation.

        ``sigma omega = -(d/dt + V_g.grad)(dPhi/dp)`` with dPhi/dt the inversion of the model's
        own adiabatic PV and boundary-theta tendency; omega = 0 on the bottom and top levels and
        on the lateral boundary.
        """
        phi_t = self.invert(adv)
        phi_total = self.phibar + phi_anom
        dphi_dp = np.gradient(phi_total, self.p, axis=0, edge_order=2)
        dphit_dp = np.gradient(phi_t, self.p, axis=0, edge_order=2)
        om = np.zeros(self.shape)
        jac = arakawa_jacobian(psi[1:-1], dphi_dp[1:-1]) * self.jac_factor
        om[1:-1, 1:-1, 1:-1] = -(dphit_dp[1:-1, 1:-1, 1:-1] + jac) / self.sigma[1:-1, None, None]
        # the diagnosis is unreliable next to the lateral boundary: fade it out across the sponge
        om *= self.inner_weight
        return om

    def humidity(self, omega, temperature_anom):
        """The invented relative humidity (%): moist where the QG flow ascends, dry where it sinks."""
        ph = self.p / 100.0
        base = np.interp(ph, [100.0, 200.0, 300.0, 600.0, 1000.0], [5.0, 15.0, 35.0, 55.0, 80.0])[:, None, None]
        om0 = 0.25  # Pa s-1
        up = np.tanh(np.maximum(-omega, 0.0) / om0)
        down = np.tanh(np.maximum(omega, 0.0) / om0)
        low = np.clip((ph - 500.0) / 300.0, 0.0, 1.0)[:, None, None]
        warm = 12.0 * low * np.tanh(temperature_anom / 3.0)
        rh = base + (98.0 - base) * up - 0.7 * (base - 10.0) * down + warm
        return np.clip(rh, 3.0, 100.0)

    def heating_tendency(self, omega, rh):
        """PV tendency (s-2) of the demonstration latent heating, flux form (column total conserved)."""
        s = self.s
        gate = np.clip((rh - s.rh_heating_threshold) / (100.0 - s.rh_heating_threshold), 0.0, 1.0)
        # H = (f0/sigma)(R_d Pi/p) dtheta/dt with dtheta/dt = e * gate * (-omega) * (-dthetabar/dp)
        # and -dthetabar/dp = sigma p / (R_d Pi): H = f0 e gate (-omega)
        flux = self.f0 * s.heating_efficiency * self.heat_profile[:, None, None] * gate * np.maximum(-omega, 0.0)
        faces = np.zeros((self.p.size + 1,) + flux.shape[1:])
        faces[1:-1] = 0.5 * (flux[:-1] + flux[1:])
        # dq_k/dt = -(H_{k-1/2} - H_{k+1/2}) / h_k  (p decreases with k)
        return -(faces[:-1] - faces[1:]) / self.h[:, None, None]

    def temperature_anomaly(self, x, phi_anom):
        """T' = -(p/R_d) dphi'/dp on the levels; the boundary levels take Pi theta'."""
        nz = self.p.size
        t = -(self.p[:, None, None] / RD) * np.gradient(phi_anom, self.p, axis=0, edge_order=2)
        t[0] = self.exner[0] * x[nz]
        t[-1] = self.exner[-1] * x[nz + 1]
        return t

    # -------------------------------------------------------------------- one diagnosis + step
    def diagnose(self, x, moist=True):
        """Inversion, advection, omega and humidity at state x (omega = 0 unless ``moist``)."""
        phi = self.invert(x)
        adv, psi = self.advection(x, phi)
        om = self.omega(x, phi, adv, psi) if moist else np.zeros(self.shape)
        t_anom = self.temperature_anomaly(x, phi)
        rh = self.humidity(om, t_anom)
        return dict(phi=phi, adv=adv, psi=psi, omega=om, t_anom=t_anom, rh=rh)

    def step(self, x, diag, moist=True):
        """One SSP-RK3 step; the heating is held at its value at the start of the step."""
        nz = self.p.size
        heat = np.zeros_like(x)
        if moist and self.s.latent_heating and self.s.heating_efficiency > 0:
            heat[:nz] = self.heating_tendency(diag["omega"], diag["rh"])
        self.max_cfl = max(self.max_cfl, self.cfl(diag["psi"]))

        def rate(y, adv=None, phi=None):
            if adv is None:
                phi = self.invert(y)
                adv, _ = self.advection(y, phi)
            return adv + self.damping(y, phi) + heat

        dt = self.dt
        x1 = x + dt * rate(x, diag["adv"], diag["phi"])
        x2 = 0.75 * x + 0.25 * (x1 + dt * rate(x1))
        return x / 3.0 + (2.0 / 3.0) * (x2 + dt * rate(x2))

    # -------------------------------------------------------------------- initial state
    def initial_state(self):
        s = self.s
        nz, ny, nx = self.shape
        lat2, lon2 = np.meshgrid(self.lat, self.lon, indexing="ij")
        x = np.zeros((nz + 2, ny, nx))
        # upper PV anomaly: an ellipse elongated north-south, Gaussian in pressure
        dy = EARTH_RADIUS / 1000.0 * np.deg2rad(lat2 - s.upper_lat)
        dx = EARTH_RADIUS / 1000.0 * np.deg2rad(lon2 - s.upper_lon) * np.cos(np.deg2rad(0.5 * (lat2 + s.upper_lat)))
        rr = (dx / s.upper_radius_zonal_km) ** 2 + (dy / s.upper_radius_meridional_km) ** 2
        # a short-wave trough: the core minus a ring of equal area integral (zero net PV), so that
        # its far field decays fast instead of filling the domain
        horiz = np.exp(-rr) - s.upper_ring_fraction * 0.25 * np.exp(-rr / 4.0)
        vert = np.exp(-(((self.p / 100.0) - s.upper_pressure_hpa) / s.upper_depth_hpa) ** 2)
        shape_q = vert[:, None, None] * horiz[None] * self.interior
        # scale: the upper anomaly alone gives the requested height anomaly minimum at its level
        k_up = int(np.argmin(np.abs(self.p / 100.0 - s.upper_pressure_hpa)))
        phi_unit = self.solver.solve(shape_q)
        scale = s.upper_height_anomaly_m * G / phi_unit[k_up].min() if s.upper_height_anomaly_m else 0.0
        x[:nz] = scale * shape_q
        # surface warm anomaly
        r = _distance_km(lat2, lon2, s.surface_lat, s.surface_lon)
        rs = (r / s.surface_radius_km) ** 2
        x[nz] = s.surface_theta_k * (np.exp(-rs) - s.surface_ring_fraction * 0.25 * np.exp(-rs / 4.0)) * self.interior
        return x

    # -------------------------------------------------------------------- output fields
    def fields(self, x, diag):
        """Quantised float64 output fields of one time (dict of arrays)."""
        t = _quantise(self.ref["temperature"][:, :, None] + diag["t_anom"], QUANTA["temperature"])
        phi1000 = self.phibar[0] + diag["phi"][0]
        phi = _quantise(_hypsometric(phi1000, t, self.p), QUANTA["geopotential"])
        u, v = _geostrophic_wind(phi, self.lat, self.lon)
        rh = _quantise(diag["rh"], QUANTA["relative_humidity"])
        mslp = _quantise(sea_level_pressure(phi[0], t[0]), QUANTA["mslp"])
        return dict(geopotential=phi, temperature=t, u=_quantise(u, QUANTA["u"]), v=_quantise(v, QUANTA["v"]),
                    relative_humidity=rh, mslp=mslp)


def _quantise(a, quantum):
    """Round to a multiple of ``quantum`` (a power of two: exact in float32)."""
    return np.round(np.asarray(a, dtype=float) / quantum) * quantum


def _geostrophic_wind(phi, lat, lon):
    """Geostrophic wind of phi (..., ny, nx) with the full f on the sphere (centred differences,
    second-order one-sided at the edges)."""
    la = np.deg2rad(lat)
    f = coriolis(lat)[:, None]
    dphi_dy = np.gradient(phi, la, axis=-2, edge_order=2) / EARTH_RADIUS
    dphi_dx = np.gradient(phi, np.deg2rad(lon), axis=-1, edge_order=2) / (EARTH_RADIUS * np.cos(la)[:, None])
    return -dphi_dy / f, dphi_dx / f


# ---------------------------------------------------------------------------------------------
# the case
# ---------------------------------------------------------------------------------------------

_VAR_ATTRS = {
    "geopotential": dict(standard_name="geopotential", long_name="geopotential", units="m2 s-2"),
    "temperature": dict(standard_name="air_temperature", long_name="air temperature", units="K"),
    "u": dict(standard_name="eastward_wind", long_name="eastward wind (geostrophic)", units="m s-1"),
    "v": dict(standard_name="northward_wind", long_name="northward wind (geostrophic)", units="m s-1"),
    "relative_humidity": dict(standard_name="relative_humidity",
                              long_name="relative humidity (invented, demonstration only)", units="%"),
    "mslp": dict(standard_name="air_pressure_at_mean_sea_level", long_name="mean sea-level pressure",
                 units="Pa"),
}


def _single_thread_blas():
    """A context that keeps BLAS on one thread (threadpoolctl if installed, else a no-op).

    The model's matrix products are tiny; extra BLAS threads only contend for the cores and
    one thread keeps the run's arithmetic independent of the machine's core count.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - the result is the same, only slower on busy machines
        import contextlib

        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def _run(settings: StormSettings, progress=None):
    """Run the model; returns (times in hours, list of field dicts, model)."""
    with _single_thread_blas():
        return _run_model(settings, progress)


def _run_model(settings: StormSettings, progress=None):
    model = _LifeCycleModel(settings)
    x = model.initial_state()
    steps_per_output = int(round(settings.output_every_hours * 60.0 / settings.step_minutes))
    nout = int(round(settings.hours / settings.output_every_hours)) + 1
    out = []
    hours = []
    diag = model.diagnose(x)
    for n in range(nout):
        out.append(model.fields(x, diag))
        hours.append(n * settings.output_every_hours)
        if progress:
            progress(n, nout)
        if n == nout - 1:
            break
        for _ in range(steps_per_output):
            x = model.step(x, diag)
            diag = model.diagnose(x)
            if not np.all(np.isfinite(x)):
                raise DomainError(
                    "sample model: the run became unstable (non-finite values); reduce step_minutes or the "
                    "anomaly amplitudes.")
    if model.max_cfl > 1.6:
        raise DomainError(
            f"sample model: the Courant number reached {model.max_cfl:.2f} (> 1.6, beyond the stable range of the "
            "time scheme); reduce step_minutes.")
    return hours, out, model


def build_sample(path=None, *, overwrite=False, progress=None, **settings) -> xr.Dataset:
    """Build the invented sample storm and return it as an ``xarray.Dataset``.

    Parameters
    ----------
    path : str or Path, optional
        Also write the case there as netCDF-4 (zlib-compressed float32), atomically: a
        temporary file in the same folder, then ``os.replace``.
    overwrite : bool
        Replace an existing file at ``path``. Without it an existing file is left untouched and
        InputError is raised.
    progress : callable(n, total), optional
        Called after each output time is made.
    **settings
        Overrides of :class:`StormSettings` (e.g. ``hours=48``, ``latent_heating=False``).

    Returns
    -------
    xarray.Dataset with dims (time, pressure, latitude, longitude) following DEVELOPERS.md:
    ``geopotential``, ``temperature``, ``u``, ``v``, ``relative_humidity`` and ``mslp``
    (time, latitude, longitude), float32, and global attributes that label the case as
    invented, with the generator version, the settings (JSON) and the caution.

    The same settings give the same data (no random numbers). The storm is INVENTED: not real
    weather. Its latent heating is a demonstration simplification, not a moist model.
    """
    s = StormSettings.from_overrides(**settings)
    target = None
    if path is not None:
        target = Path(path)
        if target.is_dir():
            raise InputError(f"sample output {target}: is a folder; give a file path ending in .nc.")
        if target.exists() and not overwrite:
            raise InputError(
                f"sample output {target}: the file exists and was left untouched; pass overwrite=True "
                "(command line: --overwrite) to replace it, or choose another path.")
        if not target.parent.exists():
            raise InputError(f"sample output {target}: the folder {target.parent} does not exist; create it first.")
    hours, fields, model = _run(s, progress)
    ds = _to_dataset(s, hours, fields, model)
    if target is not None:
        write_case(ds, target, overwrite=overwrite)
    return ds


def _to_dataset(s: StormSettings, hours, fields, model) -> xr.Dataset:
    base = np.datetime64(s.base_time, "s")
    times = base + (np.asarray(hours) * 3600.0).astype("int64").astype("timedelta64[s]")
    coords = dict(
        time=("time", times.astype("datetime64[ns]"), dict(standard_name="time", long_name="valid time (invented)")),
        pressure=("pressure", model.p, dict(standard_name="air_pressure", long_name="pressure", units="Pa",
                                            positive="down")),
        latitude=("latitude", model.lat, dict(standard_name="latitude", long_name="latitude", units="degrees_north")),
        longitude=("longitude", model.lon, dict(standard_name="longitude", long_name="longitude",
                                                units="degrees_east")),
    )
    data = {}
    for name in ("geopotential", "temperature", "u", "v", "relative_humidity"):
        arr = np.stack([f[name] for f in fields]).astype(np.float32)
        data[name] = (("time", "pressure", "latitude", "longitude"), arr, dict(_VAR_ATTRS[name]))
    data["mslp"] = (("time", "latitude", "longitude"), np.stack([f["mslp"] for f in fields]).astype(np.float32),
                    dict(_VAR_ATTRS["mslp"]))
    ds = xr.Dataset(data, coords=coords)
    ds["relative_humidity"].attrs["comment"] = (
        "Invented for the demonstration: high where the QG flow ascends, low where it sinks; not a moisture "
        "analysis.")
    ds["u"].attrs["comment"] = ds["v"].attrs["comment"] = (
        "Geostrophic wind of the written geopotential with the latitude-dependent Coriolis parameter.")
    ds.attrs = {
        "title": f"{SCENARIO}: INVENTED demonstration storm (PV Workbench sample case)",
        "invented": "yes",
        "scenario": f"{SCENARIO}, an invented North Atlantic winter cyclone in the year 2051",
        "invented_label": f"{SCENARIO} is an invented storm.",
        "summary": ("INVENTED demonstration storm, not real weather. A quasi-geostrophic life-cycle simulation on a "
                    "baroclinic jet: an upper-level PV trough approaches a weak surface warm anomaly and a surface "
                    "cyclone develops beneath it."),
        "comment": ("INVENTED demonstration storm, not real weather. Latent heating is a demonstration "
                    "simplification, not a moist model: an invented relative humidity and the QG ascent set a "
                    "heating that offsets part of the adiabatic cooling of rising air."),
        "caution": CAUTION,
        "source": "workbench.sample (quasi-geostrophic life-cycle model on the PV Workbench inversion engine)",
        "generator": "workbench.sample.build_sample",
        "generator_version": GENERATOR_VERSION,
        "generator_settings": s.to_json(),
        "reference_state": ("U.S. Standard Atmosphere 1976 lapse rate and isothermal stratosphere with a baroclinic "
                            "zone; geostrophic westerly jet in thermal-wind balance"),
        "Conventions": "CF-1.8",
    }
    return ds


def write_case(ds: xr.Dataset, path, *, overwrite=False):
    """Write ``ds`` as compressed netCDF-4 atomically (temporary file in the folder, then rename).

    Refuses (InputError) to replace an existing file unless ``overwrite``; on any failure the
    temporary file is removed and an existing file at ``path`` is untouched.
    """
    target = Path(path)
    if target.exists() and not overwrite:
        raise InputError(
            f"sample output {target}: the file exists and was left untouched; pass overwrite=True "
            "(command line: --overwrite) to replace it.")
    encoding = {}
    for name, da in ds.data_vars.items():
        chunks = (1,) + da.shape[1:]
        encoding[name] = dict(zlib=True, complevel=6, shuffle=True, dtype="float32", chunksizes=chunks,
                              _FillValue=None)
    base = np.datetime_as_string(ds["time"].values[0], "s").replace("T", " ")
    encoding["time"] = dict(units=f"hours since {base}", calendar="proleptic_gregorian", dtype="float64")
    for c in ("pressure", "latitude", "longitude"):
        encoding[c] = dict(_FillValue=None)
    from .export import temp_file_next_to

    # registered temporary file next to the target: removed on errors, SIGINT/SIGTERM and at exit
    with temp_file_next_to(target) as tmp:
        ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # the temporary file is 0600; give the file the usual permissions
        os.replace(tmp, target)
    return target


# ---------------------------------------------------------------------------------------------
# analysis helper
# ---------------------------------------------------------------------------------------------

def track_low(ds: xr.Dataset, *, margin_deg=8.0, search_km=900.0, start=None):
    """Follow the surface low through the times: (time, longitude, latitude, central mslp hPa).

    At the first time the low is the minimum of ``mslp`` more than ``margin_deg`` from the
    lateral boundaries (or the minimum within ``search_km`` of ``start`` = (lon, lat)); at
    each later time it is the minimum within ``search_km`` of the previous centre. Returns a
    list of dicts (one per time).
    """
    mslp = ds["mslp"]
    lat = mslp["latitude"].values
    lon = mslp["longitude"].values
    la2, lo2 = np.meshgrid(lat, lon, indexing="ij")
    inner = ((la2 >= lat[0] + margin_deg) & (la2 <= lat[-1] - margin_deg)
             & (lo2 >= lon[0] + margin_deg) & (lo2 <= lon[-1] - margin_deg))
    prev = start
    out = []
    for n in range(mslp.sizes["time"]):
        field = np.asarray(mslp.isel(time=n).values, dtype=float)
        mask = inner.copy()
        if prev is not None:
            mask &= _distance_km(la2, lo2, prev[1], prev[0]) <= search_km
        if not mask.any():
            raise InputError("track_low: no grid point within the search radius; increase search_km.")
        idx = np.unravel_index(np.argmin(np.where(mask, field, np.inf)), field.shape)
        prev = (float(lo2[idx]), float(la2[idx]))
        out.append(dict(time=mslp["time"].values[n], longitude=prev[0], latitude=prev[1],
                        mslp_hpa=float(field[idx]) / 100.0))
    return out


# ---------------------------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------------------------

def main(argv=None) -> int:
    """``pvwb sample [-o PATH] [--overwrite] [--hours H] [--no-latent-heating] [--set NAME=VALUE ...]``."""
    from . import cli

    parser = cli.build_parser(
        "pvwb sample",
        (f"Rebuild the invented sample storm {SCENARIO} (INVENTED, not real weather): a QG "
                     "life-cycle simulation written as pressure-level fields."))
    parser.add_argument("-o", "--output", default=str(DEFAULT_PATH),
                        help=f"netCDF file to write (default: {DEFAULT_PATH})")
    cli.add_overwrite_option(parser, "--force")
    parser.add_argument("--hours", type=cli.positive_number("--hours"), default=None,
                        help="length of the run in hours")
    parser.add_argument("--no-latent-heating", action="store_true", help="switch off the demonstration heating")
    parser.add_argument("--set", dest="overrides", action="append", default=[], metavar="NAME=VALUE",
                        help="override any generator setting (repeatable); see --show-settings")
    parser.add_argument("--show-settings", action="store_true", help="print the default settings as JSON and exit")
    parser.add_argument("--quiet", action="store_true", help="no progress bar or messages")
    args = parser.parse_args(argv)
    if args.show_settings:
        print(json.dumps(dataclasses.asdict(StormSettings()), indent=2, sort_keys=True))
        return 0
    overrides = {}
    for item in args.overrides:
        if "=" not in item:
            raise InputError(f"--set {item!r}: expected NAME=VALUE, e.g. --set hours=48.")
        key, value = item.split("=", 1)
        overrides[key.strip()] = value.strip()
    if args.hours is not None:
        overrides["hours"] = args.hours
    if args.no_latent_heating:
        overrides["latent_heating"] = False

    cli.check_output(args.output, True, what="sample case")
    bar = cli.progress(desc="sample", unit="time", enabled=False if args.quiet else None)

    def progress(n, total):
        bar.total = total
        bar.update(n + 1 - bar.n)

    try:
        ds = build_sample(args.output, overwrite=args.overwrite, progress=progress, **overrides)
    finally:
        bar.close()
    track = track_low(ds)
    if not args.quiet:
        print(f"pvwb sample: wrote {args.output} ({SCENARIO}, INVENTED demonstration storm, not real weather)")
        for row in track:
            print(f"  {np.datetime_as_string(row['time'], 'h')}  {row['longitude']:7.1f} E {row['latitude']:5.1f} N  "
                  f"{row['mslp_hpa']:7.1f} hPa")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
