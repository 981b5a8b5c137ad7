"""QG what-if experiments: change one PV piece of an analysis and run the QG model forward.

Computation only (no plotting, no widgets). Every product is labelled
"QG what-if experiment, not a forecast" (:data:`LABEL`) with the model's limits
(:data:`LIMITS`).

The model is the sample storm's QG engine (:mod:`workbench.sample`: ``_LifeCycleModel``'s
SSP-RK3 step, damping and demonstration heating) on the case's own grid and reference state:

* State: the interior QG PV anomaly q' on every level and theta' on the bottom and top levels
  (the case's anomaly dataset, ``Case.anomaly``), relative to the case's reference state.
* Dynamics: q = qbar + q' and theta = thetabar + theta' are carried by the geostrophic wind of
  Phi = Phibar + Phi' (psi = Phi/f0, constant f0) with Arakawa's Jacobian
  (:func:`workbench.tendency.advective_tendency`); qbar is the QG PV of the reference
  geopotential including f (beta); every Runge-Kutta stage inverts (q', theta') with the fast
  solver (:func:`workbench.inversion.solver.get_solver`).
* Boundary treatment: lateral boundaries held: Phi' on the lateral boundary nodes stays at the
  analysis value (its balanced extension into the domain is part of the fixed background flow);
  q' on the outermost ring (where the operator is not defined) is the neighbouring interior
  value at the start and is then only damped; a 6-point sponge relaxes the anomaly towards the
  reference state (3 h at the edge). The lid's theta' (top level) is held unless
  ``advect_top=True`` (a lid carrying the stratosphere's strong theta gradient grows spurious
  lid-trapped waves; the sample storm's generator holds it too).
* Damping (the engine's): index-space del-4 filter (2-grid wave e-folds in 3 h),
  boundary-layer drag on the relative vorticity below 850 hPa (5 days at 1000 hPa), relaxation
  of the bottom theta' (3 days). ``moist=True`` adds the engine's demonstration latent heating
  (an invented humidity diagnosed from the QG ascent, not a moist model).
* Output every 6 h: 1000 and 500 hPa heights and sea-level pressure (reduced from 1000 hPa with
  the standard lapse rate, :func:`workbench.sample.sea_level_pressure`; T(1000 hPa) = reference +
  Pi theta'_bottom); the surface low is tracked with :func:`workbench.sample.track_low`.

Entry points: :func:`run_whatif` -> :class:`WhatIf` (``.track`` DataFrame, ``.verification``
against the case's later analyses, ``.maps`` Dataset, ``.difference()``, ``.to_netcdf()``);
:func:`main` is ``pvwb whatif``.
"""
from __future__ import annotations

import dataclasses
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from .errors import DomainError, InputError
from .sample import StormSettings, _distance_km, _LifeCycleModel, sea_level_pressure, track_low
from .tendency import Geometry, advective_tendency, case_budget, fill_ring
from .units import EARTH_RADIUS, G, KAPPA, P0

__all__ = ["LABEL", "LIMITS", "QGModel", "Modification", "model_from_case", "run_whatif", "WhatIf", "main",
           "MAX_HOURS"]

LABEL = "QG what-if experiment, not a forecast"
LIMITS = ("Dry (or simple demonstration moist) quasi-geostrophic model with constant f0: no ageostrophic "
          "dynamics, no real moisture, radiation or surface fluxes beyond a simple drag and relaxation; "
          "lateral boundaries held at the analysis; the lid's theta held. Differences between experiment "
          "and control show how the QG dynamics respond to the change, not what the weather will do.")
MAX_HOURS = 48.0
OUTPUT_HOURS = 6.0
_STEP_CHOICES = (30.0, 20.0, 15.0, 12.0, 10.0, 7.5, 6.0, 5.0, 4.0, 3.0, 2.0, 1.0)


