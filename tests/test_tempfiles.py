"""Temporary files of the writers, and interrupted runs.

Real processes are killed during a write (SIGKILL, SIGTERM, SIGINT); the write is made slow by
a pause inside the ``atomic_target`` block, after part of the data has been written, so the
signal always lands mid-write. Also: a long ``pvwb`` run ends within a few seconds of Ctrl-C.
"""
from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from workbench.errors import ExportError
from workbench.export import atomic_target, clean_stale_temps, temp_path_for

ROOT = Path(__file__).resolve().parents[1]
MARK = ".pvwb-part-"

SLOW_WRITER = textwrap.dedent("""
    import sys, time
    from workbench.export import atomic_target
    with atomic_target(sys.argv[1], overwrite=True, what="test file") as tmp:
        with open(tmp, "wb") as fh:
            fh.write(b"x" * 4_000_000)
            fh.flush()
            print("writing", flush=True)
            time.sleep(120)
""")


def _env():
    return dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))


def _temps(folder):
    return sorted(p.name for p in Path(folder).iterdir() if MARK in p.name)


def _start_writer(target):
    proc = subprocess.Popen([sys.executable, "-c", SLOW_WRITER, str(target)], cwd=str(ROOT), env=_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    line = proc.stdout.readline()
    assert line.strip() == "writing", proc.stderr.read()
    return proc


def test_temp_name_is_recognisable_and_next_to_the_target(tmp_path):
    target = tmp_path / "table.csv"
    with atomic_target(target) as tmp:
        assert tmp.parent == tmp_path
        assert re.fullmatch(r"\.table\.csv\.pvwb-part-[A-Za-z0-9]*-%d-[0-9a-f]+" % os.getpid(), tmp.name)
        tmp.write_text("a,b\n")
    assert target.read_text() == "a,b\n"
    assert _temps(tmp_path) == []


def test_exception_inside_the_block_leaves_nothing(tmp_path):
    target = tmp_path / "out.nc"
    target.write_text("previous")
    with pytest.raises(RuntimeError):
        with atomic_target(target, overwrite=True) as tmp:
            tmp.write_text("half")
            raise RuntimeError("simulated failure")
    assert target.read_text() == "previous"
    assert _temps(tmp_path) == []


def test_kill9_leaves_a_temp_file_that_the_next_write_removes(tmp_path):
    target = tmp_path / "export.nc"
    proc = _start_writer(target)
    leftovers = _temps(tmp_path)
    assert len(leftovers) == 1 and f"-{proc.pid}-" in leftovers[0]
    proc.kill()  # SIGKILL: nothing in the process can react
    proc.wait(10)
    proc.stdout.close()
    proc.stderr.close()
    assert _temps(tmp_path) == leftovers and not target.exists()
    # the next write to the same folder (another file) cleans the dead run's temporary file
    with atomic_target(tmp_path / "other.csv") as tmp:
        tmp.write_text("x")
    assert _temps(tmp_path) == []
    assert not target.exists() and (tmp_path / "other.csv").read_text() == "x"


@pytest.mark.parametrize("sig, code", [(signal.SIGTERM, 128 + signal.SIGTERM), (signal.SIGINT, None)])
def test_sigterm_and_sigint_leave_nothing(tmp_path, sig, code):
    target = tmp_path / "brief.pdf"
    target.write_text("previous")
    proc = _start_writer(target)
    assert len(_temps(tmp_path)) == 1
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=20)
    assert _temps(tmp_path) == []
    assert target.read_text() == "previous"  # the previous file is never half-replaced
    if code is not None:
        assert proc.returncode == code, err
    else:
        assert proc.returncode != 0 and "KeyboardInterrupt" in err


