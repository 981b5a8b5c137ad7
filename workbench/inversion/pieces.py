"""Piecewise QG inversion: pieces, their masks and forcings, inversion, attribution.

QG inversion is linear, so the QG PV anomaly and the boundary data can be
split into pieces whose balanced flows add up exactly to the full inversion
(piecewise inversion; Davis & Emanuel 1991, Mon. Wea. Rev. 119, 1929-1953).

A :class:`Piece` claims part of the forcing of an *anomaly dataset* (from
``Case.anomaly``; see DEVELOPERS.md):

* ``interior``: q' inside a 3-D mask = lon/lat polygon x layer (pressure in
  hPa or theta in K) x sign/threshold on the Ertel PV anomaly (PVU) x
  optional relative-humidity floor (a "moist" piece);
* ``bottom`` / ``top``: the theta' on the lowest / highest level (a PV
  sheet), inside the polygon and with the sign (+1 warm, -1 cold, 0 both);
* ``lateral``: the Dirichlet data phi' on the lateral boundary;
* ``remainder``: everything no other piece claims.

Rules (documented for users): pieces claim in list order and the first claim
wins where interior (or boundary) pieces overlap; the remainder receives the
interior q' outside all interior pieces, the boundary theta' outside all
bottom/top pieces and the lateral data if no lateral piece exists.  It is
always computed (under the name of the remainder piece if the list has one,
else ``"remainder"``), so the pieces always add up to the full inversion.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import xarray as xr

from workbench.errors import InputError, PieceError
from workbench.inversion.fields import balanced_fields, grid_for, spatial_dims
from workbench.inversion.solver import get_solver

__all__ = [
    "Piece",
    "KINDS",
    "piece_mask",
    "piece_forcing",
    "invert_pieces",
    "attribution",
    "polygon_mask",
    "Claims",
    "SHARE_FLOORS",
    "SHARE_RELATIVE_FLOOR",
    "format_share",
]

#: A share is not given (NaN) when |full-inversion value| is below this absolute floor ...
SHARE_FLOORS = {"height_anomaly": 1.0, "relative_vorticity": 1e-6}  # m, s-1
#: ... or below this fraction of the largest piece's magnitude (the pieces cancel).
SHARE_RELATIVE_FLOOR = 0.05
#: What tables show for a share that is not given.
NO_SHARE = "\u2014"


def format_share(value, fmt=".1f") -> str:
    """A share (%) for a table: formatted with ``fmt``, or an em dash when it is not given (NaN)."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return NO_SHARE
    if not math.isfinite(v):
        return NO_SHARE
    text = format(v, fmt)
    # a share that rounds to zero is written without a sign ("-0.0" reads as a negative share)
    return text.lstrip("-") if float(text) == 0.0 else text

KINDS = ("interior", "bottom", "top", "lateral", "remainder")
FOLLOW_MODES = ("fixed", "anomaly")
LAYER_COORDS = ("pressure", "theta")


