"""The export panel: the map and the active section as PNG/SVG/PDF figures, the briefing PDF
and the balanced fields as netCDF, written only inside the output folder
(``state.page.output_dir``) and offered for download."""
from __future__ import annotations

from pathlib import Path

import panel as pn

from ..access import resolve_output_path
from ..errors import ExportError, InputError
from ..export import time_tag
from ..textsafe import escape
from .base import StatePanel

__all__ = ["ExportPanel", "case_stem"]


def _slug(text):
    import re

    keep = re.sub(r"[^A-Za-z0-9.\-]+", "_", str(text).strip())
    return keep.strip("._")[:60] or "case"


def case_stem(case):
    """A short file-name stem for a case: its file's name, else its name."""
    src = str(getattr(case, "source", "") or "")
    if src and src != "<in-memory>":
        return _slug(Path(src).stem)
    return _slug(getattr(case, "name", "case"))


class FileTarget:
    """The overwrite tick box and the download button shared by the export and session
    panels of one page (one per State: ``FileTarget.of(state)``)."""

    def __init__(self):
        self.overwrite = pn.widgets.Checkbox(label="Overwrite an existing file", value=False,
                                             css_classes=["pvwb-overwrite"])
        self.download = pn.widgets.FileDownload(file=None, filename="", visible=False,
                                                color="success",
                                                sizing_mode="stretch_width", max_width=410,
                                                css_classes=["pvwb-download"])
        self.last_written = None

    @classmethod
    def of(cls, state):
        t = getattr(state, "_file_target", None)
        if t is None:
            t = state._file_target = cls()
        return t

    def refuse_existing(self, path, error, what):
        if path.exists() and not self.overwrite.value:
            raise error(f"{what} {path.name} already exists in {path.parent}; tick “Overwrite "
                        "an existing file” to replace it, or choose another name")

    def written(self, path, what):
        self.download.param.update(file=str(path), filename=path.name, visible=True,
                                   label=f"Download {path.name}")
        self.last_written = path
        return f"{what} {path}"