def test_stale_rules(tmp_path):
    target = tmp_path / "a.nc"
    old = time.time() - 7 * 3600
    # a live process (this test's parent) of this host, recently touched: kept (it may be writing)
    live = tmp_path / temp_path_for(target).name.replace(f"-{os.getpid()}-", f"-{os.getppid()}-")
    live.write_text("x")
    # the same, but untouched for 7 hours: stale (pid reuse)
    live_old = tmp_path / temp_path_for(target).name.replace(f"-{os.getpid()}-", f"-{os.getppid()}-")
    live_old.write_text("x")
    os.utime(live_old, (old, old))
    # another host's file, recent: kept; old: removed
    other = tmp_path / ".a.nc.pvwb-part-otherhost-12345-0abc"
    other.write_text("x")
    other_old = tmp_path / ".a.nc.pvwb-part-otherhost-12346-0abd"
    other_old.write_text("x")
    os.utime(other_old, (old, old))
    # a temporary file of the earlier naming scheme: removed only when old
    legacy_new, legacy_old = tmp_path / ".a.nc.k3j4h5g6.part", tmp_path / ".b.nc.q1w2e3r4.part"
    legacy_new.write_text("x")
    legacy_old.write_text("x")
    os.utime(legacy_old, (old, old))
    # files that only look similar are never touched
    user_files = [tmp_path / ".hidden", tmp_path / "a.nc.pvwb-part-x-1-2", tmp_path / "notes.part"]
    for p in user_files:
        p.write_text("keep")
        os.utime(p, (old, old))
    removed = {p.name for p in clean_stale_temps(tmp_path)}
    assert removed == {live_old.name, other_old.name, legacy_old.name}
    for p in [live, other, legacy_new, *user_files]:
        assert p.exists()


def test_refusals_leave_no_temp(tmp_path):
    (tmp_path / "x.csv").write_text("old")
    with pytest.raises(ExportError, match="already exists"):
        with atomic_target(tmp_path / "x.csv") as tmp:
            tmp.write_text("new")
    with pytest.raises(ExportError, match="folder"):
        with atomic_target(tmp_path) as tmp:
            pass
    with pytest.raises(ExportError, match="no data"):
        with atomic_target(tmp_path / "empty.csv"):
            pass
    assert _temps(tmp_path) == [] and not (tmp_path / "empty.csv").exists()


# --------------------------------------------------------------------------- Ctrl-C ends a run


def _interrupt_after(argv, delay, tmp_path):
    proc = subprocess.Popen([sys.executable, "-m", "workbench.cli", *argv], cwd=str(tmp_path), env=_env(),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    time.sleep(delay)
    assert proc.poll() is None, "the run ended before the interrupt; make it longer"
    t0 = time.monotonic()
    proc.send_signal(signal.SIGINT)
    try:
        _, err = proc.communicate(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
        pytest.fail(f"pvwb {argv[0]} did not end within 15 s of SIGINT")
    return proc.returncode, time.monotonic() - t0, err


@pytest.fixture(scope="module")
def long_case(tmp_path_factory, sample_case_path):
    """The invented sample repeated four times along time (60 times, about 140 MB, so it is also
    read lazily): long enough that a run is still going when the interrupt comes."""
    import numpy as np
    import xarray as xr

    with xr.open_dataset(sample_case_path) as ds:
        ds = ds.load()
    span = ds["time"].values[-1] - ds["time"].values[0] + np.timedelta64(6, "h")
    parts = [ds.assign_coords(time=ds["time"].values + k * span) for k in range(4)]
    path = tmp_path_factory.mktemp("long") / "long_case.nc"
    xr.concat(parts, dim="time").to_netcdf(path)
    return str(path)


@pytest.mark.slow
@pytest.mark.parametrize("argv, delay", [
    (["invert", "{case}", "--quiet"], 3.5),
    (["batch", "{case}", "--quiet", "--local-cluster", "2"], 9.0),  # worker processes and threads
])
def test_ctrl_c_ends_a_long_run(tmp_path, long_case, argv, delay):
    argv = [a.format(case=long_case) for a in argv]
    code, waited, err = _interrupt_after(argv, delay, tmp_path)
    assert code == 130, err
    assert waited < 5.0
    assert "Traceback" not in err and f"pvwb {argv[0]}: interrupted" in err.strip().splitlines()


@pytest.mark.slow
def test_ctrl_c_during_sample_build_leaves_no_files(tmp_path):
    code, waited, err = _interrupt_after(["sample", "-o", str(tmp_path / "s.nc"), "--quiet"], 5.0, tmp_path)
    assert code == 130 and waited < 5.0, err
    assert "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == []
