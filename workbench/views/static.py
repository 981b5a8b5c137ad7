"""Static figures (matplotlib + cartopy): maps and cross-sections for briefings.

The figures read prepared data and draw; they compute no physics. Data come
from :meth:`Case.map_field` (maps), :func:`workbench.sections.cross_section`
(sections) and :meth:`Case.inversion` (balanced flow of pieces). The two steps
are separate so that a figure's content can be checked by data:

* :func:`map_data` / :func:`section_data` gather the arrays into a
  :class:`MapData` / :class:`SectionData`;
* :func:`draw_map` / :func:`draw_section` draw them;
* :func:`map_figure` / :func:`section_figure` do both, from a State, a Case
  or a plain 2-D DataArray;
* :func:`save_figure` writes PNG/SVG/PDF atomically and never overwrites
  silently.

Every figure carries a title block (case, valid time, surface or section
end points, data source) and the caution line.

Map data offline: cartopy is pointed at Debian's ``/usr/share/cartopy/data``
(``pre_existing_data_dir``) and its downloaders are disabled, so nothing is
ever fetched. The coastline is read directly from the finest shapefile found
there (GSHHS or Natural Earth); when none exists the map is drawn without
coastlines and says so.
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import matplotlib
import matplotlib.text
import matplotlib.ticker
import numpy as np
import xarray as xr
from matplotlib import colors as mcolors
from matplotlib.figure import Figure  # figures are built without pyplot: no GUI backend needed

import cartopy
import cartopy.crs as ccrs

import workbench.annotations as ann
from workbench.errors import ExportError, InputError
from workbench.export import CAUTION, atomic_target, invented_label, package_version
from workbench.views.styles import (HEIGHT_NEGATIVE, HEIGHT_POSITIVE, OMEGA_ASCENT, OMEGA_COLOURS,
                                    OMEGA_DESCENT, height_key, lat_label, lon_label, omega_key)
from workbench.views.fields import FIELDS
from workbench.session import PROJECTIONS, FigureSettings

__all__ = [
    "balance_map_figure",
    "CAUTION",
    "FigureSettings",
    "PROJECTIONS",
    "MapData",
    "SectionData",
    "Overlay",
    "COLOUR_MAPS",
    "colour_map",
    "coastline_source",
    "map_data",
    "draw_map",
    "map_figure",
    "section_data",
    "draw_section",
    "section_figure",
    "save_figure",
    "figure_text",
]

# --------------------------------------------------------------------------- offline cartopy

DEBIAN_CARTOPY_DATA = "/usr/share/cartopy/data"


def _configure_cartopy_offline() -> None:
    """Point cartopy at the system's map data and make every downloader refuse to fetch."""
    pre = str(cartopy.config.get("pre_existing_data_dir", "") or "")
    if pre in ("", ".") and os.path.isdir(DEBIAN_CARTOPY_DATA):
        cartopy.config["pre_existing_data_dir"] = DEBIAN_CARTOPY_DATA

    def _refuse(target_path, format_dict, _name=None):
        raise OSError(
            f"map data {target_path} is not on this machine and PV Workbench never downloads "
            f"map data; install it under {cartopy.config['pre_existing_data_dir']}"
        )

    for downloader in list(cartopy.config.get("downloaders", {}).values()):
        downloader.acquire_resource = _refuse


_configure_cartopy_offline()

# (label, path relative to a cartopy data folder), finest first.
_COASTLINES = (
    ("GSHHS full resolution", "shapefiles/gshhs/f/GSHHS_f_L1.shp"),
    ("GSHHS high resolution", "shapefiles/gshhs/h/GSHHS_h_L1.shp"),
    ("GSHHS intermediate resolution", "shapefiles/gshhs/i/GSHHS_i_L1.shp"),
    ("Natural Earth 1:10m", "shapefiles/natural_earth/physical/ne_10m_coastline.shp"),
    ("GSHHS low resolution", "shapefiles/gshhs/l/GSHHS_l_L1.shp"),
    ("Natural Earth 1:50m", "shapefiles/natural_earth/physical/ne_50m_coastline.shp"),
    ("GSHHS crude resolution", "shapefiles/gshhs/c/GSHHS_c_L1.shp"),
    ("Natural Earth 1:110m", "shapefiles/natural_earth/physical/ne_110m_coastline.shp"),
)
_COAST_CACHE: dict[str, list] = {}


def coastline_source(folders: Sequence[str] | None = None) -> tuple[str, Path] | None:
    """The finest coastline shapefile on this machine as ``(label, path)``, or None.

    ``folders`` defaults to cartopy's pre-existing data folder, its data folder and
    the folder shipped inside cartopy; nothing is downloaded.
    """
    if folders is None:
        folders = [
            str(cartopy.config.get(k, ""))
            for k in ("pre_existing_data_dir", "data_dir", "repo_data_dir")
        ]
    roots = [Path(f) for f in folders if f and f != "."]
    for label, rel in _COASTLINES:
        for root in roots:
            p = root / rel
            if p.is_file() and p.with_suffix(".shx").is_file() and p.with_suffix(".dbf").is_file():
                return label, p
    return None


def _coastline_geometries(path: Path):
    key = str(path)
    if key not in _COAST_CACHE:
        import logging

        from cartopy.io import shapereader

        # pyshp logs a notice for a few GSHHS rings stored as holes only; we draw outlines, so
        # the coastline drawn is the same either way
        log = logging.getLogger("shapefile")
        level = log.level
        log.setLevel(logging.ERROR)
        try:
            _COAST_CACHE[key] = list(shapereader.Reader(str(path)).geometries())
        finally:
            log.setLevel(level)
    return _COAST_CACHE[key]


# --------------------------------------------------------------------------- colour maps


def _sub(cmap, lo, hi, name, reverse=False):
    x = np.linspace(lo, hi, 256)
    if reverse:
        x = x[::-1]
    return mcolors.ListedColormap(cmap(x), name=name)


def _build_colour_maps() -> dict[str, mcolors.Colormap]:
    """Sequential maps have monotonic lightness, the diverging one a light centre;
    all stay on the blue-yellow axis that colour-blind readers keep."""
    import colorcet  # noqa: F401  (registers the cet_* maps)

    reg = matplotlib.colormaps
    return {
        # light yellow (tropospheric PV) to deep blue (stratospheric PV), no black end
        "pv": _sub(reg["cet_CET_CBL2"], 0.30, 1.0, "workbench_pv", reverse=True),
        # blue (negative) - near white - ochre (positive)
        "anomaly": _sub(reg["cet_CET_CBD1"], 0.0, 1.0, "workbench_anomaly"),
        # dark blue to yellow
        "theta": _sub(reg["cividis"], 0.0, 1.0, "workbench_theta"),
        # calm light to strong dark olive
        "speed": _sub(reg["cet_CET_CBL4"], 0.25, 1.0, "workbench_speed", reverse=True),
        "height": _sub(reg["cividis"], 0.05, 0.95, "workbench_height"),
        "pressure": _sub(reg["cividis"], 0.0, 1.0, "workbench_pressure", reverse=True),
    }


COLOUR_MAPS: dict[str, mcolors.Colormap] = _build_colour_maps()

