"""Pieces that follow the weather: carry a piece drawn at one time to the other times.

A piece is carried to the other times of a case either **fixed** in place (the same lon/lat
outline at every time) or **following its anomaly** (``Piece.follow == "anomaly"``). The rule
for a following piece, applied step by step from its start time to each neighbouring time,
forwards and backwards:

1. **Region field.** The points beyond the piece's threshold on its own anomaly field, with the
   same semantics as the piece masks of :mod:`workbench.inversion.pieces` but without the
   outline: interior pieces use ``ertel_pv_anomaly`` x layer x sign/threshold (PVU) x RH floor
   (3-D, pressure x latitude x longitude); bottom / top pieces use ``bottom_theta_anomaly`` /
   ``top_theta_anomaly`` with the sign and ``threshold`` read as K of |theta'| (2-D).
2. **Connected regions**: face connectivity (6 neighbours in 3-D, 4 in 2-D;
   ``scipy.ndimage.label``). On a periodic (global) grid regions are not joined across the
   longitude seam.
3. **Overlap**: the piece's footprint at the previous time (its mask there: outline x region
   field) against each region at the new time, measured as the area-weighted number of grid
   points they share (weight cos(latitude), summed over levels for 3-D regions).
4. **Choice**: the region with the largest overlap is the piece at the new time. Another
   region overlapping at least ``MIN_FRACTION`` (5 %) as much = **split** (the others are
   reported with their overlaps; smaller fragments are counted in the note). The chosen region
   covering, at the previous time, points of other regions of the field (not the piece's own)
   that make at least 5 % of its area there = **merge** (reported). No overlapping region = **lost**: tracking stops
   in that direction and the piece is left out of the later times (its forcing goes to the
   remainder), said in the note.
5. **Outline**: the region's column footprint (any level) with its holes filled
   (``scipy.ndimage.binary_fill_holes``, 4-connected background), contoured at 0.5 with
   ``contourpy`` on the grid padded by one empty row/column; the closed line of largest area is
   the new polygon. The contour passes half-way between inside and outside points, so the
   polygon holds exactly the filled footprint's grid points (even-odd rule of
   :func:`~workbench.inversion.pieces.polygon_mask`). The piece at the new time is the original
   piece with that polygon; its mask is outline x layer x threshold as for any piece.

:func:`track_piece` gives the steps of one piece; :func:`tracked_shares` runs the piecewise
inversion at every time with the carried pieces and returns each piece's share over time.
Computation only (no plotting).
"""
from __future__ import annotations

import dataclasses
import math
from typing import NamedTuple

import numpy as np
from scipy import ndimage

from .errors import InputError, PieceError

__all__ = ["TrackStep", "track_piece", "track_pieces", "tracked_shares", "region_field", "outline_polygon",
           "TARGET_RULES"]

#: a second overlapping region counts as a split (and regions joined as a merge) from this fraction
#: of the kept overlap (of the new region's area) on; smaller fragments are only counted in the note
MIN_FRACTION = 0.05
#: the target rules of :func:`tracked_shares` given by name
TARGET_RULES = ("storm centre", "centroid")


class TrackStep(NamedTuple):
    """One time of a tracked piece: the case's time index, the piece there (None when lost or not
    tracked), and a sentence saying what happened."""

    time: int
    piece: object
    note: str


@dataclasses.dataclass
class _Step:
    time: int
    piece: object
    note: str
    status: str  # start | fixed | tracked | split | merged | split+merged | lost | not tracked
    region: np.ndarray | None = None  # bool footprint mask at this time (3-D interior, 2-D boundary)
    overlap: float = float("nan")


# ---------------------------------------------------------------------------------------- fields


def region_field(piece, anomaly) -> np.ndarray:
    """Bool array of the points beyond the piece's threshold on its anomaly field, ignoring the
    outline: (pressure, latitude, longitude) for interior pieces (the mask semantics of
    :func:`~workbench.inversion.pieces.piece_mask`), (latitude, longitude) for bottom / top pieces
    (theta' with the sign and |theta'| >= ``threshold`` K)."""
    from .inversion.pieces import piece_mask

    if piece.kind == "interior":
        return np.asarray(piece_mask(dataclasses.replace(piece, polygon=None, follow="fixed"), anomaly).values)
    if piece.kind in ("bottom", "top"):
        name = f"{piece.kind}_theta_anomaly"
        if name not in anomaly:
            raise InputError(f"anomaly dataset: variable {name!r} is missing; build it with Case.anomaly().")
        th = np.asarray(anomaly[name].transpose("latitude", "longitude").values, dtype=float)
        with np.errstate(invalid="ignore"):
            if piece.sign > 0:
                return (th > 0) & (th >= piece.threshold)
            if piece.sign < 0:
                return (th < 0) & (-th >= piece.threshold)
            return np.abs(th) >= piece.threshold
    raise PieceError(f"piece {piece.name!r}: a {piece.kind} piece has no anomaly region to follow.")


