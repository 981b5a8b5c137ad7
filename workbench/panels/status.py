"""The page's header (case name, caution, invented-case label), busy indicator and status
line, and the "open a case file" controls: a list of the files in the data folders with their
times and sizes (cheap metadata only), a file name box, and an upload.

An uploaded file is written to a private temporary folder (``.pvwb-upload-*``, mode 0700)
inside the first data folder and opened with :func:`workbench.io.open_case` through
:func:`workbench.access.resolve_data_path`, like any other file there, so every check of the
readers applies; a file that fails is deleted with its folder, and the page keeps its case.
The upload size is capped (:data:`UPLOAD_MAX_MB`, environment variable
``PVWB_UPLOAD_MAX_MB``): the browser refuses a larger file before sending it and the server
refuses it again."""
from __future__ import annotations

import atexit
import os
import re
import shutil
import tempfile
from pathlib import Path

import panel as pn

from ..access import folders as _folders
from ..access import resolve_data_path
from ..errors import InputError, WorkbenchError
from ..textsafe import escape
from .base import StatePanel

__all__ = ["StatusPanel", "FilePanel", "list_data_files", "DATA_SUFFIXES", "file_info",
           "data_file_table", "UPLOAD_SUFFIXES", "upload_max_bytes"]

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


#: Files an upload may be (folders such as Zarr stores cannot be uploaded).
UPLOAD_SUFFIXES = (".nc", ".nc4", ".netcdf", ".cdf", ".h5", ".grib", ".grib2", ".grb", ".grb2")
#: Default upload cap (MB); the environment variable PVWB_UPLOAD_MAX_MB overrides it.
UPLOAD_MAX_MB = 200.0
_GRIB = (".grib", ".grib2", ".grb", ".grb2")
_UPLOAD_DIRS: list = []


def upload_max_bytes() -> int:
    """The upload cap in bytes (``PVWB_UPLOAD_MAX_MB`` or :data:`UPLOAD_MAX_MB`)."""
    text = os.environ.get("PVWB_UPLOAD_MAX_MB", "")
    try:
        mb = float(text) if text.strip() else UPLOAD_MAX_MB
    except ValueError:
        mb = UPLOAD_MAX_MB
    if not mb > 0:
        mb = UPLOAD_MAX_MB
    return int(mb * 1024 * 1024)


def _size_text(n):
    for unit, k in (("GB", 1024 ** 3), ("MB", 1024 ** 2), ("kB", 1024)):
        if n >= k:
            return f"{n / k:.1f} {unit}"
    return f"{n} B"


def _tree_size(path):
    if path.is_file():
        return path.stat().st_size
    return sum(f.stat().st_size for f in path.rglob("*") if f.is_file())


_INFO_CACHE: dict = {}


def file_info(path) -> dict:
    """Cheap metadata of a data file for the page's list: ``size`` (bytes), ``times``
    (count), ``first``/``last`` (ISO, minutes) or a ``note``. netCDF and Zarr: the time
    coordinate only is read (xarray opens lazily; no data variable is loaded). GRIB: the
    times are not read (that needs the whole index), said in the note. Cached by path,
    modification time and size."""
    import numpy as np

    path = Path(path)
    st = path.stat()
    key = (str(path), st.st_mtime_ns, st.st_size)
    if key in _INFO_CACHE:
        return dict(_INFO_CACHE[key])
    out = dict(size=_tree_size(path), times=None, first="", last="", note="")
    suffix = path.suffix.lower()
    if suffix in _GRIB:
        out["note"] = "GRIB: times are read when the file is opened"
    elif suffix == ".txt":
        out["note"] = "not a data file"
    else:
        try:
            import xarray as xr

            opener = xr.open_zarr if path.is_dir() else xr.open_dataset
            with opener(str(path)) as ds:
                names = [n for n, c in ds.coords.items() if np.issubdtype(c.dtype, np.datetime64)
                         or c.attrs.get("standard_name") in ("time", "forecast_reference_time")
                         or n in ("time", "valid_time")]
                if names:
                    t = np.atleast_1d(ds[names[0]].values)
                    out.update(times=int(t.size), first=str(t.min())[:16].replace("T", " "),
                               last=str(t.max())[:16].replace("T", " "))
                else:
                    out.update(times=1, note="no time coordinate (one time)")
        except Exception as exc:  # noqa: BLE001  (a listing never fails)
            out["note"] = f"not readable as netCDF/Zarr ({type(exc).__name__})"
    if len(_INFO_CACHE) > 1000:
        _INFO_CACHE.clear()
    _INFO_CACHE[key] = dict(out)
    return out


