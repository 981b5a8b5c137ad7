"""Interactive views (Bokeh models shown through Panel): the map, the section, the tables.

Every view reads the shared :class:`~workbench.state.State` (and through it the Case) and
draws; none computes physics. The map figure is built once per case; afterwards every change
(field, time, pieces, balanced-flow overlay, section lines, target point) replaces the
``.data`` of its ColumnDataSource or a mapper's range, so the browser updates the existing
plot in place instead of rebuilding it.

Mouse gestures on the map are reported to callbacks the app sets:

* ``on_lasso(polygon)``: a lasso drawn with the lasso tool, ``[(lon, lat), ...]``;
* ``on_section(start, end)``: a line dragged with the section tool, two (lon, lat) points;
* ``on_tap(lon, lat)``: a click in the "target" mode (the app's attribution target);
* ``on_label(lon, lat)``: a click in the "label" mode (the app places a text label there).

Every click's position is kept in :attr:`MapView.last_click`. Annotations of the state
(:mod:`workbench.annotations` labels, arrows and highlighted regions in map space) are drawn
from the sources ``pvwb-ann-text``, ``pvwb-ann-regions`` and ``pvwb-ann-arrows``.

Colour maps are those of the static figures (:data:`workbench.views.static.COLOUR_MAPS`:
perceptually uniform, colour-blind safe), so the app and the briefing figures agree.
"""
from __future__ import annotations

import logging
import math
from functools import lru_cache

import numpy as np
import panel as pn
from bokeh.events import SelectionGeometry, Tap
from bokeh.core.property.vectorization import value
from bokeh.models import (BoxZoomTool, ColorBar, ColumnDataSource, CustomJSHover,
                          CustomJSTickFormatter,
                          FreehandDrawTool, HoverTool,
                          Label, LassoSelectTool, Legend, LegendItem, LinearColorMapper, PanTool,
                          Range1d, ResetTool, SaveTool, TapTool, WheelZoomTool)
from bokeh.plotting import figure

from ..export import CAUTION, invented_label
from .fields import FIELDS
from ..sections import great_circle_path
from ..state import surface_label
from ..textsafe import escape
from .styles import (HEIGHT_NEGATIVE, HEIGHT_POSITIVE, OMEGA_ASCENT, OMEGA_DESCENT, height_key,
                     lat_label, lon_label, omega_key)

__all__ = ["MapView", "SectionView", "TextHTML", "TextMarkdown", "lon_label", "lat_label", "palette", "field_style", "coastline_lines", "FIELD_LABELS",
           "MODES"]

#: field -> (short label, display units, colour-map key, diverging), from views.fields
FIELD_LABELS = {f: (st.short, st.units, st.cmap, st.diverging) for f, st in FIELDS.items()}

#: Mouse modes of the map: label -> tool key.
MODES = {"Pan / zoom": "pan", "Lasso a piece": "lasso", "Draw a section": "section",
         "Pick target point": "target", "Place a label": "label"}

BALANCED_COLOUR = "#000000"
WIND_COLOUR = "#8c8c8c"
SECTION_COLOUR = "#1f1f1f"
POS_CONTOUR = HEIGHT_POSITIVE["colour"]
NEG_CONTOUR = HEIGHT_NEGATIVE["colour"]
#: hover formatters: longitude as °E/°W, latitude as °N/°S (one decimal)
_JS_LON = ("const x = ((value + 180) % 360 + 360) % 360 - 180;"
           "const a = Math.abs(x).toFixed(1);"
           "return (a == '0.0' || a == '180.0') ? a + '°' : a + (x > 0 ? '°E' : '°W');")
_JS_LAT = ("const a = Math.abs(value).toFixed(1);"
           "return a == '0.0' ? a + '°' : a + (value > 0 ? '°N' : '°S');")
#: at most this many balanced height-anomaly contours of each sign
MAX_CONTOURS = 200
#: units as the read-outs write them
_READ_UNITS = {"m s-1": "m/s"}
#: tooltip number formats by field
_READ_FORMAT = {"ertel_pv": "0.00", "ertel_pv_anomaly": "0.00", "potential_temperature": "0.0",
                "pressure": "0", "geopotential_height": "0", "wind_speed": "0.0", "u": "0.0",
                "v": "0.0"}


@lru_cache(maxsize=None)
def palette(key: str, n: int = 256) -> tuple:
    """A Bokeh palette (hex strings) of the static figures' colour map ``key``."""
    from matplotlib.colors import to_hex

    from .static import COLOUR_MAPS

    cmap = COLOUR_MAPS[key]
    return tuple(to_hex(cmap(x)) for x in np.linspace(0, 1, n))


def _nice(x: float) -> float:
    if not np.isfinite(x) or x <= 0:
        return 1.0
    mag = 10 ** math.floor(math.log10(x))
    for m in (1, 2, 2.5, 5, 10):
        if m * mag >= x * 0.999:
            return m * mag
    return 10 * mag


def field_style(field: str, values: np.ndarray):
    """(palette, low, high, colour-bar title, scale to display units) for a map field."""
    label, units, key, diverging = FIELD_LABELS.get(field, (field, "", "theta", False))
    scale = 0.01 if field == "pressure" else 1.0
    v = np.asarray(values, float)[np.isfinite(values)] * scale
    if v.size == 0:
        lo, hi = (-1.0, 1.0) if diverging else (0.0, 1.0)
    elif field == "ertel_pv":
        lo, hi = 0.0, float(min(12.0, max(4.0, np.percentile(v, 99))))
        hi = math.ceil(hi)
    elif diverging:
        m = _nice(float(np.percentile(np.abs(v), 99)) or 1.0)
        lo, hi = -m, m
    else:
        lo, hi = (float(x) for x in np.percentile(v, [1, 99]))
        if hi <= lo:
            hi = lo + 1.0
    return palette(key), lo, hi, f"{label} ({units})", scale


def difference_style(field: str, values: np.ndarray):
    """(palette, low, high, colour-bar title, scale) of a difference map of ``field``:
    a diverging colour map symmetric about zero."""
    label, units = FIELD_LABELS.get(field, (field, ""))[:2]
    scale = 0.01 if field == "pressure" else 1.0
    v = np.abs(np.asarray(values, float)[np.isfinite(values)]) * scale
    m = _nice(float(np.percentile(v, 99))) if v.size and np.percentile(v, 99) > 0 else 1.0
    return palette("anomaly"), -m, m, f"{label} difference ({units})", scale


# --------------------------------------------------------------------------- coastlines


#: Notices of the coastline reader (pyshp's conversion notes) go here, never into a cell.
COAST_LOG = logging.getLogger("workbench.coastlines")
COAST_LOG.addHandler(logging.NullHandler())


class _ToLog(logging.Handler):
    def emit(self, record):
        COAST_LOG.info("%s", record.getMessage())


def _read_coastlines(path):
    """Coastline geometries of a shapefile; the reader's notices are logged at INFO level on
    ``workbench.coastlines`` instead of being printed (we draw outlines only, so a ring
    stored as a hole draws the same coastline)."""
    from cartopy.io import shapereader

    log = logging.getLogger("shapefile")
    handler, propagate = _ToLog(), log.propagate
    log.addHandler(handler)
    log.propagate = False
    try:
        return list(shapereader.Reader(str(path)).geometries())
    finally:
        log.removeHandler(handler)
        log.propagate = propagate


@lru_cache(maxsize=8)
def coastline_lines(lon_min, lon_max, lat_min, lat_max):
    """Coastline segments clipped to a lon/lat box: (xs, ys, description).

    Reads the finest coastline shapefile on this machine (GSHHS or Natural Earth under
    cartopy's pre-existing data folder, Debian's /usr/share/cartopy/data); nothing is
    downloaded. Returns empty lists and a message when no shapefile is available.
    """
    try:
        from shapely.geometry import box
        from shapely import affinity

        from .static import coastline_source

        src = coastline_source()
        if src is None:
            return [], [], ("no coastline data on this machine (looked in cartopy's data "
                            "folders); map drawn without coastlines")
        label, path = src
        geoms = _read_coastlines(path)
    except Exception as exc:  # never let map data stop the app
        return [], [], f"coastlines unavailable ({exc}); map drawn without them"
    pad = 1.0
    clip = box(lon_min - pad, lat_min - pad, lon_max + pad, lat_max + pad)
    xs, ys = [], []
    for shift in (-360.0, 0.0, 360.0):
        c = affinity.translate(clip, -shift, 0)
        for g in geoms:
            if not g.intersects(c):
                continue
            part = g.boundary.intersection(c) if g.geom_type.endswith("Polygon") else g.intersection(c)
            for line in getattr(part, "geoms", [part]):
                if line.is_empty or not hasattr(line, "coords"):
                    continue
                arr = np.asarray(line.coords)
                if len(arr) < 2:
                    continue
                xs.append((arr[:, 0] + shift).tolist())
                ys.append(arr[:, 1].tolist())
    return xs, ys, f"coastlines: {label}"