def _footprint(piece, anomaly, field=None):
    """The piece's own points at this time: its outline x its region field."""
    from .inversion.pieces import polygon_mask

    field = region_field(piece, anomaly) if field is None else field
    if piece.polygon is None:
        return field.copy()
    poly = polygon_mask(piece.polygon, anomaly["longitude"].values, anomaly["latitude"].values)
    return field & (poly if field.ndim == 2 else poly[None, :, :])


def _weights(anomaly, ndim):
    w = np.cos(np.deg2rad(np.asarray(anomaly["latitude"].values, dtype=float)))[:, None]
    w = np.broadcast_to(w, (anomaly.sizes["latitude"], anomaly.sizes["longitude"]))
    return w if ndim == 2 else w[None, :, :]


def _label(field):
    structure = ndimage.generate_binary_structure(field.ndim, 1)  # face neighbours
    labels, n = ndimage.label(field, structure=structure)
    return labels, n


def outline_polygon(region, lon, lat):
    """The outline (list of (lon, lat)) of a bool region: its column footprint with holes
    filled, contoured at 0.5 (``contourpy``) on the grid padded by one empty row and column; the
    closed line of largest area. None for an empty region."""
    import contourpy

    foot = np.asarray(region, dtype=bool)
    if foot.ndim == 3:
        foot = foot.any(axis=0)
    if not foot.any():
        return None
    foot = ndimage.binary_fill_holes(foot)
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    dx = lon[1] - lon[0] if lon.size > 1 else 1.0
    dy = lat[1] - lat[0] if lat.size > 1 else 1.0
    x = np.concatenate([[lon[0] - dx], lon, [lon[-1] + dx]])
    y = np.concatenate([[lat[0] - dy], lat, [lat[-1] + dy]])
    z = np.zeros((y.size, x.size))
    z[1:-1, 1:-1] = foot
    gen = contourpy.contour_generator(x, y, z, line_type=contourpy.LineType.Separate)
    best, best_area = None, -1.0
    for line in gen.lines(0.5):
        pts = np.asarray(line, dtype=float)
        if pts.shape[0] < 4:
            continue
        area = 0.5 * abs(np.sum(pts[:, 0] * np.roll(pts[:, 1], -1) - np.roll(pts[:, 0], -1) * pts[:, 1]))
        if area > best_area:
            best, best_area = pts, area
    if best is None:
        return None
    if np.allclose(best[0], best[-1]):
        best = best[:-1]
    best[:, 1] = np.clip(best[:, 1], -90.0, 90.0)
    return [(float(a), float(b)) for a, b in best]


# ---------------------------------------------------------------------------------------- tracking


def _time_list(case, times):
    if times is None:
        return list(range(case.times.size))
    if isinstance(times, (int, np.integer, str)):
        times = [times]
    out = sorted({case.time_index(t) for t in times})
    if not out:
        raise InputError("tracking: no times selected.")
    return out


def _iso(case, ti):
    return str(case.times[ti])[:16]


def _start_index(case, piece, time):
    if time is None and piece.follow_from is not None:
        time = piece.follow_from
    if time is None:
        return None
    try:
        return case.time_index(time)
    except Exception as exc:
        raise InputError(f"piece {piece.name!r}: start time {time!r} is not a time of the case ({exc}).") from None


