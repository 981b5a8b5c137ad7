"""The interactive workbench: one Panel layout, inline in Jupyter and served in a browser.

``Workbench(case_or_path, data_dirs=None)`` builds the page on a shared
:class:`~workbench.state.State`: controls on the left (case, time, surface, field, mouse mode,
settings of the next lassoed piece, boundary pieces), the map in the middle with the pieces
list and the attribution table beside it, the section below and a status line at the top.
Display it in a notebook cell (``wb`` or ``pn.panel(wb)``) or serve it with :func:`serve` /
``pvwb serve CASE``.

Beside the map, three tabs: the attribution table, *Annotate* (text labels placed with the
"Place a label" mouse mode, highlighted regions lassoed when "A lasso makes" is set to
"highlighted region", delete the last / all) and *Save & export*: save and load sessions
(:mod:`workbench.session`), the map and the active section as PNG/SVG/PDF
(:func:`workbench.views.static.map_figure` / ``section_figure`` + ``save_figure``), the
briefing PDF (:func:`workbench.brief.make_briefing`) and the pieces' balanced fields as netCDF
(:func:`workbench.export.export_balanced`); each written file is also offered for download.

Security: :func:`serve` binds 127.0.0.1 unless told otherwise, and any other address needs a
token (asked for on a login page). The page's "open file" control only opens files inside the
configured data folders (:func:`resolve_data_path`); a path outside them, or one climbing out
with ``..`` or a symbolic link, raises :class:`~workbench.errors.AccessError`. Files are read
by the netCDF/GRIB/Zarr readers of :mod:`workbench.io` only. Files are written only inside
the output folder (``output_dir``, default the first data folder; :func:`resolve_output_path`
refuses anything else with AccessError), atomically, and an existing file is replaced only when
the page's "Overwrite an existing file" box is ticked. Sessions are loaded from the data folders
and the output folder, and the case a session names (and a climatology file it gives as
``reference``) must lie in the data folders too; "outside" and "not found" get one message.
A session changed after it was saved is refused until the user presses "Load it anyway".
Every user- or file-supplied string put into HTML (case name and attributes, file names,
annotation texts, messages) goes through :func:`workbench.textsafe.escape`.
"""
from __future__ import annotations

import argparse
import math
import os
import secrets
import socket
import sys
import time
from pathlib import Path

import numpy as np
import panel as pn
import param

from .access import folders, resolve_data_path, resolve_output_path
from .errors import AccessError, ExportError, InputError, SessionError, WorkbenchError
from .state import BOUNDARY_PIECES, State
from .textsafe import escape

__all__ = ["Workbench", "serve", "main", "resolve_data_path", "resolve_output_path",
           "list_data_files", "list_session_files", "LOOPBACK"]

LOOPBACK = ("127.0.0.1", "localhost", "::1")
_STATUS_COLOURS = {"info": ("#e8f1f8", "#12344d"), "success": ("#e6f4ea", "#0f3d1e"),
                   "warning": ("#fff4d6", "#5c4200"), "error": ("#fde2e1", "#7a0b05")}
DATA_SUFFIXES = (".nc", ".nc4", ".netcdf", ".grib", ".grib2", ".grb", ".grb2", ".zarr", ".txt",
                 ".cdf", ".h5")
_CSS = """
.pvwb-header h2 {margin: 0 0 2px 0; font-size: 20px;}
.pvwb-side {background: #f7f7f5; border-radius: 6px; padding: 4px;}
"""


# --------------------------------------------------------------------------- data folders


# The folder checks live in workbench.access (shared with session files).
_folders = folders


def list_data_files(data_dirs, limit=500):
    """Files (and Zarr stores) in the data folders, as ``{label: absolute path}``."""
    out = {}
    for f in _folders(data_dirs):
        for p in sorted(f.rglob("*")):
            if len(out) >= limit:
                return out
            if p.name.startswith(".") or any(part.startswith(".") for part in p.relative_to(f).parts):
                continue
            if p.suffix.lower() in DATA_SUFFIXES and (p.is_file() or p.suffix == ".zarr"):
                if any(q.suffix == ".zarr" for q in p.parents if f in q.parents):
                    continue  # inside a zarr store
                out[f"{f.name}/{p.relative_to(f)}"] = str(p)
    return out


def list_session_files(folders, limit=200):
    """Session files (``*.json``) in ``folders``, newest first, as ``{label: absolute path}``."""
    found = []
    for f in _folders(folders):
        for p in f.rglob("*.json"):
            rel = p.relative_to(f)
            if any(part.startswith(".") for part in rel.parts) or not p.is_file():
                continue
            found.append((p.stat().st_mtime, f"{f.name}/{rel}", str(p.resolve())))
    found.sort(key=lambda t: -t[0])
    out = {}
    for _, label, path in found:
        if path not in out.values():
            out[label] = path
        if len(out) >= limit:
            break
    return out


def _slug(text):
    import re

    keep = re.sub(r"[^A-Za-z0-9.\-]+", "_", str(text).strip())
    return keep.strip("._")[:60] or "case"


def _case_stem(case):
    """A short file-name stem for a case: its file's name, else its name."""
    src = str(getattr(case, "source", "") or "")
    if src and src != "<in-memory>":
        return _slug(Path(src).stem)
    return _slug(getattr(case, "name", "case"))


# --------------------------------------------------------------------------- the workbench