@dataclass
class Piece:
    """One piece of a piecewise inversion (plain data; see the module docstring).

    Attributes
    ----------
    name : str
    kind : "interior", "bottom", "top", "lateral" or "remainder"
    polygon : list of (lon, lat) in degrees, or None for the whole domain
    layer : (lo, hi) or None for all levels; hPa if ``layer_coord`` is
        "pressure", K if "theta" (order of lo/hi does not matter)
    layer_coord : "pressure" or "theta"
    sign : +1 (positive anomalies), -1 (negative), 0 (both): the sign of the Ertel PV
        anomaly (interior) or of theta' (bottom/top, +1 warm) in the data, whatever the
        hemisphere. Cyclonic (trough) PV anomalies are positive in the northern hemisphere and
        negative in the southern, so an upper-trough piece there has sign -1
        (``workbench.analysis.cyclonic_sign``); a warm surface anomaly is cyclonic in both.
    threshold : PVU, minimum |Ertel PV anomaly| of the sign (interior only; a bottom/top piece
        that follows its anomaly reads it as K of |theta'| for the tracking only)
    rh_min : % or None; a moist piece keeps points with RH >= rh_min
        (70-90 % is common practice)
    visible : bool (views only; invisible pieces still count in the sum)
    colour : str or None
    follow : "fixed" (the outline stays in place at every time) or "anomaly" (at other times
        the outline follows the connected region of the piece's anomaly; interior, bottom and
        top pieces with a polygon; :mod:`workbench.tracking`)
    follow_from : ISO valid time at which the outline was drawn (tracking starts there), or
        None (the caller's time)
    """

    name: str
    kind: str = "interior"
    polygon: list | None = None
    layer: tuple | None = None
    layer_coord: str = "pressure"
    sign: int = 1
    threshold: float = 0.0
    rh_min: float | None = None
    visible: bool = True
    colour: str | None = None
    follow: str = "fixed"
    follow_from: str | None = None

    def __post_init__(self):
        self.validate()

    def validate(self):
        """Check and normalise the fields; raise PieceError naming the field and the fix."""
        if not isinstance(self.name, str) or not self.name.strip():
            raise PieceError("piece name: give a non-empty text name.")
        who = f"piece {self.name!r}"
        if self.name == "total":
            raise PieceError(f"{who}: the name 'total' is reserved for the full inversion; choose another name.")
        if self.kind not in KINDS:
            raise PieceError(f"{who}: kind {self.kind!r} is unknown; use one of {', '.join(KINDS)}.")
        if self.polygon is not None:
            try:
                poly = [(float(x), float(y)) for x, y in self.polygon]
            except (TypeError, ValueError):
                raise PieceError(f"{who}: polygon must be a list of (lon, lat) pairs in degrees.") from None
            if len(poly) < 3:
                raise PieceError(f"{who}: polygon needs at least 3 vertices, got {len(poly)}; draw a closed area.")
            if not all(math.isfinite(x) and math.isfinite(y) for x, y in poly):
                raise PieceError(f"{who}: polygon has non-finite vertices.")
            if any(abs(y) > 90 for _, y in poly):
                raise PieceError(f"{who}: polygon latitudes must be within -90..90 degrees.")
            arr = np.array(poly)
            area = 0.5 * np.sum(arr[:, 0] * np.roll(arr[:, 1], -1) - np.roll(arr[:, 0], -1) * arr[:, 1])
            if abs(area) == 0.0:
                raise PieceError(f"{who}: polygon encloses no area; draw at least three distinct points.")
            self.polygon = poly
        if self.layer is not None:
            try:
                lo, hi = (float(v) for v in self.layer)
            except (TypeError, ValueError):
                raise PieceError(f"{who}: layer must be a pair (lo, hi) or None.") from None
            if not (math.isfinite(lo) and math.isfinite(hi)) or lo == hi:
                raise PieceError(f"{who}: layer {self.layer!r} must be two different finite values.")
            self.layer = (min(lo, hi), max(lo, hi))
        if self.layer_coord not in LAYER_COORDS:
            raise PieceError(f"{who}: layer_coord {self.layer_coord!r} must be 'pressure' (hPa) or 'theta' (K).")
        if self.layer is not None and self.layer_coord == "pressure" and self.layer[0] <= 0:
            raise PieceError(f"{who}: a pressure layer is in hPa and must be positive, got {self.layer}.")
        if self.sign not in (-1, 0, 1):
            raise PieceError(f"{who}: sign must be +1 (positive anomalies), -1 (negative) or 0 (both).")
        self.sign = int(self.sign)
        try:
            self.threshold = float(self.threshold)
        except (TypeError, ValueError):
            raise PieceError(f"{who}: threshold must be a number of PVU.") from None
        if not math.isfinite(self.threshold) or self.threshold < 0:
            raise PieceError(f"{who}: threshold must be >= 0 PVU (it applies to |PV anomaly| of the sign).")
        if self.rh_min is not None:
            try:
                self.rh_min = float(self.rh_min)
            except (TypeError, ValueError):
                raise PieceError(f"{who}: rh_min must be a percentage or None.") from None
            if not 0.0 <= self.rh_min <= 100.0:
                raise PieceError(f"{who}: rh_min must lie between 0 and 100 %.")
        self.visible = bool(self.visible)
        if self.colour is not None and not isinstance(self.colour, str):
            raise PieceError(f"{who}: colour must be a text colour (e.g. '#cc3311') or None.")
        if self.follow not in FOLLOW_MODES:
            raise PieceError(f"{who}: follow {self.follow!r} must be 'fixed' (outline in place) or 'anomaly' "
                             "(outline follows the anomaly).")
        if self.follow == "anomaly":
            if self.kind not in ("interior", "bottom", "top"):
                raise PieceError(f"{who}: a {self.kind} piece cannot follow an anomaly; only interior, bottom "
                                 "and top pieces can (set follow='fixed').")
            if self.polygon is None:
                raise PieceError(f"{who}: a piece that follows its anomaly needs an outline (polygon) at its "
                                 "start time; draw one or set follow='fixed'.")
        if self.follow_from is not None:
            try:
                np.datetime64(str(self.follow_from), "s")
            except (TypeError, ValueError):
                raise PieceError(f"{who}: follow_from {self.follow_from!r} must be an ISO valid time "
                                 "(e.g. 2051-02-09T12:00) or None.") from None
            if not isinstance(self.follow_from, str):
                self.follow_from = str(np.datetime64(self.follow_from, "s"))

    def to_dict(self) -> dict:
        """Plain JSON types (lists, floats, str, bool, None)."""
        d = asdict(self)
        d["polygon"] = None if self.polygon is None else [[x, y] for x, y in self.polygon]
        d["layer"] = None if self.layer is None else [self.layer[0], self.layer[1]]
        return d

    @classmethod
    def from_dict(cls, d) -> "Piece":
        """Build from :meth:`to_dict` output; raises PieceError on bad content."""
        if not isinstance(d, dict):
            raise PieceError("piece: expected a mapping of piece fields.")
        known = set(cls.__dataclass_fields__)
        unknown = set(d) - known
        if unknown:
            raise PieceError(f"piece {d.get('name')!r}: unknown field(s) {', '.join(sorted(unknown))}.")
        if "name" not in d:
            raise PieceError("piece: the field 'name' is required.")
        try:
            return cls(**d)
        except TypeError as exc:
            raise PieceError(f"piece {d.get('name')!r}: {exc}") from None