class QGModel(_LifeCycleModel):
    """The sample storm's QG engine on any regular grid and background (internal use and tests).

    Parameters
    ----------
    grid : QGGrid (regular latitude and longitude spacing)
    phibar : (nz, ny, nx) or broadcastable, background geopotential (m2 s-2) whose geostrophic
        wind carries everything (held fixed)
    xbar : (nz+2, ny, nx) or broadcastable, background QG PV on the levels (s-1, incl. f when
        wanted) then bottom and top theta (K)
    step_minutes : time step
    damping : the engine's filter, sponge, drag and surface relaxation (regional grids only)
    advect_top : advect the top theta' (default held)
    settings : StormSettings for the damping and heating constants (default the sample's)
    """

    def __init__(self, grid, phibar, xbar, *, step_minutes=15.0, damping=True, advect_top=False,
                 settings: StormSettings | None = None):
        from .inversion.solver import get_solver

        s = settings or StormSettings()
        self.s = s
        self.geom = Geometry.of_grid(grid)
        if damping and self.geom.periodic:
            raise DomainError("what-if model: damping (filter and sponge) is written for regional grids; "
                              "run a zonally periodic grid with damping=False.")
        self.grid = grid
        self.lat, self.lon, self.p = grid.lat, grid.lon, grid.pressure
        nz, ny, nx = grid.shape
        self.shape = (nz, ny, nx)
        self.dt = float(step_minutes) * 60.0
        self.dlam, self.dphi = self.geom.dlam, self.geom.dphi
        self.sigma = grid.sigma
        self.f0 = grid.f0
        self.exner = (self.p / P0) ** KAPPA
        self.solver = get_solver(grid)
        self.xbar = np.asarray(xbar, dtype=float)
        self.phibar = np.asarray(phibar, dtype=float)
        self.jac_factor = self.geom.factor
        self.advect_top = bool(advect_top)
        self.interior = np.zeros((ny, nx), dtype=bool)
        self.interior[1:-1, 1:-1] = True
        if damping:
            self.filter_coef = 1.0 / (16.0 * s.filter_hours * 3600.0)
            jj, ii = np.arange(ny), np.arange(nx)
            dj = np.minimum(jj, ny - 1 - jj)[:, None]
            di = np.minimum(ii, nx - 1 - ii)[None, :]
            w = s.sponge_points
            ramp = np.maximum(np.maximum(0.0, 1.0 - dj / w), np.maximum(0.0, 1.0 - di / w)) ** 2
            self.sponge = ramp / (s.sponge_hours * 3600.0)
            self.drag = np.clip((self.p / 100.0 - 850.0) / 150.0, 0.0, 1.0) / (s.drag_days * 86400.0)
            self.relax = 1.0 / (s.surface_relaxation_days * 86400.0)
        else:
            ramp = np.zeros((ny, nx))
            self.filter_coef = 0.0
            self.sponge = 0.0
            self.drag = np.zeros(nz)
            self.relax = 0.0
        self.inner_weight = (1.0 - ramp) * self.interior
        self.h = grid.vertical()["h"]
        ph = self.p / 100.0
        self.heat_profile = np.clip((1000.0 - ph) / 50.0, 0.0, 1.0) * np.clip((ph - 250.0) / 100.0, 0.0, 1.0)
        self.max_cfl = 0.0

    def advection(self, x, phi_anom):
        """-J(psi, xbar + x) for the interior PV and bottom theta (and the top theta if advected)."""
        nz = self.p.size
        psi = self.total_psi(phi_anom)
        nb = nz + 2 if self.advect_top else nz + 1
        psi_stack = np.concatenate([psi, psi[:1], psi[-1:]], axis=0)[:nb]
        tend = np.zeros_like(x)
        tend[:nb] = advective_tendency(psi_stack, self.xbar[:nb] + x[:nb], self.geom)
        return tend, psi

    def tendency(self, x, moist=False):
        """d x / dt of the whole model at state x (advection, damping, heating if ``moist``)."""
        diag = self.diagnose(x, moist=moist)
        nz = self.p.size
        heat = np.zeros_like(x)
        if moist and self.s.latent_heating and self.s.heating_efficiency > 0:
            heat[:nz] = self.heating_tendency(diag["omega"], diag["rh"])
        return diag["adv"] + self.damping(x, diag["phi"]) + heat

    def run(self, x, hours, *, moist=False, output_hours=OUTPUT_HOURS, callback=None, progress=None):
        """Integrate from state ``x`` for ``hours``; ``callback(hour, x, phi)`` at every output time
        (hour 0 included). Raises DomainError when the run becomes unstable."""
        steps_per_output = output_hours * 3600.0 / self.dt
        if abs(steps_per_output - round(steps_per_output)) > 1e-9:
            raise InputError(f"what-if model: the step ({self.dt / 60:g} min) must divide {output_hours:g} h.")
        steps_per_output = int(round(steps_per_output))
        nout = int(round(hours / output_hours))
        diag = self.diagnose(x, moist=moist)
        if callback:
            callback(0.0, x, diag["phi"])
        for n in range(1, nout + 1):
            for _ in range(steps_per_output):
                x = self.step(x, diag, moist=moist)
                diag = self.diagnose(x, moist=moist)
                if not np.all(np.isfinite(x)):
                    raise DomainError("what-if model: the run became unstable (non-finite values); the change "
                                      "is too large for the model or the time step too long.")
                if progress:  # after every step: (outputs done, fractional, of nout)
                    progress(n - 1 + (_ + 1) / steps_per_output, nout)
            if self.max_cfl > 1.6:
                raise DomainError(f"what-if model: the Courant number reached {self.max_cfl:.2f} (> 1.6); the "
                                  "run is not stable with this time step.")
            if callback:
                callback(n * output_hours, x, diag["phi"])
        return x


