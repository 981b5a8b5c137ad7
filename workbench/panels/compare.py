"""Compare: two maps side by side with linked pan and zoom, each with its own time, member
and set of pieces in the overlay, and a difference map (B − A of the mapped field).

Each side is a State of its own (``panel.a``, ``panel.b``) on the same case; it takes the
page State's surface, field, reference, threshold, overlay level and settings, and pieces,
while its time, member and the pieces left out of its overlay are its own. The two maps
share their Bokeh ranges, so panning or zooming one moves the other in the browser. The
difference map is ``b.map_field_difference(a)`` (computed by the State).

Usable alone in a notebook: ``wb.panels.ComparePanel(state)``. In the page it sits in a tab
and follows the page State only while that tab is shown (``follow(True/False)``), so a lasso
on the main map does not invert the pieces again for maps nobody looks at.
"""
from __future__ import annotations

import panel as pn
import param

from ..textsafe import escape
from .base import StatePanel

__all__ = ["ComparePanel", "SHARED"]

#: What both sides take from the page State.
SHARED = ("surface", "field", "reference", "threshold", "overlay_level", "pieces",
          "overlay_contour_interval", "overlay_arrow_stride", "overlay_arrow_speed")


class ComparePanel(StatePanel):
    """Two maps (A and B) of the State's case side by side; see the module docstring."""

    def __init__(self, state, width=480, live=True):
        self.width = width
        self.live = live
        self.a = self.b = None
        self.map_a = self.map_b = None
        super().__init__(state)

    # ---------------------------------------------------------------- build
    def build(self):
        from ..state import State
        from ..views.interactive import MapView, TextMarkdown

        self._drop_views()
        st = self.state
        if st.case is None:
            return [TextMarkdown("Open a case to compare two of its maps.")]
        case = st.case
        n = len(case.times)
        self.a, self.b = State(case), State(case)
        self._sync()
        with param.parameterized.batch_call_watchers(self.a):
            self.a.time_index = st.time_index
            self.a.member = st.member
        with param.parameterized.batch_call_watchers(self.b):
            self.b.time_index = min(st.time_index + 1, n - 1)
            self.b.member = st.member
        self.difference_toggle = pn.widgets.Checkbox(label="Map B shows B − A (difference)",
                                              value=False, css_classes=["pvwb-compare-diff"])
        proj = st.page.map_projection
        self.map_a = MapView(self.a, width=self.width, projection=proj, prefix="pvwb-cmp-a")
        self.map_b = MapView(self.b, width=self.width, projection=proj, prefix="pvwb-cmp-b",
                             ranges=(self.map_a.figure.x_range, self.map_a.figure.y_range),
                             field_source=self._field_b)
        for mv in (self.map_a, self.map_b):
            mv.set_mode("pan")
        self.difference_toggle.param.watch(lambda ev: self._guard(self._refresh_b), "value")
        # B's difference map follows A's time and member too
        self.watch(lambda *ev: self.difference_toggle.value and self._refresh_b(),
                   ["time_index", "member"], obj=self.a)
        self.watch(lambda *ev: self.live and self._sync(), list(SHARED))
        self.controls_a = self._side_controls(self.a, "A")
        self.controls_b = self._side_controls(self.b, "B")
        col = dict(sizing_mode="stretch_width", min_width=280, styles={"flex": "1 1 300px"})
        return [pn.Row(pn.pane.Markdown("**Compare two maps** (pan or zoom one: the other "
                                        "follows)", margin=(0, 5)), self.difference_toggle),
                pn.FlexBox(pn.Column(self.controls_a, self.map_a.pane, **col),
                           pn.Column(self.controls_b, self.map_b.pane, **col),
                           flex_wrap="wrap", sizing_mode="stretch_width",
                           css_classes=["pvwb-compare"])]

    def _side_controls(self, side, label):
        st = self.state
        labels = st.time_labels
        time = pn.widgets.Select(label=f"Map {label}: valid time",
                                 options={t: k for k, t in enumerate(labels)},
                                 value=side.time_index, width=190,
                                 css_classes=[f"pvwb-compare-time-{label.lower()}"])
        time.param.watch(lambda ev: self._guard(setattr, side, "time_index", int(ev.new)),
                         "value")
        widgets = [time]
        if st.case.members is not None:
            member = pn.widgets.Select(label=f"Map {label}: member",
                                       options=list(range(len(st.case.members))),
                                       value=side.member or 0, width=90)
            member.param.watch(lambda ev: self._guard(setattr, side, "member", int(ev.new)),
                               "value")
            widgets.append(member)
        pieces = pn.widgets.MultiChoice(label=f"Map {label}: pieces in the overlay",
                                        options=[], value=[], width=260,
                                        css_classes=[f"pvwb-compare-pieces-{label.lower()}"])
        busy = {"on": False}

        def show(*_):
            vis = [p.name for p in side.pieces if p.visible]
            busy["on"] = True
            try:
                if list(dict(pieces.options).values()) != vis:
                    # (the list widget renders its labels as HTML: names are escaped labels)
                    pieces.options = {escape(n): n for n in vis}
                self.to_widget(pieces, [n for n in vis if n not in side.overlay_left_out])
            finally:
                busy["on"] = False

        def chosen(ev):
            if busy["on"]:
                return
            vis = [p.name for p in side.pieces if p.visible]
            side.overlay_left_out = [n for n in vis if n not in ev.new]

        pieces.param.watch(lambda ev: self._guard(chosen, ev), "value")
        self.watch(show, ["pieces", "overlay_left_out"], obj=side)
        show()
        return pn.Row(*widgets, pieces, sizing_mode="stretch_width")

    # ---------------------------------------------------------------- data
    def _field_b(self):
        if self.difference_toggle.value:
            return self.b.map_field_difference(self.a)
        return self.b.map_field()

    def _refresh_b(self):
        if self.map_b is not None:
            self.map_b._safe(self.map_b.refresh_field)

    def _sync(self):
        """Both sides take the page State's shared settings (one change each)."""
        st = self.state
        for side in (self.a, self.b):
            if side is None:
                continue
            values = {k: getattr(st, k) for k in SHARED if getattr(side, k) != getattr(st, k)}
            if not values:
                continue
            names = [p.name for p in values.get("pieces", side.pieces)]
            with param.parameterized.batch_call_watchers(side):
                if "pieces" in values:
                    side.overlay_left_out = [n for n in side.overlay_left_out if n in names]
                side.param.update(**values)

    def follow(self, on=True):
        """Follow the page State (True: now and on every change) or not (False)."""
        self.live = bool(on)
        if self.live:
            self._guard(self._sync)

    # ---------------------------------------------------------------- life cycle
    def _drop_views(self):
        for mv in (self.map_a, self.map_b):
            if mv is not None:
                mv.detach()
        self.map_a = self.map_b = None

    def detach(self, keep_case=False):
        super().detach(keep_case)
        if not keep_case:
            self._drop_views()