#: field -> (colour map key, label, display units, diverging), from views.fields
_FIELDS: dict[str, tuple[str, str, str, bool]] = {
    f: (st.cmap, st.label, st.units, st.diverging) for f, st in FIELDS.items()}


def colour_map(name_or_field: str) -> mcolors.Colormap:
    """The colour map for a field name (see :data:`_FIELDS`) or a key of COLOUR_MAPS."""
    if name_or_field in COLOUR_MAPS:
        return COLOUR_MAPS[name_or_field]
    if name_or_field in _FIELDS:
        return COLOUR_MAPS[_FIELDS[name_or_field][0]]
    try:
        return matplotlib.colormaps[name_or_field]
    except KeyError:
        raise InputError(
            f"colour map {name_or_field!r} is unknown; use one of {', '.join(COLOUR_MAPS)} "
            "or a matplotlib colour map name"
        ) from None


def _field_info(da: xr.DataArray, field: str | None):
    """(field, colour-map key, label, display units, scale to display units, diverging).

    Pressure stored in Pa is shown in hPa (a unit change only)."""
    field = field or da.attrs.get("field") or da.name
    units = str(da.attrs.get("units", ""))
    if field in _FIELDS:
        key, label, _, div = _FIELDS[field]
    else:
        label = str(da.attrs.get("long_name", field or "field"))
        div = bool(field and "anomaly" in str(field))
        key = "anomaly" if div else "theta"
    scale = 1.0
    if units == "Pa":
        scale, units = 0.01, "hPa"
    return field, key, label, units, scale, div


def _nice_step(span: float, n: int = 12) -> float:
    if not np.isfinite(span) or span <= 0:
        return 1.0
    raw = span / n
    mag = 10 ** math.floor(math.log10(raw))
    for m in (1, 2, 2.5, 5, 10):
        if m * mag >= raw:
            return m * mag
    return 10 * mag


def _levels(values: np.ndarray, diverging: bool, field: str | None, n: int = 14):
    v = values[np.isfinite(values)]
    if v.size == 0:
        return np.linspace(-1, 1, 11) if diverging else np.linspace(0, 1, 11)
    if field == "ertel_pv":
        top = max(2.0, float(np.nanpercentile(v, 99)))
        top = min(top, 12.0)
        step = 0.5 if top <= 8 else 1.0
        return np.arange(0.0, top + step, step)
    if diverging:
        m = float(np.nanpercentile(np.abs(v), 99))
        if m == 0:
            m = 1.0
        step = _nice_step(2 * m, n)
        k = max(1, math.ceil(m / step))
        return np.arange(-k, k + 1) * step
    lo, hi = np.nanpercentile(v, [1, 99])
    if hi <= lo:
        hi = lo + 1.0
    step = _nice_step(hi - lo, n)
    return np.arange(math.floor(lo / step) * step, hi + step, step)


# --------------------------------------------------------------------------- settings


# --------------------------------------------------------------------------- data containers


@dataclass
class Overlay:
    """Balanced flow of one piece at one level: wind vectors and height-anomaly contours."""

    name: str
    colour: str
    u: xr.DataArray
    v: xr.DataArray
    height_anomaly: xr.DataArray
    level_hpa: float


@dataclass
class MapData:
    """Everything a map shows (arrays plus the title block)."""

    field: xr.DataArray  # 2-D (latitude, longitude)
    field_name: str
    surface: str
    native_crs: str | None = None  # WKT of the data's own projection (projected model grids)
    contour: xr.DataArray | None = None
    contour_name: str | None = None
    overlays: list = field(default_factory=list)
    annotations: list = field(default_factory=list)
    case_name: str = ""
    valid_time: str = ""
    member: str | None = None
    source: str = ""
    checksum: str | None = None
    invented: str | None = None
    extra_title: str | None = None
    target: tuple | None = None  # (lon, lat[, pressure hPa]) of the attribution target

    def arrays(self) -> dict[str, np.ndarray]:
        """The numeric content (for comparing figures by data)."""
        out = {"field": np.asarray(self.field.values)}
        if self.contour is not None:
            out["contour"] = np.asarray(self.contour.values)
        for o in self.overlays:
            out[f"{o.name}.u"] = np.asarray(o.u.values)
            out[f"{o.name}.v"] = np.asarray(o.v.values)
            out[f"{o.name}.height_anomaly"] = np.asarray(o.height_anomaly.values)
        return out


@dataclass
class SectionData:
    """Everything a cross-section shows."""

    section: xr.Dataset  # from workbench.sections.cross_section
    key: str  # "0" or the section's name: annotations in space "section:<key>" are drawn
    overlays: list = field(default_factory=list)  # (piece name, colour)
    annotations: list = field(default_factory=list)
    case_name: str = ""
    valid_time: str = ""
    member: str | None = None
    source: str = ""
    checksum: str | None = None
    invented: str | None = None
    threshold: float = 2.0
    omega_pieces: list | None = None  # pieces whose own QG omega (piece_qg_omega) is drawn
    name: str = ""  # the section line's name, shown in the title

    def arrays(self) -> dict[str, np.ndarray]:
        return {k: np.asarray(v.values) for k, v in self.section.data_vars.items()}


# --------------------------------------------------------------------------- gathering data

_PALETTE_CYCLE = ("vermilion", "blue", "green", "purple", "orange", "sky", "black")


def _piece_colour(piece, k: int) -> str:
    c = getattr(piece, "colour", None) if not isinstance(piece, str) else None
    if c:
        try:
            return ann.resolve_colour(c)
        except Exception:
            if mcolors.is_color_like(c):
                return c
    return ann.PALETTE[_PALETTE_CYCLE[k % len(_PALETTE_CYCLE)]]


def _time_label(case, time) -> str:
    if case is None:
        return ""
    t = case.times[case.time_index(time)]
    return np.datetime_as_string(np.datetime64(t, "m"), unit="m").replace("T", " ") + " UTC"


def _native_crs(case):
    data = getattr(case, "data", None)
    return None if data is None else data.attrs.get("native_crs") or None


def _case_meta(case, time, member) -> dict[str, Any]:
    if case is None:
        return dict(case_name="", valid_time="", member=None, source="", checksum=None,
                    invented=None)
    mem = None
    if getattr(case, "members", None) is not None:
        mem = str(case.members[case.member_index(member)])
    return dict(
        case_name=str(case.name),
        valid_time=_time_label(case, time),
        member=mem,
        source=str(case.source),
        checksum=getattr(case, "checksum", None),
        invented=invented_label(case),
    )


def _overlays(case, pieces, overlay, time, member, reference, level_hpa, results=None):
    """Overlay objects for the pieces named in ``overlay`` (balanced flow at ``level_hpa``)."""
    if not overlay:
        return []
    if results is None:
        if case is None or not pieces:
            raise InputError(
                "a balanced-flow overlay needs a case and its pieces (or the inversion results)"
            )
        kw = {} if reference is None else {"reference": reference}
        results = case.inversion(list(pieces), time=time, member=member, **kw)
    by_name = {getattr(p, "name", str(p)): p for p in (pieces or [])}
    out = []
    for k, name in enumerate(overlay):
        name = getattr(name, "name", name)
        if name not in results:
            raise InputError(
                f"piece {name!r} has no balanced flow; pieces inverted: {', '.join(results)}"
            )
        ds = results[name]
        lev = ds["pressure"].values
        kk = int(np.argmin(np.abs(lev - level_hpa * 100.0)))
        at = ds.isel(pressure=kk)
        out.append(Overlay(
            name=str(name),
            colour=_piece_colour(by_name.get(name, name), k),
            u=at["u"], v=at["v"], height_anomaly=at["height_anomaly"],
            level_hpa=float(lev[kk]) / 100.0,
        ))
    return out


