"""The tendency and what-if panel.

* **Why is the low deepening?** The QG tendency attribution at the target for the current time
  (:func:`workbench.tendency.explain`): rows "wind of" a piece, columns "PV of" a piece, in m
  per 6 h, adding up to the total height tendency, with its plain-language summary. Computed on
  demand as a background job; a change of time, pieces or target marks it out of date.
* **What if?** A piece of the analysis scaled, removed or shifted, run forward with the QG model
  for up to 48 h beside the unchanged control (:func:`workbench.whatif.run_whatif`) as a
  background job with progress and Cancel. Shows the surface low's track and central pressure
  for control and experiment (table and a small track plot), labelled
  :data:`workbench.whatif.LABEL` with :data:`workbench.whatif.LIMITS`. The run's settings and a
  summary of its results are kept in ``State.whatif`` (saved in the session; a loaded session
  shows them without running again).

Everything computed here comes from :mod:`workbench.tendency` / :mod:`workbench.whatif`; the
panel only lays out tables and draws the tracks.
"""
from __future__ import annotations

import math

import pandas as pd
import panel as pn

from ..errors import InputError
from .base import StatePanel, rule

__all__ = ["WhatIfPanel", "ACTIONS", "track_rows", "whatif_record"]

#: the what-if form's actions: label -> name
ACTIONS = {"Scale": "scale", "Remove": "remove", "Shift": "shift"}
_RUN_COLOURS = {"control": "#333333", "experiment": "#c8553d"}


def track_rows(track) -> pd.DataFrame:
    """The low's track, control beside experiment, one row per output time: central pressure
    (hPa), experiment minus control, and positions as °E/°W °N/°S."""
    from ..views.interactive import lat_label, lon_label

    t = pd.DataFrame(track)
    out = None
    for run in ("control", "experiment"):
        r = t[t["run"] == run].set_index("lead_time_h")
        part = pd.DataFrame({f"{run} hPa": r["mslp_hpa"].round(1),
                             f"{run} at": [f"{lon_label(x, 1)} {lat_label(y, 1)}"
                                           for x, y in zip(r["longitude"], r["latitude"])]},
                            index=r.index)
        out = part if out is None else out.join(part, how="outer")
    out.index.name = "+h"
    out = out.reset_index()
    out["+h"] = out["+h"].round().astype(int)
    if "experiment hPa" in out and "control hPa" in out:
        out["Δ hPa"] = (out["experiment hPa"] - out["control hPa"]).round(1)
        out = out[["+h", "control hPa", "experiment hPa", "Δ hPa", "control at", "experiment at"]]
    return out


def whatif_record(settings, res) -> dict:
    """What the session keeps of a run: its settings, the summary sentences, the track and the
    control's verification (plain JSON)."""
    def clean(v):
        if isinstance(v, float) and not math.isfinite(v):
            return None
        return v

    track = [{k: clean(v.item() if hasattr(v, "item") else v) for k, v in row.items()}
             for row in res.track.to_dict("records")]
    ver = None
    if res.verification is not None:
        ver = [{k: clean(v.item() if hasattr(v, "item") else v) for k, v in row.items()}
               for row in res.verification.to_dict("records")]
    return {"settings": dict(settings), "summary": list(res.summary),
            "analysis_time": str(res.attrs.get("analysis_time", "")), "track": track,
            "verification": ver}


