"""The lasso and pieces panel: what the next lasso makes (kind, layer, sign, minimum anomaly,
moisture, name, whether it follows its anomaly), the boundary pieces one click away, and the
list of pieces (rename, show/hide, fixed or following its anomaly, what tracking found at the
selected time, select for Delete, delete)."""
from __future__ import annotations

import pandas as pd
import panel as pn

from ..errors import PieceError, WorkbenchError
from ..state import BOUNDARY_PIECES
from .base import StatePanel

__all__ = ["PiecesPanel", "LassoPanel", "piece_rows"]

_SIGN_WORDS = {1: "positive", -1: "negative", 0: "both"}
#: the follow choice as the list shows it
FOLLOW_WORDS = {"fixed": "fixed", "anomaly": "follows its anomaly"}
_CAN_FOLLOW = ("interior", "bottom", "top")
_KIND_WORDS = {"interior": "interior PV", "bottom": "surface θ′", "top": "lid θ′",
               "lateral": "lateral boundary", "remainder": "remainder"}


def piece_rows(pieces, status=None) -> pd.DataFrame:
    """The pieces as the table shows them: name, kind, layer, sign (in words), shown, follow
    (fixed / follows its anomaly) and ``now`` (what tracking found at the selected time:
    ``status`` = ``State.track_status()``)."""
    status = status or {}
    rows = []
    for p in pieces:
        if p.kind == "interior":
            unit = "hPa" if p.layer_coord == "pressure" else "K"
            layer = "all levels" if p.layer is None else f"{p.layer[0]:g}–{p.layer[1]:g} {unit}"
            if p.rh_min is not None:
                layer += f", RH≥{p.rh_min:g}%"
        else:
            layer = {"bottom": "lower boundary", "top": "upper boundary",
                     "lateral": "lateral boundary", "remainder": "the rest"}[p.kind]
        sign = _SIGN_WORDS[p.sign] if p.kind in ("interior", "bottom", "top") else ""
        follow = FOLLOW_WORDS[p.follow] if p.kind in _CAN_FOLLOW and p.polygon is not None else ""
        st, note = status.get(p.name, ("", ""))
        now = {"start": "drawn here", "tracked": "tracked", "fixed": ""}.get(st, st)
        rows.append(dict(name=p.name, kind=_KIND_WORDS.get(p.kind, p.kind), layer=layer,
                         sign=sign, show=p.visible, follow=follow, now=now))
    return pd.DataFrame(rows, columns=["name", "kind", "layer", "sign", "show", "follow", "now"])


class LassoPanel(StatePanel):
    """The settings of the next lasso (``state.page``) and the boundary-piece buttons."""

    rebuild_on = ("case",)

    def build(self):
        st, pg = self.state, self.state.page
        case = st.case
        if case is None:
            return []
        pmax, pmin = float(max(case.levels_hpa)), float(min(case.levels_hpa))
        self.p_kind = pn.widgets.Select(label="A lasso makes", width=250, value=pg.lasso_makes,
                                        options={"interior PV piece": "interior",
                                                 "surface θ′ piece (lower boundary)": "bottom",
                                                 "lid θ′ piece (upper boundary)": "top",
                                                 "highlighted region (annotation)": "region"})
        self.p_coord = pn.widgets.RadioButtonGroup(label="Layer in", value=pg.layer_coord,
                                                   options=["pressure", "theta"], width=250)
        self.p_layer = pn.widgets.RangeSlider(label="Layer (hPa)", start=pmin, end=pmax,
                                              value=(pmin, min(500.0, pmax)), step=25, width=250)
        self.p_sign = pn.widgets.RadioButtonGroup(label="Sign", value=pg.sign, width=250,
                                                  options={"positive": 1, "negative": -1,
                                                           "both": 0})
        self.p_threshold = pn.widgets.FloatInput(label="Piece's minimum |PV anomaly| (PVU)", start=0.0,
                                                 value=float(pg.min_anomaly), step=0.1, width=250)
        self.p_moist = pn.widgets.Checkbox(label="moist only (RH ≥)", value=pg.rh_min is not None,
                                           width=120, margin=(28, 5, 5, 10))
        self.p_rh = pn.widgets.IntInput(label="RH (%)", value=int(pg.rh_min or 80), start=0,
                                        end=100, step=5, width=70)
        self.p_name = pn.widgets.TextInput(label="Name of the next piece", placeholder="auto",
                                           width=250, value=pg.piece_name)
        self.p_follow = pn.widgets.Checkbox(label="follows its anomaly at other times",
                                            value=pg.lasso_follow, width=250,
                                            css_classes=["pvwb-lasso-follow"])
        self.watch(lambda ev: setattr(pg, "lasso_follow", bool(ev.new)), ["value"],
                   obj=self.p_follow)
        self.boundary_buttons = []
        for kind, label in BOUNDARY_PIECES.items():
            b = pn.widgets.Button(label=f"+ {label}", width=120, css_classes=[f"pvwb-add-{kind}"])
            b.on_click(lambda e, k=kind: self._guard(self.add_boundary, k))
            self.boundary_buttons.append(b)

        def coord_changed(ev):
            if ev.new == "theta":
                self.p_layer.param.update(label="Layer (K)", start=270.0, end=450.0,
                                          value=(300.0, 340.0), step=5)
            else:
                self.p_layer.param.update(label="Layer (hPa)", start=pmin, end=pmax,
                                          value=(pmin, min(500.0, pmax)), step=25)

        def to_page(*_):
            pg.param.update(
                lasso_makes=self.p_kind.value, layer_coord=self.p_coord.value,
                layer=tuple(float(x) for x in self.p_layer.value), sign=self.p_sign.value,
                min_anomaly=float(self.p_threshold.value or 0.0),
                rh_min=float(self.p_rh.value) if self.p_moist.value else None)

        self.watch(coord_changed, ["value"], obj=self.p_coord)
        for w in (self.p_kind, self.p_coord, self.p_layer, self.p_sign, self.p_threshold,
                  self.p_moist, self.p_rh):
            self.watch(to_page, ["value"], obj=w)
        self.watch(lambda ev: setattr(pg, "piece_name", ev.new or ""), ["value"], obj=self.p_name)
        self.watch(lambda *ev: self.to_widget(self.p_name, pg.piece_name), ["piece_name"], obj=pg)
        to_page()
        return [pn.pane.Markdown("**Next lasso** (a piece, or a highlighted region)",
                                 margin=(0, 5)),
                self.p_kind, self.p_coord, self.p_layer, self.p_sign,
                pn.Row(self.p_threshold), pn.Row(self.p_moist, self.p_rh), self.p_name,
                self.p_follow,
                pn.pane.Markdown("**Boundary pieces**", margin=(0, 5)),
                pn.GridBox(*self.boundary_buttons, ncols=2)]

    def add_boundary(self, kind):
        piece = self.state.add_boundary_piece(kind)
        self.state.set_status(f"Added {piece.name!r}.", "success")
        return piece


class PiecesPanel(StatePanel):
    """The list of pieces (watches ``pieces`` only): edit a name to rename, tick to show or
    hide, ✖ deletes."""

    def build(self):
        self.pieces_table = pn.widgets.Tabulator(
            piece_rows([]), show_index=False,
            editors={"name": "input", "show": {"type": "tickCross"}, "kind": None,
                     "layer": None, "sign": None, "now": None,
                     "follow": {"type": "list", "values": list(FOLLOW_WORDS.values())}},
            formatters={"show": {"type": "tickCross"}}, buttons={"delete": "✖"},
            sizing_mode="stretch_width", max_width=600, height=160,
            layout="fit_data_stretch", css_classes=["pvwb-pieces"], sortable=False,
            selectable=False)
        self.pieces_table.on_edit(lambda ev: self._guard(self._edited, ev))
        self.pieces_table.on_click(lambda ev: self._guard(self._clicked, ev))
        self.watch(lambda *ev: self.later(self.refresh), ["pieces", "time_index", "member",
                                                          "reference"])
        self.refresh()
        return [pn.pane.Markdown("**Pieces** (edit a name to rename; tick to show/hide; "
                                 "*follow*: fixed outline or following its anomaly; click a "
                                 "row to select it for Delete; ✖ deletes)", margin=(0, 5)),
                self.pieces_table]

    def refresh(self):
        st = self.state
        self.pieces_table.value = piece_rows(st.pieces, st.track_status())

    def _edited(self, ev):
        st = self.state
        names = st.piece_names
        if not 0 <= ev.row < len(names):
            return
        name = names[ev.row]
        if ev.column == "name":
            try:
                st.rename_piece(name, ev.value)
            except WorkbenchError:
                self.refresh()
                raise
            st.set_status(f"Renamed {name!r} to {ev.value!r}.", "success")
        elif ev.column == "show":
            st.toggle_piece(name, bool(ev.value))
        elif ev.column == "follow":
            follow = {v: k for k, v in FOLLOW_WORDS.items()}.get(ev.value)
            try:
                if follow is None:
                    raise PieceError(f"follow {ev.value!r}: choose "
                                     f"{' or '.join(FOLLOW_WORDS.values())}")
                st.set_follow(name, follow)
            except WorkbenchError:
                self.refresh()
                raise
            st.set_status(f"Piece {name!r}: {FOLLOW_WORDS[follow]}.", "success")

    def _clicked(self, ev):
        if ev.column != "delete":
            names = self.state.piece_names
            if 0 <= ev.row < len(names):
                self.state.page.selected = f"piece:{names[ev.row]}"
            return
        names = self.state.piece_names
        if 0 <= ev.row < len(names):
            name = names[ev.row]
            self.state.remove_piece(name)
            self.state.set_status(f"Deleted piece {name!r}.", "info")