# ---------------------------------------------------------------------------
# masks
# ---------------------------------------------------------------------------


def _ray_cast(px, py, poly):
    """Even-odd rule: True where (px, py) lies inside the polygon (arrays broadcast)."""
    inside = np.zeros(np.broadcast(px, py).shape, dtype=bool)
    n = len(poly)
    for k in range(n):
        x1, y1 = poly[k]
        x2, y2 = poly[(k + 1) % n]
        if y1 == y2:
            continue
        crosses = (y1 > py) != (y2 > py)
        xint = x1 + (py - y1) * (x2 - x1) / (y2 - y1)
        inside ^= crosses & (px < xint)
    return inside


def polygon_mask(polygon, lon, lat):
    """Bool array (lat, lon): grid points inside the (lon, lat) polygon, even-odd rule.

    Longitudes are compared modulo 360 (the polygon may use -180..180 while
    the grid uses 0..360, or the reverse).
    """
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    px, py = np.meshgrid(lon, lat)
    poly = [(float(x), float(y)) for x, y in polygon]
    mask = np.zeros(px.shape, dtype=bool)
    for shift in (-360.0, 0.0, 360.0):
        mask |= _ray_cast(px + shift, py, poly)
    return mask


def _horizontal_mask(piece, anomaly):
    ny, nx = anomaly.sizes["latitude"], anomaly.sizes["longitude"]
    if piece.polygon is None:
        return np.ones((ny, nx), dtype=bool)
    return polygon_mask(piece.polygon, anomaly["longitude"].values, anomaly["latitude"].values)


def _var(anomaly, name):
    if name not in anomaly:
        raise InputError(f"anomaly dataset: variable {name!r} is missing; build it with Case.anomaly().")
    return anomaly[name]


