"""The standard analysis of a storm, shared by the command line, the batch runner and the
briefing: find the storm centre, split the QG PV anomaly into the usual pieces, invert them
and read each piece's share at the centre. Computation only (no plotting, no widgets).
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np

from .errors import GridError, InputError
from .places import point_label

__all__ = ["standard_pieces", "cyclonic_sign", "storm_centre", "analyse", "above_ground_target", "default_case_path", "load_pieces", "main"]

SAMPLE_DIR = Path(__file__).resolve().parents[1] / "sample_cases"


def default_case_path() -> Path:
    """The bundled invented sample storm (the first netCDF file in ``sample_cases/``)."""
    files = sorted(SAMPLE_DIR.glob("*.nc")) if SAMPLE_DIR.exists() else []
    if not files:
        raise InputError(f"No sample case found in {SAMPLE_DIR}; build it with `pvwb sample`.")
    return files[0]


def cyclonic_sign(case_or_latitude) -> int:
    """+1 in the northern hemisphere, -1 in the southern: the sign of f (of ``case.f0`` for a
    Case, else of the mid-point of the latitudes given), which is the sign of a cyclonic
    (trough) PV anomaly. A domain centred on the equator counts as northern."""
    f0 = getattr(case_or_latitude, "f0", None)
    if f0 is None:
        lat = np.asarray(case_or_latitude, dtype=float)
        f0 = 0.5 * (np.nanmin(lat) + np.nanmax(lat))
    return -1 if float(f0) < 0 else 1


def standard_pieces(upper=(550.0, 100.0), lower=(950.0, 600.0), threshold=0.0, rh_min=70.0,
                    moist=True, hemisphere=1):
    """The usual decomposition: upper-level cyclonic PV anomaly, lower-tropospheric (moist)
    cyclonic anomaly, surface theta', lid theta', lateral boundary, and the remainder.

    ``hemisphere`` is +1 (north) or -1 (south; :func:`cyclonic_sign` of the case): cyclonic PV
    anomalies are positive in the north and negative in the south, so the two interior pieces
    take that sign (``Piece.sign`` is the sign of the PV anomaly in the data). The boundary
    pieces take both signs in either hemisphere.

    The lower piece keeps points with relative humidity >= ``rh_min`` when ``moist`` (70-90 %
    is common practice for a diabatically generated PV anomaly); a case without humidity gets a
    dry lower piece. Pieces are claimed in list order; the remainder takes all that is left.
    """
    from .inversion.pieces import Piece

    if hemisphere in ("north", "n", "N"):
        hemisphere = 1
    elif hemisphere in ("south", "s", "S"):
        hemisphere = -1
    if hemisphere not in (1, -1):
        raise InputError(f"hemisphere must be +1 (north) or -1 (south), got {hemisphere!r}.")
    sign = int(hemisphere)
    return [
        Piece("upper trough", kind="interior", layer=upper, layer_coord="pressure", sign=sign,
              threshold=threshold, colour="#1f5fa6"),
        Piece("lower anomaly", kind="interior", layer=lower, layer_coord="pressure", sign=sign,
              threshold=threshold, rh_min=rh_min if moist else None, colour="#c8553d"),
        Piece("surface θ′", kind="bottom", colour="#2a9d8f"),
        Piece("lid θ′", kind="top", colour="#8d6cab"),
        Piece("lateral boundary", kind="lateral", colour="#7f7f7f"),
        Piece("remainder", kind="remainder", colour="#b8b8b8"),
    ]


def storm_centre(case, time=None, member=None):
    """(lon, lat) of the storm centre: the minimum of mean sea-level pressure when the case has
    it, else of the lowest level's geopotential (a low is a minimum in either hemisphere);
    points within two grid lengths of the lateral boundary are skipped, so the domain needs
    at least 5 x 5 points."""
    ds = case.at(time, member)
    field = ds["mslp"] if "mslp" in ds else ds["geopotential"].isel(pressure=0)
    what = "mean sea-level pressure" if "mslp" in ds else "lowest-level geopotential"
    ny, nx = field.sizes["latitude"], field.sizes["longitude"]
    if ny < 5 or nx < 5:
        raise GridError(f"The domain has {ny} x {nx} latitude x longitude points: too small for the "
                        "storm-centre search, which skips two grid lengths at each edge (at least 5 x 5).")
    inner = field.isel(latitude=slice(2, -2), longitude=slice(2, -2))
    vals = np.asarray(inner.values, dtype=float)
    if not np.isfinite(vals).any():
        raise InputError(f"Cannot find a storm centre: {what} is missing everywhere inside the "
                         "two-grid-length edge band; check that variable.")
    j, i = np.unravel_index(np.nanargmin(vals), vals.shape)
    return float(inner["longitude"][i]), float(inner["latitude"][j])


def above_ground_target(case, target, time=None, member=None):
    """``(target, note)``: ``target`` (lon, lat, hPa) moved up to the first level above the
    ground where it lies below it, with a sentence saying so (else ``note`` is None).

    The attribution interpolates bilinearly from the four surrounding columns and linearly in
    pressure, so the target must be at or above the first level that is above the ground in
    all four columns (the terrain rule, :meth:`workbench.Case.below_ground`)."""
    lon, lat, p = (float(x) for x in target)
    below = case.below_ground(time, member)
    if not bool(below.any()):
        return (lon, lat, p), None
    la, lo = below["latitude"].values, below["longitude"].values
    j = int(np.clip(np.searchsorted(la, lat), 1, la.size - 1))
    i = int(np.clip(np.searchsorted(lo, lon), 1, lo.size - 1))
    k0 = int(below.isel(latitude=slice(j - 1, j + 1), longitude=slice(i - 1, i + 1)).sum("pressure").max())
    levels = case.levels_hpa
    if k0 >= levels.size:
        raise InputError(f"The target {point_label(lon, lat, None)} lies under the ground at every level; pick "
                         "another point.")
    if p <= levels[k0] + 1e-9:
        return (lon, lat, p), None
    note = (f"The target {p:g} hPa lies below the ground at {point_label(lon, lat)}; it was moved up "
            f"to {levels[k0]:g} hPa, the first level above the ground there.")
    return (lon, lat, float(levels[k0])), note


def analyse(case, time=None, member=None, pieces=None, target=None, reference=None, balance="qg",
            floor=False):
    """Invert ``pieces`` (default :func:`standard_pieces`) at one time and return
    ``(results, table, target)``: the balanced Datasets per piece, the attribution DataFrame
    at ``target`` = (lon, lat, pressure hPa) (default the storm centre at the lowest level
    but one, 950 hPa on the usual level set), and the target used.

    ``reference`` None is the case's default (:attr:`workbench.Case.default_reference`). A
    target below the ground (given or default) is moved up to the first level above it
    (:func:`above_ground_target`). ``table.attrs["notes"]`` holds the sentences to show with
    the table (target moved, shares not given); ``table.attrs["reference"]`` names the
    reference used; ``table.attrs["balance"]`` the balance.  ``floor=True`` (nonlinear
    balance only) accepts the floor remedy where PV or absolute vorticity has the wrong sign;
    the number of points floored is then one of the notes (``table.attrs["floored"]``)."""
    from .inversion.pieces import attribution

    reference = case.resolve_reference(reference)

    if pieces is None:
        pieces = standard_pieces(moist=case.relative_humidity(time, member) is not None,
                                 hemisphere=cyclonic_sign(case))
    if target is None:
        lon, lat = storm_centre(case, time, member)
        levels = case.levels_hpa
        target = (lon, lat, float(levels[1] if levels.size > 1 else levels[0]))
    target, moved = above_ground_target(case, target, time, member)
    if floor and balance != "nonlinear":
        raise InputError("floor applies to balance='nonlinear' only (the QG inversion needs no floor).")
    results = case.inversion(pieces, time, member, reference, balance=balance,
                             **({"floor": True} if floor else {}))
    table = attribution(results, *target)
    table.attrs["balance"] = balance
    ref_label = reference if isinstance(reference, str) else "climatology (dataset)"
    table.attrs["reference"] = ref_label
    table.attrs["notes"] = ([moved] if moved else []) + list(table.attrs.get("share_notes", []))
    if balance == "nonlinear" and floor:
        solver = json.loads(results["total"].attrs.get("solver", "{}")).get("full", {})
        n_pv, n_eta = int(solver.get("n_pv_floored", 0)), int(solver.get("n_eta_floored", 0))
        table.attrs["floored"] = dict(pv=n_pv, absolute_vorticity=n_eta)
        table.attrs["notes"].append(
            f"Floor remedy: PV raised to 0.01 PVU at {n_pv} point(s) and absolute vorticity to 5 % of f at "
            f"{n_eta} point(s) (nonlinear balance is not elliptic where they have the wrong sign).")
    return results, table, tuple(float(x) for x in target)


#: How the command line and the briefing name the balance each number comes from.
BALANCE_LABELS = {"qg": "QG balance (constant f0)",
                  "nonlinear": "nonlinear balance (f varying with latitude; pieces linearised, "
                               "'nonlinear remainder' row)"}


def print_balance_check(case, time, member=None, reference=None, floor=False):
    """Print per level the RMS balanced-minus-analysed wind for QG and nonlinear balance
    (:func:`workbench.inversion.nonlinear.balance_quality`) and the solver's figures."""
    from .inversion.nonlinear import balance_quality

    bq = balance_quality(case, time, member, reference, floor=floor)
    solver = json.loads(bq.attrs.get("solver") or "{}")
    print(f"balance check {bq.attrs['time'][:16]}: RMS of balanced minus analysed wind (m/s), "
          f"{bq.attrs['weighting']}")
    print(f"{'hPa':>7} {'RMS wind':>9} {'QG':>7} {'nonlinear':>10}")
    for k, p in enumerate(bq["pressure"].values / 100.0):
        print(f"{p:7g} {float(bq['rms_wind'][k]):9.2f} {float(bq['rms_difference_qg'][k]):7.2f} "
              f"{float(bq['rms_difference_nonlinear'][k]):10.2f}")
    if solver:
        extra = ""
        if floor:
            extra = (f"; floored: PV {solver.get('n_pv_floored', 0)} point(s), absolute vorticity "
                     f"{solver.get('n_eta_floored', 0)} point(s)")
        print(f"nonlinear solve: {solver.get('newton_iterations')} Newton steps, {solver.get('gmres_iterations')} "
              f"GMRES iterations, relative residual {solver['residual_history'][-1]:.1e}{extra}")
    if bq.attrs.get("solver_note"):
        print(bq.attrs["solver_note"])
    print()
    return bq


def _parse_target(text):
    if text is None:
        return None
    try:
        lon, lat, p = (float(x) for x in text.split(","))
    except ValueError:
        raise InputError(f"--target must be lon,lat,pressure_hPa (e.g. -30,52,900), got {text!r}.") from None
    return lon, lat, p


def load_pieces(path):
    """Pieces from a JSON file holding a list of piece dicts (``Piece.to_dict()`` form)."""
    from .inversion.pieces import Piece

    try:
        raw = json.loads(Path(path).read_text())
    except (OSError, ValueError) as exc:
        raise InputError(f"Cannot read pieces from {str(path)!r}: {exc}. Give a JSON list of pieces.") from exc
    if not isinstance(raw, list):
        raise InputError(f"{str(path)!r} must hold a JSON list of pieces.")
    return [Piece.from_dict(d) for d in raw]


def main(argv=None):
    """``pvwb info [CASE ...] [--region W,E,S,N] [--times SPEC]`` and
    ``pvwb invert [CASE ...] [--region W,E,S,N] [--times SPEC] [--time T] [--member M]
    [--target LON,LAT,HPA] [--pieces FILE] [--reference R] [-o CSV [--overwrite]] [--quiet]
    [--balance qg|nonlinear] [--floor] [--balance-check]``.

    Arguments are checked before the work (one-line errors: :mod:`workbench.cli`); the target
    and every piece polygon must lie inside the domain. A bar shows progress over the times.
    """
    import workbench as wb

    from . import cli

    argv = list(argv or [])
    if not argv or argv[0] not in ("info", "invert"):  # called without a command: info
        argv = ["info", *argv]
    command, argv = argv[0], argv[1:]
    # one parser per command, so `pvwb info --help` shows only what info takes
    if command == "info":
        parser = cli.build_parser("pvwb info", "Describe a case: times, levels, domain, variables and "
                                               "how the data were read.")
        cli.add_case_argument(parser)
        cli.add_selection_options(parser)
        args = parser.parse_args(argv)
        case = wb.open_case(cli.case_source(args.case) or default_case_path(), **cli.selection_options(args))
        print(case)
        return 0
    parser = cli.build_parser("pvwb invert", "Piecewise QG inversion and the attribution table at the storm "
                                             "centre, for every time (or --time).")
    cli.add_case_argument(parser)
    cli.add_selection_options(parser)
    parser.add_argument("--time", default=None, help="time index or ISO time (default: every time)")
    parser.add_argument("--member", default=None, help="ensemble member: index or label (default: the first)")
    parser.add_argument("--target", default=None, help="lon,lat,pressure_hPa (default: storm centre, 2nd level)")
    parser.add_argument("--pieces", default=None, help="JSON file with a list of pieces (default: standard pieces)")
    parser.add_argument("--reference", default=None,
                        help="time_mean | area_mean | zonal_mean | PATH (default: the case's, see `pvwb info`)")
    parser.add_argument("-o", "--output", default=None,
                        help="write the attribution table(s) as CSV (first line: the caution, as a # comment)")
    cli.add_overwrite_option(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.add_argument("--balance", choices=["qg", "nonlinear"], default="qg",
                        help="qg (constant f0, default) or nonlinear (nonlinear balance, f varying with latitude)")
    parser.add_argument("--floor", action="store_true",
                        help="nonlinear balance: accept the floor remedy where PV or absolute vorticity has the "
                             "wrong sign (points counted)")
    parser.add_argument("--balance-check", action="store_true",
                        help="also print, per level, the RMS balanced-minus-analysed wind for QG and nonlinear balance")
    parser.add_argument("--balance-map", default=None, metavar="FIGURE",
                        help="with --balance-check: also save a map of where the two balances differ "
                             "(speed of nonlinear minus QG balanced wind) as FIGURE (.png, .pdf, .svg); "
                             "with several times, one file per time (the time added to the name)")
    parser.add_argument("--balance-level", type=float, default=500.0, metavar="HPA",
                        help="pressure level of --balance-map (default 500; the nearest level is used)")
    args = parser.parse_args(argv)
    if args.floor and args.balance != "nonlinear" and not args.balance_check:
        parser.error("--floor applies to --balance nonlinear or --balance-check only")
    if args.balance_map and not args.balance_check:
        parser.error("--balance-map needs --balance-check")
    if not 0.0 < args.balance_level <= 1100.0:
        parser.error(f"--balance-level must be a pressure in hPa (0 < p <= 1100), got {args.balance_level:g}")
    target = _parse_target(args.target)
    if args.output:
        cli.check_output(args.output, args.overwrite)
    pieces = load_pieces(args.pieces) if args.pieces else None
    path = cli.case_source(args.case) or default_case_path()
    case = wb.open_case(path, **cli.selection_options(args))
    cli.check_target(case, target)
    cli.check_pieces(case, pieces)
    member = cli.member_arg(case, args.member)
    times = range(case.times.size) if args.time is None else [
        int(args.time) if str(args.time).lstrip("-").isdigit() else args.time]
    times = [case.time_index(t) for t in times]  # checked before the work
    balance_maps = {}
    if args.balance_map:
        from .export import time_tag

        for t in times:
            p = Path(args.balance_map)
            if len(times) > 1:
                p = p.with_name(f"{p.stem}_{time_tag(case.times[t])}{p.suffix}")
            cli.check_output(str(p), args.overwrite, suffixes=(".png", ".pdf", ".svg"),
                             what="balance map", option="--balance-map")
            balance_maps[t] = p
    import pandas as pd

    from .inversion.pieces import format_share
    from .views.styles import lat_label, lon_label

    tables = []
    print(case)
    from .export import CAUTION

    print(f"\n{CAUTION}\n")
    for t in cli.progress(times, desc="invert", unit="time", enabled=None if not args.quiet else False):
        _, table, target_used = analyse(case, t, member, pieces, target, args.reference, balance=args.balance,
                                        floor=args.floor and args.balance == "nonlinear")
        label = str(case.times[t])[:16]
        print(f"{label}  target {lon_label(target_used[0])}, {lat_label(target_used[1])}, {target_used[2]:g} hPa; "
              f"reference {table.attrs['reference'].replace('_', ' ')}; {BALANCE_LABELS[args.balance]}")
        for note in table.attrs.get("notes", []):
            print(f"note: {note}")
        with pd.option_context("display.width", 160, "display.max_columns", 20, "display.precision", 2):
            print(table[["height_anomaly", "wind_speed", "relative_vorticity", "height_share_pct"]].to_string(
                formatters={"relative_vorticity": "{:.2e}".format, "height_share_pct": format_share},
                na_rep=format_share(None)))
        print()
        if args.balance_check:
            bq = print_balance_check(case, t, member, args.reference, args.floor)
            if t in balance_maps:
                from .views import static

                static.save_figure(static.balance_map_figure(bq, args.balance_level, case, member),
                                   balance_maps[t], overwrite=args.overwrite)
                print(f"wrote {balance_maps[t]}")
        tables.append(table.assign(time=label, balance=args.balance).reset_index())
    if args.output:
        from .export import atomic_target, csv_text

        with atomic_target(args.output, overwrite=args.overwrite, what="attribution table") as tmp:
            tmp.write_text(csv_text(pd.concat(tables), index=False))
        print(f"wrote {args.output}")
    return 0