class Workbench:
    """The workbench page for a case (or for none yet: then only "open file" shows).

    Parameters
    ----------
    case_or_path : a :class:`workbench.Case`, a path to a case file, or None.
    data_dirs : folders the page may open files from (default: the case file's folder).
    state : optionally an existing :class:`State` to show (e.g. a reloaded session).
    output_dir : the folder sessions and exports are written to (default: the first data
        folder; it must exist).
    """

    def __init__(self, case_or_path=None, data_dirs=None, state=None, width=820,
                 output_dir=None):
        pn.extension("tabulator", raw_css=[_CSS], notifications=False)
        from .io import open_case

        case = case_or_path if case_or_path is not None else getattr(state, "case", None)
        if case is not None and not hasattr(case, "map_field"):
            case = open_case(case)
        if data_dirs is None and case is not None and case.source not in (None, "<in-memory>"):
            data_dirs = [str(Path(case.source).resolve().parent)]
        self.data_dirs = [str(p) for p in _folders(data_dirs)]
        if output_dir is not None:
            out = _folders([output_dir])
            if not out:
                raise InputError(f"output folder {output_dir!r} does not exist; create it or "
                                 "give an existing folder")
            self.output_dir = str(out[0])
        else:
            self.output_dir = self.data_dirs[0] if self.data_dirs else None
        self.width = width
        if state is not None:
            self.state = state
        else:
            self.state = State(case)
        self.map = None
        self.section = None
        self._watchers = []
        self._deferred = []
        self._build_common()
        if self.state.case is not None:
            self._build_case_views()
        else:
            self.main[:] = [pn.pane.Markdown("### No case open\nPick a file in the data folders "
                                             "on the left and press **Open**.")]
            self.state.set_status("Open a case to start.", "info")

    # ---------------------------------------------------------------- helpers
    def _guard(self, fn, *args, **kwargs):
        """Run ``fn``; any error goes to the status area (the page never dies)."""
        try:
            return fn(*args, **kwargs)
        except Exception as exc:  # noqa: BLE001
            self.state.report(exc)
            return None

    def _doc(self):
        fig = getattr(self.map, "figure", None) if self.map is not None else None
        doc = fig.document if fig is not None else None
        if doc is None:
            doc = pn.state.curdoc
        if doc is not None and getattr(doc, "session_context", None) is not None:
            return doc
        return None

    def _later(self, fn):
        """Run ``fn`` after the current changes have been sent to the browser (served), or
        now (notebook)."""
        doc = self._doc()
        if doc is None:
            self._guard(fn)
        else:
            doc.add_next_tick_callback(lambda: self._guard(fn))

    def _work(self, label, fn, done=None):
        """Long work: show the busy indicator and ``label`` first, then run ``fn``."""
        st = self.state
        st.busy = True
        st.set_status(label + " …", "info")

        def run():
            t0 = time.perf_counter()
            try:
                fn()
                msg = done() if callable(done) else (done or "Done")
            except Exception as exc:  # noqa: BLE001
                st.report(exc)
            else:
                st.set_status(f"{msg} ({time.perf_counter() - t0:.1f} s)", "success")
            finally:
                st.busy = False

        doc = self._doc()
        if doc is None:
            run()
        else:
            doc.add_next_tick_callback(run)

    # ---------------------------------------------------------------- common parts
    def _build_common(self):
        st = self.state
        self.status = pn.pane.HTML("", css_classes=["pvwb-status"], margin=(0, 10),
                                   sizing_mode="stretch_width")
        self.spinner = pn.indicators.LoadingSpinner(value=False, size=22,
                                                    css_classes=["pvwb-busy"], margin=(8, 4))

        def show_status(*_):
            bg, fg = _STATUS_COLOURS.get(st.status_level, _STATUS_COLOURS["info"])
            icon = {"error": "✖ ", "warning": "⚠ ", "success": "✔ "}.get(st.status_level, "")
            self.status.object = (
                f"<div class='pvwb-status-text' data-level='{st.status_level}' style='background:"
                f"{bg};color:{fg};padding:5px 10px;border-radius:4px;font-size:13px'>"
                f"{icon}{escape(st.status or ' ')}</div>")
            self.spinner.value = bool(st.busy)

        st.param.watch(show_status, ["status", "status_level", "busy"])
        show_status()
        self.header = pn.pane.HTML("", sizing_mode="stretch_width", css_classes=["pvwb-header"])
        # open file
        self.file_select = pn.widgets.Select(label="Case file (data folders)", options={},
                                             width=250)
        self.file_path = pn.widgets.TextInput(label="…or a file name in a data folder",
                                              placeholder="e.g. storm.nc", width=250)
        self.open_button = pn.widgets.Button(label="Open", color="primary", width=90,
                                             css_classes=["pvwb-open"])
        self.open_button.on_click(lambda e: self._guard(self.open_file))
        self._refresh_file_list()
        self.main = pn.Column(sizing_mode="stretch_width")
        self.sidebar = pn.Column(width=280, css_classes=["pvwb-side"])
        self.layout = pn.Column(
            pn.Row(self.header, self.spinner, sizing_mode="stretch_width"),
            self.status,
            pn.Row(self.sidebar, self.main, sizing_mode="stretch_width"),
            sizing_mode="stretch_width", name="PV Workbench")
        self._fill_sidebar()

    def _refresh_file_list(self):
        files = list_data_files(self.data_dirs)
        self.file_select.options = files
        if files and self.state.case is not None:
            cur = str(Path(str(self.state.case.source)).resolve()) if \
                self.state.case.source != "<in-memory>" else None
            if cur in files.values():
                self.file_select.value = cur

    def open_file(self, path=None):
        """Open a case file from the data folders (from the page's controls or ``path``)."""
        from .io import open_case

        text = path or self.file_path.value or self.file_select.value
        if not text:
            raise InputError("pick a case file in the list (or type its name) first")
        real = resolve_data_path(text, self.data_dirs)
        holder = {}

        def load():
            holder["case"] = open_case(real)

        def done():
            self._switch_case(holder["case"])
            return f"Opened {real.name}"

        # open first (may fail: the old case stays), then switch
        def job():
            load()

        self._work(f"Opening {real.name}", job, done)

    def _switch_case(self, case):
        self._detach()
        self.state.set_case(case)
        self._build_case_views()

    def _detach(self):
        for obj, w in self._watchers:
            obj.param.unwatch(w)
        self._watchers = []
        for v in (self.map, self.section):
            if v is not None and hasattr(v, "detach"):
                v.detach()

    def _watch(self, obj, fn, names):
        w = obj.param.watch(fn, names)
        self._watchers.append((obj, w))
        return w

    # ---------------------------------------------------------------- case views
    def _build_case_views(self):
        from .views.interactive import MapView, SectionView, caution_html

        st = self.state
        case = st.case
        self.header.object = (f"<h2>PV Workbench · {escape(case.name)}</h2>" +
                              caution_html(case))
        self._build_controls()
        self.map = MapView(st, width=self.width)
        self.map.on_lasso = lambda poly: self._guard(self.lasso_piece, poly)
        self.map.on_section = lambda a, b: self._guard(self.draw_section, a, b)
        self.map.on_tap = lambda x, y: self._guard(self.pick_target, x, y)
        self.map.on_label = lambda x, y: self._guard(self.place_label, x, y)
        self.map.set_mode(MODE_KEYS[self.mode.value])
        self.section = SectionView(st, width=self.width, defer=self._later)
        self._build_tables()
        self._build_annotate_box()
        self._build_export_box()
        self.tabs = pn.Tabs(("Attribution", self.attr_box), ("Annotate", self.annotate_box),
                            ("Save & export", self.export_box), width=430,
                            css_classes=["pvwb-tabs"])
        notes = ["grey arrows: wind on the map surface", "black line: the tropopause "
                 "threshold on PV maps", self.map.coast_note]
        self.main[:] = [
            pn.Row(pn.Column(self.map.pane,
                             pn.pane.Markdown(" · ".join(notes), styles={"font-size": "11px",
                                                                          "color": "#666"},
                                              margin=(0, 10))),
                   pn.Column(self.pieces_box, self.tabs, width=430)),
            self.section.pane,
        ]
        self._fill_sidebar()
        self._refresh_file_list()
        self._later(st.warm)  # anomaly and solver ready before the first lasso
        self._watch(st, lambda *ev: self._later(st.warm), ["time_index", "member", "reference"])
        st.set_status(f"Case {case.name!r}: {len(case.times)} time(s), "
                      f"{len(case.levels_hpa)} levels. Lasso an anomaly to invert it.", "info")

    def _surface_options(self):
        case = self.state.case
        opts = {"dynamic tropopause": "tropopause"}
        th = case.theta()
        lo = float(np.nanpercentile(th.isel(pressure=0).values, 5))
        hi = float(np.nanpercentile(th.isel(pressure=-1).values, 50))
        for k in np.arange(5 * np.ceil(lo / 5), min(hi, 420) + 1e-6, 5):
            opts[f"θ = {k:g} K"] = float(k)
        for p in case.levels_hpa:
            opts[f"{p:g} hPa"] = f"{p:g}hPa"
        return opts

    def _build_controls(self):
        st = self.state
        case = st.case
        from .views.interactive import FIELD_LABELS, MODES

        times = {lab: i for i, lab in enumerate(st.time_labels)}
        self.time = pn.widgets.Select(label="Valid time", options=times, value=st.time_index,
                                      width=170)
        self.prev_t = pn.widgets.Button(label="◀", width=38, margin=(23, 2, 5, 2))
        self.next_t = pn.widgets.Button(label="▶", width=38, margin=(23, 2, 5, 2))
        self.prev_t.on_click(lambda e: self._step_time(-1))
        self.next_t.on_click(lambda e: self._step_time(+1))
        sopts = self._surface_options()
        if st.surface not in sopts.values():
            thetas = [v for v in sopts.values() if isinstance(v, float)]
            if thetas and isinstance(st.surface, float):
                st.surface = min(thetas, key=lambda v: abs(v - st.surface))
        self.surface = pn.widgets.Select(label="Surface", options=sopts, value=st.surface,
                                         width=250)
        self.field = pn.widgets.Select(label="Field", value=st.field, width=250, options={
            f"{FIELD_LABELS[f][0]} ({FIELD_LABELS[f][1]})": f for f in case.MAP_FIELDS})
        levels = {f"{p:g} hPa": float(p) for p in case.levels_hpa}
        self.level = pn.widgets.Select(label="Balanced-flow level", options=levels,
                                       value=float(st.overlay_level), width=120)
        self.reference = pn.widgets.Select(label="Reference state", width=120,
                                           options={"time mean": "time_mean",
                                                    "area mean": "area_mean",
                                                    "zonal mean": "zonal_mean"},
                                           value=st.reference if st.reference in
                                           ("time_mean", "area_mean", "zonal_mean") else
                                           getattr(st.case, "default_reference", "time_mean"))
        self.threshold = pn.widgets.FloatInput(label="Tropopause (PVU)", value=st.threshold,
                                               step=0.5, start=0.5, end=10, width=120)
        self.mode = pn.widgets.RadioButtonGroup(label="Mouse", options=list(MODES),
                                                value="Lasso a piece", orientation="vertical",
                                                width=250,
                                                css_classes=["pvwb-mode"])
        # the next lassoed piece
        self.p_kind = pn.widgets.Select(label="A lasso makes", width=250, options={
            "interior PV piece": "interior", "surface θ′ piece (lower boundary)": "bottom",
            "lid θ′ piece (upper boundary)": "top",
            "highlighted region (annotation)": "region"})
        self.p_coord = pn.widgets.RadioButtonGroup(label="Layer in", options=["pressure", "theta"],
                                                   value="pressure", width=250)
        pmax = float(max(case.levels_hpa))
        pmin = float(min(case.levels_hpa))
        self.p_layer = pn.widgets.RangeSlider(label="Layer (hPa)", start=pmin, end=pmax,
                                              value=(pmin, min(500.0, pmax)), step=25, width=250)
        self.p_sign = pn.widgets.RadioButtonGroup(label="Sign", options={
            "positive": 1, "negative": -1, "both": 0}, value=1, width=250)
        self.p_threshold = pn.widgets.FloatInput(label="Min. |PV anomaly| (PVU)", value=0.0,
                                                 start=0.0, step=0.1, width=120)
        self.p_moist = pn.widgets.Checkbox(label="moist only (RH ≥)", value=False, width=120,
                                           margin=(28, 5, 5, 10))
        self.p_rh = pn.widgets.IntInput(label="RH (%)", value=80, start=0, end=100, step=5,
                                        width=70)
        self.p_name = pn.widgets.TextInput(label="Name of the next piece", placeholder="auto",
                                           width=250)
        self.boundary_buttons = []
        for kind, label in BOUNDARY_PIECES.items():
            b = pn.widgets.Button(label=f"+ {label}", width=120, css_classes=[f"pvwb-add-{kind}"])
            b.on_click(lambda e, k=kind: self._guard(self.add_boundary, k))
            self.boundary_buttons.append(b)

        def coord_changed(ev):
            if ev.new == "theta":
                self.p_layer.param.update(name="Layer (K)", start=270.0, end=450.0,
                                          value=(300.0, 340.0), step=5)
            else:
                self.p_layer.param.update(name="Layer (hPa)", start=pmin, end=pmax,
                                          value=(pmin, min(500.0, pmax)), step=25)

        self.p_coord.param.watch(coord_changed, "value")
        # widget -> state
        links = ((self.time, "time_index"), (self.surface, "surface"), (self.field, "field"),
                 (self.level, "overlay_level"), (self.reference, "reference"),
                 (self.threshold, "threshold"))
        for w, name in links:
            w.param.watch(lambda ev, n=name: self._guard(self._set_state, n, ev.new), "value")
            self._watch(st, lambda *ev, w=w, n=name: self._state_to_widget(w, getattr(st, n)), [name])
        self.mode.param.watch(lambda ev: self.map and self.map.set_mode(MODE_KEYS[ev.new]),
                              "value")

    def _set_state(self, name, value):
        st = self.state
        if name == "surface" and value == "tropopause" and st.field in ("ertel_pv",
                                                                        "ertel_pv_anomaly"):
            # PV is the threshold itself on the tropopause: show its theta instead
            with param.parameterized.batch_call_watchers(st):
                st.field = "potential_temperature"
                st.surface = value
            return
        if name == "field" and value in ("ertel_pv", "ertel_pv_anomaly") and \
                st.surface == "tropopause":
            raise InputError("PV is the threshold value everywhere on the dynamic tropopause; "
                             "pick θ, pressure, height or wind there, or an isentropic surface")
        setattr(st, name, value)

    def _state_to_widget(self, widget, value):
        if widget.value != value:
            try:
                widget.value = value
            except Exception:  # noqa: BLE001
                pass

    def _step_time(self, step):
        n = len(self.state.case.times)
        self.state.time_index = (self.state.time_index + step) % n

    def _fill_sidebar(self):
        files = pn.Column(pn.pane.Markdown("**Case**", margin=(0, 5)), self.file_select,
                          self.file_path, self.open_button)
        if self.state.case is None or not hasattr(self, "time"):
            self.sidebar[:] = [files]
            return

        def hr():  # a new divider each time: one Bokeh model may sit in one place only
            return pn.layout.Divider(margin=(4, 5))
        self.sidebar[:] = [
            pn.pane.Markdown("**Map**", margin=(0, 5)),
            pn.Row(self.time, self.prev_t, self.next_t),
            self.surface, self.field,
            pn.Row(self.threshold, self.reference),
            hr(),
            pn.pane.Markdown("**Mouse on the map**", margin=(0, 5)), self.mode,
            hr(),
            pn.pane.Markdown("**Next lasso** (a piece, or a highlighted region)",
                             margin=(0, 5)),
            self.p_kind, self.p_coord, self.p_layer, self.p_sign,
            pn.Row(self.p_threshold, self.level),
            pn.Row(self.p_moist, self.p_rh), self.p_name,
            pn.pane.Markdown("**Boundary pieces**", margin=(0, 5)),
            pn.GridBox(*self.boundary_buttons, ncols=2),
            hr(), files,
        ]

    # ---------------------------------------------------------------- pieces and tables
    def _build_tables(self):
        import pandas as pd

        st = self.state
        self.pieces_table = pn.widgets.Tabulator(
            pd.DataFrame(columns=["name", "kind", "layer", "sign", "show"]),
            show_index=False, editors={"name": "input", "show": {"type": "tickCross"},
                                       "kind": None, "layer": None, "sign": None},
            formatters={"show": {"type": "tickCross"}}, buttons={"delete": "✖"},
            width=420, height=160, layout="fit_data_table", css_classes=["pvwb-pieces"],
            sortable=False, selectable=False)
        self.pieces_table.on_edit(lambda ev: self._guard(self._piece_edited, ev))
        self.pieces_table.on_click(lambda ev: self._guard(self._piece_clicked, ev))
        self.pieces_box = pn.Column(pn.pane.Markdown("**Pieces** (edit a name to rename; tick "
                                                     "to show/hide; ✖ deletes)", margin=(0, 5)),
                                    self.pieces_table)
        self.attr_level = pn.widgets.Select(label="Target level", width=110, value=float(
            st.overlay_level), options={f"{p:g} hPa": float(p) for p in st.case.levels_hpa})
        self.attr_level.param.watch(lambda ev: self._guard(self._retarget_level, ev.new), "value")
        self.attr_title = pn.pane.Markdown("", margin=(0, 5))
        self.attr_table = pn.widgets.Tabulator(pd.DataFrame(), show_index=False, disabled=True,
                                               width=420, height=200, layout="fit_data_table",
                                               css_classes=["pvwb-attribution"], sortable=False,
                                               selectable=False)
        self.attr_box = pn.Column(pn.Row(pn.pane.Markdown("**Attribution at the target**",
                                                          margin=(18, 5)), self.attr_level),
                                  self.attr_title, self.attr_table)
        self._watch(st, lambda *ev: self._later(self._refresh_pieces_table), ["pieces"])
        self._watch(st, lambda *ev: self._later(self._refresh_attribution),
                    ["pieces", "target", "time_index", "member", "reference"])
        self._refresh_pieces_table()
        self._refresh_attribution()

    def _refresh_pieces_table(self):
        import pandas as pd

        rows = []
        for p in self.state.pieces:
            if p.kind == "interior":
                unit = "hPa" if p.layer_coord == "pressure" else "K"
                layer = "all levels" if p.layer is None else f"{p.layer[0]:g}–{p.layer[1]:g} {unit}"
                if p.rh_min is not None:
                    layer += f", RH≥{p.rh_min:g}%"
            else:
                layer = {"bottom": "lower boundary", "top": "upper boundary",
                         "lateral": "lateral boundary", "remainder": "the rest"}[p.kind]
            sign = {1: "+", -1: "−", 0: "±"}[p.sign] if p.kind in ("interior", "bottom", "top") \
                else ""
            rows.append(dict(name=p.name, kind=p.kind, layer=layer, sign=sign, show=p.visible))
        self.pieces_table.value = pd.DataFrame(rows, columns=["name", "kind", "layer", "sign",
                                                              "show"])

    def _piece_edited(self, ev):
        names = self.state.piece_names
        if not 0 <= ev.row < len(names):
            return
        name = names[ev.row]
        if ev.column == "name":
            try:
                self.state.rename_piece(name, ev.value)
            except WorkbenchError:
                self._refresh_pieces_table()
                raise
            self.state.set_status(f"Renamed {name!r} to {ev.value!r}.", "success")
        elif ev.column == "show":
            self.state.toggle_piece(name, bool(ev.value))

    def _piece_clicked(self, ev):
        if ev.column != "delete":
            return
        names = self.state.piece_names
        if 0 <= ev.row < len(names):
            name = names[ev.row]
            self.state.remove_piece(name)
            self.state.set_status(f"Deleted piece {name!r}.", "info")

    def _retarget_level(self, p):
        t = self.state.target
        if t is not None:
            self.state.target = (t[0], t[1], float(p))

    def _refresh_attribution(self):
        import pandas as pd

        st = self.state
        if st.target is None or not st.pieces:
            self.attr_title.object = ("Choose *Pick target point* and click the map "
                                      "(e.g. the storm centre)." if st.pieces else
                                      "Add pieces first, then pick a target point.")
            self.attr_table.value = pd.DataFrame()
            return
        df = st.attribution()
        from .inversion.pieces import format_share

        lon, lat, p = st.target
        self.attr_title.object = (f"at {lon:.2f}°E {lat:.2f}°N, {p:g} hPa · pieces add up to "
                                  "the full inversion")
        show = pd.DataFrame({
            "piece": df.index,
            "Z′ (m)": df["height_anomaly"].round(1).values,
            "share (%)": [format_share(x, ".0f") for x in df["height_share_pct"]],
            "u (m/s)": df["u"].round(1).values,
            "v (m/s)": df["v"].round(1).values,
            "ζ (1e-5/s)": (df["relative_vorticity"] * 1e5).round(2).values,
        })
        self.attr_table.value = show
        self.attribution_frame = df

    # ---------------------------------------------------------------- actions
    def lasso_piece(self, polygon):
        """Make a piece of the lassoed polygon with the sidebar's settings (inverted at once)."""
        st = self.state
        if len(polygon) > 200:  # keep session files small: thin the outline evenly
            idx = np.linspace(0, len(polygon) - 1, 200).round().astype(int)
            polygon = [polygon[i] for i in idx]
        d = st.case.domain
        polygon = [(min(max(x, d["lon_min"]), d["lon_max"]), min(max(y, d["lat_min"]),
                                                                 d["lat_max"]))
                   for x, y in polygon]
        kind = self.p_kind.value
        if kind == "region":
            return self.lasso_region(polygon)
        base = {"interior": "piece", "bottom": "surface θ′ (lasso)", "top": "lid θ′ (lasso)"}[kind]
        name = self.p_name.value.strip() or st.new_piece_name(base)
        kw = dict(name=name, kind=kind, polygon=polygon, sign=int(self.p_sign.value))
        if kind == "interior":
            kw.update(layer=tuple(float(x) for x in self.p_layer.value),
                      layer_coord=self.p_coord.value, threshold=float(self.p_threshold.value),
                      rh_min=float(self.p_rh.value) if self.p_moist.value else None)
        t0 = time.perf_counter()
        piece = st.add_piece(**kw)
        self.p_name.value = ""
        st.set_status(f"Piece {piece.name!r} inverted in {time.perf_counter() - t0:.2f} s; its "
                      f"balanced flow is on the map at {st.overlay_level:g} hPa.", "success")
        return piece

    def add_boundary(self, kind):
        piece = self.state.add_boundary_piece(kind)
        self.state.set_status(f"Added {piece.name!r}.", "success")

    def draw_section(self, start, end):
        st = self.state
        d = st.case.domain

        def clamp(pt):
            return (min(max(pt[0], d["lon_min"]), d["lon_max"]),
                    min(max(pt[1], d["lat_min"]), d["lat_max"]))

        start, end = clamp(start), clamp(end)
        if np.hypot(end[0] - start[0], end[1] - start[1]) < 1.0:
            raise InputError("the section line is shorter than one degree; drag a longer line")
        st.add_section(start, end)
        st.set_status(f"Section from ({start[0]:.1f}°E, {start[1]:.1f}°N) to "
                      f"({end[0]:.1f}°E, {end[1]:.1f}°N).", "success")

    def pick_target(self, lon, lat):
        self.state.set_target(lon, lat, self.attr_level.value if hasattr(self, "attr_level")
                              else None)
        self.state.set_status(f"Target point {lon:.2f}°E {lat:.2f}°N.", "info")

    # ---------------------------------------------------------------- annotations
    def _build_annotate_box(self):
        from .annotations import PALETTE

        st = self.state
        self.label_text = pn.widgets.TextInput(
            label="Label text (also the region's label)", width=410,
            placeholder="e.g. L, jet streak, dry intrusion", css_classes=["pvwb-label-text"])
        self.ann_colour = pn.widgets.Select(label="Colour", width=120, value="black",
                                            options=[c for c in PALETTE if c != "white"])
        self.label_click_button = pn.widgets.Button(label="Label the last clicked point",
                                                    width=260, margin=(23, 5, 5, 5),
                                                    css_classes=["pvwb-label-click"])
        self.undo_ann_button = pn.widgets.Button(label="Delete the last one", width=200,
                                                 css_classes=["pvwb-ann-undo"])
        self.clear_ann_button = pn.widgets.Button(label="Delete all annotations", width=200,
                                                  color="danger", variant="outline",
                                                  css_classes=["pvwb-ann-clear"])
        self.label_click_button.on_click(lambda e: self._guard(self.label_last_click))
        self.undo_ann_button.on_click(lambda e: self._guard(self.delete_last_annotation))
        self.clear_ann_button.on_click(lambda e: self._guard(self.delete_all_annotations))
        self.ann_list = pn.pane.HTML("", margin=(0, 8), css_classes=["pvwb-ann-list"],
                                     styles={"font-size": "13px"})
        help_md = pn.pane.Markdown(
            "**Label:** choose *Place a label* under *Mouse on the map*, type the text here and "
            "click the map.  \n**Highlighted region:** set *A lasso makes* to *highlighted "
            "region* and lasso it. Annotations are saved in the session and drawn on the "
            "exported figures and the briefing.", margin=(0, 8), styles={"font-size": "13px"})
        self.annotate_box = pn.Column(
            help_md, self.label_text, pn.Row(self.ann_colour, self.label_click_button),
            pn.Row(self.undo_ann_button, self.clear_ann_button), self.ann_list,
            name="Annotate")
        self._watch(st, lambda *ev: self._refresh_ann_list(), ["annotations"])
        self._refresh_ann_list()

    def _label_text(self):
        return (self.label_text.value_input or self.label_text.value or "").strip()

    def _refresh_ann_list(self):
        from .annotations import PALETTE, Arrow, Label, Region

        names = {v: k for k, v in PALETTE.items()}
        rows = []
        for k, a in enumerate(self.state.annotations, 1):
            where = "" if a.space == "map" else f" (on {a.space.replace(':', ' ')})"
            if isinstance(a, Label):
                row = f"{k}. label “{a.text}” at {a.lon:.1f}°E {a.lat:.1f}°N{where}"
            elif isinstance(a, Region):
                lab = f" “{a.label}”" if a.label else ""
                row = (f"{k}. region{lab}, {len(a.polygon)} points, "
                       f"{names.get(a.colour, a.colour)}{where}")
            elif isinstance(a, Arrow):
                row = f"{k}. arrow{' “' + a.text + '”' if a.text else ''}{where}"
            else:
                row = f"{k}. {a.kind}{where}"
            rows.append(f"<div class='pvwb-ann-item'>{escape(row)}</div>")
        self.ann_list.object = ("<b>Annotations</b>" + "".join(rows)) if rows else \
            "<i>No annotations yet.</i>"

    def place_label(self, lon, lat):
        """Put a text label (the Annotate tab's text and colour) at (lon, lat) on the map."""
        from .annotations import Label

        text = self._label_text()
        if not text:
            raise InputError("type the label's text in the Annotate tab first, then click "
                             "the map")
        d = self.state.case.domain
        if not (d["lon_min"] <= lon <= d["lon_max"] and d["lat_min"] <= lat <= d["lat_max"]):
            raise InputError(f"({lon:.2f}, {lat:.2f}) is outside the map; click inside it")
        a = self.state.add_annotation(Label(text=text, lon=float(lon), lat=float(lat),
                                            colour=self.ann_colour.value, size=12.0))
        self.state.set_status(f"Label “{text}” placed at {lon:.2f}°E {lat:.2f}°N.", "success")
        return a

    def label_last_click(self):
        """Label the point last clicked on the map (in any mode that clicks)."""
        click = getattr(self.map, "last_click", None)
        if click is None:
            raise InputError("click a point on the map first (mode *Pick target point* or "
                             "*Place a label*), then press this button")
        return self.place_label(*click)

    def lasso_region(self, polygon):
        """A highlighted region annotation of the lassoed outline (label: the Annotate text)."""
        from .annotations import Region

        colour = self.ann_colour.value
        a = self.state.add_annotation(Region(polygon=[list(p) for p in polygon],
                                             label=self._label_text() or None, colour=colour,
                                             fill=colour, alpha=0.15, linestyle="dashed"))
        self.state.set_status(f"Highlighted region{' “' + a.label + '”' if a.label else ''} "
                              "added (it is an annotation, not a piece).", "success")
        return a

    def delete_last_annotation(self):
        a = self.state.remove_annotation(-1)
        what = getattr(a, "text", None) or getattr(a, "label", None) or ""
        self.state.set_status(f"Deleted the {a.kind}{' “' + what + '”' if what else ''}.",
                              "info")

    def delete_all_annotations(self):
        n = self.state.clear_annotations()
        if not n:
            raise InputError("there are no annotations to delete")
        self.state.set_status(f"Deleted {n} annotation(s).", "info")

    # ---------------------------------------------------------------- save & export
    def _write_folders(self):
        return [self.output_dir] if self.output_dir else []

    def _read_folders(self):
        out = list(self.data_dirs)
        if self.output_dir and self.output_dir not in out:
            out.append(self.output_dir)
        return out

    def _build_export_box(self):
        from .session import PROJECTIONS

        st = self.state
        fs = st.figure_settings
        where = self.output_dir or "(none: start with --output-dir)"
        self.overwrite = pn.widgets.Checkbox(label="Overwrite an existing file", value=False,
                                             css_classes=["pvwb-overwrite"])
        self.session_name = pn.widgets.TextInput(
            label="Session file", width=285, css_classes=["pvwb-session-name"],
            placeholder=f"blank: {_case_stem(st.case)}_session.json")
        self.save_session_button = pn.widgets.Button(label="Save session", color="primary",
                                                     width=110, margin=(23, 5, 5, 5),
                                                     css_classes=["pvwb-save-session"])
        self.session_select = pn.widgets.Select(label="Saved sessions (data and output folders)",
                                                options={}, width=285,
                                                css_classes=["pvwb-session-list"])
        self.load_session_button = pn.widgets.Button(label="Load session", width=110,
                                                     margin=(23, 5, 5, 5),
                                                     css_classes=["pvwb-load-session"])
        self.export_name = pn.widgets.TextInput(
            label="Name for exported files", width=410, css_classes=["pvwb-export-name"],
            placeholder=f"blank: {_case_stem(st.case)} (then _map_<time>.png and so on)")
        self.export_format = pn.widgets.RadioButtonGroup(label="Figure format",
                                                         options=["PNG", "SVG", "PDF"],
                                                         value="PNG", width=165,
                                                         margin=(23, 5, 5, 5))
        self.export_dpi = pn.widgets.IntInput(label="dpi", value=int(fs["dpi"]), start=30,
                                              end=1200, step=10, width=75)
        self.projection = pn.widgets.Select(
            label="Map projection", width=150, value=fs["projection"],
            options={p.replace("_", " "): p for p in PROJECTIONS})
        self.map_fig_button = pn.widgets.Button(label="Map figure", width=200,
                                                css_classes=["pvwb-export-map"])
        self.section_fig_button = pn.widgets.Button(label="Section figure", width=200,
                                                    css_classes=["pvwb-export-section"])
        self.brief_button = pn.widgets.Button(label="Briefing PDF", width=200,
                                              css_classes=["pvwb-export-brief"])
        self.netcdf_button = pn.widgets.Button(label="Balanced fields (netCDF)", width=200,
                                               css_classes=["pvwb-export-netcdf"])
        self.download = pn.widgets.FileDownload(file=None, filename="", visible=False,
                                                color="success", width=410,
                                                css_classes=["pvwb-download"])
        self.save_session_button.on_click(lambda e: self._guard(self.save_session_file))
        self.load_session_button.on_click(lambda e: self._guard(self.load_session_file))
        self.load_anyway_button = pn.widgets.Button(
            label="Load it anyway (I changed it)", width=285, visible=False,
            color="warning", css_classes=["pvwb-load-anyway"])
        self.load_anyway_button.on_click(lambda e: self._guard(self.load_modified_session))
        self._pending_session = None
        self.map_fig_button.on_click(lambda e: self._guard(self.export_map))
        self.section_fig_button.on_click(lambda e: self._guard(self.export_section))
        self.brief_button.on_click(lambda e: self._guard(self.export_briefing))
        self.netcdf_button.on_click(lambda e: self._guard(self.export_netcdf))

        def set_fs(key, value):
            st.figure_settings = {**st.figure_settings, key: value}

        self.export_dpi.param.watch(lambda ev: self._guard(set_fs, "dpi", int(ev.new)), "value")
        self.projection.param.watch(lambda ev: self._guard(set_fs, "projection", ev.new),
                                    "value")

        def fs_to_widgets(*_):
            self._state_to_widget(self.export_dpi, int(st.figure_settings["dpi"]))
            self._state_to_widget(self.projection, st.figure_settings["projection"])

        self._watch(st, fs_to_widgets, ["figure_settings"])
        small = {"font-size": "13px"}
        self.export_box = pn.Column(
            pn.pane.HTML(f"Files are written to <b>{escape(where)}</b>.", margin=(0, 8),
                         styles=small, css_classes=["pvwb-output-folder"]),
            self.overwrite,
            pn.pane.Markdown("**Session** (pieces, sections, annotations, settings)",
                             margin=(4, 8, 0, 8)),
            pn.Row(self.session_name, self.save_session_button),
            pn.Row(self.session_select, self.load_session_button),
            self.load_anyway_button,
            pn.pane.Markdown("**Figures and exports**", margin=(4, 8, 0, 8)),
            self.export_name,
            pn.Row(self.projection, self.export_dpi, self.export_format),
            pn.GridBox(self.map_fig_button, self.section_fig_button, self.brief_button,
                       self.netcdf_button, ncols=2),
            self.download,
            name="Save & export")
        self._refresh_session_list()

    def _refresh_session_list(self, select=None):
        files = list_session_files(self._read_folders())
        self.session_select.options = files
        if select is not None and str(select) in files.values():
            self.session_select.value = str(select)

    def _refuse_existing(self, path, error, what):
        if path.exists() and not self.overwrite.value:
            raise error(f"{what} {path.name} already exists in {path.parent}; tick “Overwrite "
                        "an existing file” to replace it, or choose another name")

    def _stem(self):
        return (self.export_name.value_input or self.export_name.value or "").strip() or \
            _case_stem(self.state.case)

    def _time_tag(self):
        t = str(self.state.valid_time)[:16]
        return t[:13].replace("-", "").replace("T", "") + "Z"

    def _export_path(self, kind, suffix):
        name = f"{self._stem()}_{kind}" + ("" if kind == "briefing" else f"_{self._time_tag()}")
        return resolve_output_path(name + suffix, self._write_folders(), (suffix,))

    def _written(self, path, what):
        self.download.param.update(file=str(path), filename=path.name, visible=True,
                                   label=f"Download {path.name}")
        self.last_written = path
        return f"{what} {path}"

    def save_session_file(self, name=None):
        """Save the whole state as a session file in the output folder (refusing to replace
        an existing file unless "Overwrite" is ticked); returns the path."""
        from .session import save_session

        st = self.state
        text = name if name is not None else (self.session_name.value_input or
                                              self.session_name.value or "").strip()
        text = text or f"{_case_stem(st.case)}_session.json"
        if not Path(text).suffix:
            text += ".json"
        path = resolve_output_path(text, self._write_folders(), (".json",))
        self._refuse_existing(path, SessionError, "session file")
        overwrite = bool(self.overwrite.value)

        def job():
            save_session(st, path, overwrite=overwrite)
            self._refresh_session_list(select=path)

        self._work(f"Saving session {path.name}", job,
                   lambda: self._written(path, "Session saved to"))
        return path

    def _session_case(self, doc, path):
        """The case a session document names: the open case when the checksum matches (or
        when it is the very file recorded), else the recorded file if it is in the data
        folders (one AccessError for "not in the data folders" and "not found")."""
        from .io import open_case

        block = doc["case"]
        cur = self.state.case
        if cur is not None and block.get("sha256") and cur.checksum == block.get("sha256"):
            return cur
        cands = []
        if isinstance(block.get("relative_path"), str):
            cands.append(path.parent / block["relative_path"])
        cands.append(Path(block["path"]))
        for c in cands:
            try:
                real = resolve_data_path(c, self.data_dirs)
            except (AccessError, InputError):
                continue
            if cur is not None and cur.source not in (None, "<in-memory>") and \
                    Path(str(cur.source)).resolve() == real:
                return cur  # the same file: load_session names both checksums
            return open_case(real)
        raise AccessError(f"the session's case {block['path']!r} is not in the data folders "
                          f"or not found there ({', '.join(self.data_dirs) or 'none'}); copy "
                          "it there or start the server with --data-dir on its folder")

    def load_session_file(self, name=None, accept_modified=False):
        """Load a session file from the data or output folders into the page (the case it
        names must be in the data folders). A bad file leaves the page as it was and its
        SessionError message in the status area. A session changed after it was saved (or
        without a body checksum) is refused and the "Load it anyway" button appears; it
        loads it with ``accept_modified=True``."""
        from .session import (SessionModifiedError, check_body, check_caps,
                              read_session_file, state_from_session)

        text = name if name is not None else self.session_select.value
        if not text:
            raise InputError("pick a saved session in the list first")
        path = resolve_data_path(text, self._read_folders(), what="session file")
        self.load_anyway_button.visible = False
        self._pending_session = None

        def job():
            doc = read_session_file(path)
            check_caps(doc, path)  # before anything is opened or computed
            try:
                check_body(doc, path, accept_modified)
            except SessionModifiedError:
                self._pending_session = str(path)
                self.load_anyway_button.visible = True
                raise
            new = state_from_session(doc, self._session_case(doc, path), path,
                                     data_dirs=self.data_dirs, accept_modified=accept_modified)
            if new.case is not self.state.case:
                self._switch_case(new.case)
            self._apply_state(new)

        def done():
            st = self.state
            return (f"Loaded session {path.name}" + (" (changed after saving; loaded as "
                                                     "confirmed)" if accept_modified else "")
                    + f": {len(st.pieces)} piece(s), {len(st.sections)} section(s), "
                    f"{len(st.annotations)} annotation(s)")

        self._work(f"Loading session {path.name}", job, done)
        return path

    def load_modified_session(self):
        """The confirm step: load the session just refused as changed, accepting the change."""
        pending = getattr(self, "_pending_session", None)
        if not pending:
            raise InputError("there is no refused session to load; pick one and press "
                             "“Load session” first")
        return self.load_session_file(pending, accept_modified=True)

    def _apply_state(self, new):
        st = self.state
        opts = dict(self.surface.options)
        if new.surface not in opts.values():
            from .state import surface_label as _label

            opts[_label(new.surface, new.threshold)] = new.surface
            self.surface.options = opts
        st.assign(new)
        if st.target is not None and st.target[2] in self.attr_level.options.values():
            self._state_to_widget(self.attr_level, float(st.target[2]))

    def export_map(self):
        """The map as the static figure (map_figure(state)) in the chosen format."""
        return self._export_figure("map")

    def export_section(self):
        """The active section as the static figure (section_figure(state))."""
        if not self.state.sections:
            raise InputError("there is no section line yet; choose *Draw a section* and drag "
                             "a line across the map first")
        return self._export_figure("section")

    def _export_figure(self, which):
        from .views import static

        st = self.state
        fmt = self.export_format.value.lower()
        path = self._export_path(which, "." + fmt)
        self._refuse_existing(path, ExportError, "figure")
        dpi, overwrite = int(self.export_dpi.value), bool(self.overwrite.value)

        def job():
            fig = static.map_figure(st) if which == "map" else \
                static.section_figure(st, st.active_section)
            static.save_figure(fig, path, dpi=dpi, overwrite=overwrite)

        self._work(f"Drawing the {which} figure", job,
                   lambda: self._written(path, f"{which.capitalize()} figure saved to"))
        return path

    def export_briefing(self):
        """The multi-page briefing PDF of the current state (make_briefing)."""
        from .brief import make_briefing

        st = self.state
        path = self._export_path("briefing", ".pdf")
        self._refuse_existing(path, ExportError, "briefing")
        overwrite = bool(self.overwrite.value)
        self._work("Making the briefing PDF", lambda: make_briefing(st.case, st, path,
                                                                    overwrite=overwrite),
                   lambda: self._written(path, "Briefing saved to"))
        return path

    def export_netcdf(self):
        """The balanced fields of every piece, the remainder and the full inversion
        (export_balanced), as CF netCDF."""
        from .export import export_balanced

        st = self.state
        if not st.pieces:
            raise InputError("there are no pieces to export; lasso an anomaly or add a "
                             "boundary piece first")
        path = self._export_path("balanced", ".nc")
        self._refuse_existing(path, ExportError, "netCDF export")
        overwrite = bool(self.overwrite.value)
        self._work("Writing the balanced fields", lambda: export_balanced(
            st.results(), None, path, overwrite=overwrite, case=st.case,
            settings=st.to_dict()), lambda: self._written(path, "Balanced fields saved to"))
        return path

    # ---------------------------------------------------------------- display
    def __panel__(self):
        return self.layout

    def _repr_mimebundle_(self, include=None, exclude=None):
        return self.layout._repr_mimebundle_(include, exclude)

    def servable(self, title="PV Workbench"):
        return self.layout.servable(title=title)

    def show(self, **kwargs):
        return self.layout.show(**kwargs)


