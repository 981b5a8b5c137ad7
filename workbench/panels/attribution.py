"""The attribution panel: each piece's balanced height anomaly, share, wind and vorticity at
the target point (watches pieces, target, time, member and reference)."""
from __future__ import annotations

import pandas as pd
import panel as pn

from .base import StatePanel

__all__ = ["AttributionPanel", "attribution_rows"]


def attribution_rows(df) -> pd.DataFrame:
    """The attribution table as the page shows it (shares not given as an em dash)."""
    from ..inversion.pieces import format_share

    return pd.DataFrame({
        "piece": df.index,
        "Z′ (m)": df["height_anomaly"].round(1).values,
        "share (%)": [format_share(x, ".0f") for x in df["height_share_pct"]],
        "u (m/s)": df["u"].round(1).values,
        "v (m/s)": df["v"].round(1).values,
        "ζ (1e-5/s)": (df["relative_vorticity"] * 1e5).round(2).values,
    })


class AttributionPanel(StatePanel):
    """Target level and the attribution table (scrolls inside itself)."""

    def build(self):
        from ..views.interactive import TextMarkdown

        st = self.state
        if st.case is None:
            return []
        self.attribution_frame = None
        self.attr_level = pn.widgets.Select(
            label="Target level", width=110,
            value=float(st.target[2]) if st.target is not None else float(st.overlay_level),
            options={f"{p:g} hPa": float(p) for p in st.case.levels_hpa})
        self.watch(lambda ev: self.retarget_level(ev.new), ["value"], obj=self.attr_level)
        self.watch(lambda *ev: st.target is not None and float(st.target[2]) in
                   self.attr_level.options.values() and
                   self.to_widget(self.attr_level, float(st.target[2])), ["target"])
        self.attr_title = TextMarkdown("", margin=(0, 5))
        self.attr_table = pn.widgets.Tabulator(
            pd.DataFrame(), show_index=False, disabled=True, sizing_mode="stretch_width",
            max_width=600, height=200, layout="fit_data_stretch",
            css_classes=["pvwb-attribution"], sortable=False, selectable=False)
        self.watch(lambda *ev: self.later(self.refresh),
                   ["pieces", "target", "time_index", "member", "reference"])
        self.refresh()
        return [pn.Row(pn.pane.Markdown("**Attribution at the target**", margin=(18, 5)),
                       self.attr_level), self.attr_title, self.attr_table]

    def retarget_level(self, p):
        t = self.state.target
        if t is not None and float(t[2]) != float(p):
            self.state.target = (t[0], t[1], float(p))

    def refresh(self):
        from ..views.interactive import lat_label, lon_label

        st = self.state
        if st.target is None or not st.pieces:
            self.attr_title.object = ("Choose *Pick target point* and click the map "
                                      "(e.g. the storm centre)." if st.pieces else
                                      "Add pieces first, then pick a target point.")
            self.attr_table.value = pd.DataFrame()
            return
        df = st.attribution()
        lon, lat, p = st.target
        self.attr_title.object = (f"at {lon_label(lon, 2)} {lat_label(lat, 2)}, {p:g} hPa · "
                                  "pieces add up to the full inversion")
        self.attr_table.value = attribution_rows(df)
        self.attribution_frame = df
