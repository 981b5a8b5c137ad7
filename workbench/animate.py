"""Animated map loops: the map with its overlay over the case's times, as GIF or MP4.

Each frame is a static map (:func:`workbench.views.static.map_data` + ``draw_map``, so a frame
looks exactly like ``map_figure`` of that time, title block and caution included), rendered
to pixels and handed to a matplotlib animation writer: ``PillowWriter`` for ``.gif`` (always
available), ``FFMpegWriter`` for ``.mp4`` when an ``ffmpeg`` program is present (else an
ExportError says to write a GIF). The shading levels are the same in every frame (chosen
from all frames together) unless the settings give levels. Pieces that follow their anomaly
(``Piece.follow == "anomaly"``) are carried to each time with :func:`workbench.tracking.track_pieces`
and their outline at that time is drawn. The file is written atomically
(:func:`workbench.export.atomic_target`).

Command line (``pvwb animate``)::

    pvwb animate CASE -o loop.gif [--field ertel_pv] [--surface 320] [--fps 2] [--times A..B]
        [--pieces FILE --overlay NAME ...] [--overwrite]
"""
from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

import numpy as np

from .errors import ExportError, InputError

__all__ = ["animate_map", "frame_maps", "ffmpeg_available", "main"]

SUFFIXES = (".gif", ".mp4")


def ffmpeg_available() -> bool:
    """True when matplotlib finds an ``ffmpeg`` program (MP4 export)."""
    from matplotlib import animation

    return animation.writers.is_available("ffmpeg")


def frame_maps(case, field="ertel_pv", surface=320.0, *, times=None, member=None, reference=None,
               pieces=None, overlay=None, settings=None, threshold=2.0):
    """``(times, [MapData, ...], settings)``: one map per time with fixed shading levels.

    ``pieces``: the pieces inverted for the overlay (tracked ones carried to each time);
    ``overlay``: names of the pieces whose balanced flow is drawn (default: the visible
    pieces when pieces are given)."""
    from .annotations import Region
    from .session import FigureSettings
    from .views import static

    settings = FigureSettings.from_dict(settings)
    tl = list(range(case.times.size)) if times is None else sorted({case.time_index(t) for t in times})
    if len(tl) < 2:
        raise InputError(f"an animation needs at least two times; the selection has {len(tl)}.")
    tracks = None
    if pieces:
        from .tracking import track_pieces

        tracks = track_pieces(case, pieces, tl, member, reference)
        if overlay is None:
            overlay = [p.name for p in pieces if getattr(p, "visible", True) and p.kind != "remainder"]
    maps = []
    for k, ti in enumerate(tl):
        plist, notes = None, []
        annotations = []
        if tracks is not None:
            plist = []
            for p in pieces:
                step = tracks[p.name][k]
                if step.piece is None:
                    notes.append(f"{p.name}: {step.note.split(':')[0]}")
                    continue
                plist.append(step.piece)
                if p.follow == "anomaly" and step.piece.polygon:
                    annotations.append(Region(polygon=[list(v) for v in step.piece.polygon], label=p.name,
                                              colour="black", linestyle="solid", width=1.5))
        ov = None if overlay is None else [n for n in overlay if plist is None or any(q.name == n for q in plist)]
        md = static.map_data(case, field, surface, time=ti, member=member, reference=reference, pieces=plist,
                             overlay=ov or None, annotations=annotations, settings=settings, threshold=threshold)
        if notes:
            md.extra_title = "; ".join(notes)
        maps.append(md)
    if not settings.levels:
        _, _, _, _, scale, div = static._field_info(maps[0].field, maps[0].field_name)
        values = np.concatenate([np.asarray(m.field.values, dtype=float).ravel() * scale for m in maps])
        levels = static._levels(values, div, maps[0].field_name)
        settings = FigureSettings.from_dict({**settings.to_dict(), "levels": [float(v) for v in levels]})
    return tl, maps, settings


def _render(fig, dpi):
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    canvas.draw()
    return np.asarray(canvas.buffer_rgba())[..., :3].copy()


