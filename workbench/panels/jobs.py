"""Background jobs of the page: long work (briefing, nonlinear refine, what-if runs) runs in a
worker thread while the page stays usable, with a progress read-out and a Cancel button.

* :class:`JobRunner` (one per State: ``JobRunner.of(state)``, so one job at a time per page
  session; several page sessions each run their own job on the shared pool of
  :data:`MAX_WORKERS` threads). ``runner.submit(label, fn, on_done=..., on_error=...)`` runs
  ``fn(progress)`` in a worker thread (:mod:`concurrent.futures`); ``progress(fraction, text)``
  records how far it got and raises :class:`~workbench.errors.Cancelled` once the user pressed
  Cancel (cooperative: the job stops at its next progress call). Results, errors, the
  cancellation and every progress update are delivered on the document's thread through
  ``doc.add_next_tick_callback`` (the one Bokeh Document method safe from another thread;
  progress updates are coalesced: at most one is pending), or directly when there is no
  served document (notebooks, tests).
* Without a served document the runner is *blocking* by default: ``fn`` runs in the calling
  thread and everything is delivered before ``submit`` returns (scripts and tests see the
  result at once). ``runner.blocking = False`` runs it in a worker thread there too (e.g. in a
  notebook, to keep the kernel free); the callbacks then run in the worker thread.
* :class:`JobReadout`: the progress bar, the text and the Cancel button (in the status area).

Jobs must not touch widgets or the State in ``fn`` (do that in ``on_done``, which runs on the
document's thread); read what they need from a snapshot taken before submitting.
"""
from __future__ import annotations

import inspect
import threading
import time
from concurrent.futures import ThreadPoolExecutor

import panel as pn
import param

from ..errors import Cancelled, InputError

__all__ = ["JobRunner", "Job", "JobReadout", "MAX_WORKERS", "executor", "takes_progress"]

#: worker threads shared by every page session of the process (the machine's cores are few;
#: each session runs at most one job at a time)
MAX_WORKERS = 4

_POOL = None
_POOL_LOCK = threading.Lock()


def executor() -> ThreadPoolExecutor:
    """The process's shared pool of job threads (made on first use)."""
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(max_workers=MAX_WORKERS, thread_name_prefix="pvwb-job")
        return _POOL


def takes_progress(fn) -> bool:
    """True when ``fn`` takes a positional argument (the progress callback)."""
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return False
    return any(p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD, p.VAR_POSITIONAL)
               and p.default is p.empty for p in sig.parameters.values())


class Job:
    """One submitted job: its label, progress (``fraction`` 0..1 or None, ``text``), state
    (``"running"``, ``"done"``, ``"error"``, ``"cancelled"``), ``result`` / ``error`` and timings."""

    def __init__(self, label):
        self.label = str(label)
        self.fraction = 0.0
        self.text = "starting"
        self.state = "running"
        self.result = None
        self.error = None
        self.started = time.perf_counter()
        self.first_progress_s = None   # seconds from submit to the job's first progress call
        self.cancel_requested_at = None
        self.ended = None
        self._cancel = threading.Event()
        self._finished = threading.Event()  # set once the outcome was delivered
        self.future = None

    # ------------------------------------------------------------------ control
    def cancel(self):
        """Ask the job to stop (it raises Cancelled at its next progress call)."""
        if self.state == "running" and not self._cancel.is_set():
            self.cancel_requested_at = time.perf_counter()
            self._cancel.set()

    @property
    def cancel_requested(self) -> bool:
        return self._cancel.is_set()

    @property
    def running(self) -> bool:
        return self.state == "running"

    @property
    def elapsed(self) -> float:
        return (self.ended or time.perf_counter()) - self.started

    @property
    def cancel_latency(self):
        """Seconds from the Cancel press to the job's end (None if not cancelled)."""
        if self.cancel_requested_at is None or self.ended is None:
            return None
        return self.ended - self.cancel_requested_at

    def check(self):
        """Raise Cancelled when the user asked to stop."""
        if self._cancel.is_set():
            raise Cancelled(f"{self.label}: cancelled")

    def wait(self, timeout=None) -> bool:
        """Block until the outcome was delivered (True) or ``timeout`` s passed (False)."""
        return self._finished.wait(timeout)

    def __repr__(self):
        pct = "" if self.fraction is None else f" {100 * self.fraction:.0f}%"
        return f"<Job {self.label!r} {self.state}{pct} {self.text!r}>"


