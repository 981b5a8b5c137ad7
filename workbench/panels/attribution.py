"""The attribution panel: each piece's balanced height anomaly, share, wind and vorticity at
the target point (watches pieces, target, time, member, reference and balance).

QG is the instant preview of every lasso. "Refine: nonlinear balance" runs the nonlinear-balance
piecewise inversion (:func:`workbench.inversion.nonlinear.invert_nonlinear_pieces`) as a
background job with progress and Cancel; when it ends the table and the map's overlay show the
nonlinear numbers in place (``State.balance = "nonlinear"``, saved in the session) with the
"nonlinear remainder" row. Each row says which balance it comes from. While the balance is
nonlinear, a change of pieces or time shows the QG preview at once and refines again in the
background. "Balance quality" shows, per level, the RMS difference between the balanced and
the analysed wind for QG and nonlinear balance
(:func:`workbench.inversion.nonlinear.balance_quality`), also as a background job.
"""
from __future__ import annotations

import pandas as pd
import panel as pn

from ..errors import InputError
from .base import StatePanel

__all__ = ["AttributionPanel", "attribution_rows", "quality_rows", "BALANCE_LABELS"]

#: how the page names the two balances (the table's "balance" column and the label above it)
BALANCE_LABELS = {"qg": "QG", "nonlinear": "nonlinear"}
_BALANCE_TEXT = {
    "qg": "QG balance (constant f0): the instant preview",
    "nonlinear": "nonlinear (Charney) balance, f varying with latitude; the nonlinear remainder "
                 "is its own row",
}


def attribution_rows(df, balance="qg") -> pd.DataFrame:
    """The attribution table as the page shows it (shares not given as an em dash), with the
    balance each row comes from."""
    from ..inversion.pieces import format_share

    return pd.DataFrame({
        "piece": df.index,
        "Z′ (m)": df["height_anomaly"].round(1).values,
        "share (%)": [format_share(x, ".0f") for x in df["height_share_pct"]],
        "u (m/s)": df["u"].round(1).values,
        "v (m/s)": df["v"].round(1).values,
        "ζ (1e-5/s)": (df["relative_vorticity"] * 1e5).round(2).values,
        "balance": [BALANCE_LABELS[balance]] * len(df),
    })


def quality_rows(ds) -> pd.DataFrame:
    """The balance-quality Dataset (``balance_quality``) as a per-level table (m/s)."""
    return pd.DataFrame({
        "hPa": (ds["pressure"].values / 100.0).round(0),
        "RMS wind": ds["rms_wind"].values.round(2),
        "QG − analysed": ds["rms_difference_qg"].values.round(2),
        "nonlinear − analysed": ds["rms_difference_nonlinear"].values.round(2),
    })