def _surface_label(surface, threshold: float = 2.0) -> str:
    """A phrase for titles: 'on the 320 K isentropic surface', 'on the dynamic tropopause
    (2 PVU)', 'at 500 hPa' (or the text given)."""
    if surface is None or surface == "":
        return ""
    if isinstance(surface, (int, float, np.integer, np.floating)):
        return f"on the {float(surface):g} K isentropic surface"
    s = str(surface).strip()
    low = s.lower().replace(" ", "")
    if low in ("tropopause", "dynamic_tropopause", "dynamictropopause"):
        return f"on the dynamic tropopause ({threshold:g} PVU)"
    if low.endswith("hpa"):
        try:
            return f"at {float(low[:-3]):g} hPa"
        except ValueError:
            pass
    if low.endswith("k"):
        try:
            return f"on the {float(low[:-1]):g} K isentropic surface"
        except ValueError:
            pass
    return s if s.startswith(("on ", "at ")) else f"on {s}"


def map_data(
    case,
    field: str = "ertel_pv",
    surface: Any = 320.0,
    *,
    time=None,
    member=None,
    reference=None,
    pieces=None,
    overlay=None,
    annotations=None,
    settings: FigureSettings | dict | None = None,
    results=None,
    threshold: float = 2.0,
    overlays: list | None = None,
    target=None,
) -> MapData:
    """Gather what a map shows from a Case (no drawing).

    ``field``/``surface`` as for :meth:`Case.map_field`; ``pieces`` the list of
    pieces to invert and ``overlay`` the names (or pieces) whose balanced flow
    is drawn at ``settings.overlay_level_hpa``, one overlay per piece;
    ``overlays`` prepared :class:`Overlay` objects drawn as well (e.g. a State's
    summed overlay); ``annotations`` a list of annotation objects (map-space
    ones are drawn).
    """
    settings = FigureSettings.from_dict(settings)
    kw = {} if reference is None else {"reference": reference}
    da = case.map_field(field, surface, time=time, member=member, threshold=threshold, **kw)
    contour = None
    if settings.contour_field:
        contour = case.map_field(settings.contour_field, surface, time=time, member=member,
                                 threshold=threshold, **kw)
    label = _surface_label(surface, threshold)
    return MapData(
        field=da,
        field_name=field,
        surface=str(label),
        contour=contour,
        contour_name=settings.contour_field,
        overlays=list(overlays or []) + _overlays(case, pieces, overlay, time, member, reference,
                                                  settings.overlay_level_hpa, results),
        annotations=ann.in_space(annotations, "map"),
        target=None if target is None else tuple(float(x) for x in target),
        native_crs=_native_crs(case),
        **_case_meta(case, time, member),
    )


# --------------------------------------------------------------------------- drawing helpers


def native_projection(wkt: str | None):
    """The cartopy projection of a case's own grid (``case.data.attrs["native_crs"]``, WKT), or
    None for latitude-longitude data."""
    if not wkt:
        return None
    import pyproj

    crs = pyproj.CRS.from_wkt(wkt)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p4 = crs.to_dict()
    ell = crs.ellipsoid
    globe = ccrs.Globe(semimajor_axis=ell.semi_major_metre, semiminor_axis=ell.semi_minor_metre,
                       ellipse=None) if ell is not None else None
    kind, g = p4.get("proj"), lambda k, d=0.0: float(p4.get(k, d))
    if kind == "ob_tran":  # rotated pole
        return ccrs.RotatedPole(pole_longitude=g("lon_0") + 180.0, pole_latitude=g("o_lat_p", 90.0),
                                central_rotated_longitude=g("o_lon_p"), globe=globe)
    if kind == "lcc":
        return ccrs.LambertConformal(central_longitude=g("lon_0"), central_latitude=g("lat_0"),
                                     standard_parallels=(g("lat_1"), g("lat_2", g("lat_1"))), globe=globe)
    if kind == "stere":
        return ccrs.Stereographic(central_latitude=g("lat_0", 90.0), central_longitude=g("lon_0"),
                                  true_scale_latitude=p4.get("lat_ts"), globe=globe)
    if kind == "merc":
        return ccrs.Mercator(central_longitude=g("lon_0"), latitude_true_scale=g("lat_ts"), globe=globe)
    return None  # a projection cartopy has no class for here: drawn on latitude-longitude


def _projection(settings: FigureSettings, lon0: float, lat_min: float, lat_max: float, native_crs=None):
    if settings.projection == "native":
        proj = native_projection(native_crs)
        return proj if proj is not None else ccrs.PlateCarree(central_longitude=lon0)
    if settings.projection == "plate_carree":
        return ccrs.PlateCarree(central_longitude=lon0)
    if settings.projection == "lambert_conformal":
        span = lat_max - lat_min
        # standard parallels a sixth of the span inside the edges (common practice)
        par = (lat_min + span / 6.0, lat_max - span / 6.0)
        if lat_min < 0 < lat_max or par[0] == -par[1]:
            par = (max(lat_min, 5.0), max(lat_max, 10.0))
        return ccrs.LambertConformal(central_longitude=lon0,
                                     central_latitude=0.5 * (lat_min + lat_max),
                                     standard_parallels=par)
    if settings.projection == "stereographic":
        return ccrs.Stereographic(central_latitude=90.0 if lat_max + lat_min >= 0 else -90.0,
                                  central_longitude=lon0)
    return ccrs.Mercator(central_longitude=lon0)


def _title_lines(meta, what: str, extra: str | None = None) -> tuple[str, str, str]:
    name = meta.case_name or "(unnamed data)"
    if meta.invented and "invented" not in name.lower():
        name = f"{name}  [INVENTED CASE]"
    line2 = what
    if meta.valid_time:
        line2 += f"  |  valid {meta.valid_time}"
    if meta.member is not None:
        line2 += f"  |  member {meta.member}"
    src = os.path.basename(meta.source) if meta.source and meta.source != "<in-memory>" else (
        meta.source or "in-memory data")
    line3 = f"Data: {src}"
    if meta.checksum:
        line3 += f" (sha256 {meta.checksum[:12]})"
    if extra:
        line3 += f"  |  {extra}"
    line3 += f"  |  PV Workbench {package_version()}"
    return name, line2, line3


_TOP_IN = 1.05  # title block height (inches)
_BOTTOM_IN = 1.0  # axis labels + caution (inches)


