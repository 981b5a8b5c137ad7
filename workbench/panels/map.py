"""The map panel: the State's field on its surface with coastlines, winds, pieces, sections,
annotations and the balanced-flow overlay; mouse gestures become pieces, sections, targets,
labels and highlighted regions (with the settings of ``state.page``)."""
from __future__ import annotations

import time

import numpy as np
import panel as pn

from ..errors import InputError
from .base import StatePanel

__all__ = ["MapPanel", "lasso", "lasso_piece", "lasso_region", "draw_section",
           "pick_target", "place_label", "label_last_click"]


class MapPanel(StatePanel):
    """The map (:class:`~workbench.views.interactive.MapView`, built once per case and
    updated in place). Usable alone: ``MapPanel(state)`` in a notebook cell; the mouse mode
    and the next lasso's settings are ``state.page`` (``state.page.mouse_mode = "section"``).
    A case on a projected grid is drawn in its own projection unless
    ``state.page.map_projection = "lonlat"`` (lasso outlines come back as lon/lat).
    """

    def __init__(self, state, width=820):
        self.width = width
        self.view = None
        super().__init__(state)

    def build(self):
        from ..views.interactive import MapView
        from ..views.interactive import TextMarkdown

        st = self.state
        if self.view is not None:
            self.view.detach()
            self.view = None
        if st.case is None:
            return []
        self.view = mv = MapView(st, width=self.width, projection=st.page.map_projection)
        mv.on_lasso = lambda poly: self._guard(lasso, st, poly)
        mv.on_section = lambda a, b: self._guard(draw_section, st, a, b)
        mv.on_tap = lambda x, y: self._guard(pick_target, st, x, y)
        mv.on_label = lambda x, y: self._guard(place_label, st, x, y)
        mv.set_mode(st.page.mouse_mode)
        self.watch(lambda *ev: mv.set_mode(st.page.mouse_mode), ["mouse_mode"], obj=st.page)
        self._attach_editing(mv)  # after the view's mode watcher: its tools win in its modes
        # the projection switch rebuilds the map (a new plane), like a new case
        self.watch(lambda *ev: self._rebuild(), ["map_projection"], obj=st.page)
        notes = ["grey arrows: wind on the map surface", "black line: the tropopause "
                 "threshold on PV maps", mv.coast_note]
        return [mv.pane, TextMarkdown(" · ".join(notes), margin=(0, 10),
                                      styles={"font-size": "11px", "color": "#666"})]

    def _attach_editing(self, mv):
        """Tracked outlines, vertex editing, label moving and arrow drawing
        (:class:`~workbench.panels.map_edit.MapEditing`) on the map view."""
        from .map_edit import MapEditing

        if getattr(self, "editing", None) is not None:
            self.editing.detach()
        self.editing = MapEditing(mv, self.state)

    @property
    def map(self):
        """The MapView (its ``figure``, ``src`` sources, ``last_click``)."""
        return self.view

    def detach(self, keep_case=False):
        super().detach(keep_case)
        if not keep_case and self.view is not None:
            self.view.detach()
            if getattr(self, "editing", None) is not None:
                self.editing.detach()

    # ---------------------------------------------------------------- gestures (methods)
    def lasso(self, polygon):
        return lasso(self.state, polygon)

    def lasso_piece(self, polygon):
        return lasso_piece(self.state, polygon)

    def lasso_region(self, polygon):
        return lasso_region(self.state, polygon)

    def draw_section(self, start, end):
        return draw_section(self.state, start, end)

    def pick_target(self, lon, lat, pressure_hpa=None):
        return pick_target(self.state, lon, lat, pressure_hpa)

    def place_label(self, lon, lat):
        return place_label(self.state, lon, lat)

    def label_last_click(self):
        return label_last_click(self.state)


# --------------------------------------------------------------------------- gestures
# (what a mouse gesture on the map does to the State; the settings are state.page)


def _clamp(state, pt):
    d = state.case.domain
    return (min(max(float(pt[0]), d["lon_min"]), d["lon_max"]),
            min(max(float(pt[1]), d["lat_min"]), d["lat_max"]))


def lasso(state, polygon):
    """A lassoed outline -> a piece (or a highlighted region), as ``state.page`` says."""
    if len(polygon) > 200:  # keep session files small: thin the outline evenly
        idx = np.linspace(0, len(polygon) - 1, 200).round().astype(int)
        polygon = [polygon[i] for i in idx]
    polygon = [_clamp(state, p) for p in polygon]
    if state.page.lasso_makes == "region":
        return lasso_region(state, polygon)
    return lasso_piece(state, polygon)