class JobRunner(param.Parameterized):
    """Runs one job at a time for a page session (see the module docstring).

    Its parameters mirror the current job for the read-out (``label``, ``fraction``,
    ``text``, ``running``); they change on the document's thread only."""

    label = param.String(default="", doc="What the current (or last) job does.")
    fraction = param.Number(default=0.0, allow_None=True, bounds=(0.0, 1.0),
                            doc="How far the job got (None: unknown).")
    text = param.String(default="", doc="The job's latest progress text.")
    running = param.Boolean(default=False, doc="True while a job runs.")
    blocking = param.Boolean(default=None, allow_None=True,
                             doc="Run jobs in the calling thread (None: only when there is no "
                                 "served document).")

    def __init__(self, **params):
        super().__init__(**params)
        self.job = None
        self._pending = False
        self._plock = threading.Lock()

    @classmethod
    def of(cls, state) -> "JobRunner":
        """The runner of a State (made on first use): one job at a time per page session."""
        r = state.__dict__.get("_job_runner")
        if r is None:
            r = cls()
            state.__dict__["_job_runner"] = r
        return r

    # ------------------------------------------------------------------ document
    @staticmethod
    def current_doc():
        """The served page's document, or None (notebook, script, test)."""
        doc = pn.state.curdoc
        if doc is not None and getattr(doc, "session_context", None) is not None:
            return doc
        return None

    def _deliver(self, doc, fn):
        """Run ``fn`` on the document's thread (holding its lock), or now without a document."""
        if doc is None:
            fn()
            return

        def cb():
            from panel.io.state import set_curdoc

            with set_curdoc(doc):
                fn()
        doc.add_next_tick_callback(cb)

    # ------------------------------------------------------------------ submit
    def submit(self, label, fn, *, on_done=None, on_error=None, on_cancel=None,
               on_progress=None, on_finish=None, doc="current", background=True) -> Job:
        """Start ``fn`` (``fn(progress)``, or ``fn()`` when it takes no argument).

        Callbacks (on the document's thread): ``on_progress(job)`` after progress calls
        (coalesced), then one of ``on_done(job, result)``, ``on_cancel(job)`` (the job raised
        Cancelled) or ``on_error(job, exc)``, then ``on_finish(job)``. ``background=False``
        runs ``fn`` on the document's next tick instead of a worker thread (work that changes
        widgets or the State itself; the page waits for it and it cannot be cancelled midway).
        Refuses (InputError) while another job of this runner runs."""
        if self.job is not None and self.job.running:
            raise InputError(f"“{self.job.label}” is still running; wait for it to end or press "
                             "Cancel first")
        doc = self.current_doc() if doc == "current" else doc
        job = Job(label)
        self.job = job
        self.param.update(label=job.label, fraction=0.0, text="starting", running=True)
        wants_progress = takes_progress(fn)

        def progress(fraction=None, text=None):
            # called by the job (worker thread): record, schedule the read-out, maybe stop
            if job.first_progress_s is None:
                job.first_progress_s = time.perf_counter() - job.started
            if fraction is not None:
                job.fraction = min(1.0, max(0.0, float(fraction)))
            if text is not None:
                job.text = str(text)
            self._schedule_progress(doc, job, on_progress)
            job.check()

        def run():
            try:
                res = fn(progress) if wants_progress else fn()
            except Cancelled:
                job.state = "cancelled"
            except BaseException as exc:  # noqa: BLE001  (delivered to on_error)
                job.error = exc
                job.state = "error"
            else:
                job.result = res
                job.state = "done"
            job.ended = time.perf_counter()
            self._deliver(doc, lambda: self._finish(job, on_done, on_error, on_cancel,
                                                     on_finish))

        blocking = (doc is None) if self.blocking is None else bool(self.blocking)
        if not background and doc is not None:
            doc.add_next_tick_callback(run)
        elif blocking or not background:
            run()
        else:
            job.future = executor().submit(run)
        return job

    def _schedule_progress(self, doc, job, on_progress):
        with self._plock:
            if self._pending:
                return
            self._pending = True

        def show():
            with self._plock:
                self._pending = False
            if self.job is job and job.running:
                self.param.update(fraction=job.fraction, text=job.text)
                if on_progress is not None:
                    on_progress(job)
        self._deliver(doc, show)

    def _finish(self, job, on_done, on_error, on_cancel, on_finish):
        try:
            if job.state == "done":
                if on_done is not None:
                    on_done(job, job.result)
            elif job.state == "cancelled":
                if on_cancel is not None:
                    on_cancel(job)
            elif on_error is not None:
                on_error(job, job.error)
        finally:
            try:
                if on_finish is not None:
                    on_finish(job)
            finally:
                text = {"done": "done", "cancelled": "cancelled", "error": "failed"}[job.state]
                self.param.update(running=False, text=f"{text} ({job.elapsed:.1f} s)",
                                  fraction=1.0 if job.state == "done" else job.fraction)
                job._finished.set()

    def cancel(self):
        """Cancel the running job (if any)."""
        if self.job is not None:
            self.job.cancel()