def _title_block(fig: Figure, lines: tuple[str, str, str]) -> None:
    h = fig.get_figheight()
    y = lambda inch: 1.0 - inch / h  # noqa: E731  (inches from the top edge)
    avail = 0.96 * fig.get_figwidth() * 72.0  # points

    def fit(text, size, per_char=0.55):  # smaller type for a line too long for the figure
        return max(6.0, min(size, avail / max(1.0, per_char * len(text))))

    fig.text(0.02, y(0.12), lines[0], ha="left", va="top", fontsize=fit(lines[0], 13, 0.62),
             fontweight="bold")
    fig.text(0.02, y(0.42), lines[1], ha="left", va="top", fontsize=fit(lines[1], 10.5))
    fig.text(0.02, y(0.68), lines[2], ha="left", va="top", fontsize=fit(lines[2], 8.5),
             color="#333333")


def _caution(fig: Figure, note: str | None = None, invented: str | None = None) -> None:
    h = fig.get_figheight()
    text = CAUTION
    if invented:
        text = f"{invented} {text}"
    fig.text(0.5, 0.08 / h, text, ha="center", va="bottom", fontsize=7.5, wrap=True,
             bbox=dict(boxstyle="round,pad=0.35", fc="#fff8dc", ec="#8a6d00", lw=0.8))
    if note:
        fig.text(0.98, 0.42 / h, note, ha="right", va="bottom", fontsize=7, color="#555555",
                 style="italic")


def figure_text(fig: Figure) -> str:
    """All text drawn on a figure (title block, labels, caution), for checks."""
    parts = [t.get_text() for t in fig.findobj(matplotlib.text.Text)]
    return "\n".join(p for p in parts if p)


def _draw_annotations_geo(ax, items, transform):
    for a in items:
        if isinstance(a, ann.Label):
            ax.text(a.lon, a.lat, a.text, transform=transform, color=a.colour, fontsize=a.size,
                    fontweight=a.weight, ha="center", va="center", zorder=8,
                    bbox=dict(boxstyle="round,pad=0.2", fc="white", ec=a.colour, lw=0.8,
                              alpha=0.85) if a.box else None)
        elif isinstance(a, ann.Arrow):
            tr = transform._as_mpl_transform(ax)
            ax.annotate(a.text or "", xy=(a.end_lon, a.end_lat), xytext=(a.start_lon, a.start_lat),
                        xycoords=tr, textcoords=tr, color=a.colour, fontsize=a.size,
                        fontweight="bold", ha="center", va="center", zorder=8,
                        arrowprops=dict(arrowstyle="-|>", color=a.colour, lw=a.width,
                                        shrinkA=6 if a.text else 0, shrinkB=0))
        elif isinstance(a, ann.Region):
            from shapely.geometry import Polygon

            poly = Polygon(a.polygon)
            ax.add_geometries([poly], crs=transform, facecolor="none",
                              edgecolor=a.colour, linewidth=a.width, linestyle=a.linestyle,
                              zorder=7)
            if a.fill:
                ax.add_geometries([poly], crs=transform, facecolor=a.fill, edgecolor="none",
                                  alpha=a.alpha, zorder=6)
            if a.label:
                cx, cy = a.centroid()
                ax.text(cx, cy, a.label, transform=transform, color=a.colour, fontsize=10,
                        fontweight="bold", ha="center", va="center", zorder=8,
                        bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="none", alpha=0.75))


def _draw_annotations_section(ax, items):
    for a in items:
        if isinstance(a, ann.SectionLabel):
            ax.text(a.distance_km, a.pressure_hpa, a.text, color=a.colour, fontsize=a.size,
                    fontweight=a.weight, ha="center", va="center", zorder=8,
                    bbox=dict(boxstyle="round,pad=0.2", fc="white", ec=a.colour, lw=0.8,
                              alpha=0.85) if a.box else None)
        elif isinstance(a, ann.SectionArrow):
            ax.annotate(a.text or "", xy=(a.end_distance_km, a.end_pressure_hpa),
                        xytext=(a.start_distance_km, a.start_pressure_hpa), color=a.colour,
                        fontsize=a.size, fontweight="bold", ha="center", va="center", zorder=8,
                        arrowprops=dict(arrowstyle="-|>", color=a.colour, lw=a.width,
                                        shrinkA=6 if a.text else 0, shrinkB=0))
        elif isinstance(a, ann.SectionRegion):
            from matplotlib.patches import Polygon as MPolygon

            if a.fill:
                ax.add_patch(MPolygon(a.polygon, closed=True, fc=a.fill, ec="none",
                                      alpha=a.alpha, zorder=6))
            ax.add_patch(MPolygon(a.polygon, closed=True, fc="none", ec=a.colour, lw=a.width,
                                  ls=a.linestyle, zorder=7))
            if a.label:
                cx, cy = a.centroid()
                ax.text(cx, cy, a.label, color=a.colour, fontsize=10, fontweight="bold",
                        ha="center", va="center", zorder=8,
                        bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="none", alpha=0.75))


def _contour_step(values) -> float:
    v = np.abs(np.asarray(values, float))
    v = v[np.isfinite(v)]
    m = float(v.max()) if v.size else 0.0
    return _nice_step(2 * m, 10) if m > 0 else 0.0


#: Below these magnitudes an overlay field is not contoured (it would draw round-off).
NEGLIGIBLE = {"wind": 0.05, "height": 0.1, "omega": 1e-3}  # m s-1, m, Pa s-1


def _symmetric_levels(values, n=10, floor: float = 0.0):
    """Contour levels symmetric about zero (zero left out), or (None, 0) when the field's
    largest magnitude is at most ``floor``."""
    v = np.abs(np.asarray(values, float))
    if not np.isfinite(v).any() or float(np.nanmax(v)) <= floor:
        return None, 0.0
    step = _contour_step(values)
    if step == 0:
        return None, 0.0
    v = np.abs(np.asarray(values, float))
    m = float(np.nanmax(v))
    k = max(1, math.ceil(m / step))
    levels = [x * step for x in range(-k, k + 1) if x != 0]
    return levels, step


# --------------------------------------------------------------------------- maps


def draw_map(data: MapData, settings: FigureSettings | dict | None = None,
             page_size: tuple[float, float] | None = None) -> Figure:
    """Draw a :class:`MapData` on a new figure (the title block and caution included).

    The figure is ``settings.width_in`` wide and as tall as the map's shape needs;
    with ``page_size`` (inches) the figure has that size and the map is fitted in."""
    settings = FigureSettings.from_dict(settings)
    da = data.field
    if set(da.dims) != {"latitude", "longitude"}:
        raise InputError(
            f"map field {data.field_name!r} must be 2-D on (latitude, longitude), has {da.dims}"
        )
    da = da.transpose("latitude", "longitude")
    lat = np.asarray(da["latitude"].values, float)
    lon = np.asarray(da["longitude"].values, float)
    field_name, key, label, units, scale, div = _field_info(da, data.field_name)
    values = np.asarray(da.values, float) * scale

    # Hemispheric and global grids. A grid whose longitudes go once round the globe is closed
    # at its seam (cartopy.util.add_cyclic_point: the first column repeated 360 degrees on),
    # else the map has a gap there. A conic projection cannot show a whole latitude circle:
    # such a domain is drawn in polar stereographic. Where the projection makes the pole a
    # point, a pole row is left out of the contouring (its cells are degenerate polygons).
    dlon = np.diff(lon)
    periodic = bool(lon.size > 2 and np.allclose(dlon, dlon[0], rtol=1e-4)
                    and abs(lon[-1] - lon[0] + dlon[0] - 360.0) < 0.01 * abs(dlon[0]))
    lon0 = 0.5 * (lon.min() + lon.max()) if not periodic else lon[0] + 180.0
    proj_note = None
    if periodic and settings.projection == "lambert_conformal":
        proj = ccrs.Stereographic(central_latitude=90.0 if lat.max() + lat.min() >= 0 else -90.0,
                                  central_longitude=lon0)
        proj_note = "whole latitude circles: polar stereographic instead of Lambert conformal"
    else:
        proj = _projection(settings, lon0, lat.min(), lat.max(), getattr(data, "native_crs", None))
    rows = np.ones(lat.size, bool)
    if not isinstance(proj, (ccrs.PlateCarree, ccrs.Mercator)):
        rows = np.abs(lat) < 90.0 - 1e-6

    def closed(arr):
        """``arr`` (latitude, longitude) as contoured: pole row dropped, seam closed."""
        arr = np.asarray(arr)[rows]
        if periodic:
            from cartopy.util import add_cyclic_point

            arr = add_cyclic_point(arr, axis=-1)
        return arr

    lat_c = lat[rows]
    lon_c = np.append(lon, lon[-1] + dlon[0]) if periodic else lon
    data_crs = ccrs.PlateCarree()
    width = page_size[0] if page_size else settings.width_in
    fig = Figure(figsize=(width, page_size[1] if page_size else settings.height_in),
                 dpi=settings.dpi)
    ax = fig.add_axes([0.06, 0.1, 0.78, 0.7], projection=proj)
    ax.set_extent([lon_c.min(), lon_c.max(), lat.min(), lat.max()], crs=data_crs)
    # size the figure to the map's shape: title block above, labels and caution below
    x0, x1, y0, y1 = ax.get_extent(crs=proj)
    aspect = (y1 - y0) / (x1 - x0)
    map_w = 0.78 * width
    map_h = float(np.clip(map_w * aspect, 2.0, 3.0 * width))
    if page_size:
        height = page_size[1]
        avail = height - _TOP_IN - _BOTTOM_IN - 0.25
        if map_h > avail:
            map_h = avail
            map_w = map_h / aspect
    else:
        height = map_h + _TOP_IN + _BOTTOM_IN + 0.25
        fig.set_size_inches(width, height)
    bottom = (_BOTTOM_IN + 0.2) / height
    if page_size:  # centre the map in the space left between title block and caution
        bottom += 0.5 * max(0.0, height - _TOP_IN - _BOTTOM_IN - 0.25 - map_h) / height
    ax.set_position([0.06, bottom, map_w / width, map_h / height])
    cmap = colour_map(settings.colour_map) if settings.colour_map else COLOUR_MAPS[key]
    levels = np.asarray(settings.levels) if settings.levels else _levels(values, div, field_name)
    extend = "both" if div else "max" if field_name == "ertel_pv" else "both"
    cf = ax.contourf(lon_c, lat_c, closed(values), levels=levels, cmap=cmap, extend=extend,
                     transform=data_crs, zorder=1)
    cax = fig.add_axes([0.06 + map_w / width + 0.03, bottom + 0.05 * map_h / height, 0.022,
                        0.9 * map_h / height])
    cb = fig.colorbar(cf, cax=cax)
    cb.set_label(f"{label} ({units})" if units else label)

    notes = [proj_note] if proj_note else []
    if field_name == "ertel_pv" and settings.pv_contour is not None:
        sgn = -1.0 if lat.max() <= 0 else 1.0
        ax.contour(lon_c, lat_c, closed(values), levels=[sgn * settings.pv_contour], colors="black",
                   linewidths=2.2, transform=data_crs, zorder=3)
        notes.append(f"thick black line: {settings.pv_contour:g} PVU")
    if data.contour is not None:
        c = data.contour.transpose("latitude", "longitude")
        cname, _, clabel, cunits, cscale, _ = _field_info(c, data.contour_name)
        cv = np.asarray(c.values, float) * cscale
        clev = _levels(cv, False, None, n=10)
        cs = ax.contour(lon_c, lat_c, closed(cv), levels=clev, colors="#222222", linewidths=0.8,
                        transform=data_crs, zorder=3)
        ax.clabel(cs, fmt="%g", fontsize=7)
        notes.append(f"black contours: {clabel} ({cunits})")

    # balanced-flow overlays
    handles = []
    from matplotlib.lines import Line2D

    for o in data.overlays:
        u = np.asarray(o.u.transpose("latitude", "longitude").values, float)
        v = np.asarray(o.v.transpose("latitude", "longitude").values, float)
        z = np.asarray(o.height_anomaly.transpose("latitude", "longitude").values, float)
        zlev, zstep = _symmetric_levels(z, floor=NEGLIGIBLE["height"])
        if zlev:
            # signs drawn as in the page (views.styles): orange solid positive, purple dashed negative
            sty = [HEIGHT_NEGATIVE if x < 0 else HEIGHT_POSITIVE for x in zlev]
            cs = ax.contour(lon_c, lat_c, closed(z), levels=zlev, colors=[t["colour"] for t in sty],
                            linewidths=[0.7 * t["width"] for t in sty],
                            linestyles=[t["dash"] for t in sty], transform=data_crs, zorder=4)
            ax.clabel(cs, fmt="%g", fontsize=7)
        sy = max(1, lat.size // settings.vector_spacing)
        sx = max(1, lon.size // settings.vector_spacing)
        spd = np.hypot(u, v)
        ref = _nice_step(float(np.nanpercentile(spd, 95)) * 2 if np.isfinite(spd).any() else 1.0, 2)
        u, v = u[rows], v[rows]  # no arrows at a pole drawn as a point (no direction there)
        q = ax.quiver(lon[::sx], lat_c[::sy], u[::sy, ::sx], v[::sy, ::sx], color=o.colour,
                      transform=data_crs, zorder=5, width=0.0025, scale=ref * 25,
                      edgecolor="white", linewidth=0.3)
        ax.quiverkey(q, 0.98, 1.03 + 0.04 * len(handles), ref, f"{ref:g} m s-1 ({o.name})",
                     labelpos="W", coordinates="axes", fontproperties={"size": 7.5},
                     color=o.colour)
        desc = f"{o.name}: balanced flow at {o.level_hpa:g} hPa"
        if zstep:
            desc += f"; {height_key(zstep)}"
        handles.append(Line2D([], [], color=o.colour, lw=1.6, label=desc))
    if handles:
        ax.legend(handles=handles, loc="lower left", fontsize=7.5, framealpha=0.85)

    note = None
    if settings.coastlines:
        src = coastline_source()
        if src is None:
            note = "No coastline data on this machine: map drawn without coastlines"
            ax.text(0.5, 0.5, "no coastline data available offline", transform=ax.transAxes,
                    ha="center", va="center", fontsize=9, color="#666666", alpha=0.6)
        else:
            from cartopy.feature import ShapelyFeature

            feat = ShapelyFeature(_coastline_geometries(src[1]), data_crs)
            ax.add_feature(feat, facecolor="none", edgecolor="#1a1a1a", linewidth=0.7, zorder=2)
            note = f"Coastlines: {src[0]}"
    if settings.gridlines:
        gl = ax.gridlines(draw_labels=True, linewidth=0.4, color="#555555", alpha=0.5,
                          linestyle=":", crs=data_crs, x_inline=False, y_inline=False)
        gl.top_labels = gl.right_labels = False
        gl.xlabel_style = gl.ylabel_style = {"size": 7.5}

    _draw_annotations_geo(ax, data.annotations, data_crs)
    if data.target is not None:
        tlon, tlat = data.target[0], data.target[1]
        ax.plot([tlon], [tlat], marker="X", ms=13, mfc="white", mec="black", mew=1.6,
                transform=data_crs, zorder=9)
        tlabel = "target" if len(data.target) < 3 else f"target ({data.target[2]:g} hPa)"
        ax.text(tlon, tlat, "  " + tlabel, transform=data_crs, fontsize=8, fontweight="bold",
                ha="left", va="bottom", zorder=9,
                bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.8))

    what = f"{label} ({units}) {data.surface}".rstrip()
    extra = "; ".join(([data.extra_title] if data.extra_title else []) + list(notes or [])) or None
    _title_block(fig, _title_lines(data, what, extra))
    _caution(fig, note, data.invented)
    return fig


def balance_map_figure(quality: xr.Dataset, level_hpa: float = 500.0, case=None, member=None,
                       settings=None, page_size=None) -> Figure:
    """Where the two balances differ: the speed of the nonlinear-balance minus the QG balanced
    wind on the level nearest ``level_hpa``, from a
    :func:`workbench.inversion.nonlinear.balance_quality` Dataset; the title block gives the
    RMS balanced-minus-analysed wind on that level for both balances."""
    if "balance_difference" not in quality:
        raise InputError("balance_map_figure needs the Dataset of balance_quality (it has no "
                         "'balance_difference')")
    k = int(np.argmin(np.abs(quality["pressure"].values / 100.0 - float(level_hpa))))
    level = float(quality["pressure"].values[k]) / 100.0
    da = quality["balance_difference"].isel(pressure=k)
    da = da.assign_attrs(long_name="|nonlinear - QG balanced wind|")
    time = quality.attrs.get("time")
    rms = (f"RMS balanced - analysed wind: QG {float(quality['rms_difference_qg'][k]):.1f}, "
           f"nonlinear {float(quality['rms_difference_nonlinear'][k]):.1f} m/s")
    if quality.attrs.get("solver_note"):  # a floored solve accepted where it stalled
        res = json.loads(quality.attrs.get("solver") or "{}").get("residual_history") or [float("nan")]
        rms += f" (floored solve stalled at {res[-1]:.1e}, accepted)"
    md = MapData(field=da, field_name="balance_difference", surface=f"at {level:g} hPa",
                 native_crs=_native_crs(case), extra_title=rms, **_case_meta(case, time, member))
    return draw_map(md, settings, page_size=page_size)


def _is_state(obj) -> bool:
    return hasattr(obj, "case") and hasattr(obj, "pieces")


def _state_get(state, names, default=None):
    for n in names:
        if hasattr(state, n):
            v = getattr(state, n)
            if v is not None:
                return v
    return default


def state_view(state) -> dict[str, Any]:
    """What a State says the figures show: keyword arguments for map/section data.

    Reads attributes by name and tolerates their absence (the State is the
    single source; this function only reads it).
    """
    case = state.case
    pieces = list(_state_get(state, ["pieces"], []) or [])
    settings = _state_get(state, ["figure_settings", "settings"], None)
    if hasattr(settings, "to_dict") and not isinstance(settings, FigureSettings):
        settings = settings.to_dict()
    if isinstance(settings, dict):
        known = {f.name for f in dataclasses.fields(FigureSettings)}
        settings = {k: v for k, v in settings.items() if k in known}
    level = _state_get(state, ["overlay_level_hpa", "overlay_level"], None)
    settings = FigureSettings.from_dict(settings)
    if level is not None:
        settings = dataclasses.replace(settings, overlay_level_hpa=float(level))
    surface = _state_get(state, ["surface"], None)
    if surface is None:
        theta = _state_get(state, ["theta", "theta_level", "isentrope"], 320.0)
        surface = float(theta)
    return dict(
        case=case,
        field=_state_get(state, ["field", "map_field"], "ertel_pv"),
        surface=surface,
        time=_state_get(state, ["time", "time_index"], None),
        member=_state_get(state, ["member"], None),
        reference=_state_get(state, ["reference"], None),
        pieces=pieces,
        overlay=None,
        overlays=state_overlays(state, pieces),
        annotations=list(_state_get(state, ["annotations"], []) or []),
        settings=settings,
        threshold=float(_state_get(state, ["threshold", "tropopause_threshold"], 2.0)),
        target=_state_get(state, ["target"], None),
        sections=list(_state_get(state, ["sections"], []) or []),
    )


def state_overlays(state, pieces=None) -> list:
    """The State's balanced-flow overlay (``state.overlay()``: the visible pieces' summed
    flow at the overlay level, as in the app) as a list of at most one :class:`Overlay`."""
    if not hasattr(state, "overlay") or not callable(state.overlay):
        return []
    ov = state.overlay()
    if ov is None:
        return []
    names = [str(n) for n in ov.attrs.get("pieces", [])]
    pieces = list(pieces if pieces is not None else getattr(state, "pieces", []))
    by_name = {getattr(p, "name", None): p for p in pieces}
    colour = _piece_colour(by_name.get(names[0]), 0) if len(names) == 1 else "#000000"
    label = names[0] if len(names) == 1 else "sum of " + " + ".join(names)
    return [Overlay(name=label, colour=colour, u=ov["u"], v=ov["v"],
                    height_anomaly=ov["height_anomaly"],
                    level_hpa=float(ov.attrs.get("level_hpa", np.nan)))]


def map_figure(source, field=None, surface=None, **kwargs) -> Figure:
    """A map figure from a State, a Case (+ keyword settings), a MapData or a 2-D DataArray.

    Keywords for a Case: those of :func:`map_data` (time, member, reference,
    pieces, overlay, annotations, settings, results, threshold). With a State,
    the same keywords override what the state holds. A plain DataArray on
    (latitude, longitude) is drawn as given (``settings``, ``annotations``,
    ``case`` for the title block may be passed).
    """
    settings = kwargs.get("settings")
    if isinstance(source, MapData):
        return draw_map(source, settings)
    if isinstance(source, xr.DataArray):
        case = kwargs.pop("case", None)
        md = MapData(field=source, field_name=field or str(source.name),
                     surface=_surface_label(surface or source.attrs.get("surface", "")),
                     annotations=ann.in_space(kwargs.get("annotations"), "map"),
                     native_crs=_native_crs(case),
                     **_case_meta(case, kwargs.get("time"), kwargs.get("member")))
        return draw_map(md, settings)
    if _is_state(source):
        view = state_view(source)
        view.pop("sections")
        case = view.pop("case")
        if field is not None:
            view["field"] = field
        if surface is not None:
            view["surface"] = surface
        if kwargs.get("overlay") is not None:
            view["overlays"] = []  # explicit pieces replace the state's summed overlay
        view.update(kwargs)
        settings = view["settings"]
        return draw_map(map_data(case, **view), settings)
    if hasattr(source, "map_field"):
        md = map_data(source, field or "ertel_pv", 320.0 if surface is None else surface, **kwargs)
        return draw_map(md, settings)
    raise InputError(
        f"map_figure needs a State, a Case, a MapData or a 2-D DataArray, not {type(source).__name__}"
    )


# --------------------------------------------------------------------------- sections


def _section_points(section):
    if hasattr(section, "start") and hasattr(section, "end"):
        return tuple(section.start), tuple(section.end), getattr(section, "npoints", 100), \
            getattr(section, "name", "")
    if isinstance(section, dict):
        return tuple(section["start"]), tuple(section["end"]), section.get("npoints", 100), \
            section.get("name", "")
    if isinstance(section, (list, tuple)) and len(section) == 2:
        return tuple(section[0]), tuple(section[1]), 100, ""
    raise InputError(
        "a section must be a workbench.sections.Section, a dict with 'start'/'end', or a pair "
        "of (lon, lat) points"
    )


def section_data(
    case,
    section,
    *,
    key: str | int = 0,
    time=None,
    member=None,
    reference=None,
    pieces=None,
    overlay=None,
    annotations=None,
    results=None,
    omega=None,
    threshold: float = 2.0,
) -> SectionData:
    """Gather what a cross-section shows (via :func:`workbench.sections.cross_section`).

    ``key`` is the section's index or id: annotations in space ``"section:<key>"``
    are drawn. The balanced section-normal wind of each piece in ``overlay`` is
    included (pieces inverted through ``case.inversion``).
    """
    from workbench.sections import cross_section

    start, end, npoints, name = _section_points(section)
    chosen = None
    colours = []
    if overlay:
        if results is None:
            kw = {} if reference is None else {"reference": reference}
            results = case.inversion(list(pieces or []), time=time, member=member, **kw)
        by_name = {getattr(p, "name", str(p)): p for p in (pieces or [])}
        chosen = {}
        for k, nm in enumerate(overlay):
            nm = getattr(nm, "name", nm)
            if nm not in results:
                raise InputError(
                    f"piece {nm!r} has no balanced flow; pieces inverted: {', '.join(results)}"
                )
            chosen[nm] = results[nm]
            colours.append((nm, _piece_colour(by_name.get(nm, nm), k)))
    ds = cross_section(case, start, end, time=time, member=member, npoints=npoints,
                       results=chosen, omega=omega, threshold=threshold)
    keys = {str(key)}
    if name:
        keys.add(str(name))
    items = [a for a in (annotations or []) if getattr(a, "section_key", None) in keys]
    return SectionData(section=ds, key=str(key), overlays=colours, annotations=items,
                       threshold=threshold, name=str(name or ""), **_case_meta(case, time, member))


def _fmt_point(lon, lat) -> str:
    """A section end as the page writes it: ``(30.0°W, 45.0°N)``."""
    return f"({lon_label(lon)}, {lat_label(lat)})"


def draw_section(data: SectionData, settings: FigureSettings | dict | None = None,
                 page_size: tuple[float, float] | None = None) -> Figure:
    """Draw a :class:`SectionData`: PV shaded, theta and section-normal wind contours, the
    dynamic tropopause, balanced normal wind of chosen pieces, QG omega, annotations."""
    settings = FigureSettings.from_dict(settings)
    ds = data.section
    x = np.asarray(ds["distance"].values, float)
    p = np.asarray(ds["pressure"].values, float) / 100.0
    width = page_size[0] if page_size else settings.width_in
    plot_h = max(2.5, 0.5 * width)
    if page_size:
        plot_h = max(2.0, page_size[1] - (_TOP_IN + 0.3 + _BOTTOM_IN + 0.75))
    height = plot_h + _TOP_IN + 0.3 + _BOTTOM_IN + 0.75
    fig = Figure(figsize=(width, height), dpi=settings.dpi)
    bottom = (_BOTTOM_IN + 0.75) / height
    ax = fig.add_axes([0.08, bottom, 0.76, plot_h / height])
    ax.set_facecolor("#b8b8b8")  # below ground / missing data
    pv = np.asarray(ds["ertel_pv"].values, float)
    levels = np.asarray(settings.levels) if settings.levels else _levels(pv, False, "ertel_pv")
    cmap = colour_map(settings.colour_map) if settings.colour_map else COLOUR_MAPS["pv"]
    cf = ax.contourf(x, p, pv, levels=levels, cmap=cmap, extend="max", zorder=1)
    cax = fig.add_axes([0.86, bottom + 0.05 * plot_h / height, 0.022, 0.9 * plot_h / height])
    cb = fig.colorbar(cf, cax=cax)
    cb.set_label("Ertel PV (PVU)")

    th = np.asarray(ds["potential_temperature"].values, float)
    tl = np.arange(math.floor(np.nanmin(th) / 5) * 5, np.nanmax(th) + 5, 5.0) if np.isfinite(
        th).any() else None
    if tl is not None:
        cs = ax.contour(x, p, th, levels=tl, colors="#1a1a1a", linewidths=0.6, zorder=3)
        ax.clabel(cs, levels=tl[::2], fmt="%g", fontsize=6.5)
    vn = np.asarray(ds["normal_wind"].values, float)
    vl, _ = _symmetric_levels(vn)
    if vl:
        step = 10.0 if (max(vl) >= 20) else _contour_step(vn)
        k = max(1, math.ceil(np.nanmax(np.abs(vn)) / step))
        vl = [s * step for s in range(-k, k + 1) if s != 0]
        cs = ax.contour(x, p, vn, levels=vl, colors="#5b2a86", linewidths=0.9,
                        linestyles=["dashed" if v < 0 else "solid" for v in vl], zorder=3)
        ax.clabel(cs, fmt="%g", fontsize=6.5)
    from matplotlib.lines import Line2D

    handles = [
        Line2D([], [], color="#1a1a1a", lw=0.6, label="potential temperature (K, every 5 K)"),
        Line2D([], [], color="#5b2a86", lw=0.9,
               label="section-normal wind (m s-1, + to the left of A->B, dashed < 0)"),
    ]
    if "tropopause_pressure" in ds:
        tp = np.asarray(ds["tropopause_pressure"].values, float) / 100.0
        ax.plot(x, tp, color="white", lw=3.6, zorder=4)
        ax.plot(x, tp, color="black", lw=2.0, zorder=4)
        handles.append(Line2D([], [], color="black", lw=2.0,
                              label=f"dynamic tropopause ({data.threshold:g} PVU)"))
    if "balanced_normal_wind" in ds:
        for name, colour in data.overlays:
            bn = np.asarray(ds["balanced_normal_wind"].sel(piece=name).values, float)
            bl, bstep = _symmetric_levels(bn, floor=NEGLIGIBLE["wind"])
            if bl:
                cs = ax.contour(x, p, bn, levels=bl, colors=colour, linewidths=1.5,
                                linestyles=["dashed" if v < 0 else "solid" for v in bl], zorder=5)
                ax.clabel(cs, fmt="%g", fontsize=6.5)
                handles.append(Line2D([], [], color=colour, lw=1.5,
                                      label=f"{name}: balanced normal wind (every {bstep:g} m s-1)"))
            else:
                handles.append(Line2D([], [], color=colour, lw=1.5, ls=":",
                                      label=f"{name}: balanced normal wind < "
                                            f"{NEGLIGIBLE['wind']:g} m s-1 here (not drawn)"))
    omegas = []  # (label, DataArray)
    if "qg_omega" in ds:
        if "piece" in ds["qg_omega"].dims:  # older layout: one omega per piece
            for n in ds["qg_omega"]["piece"].values:
                omegas.append((f"of {n}", ds["qg_omega"].sel(piece=n)))
        else:
            omegas.append(("of the full inversion", ds["qg_omega"]))
    if "piece_qg_omega" in ds and data.omega_pieces:
        for n in ds["piece_qg_omega"]["piece"].values:
            if str(n) in data.omega_pieces:
                omegas.append((f"due to {n}", ds["piece_qg_omega"].sel(piece=n)))
    # drawn as in the page (views.styles): ascent (omega < 0) dashed, descent solid
    for k, (olabel, om) in enumerate(omegas):
        ov = np.asarray(om.values, float)
        ol, ostep = _symmetric_levels(ov, floor=NEGLIGIBLE["omega"])
        colour = OMEGA_COLOURS[k % len(OMEGA_COLOURS)]
        if ol:
            sty = [OMEGA_ASCENT if v < 0 else OMEGA_DESCENT for v in ol]
            ax.contour(x, p, ov, levels=ol, colors=colour, linewidths=[0.7 * t["width"] for t in sty],
                       linestyles=[t["dash"] for t in sty], zorder=5)
            handles.append(Line2D([], [], color=colour, lw=0.7 * OMEGA_ASCENT["width"],
                                  ls=OMEGA_ASCENT["dash"], label=omega_key(olabel, ostep)))
    ax.set_yscale("log")
    ticks = [t for t in (1000, 850, 700, 600, 500, 400, 300, 250, 200, 150, 100, 70, 50)
             if p.min() - 1e-6 <= t <= p.max() + 1e-6]
    ax.set_yticks(ticks)
    ax.set_yticklabels([f"{t:g}" for t in ticks])
    ax.yaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
    ax.set_ylim(p.max(), p.min())
    ax.set_xlim(x.min(), x.max())
    ax.set_ylabel("pressure (hPa)")
    ax.set_xlabel("distance along the section (km)")
    a0 = _fmt_point(float(ds.attrs.get("start_lon", ds["longitude"].values[0])),
                    float(ds.attrs.get("start_lat", ds["latitude"].values[0])))
    b0 = _fmt_point(float(ds.attrs.get("end_lon", ds["longitude"].values[-1])),
                    float(ds.attrs.get("end_lat", ds["latitude"].values[-1])))
    ax.text(0.0, 1.01, f"A  {a0}", transform=ax.transAxes, ha="left", va="bottom",
            fontsize=9, fontweight="bold")
    ax.text(1.0, 1.01, f"{b0}  B", transform=ax.transAxes, ha="right", va="bottom",
            fontsize=9, fontweight="bold")
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.5 / plot_h * 1.0 - 0.02),
              ncol=2, fontsize=7, frameon=False)
    _draw_annotations_section(ax, data.annotations)
    what = f"Cross-section{' ' + repr(data.name) if data.name else ''} A {a0} to B {b0} ({x.max():.0f} km)"
    _title_block(fig, _title_lines(data, what, "grey: below ground / no data"))
    _caution(fig, None, data.invented)
    return fig


