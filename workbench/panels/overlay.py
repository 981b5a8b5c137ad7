"""Settings of the balanced-flow overlay on the map: contour interval of the balanced
height anomaly, arrow density and arrow scale (the map's legend arrow follows them) and which
visible pieces contribute. They are State parameters (``overlay_contour_interval``,
``overlay_arrow_stride``, ``overlay_arrow_speed``, ``overlay_left_out``), validated there and
saved in sessions; the map updates its data in place when they change."""
from __future__ import annotations

import panel as pn

from ..textsafe import escape
from .base import StatePanel

__all__ = ["OverlayPanel"]


def _auto(value):
    """0 in a number box means "automatic" (None in the State)."""
    return None if value in (None, 0, 0.0) else value


class OverlayPanel(StatePanel):
    """Number boxes for the contour interval (m), the arrow density (an arrow every n grid
    points) and the arrow scale (m/s of an arrow one spacing long: the legend arrow), 0 being
    automatic, and a multi-choice of the visible pieces that make the overlay."""

    def build(self):
        st = self.state
        self.contour_interval = pn.widgets.FloatInput(
            label="Z′ contour interval (m, 0: automatic)", value=st.overlay_contour_interval or 0.0,
            start=0.0, step=5.0, width=250, css_classes=["pvwb-overlay-interval"])
        self.arrow_stride = pn.widgets.IntInput(
            label="Arrow every n grid points (0: automatic)", value=st.overlay_arrow_stride or 0,
            start=0, end=100, step=1, width=250, css_classes=["pvwb-overlay-stride"])
        self.arrow_speed = pn.widgets.FloatInput(
            label="Legend arrow (m/s per spacing, 0: automatic)",
            value=st.overlay_arrow_speed or 0.0, start=0.0, step=5.0, width=250,
            css_classes=["pvwb-overlay-speed"])
        self.overlay_pieces = pn.widgets.MultiChoice(
            label="Pieces in the overlay (visible ones)", options=[], value=[], width=250,
            css_classes=["pvwb-overlay-pieces"])
        for w, name in ((self.contour_interval, "overlay_contour_interval"),
                        (self.arrow_stride, "overlay_arrow_stride"),
                        (self.arrow_speed, "overlay_arrow_speed")):
            w.param.watch(lambda ev, name=name: self._guard(self._set, name, ev.new), "value")
        self.overlay_pieces.param.watch(lambda ev: self._guard(self._set_pieces, ev.new),
                                        "value")
        self.watch(self.show, ["overlay_contour_interval", "overlay_arrow_stride",
                               "overlay_arrow_speed", "overlay_left_out", "pieces"])
        self.show()
        return [pn.pane.Markdown("**Balanced-flow overlay**", margin=(0, 5)),
                self.contour_interval, self.arrow_stride, self.arrow_speed,
                self.overlay_pieces]

    def _set(self, name, value):
        try:
            setattr(self.state, name, _auto(value))
        except Exception:
            self.show()  # the box shows the State's value again
            raise

    def _visible(self):
        return [p.name for p in self.state.pieces if p.visible]

    def _set_pieces(self, chosen):
        if self._showing:
            return
        st = self.state
        st.overlay_left_out = [n for n in self._visible() if n not in chosen] + \
            [n for n in st.overlay_left_out if n not in self._visible() and n in st.piece_names]

    _showing = False

    def show(self, *_):
        """The widgets show the State's settings."""
        st = self.state
        self._showing = True
        try:
            self.to_widget(self.contour_interval, st.overlay_contour_interval or 0.0)
            self.to_widget(self.arrow_stride, st.overlay_arrow_stride or 0)
            self.to_widget(self.arrow_speed, st.overlay_arrow_speed or 0.0)
            vis = self._visible()
            if list(dict(self.overlay_pieces.options).values()) != vis:
                # (the list widget renders its labels as HTML: names are escaped labels)
                self.overlay_pieces.options = {escape(n): n for n in vis}
            self.to_widget(self.overlay_pieces,
                           [n for n in vis if n not in st.overlay_left_out])
        finally:
            self._showing = False