@dataclass
class Modification:
    """How the experiment changes one piece: ``scale`` (0 removes it) and/or a shift in degrees."""

    piece: str
    scale: float = 1.0
    shift_lon: float = 0.0
    shift_lat: float = 0.0

    def __post_init__(self):
        for name in ("scale", "shift_lon", "shift_lat"):
            v = getattr(self, name)
            try:
                v = float(v)
            except (TypeError, ValueError):
                raise InputError(f"what-if {name}: {v!r} is not a number.") from None
            if not math.isfinite(v):
                raise InputError(f"what-if {name}: {v!r} is not finite.")
            setattr(self, name, v)
        if not -5.0 <= self.scale <= 5.0:
            raise InputError(f"what-if scale: {self.scale:g} is outside -5..5; the QG model is meant for "
                             "moderate changes.")
        if abs(self.shift_lon) > 30 or abs(self.shift_lat) > 20:
            raise InputError("what-if shift: give at most 30 degrees of longitude and 20 of latitude.")

    def describe(self):
        parts = []
        if self.scale == 0:
            parts.append("removed")
        elif self.scale != 1:
            parts.append(f"scaled by {self.scale:g}")
        if self.shift_lon or self.shift_lat:
            parts.append(f"shifted by {self.shift_lon:+g} deg lon, {self.shift_lat:+g} deg lat")
        return f"piece {self.piece!r} " + (" and ".join(parts) if parts else "unchanged")


def _default_step(geom):
    res = math.degrees(min(geom.dlam, geom.dphi))
    limit = 15.0 * res
    for s in _STEP_CHOICES:
        if s <= limit + 1e-9:
            return s
    return _STEP_CHOICES[-1]


@dataclass
class CaseSetup:
    model: QGModel
    x0: np.ndarray
    budget: object
    lateral: np.ndarray
    ref_phi: np.ndarray
    ref_t: np.ndarray


def model_from_case(case, time=None, member=None, pieces=None, reference=None, *, step_minutes=None,
                    advect_top=False, damping=True):
    """The QG model on the case's grid and reference with the analysis at ``time`` as initial state.

    Returns a :class:`CaseSetup` (model, initial state x0, the piece budget, lateral data)."""
    budget = case_budget(case, time, member, pieces, reference)
    grid = budget.grid
    geom = budget.geom
    if geom.periodic:
        damping = False
    step = step_minutes or _default_step(geom)
    ref = budget.reference
    ref_phi = ref["geopotential"].transpose("pressure", "latitude", "longitude").values.astype(float)
    ref_t = ref["temperature"].transpose("pressure", "latitude", "longitude").values.astype(float)
    xbar = budget.pv[0]
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"latitude: \|f\| varies")
        model = QGModel(grid, ref_phi, xbar, step_minutes=step, damping=damping, advect_top=advect_top)
    _with_lateral(model, ref_phi, budget.lateral)
    return CaseSetup(model=model, x0=budget.anomaly_state.copy(), budget=budget, lateral=budget.lateral,
                     ref_phi=ref_phi, ref_t=ref_t)


def _with_lateral(model, ref_phi, lateral):
    """Background geopotential: the reference plus the balanced extension of the lateral data."""
    nz = model.shape[0]
    phi_l = model.solver.solve(np.zeros(model.shape), lateral=lateral) if lateral is not None else 0.0
    model.phibar = ref_phi + phi_l
    return nz


def _shift(field, dy, dx):
    from scipy.ndimage import shift

    return shift(field, [0.0] * (field.ndim - 2) + [dy, dx], order=1, mode="constant", cval=0.0)


