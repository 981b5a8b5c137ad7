"""The common ground of the page's panels: each takes the shared State only, watches the
parameters it shows, and reports every error in the State's status line."""
from __future__ import annotations

import panel as pn

__all__ = ["StatePanel", "offline_extension", "notebook_bundle", "rule"]

_CSS = """
.pvwb-header h2 {margin: 0 0 2px 0; font-size: 20px;}
.pvwb-side {background: #f7f7f5; border-radius: 6px; padding: 4px;}
"""


def offline_extension(comms=None):
    """Load Panel's extension with every JavaScript and stylesheet resource taken from the
    installed packages (``pn.config.inline``), never from a CDN: forecast networks often have
    no internet. ``comms``: Panel's notebook transport ("default", or "ipywidgets" for front
    ends that only host ipywidgets, through jupyter_bokeh); None keeps Panel's detection."""
    kw = {} if comms is None else {"comms": comms}
    doc = pn.state.curdoc
    if doc is None or getattr(doc, "session_context", None) is None:
        # a notebook: the page's resources travel inside the cell outputs (a served page
        # gets them from the server's own static routes)
        pn.config.inline = True
        kw["inline"] = True
    pn.extension("tabulator", "filedropper", raw_css=[_CSS], notifications=False, **kw)


def notebook_bundle(obj, include=None, exclude=None):
    """The notebook display of a Panel object. On Panel's ipywidgets route (front ends that
    host ipywidgets only; ``pn.config.comms == "ipywidgets"``) the page is wrapped in a
    jupyter_bokeh widget with its stylesheets inlined first, as Panel does on its own route
    (otherwise they would be links to a CDN)."""
    if pn.config.comms != "ipywidgets":
        return obj._repr_mimebundle_(include, exclude)
    from bokeh.document import Document
    from bokeh.models import UIElement
    from jupyter_bokeh.widgets import BokehModel
    from panel.io.notebook import patch_inline_stylesheets

    doc = Document()
    model = obj.get_root(doc=doc)
    for sub in model.select({"type": UIElement}):
        patch_inline_stylesheets(sub)
    widget = BokehModel(model, combine_events=True)
    return widget._repr_mimebundle_(include=include, exclude=exclude), {}