MODE_KEYS = {"Pan / zoom": "pan", "Lasso a piece": "lasso", "Draw a section": "section",
             "Pick target point": "target", "Place a label": "label"}


# --------------------------------------------------------------------------- serving


def _free_port(address):
    fam = socket.AF_INET6 if ":" in address else socket.AF_INET
    with socket.socket(fam, socket.SOCK_STREAM) as s:
        s.bind((address, 0))
        return s.getsockname()[1]


# --------------------------------------------------------------------------- token login

#: environment variable holding the served page's token (never the command line)
TOKEN_ENV = "PVWB_TOKEN"
#: shortest token accepted from the command line's sources
MIN_TOKEN_LENGTH = 8


class LoginThrottle:
    """Failed-login bookkeeping per client: after ``free`` failures in a row, each further failure
    locks the client out for ``base_s * 2**(n - free)`` seconds (at most ``max_s``); a request
    during a lockout is refused without checking the token; a success clears the record."""

    def __init__(self, free=5, base_s=1.0, max_s=300.0, clock=time.monotonic):
        self.free, self.base_s, self.max_s, self.clock = int(free), float(base_s), float(max_s), clock
        self._records = {}  # client -> [failures, locked_until, last_seen]

    def wait_s(self, client) -> float:
        """Seconds ``client`` must still wait before its next attempt (0 when it may try now)."""
        rec = self._records.get(client)
        return 0.0 if rec is None else max(0.0, rec[1] - self.clock())

    def failed(self, client) -> float:
        """Record a failure; returns the lockout now in force (s)."""
        now = self.clock()
        if len(self._records) > 10000:  # forget clients idle for an hour
            for key in [k for k, r in self._records.items() if now - r[2] > 3600]:
                del self._records[key]
        rec = self._records.setdefault(client, [0, 0.0, now])
        rec[0] += 1
        rec[2] = now
        if rec[0] >= self.free:
            rec[1] = now + min(self.max_s, self.base_s * 2.0 ** (rec[0] - self.free))
        return self.wait_s(client)

    def succeeded(self, client) -> None:
        self._records.pop(client, None)