def animate_map(case, path, field="ertel_pv", surface=320.0, *, times=None, member=None, reference=None,
                pieces=None, overlay=None, settings=None, fps=2.0, dpi=None, overwrite=False,
                progress=None, threshold=2.0) -> Path:
    """Write an animated map loop of ``field`` on ``surface`` over ``times`` (default all) to
    ``path`` (``.gif`` or ``.mp4``); returns the path. ``fps`` frames per second (0.1..30);
    ``dpi`` of the frames (default: the settings' dpi, at most 100 to keep files small);
    ``progress`` an iterable wrapper (e.g. :func:`workbench.cli.progress`) or None."""
    from matplotlib import animation
    from matplotlib.figure import Figure

    from .export import atomic_target
    from .views import static

    path = Path(path).expanduser()
    suffix = path.suffix.lower()
    if suffix not in SUFFIXES:
        raise ExportError(f"animation file {path.name} must end in .gif or .mp4")
    try:
        fps = float(fps)
    except (TypeError, ValueError):
        raise InputError(f"fps {fps!r} must be a number of frames per second (0.1..30)") from None
    if not 0.1 <= fps <= 30:
        raise InputError(f"fps {fps:g} must be between 0.1 and 30 frames per second")
    if suffix == ".mp4" and not ffmpeg_available():
        raise ExportError("MP4 needs the ffmpeg program, which is not installed here; write a .gif instead")
    if path.exists() and not overwrite:
        raise ExportError(f"animation {path} already exists; pass overwrite=True (or --overwrite) to replace it, "
                          "or choose another name")
    tl, maps, fs = frame_maps(case, field, surface, times=times, member=member, reference=reference,
                              pieces=pieces, overlay=overlay, settings=settings, threshold=threshold)
    dpi = int(dpi or min(fs.dpi, 100))
    frames = []
    for md in (maps if progress is None else progress(maps)):
        fig = static.draw_map(md, fs)
        frames.append(_render(fig, dpi))
        del fig
    h = max(f.shape[0] for f in frames)
    w = max(f.shape[1] for f in frames)
    frames = [np.pad(f, ((0, h - f.shape[0]), (0, w - f.shape[1]), (0, 0)), constant_values=255) for f in frames]
    player = Figure(figsize=(w / dpi, h / dpi), dpi=dpi)
    ax = player.add_axes([0, 0, 1, 1])
    ax.set_axis_off()
    image = ax.imshow(frames[0], interpolation="nearest")
    if suffix == ".gif":
        writer = animation.PillowWriter(fps=fps, metadata=dict(comment="PV Workbench map loop"))
    else:
        writer = animation.FFMpegWriter(fps=fps, codec="libx264", extra_args=["-pix_fmt", "yuv420p"],
                                        metadata=dict(comment="PV Workbench map loop"))
    with atomic_target(path, overwrite=overwrite, error=ExportError, what="animation") as tmp:
        # the writers pick the format from the file name: write under the real suffix in a private
        # folder next to the target, then move the bytes into the atomic temporary file
        with tempfile.TemporaryDirectory(dir=path.parent, prefix=".pvwb-anim-") as folder:
            out = Path(folder) / f"loop{suffix}"
            with writer.saving(player, str(out), dpi):
                for f in frames:
                    image.set_data(f)
                    writer.grab_frame()
            shutil.copyfile(out, tmp)
    return path


def main(argv=None) -> int:
    """``pvwb animate [CASE] -o FILE.gif|.mp4 [--field F] [--surface S] [--fps N] [--times SPEC]
    [--region W,E,S,N] [--member M] [--pieces FILE] [--overlay NAME ...] [--dpi N] [--overwrite]
    [--quiet]``: arguments checked before the work, one-line errors."""
    from . import cli
    from .analysis import default_case_path, load_pieces

    parser = cli.build_parser("pvwb animate", "An animated map loop (GIF, or MP4 when ffmpeg is present).")
    cli.add_case_argument(parser)
    cli.add_selection_options(parser)
    parser.add_argument("-o", "--output", required=True, help="the loop file: .gif (or .mp4 with ffmpeg)")
    parser.add_argument("--field", default="ertel_pv", help="map field (a Case.MAP_FIELDS name; default ertel_pv)")
    parser.add_argument("--surface", default="320",
                        help="theta in K, 'tropopause' or e.g. '500hPa' (default 320)")
    parser.add_argument("--fps", type=cli.positive_number("--fps"), default=2.0, help="frames per second (default 2)")
    parser.add_argument("--dpi", type=cli.count(30, 300, "--dpi"), default=None, help="frame resolution (30..300)")
    parser.add_argument("--member", default=None, help="ensemble member: index or label (default: the first)")
    parser.add_argument("--pieces", default=None, help="JSON file with a list of pieces (their overlay is drawn)")
    parser.add_argument("--overlay", nargs="+", default=None, metavar="NAME",
                        help="pieces whose balanced flow is drawn (default: the visible pieces)")
    cli.add_overwrite_option(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    args = parser.parse_args(argv)
    cli.check_output(args.output, args.overwrite, suffixes=SUFFIXES, what="animation")
    if not 0.1 <= args.fps <= 30:
        raise InputError(f"--fps {args.fps:g} must be between 0.1 and 30")
    if Path(args.output).suffix.lower() == ".mp4" and not ffmpeg_available():
        raise ExportError("MP4 needs the ffmpeg program, which is not installed here; write a .gif instead")
    pieces = load_pieces(args.pieces) if args.pieces else None
    if args.overlay and not pieces:
        raise InputError("--overlay names pieces: give them with --pieces FILE")
    import workbench as wb

    case = wb.open_case(cli.case_source(args.case) or default_case_path(), **cli.selection_options(args))
    cli.check_pieces(case, pieces)
    if args.overlay:
        names = {p.name for p in pieces}
        unknown = [n for n in args.overlay if n not in names]
        if unknown:
            raise InputError(f"--overlay {', '.join(unknown)}: no such piece in {args.pieces}")
    member = args.member
    if member is not None and str(member).isdigit():
        member = int(member)
    case.member_index(member)
    surface = _surface(args.surface)
    case.map_field(args.field, surface, time=0, member=member)  # field and surface checked before the loop
    path = animate_map(case, args.output, args.field, surface, member=member, pieces=pieces, overlay=args.overlay,
                       fps=args.fps, dpi=args.dpi, overwrite=args.overwrite,
                       progress=lambda it: cli.progress(it, desc="frames", unit="frame",
                                                        enabled=None if not args.quiet else False))
    print(f"wrote {path} ({case.times.size} frames at {args.fps:g} per second)")
    return 0


def _surface(text):
    """'320' -> 320.0 (theta K); 'tropopause' and '500hPa' as they are."""
    try:
        return float(text)
    except ValueError:
        return str(text)