class JobReadout:
    """The progress bar, text and Cancel button of a page's job runner (shown while a job
    runs). ``layout`` is the Panel object; ``cancel_button`` has CSS class ``pvwb-job-cancel``,
    the text ``pvwb-job-text``."""

    def __init__(self, runner: JobRunner):
        from ..views.interactive import TextHTML

        self.runner = runner
        self.bar = pn.indicators.Progress(value=0, max=1000, width=160, height=14,
                                          bar_color="primary", margin=(10, 6, 4, 6),
                                          css_classes=["pvwb-job-bar"])
        self.text = TextHTML("", margin=(4, 6), css_classes=["pvwb-job-text"], width=320)
        self.cancel_button = pn.widgets.Button(label="Cancel", width=80, color="warning",
                                               css_classes=["pvwb-job-cancel"], margin=(4, 6))
        self.cancel_button.on_click(lambda e: runner.cancel())
        # fixed at the bottom right of the window: seen wherever the page is scrolled to
        self.layout = pn.Row(self.bar, self.text, self.cancel_button, visible=False,
                             width=600, css_classes=["pvwb-job"],
                             styles={"position": "fixed", "right": "16px", "bottom": "16px",
                                     "z-index": "1000", "background": "#ffffff",
                                     "border": "1px solid #9bb7d4", "border-radius": "6px",
                                     "box-shadow": "0 2px 8px rgba(0,0,0,0.25)"})
        self._w = runner.param.watch(self.show, ["label", "fraction", "text", "running"])
        self.show()

    def show(self, *_):
        from ..textsafe import escape

        r = self.runner
        self.layout.visible = bool(r.running)
        if r.fraction is None:
            self.bar.value = -1  # indeterminate
        else:
            self.bar.value = int(round(1000 * r.fraction))
        pct = "" if r.fraction is None else f" · {100 * r.fraction:.0f} %"
        self.text.object = (f"<span class='pvwb-job-label' style='font-size:13px'><b>"
                            f"{escape(r.label)}</b>: {escape(r.text)}{pct}</span>")
        self.cancel_button.disabled = not r.running

    def detach(self):
        self.runner.param.unwatch(self._w)
