"""The page's header (case name, caution, invented-case label), busy indicator and status
line, and the "open a case file" controls."""
from __future__ import annotations

from pathlib import Path

import panel as pn

from ..access import folders as _folders
from ..access import resolve_data_path
from ..errors import InputError
from ..textsafe import escape
from .base import StatePanel

__all__ = ["StatusPanel", "FilePanel", "list_data_files", "DATA_SUFFIXES"]

STATUS_COLOURS = {"info": ("#e8f1f8", "#12344d"), "success": ("#e6f4ea", "#0f3d1e"),
                  "warning": ("#fff4d6", "#5c4200"), "error": ("#fde2e1", "#7a0b05")}
DATA_SUFFIXES = (".nc", ".nc4", ".netcdf", ".grib", ".grib2", ".grb", ".grb2", ".zarr", ".txt",
                 ".cdf", ".h5")


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


class StatusPanel(StatePanel):
    """Header, spinner and status line (watches ``status``, ``status_level``, ``busy``; the
    header follows ``case``). Every text is escaped."""

    def build(self):
        from ..views.interactive import TextHTML, caution_html

        st = self.state
        self.status = TextHTML("", css_classes=["pvwb-status"], margin=(0, 10),
                               sizing_mode="stretch_width")
        self.spinner = pn.indicators.LoadingSpinner(value=False, size=22, margin=(8, 4),
                                                    css_classes=["pvwb-busy"])
        self.header = TextHTML("", sizing_mode="stretch_width", css_classes=["pvwb-header"])
        if st.case is not None:
            self.header.object = (f"<h2>PV Workbench · {escape(st.case.name)}</h2>" +
                                  caution_html(st.case))
        else:
            from ..export import CAUTION

            self.header.object = ("<h2>PV Workbench</h2><span style='font-size:12px;"
                                  f"color:#6b4e00'>⚠ {escape(CAUTION)}</span>")
        self.watch(self.show, ["status", "status_level", "busy"])
        self.show()
        from .jobs import JobReadout  # the running job's progress bar, text and Cancel button

        if getattr(self, "job_readout", None) is not None:
            self.job_readout.detach()
        self.job_readout = JobReadout(self.jobs)
        return [pn.Row(self.header, self.spinner, sizing_mode="stretch_width"), self.status,
                self.job_readout.layout]

    def show(self, *_):
        st = self.state
        bg, fg = STATUS_COLOURS.get(st.status_level, STATUS_COLOURS["info"])
        icon = {"error": "✖ ", "warning": "⚠ ", "success": "✔ "}.get(st.status_level, "")
        self.status.object = (
            f"<div class='pvwb-status-text' data-level='{st.status_level}' style='background:"
            f"{bg};color:{fg};padding:5px 10px;border-radius:4px;font-size:13px'>"
            f"{icon}{escape(st.status or ' ')}</div>")
        self.spinner.value = bool(st.busy)


class FilePanel(StatePanel):
    """Open a case file from the data folders (``state.page.data_dirs``); a file that fails
    to open leaves the current case and its message in the status line."""

    background_work = True  # opening a file only reads it; the case is switched afterwards

    def build(self):
        self.file_select = pn.widgets.Select(label="Case file (data folders)", options={},
                                             width=250)
        self.file_path = pn.widgets.TextInput(label="…or a file name in a data folder",
                                              placeholder="e.g. storm.nc", width=250)
        self.open_button = pn.widgets.Button(label="Open", color="primary", width=90,
                                             css_classes=["pvwb-open"])
        self.open_button.on_click(lambda e: self._guard(self.open_file))
        self.refresh_list()
        return [pn.pane.Markdown("**Case**", margin=(0, 5)), self.file_select, self.file_path,
                self.open_button]

    def refresh_list(self):
        st = self.state
        files = list_data_files(st.page.data_dirs)
        self.file_select.options = files
        if files and st.case is not None and st.case.source != "<in-memory>":
            cur = str(Path(str(st.case.source)).resolve())
            if cur in files.values():
                self.file_select.value = cur

    def open_file(self, path=None):
        """Open a case file from the data folders (the page's controls or ``path``)."""
        from ..io import open_case

        text = path or self.file_path.value or self.file_select.value
        if not text:
            raise InputError("pick a case file in the list (or type its name) first")
        real = resolve_data_path(text, self.state.page.data_dirs)
        holder = {}

        def job():  # open first (may fail: the old case stays), then switch
            holder["case"] = open_case(real)

        def done():
            self.state.set_case(holder["case"])
            return f"Opened {real.name}"

        self.work(f"Opening {real.name}", job, done)