# --------------------------------------------------------------------------- drawing helpers


def _contour_lines(x, y, z, levels):
    """Contour lines of z(y, x) as Bokeh multi_line lists, for each level (display only)."""
    import contourpy

    z = np.ma.masked_invalid(np.asarray(z, float))
    if z.count() < 4:
        return [], []
    gen = contourpy.contour_generator(np.asarray(x, float), np.asarray(y, float), z,
                                      line_type="Separate")
    xs, ys = [], []
    for lev in levels:
        for seg in gen.lines(float(lev)):
            if len(seg) >= 2:
                xs.append(seg[:, 0].tolist())
                ys.append(seg[:, 1].tolist())
    return xs, ys


def _vector_data(lon, lat, u, v, stride, scale_deg_per_ms, coslat0, min_speed=0.0):
    """Arrow shafts and heads for wind (u, v) on a lon/lat map (display geometry only)."""
    jj = np.arange(stride // 2, len(lat), stride)
    ii = np.arange(stride // 2, len(lon), stride)
    LO, LA = np.meshgrid(lon[ii], lat[jj])
    U = np.asarray(u, float)[np.ix_(jj, ii)]
    V = np.asarray(v, float)[np.ix_(jj, ii)]
    ok = np.isfinite(U) & np.isfinite(V) & (np.hypot(U, V) > min_speed)
    x0, y0, U, V = LO[ok], LA[ok], U[ok], V[ok]
    x1 = x0 + U * scale_deg_per_ms / coslat0
    y1 = y0 + V * scale_deg_per_ms
    angle = np.arctan2(V, U) - np.pi / 2
    speed = np.hypot(U, V)
    shafts = dict(x0=x0.tolist(), y0=y0.tolist(), x1=x1.tolist(), y1=y1.tolist(),
                  speed=speed.tolist())
    heads = dict(x=x1.tolist(), y=y1.tolist(), angle=angle.tolist())
    return shafts, heads


def _empty_vectors():
    return dict(x0=[], y0=[], x1=[], y1=[], speed=[]), dict(x=[], y=[], angle=[])


def _lonlat_axes(fig):
    """Longitudes as °E/°W and latitudes as °N/°S, as in the figures and the briefing."""
    fig.xaxis.formatter = CustomJSTickFormatter(code=(
        "const x = ((tick + 180) % 360 + 360) % 360 - 180;"
        "return Math.abs(x) < 1e-9 || Math.abs(Math.abs(x) - 180) < 1e-9 ? "
        "Math.abs(x) + '°' : Math.abs(x) + (x > 0 ? '°E' : '°W');"))
    fig.yaxis.formatter = CustomJSTickFormatter(code=(
        "return Math.abs(tick) < 1e-9 ? '0°' : Math.abs(tick) + (tick > 0 ? '°N' : '°S');"))


def _push(pane):
    """In a notebook (no server), send in-place model changes to the page."""
    doc = pn.state.curdoc
    if doc is not None and getattr(doc, "session_context", None) is not None:
        return
    try:
        pn.io.push_notebook(pane)
    except Exception:
        pass


def _centroid(poly):
    a = np.asarray(poly, float)
    return float(a[:, 0].mean()), float(a[:, 1].mean())


class _TextOnlyUpdates:
    """A pane whose updates send only its text. Panel re-sends a pane's every property on an
    update, stylesheets included, and in a notebook those are links to a CDN; the page
    already holds them (inlined when it was rendered), so they are left out."""

    def _update(self, ref, model):
        props = self._get_properties(model.document)
        props.pop("stylesheets", None)
        model.update(**props)


class TextHTML(_TextOnlyUpdates, pn.pane.HTML):
    """``pn.pane.HTML`` whose updates never fetch stylesheets (see :class:`_TextOnlyUpdates`)."""


class TextMarkdown(_TextOnlyUpdates, pn.pane.Markdown):
    """``pn.pane.Markdown`` whose updates never fetch stylesheets."""


# --------------------------------------------------------------------------- the map


class MapView:
    """The map: the state's field on its surface, coastlines, winds, pieces, overlay.

    Built once per case (:attr:`figure`, Bokeh name ``"pvwb-map"``); everything afterwards
    updates data sources in place. ``pane`` is the Panel pane to put in a layout.
    """

    def __init__(self, state, width=820, max_height=640, projection=None, prefix="pvwb",
                 ranges=None, field_source=None):
        self.state = state
        # Bokeh names start with ``prefix`` (a second map on the page, e.g. the compare
        # view, takes its own); ``ranges`` = (x_range, y_range) of another map to share its
        # pan and zoom; ``field_source()`` -> DataArray replaces ``state.map_field()``
        self.prefix = prefix
        self._shared_ranges = ranges
        self.field_source = field_source
        self._readout = {}
        self._tips = {"field": [], "aux": [], "balanced": []}
        self.on_lasso = None
        self.on_section = None
        self.on_tap = None
        self.on_label = None
        self.last_click = None
        self.mode = "pan"
        self._watchers = []
        case = state.case
        lat = case.data["latitude"].values
        lon = case.data["longitude"].values
        self.lon, self.lat = lon, lat
        self.coslat0 = math.cos(math.radians(0.5 * (lat.min() + lat.max())))
        self._setup_projection(case, projection)
        if self.native:
            (x0, x1), (y0, y1) = self.bounds
            height = int(width * (y1 - y0) / max(x1 - x0, 1e-6))
        else:
            dlon, dlat = float(lon.max() - lon.min()), float(lat.max() - lat.min())
            height = int(width * dlat / max(dlon * self.coslat0, 1e-6))
        if height > max_height:
            width, height = int(width * max_height / height), max_height
        self._build(width, max(height, 240))
        # the map scales with its column (aspect kept), never wider than ``width``
        self.pane = pn.pane.Bokeh(self.figure, sizing_mode="scale_width", max_width=width,
                                  min_width=280)
        for names, fn in ((["case", "time_index", "member", "surface", "field", "reference",
                            "threshold"], self.refresh_field),
                          (["pieces", "overlay_level", "time_index", "member", "reference",
                            "overlay_contour_interval", "overlay_arrow_stride",
                            "overlay_arrow_speed", "overlay_left_out"],
                           self.refresh_overlay),
                          (["pieces"], self.refresh_pieces),
                          (["sections", "active_section"], self.refresh_sections),
                          (["target"], self.refresh_target),
                          (["annotations"], self.refresh_annotations)):
            self._watchers.append(state.param.watch(lambda *ev, fn=fn: self._safe(fn), names))
        self.refresh_all()

    def detach(self):
        """Stop following the state (before the view is dropped)."""
        for w in self._watchers:
            self.state.param.unwatch(w)
        self._watchers = []

    # ---------------------------------------------------------------- projection
    def _setup_projection(self, case, projection):
        """Display in the data's own projection (``case.data.attrs["native_crs"]``, WKT) when
        ``projection`` is "native" or None and the case has one; else on longitude-latitude.
        pyproj transforms display coordinates only; gestures come back as (lon, lat)."""
        wkt = case.data.attrs.get("native_crs")
        self.native = bool(wkt) and projection in (None, "native")
        self._angles = {}
        if not self.native:
            self.bounds = None
            return
        import pyproj

        crs = pyproj.CRS.from_wkt(wkt)
        self._fwd_t = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
        self._inv_t = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
        # the plane's box around the domain's outline, and a display grid inside it
        lon, lat = self.lon, self.lat
        edge_lon = np.concatenate([lon, np.full(len(lat), lon[-1]), lon[::-1], np.full(len(lat), lon[0])])
        edge_lat = np.concatenate([np.full(len(lon), lat[0]), lat, np.full(len(lon), lat[-1]), lat[::-1]])
        ex, ey = self._fwd_t.transform(edge_lon, edge_lat)
        self.bounds = ((float(np.min(ex)), float(np.max(ex))), (float(np.min(ey)), float(np.max(ey))))
        (x0, x1), (y0, y1) = self.bounds
        nx = int(min(400, max(len(lon), len(lat)) * 1.5))
        ny = max(2, int(round(nx * (y1 - y0) / max(x1 - x0, 1e-6))))
        self._gx = np.linspace(x0, x1, nx)
        self._gy = np.linspace(y0, y1, ny)
        GX, GY = np.meshgrid(self._gx, self._gy)
        glon, glat = self._inv_t.transform(GX, GY)
        # longitudes of the display grid on the data's branch (domains may pass 180)
        glon = np.where(glon < lon.min() - 180.0, glon + 360.0, glon)
        glon = np.where(glon > lon.max() + 180.0, glon - 360.0, glon)
        self._glonlat = (glat, glon)

    def fwd(self, lon, lat):
        """(lon, lat) -> display (x, y): the projection plane (m) or lon/lat itself."""
        lon, lat = np.asarray(lon, float), np.asarray(lat, float)
        if not self.native or lon.size == 0:
            return lon, lat
        return self._fwd_t.transform(lon, lat)

    def inv(self, x, y):
        """Display (x, y) -> (lon, lat)."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        if not self.native or x.size == 0:
            return x, y
        lon, lat = self._inv_t.transform(x, y)
        lon = np.where(lon < self.lon.min() - 180.0, lon + 360.0, lon)
        lon = np.where(lon > self.lon.max() + 180.0, lon - 360.0, lon)
        return lon, lat

    def _set(self, key, data):
        """Replace a source's data, its (lon, lat) columns moved to the display plane."""
        if self.native:
            data = dict(data)
            if "xs" in data:
                xs, ys = [], []
                for a, b in zip(data["xs"], data["ys"]):
                    px, py = self.fwd(a, b)
                    xs.append(np.asarray(px).tolist())
                    ys.append(np.asarray(py).tolist())
                data["xs"], data["ys"] = xs, ys
            for kx, ky in (("x", "y"), ("x0", "y0"), ("x1", "y1")):
                if kx in data:
                    px, py = self.fwd(data[kx], data[ky])
                    data[kx], data[ky] = np.asarray(px).tolist(), np.asarray(py).tolist()
        self.src[key].data = data

    def _set_vectors(self, key, shafts, heads, head_key=None):
        """Arrow shafts and heads; in the projection plane the heads point along the
        projected shafts."""
        head_key = head_key or f"{key}_head"
        self._set(key, shafts)
        if self.native and len(shafts.get("x0", [])):
            d = self.src[key].data
            dx = np.asarray(d["x1"], float) - np.asarray(d["x0"], float)
            dy = np.asarray(d["y1"], float) - np.asarray(d["y0"], float)
            heads = dict(heads, angle=(np.arctan2(dy, dx) - np.pi / 2).tolist())
        self._set(head_key, heads)

    # ---------------------------------------------------------------- build (once)
    def _build(self, width, height):
        lon, lat = self.lon, self.lat
        if self.native:
            (xa, xb), (ya, yb) = self.bounds
        else:
            pad_x = 0.5 * float(lon[1] - lon[0]) if len(lon) > 1 else 0.5
            pad_y = 0.5 * float(abs(lat[1] - lat[0])) if len(lat) > 1 else 0.5
            xa, xb = float(lon.min()) - pad_x, float(lon.max()) + pad_x
            ya, yb = float(lat.min()) - pad_y, float(lat.max()) + pad_y
        P = self.prefix
        if self._shared_ranges is not None:
            x_range, y_range = self._shared_ranges
        else:
            x_range = Range1d(xa, xb, bounds=(xa, xb))
            y_range = Range1d(ya, yb, bounds=(ya, yb))
        self.tools = dict(
            pan=PanTool(), wheel=WheelZoomTool(), box=BoxZoomTool(), reset=ResetTool(),
            save=SaveTool(),
            lasso=LassoSelectTool(description="Lasso a piece (a PV anomaly region)"),
            section=FreehandDrawTool(description="Draw a section line (drag from start to end)",
                                     num_objects=1),
            target=TapTool(description="Pick the attribution target point"),
        )
        fig = figure(name=f"{P}-map", width=width, height=height, x_range=x_range,
                     sizing_mode="scale_width", max_width=width, min_width=280,
                     y_range=y_range, tools=list(self.tools.values()), toolbar_location="above",
                     x_axis_label="longitude", y_axis_label="latitude",
                     output_backend="canvas")
        fig.toolbar.logo = None
        if self.native:  # distances on the projection plane
            fig.xaxis.axis_label = "x on the data's projection (km)"
            fig.yaxis.axis_label = "y (km)"
            km = CustomJSTickFormatter(code="return (tick / 1000).toFixed(0);")
            fig.xaxis.formatter = km
            fig.yaxis.formatter = CustomJSTickFormatter(code="return (tick / 1000).toFixed(0);")
        else:
            _lonlat_axes(fig)
        fig.toolbar.active_scroll = self.tools["wheel"]
        fig.toolbar.active_drag = self.tools["pan"]
        fig.title.text_font_size = "13px"
        fig.grid.grid_line_alpha = 0.25
        self.figure = fig
        S = ColumnDataSource
        self.src = dict(
            field=S(dict(image=[np.zeros((1, 1))], x=[0.0], y=[0.0], dw=[1.0], dh=[1.0]),
                    name=f"{P}-field"),
            trop=S(dict(xs=[], ys=[]), name=f"{P}-pv2"),
            coast=S(dict(xs=[], ys=[]), name=f"{P}-coast"),
            wind=S(_empty_vectors()[0], name=f"{P}-wind"),
            wind_head=S(_empty_vectors()[1], name=f"{P}-wind-head"),
            bal=S(_empty_vectors()[0], name=f"{P}-balanced-vectors"),
            bal_head=S(_empty_vectors()[1], name=f"{P}-balanced-heads"),
            zpos=S(dict(xs=[], ys=[]), name=f"{P}-height-pos"),
            zneg=S(dict(xs=[], ys=[]), name=f"{P}-height-neg"),
            pieces=S(dict(xs=[], ys=[], colour=[], name=[], alpha=[]), name=f"{P}-pieces"),
            piece_labels=S(dict(x=[], y=[], text=[], colour=[]), name=f"{P}-piece-labels"),
            sections=S(dict(xs=[], ys=[], width=[], alpha=[]), name=f"{P}-sections"),
            section_ends=S(dict(x=[], y=[], text=[]), name=f"{P}-section-ends"),
            stroke=S(dict(xs=[], ys=[]), name=f"{P}-stroke"),
            target=S(dict(x=[], y=[]), name=f"{P}-target"),
            grid=S(dict(x=[], y=[]), name=f"{P}-grid"),
            ann_text=S(dict(x=[], y=[], text=[], colour=[], size=[], style=[], fill=[]),
                       name=f"{P}-ann-text"),
            ann_poly=S(dict(xs=[], ys=[], colour=[], fill=[], alpha=[], width=[], dash=[]),
                       name=f"{P}-ann-regions"),
            ann_arrow=S(dict(x0=[], y0=[], x1=[], y1=[], colour=[], width=[]),
                        name=f"{P}-ann-arrows"),
            ann_head=S(dict(x=[], y=[], angle=[], colour=[]), name=f"{P}-ann-arrow-heads"),
        )
        src = self.src
        self.mapper = LinearColorMapper(palette=palette("pv"), low=0, high=8, nan_color=(0, 0, 0, 0))
        self.image = fig.image(image="image", x="x", y="y", dw="dw", dh="dh", source=src["field"],
                               color_mapper=self.mapper, name=f"{P}-field-image")
        self.colorbar = ColorBar(color_mapper=self.mapper, title="PV (PVU)", width=14,
                                 title_text_font_size="12px", major_label_text_font_size="11px",
                                 name=f"{P}-colorbar")
        fig.add_layout(self.colorbar, "right")
        fig.multi_line("xs", "ys", source=src["coast"], line_color="#3b3b3b", line_width=1.0)
        fig.multi_line("xs", "ys", source=src["trop"], line_color="#000000", line_width=1.6,
                       line_alpha=0.8)
        fig.segment("x0", "y0", "x1", "y1", source=src["wind"], line_color=WIND_COLOUR,
                    line_width=1.0, line_alpha=0.8, name=f"{P}-wind-shafts")
        fig.scatter("x", "y", angle="angle", source=src["wind_head"], marker="triangle", size=5,
                    fill_color=WIND_COLOUR, line_color=None, fill_alpha=0.8)
        fig.patches("xs", "ys", source=src["ann_poly"], fill_alpha="alpha", fill_color="fill",
                    line_color="colour", line_width="width", line_dash="dash",
                    name=f"{P}-ann-region-patches")
        fig.patches("xs", "ys", source=src["pieces"], fill_color="colour", fill_alpha="alpha",
                    line_color="colour", line_width=2.2, line_dash="dashed", name=f"{P}-piece-patches")
        fig.text("x", "y", text="text", source=src["piece_labels"], text_color="colour",
                 text_font_size="12px", text_font_style="bold", text_align="center",
                 text_baseline="middle", background_fill_color="white",
                 background_fill_alpha=0.7)
        for key, colour, dash in (("zpos", POS_CONTOUR, HEIGHT_POSITIVE["dash"]),
                                  ("zneg", NEG_CONTOUR, HEIGHT_NEGATIVE["dash"])):
            fig.multi_line("xs", "ys", source=src[key], line_color="white", line_width=4.0,
                           line_alpha=0.7)  # a halo keeps the lines legible on any shading
            fig.multi_line("xs", "ys", source=src[key], line_color=colour, line_width=2.0,
                           line_dash=dash, name=f"pvwb-{key}-lines")
        fig.segment("x0", "y0", "x1", "y1", source=src["bal"], line_color=BALANCED_COLOUR,
                    line_width=2.2, name=f"{P}-balanced-shafts")
        fig.scatter("x", "y", angle="angle", source=src["bal_head"], marker="triangle", size=8,
                    fill_color=BALANCED_COLOUR, line_color="white", line_width=0.5)
        fig.multi_line("xs", "ys", source=src["sections"], line_color="white",
                       line_width=5, line_alpha="alpha")
        fig.multi_line("xs", "ys", source=src["sections"], line_color=SECTION_COLOUR,
                       line_width="width", line_alpha="alpha")
        fig.text("x", "y", text="text", source=src["section_ends"], text_color=SECTION_COLOUR,
                 text_font_size="14px", text_font_style="bold", text_align="center",
                 text_baseline="bottom", y_offset=-4)
        stroke = fig.multi_line("xs", "ys", source=src["stroke"], line_color=SECTION_COLOUR,
                                line_width=2, line_dash="dotted")
        self.tools["section"].renderers = [stroke]
        fig.scatter("x", "y", source=src["target"], marker="circle_x", size=16,
                    fill_color="white", fill_alpha=0.6, line_color="#000000", line_width=2)
        fig.segment("x0", "y0", "x1", "y1", source=src["ann_arrow"], line_color="colour",
                    line_width="width")
        fig.scatter("x", "y", angle="angle", source=src["ann_head"], marker="triangle", size=11,
                    fill_color="colour", line_color="colour")
        fig.text("x", "y", text="text", source=src["ann_text"], text_color="colour",
                 text_font_size="size", text_font_style="style", text_align="center",
                 text_baseline="middle", background_fill_color="fill",
                 background_fill_alpha=0.8, border_line_color="colour",
                 border_line_alpha=0.6, padding=2, name=f"{P}-ann-labels")
        grid = fig.scatter("x", "y", source=src["grid"], size=1, alpha=0.0,
                           nonselection_alpha=0.0, selection_alpha=0.0, name=f"{P}-grid-points")
        self.tools["lasso"].renderers = [grid]
        self.tools["target"].renderers = [grid]
        self._build_readout(fig)
        self._build_legend_arrow(fig)
        self.key = Label(x=6, y=6, x_units="screen", y_units="screen", text="",
                         text_font_size="11px", background_fill_color="white",
                         background_fill_alpha=0.8, name=f"{P}-overlay-key")
        fig.add_layout(self.key)
        fig.on_event(SelectionGeometry, self._lasso_event)
        fig.on_event(Tap, self._tap_event)
        src["stroke"].on_change("data", self._stroke_changed)
        # lasso hit-test points: a coarse grid (display only)
        step = max(1, int(round(len(lon) / 40)))
        gx, gy = np.meshgrid(lon[::step], self.lat[::step])
        self._set("grid", dict(x=gx.ravel().tolist(), y=gy.ravel().tolist()))
        d = self.state.case.domain
        xs, ys, note = coastline_lines(d["lon_min"], d["lon_max"], d["lat_min"], d["lat_max"])
        self._set("coast", dict(xs=xs, ys=ys))
        self.coast_note = note

    # ---------------------------------------------------------------- modes and events
    def set_mode(self, mode):
        """Activate the drag/tap tool of a mouse mode: 'pan', 'lasso', 'section', 'target'
        or 'label'."""
        tb = self.figure.toolbar
        if mode == "lasso":
            tb.active_drag = self.tools["lasso"]
            tb.active_tap = None
        elif mode == "section":
            tb.active_drag = self.tools["section"]
            tb.active_tap = None
        elif mode in ("target", "label"):
            tb.active_drag = self.tools["pan"]
            tb.active_tap = self.tools["target"]
        else:
            tb.active_drag = self.tools["pan"]
            tb.active_tap = None
        self.mode = mode
        _push(self.pane)

    def _lasso_event(self, event):
        if not event.final or self.on_lasso is None:
            return
        g = event.geometry
        if g.get("type") != "poly" or self.mode != "lasso":
            return  # taps with the target tool also report a (point) geometry
        xs, ys = g.get("x"), g.get("y")
        if xs is None or len(xs) < 3:
            return
        lon, lat = self.inv(xs, ys)  # the State holds (lon, lat), whatever the display
        poly = [(float(x), float(y)) for x, y in zip(lon, lat)]
        self.on_lasso(poly)

    def _tap_event(self, event):
        if event.x is None or event.y is None:
            return
        lon, lat = self.inv([event.x], [event.y])
        self.last_click = (float(lon[0]), float(lat[0]))
        page = getattr(self.state, "page", None)
        if page is not None:
            page.last_click = self.last_click
        mode = getattr(self, "mode", "pan")
        if mode == "target" and self.on_tap is not None:
            self.on_tap(*self.last_click)
        elif mode == "label" and self.on_label is not None:
            self.on_label(*self.last_click)

    def _stroke_changed(self, attr, old, new):
        xs, ys = new.get("xs", []), new.get("ys", [])
        if not xs or not len(xs[0]):
            return
        x, y = list(xs[-1]), list(ys[-1])
        self.src["stroke"].data = dict(xs=[], ys=[])
        if len(x) < 2 or self.on_section is None:
            return
        lon, lat = self.inv([x[0], x[-1]], [y[0], y[-1]])
        self.on_section((float(lon[0]), float(lat[0])), (float(lon[1]), float(lat[1])))

    # ---------------------------------------------------------------- refresh
    def _safe(self, fn):
        try:
            fn()
        except Exception as exc:  # the page never dies; the status says why
            self.state.report(exc)
        _push(self.pane)

    def refresh_all(self):
        for fn in (self.refresh_field, self.refresh_overlay, self.refresh_pieces,
                   self.refresh_sections, self.refresh_target, self.refresh_annotations):
            self._safe(fn)

    def refresh_field(self):
        st = self.state
        da = self.field_source() if self.field_source is not None else st.map_field()
        lat = da["latitude"].values
        lon = da["longitude"].values
        z = np.asarray(da.transpose("latitude", "longitude").values, float)
        diff = da.attrs.get("difference")
        pal, lo, hi, title, scale = field_style(st.field, z)
        if diff:
            pal, lo, hi, title, scale = difference_style(st.field, z)
        img = z * scale
        if self.native:
            # display only: the field sampled (bilinear in lon/lat) at a regular grid of the
            # projection plane
            from scipy.interpolate import RegularGridInterpolator

            glat, glon = self._glonlat
            f = RegularGridInterpolator((lat, lon), img, bounds_error=False, fill_value=np.nan)
            pimg = f(np.stack([glat.ravel(), glon.ravel()], axis=-1)).reshape(glat.shape)
            gx, gy = self._gx, self._gy
            dx, dy = float(gx[1] - gx[0]), float(gy[1] - gy[0])
            self.src["field"].data.update(image=[pimg], x=[float(gx[0]) - dx / 2],
                                          y=[float(gy[0]) - dy / 2], dw=[dx * len(gx)],
                                          dh=[dy * len(gy)])
            img = None
        if img is None:
            pass
        elif len(lat) > 2 and np.ptp(np.diff(lat)) > 1e-6 * abs(lat[-1] - lat[0]):
            # display on a uniform latitude grid (the image glyph needs one)
            ulat = np.linspace(lat.min(), lat.max(), len(lat))
            img = np.array([np.interp(ulat, lat, img[:, i]) for i in range(img.shape[1])]).T
            lat = ulat
        if img is not None:
            dx = float(lon[1] - lon[0]) if len(lon) > 1 else 1.0
            dy = float(lat[1] - lat[0]) if len(lat) > 1 else 1.0
            self.src["field"].data.update(image=[img], x=[float(lon[0]) - dx / 2],
                                          y=[float(lat[0]) - dy / 2], dw=[dx * len(lon)],
                                          dh=[dy * len(lat)])
        self._refresh_field_readout(da, diff)
        self.mapper.update(palette=list(pal), low=lo, high=hi)
        self.colorbar.title = title
        if st.field == "ertel_pv":  # the threshold contour: the dynamic tropopause's trace
            xs, ys = _contour_lines(lon, da["latitude"].values, z, [st.threshold * np.sign(
                np.nanmean(st.case.data["latitude"].values))])
        else:
            xs, ys = [], []
        self._set("trop", dict(xs=xs, ys=ys))
        self._refresh_wind()
        t = st.time_labels[st.time_index]
        label, units = FIELD_LABELS.get(st.field, (st.field, ""))[:2]
        self.figure.title.text = (f"{label} on {surface_label(st.surface, st.threshold)}, "
                                  f"valid {t}" + (f", member {st.member}" if st.member is not None
                                                  else ""))
        if diff:
            self.figure.title.text = f"{label} on {surface_label(st.surface, st.threshold)}: {diff}"

    def _refresh_wind(self):
        st = self.state
        try:
            u = st.case.map_field("u", st.surface, reference=st.reference,
                                  threshold=st.threshold, **st._sel())
            v = st.case.map_field("v", st.surface, reference=st.reference,
                                  threshold=st.threshold, **st._sel())
        except Exception:
            self._set_vectors("wind", *_empty_vectors())
            return
        stride = max(1, int(round(len(self.lon) / 22)))
        spacing = stride * float(abs(self.lat[1] - self.lat[0]) if len(self.lat) > 1 else 1.0)
        scale = 0.9 * spacing / 50.0  # 50 m/s spans about one arrow spacing
        shafts, heads = _vector_data(self.lon, self.lat,
                                     u.transpose("latitude", "longitude").values,
                                     v.transpose("latitude", "longitude").values,
                                     stride, scale, self.coslat0, min_speed=1.0)
        self._set_vectors("wind", shafts, heads)

    def refresh_overlay(self):
        """Balanced flow of the visible pieces: vectors and height-anomaly contours, in place."""
        st = self.state
        ov = st.overlay_readout() if st.pieces else None
        if ov is None:
            self._set_vectors("bal", *_empty_vectors())
            self._set("zpos", dict(xs=[], ys=[]))
            self._set("zneg", dict(xs=[], ys=[]))
            self._set_legend_arrow(None)
            self._set_overlay_readout(None)
            self.key.text = "" if not st.pieces else (
                "no visible piece (show one in the list)" if not st.visible_results() else
                "every visible piece is left out of the overlay (see the overlay settings)")
            return
        lon, lat = ov["longitude"].values, ov["latitude"].values
        u = ov["u"].transpose("latitude", "longitude").values
        v = ov["v"].transpose("latitude", "longitude").values
        z = ov["height_anomaly"].transpose("latitude", "longitude").values
        speed = ov["wind_speed"].transpose("latitude", "longitude").values
        vmax = float(np.nanmax(speed)) if np.isfinite(speed).any() else 0.0
        ref = st.overlay_arrow_speed or _nice(max(vmax, 1e-3))
        stride = st.overlay_arrow_stride or max(1, int(round(len(lon) / 18)))
        spacing = stride * float(abs(lat[1] - lat[0]) if len(lat) > 1 else 1.0)
        scale = 1.1 * spacing / ref  # degrees of latitude per m/s
        shafts, heads = _vector_data(lon, lat, u, v, stride, scale, self.coslat0,
                                     min_speed=0.05 * ref)
        self._set_vectors("bal", shafts, heads)
        self._set_legend_arrow(ref, scale)
        self._set_overlay_readout(ov)
        zmax = float(np.nanmax(np.abs(z))) if np.isfinite(z).any() else 0.0
        step = st.overlay_contour_interval or (_nice(zmax / 5.0) if zmax > 0 else 1.0)
        # at most MAX_CONTOURS lines of each sign (a tiny interval on a big anomaly)
        levels = np.arange(step, min(zmax, MAX_CONTOURS * step) + step, step)
        xs, ys = _contour_lines(lon, lat, z, levels)
        self._set("zpos", dict(xs=xs, ys=ys))
        xs, ys = _contour_lines(lon, lat, z, -levels)
        self._set("zneg", dict(xs=xs, ys=ys))
        names = ", ".join(ov.attrs["pieces"])
        self.key.text = (f"balanced flow at {ov.attrs['level_hpa']:g} hPa of {names}: "
                         f"arrow ≈ {ref:g} m/s per spacing; {height_key(step)}")

    # ---------------------------------------------------------------- read-outs (hover)
    def _build_readout(self, fig):
        """The hover on the field image: the field's name, value and units, the point's
        longitude/latitude (°E/°W, °N/°S), its pressure or θ, and the visible pieces'
        balanced height anomaly and wind. Every value is a layer (an image-shaped column) of
        the field's source, read from the State; the tooltip rows change with the field."""
        self._lon_fmt = CustomJSHover(code=_JS_LON)
        self._lat_fmt = CustomJSHover(code=_JS_LAT)
        self.hover = HoverTool(renderers=[self.image], tooltips=[("", "")],
                               formatters={"@lon": self._lon_fmt, "@lat": self._lat_fmt},
                               name=f"{self.prefix}-hover")
        fig.add_tools(self.hover)

    def _display_layer(self, arr, nearest=True):
        """A (latitude, longitude) layer of the case grid as the field image shows it: on
        the projection plane's display grid, or on the uniform latitudes of the image
        (nearest grid point: a read-out gives grid-point values, never blends them)."""
        arr = np.asarray(arr, float)
        lat, lon = self.lat, self.lon
        if self.native:
            from scipy.interpolate import RegularGridInterpolator

            glat, glon = self._glonlat
            f = RegularGridInterpolator((lat, lon), arr, method="nearest" if nearest else
                                        "linear", bounds_error=False, fill_value=np.nan)
            return f(np.stack([glat.ravel(), glon.ravel()], axis=-1)).reshape(glat.shape)
        if len(lat) > 2 and np.ptp(np.diff(lat)) > 1e-6 * abs(lat[-1] - lat[0]):
            ulat = np.linspace(lat.min(), lat.max(), len(lat))
            j = np.abs(lat[:, None] - ulat[None, :]).argmin(axis=0)
            return arr[j, :]
        return arr

    def _lonlat_layers(self):
        if self.native:
            glat, glon = self._glonlat
            return np.asarray(glon, float), np.asarray(glat, float)
        LON, LAT = np.meshgrid(self.lon, self.lat)
        return self._display_layer(LON), self._display_layer(LAT)

    def _refresh_field_readout(self, da, diff):
        st = self.state
        label, units = FIELD_LABELS.get(st.field, (st.field, ""))[:2]
        units = _READ_UNITS.get(units, units)
        fmt = _READ_FORMAT.get(st.field, "0.00")
        name = f"{label} on {surface_label(st.surface, st.threshold)}"
        if diff:
            name = f"{name}, {diff}"
        data = self.src["field"].data
        lon, lat = self._lonlat_layers()
        shape = lon.shape
        # (longitudes and latitudes never change: sent once)
        layers = {} if "lon" in data and np.shape(data["lon"][0]) == shape else \
            dict(lon=[lon.astype(np.float32)], lat=[lat.astype(np.float32)])
        aux_rows = []
        try:
            aux = st.map_point_field()
        except Exception:  # noqa: BLE001  (a read-out never stops the map)
            aux = None
        if aux is not None:
            a = np.asarray(aux.transpose("latitude", "longitude").values, float)
            if aux.attrs.get("units") == "Pa":
                layers["aux"] = [self._display_layer(a / 100.0)]
                aux_rows = [(aux.attrs.get("label", "pressure"), "@aux{0} hPa")]
            else:
                layers["aux"] = [self._display_layer(a)]
                aux_rows = [(aux.attrs.get("label", "θ"), "@aux{0.0} K")]
        else:
            layers["aux"] = [np.full_like(lon, np.nan)]
        for key in ("zb", "bspd", "bdir"):
            old = self._readout.get(key)
            if old is None or old[0].shape != shape:
                self._readout[key] = [np.full(shape, np.nan, np.float32)]
            if key not in data or np.shape(data[key][0]) != shape:
                layers[key] = self._readout[key]
        if "pnames" not in data:
            layers["pnames"] = self._readout.setdefault("pnames", [""])
        layers["aux"] = [np.asarray(layers["aux"][0], np.float32)]
        data.update(**layers)
        self._tips["field"] = [(name, f"@image{{{fmt}}} {units}"),
                               ("at", "@lon{custom}, @lat{custom}")]
        self._tips["aux"] = aux_rows
        self._update_tips()

    def _set_overlay_readout(self, ov):
        """The balanced height anomaly and wind of the overlay as read-out layers."""
        if ov is None:
            shape = self._lonlat_layers()[0].shape
            self._readout = {k: [np.full(shape, np.nan, np.float32)] for k in ("zb", "bspd",
                                                                                 "bdir")}
            self._readout["pnames"] = [""]
            self._tips["balanced"] = []
        else:
            get = lambda n: ov[n].transpose("latitude", "longitude").values  # noqa: E731
            self._readout = {k: [self._display_layer(get(n)).astype(np.float32)] for k, n in (
                ("zb", "height_anomaly"), ("bspd", "wind_speed"),
                ("bdir", "wind_from_direction"))}
            names = ", ".join(ov.attrs["pieces"])
            lev = f"{ov.attrs['level_hpa']:g} hPa"
            # (piece names are user text: a data column, inserted as text, never template)
            self._readout["pnames"] = [names]
            self._tips["balanced"] = [(f"balanced Z′ ({lev})", "@zb{0.0} m"),
                                      (f"balanced wind ({lev})", "@bspd{0.0} m/s from @bdir{0}°"),
                                      ("of", "@pnames")]
        if "image" in self.src["field"].data and \
                self.src["field"].data["image"][0].shape == self._readout["zb"][0].shape:
            self.src["field"].data.update(**self._readout)
        self._update_tips()

    def _update_tips(self):
        self.hover.tooltips = (self._tips["field"] + self._tips["aux"] +
                               self._tips["balanced"]) or [("", "")]

    # ---------------------------------------------------------------- legend arrow
    def _build_legend_arrow(self, fig):
        S, P = ColumnDataSource, self.prefix
        self.src["legend_arrow"] = S(_empty_vectors()[0], name=f"{P}-legend-arrow")
        self.src["legend_head"] = S(_empty_vectors()[1], name=f"{P}-legend-arrow-head")
        self.src["legend_text"] = S(dict(x=[], y=[], text=[]), name=f"{P}-legend-arrow-text")
        fig.segment("x0", "y0", "x1", "y1", source=self.src["legend_arrow"],
                    line_color=BALANCED_COLOUR, line_width=2.2)
        fig.scatter("x", "y", angle="angle", source=self.src["legend_head"], marker="triangle",
                    size=8, fill_color=BALANCED_COLOUR, line_color="white", line_width=0.5)
        fig.text("x", "y", text="text", source=self.src["legend_text"], text_font_size="12px",
                 text_font_style="bold", text_align="left", text_baseline="middle",
                 x_offset=6, background_fill_color="white", background_fill_alpha=0.8)

    def _set_legend_arrow(self, speed, scale=None):
        """An eastward arrow of ``speed`` m/s drawn as the overlay's arrows are (same scale),
        near the domain's north-west corner, labelled e.g. "20 m/s"; None removes it."""
        if speed is None:
            self._set_vectors("legend_arrow", *_empty_vectors(), head_key="legend_head")
            self._set("legend_text", dict(x=[], y=[], text=[]))
            return
        lon, lat = self.lon, self.lat
        x0 = float(lon.min()) + 0.04 * float(np.ptp(lon))
        y0 = float(lat.max()) - 0.05 * float(np.ptp(lat))
        shafts, heads = _vector_data(np.array([x0]), np.array([y0]), np.array([[speed]]),
                                     np.array([[0.0]]), 1, scale, self.coslat0)
        self._set_vectors("legend_arrow", shafts, heads, head_key="legend_head")
        self._set("legend_text", dict(x=[shafts["x1"][0]], y=[y0], text=[f"{speed:g} m/s"]))

    def refresh_pieces(self):
        xs, ys, col, names, alpha = [], [], [], [], []
        lx, ly, lt, lc = [], [], [], []
        for p in self.state.pieces:
            if p.polygon is None:
                continue
            a = np.asarray(p.polygon, float)
            xs.append(a[:, 0].tolist())
            ys.append(a[:, 1].tolist())
            c = p.colour or "#444444"
            col.append(c)
            names.append(p.name)
            alpha.append(0.08 if p.visible else 0.0)
            cx, cy = _centroid(p.polygon)
            lx.append(cx)
            ly.append(cy)
            lt.append(p.name if p.visible else f"{p.name} (hidden)")
            lc.append(c)
        self._set("pieces", dict(xs=xs, ys=ys, colour=col, name=names, alpha=alpha))
        self._set("piece_labels", dict(x=lx, y=ly, text=lt, colour=lc))

    def refresh_sections(self):
        st = self.state
        xs, ys, w, al = [], [], [], []
        ex, ey, et = [], [], []
        for k, s in enumerate(st.sections):
            lon, lat, _, _ = great_circle_path(s.start, s.end, 60)
            xs.append(lon.tolist())
            ys.append(lat.tolist())
            active = k == st.active_section
            w.append(3.0 if active else 1.5)
            al.append(1.0 if active else 0.5)
            if active:
                ex += [float(lon[0]), float(lon[-1])]
                ey += [float(lat[0]), float(lat[-1])]
                et += ["A", "B"]
        self._set("sections", dict(xs=xs, ys=ys, width=w, alpha=al))
        self._set("section_ends", dict(x=ex, y=ey, text=et))

    def refresh_target(self):
        t = self.state.target
        self._set("target", dict(x=[] if t is None else [t[0]], y=[] if t is None else [t[1]]))

    def refresh_annotations(self):
        """The state's map annotations: labels (their colour, size and box), arrows (shaft
        and head) and highlighted regions (outline style, optional fill, label at the
        centroid), drawn as they are in the static figures."""
        from ..annotations import Arrow, Label as ALabel, Region

        text = dict(x=[], y=[], text=[], colour=[], size=[], style=[], fill=[])
        poly = dict(xs=[], ys=[], colour=[], fill=[], alpha=[], width=[], dash=[])
        arrow = dict(x0=[], y0=[], x1=[], y1=[], colour=[], width=[])
        head = dict(x=[], y=[], angle=[], colour=[])

        def put(x, y, t, colour, size=10.0, bold=True, box=True):
            for k, v in zip(("x", "y", "text", "colour", "size", "style", "fill"),
                            (x, y, t, colour, f"{1.2 * size:.0f}px", "bold" if bold else
                             "normal", "white" if box else None)):
                text[k].append(v)

        for a in self.state.annotations:
            if getattr(a, "space", "map") != "map":
                continue
            if isinstance(a, ALabel):
                put(a.lon, a.lat, a.text, a.colour, a.size, a.weight == "bold", a.box)
            elif isinstance(a, Arrow):
                for k, v in zip(("x0", "y0", "x1", "y1", "colour", "width"),
                                (a.start_lon, a.start_lat, a.end_lon, a.end_lat, a.colour,
                                 a.width)):
                    arrow[k].append(v)
                ang = math.atan2(a.end_lat - a.start_lat,
                                 (a.end_lon - a.start_lon) * self.coslat0) - math.pi / 2
                for k, v in zip(("x", "y", "angle", "colour"),
                                (a.end_lon, a.end_lat, ang, a.colour)):
                    head[k].append(v)
                if a.text:
                    put(a.start_lon, a.start_lat, a.text, a.colour, a.size)
            elif isinstance(a, Region):
                arr = np.asarray(a.polygon, float)
                poly["xs"].append(arr[:, 0].tolist())
                poly["ys"].append(arr[:, 1].tolist())
                poly["colour"].append(a.colour)
                poly["fill"].append(a.fill or a.colour)
                poly["alpha"].append(float(a.alpha) if a.fill else 0.0)
                poly["width"].append(float(a.width))
                poly["dash"].append(a.linestyle)
                if a.label:
                    cx, cy = a.centroid()
                    put(cx, cy, a.label, a.colour)
        self._set("ann_text", text)
        self._set("ann_poly", poly)
        self._set_vectors("ann_arrow", arrow, head, head_key="ann_head")


# --------------------------------------------------------------------------- the section


class SectionView:
    """The cross-section of the state's active section line.

    Top panel: PV shaded (same colours as the map), potential temperature contours (every
    5 K), section-normal wind (m s-1, positive into the page to the left of A->B; solid
    positive, dashed negative) and the dynamic tropopause. Bottom panel, shown once pieces
    exist: the visible pieces' summed balanced temperature anomaly (shaded), balanced normal
    wind and the QG omega attributable to them (ascent dashed).

    Both figures (Bokeh names ``pvwb-section-plot`` and ``pvwb-section-pieces-plot``) are
    built once per case; a new line, time, piece or threshold replaces their sources' data
    and ranges in place, and the panes are shown or hidden, so the page never gains objects.
    """

    def __init__(self, state, width=820, defer=None):
        self.state = state
        self.width = width
        self.defer = defer or (lambda fn: fn())
        self.dataset = None
        self.hint = TextMarkdown(
            "**Section.** Choose *Draw a section* and drag a line across the map "
            "(from A to B).", styles={"color": "#555"}, name="pvwb-section-hint")
        self._build()
        # (a Bokeh pane gives its name to its figure)
        self.main_pane = pn.pane.Bokeh(self.main, name="pvwb-section-plot", visible=False,
                                       sizing_mode="scale_width", max_width=self.width)
        self.pieces_pane = pn.pane.Bokeh(self.lower, name="pvwb-section-pieces-plot",
                                         visible=False, sizing_mode="scale_width",
                                         max_width=self.width)
        self.pane = pn.Column(self.hint, self.main_pane, self.pieces_pane,
                              sizing_mode="stretch_width", name="pvwb-section",
                              css_classes=["pvwb-section"])
        self._watchers = [state.param.watch(lambda *ev: self.defer(self.refresh), [
            "sections", "active_section", "time_index", "member", "pieces", "reference",
            "threshold"])]
        self.refresh()

    def detach(self):
        for w in self._watchers:
            self.state.param.unwatch(w)
        self._watchers = []

    # ---------------------------------------------------------------- build (once)
    def _frame(self, title, height, x_range, name):
        p = np.asarray(self.state.case.levels_hpa, float)
        fig = figure(width=self.width, height=height, y_axis_type="log",
                     sizing_mode="scale_width", max_width=self.width, min_width=280,
                     y_range=Range1d(float(p.max()), float(p.min())), x_range=x_range,
                     title=title, x_axis_label="distance from A (km)",
                     y_axis_label="pressure (hPa)", tools="pan,wheel_zoom,box_zoom,reset,save",
                     toolbar_location="above", name=name)
        fig.toolbar.logo = None
        fig.title.text_font_size = "13px"
        fig.yaxis.ticker = [x for x in (1000, 925, 850, 700, 500, 400, 300, 250, 200, 150, 100,
                                        70, 50) if p.min() <= x <= p.max()]
        return fig

    def _lines(self, fig, key, colour, dash="solid", width=1.2):
        self.src[key] = ColumnDataSource(dict(xs=[], ys=[]), name=f"pvwb-section-{key}")
        fig.multi_line("xs", "ys", source=self.src[key], line_color=colour, line_width=width,
                       line_dash=dash)

    def _labels(self, fig, key, colour):
        self.src[key] = ColumnDataSource(dict(x=[], y=[], text=[]), name=f"pvwb-section-{key}")
        fig.text("x", "y", text="text", source=self.src[key], text_color=colour,
                 text_font_size="10px", text_align="center", text_baseline="middle",
                 background_fill_color="white", background_fill_alpha=0.6)

    def _cells(self, fig, key, mapper):
        self.src[key] = ColumnDataSource(dict(left=[], right=[], bottom=[], top=[], value=[]),
                                         name=f"pvwb-section-{key}")
        return fig.quad(left="left", right="right", bottom="bottom", top="top",
                        source=self.src[key],
                        fill_color={"field": "value", "transform": mapper},
                        line_color={"field": "value", "transform": mapper}, line_width=0.6)

    def _build(self):
        self.src = {}
        x_range = Range1d(0.0, 1.0)
        top = self._frame("Section", 330, x_range, "pvwb-section-plot")
        self.pv_mapper = LinearColorMapper(palette=list(palette("pv")), low=0, high=8,
                                           nan_color=(0, 0, 0, 0))
        cells = self._cells(top, "pv", self.pv_mapper)
        # hover read-out: every value a column of the PV cells' source (from the section)
        self.hover = HoverTool(renderers=[cells], name="pvwb-section-hover", tooltips=[
            ("distance from A", "@dist{0} km"), ("at", "@lon{custom}, @lat{custom}"),
            ("pressure", "@pres{0} hPa"), ("PV", "@value{0.00} PVU"), ("θ", "@theta{0.0} K"),
            ("normal wind", "@vn{0.0} m/s (+: to the left of A→B)")],
            formatters={"@lon": CustomJSHover(code=_JS_LON), "@lat": CustomJSHover(code=_JS_LAT)})
        top.add_tools(self.hover)
        self.pv_bar = ColorBar(color_mapper=self.pv_mapper, title="PV (PVU)", width=12,
                               title_text_font_size="11px")
        top.add_layout(self.pv_bar, "right")
        self._lines(top, "theta", "#3c3c3c", width=0.9)
        self._labels(top, "theta_labels", "#3c3c3c")
        self._lines(top, "vn_pos", "#8c2d04", width=1.4)
        self._lines(top, "vn_neg", "#8c2d04", dash="dashed", width=1.4)
        self._labels(top, "vn_labels", "#8c2d04")
        self.src["trop"] = ColumnDataSource(dict(x=[], y=[]), name="pvwb-section-tropopause")
        trop = top.line("x", "y", source=self.src["trop"], line_color="black", line_width=3)
        th = top.line([], [], line_color="#3c3c3c")
        vn = top.line([], [], line_color="#8c2d04")
        self.top_legend = Legend(items=[
            LegendItem(label="dynamic tropopause", renderers=[trop]),
            LegendItem(label="θ every 5 K", renderers=[th]),
            LegendItem(label="normal wind every 10 m/s (+ left of A→B)", renderers=[vn])])
        _legend_below(top, self.top_legend)
        low = self._frame("Balanced flow of the visible pieces", 260, x_range,
                          "pvwb-section-pieces-plot")
        self.ta_mapper = LinearColorMapper(palette=list(palette("anomaly")), low=-1, high=1,
                                           nan_color=(0, 0, 0, 0))
        self._cells(low, "ta", self.ta_mapper)
        low.add_layout(ColorBar(color_mapper=self.ta_mapper, title="balanced T′ (K)", width=12,
                                title_text_font_size="11px"), "right")
        self._lines(low, "bw_pos", "#000000", width=1.5)
        self._lines(low, "bw_neg", "#000000", dash="dashed", width=1.5)
        self._labels(low, "bw_labels", "#000000")
        self._lines(low, "om_up", OMEGA_ASCENT["colour"], dash=OMEGA_ASCENT["dash"],
                    width=OMEGA_ASCENT["width"])
        self._lines(low, "om_down", OMEGA_DESCENT["colour"], dash=OMEGA_DESCENT["dash"],
                    width=OMEGA_DESCENT["width"])
        bw = low.line([], [], line_color="#000000")
        om = low.line([], [], line_color=OMEGA_ASCENT["colour"], line_width=OMEGA_ASCENT["width"])
        self.low_legend = Legend(items=[LegendItem(label="balanced normal wind", renderers=[bw]),
                                        LegendItem(label="QG ω due to the pieces", renderers=[om])])
        _legend_below(low, self.low_legend)
        self.main, self.lower, self.x_range = top, low, x_range

    # ---------------------------------------------------------------- data (in place)
    def refresh(self):
        st = self.state
        sec = None
        if st.active_section is not None and st.sections:
            try:
                sec = st.section()
            except Exception as exc:  # noqa: BLE001
                st.report(exc)
        self.dataset = sec
        if sec is None:
            self._show(False, False)
            return
        self._fill_main(sec)
        has_pieces = "balanced_normal_wind" in sec
        if has_pieces:
            self._fill_pieces(sec)
        self._show(True, has_pieces)

    def _show(self, main, pieces):
        # (a Bokeh pane's model is the figure itself: its visibility is set there too)
        self.hint.visible = not main
        self.main.visible, self.lower.visible = main, pieces
        self.main_pane.visible, self.pieces_pane.visible = main, pieces
        _push(self.pane)

    def _set_lines(self, key, d, p, z, levels):
        xs, ys = _contour_lines(d, p, z, levels)
        self.src[key].data = dict(xs=xs, ys=ys)

    @staticmethod
    def _label_data(d, p, z, levels, at=0.5):
        """One label per level, ``at`` a fraction along the level's longest line."""
        lx, ly, lt = [], [], []
        for lev in levels:
            segs = _contour_lines(d, p, z, [lev])
            if segs[0]:
                k = max(range(len(segs[0])), key=lambda i: len(segs[0][i]))
                m = min(len(segs[0][k]) - 1, int(at * len(segs[0][k])))
                lx.append(segs[0][k][m])
                ly.append(segs[1][k][m])
                lt.append(f"{lev:g}")
        return lx, ly, lt

    def _fill_main(self, sec):
        st = self.state
        s = st.sections[st.active_section]
        d = sec["distance"].values
        p = sec["pressure"].values / 100.0
        self.x_range.update(start=float(d[0]), end=float(d[-1]))
        self.main.title.text = (
            f"Section A ({lon_label(s.start[0])}, {lat_label(s.start[1])}) → B "
            f"({lon_label(s.end[0])}, {lat_label(s.end[1])}), valid "
            f"{st.time_labels[st.time_index]}")
        pv = sec["ertel_pv"].transpose("pressure", "distance").values
        pal, lo, hi, ctitle, _ = field_style("ertel_pv", pv)
        self.pv_mapper.update(palette=list(pal), low=lo, high=hi)
        self.pv_bar.title = ctitle
        th = sec["potential_temperature"].transpose("pressure", "distance").values
        vn = sec["normal_wind"].transpose("pressure", "distance").values
        D, Pr = np.meshgrid(d, p)
        lon2, _ = np.meshgrid(sec["longitude"].values, p)
        lat2, _ = np.meshgrid(sec["latitude"].values, p)
        self.src["pv"].data = dict(_cell_data(d, p, pv), dist=D.ravel(), pres=Pr.ravel(),
                                   theta=np.asarray(th, float).ravel(),
                                   vn=np.asarray(vn, float).ravel(), lon=lon2.ravel(),
                                   lat=lat2.ravel())
        th = sec["potential_temperature"].transpose("pressure", "distance").values
        lo5 = 5 * math.floor(np.nanmin(th) / 5)
        tlev = np.concatenate([np.arange(lo5, 360.0, 5.0),
                               np.arange(360.0, np.nanmax(th) + 20, 20.0)])
        self._set_lines("theta", d, p, th, tlev)
        lx, ly, lt = self._label_data(d, p, th, tlev[(tlev % 10 == 0) & (tlev <= 360)], at=0.12)
        self.src["theta_labels"].data = dict(x=lx, y=ly, text=lt)
        vn = sec["normal_wind"].transpose("pressure", "distance").values
        vmax = float(np.nanmax(np.abs(vn))) if np.isfinite(vn).any() else 0
        vlev = np.arange(10.0, vmax + 10, 10.0)
        self._set_lines("vn_pos", d, p, vn, vlev)
        self._set_lines("vn_neg", d, p, vn, -vlev)
        a = self._label_data(d, p, vn, vlev)
        b = self._label_data(d, p, vn, -vlev)
        self.src["vn_labels"].data = dict(x=a[0] + b[0], y=a[1] + b[1], text=a[2] + b[2])
        self.src["trop"].data = dict(x=d.tolist(),
                                     y=(sec["tropopause_pressure"].values / 100.0).tolist())
        self.top_legend.items[0].label = value(f"dynamic tropopause ({st.threshold:g} PVU)")

    def _fill_pieces(self, sec):
        d = sec["distance"].values
        p = sec["pressure"].values / 100.0
        names = [str(n) for n in sec["piece"].values]
        self.lower.title.text = "Balanced flow of the visible pieces: " + ", ".join(names)
        ta = sec["balanced_temperature_anomaly"].sum("piece").transpose("pressure",
                                                                         "distance").values
        m = _nice(float(np.nanmax(np.abs(ta))) if np.isfinite(ta).any() else 1.0)
        self.ta_mapper.update(low=-m, high=m)
        self.src["ta"].data = _cell_data(d, p, ta)
        vn = sec["balanced_normal_wind"].sum("piece").transpose("pressure", "distance").values
        vmax = float(np.nanmax(np.abs(vn))) if np.isfinite(vn).any() else 0.0
        step = _nice(vmax / 4) if vmax > 0 else 1.0
        lev = np.arange(step, vmax + step, step)
        self._set_lines("bw_pos", d, p, vn, lev)
        self._set_lines("bw_neg", d, p, vn, -lev)
        a = self._label_data(d, p, vn, lev)
        b = self._label_data(d, p, vn, -lev)
        self.src["bw_labels"].data = dict(x=a[0] + b[0], y=a[1] + b[1], text=a[2] + b[2])
        self.low_legend.items[0].label = value(f"balanced normal wind every {step:g} m/s")
        empty = dict(xs=[], ys=[])
        self.src["om_up"].data, self.src["om_down"].data = empty, dict(empty)
        text = "QG ω due to the pieces: none"
        if "piece_qg_omega" in sec:
            om = sec["piece_qg_omega"].sum("piece").transpose("pressure", "distance").values
            omax = float(np.nanmax(np.abs(om))) if np.isfinite(om).any() else 0.0
            if omax > 0:
                ostep = _nice(omax / 3)
                olev = np.arange(ostep, omax + ostep, ostep)
                self._set_lines("om_up", d, p, om, -olev)
                self._set_lines("om_down", d, p, om, olev)
                text = omega_key("due to the pieces", ostep)
        self.low_legend.items[1].label = value(text)


def _legend_below(fig, legend):
    legend.orientation = "horizontal"
    legend.label_text_font_size = "11px"
    legend.border_line_color = None
    legend.margin = 2
    legend.padding = 2
    fig.add_layout(legend, "below")


# lon_label / lat_label: from .styles (shared with the command line and the figures)


def _cell_data(d, p, values):
    """(pressure, distance) values as cells around each node: edges at the geometric mean of
    neighbouring pressures and the mid-point of neighbouring distances (levels are uneven)."""
    pb = np.concatenate([[p[0]], np.sqrt(p[:-1] * p[1:]), [p[-1]]])
    db = np.concatenate([[d[0]], 0.5 * (d[:-1] + d[1:]), [d[-1]]])
    left, bottom = np.meshgrid(db[:-1], pb[:-1])
    right, top = np.meshgrid(db[1:], pb[1:])
    return dict(left=left.ravel(), right=right.ravel(), bottom=bottom.ravel(), top=top.ravel(),
                value=np.asarray(values, float).ravel())


def f0_caveat(case) -> str:
    """The constant-f0 caveat of the QG inversion for this case's domain (plain text)."""
    lat = np.asarray(case.data["latitude"].values, float)
    f0 = float(case.f0)
    from ..units import OMEGA

    phi0 = math.degrees(math.asin(max(-1.0, min(1.0, f0 / (2 * float(OMEGA))))))
    s = np.abs(np.sin(np.radians([lat.min(), lat.max()])))
    ratio = float(s.max() / max(s.min(), 1e-6))
    text = (f"The QG inversion uses one Coriolis parameter, f0 at {lat_label(phi0)}; "
            f"|f| varies by a factor {ratio:.1f} over this domain")
    return text + (", so balanced fields far from that latitude are rough." if ratio > 2
                   else ".")


def caution_html(case) -> str:
    """The caution line (and the invented-case label) for the page header, and the
    constant-f0 caveat of the inversion."""
    inv = invented_label(case)
    extra = f" <b>{escape(inv)}</b>" if inv else ""
    try:
        f0_line = f"<br><span class='pvwb-f0'>Note: {escape(f0_caveat(case))}</span>"
    except Exception:  # noqa: BLE001  (a header must never fail)
        f0_line = ""
    return (f"<span style='font-size:12px;color:#6b4e00'>⚠ {escape(CAUTION)}{extra}"
            f"{f0_line}</span>")