def modified_state(setup: CaseSetup, mod: Modification):
    """(x, lateral) of the experiment: the piece's PV/theta (and lateral data) scaled and/or shifted."""
    b = setup.budget
    names = b.names[1:]
    if mod.piece not in names:
        raise InputError(f"what-if piece {mod.piece!r} is not one of: {', '.join(names)}.")
    f = b.forcings[mod.piece]
    nz = b.nz
    periodic = b.grid.periodic
    raw = np.zeros((nz + 2,) + b.grid.shape[1:])
    if f["q"] is not None:
        raw[:nz] = f["q"]
        raw[:nz, [0, -1], :] = 0.0
        if not periodic:
            raw[:nz, :, [0, -1]] = 0.0
    if f["bottom_theta"] is not None:
        raw[nz] = f["bottom_theta"]
    if f["top_theta"] is not None:
        raw[nz + 1] = f["top_theta"]
    dy = mod.shift_lat / math.degrees(b.geom.dphi)
    dx = mod.shift_lon / math.degrees(b.geom.dlam)
    moved = _shift(raw, dy, dx) if (dx or dy) else raw
    delta = mod.scale * moved - raw
    delta[:nz] = fill_ring(delta[:nz], periodic)
    x = setup.x0 + delta
    lateral = setup.lateral
    if f["lateral"] is not None and np.any(f["lateral"]):
        if dx or dy:
            raise InputError("what-if: the lateral boundary piece can be scaled or removed, not shifted.")
        lateral = setup.lateral + (mod.scale - 1.0) * f["lateral"]
    return x, lateral


@dataclass
class WhatIf:
    """Control and experiment of a what-if run (see :func:`run_whatif`)."""

    track: object  # DataFrame
    verification: object  # DataFrame or None
    maps: xr.Dataset
    modification: Modification
    summary: list
    attrs: dict = field(default_factory=dict)

    def difference(self, hour, field="height_1000"):
        """Experiment minus control of ``field`` (height_1000, height_500 m; mslp hPa) at ``hour``."""
        if field not in ("height_1000", "height_500", "mslp"):
            raise InputError(f"what-if difference: field {field!r} is not one of height_1000, height_500, mslp.")
        hours = self.maps["lead_time"].values
        if float(hour) not in hours:
            raise InputError(f"what-if difference: no output at {hour} h; outputs are at "
                             f"{', '.join(f'{h:g}' for h in hours)} h.")
        return (self.maps[f"experiment_{field}"] - self.maps[f"control_{field}"]).sel(lead_time=float(hour))

    def to_dataset(self) -> xr.Dataset:
        ds = self.maps.copy()
        for col in self.track.columns:
            if col in ("run", "lead_time_h", "valid_time"):
                continue
            for run in ("control", "experiment"):
                vals = self.track[self.track["run"] == run][col].values.astype(float)
                ds[f"{run}_low_{col}"] = ("lead_time", vals, dict(long_name=f"surface low {col} ({run})"))
        if self.verification is not None:
            for col in ("position_error_km", "depth_error_hpa", "analysis_mslp_hpa"):
                v = np.full(ds.sizes["lead_time"], np.nan)
                for _, row in self.verification.iterrows():
                    v[int(np.argmin(np.abs(ds["lead_time"].values - row["lead_time_h"])))] = row[col]
                ds[f"control_{col}"] = ("lead_time", v, dict(long_name=f"control vs the case's analysis: {col}"))
        ds.attrs.update({k: (v if isinstance(v, (str, int, float)) else str(v)) for k, v in self.attrs.items()})
        ds.attrs["summary"] = " ".join(self.summary)
        return ds

    def to_netcdf(self, path, overwrite=False):
        """Write :meth:`to_dataset` atomically (``workbench.export.atomic_target``)."""
        from .export import atomic_target

        ds = self.to_dataset()
        with atomic_target(path, overwrite=overwrite, what="what-if file") as tmp:
            ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4")
        return path


def _output_fields(model, ref_phi, ref_t, x, phi):
    """Heights at 1000 and 500 hPa (m) and sea-level pressure (hPa)."""
    nz = model.shape[0]
    full = model.phibar + phi
    k500 = int(np.argmin(np.abs(model.p - 50000.0)))
    t1000 = ref_t[0] + model.exner[0] * x[nz]
    mslp = sea_level_pressure(full[0], t1000) / 100.0
    return full[0] / G, full[k500] / G, mslp