class ExportPanel(StatePanel):
    """Figures, briefing and netCDF export (watches ``figure_settings`` and ``briefing``).

    Every export is a background job (progress read-out and Cancel in the status area) on a
    snapshot of the State taken when the button is pressed, so the page stays usable and later
    changes do not leak into the file. The briefing fields (headline, summary, forecaster,
    office, pages in order) live in ``State.briefing`` and are saved in the session."""

    background_work = True

    def build(self):
        from ..session import PROJECTIONS
        from ..views.interactive import TextHTML, TextMarkdown

        st = self.state
        if st.case is None:
            return []
        fs = st.figure_settings
        self.files = FileTarget.of(st)
        self.export_name = pn.widgets.TextInput(
            label="Name for exported files", sizing_mode="stretch_width", max_width=410,
            css_classes=["pvwb-export-name"],
            placeholder=f"blank: {case_stem(st.case)} (then _map_<time>.png and so on)")
        self.export_format = pn.widgets.RadioButtonGroup(label="Figure format",
                                                         options=["PNG", "SVG", "PDF"],
                                                         value="PNG", width=165,
                                                         margin=(23, 5, 5, 5))
        self.export_dpi = pn.widgets.IntInput(label="dpi", value=int(fs["dpi"]), start=30,
                                              end=1200, step=10, width=75)
        self.projection = pn.widgets.Select(
            label="Map projection", width=150, value=fs["projection"],
            options={p.replace("_", " "): p for p in PROJECTIONS})
        buttons = []
        for attr, label, css, fn in (
                ("map_fig_button", "Map figure", "pvwb-export-map", self.export_map),
                ("section_fig_button", "Section figure", "pvwb-export-section",
                 self.export_section),
                ("brief_button", "Briefing PDF", "pvwb-export-brief", self.export_briefing),
                ("netcdf_button", "Balanced fields (netCDF)", "pvwb-export-netcdf",
                 self.export_netcdf)):
            b = pn.widgets.Button(label=label, width=200, css_classes=[css])
            b.on_click(lambda e, fn=fn: self._guard(fn))
            setattr(self, attr, b)
            buttons.append(b)

        def set_fs(key, value):
            st.figure_settings = {**st.figure_settings, key: value}

        self.watch(lambda ev: set_fs("dpi", int(ev.new)), ["value"], obj=self.export_dpi)
        self.watch(lambda ev: set_fs("projection", ev.new), ["value"], obj=self.projection)

        def fs_to_widgets(*_):
            self.to_widget(self.export_dpi, int(st.figure_settings["dpi"]))
            self.to_widget(self.projection, st.figure_settings["projection"])

        self.watch(fs_to_widgets, ["figure_settings"])
        briefing_box = self._briefing_fields()
        where = st.page.output_dir or "(none: start with --output-folder)"
        return [TextHTML(f"Files are written to <b>{escape(where)}</b>.", margin=(0, 8),
                         styles={"font-size": "13px"}, css_classes=["pvwb-output-folder"]),
                self.files.overwrite,
                TextMarkdown("**Figures and exports**", margin=(4, 8, 0, 8)),
                self.export_name,
                pn.FlexBox(self.projection, self.export_dpi, self.export_format),
                pn.FlexBox(*buttons), briefing_box, self.files.download]

    # ---------------------------------------------------------------- briefing fields
    def _briefing_fields(self):
        from ..brief import PAGES, briefing_pages

        st = self.state
        b = dict(st.briefing or {})
        w = dict(width=200, margin=(2, 5))
        self.b_headline = pn.widgets.TextInput(label="Headline", value=b.get("headline") or "",
                                               placeholder="one line on the title page",
                                               sizing_mode="stretch_width", max_width=410,
                                               css_classes=["pvwb-brief-headline"])
        self.b_summary = pn.widgets.TextAreaInput(label="Summary", value=b.get("summary") or "",
                                                  placeholder="free text in a box on the title page",
                                                  height=80, sizing_mode="stretch_width",
                                                  max_width=410, css_classes=["pvwb-brief-summary"])
        self.b_author = pn.widgets.TextInput(label="Forecaster", value=b.get("author") or "",
                                             css_classes=["pvwb-brief-author"], **w)
        self.b_office = pn.widgets.TextInput(label="Office", value=b.get("office") or "",
                                             css_classes=["pvwb-brief-office"], **w)
        pages = b.get("pages")
        self.b_pages = pn.widgets.MultiChoice(
            label="Pages after the title page (in the order chosen)", options=list(PAGES),
            value=list(briefing_pages(pages, False) if pages is None else pages),
            sizing_mode="stretch_width", max_width=410, css_classes=["pvwb-brief-pages"])
        for wid in (self.b_headline, self.b_summary, self.b_author, self.b_office, self.b_pages):
            self.watch(lambda *ev: self.briefing_to_state(), ["value"], obj=wid)
        self.watch(lambda *ev: self.briefing_to_widgets(), ["briefing"])
        return pn.Column(pn.pane.Markdown("**Briefing**", margin=(4, 8, 0, 8)), self.b_headline,
                         self.b_summary, pn.FlexBox(self.b_author, self.b_office), self.b_pages,
                         sizing_mode="stretch_width", css_classes=["pvwb-brief-fields"])

    def briefing_to_state(self):
        """The briefing fields into ``State.briefing`` (checked first: a bad text stays out
        of the State and its message goes to the status line)."""
        from ..brief import briefing_pages, briefing_texts

        texts = briefing_texts(self.b_headline.value or None, self.b_summary.value or None,
                               self.b_author.value or None, self.b_office.value or None)
        pages = list(self.b_pages.value or [])
        if not pages:
            raise InputError("choose at least one page for the briefing (e.g. map, attribution)")
        briefing_pages(pages, "tendency" in pages)
        new = {k: v for k, v in texts.items() if v}
        new["pages"] = pages
        if new != (self.state.briefing or {}):
            self.state.briefing = new

    def briefing_to_widgets(self):
        from ..brief import briefing_pages

        b = dict(self.state.briefing or {})
        for wid, key in ((self.b_headline, "headline"), (self.b_summary, "summary"),
                         (self.b_author, "author"), (self.b_office, "office")):
            self.to_widget(wid, b.get(key) or "")
        pages = b.get("pages")
        self.to_widget(self.b_pages, list(briefing_pages(pages, False) if pages is None
                                          else pages))

    def _snapshot(self):
        """A copy of the State for a background job (later changes do not reach it)."""
        from ..state import State

        st = self.state
        snap = State.from_dict(st.to_dict(), st.case)
        refined = st.__dict__.get("_refined")
        if refined is not None:
            snap.__dict__["_refined"] = refined
        return snap

    # ---------------------------------------------------------------- paths
    def _write_folders(self):
        out = self.state.page.output_dir
        return [out] if out else []

    def _stem(self):
        return (self.export_name.value_input or self.export_name.value or "").strip() or \
            case_stem(self.state.case)

    def _time_tag(self):
        return time_tag(self.state.valid_time)

    def _export_path(self, kind, suffix):
        name = f"{self._stem()}_{kind}" + ("" if kind == "briefing" else f"_{self._time_tag()}")
        return resolve_output_path(name + suffix, self._write_folders(), (suffix,))

    # ---------------------------------------------------------------- actions
    def export_map(self):
        """The map as the static figure (map_figure(state)) in the chosen format."""
        return self._export_figure("map")

    def export_section(self):
        """The active section as the static figure (section_figure(state, active))."""
        if not self.state.sections:
            raise InputError("there is no section line yet; choose *Draw a section* and drag "
                             "a line across the map first")
        return self._export_figure("section")

    def _export_figure(self, which):
        from ..views import static

        st = self.state
        fmt = self.export_format.value.lower()
        path = self._export_path(which, "." + fmt)
        self.files.refuse_existing(path, ExportError, "figure")
        dpi, overwrite = int(self.export_dpi.value), bool(self.files.overwrite.value)

        snap = self._snapshot()

        def job(progress):
            progress(0.1, f"drawing the {which}")
            fig = static.map_figure(snap) if which == "map" else \
                static.section_figure(snap, snap.active_section)
            progress(0.8, "writing the file")
            static.save_figure(fig, path, dpi=dpi, overwrite=overwrite)

        self.work(f"Drawing the {which} figure", job,
                  lambda: self.files.written(path, f"{which.capitalize()} figure saved to"))
        return path

    def export_briefing(self):
        """The multi-page briefing PDF of the current state (make_briefing)."""
        from ..brief import make_briefing

        st = self.state
        path = self._export_path("briefing", ".pdf")
        self.files.refuse_existing(path, ExportError, "briefing")
        overwrite = bool(self.files.overwrite.value)
        options = st.briefing_options()
        pages = options["pages"]
        snap = self._snapshot()
        balance, floor = st.balance, bool(st.balance_floor)

        def job(progress):
            make_briefing(snap.case, snap, path, overwrite=overwrite, progress=progress,
                          balance=balance, floor=floor,
                          tendency=pages is not None and "tendency" in pages, **options)

        self.work("Making the briefing PDF", job,
                  lambda: self.files.written(path, "Briefing saved to"))
        return path

    def export_netcdf(self):
        """The balanced fields of every piece, the remainder and the full inversion
        (export_balanced), as CF netCDF: the nonlinear-balance fields (with the nonlinear
        remainder) when nonlinear balance is chosen and a refine has made them, else QG."""
        from ..export import export_balanced

        st = self.state
        if not st.pieces:
            raise InputError("there are no pieces to export; lasso an anomaly or add a "
                             "boundary piece first")
        path = self._export_path("balanced", ".nc")
        self.files.refuse_existing(path, ExportError, "netCDF export")
        overwrite = bool(self.files.overwrite.value)
        snap, settings = self._snapshot(), st.to_dict()
        # the refined nonlinear results when chosen and up to date (never computed here);
        # else QG, computed in the job from the snapshot
        results = st.refined_results() if st.balance == "nonlinear" else None
        balance = "qg" if results is None else "nonlinear"
        what = "QG" if balance == "qg" else "nonlinear-balance"
        self.work(f"Writing the {what} balanced fields", lambda: export_balanced(
            snap.results() if results is None else results, None, path, overwrite=overwrite,
            case=snap.case, settings=settings, balance=balance),
            lambda: self.files.written(path, f"Balanced fields ({what}) saved to"))
        return path