def _token_auth_provider(token, throttle=None):
    """A Panel login page (``/login``) that accepts ``token`` as the password (any user name),
    compares in constant time and slows repeated failures down (:class:`LoginThrottle`, per
    client address; HTTP 429 with ``Retry-After`` while locked out)."""
    import hmac

    import tornado.escape
    from panel.auth import BasicAuthProvider, BasicLoginHandler

    secret = str(token).encode("utf-8")
    throttle = throttle or LoginThrottle()

    class TokenLoginHandler(BasicLoginHandler):
        def _validate(self, username, password):
            return hmac.compare_digest(str(password).encode("utf-8"), secret)

        def post(self):
            client = self.request.remote_ip or "?"
            wait = throttle.wait_s(client)
            if wait > 0:
                self.set_status(429)
                self.set_header("Retry-After", str(int(math.ceil(wait))))
                self.write(f"Too many failed logins from this address; try again in {math.ceil(wait):.0f} s.")
                return
            if self._validate(self.get_argument("username", ""), self.get_argument("password", "")):
                throttle.succeeded(client)
                return super().post()
            wait = throttle.failed(client)
            msg = "Invalid token." + (f" Too many failures: wait {math.ceil(wait):.0f} s." if wait else "")
            self.redirect(self.request.path + "?error=" + tornado.escape.url_escape(msg))

    class TokenAuthProvider(BasicAuthProvider):
        @property
        def login_handler(self):
            TokenLoginHandler._login_endpoint = self._login_endpoint
            TokenLoginHandler._login_template = self._login_template
            return TokenLoginHandler

    provider = TokenAuthProvider()
    provider.throttle = throttle
    return provider


