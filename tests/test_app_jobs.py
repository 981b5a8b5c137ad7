"""Background jobs of the page (workbench.panels.jobs) and the progress keywords of the long
computations (make_briefing, run_whatif, invert_nonlinear_pieces), without a browser.

The checks are of bookkeeping and timing (progress delivered, cancel within a bound, errors
reported, callbacks on the document's thread while it keeps serving other callbacks, no
partial file); fixture cases are invented (tests/conftest.py and the invented sample storm).
"""
from __future__ import annotations

import queue
import threading
import time
import warnings

import numpy as np
import pytest

from workbench.errors import Cancelled, InputError
from workbench.panels.jobs import JobRunner, takes_progress


class LoopDocument:
    """Stands in for a served Bokeh document: one thread runs the callbacks given to
    ``add_next_tick_callback`` one after the other, as the server's event loop does."""

    def __init__(self):
        self.q = queue.Queue()
        self.ran = []  # (name, thread name, time)
        self.thread = threading.Thread(target=self._loop, name="doc-loop", daemon=True)
        self.thread.start()

    def _loop(self):
        while True:
            cb = self.q.get()
            if cb is None:
                return
            cb()

    def add_next_tick_callback(self, cb):
        self.q.put(cb)

    def close(self):
        self.q.put(None)
        self.thread.join(5)


def _ticking(n=1000, dt=0.01):
    def job(progress):
        for i in range(n):
            time.sleep(dt)
            progress((i + 1) / n, f"step {i + 1} of {n}")
        return "finished"
    return job


def test_takes_progress():
    assert takes_progress(lambda p: None) and not takes_progress(lambda: None)
    assert not takes_progress(lambda p=None: None)


def test_progress_is_delivered_and_the_result_arrives():
    r = JobRunner(blocking=False)
    seen, out = [], {}
    job = r.submit("count", _ticking(20, 0.005), doc=None,
                   on_progress=lambda j: seen.append((j.fraction, j.text)),
                   on_done=lambda j, res: out.setdefault("res", res))
    assert job.wait(10)
    assert job.state == "done" and out["res"] == "finished"
    assert seen and seen[-1][0] <= 1.0
    fractions = [f for f, _ in seen]
    assert fractions == sorted(fractions)  # never goes back
    assert r.running is False and r.fraction == 1.0 and r.text.startswith("done")
    assert job.first_progress_s is not None and job.first_progress_s < 1.0


def test_cancel_stops_the_job_within_a_bound():
    r = JobRunner(blocking=False)
    calls = []
    job = r.submit("long", _ticking(1000, 0.01), doc=None,  # would take 10 s
                   on_done=lambda j, res: calls.append("done"),
                   on_cancel=lambda j: calls.append("cancelled"))
    time.sleep(0.3)
    assert job.running
    t0 = time.perf_counter()
    r.cancel()
    assert job.wait(5)
    assert time.perf_counter() - t0 < 0.5
    assert job.state == "cancelled" and calls == ["cancelled"]
    assert job.cancel_latency is not None and job.cancel_latency < 0.5
    assert job.elapsed < 2.0


def test_errors_are_reported_and_one_job_at_a_time():
    r = JobRunner(blocking=False)
    got = {}

    def bad(progress):
        progress(0.5, "half")
        raise InputError("the input is wrong")

    job = r.submit("bad", bad, doc=None, on_error=lambda j, e: got.setdefault("e", e))
    assert job.wait(5) and job.state == "error"
    assert isinstance(got["e"], InputError) and "wrong" in str(got["e"])
    long = r.submit("long", _ticking(500, 0.01), doc=None)
    with pytest.raises(InputError, match="“long” is still running"):
        r.submit("second", lambda: None, doc=None)
    long.cancel()
    assert long.wait(5) and long.state == "cancelled"
    assert r.submit("third", lambda: 3, doc=None).wait(5)


def test_the_document_stays_responsive_and_callbacks_run_on_its_thread():
    doc = LoopDocument()
    try:
        r = JobRunner()
        threads = {}
        job = r.submit("half a second", _ticking(50, 0.01), doc=doc,
                       on_progress=lambda j: threads.setdefault("progress", threading.current_thread().name),
                       on_done=lambda j, res: threads.setdefault("done", threading.current_thread().name))
        # another callback of the page, scheduled while the job runs
        t_sched = time.perf_counter()
        other = threading.Event()
        doc.add_next_tick_callback(lambda: other.set())
        assert other.wait(0.3), "the document's loop was blocked by the job"
        assert time.perf_counter() - t_sched < 0.3 and job.running
        assert job.wait(10) and job.state == "done"
        assert threads == {"progress": "doc-loop", "done": "doc-loop"}
        assert job.future is not None  # it ran in a worker thread
    finally:
        doc.close()


