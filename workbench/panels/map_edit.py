"""Editing on the map: tracked piece outlines at the selected time, piece outlines edited by
dragging their vertices, labels, arrows and highlighted regions moved by dragging, arrows
drawn with the mouse.

:class:`MapEditing` attaches to a :class:`~workbench.views.interactive.MapView` (built by the
map panel) and adds its own tools and data sources to the same figure; it changes the State
only through its methods (``_replace``, ``add_annotation``...), so every gesture is one undo
step. Mouse modes (``state.page.mouse_mode``): ``"edit"`` (Bokeh ``PolyEditTool`` on the
pieces' outlines: press and hold inside an outline to show its vertices, drag one; a press on a
vertex then adds one after it; Backspace removes the selected vertex),
``"move"`` (``PointDrawTool`` on handles: under each label, at both ends of an arrow, at the
centre of a highlighted region), ``"arrow"`` (click the tail, then
the head; the map's tap tool).

Pieces that follow their anomaly (``Piece.follow == "anomaly"``) are drawn with their outline
at the selected time (``State.pieces_now``) and a note when tracking found a split, a merge or
lost the piece there.
"""
from __future__ import annotations

import numpy as np

__all__ = ["MapEditing", "TRACK_WORDS"]

#: how the map labels a following piece at a time (tracking status -> suffix)
TRACK_WORDS = {"tracked": "(tracked)", "split": "(tracked; split)", "merged": "(tracked; merged)",
               "split+merged": "(tracked; split and merged)", "lost": "(lost here)",
               "not tracked": "(not tracked here)"}
_TOL = 1e-6  # degrees: outlines that differ less are the same