def _track(case, piece, start, times, member=None, reference=None):
    """list of _Step over ``times`` (time indices, sorted) for one piece that starts at ``start``."""
    from .inversion.pieces import Piece

    if not isinstance(piece, Piece):
        piece = Piece.from_dict(piece)
    if piece.follow != "anomaly":
        return [_Step(t, piece, "fixed in place (the outline drawn)", "fixed") for t in times]
    chain = sorted(set(times) | {start})
    k0 = chain.index(start)
    anomalies = {}

    def anom(t):
        if t not in anomalies:
            anomalies[t] = case.anomaly(t, member, reference)
        return anomalies[t]

    a0 = anom(start)
    field0 = region_field(piece, a0)
    foot0 = _footprint(piece, a0, field0)
    steps = {start: _Step(start, piece, f"start: the outline drawn at {_iso(case, start)}", "start", foot0,
                          float(np.sum(foot0 * _weights(a0, foot0.ndim))))}
    if not foot0.any():
        steps[start] = _Step(start, piece, f"start at {_iso(case, start)}: no point inside the outline is beyond "
                             "the piece's threshold, so there is nothing to follow", "lost", foot0)
    for direction in (1, -1):
        prev = steps[start]
        prev_field = field0
        k = k0 + direction
        lost_at = None if prev.status != "lost" else start
        while 0 <= k < len(chain):
            t = chain[k]
            if lost_at is not None:
                steps[t] = _Step(t, None, f"not tracked: lost at {_iso(case, lost_at)}", "not tracked")
                k += direction
                continue
            a = anom(t)
            field = region_field(piece, a)
            labels, n = _label(field)
            w = _weights(a, field.ndim)
            overlaps = ndimage.sum_labels(w * prev.region, labels, index=np.arange(1, n + 1)) if n else np.array([])
            hit = [(float(ov), i + 1) for i, ov in enumerate(overlaps) if ov > 0]
            if not hit:
                steps[t] = _Step(t, None, f"lost at {_iso(case, t)}: no region beyond the threshold overlaps the "
                                 f"piece of {_iso(case, prev.time)}; tracking stops (the piece is left out from "
                                 "here, its forcing goes to the remainder)", "lost")
                lost_at = t
                k += direction
                continue
            hit.sort(reverse=True)
            best_ov, best_label = hit[0]
            region = labels == best_label
            notes, status = [], []
            parts = [ov for ov, _ in hit[1:] if ov >= MIN_FRACTION * best_ov]
            small = len(hit) - 1 - len(parts)
            if parts:
                status.append("split")
                others = ", ".join(f"{ov / best_ov:.0%}" for ov in parts[:5])
                notes.append(f"split into {len(parts) + 1} regions: kept the one with the largest overlap; the "
                             f"other {len(parts)} overlap {others} as much")
            if small:
                notes.append(f"{small} fragment(s) overlapping less than {MIN_FRACTION:.0%} as much left aside")
            # merge: the new region covers, at the previous time, regions of the field that were not the piece's
            plabels, _ = _label(prev_field)
            own = set(np.unique(plabels[prev.region & (plabels > 0)]).tolist())
            covered = np.unique(plabels[region & (plabels > 0)])
            merged = [int(c) for c in covered if int(c) not in own]
            if merged:
                share = float(np.sum(w * (region & np.isin(plabels, merged)))) / float(np.sum(w * region))
                if share >= MIN_FRACTION:
                    status.append("merged")
                    notes.append(f"merged with {len(merged)} other region(s) of {_iso(case, prev.time)} "
                                 f"({share:.0%} of the new region's area there)")
            poly = outline_polygon(region, a["longitude"].values, a["latitude"].values)
            new_piece = dataclasses.replace(piece, polygon=poly)
            foot = _footprint(new_piece, a, field)
            notes.insert(0, f"followed to {_iso(case, t)} (overlap {best_ov:.1f} weighted grid points)")
            steps[t] = _Step(t, new_piece, "; ".join(notes), "+".join(status) or "tracked", foot, best_ov)
            prev, prev_field = steps[t], field
            k += direction
    return [steps[t] for t in times]


def track_piece(case, piece, time=None, times=None, member=None, reference=None) -> list:
    """Carry ``piece`` from ``time`` (index or ISO time; default ``piece.follow_from``, else the
    first of ``times``) to each of ``times`` (default all the case's times).

    Returns a list of :class:`TrackStep` ``(time index, Piece or None, note)`` in time order. A
    fixed piece is the same at every time; a piece with ``follow="anomaly"`` follows the rule of
    the module docstring (split, merge and loss are said in the note; a lost piece is None from
    there on). ``reference`` is that of :meth:`workbench.Case.anomaly`."""
    tl = _time_list(case, times)
    start = _start_index(case, piece, time)
    start = tl[0] if start is None else start
    return [TrackStep(s.time, s.piece, s.note) for s in _track(case, piece, start, tl, member, reference)]


def track_pieces(case, pieces, times=None, member=None, reference=None, time=None) -> dict:
    """``{piece name: [_Step, ...]}`` for every piece of the list (see :func:`track_piece`)."""
    from .inversion.pieces import Piece

    tl = _time_list(case, times)
    out = {}
    for p in pieces:
        p = p if isinstance(p, Piece) else Piece.from_dict(p)
        start = _start_index(case, p, time)
        out[p.name] = _track(case, p, tl[0] if start is None else start, tl, member, reference)
    return out


# ---------------------------------------------------------------------------------------- shares


def _centroid(step, anomaly, case):
    """(lon, lat, hPa) of the piece at this time: the centre of its footprint weighted by
    |q'| (interior) or |theta'| (bottom/top) and cos(latitude)."""
    region = step.region
    lon = np.asarray(anomaly["longitude"].values, dtype=float)
    lat = np.asarray(anomaly["latitude"].values, dtype=float)
    if region.ndim == 3:
        from .inversion.fields import spatial_dims

        q = np.abs(np.nan_to_num(np.asarray(spatial_dims(anomaly["qgpv_anomaly"], "qgpv_anomaly").values,
                                            dtype=float)))
        w = region * _weights(anomaly, 3) * q
        if not w.sum():
            w = region * _weights(anomaly, 3)
        p_hpa = np.asarray(anomaly["pressure"].values, dtype=float) / 100.0
        pz = float(np.sum(w.sum(axis=(1, 2)) * p_hpa) / w.sum())
        w2 = w.sum(axis=0)
    else:
        th = np.abs(np.nan_to_num(np.asarray(anomaly[f"{step.piece.kind}_theta_anomaly"].transpose(
            "latitude", "longitude").values, dtype=float)))
        w2 = region * _weights(anomaly, 2) * th
        if not w2.sum():
            w2 = region * _weights(anomaly, 2)
        levels = case.levels_hpa
        pz = float(levels[0] if step.piece.kind == "bottom" else levels[-1])
    tot = float(w2.sum())
    return float(np.sum(w2.sum(axis=0) * lon) / tot), float(np.sum(w2.sum(axis=1) * lat) / tot), pz