def lasso_piece(state, polygon):
    """Make a piece of ``polygon`` with the next-lasso settings (inverted at once)."""
    st, pg = state, state.page
    polygon = [_clamp(state, p) for p in polygon]
    kind = pg.lasso_makes if pg.lasso_makes != "region" else "interior"
    base = {"interior": "piece", "bottom": "surface θ′ (lasso)", "top": "lid θ′ (lasso)"}[kind]
    name = pg.piece_name.strip() or st.new_piece_name(base)
    kw = dict(name=name, kind=kind, polygon=polygon, sign=int(pg.sign))
    if getattr(pg, "lasso_follow", False):  # follows its anomaly from the selected time
        kw.update(follow="anomaly", follow_from=str(st.valid_time)[:19])
    if kind == "interior":
        layer = pg.layer
        if layer is None and pg.layer_coord == "pressure":
            levels = st.case.levels_hpa
            layer = (float(min(levels)), float(min(500.0, max(levels))))
        kw.update(layer=None if layer is None else tuple(float(x) for x in layer),
                  layer_coord=pg.layer_coord, threshold=float(pg.min_anomaly),
                  rh_min=None if pg.rh_min is None else float(pg.rh_min))
    t0 = time.perf_counter()
    piece = st.add_piece(**kw)
    pg.piece_name = ""
    st.set_status(f"Piece {piece.name!r} inverted in {time.perf_counter() - t0:.2f} s; its "
                  f"balanced flow is on the map at {st.overlay_level:g} hPa.", "success")
    return piece


def lasso_region(state, polygon):
    """A highlighted region annotation of the outline (label: the annotation text)."""
    from ..annotations import Region

    st, pg = state, state.page
    colour = pg.label_colour
    a = st.add_annotation(Region(polygon=[list(p) for p in polygon],
                                 label=pg.label_text.strip() or None, colour=colour,
                                 fill=colour, alpha=0.15, linestyle="dashed"))
    st.set_status(f"Highlighted region{' “' + a.label + '”' if a.label else ''} "
                  "added (it is an annotation, not a piece).", "success")
    return a


def draw_section(state, start, end):
    from ..views.interactive import lat_label, lon_label

    st = state
    start, end = _clamp(state, start), _clamp(state, end)
    if np.hypot(end[0] - start[0], end[1] - start[1]) < 1.0:
        raise InputError("the section line is shorter than one degree; drag a longer line")
    st.add_section(start, end)
    st.set_status(f"Section from ({lon_label(start[0])}, {lat_label(start[1])}) to "
                  f"({lon_label(end[0])}, {lat_label(end[1])}).", "success")


def pick_target(state, lon, lat, pressure_hpa=None):
    from ..views.interactive import lat_label, lon_label

    st = state
    if pressure_hpa is None and st.target is not None:
        pressure_hpa = st.target[2]
    st.page.last_click = (float(lon), float(lat))
    st.set_target(lon, lat, pressure_hpa)
    st.set_status(f"Target point {lon_label(lon, 2)} {lat_label(lat, 2)}.", "info")


def place_label(state, lon, lat):
    """A text label (``state.page.label_text`` / ``label_colour``) at (lon, lat)."""
    from ..annotations import Label
    from ..views.interactive import lat_label, lon_label

    st = state
    text = st.page.label_text.strip()
    if not text:
        raise InputError("type the label's text in the Annotate tab first, then click "
                         "the map")
    d = st.case.domain
    if not (d["lon_min"] <= lon <= d["lon_max"] and d["lat_min"] <= lat <= d["lat_max"]):
        raise InputError(f"({lon:.2f}, {lat:.2f}) is outside the map; click inside it")
    a = st.add_annotation(Label(text=text, lon=float(lon), lat=float(lat),
                                colour=st.page.label_colour, size=12.0))
    st.set_status(f"Label “{text}” placed at {lon_label(lon, 2)} {lat_label(lat, 2)}.",
                  "success")
    return a


def label_last_click(state):
    """Label the point last clicked on the map (in any mode that clicks)."""
    click = state.page.last_click
    if click is None:
        raise InputError("click a point on the map first (mode *Pick target point* or "
                         "*Place a label*), then press this button")
    return place_label(state, *click)
