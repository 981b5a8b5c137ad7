"""QG tendency attribution: which piece's wind, acting on which piece's PV, changes the heights.

Computation only (no plotting, no widgets).

In quasi-geostrophic (QG) dynamics without heating or friction the QG PV of the interior and
the potential temperature of the lower and upper boundaries are carried by the geostrophic
wind:

* interior:  dq/dt = -v_g . grad q = -J(psi, q),   psi = Phi / f0,
* boundaries: dtheta/dt = -v_g . grad theta = -J(psi, theta)   (bottom and top level).

Inverting these tendencies with the same operator as the piecewise inversion (lateral
boundary held: dPhi/dt = 0 there) gives the geopotential tendency dPhi/dt and the height
tendency dZ/dt = (dPhi/dt) / g. Split the flow into pieces, the reference state (basic state)
being one of them: psi = sum_i psi_i, q = sum_j q_j, theta = sum_j theta_j. The Jacobian is
bilinear and the inversion linear, so

    dZ/dt = sum_i sum_j  Inv[-J(psi_i, q_j), -J(psi_i, theta_j)] / g

exactly: entry (i, j) of the attribution matrix is the height tendency that the balanced wind
of piece i makes by carrying the PV (and boundary theta) of piece j. The reference's PV holds
the planetary vorticity f (so beta) and the reference's own PV gradient; its wind is the
geostrophic wind of the reference geopotential. With every piece (the reference included) on
both sides, the entries add up to the total QG height tendency to round-off.

Discretisation (shared with the what-if model, :mod:`workbench.whatif`, and the sample storm's
model, :mod:`workbench.sample`): Arakawa's (1966) Jacobian on the longitude-latitude grid
(:func:`workbench.sample.arakawa_jacobian`, regular latitude spacing required) at the
horizontally interior nodes; the QG PV on the lateral boundary nodes, where the operator is
not defined, is copied from the neighbouring interior node (:func:`fill_ring`) for the
reference and for every piece alike (a linear rule, so the closure stays exact). The
tendency is zero on the lateral boundary nodes and inverted with the cached fast solver
(:func:`workbench.inversion.solver.get_solver`) with zero lateral data.

Entry points: :func:`explain` -> :class:`Explanation` (``.matrix`` DataFrame in m per 6 h,
``.summary`` sentences, ``.map(row, col)`` tendency maps); :func:`main` is ``pvwb explain``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from .errors import GridError, InputError
from .units import EARTH_RADIUS, G, KAPPA, P0, coriolis

__all__ = ["SECONDS_6H", "REFERENCE", "Geometry", "fill_ring", "advective_tendency", "target_weights",
           "interpolate", "Budget", "case_budget", "Explanation", "explain", "tendency_matrix", "main"]

#: Six hours in seconds: the matrix is in m per 6 h.
SECONDS_6H = 21600.0
#: Name of the reference state's row and column.
REFERENCE = "reference state"
#: Plain-language label of what every product of this module is.
LABEL = ("QG height-tendency attribution (dry, adiabatic, frictionless QG advection of the analysed PV "
         "and boundary theta); a diagnosis of the analysis, not a forecast.")


# --------------------------------------------------------------------------- numerics


class Geometry:
    """Metric of the Jacobian on a longitude-latitude grid (regular spacing in both directions).

    ``factor`` (ny-2, 1) turns the index-space Arakawa Jacobian into J(a, b) =
    (a_lambda b_phi - a_phi b_lambda) / (a^2 cos(phi)). A zonally periodic grid (360 degrees)
    wraps in longitude; otherwise the first and last columns are lateral boundary nodes.
    """

    def __init__(self, lat, lon, periodic=None):
        lat = np.asarray(lat, dtype=float)
        lon = np.asarray(lon, dtype=float)
        if lat.size < 3 or lon.size < 3:
            raise GridError("tendency: the grid needs at least 3 latitudes and 3 longitudes.")
        dlat, dlon = np.diff(lat), np.diff(lon)
        for name, d in (("latitude", dlat), ("longitude", dlon)):
            if np.any(d <= 0) or np.ptp(d) > 1e-6 * abs(d.mean()):
                raise GridError(
                    f"tendency: the {name} spacing must be regular (from {d.min():g} to {d.max():g} degrees); "
                    "regrid the case to a regular grid (the QG advection uses Arakawa's Jacobian on it).")
        self.lat, self.lon = lat, lon
        self.dphi = math.radians(float(dlat.mean()))
        self.dlam = math.radians(float(dlon.mean()))
        self.periodic = (abs(lon[-1] + dlon.mean() - lon[0] - 360.0) < 1e-6) if periodic is None else bool(periodic)
        cos = np.cos(np.deg2rad(lat[1:-1]))
        self.factor = (1.0 / (self.dlam * self.dphi * EARTH_RADIUS ** 2 * cos))[:, None]

    @classmethod
    def of_grid(cls, grid):
        return cls(grid.lat, grid.lon, grid.periodic)


def fill_ring(q, periodic=False):
    """Copy the first interior row/column onto the lateral boundary nodes of ``q`` (..., ny, nx).

    The QG PV operator is not defined on the lateral boundary nodes; the advection reads them
    as neighbours. The rule is linear, so it can be applied to pieces and sums alike. Returns a
    new array.
    """
    out = np.array(q, dtype=float, copy=True)
    if not periodic:
        out[..., :, 0] = out[..., :, 1]
        out[..., :, -1] = out[..., :, -2]
    out[..., 0, :] = out[..., 1, :]
    out[..., -1, :] = out[..., -2, :]
    return out


def advective_tendency(psi, field, geom: Geometry):
    """-J(psi, field) = -v_g . grad(field) on the whole grid, zero on the lateral boundary nodes.

    ``psi`` and ``field`` broadcast over leading dims (..., ny, nx); Arakawa's Jacobian
    (:func:`workbench.sample.arakawa_jacobian`), wrapped in longitude on a periodic grid.
    """
    from .sample import arakawa_jacobian

    psi = np.asarray(psi, dtype=float)
    field_ = np.asarray(field, dtype=float)
    shape = np.broadcast_shapes(psi.shape, field_.shape)
    out = np.zeros(shape)
    if geom.periodic:
        pad = [(0, 0)] * (psi.ndim - 1) + [(1, 1)]
        padq = [(0, 0)] * (field_.ndim - 1) + [(1, 1)]
        jac = arakawa_jacobian(np.pad(psi, pad, mode="wrap"), np.pad(field_, padq, mode="wrap"))
        out[..., 1:-1, :] = -jac * geom.factor
    else:
        out[..., 1:-1, 1:-1] = -arakawa_jacobian(psi, field_) * geom.factor
    return out


def target_weights(lat, lon, pressure_pa, target):
    """Interpolation weights at ``target`` = (lon, lat, hPa): bilinear in longitude/latitude and
    linear in pressure (as :func:`workbench.inversion.pieces.attribution`). Returns
    ``(k, j, i, w)`` index arrays and weights (8 corners)."""
    lon0, lat0, p_hpa = (float(x) for x in target)
    p = np.asarray(pressure_pa, dtype=float)
    out = []
    for coord, x in ((p, p_hpa * 100.0), (np.asarray(lat, float), lat0), (np.asarray(lon, float), lon0)):
        c = coord if coord[0] < coord[-1] else coord[::-1]
        if not (c[0] - 1e-9 <= x <= c[-1] + 1e-9):
            raise InputError(f"tendency: target {target} lies outside the grid ({c[0]:g}..{c[-1]:g}); pick a "
                             "point inside the domain and the levels.")
        m = int(np.clip(np.searchsorted(c, x) - 1, 0, c.size - 2))
        t = (x - c[m]) / (c[m + 1] - c[m])
        idx = (m, m + 1) if coord[0] < coord[-1] else (coord.size - 1 - m, coord.size - 2 - m)
        out.append((idx, (1.0 - t, t)))
    ks, js, is_, ws = [], [], [], []
    for a in range(2):
        for b in range(2):
            for c in range(2):
                ks.append(out[0][0][a])
                js.append(out[1][0][b])
                is_.append(out[2][0][c])
                ws.append(out[0][1][a] * out[1][1][b] * out[2][1][c])
    return np.array(ks), np.array(js), np.array(is_), np.array(ws)


def interpolate(field, weights):
    """Value of ``field`` (..., nz, ny, nx) at the target of :func:`target_weights`."""
    k, j, i, w = weights
    return np.tensordot(np.asarray(field)[..., k, j, i], w, axes=([-1], [0]))


# --------------------------------------------------------------------------- the budget of a case


@dataclass
class Budget:
    """Streamfunction and advected PV of every piece (the reference first) on one grid.

    ``psi`` (n, nz, ny, nx) = Phi/f0; ``pv`` (n, nz+2, ny, nx): interior QG PV on the levels
    (lateral nodes filled by :func:`fill_ring`), then theta on the bottom and the top level.
    ``lateral`` (nz, ny, nx): the data's Phi' on the lateral boundary (held by the model).
    """

    names: list
    psi: np.ndarray
    pv: np.ndarray
    grid: object
    geom: Geometry
    reference: xr.Dataset | None = None
    lateral: np.ndarray | None = None
    anomaly_state: np.ndarray | None = None
    forcings: dict = field(default_factory=dict)

    @property
    def nz(self):
        return self.grid.shape[0]

    def tendency(self, psi, pv, top=True):
        """(dq/dt, dtheta_b/dt, dtheta_t/dt) stacked as (..., nz+2, ny, nx) for the given psi and pv."""
        nz = self.nz
        psi_stack = np.concatenate([psi, psi[..., :1, :, :], psi[..., -1:, :, :]], axis=-3)
        tend = advective_tendency(psi_stack, pv, self.geom)
        if not top:
            tend[..., nz + 1, :, :] = 0.0
        return tend

    def invert(self, tend):
        """Geopotential tendency (m2 s-3) of a stacked tendency, lateral boundary held."""
        from .inversion.solver import get_solver

        nz = self.nz
        return get_solver(self.grid).solve(tend[..., :nz, :, :], bottom_theta=tend[..., nz, :, :],
                                           top_theta=tend[..., nz + 1, :, :])


def reference_background(grid, ref_geopotential, ref_temperature):
    """(psi, pv) of a reference state: psi = Phi/f0; pv = f + L(Phi) on the levels (lateral nodes
    filled), then theta on the bottom and top levels (K)."""
    from .inversion.operator import apply_qg_operator

    phi = np.asarray(ref_geopotential, dtype=float)
    exner = (grid.pressure / P0) ** KAPPA
    theta = np.asarray(ref_temperature, dtype=float) / exner[:, None, None]
    q = apply_qg_operator(grid, phi, theta[0], theta[-1]) + coriolis(grid.lat)[None, :, None]
    q = fill_ring(np.nan_to_num(q), grid.periodic)
    pv = np.concatenate([q, theta[:1], theta[-1:]], axis=0)
    return phi / grid.f0, pv


def case_budget(case, time=None, member=None, pieces=None, reference=None, results=None) -> Budget:
    """The :class:`Budget` of ``case`` at one time: the reference state, then every piece of
    ``pieces`` (default :func:`workbench.analysis.standard_pieces`) and the remainder.

    The winds come from ``case.inversion`` (each piece's balanced geopotential), the PV from
    the same first-claim-wins split of the anomaly (:class:`workbench.inversion.pieces.Claims`).
    """
    from .analysis import cyclonic_sign, standard_pieces
    from .inversion.pieces import Claims, Piece

    reference = case.resolve_reference(reference)
    if pieces is None:
        pieces = standard_pieces(moist=case.relative_humidity(time, member) is not None,
                                 hemisphere=cyclonic_sign(case))
    plist = [p if isinstance(p, Piece) else Piece.from_dict(p) for p in pieces]
    anomaly = case.anomaly(time, member, reference)
    if results is None:
        results = case.inversion(plist, time, member, reference)
    from .inversion.fields import grid_for, spatial_dims

    qda = spatial_dims(anomaly["qgpv_anomaly"], "qgpv_anomaly")
    grid = grid_for(qda, anomaly["static_stability"], anomaly.attrs.get("f0"))
    geom = Geometry.of_grid(grid)
    ref = case.reference(reference)
    rpsi, rpv = reference_background(grid, ref["geopotential"].transpose("pressure", "latitude", "longitude").values,
                                     ref["temperature"].transpose("pressure", "latitude", "longitude").values)
    claims = Claims(anomaly)
    rems = [p for p in plist if p.kind == "remainder"]
    remainder_name = rems[0].name if rems else "remainder"
    nz = grid.shape[0]
    zero2 = np.zeros(grid.shape[1:])
    forcings = {}
    for pc in plist:
        if pc.kind != "remainder":
            forcings[pc.name] = claims.take(pc)
    forcings[remainder_name] = claims.remainder()
    names = [REFERENCE] + list(forcings)
    psi = [rpsi]
    pv = [rpv]
    for name, f in forcings.items():
        if name not in results:
            raise InputError(f"tendency: the inversion has no piece {name!r}; pass the results of these pieces.")
        phi = spatial_dims(results[name]["geopotential_anomaly"], "geopotential_anomaly").values
        psi.append(np.asarray(phi, dtype=float) / grid.f0)
        q = np.zeros(grid.shape) if f["q"] is None else fill_ring(f["q"], grid.periodic)
        bt = zero2 if f["bottom_theta"] is None else f["bottom_theta"]
        tt = zero2 if f["top_theta"] is None else f["top_theta"]
        pv.append(np.concatenate([q, bt[None], tt[None]], axis=0))
    total_state = np.concatenate([fill_ring(claims.q, grid.periodic), claims.bt[None], claims.tt[None]], axis=0)
    return Budget(names=names, psi=np.stack(psi), pv=np.stack(pv), grid=grid, geom=geom, reference=ref,
                  lateral=claims.lat, anomaly_state=total_state, forcings=forcings)


# --------------------------------------------------------------------------- the attribution


def tendency_matrix(budget: Budget, weights, top=True):
    """(matrix (n, n) in m per 6 h at the target, total in m per 6 h): entry [i, j] is the wind of
    piece i carrying the PV/theta of piece j; the total is computed separately (full psi, full PV)."""
    n = len(budget.names)
    mat = np.zeros((n, n))
    scale = SECONDS_6H / G
    for i in range(n):  # one batched solve per row keeps memory at ~2 n fields
        tend = budget.tendency(budget.psi[i], budget.pv, top)
        mat[i] = interpolate(budget.invert(tend), weights) * scale
    tend = budget.tendency(budget.psi.sum(axis=0), budget.pv.sum(axis=0), top)
    total = float(interpolate(budget.invert(tend), weights) * scale)
    return mat, total


@dataclass
class Explanation:
    """The tendency attribution at one time (see :func:`explain`)."""

    matrix: object  # pandas.DataFrame, rows: wind of piece i; columns: PV/theta of piece j (m per 6 h)
    total: float
    target: tuple
    time: str
    budget: Budget
    summary: list
    top: bool = True
    notes: list = field(default_factory=list)

    @property
    def closure_error(self) -> float:
        """|sum of the matrix - separately computed total| (m per 6 h)."""
        return abs(float(self.matrix.values.sum()) - self.total)

    def _select(self, which, axis_names):
        names = self.budget.names
        if which is None:
            return list(range(len(names)))
        items = [which] if isinstance(which, (str, int)) else list(which)
        out = []
        for it in items:
            if isinstance(it, int) and 0 <= it < len(names):
                out.append(it)
            elif it in names:
                out.append(names.index(it))
            else:
                raise InputError(f"tendency map: {axis_names} {it!r} is not one of: {', '.join(names)}.")
        return out

    def map(self, row=None, col=None, level_hpa=None) -> xr.DataArray:
        """Height tendency (m per 6 h) of the wind of ``row`` carrying the PV of ``col``.

        ``row``/``col``: a piece name (or index, or list of them); None = all pieces (so
        ``map(row="upper trough")`` is the whole row, ``map()`` the total). ``level_hpa``: one
        pressure level (nearest), else every level. Zero on the lateral boundary nodes (held)."""
        rows = self._select(row, "row")
        cols = self._select(col, "column")
        b = self.budget
        tend = b.tendency(b.psi[rows].sum(axis=0), b.pv[cols].sum(axis=0), self.top)
        dz = b.invert(tend) * SECONDS_6H / G
        g = b.grid
        da = xr.DataArray(dz, dims=("pressure", "latitude", "longitude"),
                          coords=dict(pressure=("pressure", g.pressure, dict(units="Pa")),
                                      latitude=("latitude", g.lat, dict(units="degrees_north")),
                                      longitude=("longitude", g.lon, dict(units="degrees_east"))),
                          name="height_tendency",
                          attrs=dict(units="m (6 h)-1", long_name="QG geopotential height tendency",
                                     wind_of=", ".join(b.names[i] for i in rows),
                                     carrying=", ".join(b.names[j] for j in cols), caution=LABEL))
        if level_hpa is not None:
            da = da.sel(pressure=float(level_hpa) * 100.0, method="nearest")
        return da


def _describe(value):
    return f"{value:+.0f} m per 6 h" if abs(value) >= 1 else f"{value:+.2f} m per 6 h"


def summarise(matrix, total, target, top=True, n_terms=3):
    """Plain-language sentences about the largest entries, rows and columns."""
    lon, lat, p = target
    trend = "falling (the low deepens)" if total < 0 else "rising (the low fills)"
    from .views.styles import lat_label, lon_label

    out = [f"QG height tendency at {lon_label(lon)}, {lat_label(lat)}, {p:g} hPa: {_describe(total)}, heights {trend}."]
    vals = matrix.values
    order = np.argsort(-np.abs(vals), axis=None)[:n_terms]
    for flat in order:
        i, j = np.unravel_index(flat, vals.shape)
        v = vals[i, j]
        what = "its own PV" if i == j else f"the PV of the {matrix.columns[j]}"
        effect = "lowers" if v < 0 else "raises"
        out.append(f"The wind of the {matrix.index[i]} carrying {what} {effect} heights by "
                   f"{abs(v):.0f} m per 6 h.")
    rows = matrix.sum(axis=1)
    cols = matrix.sum(axis=0)
    ri, cj = int(np.argmax(np.abs(rows.values))), int(np.argmax(np.abs(cols.values)))
    out.append(f"Largest wind: the {rows.index[ri]} ({_describe(rows.iloc[ri])} summed over all it carries); "
               f"most-carried PV: the {cols.index[cj]} ({_describe(cols.iloc[cj])} summed over all winds).")
    if not top:
        out.append("The lid's theta is held (not advected), as in the what-if model.")
    return out


def explain(case, time=None, pieces=None, target=None, *, member=None, reference=None, top=True):
    """Tendency attribution at ``time``: which piece's wind, carrying which piece's PV, changes
    the heights at ``target``.

    Parameters
    ----------
    case : workbench.Case
    time : index or ISO time (default the case's first)
    pieces : list of Piece (default :func:`workbench.analysis.standard_pieces`)
    target : (lon, lat, hPa); default the storm centre at the second level (as
        :func:`workbench.analysis.analyse`; a target below the ground is moved up)
    reference : the reference state (default the case's); it is the first row/column
    top : advect the lid's theta too (default); False holds it, as the what-if model does

    Returns
    -------
    :class:`Explanation`: ``.matrix`` (DataFrame, rows "wind of", columns "PV of", m per 6 h,
    ``attrs`` with units, target, time, total, closure), ``.total`` (the separately computed QG
    height tendency; ``.closure_error`` is |sum - total|), ``.summary`` (sentences), ``.map()``.
    """
    import pandas as pd

    from .analysis import analyse

    ti = case.time_index(time)
    results, table, target_used = analyse(case, ti, member, pieces, target, reference)
    budget = case_budget(case, ti, member, pieces, reference, results=results)
    weights = target_weights(budget.grid.lat, budget.grid.lon, budget.grid.pressure, target_used)
    mat, total = tendency_matrix(budget, weights, top)
    df = pd.DataFrame(mat, index=pd.Index(budget.names, name="wind of"),
                      columns=pd.Index(budget.names, name="PV of"))
    label = str(case.times[ti])[:16]
    notes = list(table.attrs.get("notes", []))
    df.attrs.update(units="m (6 h)-1", target=target_used, time=label, total=total,
                    closure=abs(float(mat.sum()) - total), caution=LABEL,
                    reference=table.attrs.get("reference"), notes=notes)
    return Explanation(matrix=df, total=total, target=target_used, time=label, budget=budget,
                       summary=summarise(df, total, target_used, top), top=top, notes=notes)


# --------------------------------------------------------------------------- command line


def main(argv=None) -> int:
    """``pvwb explain [CASE] [--time T] [--member M] [--target LON,LAT,HPA] [--pieces FILE]
    [--reference R] [--hold-lid] [-o CSV [--overwrite]]``."""
    import pandas as pd

    import workbench as wb

    from . import cli
    from .analysis import _parse_target, default_case_path, load_pieces

    parser = cli.build_parser("pvwb explain", "QG tendency attribution: which piece's wind, carrying which "
                              "piece's PV, is changing the heights at the target (m per 6 h).")
    cli.add_case_argument(parser)
    cli.add_selection_options(parser)
    parser.add_argument("--time", default=None, help="time index or ISO time (default: the first)")
    parser.add_argument("--member", default=None, help="ensemble member: index or label (default: the first)")
    parser.add_argument("--target", default=None, help="lon,lat,pressure_hPa (default: storm centre, 2nd level)")
    parser.add_argument("--pieces", default=None, help="JSON file with a list of pieces (default: standard pieces)")
    parser.add_argument("--reference", default=None, help="time_mean | area_mean | zonal_mean | PATH")
    parser.add_argument("--hold-lid", action="store_true", help="do not advect the lid's theta")
    parser.add_argument("-o", "--output", default=None, help="write the matrix as CSV")
    cli.add_overwrite_option(parser)
    args = parser.parse_args(argv)
    target = _parse_target(args.target)
    if args.output:
        cli.check_output(args.output, args.overwrite, suffixes=(".csv",), what="matrix")
    pieces = load_pieces(args.pieces) if args.pieces else None
    case = wb.open_case(cli.case_source(args.case) or default_case_path(), **cli.selection_options(args))
    cli.check_target(case, target)
    cli.check_pieces(case, pieces)
    member = cli.member_arg(case, args.member)
    time = cli.time_arg(case, args.time)
    ex = explain(case, time, pieces, target, member=member, reference=args.reference, top=not args.hold_lid)
    print(f"{LABEL}\n")
    from .views.styles import lat_label, lon_label

    print(f"{ex.time}  target {lon_label(ex.target[0])}, {lat_label(ex.target[1])}, {ex.target[2]:g} hPa; "
          f"reference {str(ex.matrix.attrs.get('reference')).replace('_', ' ')}")
    for note in ex.notes:
        print(f"note: {note}")
    print("height tendency (m per 6 h); rows: the wind of; columns: the PV/theta of")
    with pd.option_context("display.width", 200, "display.max_columns", 20):
        print(ex.matrix.to_string(float_format="{:+.1f}".format))
    print(f"sum of entries {ex.matrix.values.sum():+.2f}, QG tendency of the full inversion {ex.total:+.2f} "
          f"(closure {ex.closure_error:.1e})\n")
    for line in ex.summary:
        print(line)
    if args.output:
        from .export import atomic_target, csv_text

        with atomic_target(args.output, overwrite=args.overwrite, what="matrix") as tmp:
            tmp.write_text(csv_text(ex.matrix))
        print(f"wrote {args.output}")
    return 0