def run_whatif(case, piece, scale=1.0, *, shift_lon=0.0, shift_lat=0.0, hours=36.0, time=None, member=None,
               pieces=None, reference=None, moist=False, step_minutes=None, progress=None, control=True):
    """Run the control (the analysis at ``time``) and the experiment (``piece`` scaled by ``scale``
    and/or shifted) for ``hours`` (<= 48) with the QG model; return a :class:`WhatIf`.

    ``scale=1`` without shift reproduces the control exactly (the same arithmetic). The surface
    low is tracked from the storm centre at ``time``; where the case has analyses at the control's
    valid times, ``verification`` gives the control's position and depth errors against them.
    ``progress``: optional ``progress(fraction, text)`` called after every model step; an
    exception it raises (e.g. :class:`~workbench.errors.Cancelled`) stops the run.
    """
    import pandas as pd

    from .analysis import storm_centre

    mod = Modification(piece, scale, shift_lon, shift_lat)
    hours = float(hours)
    if not (OUTPUT_HOURS <= hours <= MAX_HOURS) or abs(hours / OUTPUT_HOURS - round(hours / OUTPUT_HOURS)) > 1e-9:
        raise InputError(f"what-if hours: {hours:g} must be a multiple of {OUTPUT_HOURS:g} within "
                         f"{OUTPUT_HOURS:g}..{MAX_HOURS:g}.")
    ti = case.time_index(time)
    setup = model_from_case(case, ti, member, pieces, reference, step_minutes=step_minutes)
    x_exp, lat_exp = modified_state(setup, mod)
    model = setup.model
    lat, lon = model.lat, model.lon
    runs = {}
    todo = [("control", setup.x0, setup.lateral), ("experiment", x_exp, lat_exp)] if control else \
        [("experiment", x_exp, lat_exp)]
    for name, x0, lateral in todo:
        _with_lateral(model, setup.ref_phi, lateral)
        model.max_cfl = 0.0
        out = {"height_1000": [], "height_500": [], "mslp": []}

        def keep(hour, x, phi, out=out):
            for key, val in zip(out, _output_fields(model, setup.ref_phi, setup.ref_t, x, phi)):
                out[key].append(val)

        def prog(n, total, name=name, k=len(runs)):
            if progress:
                progress((k * total + n) / (len(todo) * total),
                         f"{name} +{n * OUTPUT_HOURS:.0f} h of {hours:g} h")

        from .sample import _single_thread_blas

        with _single_thread_blas():
            model.run(x0.copy(), hours, moist=moist, callback=keep, progress=prog)
        runs[name] = out
    lead = np.arange(0.0, hours + 1e-9, OUTPUT_HOURS)
    base = np.datetime64(case.times[ti], "ns")
    valid = base + (lead * 3600e9).astype("int64").astype("timedelta64[ns]")
    coords = dict(lead_time=("lead_time", lead, dict(units="hours", long_name="hours from the analysis")),
                  latitude=("latitude", lat, dict(units="degrees_north")),
                  longitude=("longitude", lon, dict(units="degrees_east")))
    data = {}
    units = {"height_1000": ("m", "1000 hPa geopotential height"), "height_500": ("m", "500 hPa geopotential height"),
             "mslp": ("hPa", "sea-level pressure")}
    for name, out in runs.items():
        for key, arr in out.items():
            data[f"{name}_{key}"] = (("lead_time", "latitude", "longitude"), np.stack(arr),
                                     dict(units=units[key][0], long_name=f"{units[key][1]} ({name}, {LABEL})"))
    maps = xr.Dataset(data, coords=coords)
    maps = maps.assign_coords(valid_time=("lead_time", valid))
    start = storm_centre(case, ti, member)
    rows = []
    tracks = {}
    for name in runs:
        ds = xr.Dataset(dict(mslp=(("time", "latitude", "longitude"), 100.0 * maps[f"{name}_mslp"].values)),
                        coords=dict(time=valid, latitude=lat, longitude=lon))
        tr = track_low(ds, start=start)
        tracks[name] = tr
        for h, r in zip(lead, tr):
            j = int(np.argmin(np.abs(lat - r["latitude"])))
            i = int(np.argmin(np.abs(lon - r["longitude"])))
            rows.append(dict(run=name, lead_time_h=h, valid_time=str(r["time"])[:16], longitude=r["longitude"],
                             latitude=r["latitude"], mslp_hpa=r["mslp_hpa"],
                             height_1000_m=float(maps[f"{name}_height_1000"].values[int(h // OUTPUT_HOURS), j, i])))
    track = pd.DataFrame(rows)
    verification = _verify(case, member, tracks.get("control"), lead, valid, start) if control else None
    attrs = dict(title=LABEL, caution=LABEL, limits=LIMITS, modification=mod.describe(),
                 analysis_time=str(case.times[ti])[:16], hours=hours, moist="yes" if moist else "no",
                 step_minutes=model.dt / 60.0, reference=str(case.resolve_reference(reference)),
                 boundary_treatment=("lateral Phi' held at the analysis; outermost-ring PV held then sponged; "
                                     "6-point sponge; lid theta held"))
    if getattr(case, "invented", False):
        attrs["invented_case"] = "yes: the case is invented, not real weather"
    summary = _summary(track, verification, mod, hours)
    return WhatIf(track=track, verification=verification, maps=maps, modification=mod, summary=summary, attrs=attrs)


def _verify(case, member, control_track, lead, valid, start):
    """Control versus the case's own analyses at the same valid times (None when there are none)."""
    import pandas as pd

    if control_track is None:
        return None
    times = np.asarray(case.times, dtype="datetime64[ns]")
    idx = [int(np.flatnonzero(times == v)[0]) for v in valid if np.any(times == v)]
    if len(idx) < 2:
        return None
    ds = case.data
    if "mslp" not in ds:
        return None
    sub = ds[["mslp"]].isel(time=idx)
    if "member" in sub.dims:
        sub = sub.isel(member=case.member_index(member) or 0)
    ana = track_low(sub.load(), start=start)
    rows = []
    by_time = {str(r["time"])[:16]: r for r in control_track}
    for a in ana:
        key = str(np.datetime64(a["time"], "ns"))[:16]
        c = by_time.get(key)
        if c is None:
            continue
        h = float((np.datetime64(a["time"], "ns") - valid[0]) / np.timedelta64(1, "h"))
        dist = float(_distance_km(c["latitude"], c["longitude"], a["latitude"], a["longitude"]))
        rows.append(dict(lead_time_h=h, valid_time=key, analysis_longitude=a["longitude"],
                         analysis_latitude=a["latitude"], analysis_mslp_hpa=a["mslp_hpa"],
                         control_mslp_hpa=c["mslp_hpa"], position_error_km=dist,
                         depth_error_hpa=c["mslp_hpa"] - a["mslp_hpa"]))
    return pd.DataFrame(rows) if rows else None


def _summary(track, verification, mod, hours):
    out = [f"{LABEL}. {LIMITS}", f"Experiment: {mod.describe()}; {hours:g} h."]
    c = track[track["run"] == "control"].set_index("lead_time_h")
    e = track[track["run"] == "experiment"].set_index("lead_time_h")
    if len(c) and len(e):
        h = e.index.max()
        dist = float(_distance_km(c.loc[h, "latitude"], c.loc[h, "longitude"], e.loc[h, "latitude"],
                                  e.loc[h, "longitude"]))
        out.append(f"At +{h:g} h the experiment's low is {e.loc[h, 'mslp_hpa']:.1f} hPa against the control's "
                   f"{c.loc[h, 'mslp_hpa']:.1f} hPa ({e.loc[h, 'mslp_hpa'] - c.loc[h, 'mslp_hpa']:+.1f} hPa), "
                   f"{dist:.0f} km from the control's centre.")
    if verification is not None and len(verification):
        v = verification
        out.append(f"Control against the case's analyses: position error up to {v['position_error_km'].max():.0f} km, "
                   f"depth error {v['depth_error_hpa'].iloc[-1]:+.1f} hPa at +{v['lead_time_h'].iloc[-1]:g} h "
                   "(trust the experiment only as far as the control follows the analyses).")
    return out


# --------------------------------------------------------------------------- command line


def _finite_number(text):
    import argparse

    try:
        value = float(text)
    except (TypeError, ValueError):
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"{text!r} is not a finite number")
    return value


def main(argv=None) -> int:
    """``pvwb whatif [CASE] --piece NAME [--scale S] [--shift DLON,DLAT] [--hours H] [--time T]
    [--moist] [-o OUT.nc [--overwrite]]``."""
    import pandas as pd

    import workbench as wb

    from . import cli
    from .analysis import default_case_path, load_pieces

    parser = cli.build_parser("pvwb whatif", f"{LABEL}: change one PV piece of the analysis (scale, remove, "
                              "shift) and run the QG model forward, with the unchanged control.")
    cli.add_case_argument(parser)
    cli.add_selection_options(parser)
    parser.add_argument("--piece", required=True, help="name of the piece to change (e.g. 'upper trough')")
    parser.add_argument("--scale", type=_finite_number, default=1.0, help="multiply the piece by this (0 removes it; default 1)")
    parser.add_argument("--shift", default=None, metavar="DLON,DLAT", help="move the piece by these degrees")
    parser.add_argument("--hours", type=cli.positive_number("--hours"), default=36.0,
                        help=f"length of the run, a multiple of 6 up to {MAX_HOURS:g} (default 36)")
    parser.add_argument("--time", default=None, help="analysis time to start from (index or ISO; default the first)")
    parser.add_argument("--member", default=None, help="ensemble member: index or label (default: the first)")
    parser.add_argument("--pieces", default=None, help="JSON file with a list of pieces (default: standard pieces)")
    parser.add_argument("--reference", default=None, help="time_mean | area_mean | zonal_mean | PATH")
    parser.add_argument("--moist", action="store_true", help="add the engine's demonstration latent heating")
    parser.add_argument("-o", "--output", default=None, help="write the run as netCDF")
    cli.add_overwrite_option(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    args = parser.parse_args(argv)
    shift = (0.0, 0.0)
    if args.shift is not None:
        try:
            shift = tuple(float(v) for v in args.shift.split(","))
            if len(shift) != 2 or not all(math.isfinite(v) for v in shift):
                raise ValueError
        except ValueError:
            raise InputError(f"--shift {args.shift!r} must be two numbers DLON,DLAT in degrees (e.g. 5,-2).") from None
    Modification(args.piece, args.scale, *shift)  # checked before the work
    if args.hours > MAX_HOURS or abs(args.hours / OUTPUT_HOURS - round(args.hours / OUTPUT_HOURS)) > 1e-9:
        raise InputError(f"--hours {args.hours:g} must be a multiple of {OUTPUT_HOURS:g} up to {MAX_HOURS:g}.")
    if args.output:
        cli.check_output(args.output, args.overwrite, suffixes=(".nc",), what="what-if file")
    pieces = load_pieces(args.pieces) if args.pieces else None
    case = wb.open_case(cli.case_source(args.case) or default_case_path(), **cli.selection_options(args))
    cli.check_pieces(case, pieces)
    member = cli.member_arg(case, args.member)
    time = cli.time_arg(case, args.time)
    bar = cli.progress(desc="whatif", unit="%", enabled=False if args.quiet else None)

    def progress(fraction, text):
        bar.total = 100
        bar.update(int(100 * fraction) - bar.n)

    try:
        res = run_whatif(case, args.piece, args.scale, shift_lon=shift[0], shift_lat=shift[1], hours=args.hours,
                         time=time, member=member, pieces=pieces, reference=args.reference, moist=args.moist,
                         progress=progress)
    finally:
        bar.close()
    print(f"{LABEL.upper()}\n{LIMITS}\n")
    print(f"{res.modification.describe()}; from {res.attrs['analysis_time']}, {args.hours:g} h\n")
    with pd.option_context("display.width", 200, "display.max_columns", 20):
        wide = res.track.pivot(index="lead_time_h", columns="run", values=["longitude", "latitude", "mslp_hpa"])
        print(wide.to_string(float_format="{:.1f}".format))
        if res.verification is not None:
            print("\ncontrol against the case's analyses:")
            print(res.verification[["lead_time_h", "valid_time", "position_error_km", "depth_error_hpa"]].to_string(
                index=False, float_format="{:.1f}".format))
    print()
    for line in res.summary[1:]:
        print(line)
    if args.output:
        res.to_netcdf(args.output, overwrite=args.overwrite)
        print(f"wrote {args.output}")
    return 0


# --------------------------------------------------------------------------- benchmarks


def bench_records(large=False, hours=36.0, log=None, full=False):
    """Time and peak memory (tracemalloc) of the tendency attribution (standard pieces) and of a
    ``hours`` what-if (control + experiment) on the sample case; with ``large`` also on an
    invented 0.5 degree grid of 26 x 121 x 201 points (attribution of 7 pieces + reference on
    random fields; the what-if model timed over 1 h of steps and scaled to ``hours``, two runs;
    with ``full`` also the two whole ``hours`` runs, measured).
    Records follow ``pvwb bench --json``: grid, shape, method, median_s, peak_mem_mb, notes."""
    import time
    import tracemalloc

    from .analysis import default_case_path
    from .io import open_case
    from .tendency import Budget, explain, target_weights, tendency_matrix

    records = []

    def measure(fn, peak_fn=None):
        """Wall time of fn() untraced, then tracemalloc peak of peak_fn() (default fn) (MB)."""
        t = time.perf_counter()
        out = fn()
        el = time.perf_counter() - t
        tracemalloc.start()
        (peak_fn or fn)()
        peak = tracemalloc.get_traced_memory()[1] / 2 ** 20
        tracemalloc.stop()
        return out, el, peak

    def rec(grid, shape, method, seconds, peak, notes=""):
        r = dict(grid=grid, shape=list(shape), method=method, median_s=seconds, ratio_to_fft=float("nan"),
                 max_rel_error=None, peak_mem_mb=peak, mem_ratio=peak / (np.prod(shape) * 8 / 2 ** 20), notes=notes)
        records.append(r)
        if log:
            log(r)

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"latitude: \|f\| varies")
        case = open_case(default_case_path())
        shape = (case.levels_hpa.size, case.data.sizes["latitude"], case.data.sizes["longitude"])
        deepest = int(np.argmin(case.data["mslp"].min(("latitude", "longitude")).values))

        def fresh():
            case.clear_cache()
            return explain(case, deepest)

        ex, el, peak = measure(fresh)
        rec("sample", shape, "explain", el, peak, f"{len(ex.budget.names)} pieces incl. reference, inversion included")
        _, el2, peak2 = measure(lambda: explain(case, deepest))
        rec("sample", shape, "explain_cached", el2, peak2, "inversion from the case cache")
        _, el, peak = measure(lambda: run_whatif(case, "upper trough", 0.5, hours=hours),
                              lambda: run_whatif(case, "upper trough", 0.5, hours=6.0))
        rec("sample", shape, f"whatif_{hours:g}h", el, peak, "control + experiment, dry; peak of a 6 h run")
        if large:
            from .bench import make_grid

            grid = make_grid((26, 121, 201))
            rng = np.random.default_rng(1)
            nz, ny, nx = grid.shape
            n = 8
            geom = Geometry.of_grid(grid)
            psi = rng.standard_normal((n, nz, ny, nx)) * 1e6
            pv = rng.standard_normal((n, nz + 2, ny, nx)) * 1e-5
            budget = Budget(names=[f"p{i}" for i in range(n)], psi=psi, pv=pv, grid=grid, geom=geom)
            w = target_weights(grid.lat, grid.lon, grid.pressure, (-10.0, 55.0, 950.0))
            _, el, peak = measure(lambda: tendency_matrix(budget, w))
            rec("0.5deg", grid.shape, "tendency_matrix", el, peak, "8 x 8 entries + total, invented fields")
            del psi, pv, budget
            width = np.deg2rad(8.0)  # an invented jet: u = U sech^2((lat - 50 N) / 8 deg)
            lat = np.tanh(np.deg2rad(grid.lat - 50.0) / width) * width
            phibar = (-grid.f0 * EARTH_RADIUS * 30.0 * np.linspace(0.2, 1.0, nz)[:, None] * lat[None, :])[:, :, None]
            xbar = np.zeros((nz + 2, ny, 1))
            model = QGModel(grid, phibar, xbar, step_minutes=7.5)
            x = np.zeros((nz + 2, ny, nx))
            x[:nz] = 1e-5 * np.exp(-((np.arange(ny)[:, None] - ny / 2) ** 2 + (np.arange(nx)[None, :] - nx / 2) ** 2)
                                   / 200.0)[None]
            _, el, peak = measure(lambda: model.run(x, 1.0, output_hours=1.0),
                                  lambda: model.run(x, 0.25, output_hours=0.25))
            rec("0.5deg", grid.shape, f"whatif_{hours:g}h_est", el * hours * 2, peak,
                f"1 h of 7.5 min steps ({el:.2f} s) x {hours:g} x 2 runs")
            if full:
                t = time.perf_counter()
                for _ in range(2):  # control and experiment
                    model.run(x, hours, output_hours=6.0)
                rec("0.5deg", grid.shape, f"whatif_{hours:g}h", time.perf_counter() - t, peak,
                    f"2 runs of {hours:g} h, 7.5 min steps, measured (peak: of the 1 h run)")
    return records