class MapEditing:
    """The map's editing tools and tracked outlines on ``view`` (a MapView) for ``state``."""

    def __init__(self, view, state):
        from bokeh.models import ColumnDataSource, CustomJS, PointDrawTool, PolyEditTool

        self.view, self.state = view, state
        self._watchers = []
        self._drawing = False
        fig = view.figure
        view.tools["lasso"].name = "pvwb-lasso"  # the page's Escape key finds it by name
        S = ColumnDataSource
        self.src = dict(
            vertices=S(dict(x=[], y=[]), name="pvwb-piece-vertices"),
            handles=S(dict(x=[], y=[], id=[]), name="pvwb-ann-handles"),
            arrow_tail=S(dict(x=[], y=[]), name="pvwb-arrow-tail"),
            lost=S(dict(x=[], y=[], text=[]), name="pvwb-track-notes"),
        )
        patches = next(r for r in fig.renderers if r.name == "pvwb-piece-patches")
        vert = fig.scatter("x", "y", source=self.src["vertices"], size=9, fill_color="white",
                           line_color="black", name="pvwb-piece-vertex-glyphs")
        handles = fig.scatter("x", "y", source=self.src["handles"], marker="square", size=10,
                              fill_color="white", fill_alpha=0.5, line_color="#444444",
                              name="pvwb-ann-handle-glyphs", visible=False)  # move mode only
        self._handle_glyphs = handles
        fig.scatter("x", "y", source=self.src["arrow_tail"], marker="circle", size=8,
                    fill_color="black", line_color="white")
        fig.text("x", "y", text="text", source=self.src["lost"], text_color="#b00000",
                 text_font_size="11px", text_align="left", background_fill_color="white",
                 background_fill_alpha=0.7, name="pvwb-track-note-text")
        self.tools = dict(
            edit=PolyEditTool(renderers=[patches], vertex_renderer=vert,
                              description="Edit piece outlines (press and hold one, drag a vertex)"),
            move=PointDrawTool(renderers=[handles], add=False, drag=True,
                               description="Move annotations (drag the square under a label, "
                                           "at an arrow's end or at a region's centre)"),
        )
        fig.add_tools(*self.tools.values())
        # switching a several-gesture tool off also clears the drag and tap gestures' active
        # tools in BokehJS, so after any switch the chosen tools are switched on again, in the
        # browser
        tb = fig.toolbar
        tb.js_on_change("active_multi", CustomJS(args=dict(tb=tb), code="""
            setTimeout(() => {
              for (const t of [tb.active_drag, tb.active_tap, tb.active_multi]) {
                if (t != null && t != "auto") { t.active = false; t.active = true; }
              }
            }, 0);"""))
        self.piece_src = view.src["pieces"]
        self.piece_src.on_change("data", self._outline_changed)
        self.piece_src.selected.on_change("indices", self._piece_selected)
        self.src["handles"].on_change("data", self._handles_changed)
        self.src["handles"].selected.on_change("indices", self._handle_selected)
        self._tail = None
        for names, fn in ((["pieces", "time_index", "member", "reference"], self.refresh_pieces),
                          (["annotations"], self.refresh_handles)):
            self._watchers.append((state, state.param.watch(
                lambda *ev, fn=fn: view._safe(fn), names)))
        self._watchers.append((state.page, state.page.param.watch(
            lambda *ev: self.set_mode(state.page.mouse_mode), ["mouse_mode"])))
        self._watchers.append((state.page, state.page.param.watch(
            lambda ev: view._safe(lambda: self._clicked(ev.new)), ["last_click"])))
        self.refresh_pieces()
        self.refresh_handles()
        self.set_mode(state.page.mouse_mode)

    def detach(self):
        for obj, w in self._watchers:
            obj.param.unwatch(w)
        self._watchers = []

    # ---------------------------------------------------------------- modes
    def set_mode(self, mode):
        """Activate the editing tool of ``mode`` (the view's own modes are left to it)."""
        from ..views.interactive import _push

        tb = self.view.figure.toolbar
        # these tools take several gestures (Bokeh's "multi" role): they are switched with
        # active_multi, which also switches them off in the view's own modes
        if mode == "arrow":  # two clicks with the view's tap tool
            tb.active_multi = None
            tb.active_tap = self.view.tools["target"]
        elif mode in self.tools:
            tb.active_drag = None
            tb.active_tap = None
            tb.active_multi = self.tools[mode]
        else:
            section = self.view.tools.get("section")
            tb.active_multi = section if mode == "section" else None
        self._handle_glyphs.visible = mode == "move"
        if mode != "edit":
            self.src["vertices"].data = dict(x=[], y=[])
        if mode != "arrow":
            self._tail = None
            self._set_own("arrow_tail", dict(x=[], y=[]))
        _push(self.view.pane)

    # ---------------------------------------------------------------- drawing
    def refresh_pieces(self):
        """The pieces' outlines at the selected time (tracked ones where they follow their
        anomaly), their labels, and a note where tracking split, merged or lost a piece."""
        from ..views.interactive import _centroid

        st = self.state
        status = st.track_status()
        now = {p.name: p for p in st.pieces_now()}
        xs, ys, col, names, alpha = [], [], [], [], []
        lx, ly, lt, lc = [], [], [], []
        nx, ny, nt = [], [], []
        for p in st.pieces:
            q = now.get(p.name)
            state_word = status.get(p.name, ("", ""))[0]
            if q is None:  # lost at this time: the outline it was drawn with, as a reminder
                if p.polygon is not None:
                    cx, cy = _centroid(p.polygon)
                    nx.append(cx)
                    ny.append(cy)
                    nt.append(f"{p.name}: lost at this time")
                continue
            if q.polygon is None:
                continue
            a = np.asarray(q.polygon, float)
            xs.append(a[:, 0].tolist())
            ys.append(a[:, 1].tolist())
            c = p.colour or "#444444"
            col.append(c)
            names.append(p.name)
            alpha.append(0.08 if p.visible else 0.0)
            cx, cy = _centroid(q.polygon)
            lx.append(cx)
            ly.append(cy)
            word = TRACK_WORDS.get(state_word, "")
            lt.append(" ".join(x for x in (p.name, "" if p.visible else "(hidden)", word) if x))
            lc.append(c)
        self._drawing = True
        try:
            self.view._set("pieces", dict(xs=xs, ys=ys, colour=col, name=names, alpha=alpha))
            self.view._set("piece_labels", dict(x=lx, y=ly, text=lt, colour=lc))
            self._set_own("lost", dict(x=nx, y=ny, text=nt))
        finally:
            self._drawing = False

    def _set_own(self, key, data):
        v = self.view
        if v.native:
            data = dict(data)
            px, py = v.fwd(data["x"], data["y"])
            data["x"], data["y"] = np.asarray(px).tolist(), np.asarray(py).tolist()
        self.src[key].data = data

    def refresh_handles(self):
        """The squares the move mode drags: one under each map label, one at each end of an
        arrow (``<id>:tail``, ``<id>:head``) and one at the centre of a highlighted region
        (``<id>:region``, moves the whole region)."""
        from ..annotations import Arrow, Label, Region
        from ..views.interactive import _centroid

        x, y, ids = [], [], []
        for a in self.state.annotations:
            if a.space != "map":
                continue
            if isinstance(a, Label):
                x.append(a.lon)
                y.append(a.lat)
                ids.append(a.id)
            elif isinstance(a, Arrow):
                x += [a.start_lon, a.end_lon]
                y += [a.start_lat, a.end_lat]
                ids += [f"{a.id}:tail", f"{a.id}:head"]
            elif isinstance(a, Region) and a.polygon:
                cx, cy = _centroid(a.polygon)
                x.append(cx)
                y.append(cy)
                ids.append(f"{a.id}:region")
        self._drawing = True
        try:
            self._set_own("handles", dict(x=x, y=y, id=ids))
        finally:
            self._drawing = False

    # ---------------------------------------------------------------- gestures
    def _outline_changed(self, attr, old, new):
        if self._drawing:
            return
        self.view._safe(lambda: self.outline_edited(new))

    def outline_edited(self, data):
        """The pieces' source as the browser left it after a vertex drag: each outline that
        moved becomes its piece's new polygon (a following piece's outline then counts as drawn
        at the selected time). One State change, one undo step."""
        st = self.state
        # what Python itself draws there: the view's outlines (as drawn) or the ones at this
        # time; data equal to either is a redraw, not an edit
        drawn = {}
        for p in list(st.pieces) + [q for q in st.pieces_now()]:
            if p.polygon is not None:
                a = np.asarray(p.polygon, float)
                drawn.setdefault(p.name, []).append(tuple(np.asarray(v, float) for v in
                                                          self.view.fwd(a[:, 0], a[:, 1])))
        changed = {}
        for name, xs, ys in zip(data.get("name", []), data.get("xs", []), data.get("ys", [])):
            x, y = np.asarray(xs, float), np.asarray(ys, float)
            if any(ox.shape == x.shape and np.allclose(ox, x, atol=_TOL, rtol=0)
                   and np.allclose(oy, y, atol=_TOL, rtol=0) for ox, oy in drawn.get(name, [])):
                continue
            if name not in drawn:
                continue
            if len(x) < 3:
                raise_error = f"the outline of {name!r} needs at least 3 vertices; undo (Ctrl+Z) or redraw it"
                from ..errors import PieceError

                self.refresh_pieces()
                raise PieceError(raise_error)
            lon, lat = self.view.inv(x, y)
            changed[name] = [(float(a), float(b)) for a, b in zip(lon, lat)]
        if not changed:
            return
        from ..inversion.pieces import Piece

        new = []
        for p in st.pieces:
            if p.name in changed:
                d = p.to_dict()
                d["polygon"] = changed[p.name]
                if p.follow == "anomaly":
                    d["follow_from"] = str(st.valid_time)[:19]
                p = Piece.from_dict(d)
            new.append(p)
        st.pieces = new
        st.set_status(f"Outline of {', '.join(repr(n) for n in changed)} edited; inverted again "
                      "(Ctrl+Z undoes).", "success")

    def _piece_selected(self, attr, old, new):
        names = self.piece_src.data.get("name", [])
        if new and 0 <= new[0] < len(names):
            self.state.page.selected = f"piece:{names[new[0]]}"

    def _handle_selected(self, attr, old, new):
        ids = self.src["handles"].data.get("id", [])
        if new and 0 <= new[0] < len(ids):
            self.state.page.selected = f"annotation:{str(ids[new[0]]).split(':')[0]}"

    def _handles_changed(self, attr, old, new):
        if self._drawing:
            return
        self.view._safe(lambda: self.handles_moved(new))

    def handles_moved(self, data):
        """Annotations whose handle was dragged move there (one undo step): a label to the
        handle, an arrow's tail or head to its handle, a region shifted by its centre's move
        (limited so that it stays inside the domain). Positions are kept inside the domain."""
        from ..annotations import Arrow, Region, annotation_from_dict, annotations_from_list
        from ..views.interactive import _centroid

        lon, lat = self.view.inv(data.get("x", []), data.get("y", []))
        where = {str(i): (float(a), float(b)) for i, a, b in zip(data.get("id", []), lon, lat)}
        d = self.state.case.domain

        def inside(x, y):
            return (min(max(x, d["lon_min"]), d["lon_max"]), min(max(y, d["lat_min"]), d["lat_max"]))

        def moved_from(x0, y0, key):
            if key not in where:
                return None
            x, y = inside(*where[key])
            return (x, y) if abs(x - x0) > _TOL or abs(y - y0) > _TOL else None

        out, moved = [], 0
        for a in self.state.annotations:
            dd = None
            if a.space == "map" and isinstance(a, Arrow):
                tail = moved_from(a.start_lon, a.start_lat, f"{a.id}:tail")
                head = moved_from(a.end_lon, a.end_lat, f"{a.id}:head")
                if tail or head:
                    dd = a.to_dict()
                    if tail:
                        dd.update(start_lon=tail[0], start_lat=tail[1])
                    if head:
                        dd.update(end_lon=head[0], end_lat=head[1])
            elif a.space == "map" and isinstance(a, Region) and a.polygon:
                cx, cy = _centroid(a.polygon)
                c = moved_from(cx, cy, f"{a.id}:region")
                if c:
                    poly = np.asarray(a.polygon, float)
                    dx = float(np.clip(c[0] - cx, d["lon_min"] - poly[:, 0].min(),
                                       d["lon_max"] - poly[:, 0].max()))
                    dy = float(np.clip(c[1] - cy, d["lat_min"] - poly[:, 1].min(),
                                       d["lat_max"] - poly[:, 1].max()))
                    if abs(dx) > _TOL or abs(dy) > _TOL:
                        dd = a.to_dict()
                        dd["polygon"] = [(float(x) + dx, float(y) + dy) for x, y in poly]
            elif a.space == "map" and hasattr(a, "lon"):
                p = moved_from(a.lon, a.lat, a.id)
                if p:
                    dd = a.to_dict()
                    dd.update(lon=p[0], lat=p[1])
            if dd is not None:
                a = annotation_from_dict(dd)
                moved += 1
            out.append(a)
        if moved:
            self.state.annotations = annotations_from_list(out)
            self.state.set_status(f"Moved {moved} annotation(s) (Ctrl+Z undoes).", "success")
        else:
            self.refresh_handles()  # a handle dragged nowhere (or out of the domain) goes back

    def _clicked(self, click):
        """Arrow mode: the first click is the tail (marked), the second the head."""
        if self.state.page.mouse_mode != "arrow" or click is None:
            return
        if self._tail is None:
            self._tail = tuple(click)
            self._set_own("arrow_tail", dict(x=[click[0]], y=[click[1]]))
            self.state.set_status("Arrow: now click its head (Escape or another mode cancels).",
                                  "info")
            return
        tail, self._tail = self._tail, None
        self._set_own("arrow_tail", dict(x=[], y=[]))
        self.add_arrow(tail, tuple(click))

    def add_arrow(self, start, end):
        """An arrow annotation from ``start`` to ``end`` (lon, lat) in the next annotation's
        colour, with its text at the tail when one is typed."""
        from ..annotations import Arrow
        from ..errors import InputError

        if np.hypot(end[0] - start[0], end[1] - start[1]) < 0.5:
            raise InputError("the arrow is shorter than half a degree; drag a longer one")
        pg = self.state.page
        a = self.state.add_annotation(Arrow(start_lon=start[0], start_lat=start[1],
                                            end_lon=end[0], end_lat=end[1],
                                            colour=pg.label_colour,
                                            text=pg.label_text.strip() or None))
        self.state.set_status("Arrow added (Ctrl+Z undoes).", "success")
        return a