def read_token(token_file=None, environ=None):
    """The served page's token: from ``token_file`` (first line, surrounding spaces dropped) if
    given, else from the environment variable PVWB_TOKEN, else None. InputError for an unreadable
    or empty file or a token shorter than MIN_TOKEN_LENGTH characters."""
    environ = os.environ if environ is None else environ
    if token_file is not None:
        path = Path(token_file).expanduser()
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeError) as exc:
            raise InputError(f"--token-file {str(token_file)!r} cannot be read "
                             f"({getattr(exc, 'strerror', None) or type(exc).__name__})") from None
        lines = text.strip().splitlines()
        token, where = (lines[0].strip() if lines else ""), f"--token-file {str(token_file)!r}"
    else:
        token, where = environ.get(TOKEN_ENV), TOKEN_ENV
        if token is None:
            return None
        token = token.strip()
    if not token:
        raise InputError(f"{where} holds no token; put a secret of at least {MIN_TOKEN_LENGTH} characters in it")
    if len(token) < MIN_TOKEN_LENGTH:
        raise InputError(f"the token in {where} is too short ({len(token)} characters); "
                         f"use at least {MIN_TOKEN_LENGTH}")
    return token


def check_binding(address, token):
    """Refuse a non-loopback address without a token (AccessError)."""
    if address not in LOOPBACK and not token:
        raise AccessError(
            f"refusing to serve on {address!r} without a token: anyone who can reach that "
            f"address could use the workbench. Put a secret in the environment variable {TOKEN_ENV} "
            "or in a file given with --token-file, or bind 127.0.0.1 (the default)")


