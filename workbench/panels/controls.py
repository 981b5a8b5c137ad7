"""Case and time controls: valid time (with step buttons), surface, field, tropopause
threshold, reference state, balanced-flow level, and what the mouse does on the map."""
from __future__ import annotations

import numpy as np
import panel as pn

from ..state import REFERENCE_KINDS
from .base import StatePanel

__all__ = ["CaseControls", "MODE_LABELS"]

#: Mouse modes of the map: label -> PageChoices.mouse_mode
MODE_LABELS = {"Pan / zoom": "pan", "Lasso a piece": "lasso", "Draw a section": "section",
               "Pick target point": "target", "Place a label": "label"}
_REFERENCE_LABELS = {"time mean": "time_mean", "area mean": "area_mean",
                     "zonal mean": "zonal_mean"}


def surface_options(case):
    """``{label: surface}``: the dynamic tropopause, isentropic surfaces every 5 K over the
    case's range, and its pressure levels."""
    opts = {"dynamic tropopause": "tropopause"}
    th = case.theta()
    lo = float(np.nanpercentile(th.isel(pressure=0).values, 5))
    hi = float(np.nanpercentile(th.isel(pressure=-1).values, 50))
    for k in np.arange(5 * np.ceil(lo / 5), min(hi, 420) + 1e-6, 5):
        opts[f"θ = {k:g} K"] = float(k)
    for p in case.levels_hpa:
        opts[f"{p:g} hPa"] = f"{p:g}hPa"
    return opts


class CaseControls(StatePanel):
    """Time, surface, field, tropopause threshold, reference state, balanced-flow level and
    mouse mode. Widgets write to the State; the State's changes come back to the widgets
    (watching time_index, surface, field, threshold, reference, overlay_level only)."""

    def build(self):
        from ..views.interactive import FIELD_LABELS

        st = self.state
        case = st.case
        if case is None:
            return []
        self.time = pn.widgets.Select(label="Valid time", value=st.time_index, width=170,
                                      options={lab: i for i, lab in enumerate(st.time_labels)})
        self.prev_t = pn.widgets.Button(label="◀", width=38, margin=(23, 2, 5, 2))
        self.next_t = pn.widgets.Button(label="▶", width=38, margin=(23, 2, 5, 2))
        self.prev_t.on_click(lambda e: self.step_time(-1))
        self.next_t.on_click(lambda e: self.step_time(+1))
        sopts = surface_options(case)
        if st.surface not in sopts.values():
            thetas = [v for v in sopts.values() if isinstance(v, float)]
            if thetas and isinstance(st.surface, float):
                st.surface = min(thetas, key=lambda v: abs(v - st.surface))
            else:
                from ..state import surface_label

                sopts[surface_label(st.surface, st.threshold)] = st.surface
        self.surface = pn.widgets.Select(label="Surface", options=sopts, value=st.surface,
                                         width=250)

        def field_options():
            return {f"{FIELD_LABELS[f][0]} ({FIELD_LABELS[f][1]})": f
                    for f in st.available_fields()}

        self.field = pn.widgets.Select(label="Field", value=st.field, width=250,
                                       options=field_options())
        self.level = pn.widgets.Select(label="Balanced-flow level", width=120,
                                       options={f"{p:g} hPa": float(p) for p in case.levels_hpa},
                                       value=float(st.overlay_level))
        self.reference = pn.widgets.Select(
            label="Reference state", width=250, options=_REFERENCE_LABELS,
            value=st.reference if st.reference in REFERENCE_KINDS else
            getattr(case, "default_reference", "time_mean"))
        self.threshold = pn.widgets.FloatInput(label="Tropopause threshold (PVU)", value=st.threshold,
                                               step=0.5, start=0.5, end=10, width=250)
        self.mode = pn.widgets.RadioButtonGroup(
            label="Mouse", options=list(MODE_LABELS), orientation="vertical", width=250,
            value={v: k for k, v in MODE_LABELS.items()}[st.page.mouse_mode],
            css_classes=["pvwb-mode"])
        links = ((self.time, "time_index"), (self.surface, "surface"), (self.field, "field"),
                 (self.level, "overlay_level"), (self.reference, "reference"),
                 (self.threshold, "threshold"))
        for w, name in links:
            self.watch(lambda ev, n=name: setattr(st, n, ev.new), ["value"], obj=w)
            self.watch(lambda *ev, w=w, n=name: self.to_widget(w, getattr(st, n)), [name])

        def surface_changed(*_):
            opts = field_options()
            if opts != self.field.options:
                self.field.param.update(options=opts, value=st.field)
            if st.surface not in self.surface.options.values():
                from ..state import surface_label

                self.surface.options = {**self.surface.options,
                                        surface_label(st.surface, st.threshold): st.surface}
                self.to_widget(self.surface, st.surface)

        self.watch(surface_changed, ["surface", "field"])
        self.watch(lambda ev: setattr(st.page, "mouse_mode", MODE_LABELS[ev.new]), ["value"],
                   obj=self.mode)
        self.watch(lambda *ev: self.to_widget(self.mode, {v: k for k, v in MODE_LABELS.items()}
                                              [st.page.mouse_mode]), ["mouse_mode"], obj=st.page)
        self.map_projection = pn.widgets.RadioButtonGroup(
            label="Map drawn in", width=250, value=st.page.map_projection,
            options={"its own projection": "native", "lon–lat": "lonlat"},
            visible=bool(case.data.attrs.get("native_crs")), css_classes=["pvwb-projection"])
        self.watch(lambda ev: setattr(st.page, "map_projection", ev.new), ["value"],
                   obj=self.map_projection)
        return [TextMarkdownOnce("**Map**"), pn.Row(self.time, self.prev_t, self.next_t),
                self.surface, self.field, self.map_projection,
                self.threshold, self.reference,
                pn.layout.Divider(margin=(4, 5)),
                TextMarkdownOnce("**Mouse on the map**"), self.mode,
                pn.Row(self.level)]

    def step_time(self, step):
        n = len(self.state.case.times)
        self.state.time_index = (self.state.time_index + step) % n


def TextMarkdownOnce(text):
    """A fixed small heading."""
    return pn.pane.Markdown(text, margin=(0, 5))