def data_file_table(data_dirs, limit=500):
    """The page's list of openable files: a pandas DataFrame with the file (folder/name),
    its size, the number of valid times and the first and last (or a note), and the path."""
    import pandas as pd

    rows = []
    for label, path in list_data_files(data_dirs, limit=limit).items():
        try:
            info = file_info(path)
        except OSError as exc:
            info = dict(size=0, times=None, first="", last="", note=f"unreadable ({exc.strerror})")
        times = "" if info["times"] is None else (
            f"{info['times']}: {info['first']} … {info['last']} UTC" if info["first"] else
            str(info["times"]))
        rows.append({"file": label, "size": _size_text(info["size"]),
                     "times": times or info["note"], "note": info["note"], "path": path})
    return pd.DataFrame(rows, columns=["file", "size", "times", "note", "path"])


def _safe_name(name):
    """A plain file name for an upload (letters, digits, ``._-``; no folders)."""
    base = Path(str(name).replace("\\", "/")).name
    base = re.sub(r"[^A-Za-z0-9._-]", "_", base).lstrip(".")
    return base[:120] or "upload.nc"


@atexit.register
def _remove_uploads():
    for d in _UPLOAD_DIRS:
        shutil.rmtree(d, ignore_errors=True)


class FilePanel(StatePanel):
    """Open a case file from the data folders (``state.page.data_dirs``): a list with each
    file's times and size (pick a row, then Open), a file name box, and an upload (capped,
    see the module docstring). A file that fails to open leaves the current case and its
    one-line message in the status line.

    Built once: a new case only refreshes the list (rebuilding would re-create the drop zone
    while the browser still animates the finished upload, a script error in the page)."""

    rebuild_on = ()

    def build(self):
        self.watch(self.refresh_list, ["case"])
        cap = upload_max_bytes()
        self.file_select = pn.widgets.Select(label="Case file (data folders)", options={},
                                             width=250)
        self.file_path = pn.widgets.TextInput(label="…or a file name in a data folder",
                                              placeholder="e.g. storm.nc", width=250)
        self.open_button = pn.widgets.Button(label="Open", color="primary", width=90,
                                             css_classes=["pvwb-open"])
        self.open_button.on_click(lambda e: self._guard(self.open_file))
        self.file_table = pn.widgets.Tabulator(
            data_file_table([]), disabled=True, selectable=1, show_index=False,
            hidden_columns=["path", "note"], layout="fit_columns", height=170, width=262,
            widths={"file": 100, "size": 58, "times": 102},
            formatters={"file": {"type": "textarea"}, "times": {"type": "textarea"}},
            sizing_mode="fixed", css_classes=["pvwb-file-table"])
        self.file_table.param.watch(lambda ev: self._guard(self._picked, ev.new), "selection")
        self.refresh_files_button = pn.widgets.Button(label="Refresh list", width=110,
                                                css_classes=["pvwb-refresh-files"])
        self.refresh_files_button.on_click(lambda e: self._guard(self.refresh_list))
        # one drop zone serves every upload: a new drop replaces the browser's item (one file
        # at a time) and each finished file is taken out of the widget's value as it arrives
        # (see _uploaded). Swapping in a fresh zone per upload made its preview script fail.
        self.upload_input = pn.widgets.FileDropper(
            max_file_size=f"{max(1, int(round(cap / 1024 ** 2)))}MB", multiple=False,
            chunk_size=4 * 1024 * 1024, width=250, height=120, css_classes=["pvwb-upload"],
            previews=[], label="Upload a case file")
        self.upload_input.param.watch(lambda ev: self._guard(self._uploaded, ev.new), "value")
        self.upload_note = pn.pane.Markdown(
            f"Upload a netCDF or GRIB2 file up to {_size_text(cap)}; it is checked like "
            "any file in the data folders.", styles={"font-size": "11px", "color": "#555"},
            margin=(0, 10), width=250)
        self.refresh_list()
        return [pn.pane.Markdown("**Case**", margin=(0, 5)), self.file_table,
                pn.Row(self.open_button, self.refresh_files_button), self.file_select,
                self.file_path, self.upload_input, self.upload_note]

    # ---------------------------------------------------------------- the list
    def refresh_list(self):
        st = self.state
        files = list_data_files(st.page.data_dirs)
        self.file_select.options = files
        self.file_table.value = data_file_table(st.page.data_dirs)
        if files and st.case is not None and st.case.source != "<in-memory>":
            cur = str(Path(str(st.case.source)).resolve())
            if cur in files.values():
                self.file_select.value = cur

    def _picked(self, rows):
        if rows:
            path = self.file_table.value["path"].iloc[rows[0]]
            self.file_select.value = path
            self.file_path.value = ""

    # ---------------------------------------------------------------- opening
    def open_file(self, path=None):
        """Open a case file from the data folders (the page's controls or ``path``)."""
        text = path or self.file_path.value or self.file_select.value
        if not text:
            raise InputError("pick a case file in the list (or type its name) first")
        real = resolve_data_path(text, self.state.page.data_dirs)
        self._open(real, real.name)

    def _open(self, real, label, on_fail=None):
        from ..io import open_case

        holder = {}

        def job():  # open first (may fail: the old case stays), then switch
            try:
                holder["case"] = open_case(real)
            except BaseException:
                if on_fail is not None:
                    on_fail()
                raise

        def done():
            self.state.set_case(holder["case"])
            return f"Opened {label}"

        self.work(f"Opening {label}", job, done)

    # ---------------------------------------------------------------- upload
    def _uploaded(self, value):
        """A finished upload: its bytes taken out of the widget's value in place (the widget
        forgets them, nothing is re-sent, and the next upload is seen as new), then opened."""
        if not value:  # the browser dropped its old item (replaced by a new drop)
            return
        name = next(iter(value))
        data = value.pop(name)
        self.upload_input.mime_type.pop(name, None)
        self.upload_file(name, data)

    def upload_file(self, name, data):
        """Save ``data`` (bytes) as ``name`` in a private temporary folder inside the first
        data folder and open it like any file there. Refused (InputError, nothing written)
        when larger than the cap or not named as a netCDF/GRIB2 file; a file that does not
        open is deleted again."""
        if isinstance(data, str):
            data = data.encode("latin-1")
        cap = upload_max_bytes()
        safe = _safe_name(name)
        if len(data) > cap:
            raise InputError(f"upload {safe!r} is {_size_text(len(data))}, more than the "
                             f"{_size_text(cap)} allowed; put it in a data folder instead")
        if Path(safe).suffix.lower() not in UPLOAD_SUFFIXES:
            raise InputError(f"upload {safe!r} is not named as a netCDF or GRIB2 file (one of "
                             f"{', '.join(UPLOAD_SUFFIXES)})")
        if not data:
            raise InputError(f"upload {safe!r} is empty")
        dirs = _folders(self.state.page.data_dirs)
        if not dirs:
            raise InputError("no data folder is configured, so an upload has nowhere to go; "
                             "start the server with --data-folder FOLDER")
        try:
            folder = Path(tempfile.mkdtemp(prefix=".pvwb-upload-", dir=dirs[0]))
        except OSError as exc:
            raise InputError(f"cannot keep the upload in {dirs[0]}: "
                             f"{exc.strerror or exc}") from None
        _UPLOAD_DIRS.append(folder)
        target = folder / safe
        try:
            with open(target, "xb") as fh:
                fh.write(data)
            real = resolve_data_path(target, self.state.page.data_dirs)
        except (OSError, WorkbenchError) as exc:
            shutil.rmtree(folder, ignore_errors=True)
            msg = getattr(exc, "strerror", None) or str(exc)
            raise InputError(f"cannot keep the upload {safe!r}: {msg}") from None
        self._open(real, f"{safe} (uploaded, {_size_text(len(data))})",
                   on_fail=lambda: shutil.rmtree(folder, ignore_errors=True))
        return real