def serve(case=None, address="127.0.0.1", port=0, data_dirs=None, token=None, show=False,
          start=True, verbose=True, output_dir=None):
    """Serve the workbench page; returns the Bokeh server (its ``.port`` is the real port).

    ``case``: a Case, a path or None. Each browser session gets its own State on the same
    Case (derived fields are cached once). ``address`` other than loopback needs ``token``
    (the page then asks for it). ``output_dir``: where the page saves sessions and exports
    (default the first data folder). With ``start=True`` this blocks until stopped.
    """
    from .io import open_case

    check_binding(address, token)
    if case is not None and not hasattr(case, "map_field"):
        case = open_case(case)
    if data_dirs is None and case is not None and case.source not in (None, "<in-memory>"):
        data_dirs = [str(Path(case.source).resolve().parent)]
    if output_dir is not None and not Path(output_dir).expanduser().is_dir():
        raise InputError(f"output folder {output_dir!r} does not exist; create it first")
    port = int(port)
    if not 0 <= port <= 65535:
        raise InputError(f"port {port} is out of range; give 1..65535 (or 0 for any free port)")
    try:
        port = port or _free_port(address)
    except OSError as exc:
        from .cli import os_error_message

        raise InputError(f"cannot listen on {address}: {os_error_message(exc)}") from None
    origins = [f"{address}:{port}"] + ([f"localhost:{port}", f"127.0.0.1:{port}"]
                                       if address in LOOPBACK else [])
    kw = {}
    if token:
        kw.update(auth_provider=_token_auth_provider(token), cookie_secret=secrets.token_hex(32))

    def page():
        return Workbench(case, data_dirs=data_dirs, output_dir=output_dir).layout

    try:
        server = pn.serve({"/": page}, port=port, address=address, websocket_origin=origins,
                          show=show, start=False, title="PV Workbench", verbose=False, **kw)
    except OSError as exc:  # port in use, address not on this machine
        from .cli import os_error_message

        raise InputError(f"cannot listen on {address} port {port}: {os_error_message(exc)}") from None
    host = f"[{address}]" if ":" in address else address
    if verbose:
        print(f"PV Workbench at http://{host}:{server.port}/", flush=True)
        if data_dirs:
            print("data folders: " + ", ".join(str(d) for d in _folders(data_dirs)), flush=True)
        out = _folders([output_dir]) if output_dir else _folders(data_dirs)[:1]
        if out:
            print(f"output folder: {out[0]}", flush=True)
    if start:
        server.start()
        try:
            server.io_loop.start()
        except KeyboardInterrupt:
            pass
    return server