def piece_mask(piece: Piece, anomaly: xr.Dataset) -> xr.DataArray:
    """3-D bool mask (pressure, latitude, longitude) of an interior (or remainder-style) piece.

    The mask is polygon x layer x sign/threshold on ``ertel_pv_anomaly`` x
    (``relative_humidity >= rh_min`` if set).  NaN data never belong to a mask.
    """
    epv = spatial_dims(_var(anomaly, "ertel_pv_anomaly"), "ertel_pv_anomaly")
    if epv.ndim != 3:
        raise InputError("anomaly dataset: expected one time and member (dims pressure, latitude, longitude).")
    mask = np.broadcast_to(_horizontal_mask(piece, anomaly), epv.shape).copy()
    if piece.layer is not None:
        lo, hi = piece.layer
        if piece.layer_coord == "pressure":
            php = anomaly["pressure"].values / 100.0
            mask &= ((php >= lo) & (php <= hi))[:, None, None]
        else:
            th = spatial_dims(_var(anomaly, "potential_temperature"), "potential_temperature").values
            mask &= (th >= lo) & (th <= hi)
    e = epv.values
    with np.errstate(invalid="ignore"):
        if piece.sign > 0:
            mask &= (e > 0) & (e >= piece.threshold)
        elif piece.sign < 0:
            mask &= (e < 0) & (-e >= piece.threshold)
        else:
            mask &= np.abs(e) >= piece.threshold
        if piece.rh_min is not None:
            if "relative_humidity" not in anomaly:
                raise PieceError(
                    f"piece {piece.name!r}: rh_min is set but the case has no relative_humidity; "
                    "clear rh_min or open data with humidity."
                )
            rh = spatial_dims(anomaly["relative_humidity"], "relative_humidity").values
            mask &= rh >= piece.rh_min
    return xr.DataArray(
        mask,
        dims=("pressure", "latitude", "longitude"),
        coords={d: anomaly[d] for d in ("pressure", "latitude", "longitude")},
        name=f"mask_{piece.name}",
        attrs=dict(long_name=f"mask of piece {piece.name}"),
    )


def _boundary_mask(piece, theta):
    m = _horizontal_mask(piece, theta)
    with np.errstate(invalid="ignore"):
        if piece.sign > 0:
            m = m & (theta.values > 0)
        elif piece.sign < 0:
            m = m & (theta.values < 0)
    return m


def _finite(a):
    """``a`` as float64 with NaN -> 0: one copy at most (none when already float64 and finite)."""
    a = np.asarray(a, dtype=float)
    if np.isfinite(a).all():
        return a
    return np.nan_to_num(a)


def _arrays(anomaly):
    q = np.nan_to_num(np.array(spatial_dims(_var(anomaly, "qgpv_anomaly"), "qgpv_anomaly").values, dtype=float),
                      copy=False)
    bt = np.nan_to_num(_var(anomaly, "bottom_theta_anomaly").transpose("latitude", "longitude").values.astype(float))
    tt = np.nan_to_num(_var(anomaly, "top_theta_anomaly").transpose("latitude", "longitude").values.astype(float))
    # read only (the lateral piece's Dirichlet data): no copy unless it holds NaN
    lat = _finite(spatial_dims(_var(anomaly, "geopotential_anomaly"), "geopotential_anomaly").values)
    if q.ndim != 3:
        raise InputError("anomaly dataset: expected one time and member (dims pressure, latitude, longitude).")
    return q, bt, tt, lat


def piece_forcing(piece: Piece, anomaly: xr.Dataset) -> dict:
    """The forcing a piece claims on its own (ignoring other pieces).

    Returns dict(q=(nz, ny, nx), bottom_theta=(ny, nx), top_theta=(ny, nx),
    lateral=(nz, ny, nx)) of numpy arrays; for boundary pieces only the one
    boundary entry is non-zero.  A ``remainder`` piece on its own claims
    everything (use :func:`invert_pieces` for the remainder of a set).
    """
    q, bt, tt, lat = _arrays(anomaly)
    zero3, zero2 = np.zeros_like(q), np.zeros_like(bt)
    out = dict(q=zero3, bottom_theta=zero2, top_theta=zero2.copy(), lateral=zero3.copy())
    if piece.kind == "interior":
        out["q"] = np.where(piece_mask(piece, anomaly).values, q, 0.0)
    elif piece.kind == "bottom":
        out["bottom_theta"] = np.where(_boundary_mask(piece, anomaly["bottom_theta_anomaly"]), bt, 0.0)
    elif piece.kind == "top":
        out["top_theta"] = np.where(_boundary_mask(piece, anomaly["top_theta_anomaly"]), tt, 0.0)
    elif piece.kind == "lateral":
        out["lateral"] = lat
    else:  # remainder alone = everything
        out.update(q=q, bottom_theta=bt, top_theta=tt, lateral=lat)
    return out