def test_several_sessions_each_run_a_job_at_once():
    runners = [JobRunner(blocking=False) for _ in range(2)]
    jobs = [r.submit(f"job {k}", _ticking(30, 0.01), doc=None) for k, r in enumerate(runners)]
    assert all(j.running for j in jobs)
    assert all(j.wait(10) and j.state == "done" for j in jobs)


def test_statepanel_work_reports_done_cancelled_and_errors(small_case):
    from workbench.panels.attribution import AttributionPanel
    from workbench.state import State

    st = State(small_case)
    panel = AttributionPanel(st)
    job = panel.work("Quick", lambda progress: progress(1.0, "all"), "Quick work done")
    assert job.state == "done" and st.status.startswith("Quick work done (") and not st.busy
    panel.work("Broken", lambda: (_ for _ in ()).throw(InputError("bad value for x")))
    assert st.status == "bad value for x" and st.status_level == "error" and not st.busy

    def cancelled(progress):
        panel.jobs.cancel()
        progress(0.1, "again")

    panel.work("Stopped", cancelled)
    assert st.status_level == "warning" and "cancelled" in st.status and not st.busy


# --------------------------------------------------------------------------- computations


def test_briefing_progress_and_cancel_leave_no_file(small_case, tmp_path):
    from workbench.brief import make_briefing

    seen = []
    out = make_briefing(small_case, None, tmp_path / "b.pdf", pages=["map", "attribution"],
                        progress=lambda f, t: seen.append((f, t)))
    assert out.is_file()
    fr = [f for f, _ in seen]
    assert fr == sorted(fr) and fr[-1] == pytest.approx(1.0) and len(seen) == 6  # 3 made, 3 written
    assert seen[0][1] == "page 1 of 3 made" and seen[-1][1] == "page 3 of 3 written"

    def stop_at_write(f, t):
        if "written" in t:
            raise Cancelled("briefing cancelled")

    with pytest.raises(Cancelled):
        make_briefing(small_case, None, tmp_path / "c.pdf", pages=["map"], progress=stop_at_write)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b.pdf"]  # no partial file, no temp file


def test_whatif_progress_per_step_and_cancel(sample_case_path):
    import workbench as wb
    from workbench.whatif import run_whatif

    case = wb.open_case(sample_case_path)
    seen = []
    res = run_whatif(case, "upper trough", 0.5, hours=6, progress=lambda f, t: seen.append((f, t)))
    fr = [f for f, _ in seen]
    assert fr == sorted(fr) and fr[-1] == pytest.approx(1.0)
    assert len(seen) >= 4  # several calls per 6 h output (one per model step)
    assert seen[0][1].startswith("control") and seen[-1][1] == "experiment +6 h of 6 h"
    assert len(res.track) == 4

    def stop(f, t):
        if f > 0.2:
            raise Cancelled("what-if cancelled")

    t0 = time.perf_counter()
    with pytest.raises(Cancelled):
        run_whatif(case, "upper trough", 0.5, hours=48, progress=stop)
    assert time.perf_counter() - t0 < 10  # stopped long before the 48 h run's end


def test_nonlinear_pieces_progress_and_cancel(sample_case_path):
    import workbench as wb
    from workbench.analysis import standard_pieces
    from workbench.inversion.nonlinear import invert_nonlinear_pieces

    case = wb.open_case(sample_case_path)
    seen = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = invert_nonlinear_pieces(case, standard_pieces(), 0, progress=lambda f, t: seen.append((f, t)))
    fr = [f for f, _ in seen]
    assert fr == sorted(fr) and fr[-1] == pytest.approx(1.0)
    assert any(t.startswith("full inversion: Newton step 1") for _, t in seen)
    assert any(t.startswith("reference state") for _, t in seen)
    assert "nonlinear remainder" in res

    def stop(f, t):
        raise Cancelled("refine cancelled")

    with pytest.raises(Cancelled):
        invert_nonlinear_pieces(case, standard_pieces(), 0, progress=stop)


# --------------------------------------------------------------------------- panels


@pytest.fixture
def sample_state(sample_case_path):
    import workbench as wb
    from workbench.analysis import standard_pieces, storm_centre
    from workbench.state import State

    case = wb.open_case(sample_case_path)
    st = State(case)
    st.pieces = standard_pieces()
    lon, lat = storm_centre(case, 0)
    st.set_target(lon, lat, 950.0)
    return st