def tracked_shares(case, pieces, times=None, target=None, *, member=None, reference=None, time=None,
                   progress=None):
    """Each piece's share over time with the pieces carried to every time (:func:`track_piece`).

    Parameters
    ----------
    case : Case
    pieces : list of Piece (or dicts); those with ``follow="anomaly"`` are tracked from their
        ``follow_from`` time (else ``time``, else the first time), the others stay fixed
    times : time indices / ISO times (default all)
    target : the attribution point at each time: None or "storm centre" (each time's storm
        centre, as :func:`workbench.analysis.analyse`), (lon, lat, hPa) fixed, "centroid" (each
        tracked piece read at its own centre, :func:`_centroid`; fixed pieces at the storm
        centre), or a callable ``f(time_index, {name: Piece or None}) -> (lon, lat, hPa)``
    reference : as for :meth:`workbench.Case.anomaly` (None: the case's default)
    progress : iterable wrapper (e.g. :func:`workbench.cli.progress`) or None

    Returns
    -------
    pandas DataFrame, one row per (time, piece): ``time``, ``time_index``, ``piece``, ``follow``,
    ``status`` (start, fixed, tracked, split, merged, lost, not tracked), ``height_anomaly`` (m),
    ``relative_vorticity`` (s-1), ``height_share_pct``, ``vorticity_share_pct``, ``target_lon``,
    ``target_lat``, ``target_hpa``, ``region_points`` (grid points of the piece's mask),
    ``note``. A lost piece is left out of the inversion at that time (NaN values). ``attrs``:
    ``rule`` (the tracking rule), ``target``, ``reference``, ``outlines``
    ({name: {time: polygon}}).
    """
    import pandas as pd

    from .analysis import above_ground_target, storm_centre
    from .inversion.pieces import Piece, attribution

    plist = [p if isinstance(p, Piece) else Piece.from_dict(p) for p in pieces]
    if not plist:
        raise InputError("tracked_shares: give at least one piece.")
    if isinstance(target, str) and target not in TARGET_RULES:
        raise InputError(f"tracked_shares: target {target!r} is unknown; use one of {', '.join(TARGET_RULES)}, "
                         "a (lon, lat, hPa) point or a function.")
    if target is not None and not isinstance(target, str) and not callable(target):
        try:
            target = tuple(float(v) for v in target)
            assert len(target) == 3 and all(math.isfinite(v) for v in target)
        except (TypeError, ValueError, AssertionError):
            raise InputError(f"tracked_shares: target {target!r} must be (lon, lat, hPa).") from None
    reference = case.resolve_reference(reference)
    tl = _time_list(case, times)
    tracks = track_pieces(case, plist, tl, member, reference, time)
    levels = case.levels_hpa
    rows = []
    merges = {}
    iterator = tl if progress is None else progress(tl)
    for k, ti in enumerate(iterator):
        steps = {p.name: tracks[p.name][k] for p in plist}
        used = [steps[p.name].piece for p in plist if steps[p.name].piece is not None]
        # two tracked pieces on the same region: say so (first claim wins in the inversion)
        regions = [(n, s.region) for n, s in steps.items() if s.region is not None and s.status != "fixed"]
        same = {}
        for i, (n1, r1) in enumerate(regions):
            for n2, r2 in regions[i + 1:]:
                if r1.shape == r2.shape and np.array_equal(r1, r2):
                    same.setdefault(n1, []).append(n2)
                    same.setdefault(n2, []).append(n1)
        merges[ti] = same
        results = case.inversion(used, ti, member, reference)
        a = case.anomaly(ti, member, reference)

        def default_target():
            lon, lat = storm_centre(case, ti, member)
            return (lon, lat, float(levels[1] if levels.size > 1 else levels[0]))

        if target is None or target == "storm centre":
            base = default_target()
        elif target == "centroid":
            base = None
        elif callable(target):
            base = tuple(float(v) for v in target(ti, {n: s.piece for n, s in steps.items()}))
        else:
            base = target
        tables = {}

        def table_at(tgt):
            tgt, moved = above_ground_target(case, tgt, ti, member)
            key = tuple(round(v, 9) for v in tgt)
            if key not in tables:
                tables[key] = (attribution(results, *tgt), tgt, moved)
            return tables[key]

        for p in plist:
            s = steps[p.name]
            if target == "centroid":
                tgt = _centroid(s, a, case) if s.region is not None and s.region.any() and s.status != "fixed" \
                    else default_target()
            else:
                tgt = base
            table, tgt_used, moved = table_at(tgt)
            note = s.note
            if p.name in same:
                note += f"; same region as {', '.join(same[p.name])} (merged; first claim wins)"
            if moved:
                note += f"; {moved}"
            row = dict(time=_iso(case, ti), time_index=ti, piece=p.name, follow=p.follow, status=s.status,
                       target_lon=tgt_used[0], target_lat=tgt_used[1], target_hpa=tgt_used[2],
                       region_points=int(s.region.sum()) if s.region is not None else 0)
            if s.piece is not None and p.name in table.index:
                r = table.loc[p.name]
                row.update(height_anomaly=float(r["height_anomaly"]),
                           relative_vorticity=float(r["relative_vorticity"]),
                           height_share_pct=float(r["height_share_pct"]),
                           vorticity_share_pct=float(r["vorticity_share_pct"]))
            else:
                row.update(height_anomaly=np.nan, relative_vorticity=np.nan, height_share_pct=np.nan,
                           vorticity_share_pct=np.nan)
            if p.follow == "fixed" and s.piece is not None and p.polygon is not None:
                row["region_points"] = int(_footprint(p, a).sum()) if p.kind in ("interior", "bottom", "top") else 0
            row["note"] = note
            rows.append(row)
    cols = ["time", "time_index", "piece", "follow", "status", "height_anomaly", "relative_vorticity",
            "height_share_pct", "vorticity_share_pct", "target_lon", "target_lat", "target_hpa",
            "region_points", "note"]
    df = pd.DataFrame(rows)[cols]
    df.attrs.update(
        rule=("connected region (face neighbours) beyond the piece's threshold on its anomaly field that "
              "overlaps most (cos-latitude weighted grid points) the piece at the neighbouring time; outline = "
              "0.5 contour of the region's filled column footprint"),
        target=target if isinstance(target, str) or target is None else str(target),
        reference=reference if isinstance(reference, str) else "climatology (dataset)",
        outlines={name: {_iso(case, s.time): (None if s.piece is None else s.piece.polygon) for s in steps}
                  for name, steps in tracks.items()},
    )
    return df