class WhatIfPanel(StatePanel):
    """Tendency attribution and the what-if form (watches time, pieces, target, whatif)."""

    def build(self):
        from ..views.interactive import TextHTML, TextMarkdown
        from ..whatif import LABEL, LIMITS, MAX_HOURS, OUTPUT_HOURS

        st = self.state
        if st.case is None:
            return []
        # --- tendency
        self.explain_button = pn.widgets.Button(label="Why is it deepening? (tendency)",
                                                width=250, css_classes=["pvwb-explain"])
        self.explain_button.on_click(lambda e: self._guard(self.explain))
        self.tendency_title = TextMarkdown("", margin=(0, 5))
        self.tendency_table = pn.widgets.Tabulator(
            pd.DataFrame(), show_index=False, disabled=True, sizing_mode="stretch_width",
            max_width=600, height=220, layout="fit_data_stretch", visible=False,
            css_classes=["pvwb-tendency-table"], sortable=False, selectable=False)
        self.tendency_summary = TextMarkdown("", margin=(0, 5), css_classes=["pvwb-tendency-summary"])
        self.watch(lambda *ev: self._tendency_stale(), ["time_index", "member", "pieces",
                                                        "target", "reference"])
        # --- what-if form
        self.w_piece = pn.widgets.Select(label="Piece", width=160, options=self._piece_options(),
                                         css_classes=["pvwb-whatif-piece"])
        self.watch(lambda *ev: setattr(self.w_piece, "options", self._piece_options()), ["pieces"])
        self.w_action = pn.widgets.RadioButtonGroup(options=ACTIONS, value="scale", width=210,
                                                    margin=(23, 5, 5, 5),
                                                    css_classes=["pvwb-whatif-action"])
        self.w_factor = pn.widgets.FloatInput(label="Factor", value=0.5, start=-5.0, end=5.0,
                                              step=0.1, width=80, css_classes=["pvwb-whatif-factor"])
        self.w_dlon = pn.widgets.FloatInput(label="Δlon (°)", value=0.0, start=-30.0, end=30.0,
                                            step=1.0, width=80, visible=False)
        self.w_dlat = pn.widgets.FloatInput(label="Δlat (°)", value=0.0, start=-20.0, end=20.0,
                                            step=1.0, width=80, visible=False)
        self.w_hours = pn.widgets.IntInput(label=f"Hours (≤{MAX_HOURS:g})", value=36,
                                           start=int(OUTPUT_HOURS), end=int(MAX_HOURS),
                                           step=int(OUTPUT_HOURS), width=90,
                                           css_classes=["pvwb-whatif-hours"])
        self.w_moist = pn.widgets.Checkbox(label="simple moist heating", value=False)
        self.run_button = pn.widgets.Button(label="Run what-if", color="primary",
                                            width=140, css_classes=["pvwb-whatif-run"])
        self.run_button.on_click(lambda e: self._guard(self.run))

        def action_changed(*_):
            a = self.w_action.value
            self.w_factor.visible = a == "scale"
            self.w_dlon.visible = self.w_dlat.visible = a == "shift"

        self.watch(action_changed, ["value"], obj=self.w_action)
        self.label = TextHTML(
            f"<div class='pvwb-whatif-label' style='font-size:12px;color:#6b4e00;"
            f"background:#fff4d6;padding:4px 8px;border-radius:4px'><b>{LABEL}</b>. "
            f"{LIMITS}</div>", sizing_mode="stretch_width", margin=(2, 5))
        self.result_title = TextMarkdown("", margin=(0, 5), css_classes=["pvwb-whatif-title"])
        self.track_table = pn.widgets.Tabulator(
            pd.DataFrame(), show_index=False, disabled=True, sizing_mode="stretch_width",
            max_width=600, height=240, layout="fit_data_stretch", visible=False,
            css_classes=["pvwb-whatif-table"], sortable=False, selectable=False)
        self.track_plot = pn.pane.Bokeh(None, visible=False, name="pvwb-whatif-tracks")
        self.result_summary = TextMarkdown("", margin=(0, 5), css_classes=["pvwb-whatif-summary"])
        self.watch(lambda *ev: self.show_saved(), ["whatif"])
        self.show_saved()
        return [pn.pane.Markdown("**Why is the low deepening?**", margin=(6, 5, 0, 5)),
                self.explain_button, self.tendency_title, self.tendency_table,
                self.tendency_summary,
                rule(),
                pn.pane.Markdown("**What if? (QG model)**", margin=(0, 5)), self.label,
                pn.FlexBox(self.w_piece, self.w_action),
                pn.FlexBox(self.w_factor, self.w_dlon, self.w_dlat, self.w_hours),
                pn.Row(self.w_moist, self.run_button),
                self.result_title, self.track_table, self.track_plot, self.result_summary]

    def _piece_options(self):
        from ..analysis import standard_pieces

        st = self.state
        names = [p.name for p in st.pieces if p.kind != "remainder"] if st.pieces else \
            [p.name for p in standard_pieces() if p.kind != "remainder"]
        return names

    # ---------------------------------------------------------------- tendency
    def _tendency_stale(self):
        if self.tendency_table.visible:
            self.tendency_title.object = ("*Out of date (time, pieces or target changed): press "
                                          "the button again.*")

    def explain(self):
        """The tendency attribution at the target (or the storm centre) for the current time,
        as a background job."""
        from ..tendency import explain

        st = self.state
        case, ti, mi, ref = st.case, st.time_index, st.member, st.reference
        pieces = list(st.pieces) or None
        target = None if st.target is None else tuple(float(x) for x in st.target)
        holder = {}

        def job(progress):
            progress(0.1, "pieces and their tendencies")
            holder["ex"] = explain(case, ti, pieces, target, member=mi, reference=ref)

        def done():
            from ..views.interactive import lat_label, lon_label

            ex = holder["ex"]
            m = ex.matrix.round(1)
            table = m.reset_index().rename(columns={m.index.name or "index": "wind of \\ PV of"})
            self.tendency_table.value = table
            self.tendency_table.visible = True
            lon, lat, p = ex.target
            self.tendency_title.object = (
                f"QG height tendency at {lon_label(lon, 1)} {lat_label(lat, 1)}, {p:g} hPa, "
                f"{ex.time[:16].replace('T', ' ')} UTC (m per 6 h): row = the balanced wind of a "
                f"piece, column = the PV it carries; total **{ex.total:+.1f} m per 6 h** "
                f"(entries add up to it within {ex.closure_error:.1e} m).")
            self.tendency_summary.object = "\n\n".join(ex.summary + list(ex.notes))
            return "Tendency attribution ready"

        return self.work("Tendency attribution", job, done, background=True)

    # ---------------------------------------------------------------- what-if
    def settings(self) -> dict:
        """The form's settings (checked: InputError)."""
        from ..whatif import MAX_HOURS, OUTPUT_HOURS

        piece = self.w_piece.value
        if not piece:
            raise InputError("choose the piece the what-if changes first")
        action = self.w_action.value
        hours = self.w_hours.value
        if hours is None or not (OUTPUT_HOURS <= hours <= MAX_HOURS) or hours % OUTPUT_HOURS:
            raise InputError(f"what-if hours {hours!r} must be a multiple of {OUTPUT_HOURS:g} "
                             f"from {OUTPUT_HOURS:g} to {MAX_HOURS:g}")
        scale, dlon, dlat = 1.0, 0.0, 0.0
        if action == "scale":
            if self.w_factor.value is None:
                raise InputError("give the what-if factor (e.g. 0.5 for half strength)")
            scale = float(self.w_factor.value)
        elif action == "remove":
            scale = 0.0
        else:
            dlon, dlat = float(self.w_dlon.value or 0.0), float(self.w_dlat.value or 0.0)
            if dlon == 0.0 and dlat == 0.0:
                raise InputError("give a what-if shift (Δlon and/or Δlat in degrees)")
        return dict(piece=piece, action=action, scale=scale, shift_lon=dlon, shift_lat=dlat,
                    hours=float(hours), moist=bool(self.w_moist.value))

    def run(self):
        """Run the what-if (control and experiment) in the background; returns the Job."""
        from ..whatif import run_whatif

        st = self.state
        s = self.settings()
        case, ti, mi, ref = st.case, st.time_index, st.member, st.reference
        pieces = list(st.pieces) or None
        holder = {}

        def job(progress):
            holder["res"] = run_whatif(case, s["piece"], s["scale"], shift_lon=s["shift_lon"],
                                       shift_lat=s["shift_lat"], hours=s["hours"], time=ti,
                                       member=mi, pieces=pieces, reference=ref,
                                       moist=s["moist"], progress=progress)

        def done():
            res = holder["res"]
            self.last_result = res
            st.whatif = whatif_record(dict(s, time=str(case.times[ti])[:16]), res)
            return f"What-if ready ({res.modification.describe()}, {s['hours']:g} h)"

        return self.work(f"What-if: {s['piece']} {s['action']}, {s['hours']:g} h", job, done,
                         background=True)

    def show_saved(self):
        """Show ``State.whatif`` (the last run, or one loaded with a session)."""
        from ..whatif import LABEL

        rec = self.state.whatif
        if not rec:
            self.track_table.visible = self.track_plot.visible = False
            self.result_title.object = ""
            self.result_summary.object = ""
            return
        s = rec.get("settings", {})
        track = pd.DataFrame(rec.get("track") or [])
        if track.empty:
            return
        self.track_table.value = track_rows(track)
        self.track_table.visible = True
        self.track_plot.object = self._track_figure(track)
        self.track_plot.visible = True
        what = {"scale": f"scaled by {s.get('scale', 1):g}", "remove": "removed",
                "shift": f"shifted by {s.get('shift_lon', 0):+g}° lon, {s.get('shift_lat', 0):+g}° lat"}
        self.result_title.object = (
            f"**{LABEL}**: *{s.get('piece', '?')}* {what.get(s.get('action'), '')}, from "
            f"{str(rec.get('analysis_time', '')).replace('T', ' ')} UTC, {s.get('hours', 0):g} h"
            f"{' (moist)' if s.get('moist') else ' (dry)'}: surface low, control and experiment")
        self.result_summary.object = "\n\n".join(rec.get("summary", [])[1:])

    @staticmethod
    def _track_figure(track):
        from bokeh.models import ColumnDataSource, HoverTool
        from bokeh.plotting import figure

        fig = figure(width=430, height=260, title="Surface low track (a dot every 6 h)",
                     x_axis_label="longitude (°E)", y_axis_label="latitude (°N)",
                     toolbar_location=None, match_aspect=True, name="pvwb-whatif-track-fig")
        for run, colour in _RUN_COLOURS.items():
            r = track[track["run"] == run]
            if r.empty:
                continue
            src = ColumnDataSource(dict(x=r["longitude"].values, y=r["latitude"].values,
                                        h=r["lead_time_h"].values, p=r["mslp_hpa"].values))
            fig.line("x", "y", source=src, color=colour, line_width=2, legend_label=run)
            fig.scatter("x", "y", source=src, color=colour, size=6)
        fig.add_tools(HoverTool(tooltips=[("+h", "@h"), ("hPa", "@p{0.0}"),
                                          ("lon/lat", "@x{0.0} / @y{0.0}")]))
        fig.legend.location = "bottom_right"
        fig.legend.label_text_font_size = "10px"
        return fig