@pytest.mark.slow
def test_refine_replaces_the_table_and_overlay_and_names_the_balance(sample_state, tmp_path):
    from workbench.inversion.pieces import attribution
    from workbench.panels.attribution import AttributionPanel

    st = sample_state
    panel = AttributionPanel(st)
    qg = panel.attr_table.value
    assert set(qg["balance"]) == {"QG"} and "nonlinear remainder" not in set(qg["piece"])
    qg_overlay = st.overlay()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        job = panel.refine()
    assert job.state == "done", st.status
    assert st.balance == "nonlinear" and panel.attribution_balance == "nonlinear"
    nl = panel.attr_table.value
    assert set(nl["balance"]) == {"nonlinear"} and "nonlinear remainder" in list(nl["piece"])
    assert "data-balance='nonlinear'" in panel.balance_label.object
    # the same numbers as the Case's own nonlinear inversion of these pieces
    ref = attribution(st.case.inversion(st.pieces, 0, balance="nonlinear"), *st.target)
    assert np.allclose(panel.attribution_frame["height_anomaly"].values, ref["height_anomaly"].values,
                       rtol=1e-6, atol=1e-6)
    assert not np.allclose(st.overlay()["height_anomaly"].values, qg_overlay["height_anomaly"].values)
    # the netCDF export writes the balance the page shows: the refined nonlinear fields, with
    # the nonlinear remainder, named as such; the winds are not labelled geostrophic
    import xarray as xr

    from workbench.panels.export import ExportPanel

    out = tmp_path / "out"
    out.mkdir()
    st.page.output_dir = str(out)
    exporter = ExportPanel(st)
    path = exporter.export_netcdf()
    nl_results = st.refined_results()
    with xr.open_dataset(path) as ds:
        assert ds.attrs["balance"] == "nonlinear balance" and "nonlinear" in ds.attrs["title"]
        np.testing.assert_allclose(ds["total_u"].values, nl_results["total"]["u"].values,
                                   rtol=1e-6, atol=1e-9)
        assert "nonlinear_remainder_u" in ds or any("nonlinear" in v and v.endswith("_u")
                                                    for v in ds.data_vars)
        assert "standard_name" not in ds["total_u"].attrs
    # back to QG: the preview numbers again; the choice is saved in the session dict
    st.balance = "qg"
    assert set(panel.attr_table.value["balance"]) == {"QG"}
    assert np.allclose(st.overlay()["height_anomaly"].values, qg_overlay["height_anomaly"].values)
    assert st.to_dict()["balance"] == "qg"


def test_whatif_panel_runs_and_the_run_is_saved_in_the_session(sample_state, tmp_path):
    from workbench.panels.whatif import WhatIfPanel
    from workbench.session import load_session, save_session
    from workbench.whatif import LABEL

    st = sample_state
    panel = WhatIfPanel(st)
    panel.w_piece.value = "upper trough"
    panel.w_action.value = "remove"
    panel.w_hours.value = 6
    job = panel.run()
    assert job.state == "done", st.status
    table = panel.track_table.value
    assert list(table["+h"]) == [0.0, 6.0] and "Δ hPa" in table
    assert LABEL in panel.result_title.object
    assert st.whatif["settings"]["action"] == "remove" and st.whatif["settings"]["scale"] == 0.0
    path = save_session(st, tmp_path / "s.json")
    back = load_session(path, case=st.case)
    assert back.whatif == st.whatif
    again = WhatIfPanel(back)  # a loaded session shows the saved run without running it
    assert again.track_table.visible and again.track_table.value.equals(table)
    panel.w_hours.value = 7
    with pytest.raises(InputError, match="multiple of 6"):
        panel.settings()


def test_briefing_fields_go_to_the_state_and_bad_text_is_refused(small_case, tmp_path):
    from workbench.panels.export import ExportPanel
    from workbench.state import State

    st = State(small_case)
    panel = ExportPanel(st)
    panel.b_headline.value = "Deepening low west of the invented coast"
    panel.b_author.value = "A. Forecaster"
    panel.b_pages.value = ["attribution", "map"]
    assert st.briefing == {"headline": "Deepening low west of the invented coast",
                           "author": "A. Forecaster", "pages": ["attribution", "map"]}
    back = State.from_dict(st.to_dict(), small_case)
    assert back.briefing == st.briefing
    panel.b_headline.value = "two\nlines"  # refused: the State keeps the last good text
    assert st.status_level == "error" and "line break" in st.status
    assert st.briefing["headline"].startswith("Deepening")
    panel.b_headline.value = "Deepening low"
    panel.b_pages.value = []
    assert "at least one page" in st.status and st.briefing["pages"] == ["attribution", "map"]
