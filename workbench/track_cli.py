"""``pvwb track``: each piece's share over the case's times with pieces that follow their anomaly.

The computation is :func:`workbench.tracking.tracked_shares`; this module parses the command
line, checks the arguments before the work, prints the table, writes it as CSV and draws the
time-series figure (:func:`workbench.views.tracks.tracked_shares_figure`).
"""
from __future__ import annotations

__all__ = ["main"]


def _target(text):
    from .errors import InputError

    if text is None or text in ("storm", "storm centre", "storm-centre"):
        return None
    if text == "centroid":
        return "centroid"
    try:
        lon, lat, p = (float(x) for x in text.split(","))
    except ValueError:
        raise InputError(f"--target must be 'storm', 'centroid' or lon,lat,hPa (e.g. -30,52,900), got {text!r}") from None
    return lon, lat, p


def main(argv=None) -> int:
    """``pvwb track [CASE] --pieces FILE [--start TIME] [--target storm|centroid|LON,LAT,HPA]
    [--reference R] [--member M] [--region W,E,S,N] [--times SPEC] [-o CSV] [--plot PNG|SVG|PDF]
    [--overwrite] [--quiet]``."""
    import pandas as pd

    from . import cli
    from .analysis import default_case_path, load_pieces
    from .inversion.pieces import format_share
    from .tracking import tracked_shares

    parser = cli.build_parser("pvwb track", "Shares over time of pieces that follow their anomaly.")
    cli.add_case_argument(parser)
    cli.add_selection_options(parser)
    parser.add_argument("--pieces", required=True,
                        help="JSON file with a list of pieces; those with \"follow\": \"anomaly\" are tracked")
    parser.add_argument("--start", default=None,
                        help="time index or ISO time the outlines were drawn at (default: each piece's "
                             "follow_from, else the first time)")
    parser.add_argument("--target", default=None,
                        help="storm (each time's storm centre, default), centroid (each tracked piece's centre) "
                             "or lon,lat,hPa")
    parser.add_argument("--reference", default=None, help="time_mean | area_mean | zonal_mean | PATH")
    parser.add_argument("--member", default=None, help="ensemble member: index or label (default: the first)")
    parser.add_argument("-o", "--output", help="write the table as CSV")
    parser.add_argument("--plot", help="write the time-series figure (.png, .svg or .pdf)")
    cli.add_overwrite_option(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    args = parser.parse_args(argv)
    target = _target(args.target)
    if args.output:
        cli.check_output(args.output, args.overwrite, suffixes=(".csv",), what="table")
    if args.plot:
        cli.check_output(args.plot, args.overwrite, suffixes=(".png", ".svg", ".pdf"), what="figure")
    pieces = load_pieces(args.pieces)
    import workbench as wb

    case = wb.open_case(cli.case_source(args.case) or default_case_path(), **cli.selection_options(args))
    if isinstance(target, tuple):
        cli.check_target(case, target)
    cli.check_pieces(case, pieces)
    member = cli.member_arg(case, args.member)
    start = args.start
    if start is not None and str(start).lstrip("-").isdigit():
        start = int(start)
    if start is not None:
        case.time_index(start)
    table = tracked_shares(case, pieces, target=target, member=member, reference=args.reference, time=start,
                           progress=lambda it: cli.progress(it, desc="track", unit="time",
                                                            enabled=None if not args.quiet else False))
    print(f"tracking rule: {table.attrs['rule']}")
    wide = table.pivot(index="time", columns="piece", values="height_share_pct")[list(dict.fromkeys(table.piece))]
    with pd.option_context("display.width", 200, "display.max_rows", 500, "display.max_columns", 30):
        print("height share (%) at the target:")
        print(wide.to_string(float_format=lambda v: format_share(v), na_rep=format_share(None)))
    for row in table[table.status.isin(["split", "merged", "split+merged", "lost"])].itertuples():
        print(f"note: {row.time} {row.piece}: {row.note}")
    if args.output:
        from .export import atomic_target, csv_text

        with atomic_target(args.output, overwrite=args.overwrite, what="tracked-shares table") as tmp:
            tmp.write_text(csv_text(table, index=False))
        print(f"wrote {args.output}")
    if args.plot:
        from .views.static import save_figure
        from .views.tracks import tracked_shares_figure

        save_figure(tracked_shares_figure(table), args.plot, overwrite=args.overwrite)
        print(f"wrote {args.plot}")
    return 0