class Claims:
    """First-claim-wins bookkeeping of a piece list: what has been claimed so far.

    ``take(piece)`` returns the forcing the piece gets (its own forcing minus what earlier
    pieces claimed) and records its claim; ``remainder()`` is everything not claimed. Used by
    :func:`invert_pieces` for a whole list and by the app's state to add one piece at a time.
    """

    def __init__(self, anomaly: xr.Dataset):
        self.anomaly = anomaly
        self.q, self.bt, self.tt, self.lat = _arrays(anomaly)
        self.claimed_q = np.zeros(self.q.shape, dtype=bool)
        self.claimed_b = np.zeros(self.bt.shape, dtype=bool)
        self.claimed_t = np.zeros(self.tt.shape, dtype=bool)
        self.lateral_claimed = False

    def take(self, pc: Piece) -> dict:
        """Forcing dict (q, bottom_theta, top_theta, lateral; None where the piece has none)."""
        f = dict(q=None, bottom_theta=None, top_theta=None, lateral=None)
        if pc.kind == "interior":
            m = piece_mask(pc, self.anomaly).values & ~self.claimed_q
            self.claimed_q |= m
            f["q"] = np.where(m, self.q, 0.0)
        elif pc.kind == "bottom":
            m = _boundary_mask(pc, self.anomaly["bottom_theta_anomaly"]) & ~self.claimed_b
            self.claimed_b |= m
            f["bottom_theta"] = np.where(m, self.bt, 0.0)
        elif pc.kind == "top":
            m = _boundary_mask(pc, self.anomaly["top_theta_anomaly"]) & ~self.claimed_t
            self.claimed_t |= m
            f["top_theta"] = np.where(m, self.tt, 0.0)
        elif pc.kind == "lateral":
            f["lateral"] = np.zeros_like(self.lat) if self.lateral_claimed else self.lat
            self.lateral_claimed = True
        else:
            raise PieceError(f"piece {pc.name!r}: the remainder claims nothing itself; use remainder().")
        return f

    def remainder(self) -> dict:
        return dict(
            q=np.where(self.claimed_q, 0.0, self.q),
            bottom_theta=np.where(self.claimed_b, 0.0, self.bt),
            top_theta=np.where(self.claimed_t, 0.0, self.tt),
            lateral=None if self.lateral_claimed else self.lat,
        )


def _claims(pieces, anomaly):
    """Forcing per piece with first-claim-wins, and the remainder's forcing."""
    claims = Claims(anomaly)
    rems = [p for p in pieces if p.kind == "remainder"]
    if len(rems) > 1:
        raise PieceError(f"piece {rems[1].name!r}: only one remainder piece is allowed; remove the others.")
    remainder_name = rems[0].name if rems else "remainder"
    if not rems and any(p.name == "remainder" for p in pieces):
        raise PieceError("piece 'remainder': this name is kept for the remainder; rename the piece.")
    names = set()
    forcings = []
    for pc in pieces:
        if pc.name in names:
            raise PieceError(f"piece {pc.name!r}: two pieces share this name; give each piece its own name.")
        names.add(pc.name)
        if pc.kind != "remainder":  # the remainder is computed after all claims
            forcings.append((pc.name, claims.take(pc)))
    forcings.append((remainder_name, claims.remainder()))
    return forcings, (claims.q, claims.bt, claims.tt, claims.lat)


def _checked_claims(pieces, anomaly):
    """The checked piece list's claim bookkeeping and the remainder's name."""
    claims = Claims(anomaly)
    rems = [p for p in pieces if p.kind == "remainder"]
    if len(rems) > 1:
        raise PieceError(f"piece {rems[1].name!r}: only one remainder piece is allowed; remove the others.")
    remainder_name = rems[0].name if rems else "remainder"
    if not rems and any(p.name == "remainder" for p in pieces):
        raise PieceError("piece 'remainder': this name is kept for the remainder; rename the piece.")
    names = set()
    for pc in pieces:
        if pc.name in names:
            raise PieceError(f"piece {pc.name!r}: two pieces share this name; give each piece its own name.")
        names.add(pc.name)
    return claims, remainder_name


def invert_pieces(anomaly: xr.Dataset, pieces) -> dict:
    """Invert every piece and the full forcing with one factorised solver.

    Parameters
    ----------
    anomaly : Dataset from ``Case.anomaly`` (see the module docstring)
    pieces : list of Piece (or their dicts)

    Returns
    -------
    dict name -> balanced Dataset (:func:`~workbench.inversion.fields.balanced_fields`),
    one per piece in list order, the remainder, and ``"total"`` (the full
    inversion, solved separately).  Each Dataset has attrs ``piece`` and
    ``kind``; the sum over all entries but ``"total"`` equals ``"total"`` to
    round-off.
    """
    plist = [p if isinstance(p, Piece) else Piece.from_dict(p) for p in pieces]
    sigma = _var(anomaly, "static_stability")
    f0 = anomaly.attrs.get("f0")
    qda = spatial_dims(_var(anomaly, "qgpv_anomaly"), "qgpv_anomaly")
    grid = grid_for(qda, sigma, f0)
    solver = get_solver(grid)
    claims, remainder_name = _checked_claims(plist, anomaly)
    q, bt, tt, lat = claims.q, claims.bt, claims.tt, claims.lat
    zero2 = np.zeros(bt.shape)
    kinds = {p.name: p.kind for p in plist}
    coords = {d: qda[d] for d in ("pressure", "latitude", "longitude")}
    out = {}

    def solve(name, f):
        # one piece at a time: the solver's work space is a few fields, not a few per piece
        b = zero2 if f["bottom_theta"] is None else f["bottom_theta"]
        t = zero2 if f["top_theta"] is None else f["top_theta"]
        phi = solver.solve(np.zeros(q.shape) if f["q"] is None else f["q"], b, t, f["lateral"])
        f.clear()
        phi_da = xr.DataArray(phi, dims=qda.dims[-3:], coords=coords)
        ds = balanced_fields(phi_da, grid.f0, bottom_theta=b, top_theta=t, grid=grid)
        ds.attrs.update(piece=name, kind="total" if name == "total" else kinds.get(name, "remainder"))
        out[name] = ds

    for pc in plist:
        if pc.kind != "remainder":  # the remainder is computed after all claims
            solve(pc.name, claims.take(pc))
    solve(remainder_name, claims.remainder())
    solve("total", dict(q=q, bottom_theta=bt, top_theta=tt, lateral=lat))
    return out


# ---------------------------------------------------------------------------
# attribution
# ---------------------------------------------------------------------------

_ATTR_VARS = ("height_anomaly", "u", "v", "relative_vorticity")


def attribution(results: dict, lon: float, lat: float, pressure_hpa: float):
    """Attribution table at a target point: one row per piece, then "sum of pieces" and "full inversion".

    Values are linearly interpolated (bilinear in longitude/latitude, linear
    in pressure) so that the piece rows add up to the sum row exactly
    (interpolation is linear).  Columns: ``height_anomaly`` (m), ``u``,
    ``v``, ``wind_speed`` (m s-1; speed of each row's own wind, so speeds do
    not add), ``relative_vorticity`` (s-1), ``height_share_pct`` and
    ``vorticity_share_pct`` (% of the full inversion).  Relative vorticity is
    NaN within one grid length of the lateral boundary.

    A share whose denominator is near zero is NaN (shown as an em dash by
    :func:`format_share`): when |full-inversion value| is below ``SHARE_FLOORS`` (1 m for the
    height anomaly, 1e-6 s-1 for vorticity) or below ``SHARE_RELATIVE_FLOOR`` (5 %) of the
    largest piece's magnitude. ``table.attrs["share_notes"]`` says why, one sentence per column;
    ``table.attrs["notes"]`` is a list for any caller's sentences (e.g. a moved target).
    """
    import pandas as pd

    if "total" not in results:
        raise InputError("attribution: results need the 'total' entry from invert_pieces.")
    ref = results["total"]
    pmin, pmax = float(ref["pressure"].min()) / 100, float(ref["pressure"].max()) / 100
    for name, val, lo, hi in (
        ("longitude", lon, float(ref["longitude"].min()), float(ref["longitude"].max())),
        ("latitude", lat, float(ref["latitude"].min()), float(ref["latitude"].max())),
        ("pressure (hPa)", pressure_hpa, pmin, pmax),
    ):
        if not (lo <= float(val) <= hi):
            raise InputError(f"attribution: target {name} {val} is outside the domain ({lo:g} to {hi:g}); pick a point inside.")
    # indices and weights of the target, once; then each piece's fields on the two bracketing
    # levels only (one pass over its phi'), read at the eight surrounding nodes
    dims = ("pressure", "latitude", "longitude")
    brackets = [_bracket(ref[d].values, v) for d, v in zip(dims, (float(pressure_hpa) * 100.0, float(lat),
                                                                   float(lon)))]
    rows = {}
    for name, ds in results.items():
        if name == "total":
            continue
        rows[name] = _at_target(ds, brackets)
    summed = {v: float(sum(r[v] for r in rows.values())) for v in _ATTR_VARS}
    full = _at_target(ref, brackets)
    rows["sum of pieces"] = summed
    rows["full inversion"] = full
    df = pd.DataFrame.from_dict(rows, orient="index")
    df["wind_speed"] = np.hypot(df["u"], df["v"])
    share_notes = []
    pieces_only = df.drop(index=["sum of pieces", "full inversion"])
    for col, share, what, unit in (("height_anomaly", "height_share_pct", "height anomaly", "m"),
                                   ("relative_vorticity", "vorticity_share_pct", "relative vorticity", "s-1")):
        denom = full[col]
        largest = float(np.nanmax(np.abs(pieces_only[col].values))) if len(pieces_only) else 0.0
        floor = max(SHARE_FLOORS[col], SHARE_RELATIVE_FLOOR * largest)
        if not math.isfinite(denom):
            df[share] = np.nan
            share_notes.append(f"No {what} shares: the full inversion's {what} is not available at the "
                               "target (e.g. next to the lateral boundary).")
        elif abs(denom) < floor:
            df[share] = np.nan
            share_notes.append(
                f"No {what} shares: the full inversion's {what} at the target ({denom:+.3g} {unit}) is "
                f"below {floor:.3g} {unit} (the larger of {SHARE_FLOORS[col]:g} {unit} and "
                f"{100 * SHARE_RELATIVE_FLOOR:g} % of the largest piece, {largest:.3g} {unit}), so shares "
                "would be meaningless.")
        else:
            df[share] = 100.0 * df[col] / denom
    df = df[["height_anomaly", "u", "v", "wind_speed", "relative_vorticity", "height_share_pct", "vorticity_share_pct"]]
    df.index.name = "piece"
    df.attrs.update(
        longitude=float(lon),
        latitude=float(lat),
        pressure_hpa=float(pressure_hpa),
        interpolation="bilinear in longitude/latitude, linear in pressure",
        share_notes=share_notes,
        notes=[],
        units=dict(height_anomaly="m", u="m s-1", v="m s-1", wind_speed="m s-1", relative_vorticity="s-1"),
    )
    return df


def _bracket(coord, value):
    """(i0, i1, w): the two nodes of ``coord`` (ascending or descending) around ``value`` and the
    linear weight of ``i1`` (the nodes and weight of a sorted linear interpolation)."""
    c = np.asarray(coord, dtype=float)
    order = np.argsort(c, kind="stable")
    cs = c[order]
    if cs.size == 1:
        return int(order[0]), int(order[0]), 0.0
    hi = int(np.clip(np.searchsorted(cs, value, side="left"), 1, cs.size - 1))
    w = (value - cs[hi - 1]) / (cs[hi] - cs[hi - 1])
    return int(order[hi - 1]), int(order[hi]), float(w)


def _at_target(ds, brackets):
    """dict variable -> value at the target of :func:`attribution` (trilinear with ``brackets``)."""
    from workbench.inversion.fields import balanced_source

    (k0, k1, wk), (j0, j1, wj), (i0, i1, wi) = brackets
    ka, kb = min(k0, k1), max(k0, k1)
    src = balanced_source(ds)
    if src is not None and src.data.ndim == 3:
        block = src.levels(_ATTR_VARS, ka, kb + 1)
    else:
        block = {v: np.asarray(spatial_dims(ds[v], v).isel(pressure=slice(ka, kb + 1)).values, dtype=float)
                 for v in _ATTR_VARS}
    out = {}
    for v in _ATTR_VARS:
        b = block[v]
        val = 0.0
        for k, wz in ((k0, 1.0 - wk), (k1, wk)):
            for j, wy in ((j0, 1.0 - wj), (j1, wj)):
                for i, wx in ((i0, 1.0 - wi), (i1, wi)):
                    val += wz * wy * wx * b[k - ka, j, i]
        out[v] = float(val)
    return out