class AttributionPanel(StatePanel):
    """Target level, balance choice, refine action, attribution table and balance quality."""

    rebuild_on = ("case",)

    def build(self):
        from ..views.interactive import TextHTML, TextMarkdown

        st = self.state
        if st.case is None:
            return []
        self.attribution_frame = None
        self.attribution_balance = None
        self._failed_key = None
        self.attr_level = pn.widgets.Select(
            label="Target level", width=110,
            value=float(st.target[2]) if st.target is not None else float(st.overlay_level),
            options={f"{p:g} hPa": float(p) for p in st.case.levels_hpa})
        self.watch(lambda ev: self.retarget_level(ev.new), ["value"], obj=self.attr_level)
        self.watch(lambda *ev: st.target is not None and float(st.target[2]) in
                   self.attr_level.options.values() and
                   self.to_widget(self.attr_level, float(st.target[2])), ["target"])
        self.balance_choice = pn.widgets.RadioButtonGroup(
            options={"QG (instant)": "qg", "Nonlinear": "nonlinear"}, value=st.balance,
            width=200, margin=(5, 5), css_classes=["pvwb-balance-choice"])
        self.watch(lambda ev: setattr(st, "balance", ev.new), ["value"], obj=self.balance_choice)
        self.refine_button = pn.widgets.Button(label="Refine: nonlinear balance", width=200,
                                               color="primary",
                                               css_classes=["pvwb-refine"])
        self.refine_button.on_click(lambda e: self._guard(self.refine))
        self.floor_box = pn.widgets.Checkbox(
            label="accept the floor remedy (PV / absolute vorticity of the wrong sign)",
            value=bool(st.balance_floor), css_classes=["pvwb-floor"])
        self.watch(lambda ev: setattr(st, "balance_floor", bool(ev.new)), ["value"],
                   obj=self.floor_box)
        self.quality_button = pn.widgets.Button(label="Balance quality", width=150,
                                                css_classes=["pvwb-quality"])
        self.quality_button.on_click(lambda e: self._guard(self.show_quality))
        self.balance_label = TextHTML("", margin=(0, 5), css_classes=["pvwb-balance-label"],
                                      sizing_mode="stretch_width")
        self.attr_title = TextMarkdown("", margin=(0, 5))
        self.attr_table = pn.widgets.Tabulator(
            pd.DataFrame(), show_index=False, disabled=True, sizing_mode="stretch_width",
            max_width=600, height=280, layout="fit_data_stretch",
            css_classes=["pvwb-attribution"], sortable=False, selectable=False)
        self.quality_title = TextMarkdown("", margin=(0, 5), visible=False)
        self.quality_table = pn.widgets.Tabulator(
            pd.DataFrame(), show_index=False, disabled=True, sizing_mode="stretch_width",
            max_width=600, height=230, layout="fit_data_stretch", visible=False,
            css_classes=["pvwb-quality-table"], sortable=False, selectable=False)
        # where the balances differ (static.balance_map_figure at 500 hPa, drawn in the job)
        self.quality_map = pn.pane.PNG(None, visible=False, sizing_mode="stretch_width",
                                       max_width=600, css_classes=["pvwb-quality-map"])

        def balance_changed(*_):
            self.to_widget(self.balance_choice, st.balance)
            self.refresh()
            st.param.trigger("overlay_level")  # the map's overlay follows the balance

        self.watch(balance_changed, ["balance"])
        self.watch(lambda *ev: self.to_widget(self.floor_box, bool(st.balance_floor)),
                   ["balance_floor"])
        self.watch(lambda *ev: self.later(self.refresh),
                   ["pieces", "target", "time_index", "member", "reference", "balance_floor"])
        self.watch(lambda *ev: self._hide_quality(), ["time_index", "member", "reference"])
        self.refresh()
        return [pn.Row(pn.pane.Markdown("**Attribution at the target**", margin=(18, 5)),
                       self.attr_level),
                pn.FlexBox(self.balance_choice, self.refine_button, self.quality_button),
                self.floor_box, self.balance_label, self.attr_title, self.attr_table,
                self.quality_title, self.quality_table, self.quality_map]

    def retarget_level(self, p):
        t = self.state.target
        if t is not None and float(t[2]) != float(p):
            self.state.target = (t[0], t[1], float(p))

    # ---------------------------------------------------------------- table
    def refresh(self):
        from ..inversion.pieces import attribution
        from ..textsafe import escape
        from ..views.interactive import lat_label, lon_label

        st = self.state
        res, used = st.balanced_results() if st.pieces else ({}, "qg")
        pending = st.balance == "nonlinear" and used == "qg" and bool(st.pieces)
        note = ""
        if pending:
            job = self.jobs.job
            note = (" · nonlinear refine running …" if job is not None and job.running and
                    job.label.startswith("Refine") else " · press Refine for the nonlinear numbers")
        self.attribution_balance = used
        self.balance_label.object = (
            f"<div class='pvwb-balance' data-balance='{used}' style='font-size:13px'>"
            f"Balance of these numbers: <b>{escape(_BALANCE_TEXT[used])}</b>{escape(note)}</div>")
        if st.target is None or not st.pieces:
            self.attr_title.object = ("Choose *Pick target point* and click the map "
                                      "(e.g. the storm centre)." if st.pieces else
                                      "Add pieces first, then pick a target point.")
            self.attr_table.value = pd.DataFrame()
            self.attribution_frame = None
        else:
            lon, lat, p = (float(x) for x in st.target)
            df = attribution(res, lon, lat, p)
            extra = (" (with the nonlinear remainder)" if used == "nonlinear" else "")
            self.attr_title.object = (f"at {lon_label(lon, 2)} {lat_label(lat, 2)}, {p:g} hPa · "
                                      f"pieces add up to the full inversion{extra}")
            self.attr_table.value = attribution_rows(df, used)
            self.attribution_frame = df
        if pending and self._failed_key != st.refine_key():
            job = self.jobs.job
            if job is None or not job.running:
                self.later(self.refine)  # nonlinear chosen: refine the new pieces/time

    # ---------------------------------------------------------------- refine
    def refine(self):
        """Run the nonlinear-balance inversion of the current pieces in the background; the
        table and the overlay switch to it when it ends. Returns the Job (None when the
        results are already there)."""
        st = self.state
        if not st.pieces:
            raise InputError("there are no pieces to refine; lasso an anomaly or add a "
                             "boundary piece first")
        key = st.refine_key()
        if st.refined_results() is not None:
            if st.balance != "nonlinear":
                st.balance = "nonlinear"
            return None
        pieces_now = getattr(st, "pieces_now", None)
        pieces = list(pieces_now() if callable(pieces_now) else st.pieces)
        case, ti, mi, ref, floor = st.case, st.time_index, st.member, st.reference, \
            bool(st.balance_floor)
        holder = {}

        def job(progress):
            from ..inversion.nonlinear import invert_nonlinear_pieces

            holder["res"] = invert_nonlinear_pieces(case, pieces, ti, mi, ref, floor=floor,
                                                    progress=progress)

        def done():
            st.set_refined(key, holder["res"])
            solver = holder["res"]["total"].attrs.get("solver", "")
            if st.balance != "nonlinear":
                st.balance = "nonlinear"  # the watcher refreshes the table and the overlay
            else:
                self.refresh()
                st.param.trigger("overlay_level")
            n = _newton_steps(solver)
            return ("Nonlinear balance: table and overlay refined" +
                    (f" ({n} Newton steps)" if n else ""))

        def failed(job, exc):  # an error, or Cancel (exc None)
            self._failed_key = key  # no automatic retry of the same pieces
            self.refresh()

        job = self.work("Refine: nonlinear balance", job, done, background=True,
                        on_error=failed)
        self.refresh()
        return job

    # ---------------------------------------------------------------- balance quality
    def _hide_quality(self):
        self.quality_title.visible = self.quality_table.visible = False
        self.quality_map.visible = False

    def show_quality(self):
        """The per-level RMS balanced-minus-analysed wind, QG and nonlinear (background)."""
        from ..inversion.nonlinear import balance_quality

        st = self.state
        case, ti, mi, ref, floor = st.case, st.time_index, st.member, st.reference, \
            bool(st.balance_floor)
        holder = {}

        def job(progress):
            progress(None, "nonlinear inversion of the whole state")
            holder["q"] = balance_quality(case, ti, mi, ref, floor=floor)
            progress(None, "drawing where the balances differ")
            holder["png"] = _balance_map_png(holder["q"], case, mi)

        def done():
            ds = holder["q"]
            self.quality_table.value = quality_rows(ds)
            self.quality_title.object = (
                f"**Balance quality** at {ds.attrs.get('time', '')[:16].replace('T', ' ')} UTC: "
                "RMS of balanced − analysed wind (m/s), weighted by cos(latitude), interior "
                "points above the ground" +
                (f"\n\n*{escape(ds.attrs['solver_note'])}*" if ds.attrs.get("solver_note") else ""))
            self.quality_title.visible = self.quality_table.visible = True
            self.quality_map.object = holder["png"]
            self.quality_map.visible = True
            return "Balance quality ready"

        return self.work("Balance quality", job, done, background=True)


def _balance_map_png(quality, case, member, level_hpa=500.0) -> bytes:
    """PNG bytes of :func:`workbench.views.static.balance_map_figure` (page width)."""
    import io

    from ..views import static

    fig = static.balance_map_figure(quality, level_hpa, case, member,
                                    static.FigureSettings(width_in=8.0, dpi=75))
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=75)
    return buf.getvalue()


def _newton_steps(solver_json):
    import json

    try:
        return int(json.loads(solver_json)["full"]["newton_iterations"])
    except Exception:  # noqa: BLE001
        return None