def state_section_data(state, index=None) -> SectionData:
    """SectionData of the State's section ``index`` (default the active one, else the first),
    built by ``state.section`` (balanced flow and QG omega of the visible pieces)."""
    sections = list(getattr(state, "sections", []) or [])
    if not sections:
        raise InputError("the state has no sections; draw a section line first")
    if index is None:
        index = getattr(state, "active_section", None)
        index = 0 if index is None else index
    if not isinstance(index, (int, np.integer)) or not -len(sections) <= index < len(sections):
        raise InputError(f"section index {index!r} is out of range: the state has "
                         f"{len(sections)} section(s)")
    index = int(index) % len(sections)
    ds = state.section(index)
    view = state_view(state)
    names = [str(n) for n in ds["piece"].values] if "piece" in ds.dims else []
    by_name = {p.name: p for p in view["pieces"]}
    overlays = [(n, _piece_colour(by_name.get(n, n), k)) for k, n in enumerate(names)]
    sec = sections[index]
    keys = {str(index)}
    if getattr(sec, "name", ""):
        keys.add(str(sec.name))
    items = [a for a in view["annotations"] if getattr(a, "section_key", None) in keys]
    return SectionData(section=ds, key=str(index), overlays=overlays, annotations=items,
                       threshold=view["threshold"], omega_pieces=[], name=str(getattr(sec, "name", "")),
                       **_case_meta(view["case"], view["time"], view["member"]))


def section_figure(source, section=None, **kwargs) -> Figure:
    """A cross-section figure from a State (its section ``section``, an index, default 0),
    a Case plus a section (Section, dict or a pair of (lon, lat) points), or a SectionData.
    Keywords: those of :func:`section_data` and ``settings``."""
    settings = kwargs.pop("settings", None)
    if isinstance(source, SectionData):
        return draw_section(source, settings)
    if _is_state(source):
        return draw_section(state_section_data(source, section), settings or
                            state_view(source)["settings"])
    if hasattr(source, "map_field"):
        if section is None:
            raise InputError("section_figure needs a section: a Section or ((lon, lat), (lon, lat))")
        return draw_section(section_data(source, section, **kwargs), settings)
    raise InputError(
        f"section_figure needs a State, a Case or a SectionData, not {type(source).__name__}"
    )


# --------------------------------------------------------------------------- saving

_FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}


def save_figure(fig: Figure, path, dpi: int | None = None, overwrite: bool = False,
                format: str | None = None) -> Path:
    """Save ``fig`` to PNG, SVG or PDF (by extension or ``format``) atomically.

    Refuses (ExportError) to replace an existing file unless ``overwrite=True``;
    a failure part-way leaves the previous file intact. ``dpi`` defaults to the
    figure's own (FigureSettings.dpi).
    """
    path = Path(path)
    fmt = (format or _FORMATS.get(path.suffix.lower(), "")).lower()
    if fmt not in _FORMATS.values():
        raise ExportError(
            f"figure file {path.name} must end in .png, .svg or .pdf (or pass format=...)"
        )
    if dpi is not None and (isinstance(dpi, bool) or not 30 <= float(dpi) <= 1200):
        raise ExportError(f"dpi={dpi!r} must be a number between 30 and 1200")
    meta = {"png": {"Software": f"PV Workbench {package_version()}"},
            "svg": {"Creator": f"PV Workbench {package_version()}"},
            "pdf": {"Creator": f"PV Workbench {package_version()}"}}[fmt]
    # SVG keeps its text as text (editable in slides, searchable); PDF embeds TrueType
    rc = {"svg.fonttype": "none", "pdf.fonttype": 42}
    with atomic_target(path, overwrite=overwrite, error=ExportError, what="figure") as tmp:
        with matplotlib.rc_context(rc):
            fig.savefig(tmp, format=fmt, dpi=dpi or fig.dpi, metadata=meta)
    return path