def main(argv=None):
    """``pvwb serve [CASE] [--port N] [--address A] [--token-file F] [--data-dir D ...]
    [--output-dir O] [--region W,E,S,N] [--times SPEC]``.

    The token (needed off loopback, optional on it) comes from the environment variable
    PVWB_TOKEN or from ``--token-file``, never from the command line, where every user of the
    machine could read it in the process list; ``--token`` is refused with that explanation.
    """
    from . import cli

    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] == "serve":
        argv = argv[1:]
    ap = cli.build_parser("pvwb serve", "Serve the PV Workbench page in a browser.")
    ap.add_argument("case", nargs="?", help="case file (netCDF, GRIB2 or Zarr)")
    cli.add_selection_options(ap)
    ap.add_argument("--port", type=cli.port_number, default=0,
                    help="port 1..65535 (default 0: any free port)")
    ap.add_argument("--address", type=cli.host_address, default="127.0.0.1",
                    help=f"address to bind (default 127.0.0.1; others need a token: {TOKEN_ENV} or --token-file)")
    ap.add_argument("--token-file", dest="token_file", metavar="FILE",
                    help=f"file whose first line is the secret the page asks for (default: env {TOKEN_ENV})")
    ap.add_argument("--token", "--password", dest="cmdline_token", metavar="SECRET", help=argparse.SUPPRESS)
    ap.add_argument("--data-dir", action="append", dest="data_dirs",
                    help="folder the page may open files from (repeatable; default: the "
                         "case's folder)")
    ap.add_argument("--output-dir", dest="output_dir",
                    help="folder the page saves sessions, figures and exports to (default: "
                         "the first data folder)")
    ap.add_argument("--show", action="store_true", help="open a browser tab")
    args = ap.parse_args(argv)
    try:
        if args.cmdline_token is not None:
            raise InputError(f"a token on the command line is visible to every user in the process list; put it "
                             f"in the environment variable {TOKEN_ENV} or in a file given with --token-file")
        token = read_token(args.token_file)
        os.environ.pop(TOKEN_ENV, None)  # not inherited by child processes
        check_binding(args.address, token)
        if args.data_dirs:
            for d in args.data_dirs:
                if not Path(d).expanduser().is_dir():
                    raise InputError(f"data folder {d!r} does not exist; give an existing folder")
        if args.output_dir is not None and not Path(args.output_dir).expanduser().is_dir():
            raise InputError(f"output folder {args.output_dir!r} does not exist; create it first")
        case = args.case
        sel = cli.selection_options(args)
        if case is not None and sel:
            from .io import open_case

            case = open_case(case, **sel)
        serve(case, address=args.address, port=args.port, data_dirs=args.data_dirs,
              token=token, show=args.show, output_dir=args.output_dir)
    except WorkbenchError as exc:
        print(f"pvwb serve: error: {cli.one_line(exc)}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