class StatePanel:
    """A piece of the page on one :class:`~workbench.state.State`.

    Subclasses build ``self.layout`` (a Panel object) in :meth:`build` and register their
    watchers with :meth:`watch` (so :meth:`detach` can drop them). Display one alone in a
    notebook (``MapPanel(state)`` as the last line of a cell, or ``pn.panel(...)``).
    """

    #: State parameters that make the panel rebuild itself (a new case means a new grid);
    #: empty for a panel that does not depend on the case
    rebuild_on = ("case",)

    def __init__(self, state):
        offline_extension()
        self.state = state
        self._watchers = []
        self.layout = pn.Column(sizing_mode="stretch_width")
        self._case_watcher = (state.param.watch(lambda *ev: self._guard(self._rebuild),
                                                list(self.rebuild_on))
                              if self.rebuild_on else None)
        self._rebuild()

    # ---------------------------------------------------------------- life cycle
    def _rebuild(self):
        self.detach(keep_case=True)
        objs = self.build()
        if objs is not None:
            self.layout[:] = list(objs) if isinstance(objs, (list, tuple)) else [objs]
            page = getattr(self.state, "page", None)
            if page is not None and "rebuilds" in page.param:
                page.rebuilds += 1  # the page tidies the browser's model index (KeyBindings)

    def build(self):
        """Return the panel's contents (a list of Panel objects) for the current case."""
        raise NotImplementedError

    def watch(self, fn, names, obj=None):
        """Call ``fn`` (errors go to the status line) when ``names`` of the State (or of
        ``obj``) change."""
        obj = self.state if obj is None else obj
        w = obj.param.watch(lambda *ev: self._guard(fn, *ev), list(names))
        self._watchers.append((obj, w))
        return w

    def detach(self, keep_case=False):
        """Stop following the State (before the panel is dropped)."""
        for obj, w in self._watchers:
            obj.param.unwatch(w)
        self._watchers = []
        if not keep_case and self._case_watcher is not None:
            self.state.param.unwatch(self._case_watcher)
            self._case_watcher = None

    # ---------------------------------------------------------------- helpers
    def _guard(self, fn, *args, **kwargs):
        """Run ``fn``; any error goes to the status line (the page never dies)."""
        try:
            return fn(*args, **kwargs)
        except Exception as exc:  # noqa: BLE001
            self.state.report(exc)
            return None

    @staticmethod
    def _doc():
        doc = pn.state.curdoc
        if doc is not None and getattr(doc, "session_context", None) is not None:
            return doc
        return None

    def later(self, fn):
        """Run ``fn`` after the current changes reached the browser (served), or now."""
        doc = self._doc()
        if doc is None:
            self._guard(fn)
        else:
            doc.add_next_tick_callback(lambda: self._guard(fn))

    #: whether :meth:`work` runs jobs in a worker thread by default (panels whose jobs only
    #: compute set it True; jobs that change widgets or the State run on the page's thread)
    background_work = False

    @property
    def jobs(self):
        """The page session's :class:`~workbench.panels.jobs.JobRunner` (one job at a time)."""
        from .jobs import JobRunner

        return JobRunner.of(self.state)

    def work(self, label, fn, done=None, *, background=None, on_error=None, on_finish=None):
        """Long work through the page's job runner: the busy indicator, the progress read-out
        (``label``, a bar and Cancel) and the status line saying "done (n s)", "cancelled" or
        the error. ``fn()`` or ``fn(progress)`` (``progress(fraction, text)`` raises
        :class:`~workbench.errors.Cancelled` once Cancel was pressed); ``done``: a message, or
        a callable run on the page's thread afterwards returning the message. ``background``
        (default :attr:`background_work`): run ``fn`` in a worker thread (it must then not
        touch widgets or the State). Returns the :class:`~workbench.panels.jobs.Job`."""
        st = self.state
        background = self.background_work if background is None else bool(background)

        def ok(job, _result):
            msg = done() if callable(done) else (done or "Done")
            st.set_status(f"{msg} ({job.elapsed:.1f} s)", "success")

        def failed(job, exc):
            st.report(exc)
            if on_error is not None:
                self._guard(on_error, job, exc)

        def cancelled(job):
            st.set_status(f"{label}: cancelled after {job.elapsed:.1f} s; nothing was kept",
                          "warning")
            if on_error is not None:
                self._guard(on_error, job, None)

        def finish(job):
            st.busy = False
            if on_finish is not None:
                self._guard(on_finish, job)

        def guarded(cb):
            def run(*args):
                try:
                    cb(*args)
                except Exception as exc:  # noqa: BLE001
                    st.report(exc)
            return run

        runner = self.jobs
        if runner.job is not None and runner.job.running:
            runner.submit(label, fn)  # refuses with the running job's name
        st.busy = True
        st.set_status(label + " …", "info")
        return runner.submit(label, fn, on_done=guarded(ok), on_error=guarded(failed),
                             on_cancel=guarded(cancelled), on_finish=finish,
                             background=background)

    @staticmethod
    def to_widget(widget, value):
        """Show a State value in a widget (no echo back when it already shows it)."""
        if widget.value != value:
            try:
                widget.value = value
            except Exception:  # noqa: BLE001
                pass

    # ---------------------------------------------------------------- display
    def __panel__(self):
        return self.layout

    def _repr_mimebundle_(self, include=None, exclude=None):
        return notebook_bundle(self.layout, include, exclude)

    def servable(self, title="PV Workbench"):
        return self.layout.servable(title=title)


def rule():
    """A thin horizontal line between groups of controls. (Panel's Divider links its stylesheet
    by URL; added to a page after a case switch, that URL pointed at a public CDN, which an
    offline network cannot reach.) A styled spacer needs no stylesheet."""
    return pn.Spacer(height=1, margin=(6, 5), sizing_mode="stretch_width",
                     styles={"border-top": "1px solid #d0d0d0"}, css_classes=["pvwb-rule"])
