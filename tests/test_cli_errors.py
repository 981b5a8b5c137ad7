"""Bad command lines: each ends with exit status 2 and one line that names the problem, never a
traceback; ``--debug`` shows the traceback; OS errors are one line too.

The table of command lines, exit codes and messages of the last run is written to
``tests/artifacts/cli_errors.md``.
"""
from __future__ import annotations

import errno
import json
import os
import socket
import time
from pathlib import Path

import pytest

from workbench.cli import main

ARTIFACTS = Path(__file__).parent / "artifacts"
RESULTS: dict[str, tuple[int, str, float]] = {}
LONG = "a" * 300

# Placeholders: CASE (a small valid case, 30..60 N, -40..40 E, 1000..100 hPa, 2 times), DIR (an
# existing folder), F(name) (a file prepared below), NEW(name) (a path that does not exist yet),
# BUSY (a port something listens on), CLOSED (a port nothing listens on), RO (a folder on a
# read-only or root-protected file system).
BAD = [
    # the command itself
    ("unknown command", ["frobnicate"]),
    ("option as command", ["--bogus"]),
    ("unknown option", ["info", "{CASE}", "--nope"]),
    ("extra positional", ["invert", "{CASE}", "extra"]),
    ("missing option value", ["invert", "{CASE}", "--time"]),
    # case files
    ("missing case", ["info", "/nonexistent/case.nc"]),
    ("case is a folder", ["info", "{DIR}"]),
    ("case is text", ["info", "{F:notes.txt}"]),
    ("case is empty", ["info", "{F:empty.nc}"]),
    ("case truncated", ["info", "{F:truncated.nc}"]),
    ("case is JSON", ["info", "{F:pieces_notlist.json}"]),
    # --region / --times
    ("region three numbers", ["info", "{CASE}", "--region", "1,2,3"]),
    ("region words", ["info", "{CASE}", "--region", "a,b,c,d"]),
    ("region south > north", ["info", "{CASE}", "--region", "0,10,50,40"]),
    ("region south < -90", ["info", "{CASE}", "--region", "0,10,-95,40"]),
    ("region zero width", ["info", "{CASE}", "--region", "0,0,30,40"]),
    ("region outside domain", ["info", "{CASE}", "--region", "100,120,30,40"]),
    ("region NaN", ["info", "{CASE}", "--region", "nan,10,30,40"]),
    ("region lon > 360", ["info", "{CASE}", "--region", "0,400,30,40"]),
    ("region empty item", ["info", "{CASE}", "--region", "0,,30,40"]),
    ("times empty", ["info", "{CASE}", "--times", ""]),
    ("times reversed", ["info", "{CASE}", "--times", "5..2"]),
    ("times index out of range", ["info", "{CASE}", "--times", "99"]),
    ("times bad date", ["info", "{CASE}", "--times", "2051-13-01"]),
    ("times mixed range", ["info", "{CASE}", "--times", "1..2031-01-01"]),
    ("times negative", ["info", "{CASE}", "--times", "-1"]),
    ("times not in case", ["info", "{CASE}", "--times", "1999-01-01T00"]),
    # invert
    ("time out of range", ["invert", "{CASE}", "--time", "99"]),
    ("time word", ["invert", "{CASE}", "--time", "abc"]),
    ("time not in case", ["invert", "{CASE}", "--time", "1999-01-01"]),
    ("target words", ["invert", "{CASE}", "--target", "nonsense"]),
    ("target two numbers", ["invert", "{CASE}", "--target", "1,2"]),
    ("target lon outside", ["invert", "{CASE}", "--target", "200,50,500"]),
    ("target lat outside", ["invert", "{CASE}", "--target", "0,89,500"]),
    ("target pressure outside", ["invert", "{CASE}", "--target", "0,45,1200"]),
    ("target NaN", ["invert", "{CASE}", "--target", "nan,45,500"]),
    ("pieces missing", ["invert", "{CASE}", "--pieces", "/nonexistent/pieces.json"]),
    ("pieces bad JSON", ["invert", "{CASE}", "--pieces", "{F:pieces_bad.json}"]),
    ("pieces not a list", ["invert", "{CASE}", "--pieces", "{F:pieces_notlist.json}"]),
    ("pieces unknown kind", ["invert", "{CASE}", "--pieces", "{F:pieces_kind.json}"]),
    ("pieces numbers", ["invert", "{CASE}", "--pieces", "{F:pieces_numbers.json}"]),
    ("pieces polygon outside", ["invert", "{CASE}", "--pieces", "{F:pieces_outside.json}"]),
    ("pieces two vertices", ["invert", "{CASE}", "--pieces", "{F:pieces_two.json}"]),
    ("pieces is a folder", ["invert", "{CASE}", "--pieces", "{DIR}"]),
    ("reference unknown", ["invert", "{CASE}", "--reference", "nonsense_mean"]),
    ("reference missing file", ["invert", "{CASE}", "--reference", "/nonexistent/clim.nc"]),
    ("output is a folder", ["invert", "{CASE}", "-o", "{DIR}"]),
    ("output exists", ["invert", "{CASE}", "-o", "{F:exists.csv}"]),
    ("output folder missing", ["invert", "{CASE}", "-o", "/nonexistent/dir/out.csv"]),
    ("output read-only", ["invert", "{CASE}", "-o", "{RO}/out.csv"]),
    ("output name too long", ["invert", "{CASE}", "-o", "{DIR}/" + LONG + ".csv"]),
    ("member in a case without", ["invert", "{CASE}", "--member", "3"]),
    # brief
    ("brief not pdf", ["brief", "{CASE}", "-o", "{NEW:x.txt}"]),
    ("brief output folder", ["brief", "{CASE}", "-o", "{DIR}"]),
    ("brief output exists", ["brief", "{CASE}", "-o", "{F:exists.pdf}"]),
    ("brief output read-only", ["brief", "{CASE}", "-o", "{RO}/b.pdf"]),
    ("brief session missing", ["brief", "{CASE}", "--session", "/nonexistent/s.json", "-o", "{NEW:b.pdf}"]),
    ("brief session bad JSON", ["brief", "{CASE}", "--session", "{F:pieces_bad.json}", "-o", "{NEW:b.pdf}"]),
    ("brief session a list", ["brief", "{CASE}", "--session", "{F:pieces_numbers.json}", "-o", "{NEW:b.pdf}"]),
    ("brief session folder", ["brief", "{CASE}", "--session", "{DIR}", "-o", "{NEW:b.pdf}"]),
    ("brief case missing", ["brief", "/nonexistent.nc", "-o", "{NEW:b.pdf}"]),
    ("brief region", ["brief", "{CASE}", "--region", "0,10", "-o", "{NEW:b.pdf}"]),
    ("brief unknown option", ["brief", "{CASE}", "--unknown"]),
    # serve
    ("port negative", ["serve", "--port", "-1"]),
    ("port too large", ["serve", "--port", "99999"]),
    ("port word", ["serve", "--port", "http"]),
    ("port fraction", ["serve", "--port", "80.5"]),
    ("address bad IPv4", ["serve", "--address", "999.1.1.1"]),
    ("address with space", ["serve", "--address", "not a host"]),
    ("address empty", ["serve", "--address", ""]),
    ("address wide without token", ["serve", "--address", "0.0.0.0"]),
    ("IPv6 wide without token", ["serve", "--address", "::"]),
    ("token on command line", ["serve", "--token", "abcdefghijk"]),
    ("password on command line", ["serve", "--password", "abcdefghijk"]),
    ("token file missing", ["serve", "--address", "0.0.0.0", "--token-file", "/nonexistent/token"]),
    ("token file empty", ["serve", "--address", "0.0.0.0", "--token-file", "{F:empty.nc}"]),
    ("token file short", ["serve", "--token-file", "{F:short_token}"]),
    ("port in use", ["serve", "{CASE}", "--port", "{BUSY}"]),
    ("address not on this machine", ["serve", "{CASE}", "--address", "192.0.2.1", "--token-file",
                                     "{F:good_token}"]),
    ("data folder missing", ["serve", "--data-dir", "/nonexistent"]),
    ("output folder missing (serve)", ["serve", "--output-dir", "/nonexistent"]),
    ("serve case missing", ["serve", "/nonexistent.nc"]),
    # batch
    ("local cluster negative", ["batch", "--local-cluster", "-1"]),
    ("local cluster zero", ["batch", "--local-cluster", "0"]),
    ("local cluster word", ["batch", "--local-cluster", "x"]),
    ("scheduler unreachable", ["batch", "{CASE}", "--scheduler", "tcp://127.0.0.1:{CLOSED}",
                               "--connect-timeout", "2"]),
    ("scheduler protocol", ["batch", "--scheduler", "foo://x:1"]),
    ("scheduler no port", ["batch", "--scheduler", "tcp://127.0.0.1"]),
    ("scheduler port range", ["batch", "--scheduler", "tcp://127.0.0.1:99999"]),
    ("scheduler bad host", ["batch", "--scheduler", "tcp://no such host:8786"]),
    ("scheduler and cluster", ["batch", "--scheduler", "tcp://127.0.0.1:8786", "--local-cluster", "2"]),
    ("connect timeout zero", ["batch", "{CASE}", "--connect-timeout", "0"]),
    ("batch output exists", ["batch", "{CASE}", "-o", "{F:exists.csv}"]),
    ("batch target outside", ["batch", "{CASE}", "--target", "100,0,500"]),
    ("batch polygon outside", ["batch", "{CASE}", "--pieces", "{F:pieces_outside.json}"]),
    ("batch times words", ["batch", "{CASE}", "--times", "x..y"]),
    # bench
    ("repeat zero", ["bench", "--repeat", "0"]),
    ("repeat negative", ["bench", "--repeat", "-5"]),
    ("repeat word", ["bench", "--repeat", "many"]),
    ("grid unknown", ["bench", "--grid", "2deg"]),
    # sample
    ("hours negative", ["sample", "--hours", "-3", "-o", "{NEW:s.nc}"]),
    ("hours NaN", ["sample", "--hours", "nan", "-o", "{NEW:s.nc}"]),
    ("sample output folder", ["sample", "-o", "{DIR}"]),
    ("sample folder missing", ["sample", "-o", "/nonexistent/x.nc"]),
    ("sample output exists", ["sample", "-o", "{F:exists.nc}"]),
    ("sample set without value", ["sample", "--set", "hours", "-o", "{NEW:s.nc}"]),
    ("sample set unknown", ["sample", "--set", "nonsense=1", "-o", "{NEW:s.nc}"]),
    ("sample set bad value", ["sample", "--set", "step_minutes=-5", "-o", "{NEW:s.nc}"]),
    ("sample set not a number", ["sample", "--set", "jet_latitude=north", "-o", "{NEW:s.nc}"]),
    ("sample read-only", ["sample", "-o", "{RO}/s.nc"]),
]


def _readonly_folder():
    """A folder no process may create files in (a read-only mount, or /sys where even root cannot)."""
    for cand in ("/sys", "/proc/self"):
        try:
            fd = os.open(os.path.join(cand, ".pvwb-probe"), os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        except OSError:
            return cand
        os.close(fd)
        os.unlink(os.path.join(cand, ".pvwb-probe"))
    return None


@pytest.fixture(scope="module")
def env(tmp_path_factory, small_case_path):
    d = tmp_path_factory.mktemp("badcli")
    files = d / "files"
    files.mkdir()
    (files / "notes.txt").write_text("not a case\n")
    (files / "empty.nc").write_bytes(b"")
    (files / "truncated.nc").write_bytes(Path(small_case_path).read_bytes()[:2000])
    (files / "pieces_bad.json").write_text("{")
    (files / "pieces_notlist.json").write_text("{}")
    (files / "pieces_kind.json").write_text(json.dumps([{"name": "x", "kind": "nope"}]))
    (files / "pieces_numbers.json").write_text("[1, 2]")
    (files / "pieces_outside.json").write_text(json.dumps([
        {"name": "far away", "kind": "interior", "polygon": [[100, 0], [110, 0], [110, 10], [100, 10]]}]))
    (files / "pieces_two.json").write_text(json.dumps([
        {"name": "line", "kind": "interior", "polygon": [[0, 40], [10, 50]]}]))
    for name in ("exists.csv", "exists.pdf", "exists.nc"):
        (files / name).write_text("keep me")
    (files / "short_token").write_text("abc\n")
    (files / "good_token").write_text("a-long-enough-secret\n")
    busy = socket.socket()
    busy.bind(("127.0.0.1", 0))
    busy.listen(1)
    closed = socket.socket()
    closed.bind(("127.0.0.1", 0))
    closed_port = closed.getsockname()[1]
    closed.close()
    out = dict(CASE=str(small_case_path), DIR=str(d / "folder"), FILES=files, NEW=d / "new",
               BUSY=str(busy.getsockname()[1]), CLOSED=str(closed_port), RO=_readonly_folder())
    (d / "folder").mkdir()
    (d / "new").mkdir()
    yield out
    busy.close()
    _write_table()


def _expand(argv, env):
    out = []
    for a in argv:
        if a.startswith("{F:"):
            a = str(env["FILES"] / a[3:-1])
        elif a.startswith("{NEW:"):
            a = str(env["NEW"] / a[5:-1])
        else:
            if "{RO}" in a and env["RO"] is None:
                pytest.skip("no read-only folder on this machine")
            a = a.format(**{k: v for k, v in env.items() if isinstance(v, str)}) if "{" in a else a
        out.append(a)
    return out


@pytest.mark.timeout(90)
@pytest.mark.parametrize("label, argv", BAD, ids=[b[0] for b in BAD])
def test_bad_command_line(label, argv, env, capsys, monkeypatch):
    monkeypatch.delenv("PVWB_TOKEN", raising=False)
    monkeypatch.delenv("PVWB_DEBUG", raising=False)
    argv = _expand(argv, env)
    before = sorted(p.name for p in env["FILES"].iterdir())
    t0 = time.monotonic()
    code = main(argv)
    took = time.monotonic() - t0
    out, err = capsys.readouterr()
    lines = [ln for ln in err.splitlines() if ln.strip() and not ln.startswith("note:")]
    RESULTS[label] = (code, " ".join(lines), took)
    assert "Traceback" not in err + out
    assert code == 2, err
    assert len(lines) == 1, err
    assert lines[0].startswith("pvwb") and "error" in lines[0]
    # nothing was written or left behind; files that existed are untouched
    assert sorted(p.name for p in env["FILES"].iterdir()) == before
    assert list(env["NEW"].iterdir()) == []
    for name in ("exists.csv", "exists.pdf", "exists.nc"):
        assert (env["FILES"] / name).read_text() == "keep me"
    if label == "scheduler unreachable":
        assert took < 15


def test_at_least_seventy_bad_command_lines():
    assert len(BAD) >= 70 and len({b[0] for b in BAD}) == len(BAD)


def test_debug_shows_the_traceback(small_case_path, capsys):
    with pytest.raises(Exception) as info:
        main(["--debug", "invert", str(small_case_path), "--target", "200,50,500"])
    assert "outside the domain" in str(info.value)
    # and without --debug the same error is one line
    assert main(["invert", str(small_case_path), "--target", "200,50,500"]) == 2
    assert "outside the domain" in capsys.readouterr().err


def test_no_space_left_is_one_line(small_case_path, tmp_path, capsys, monkeypatch):
    """A full disk while the table is written (the OS error is raised where the data are flushed)."""
    real_fsync = os.fsync

    def full(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", full)
    out = tmp_path / "table.csv"
    assert main(["invert", str(small_case_path), "--time", "0", "-o", str(out)]) == 2
    monkeypatch.setattr(os, "fsync", real_fsync)
    err = capsys.readouterr().err
    assert "no space left" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_file_size_limit_is_one_line(small_case_path, tmp_path):
    """A real OS refusal in a child process: the file-size limit (EFBIG) while writing the CSV."""
    import subprocess
    import sys

    code = ("import resource, signal, sys; signal.signal(signal.SIGXFSZ, signal.SIG_IGN); "
            "resource.setrlimit(resource.RLIMIT_FSIZE, (100, 100)); "
            "from workbench.cli import main; sys.exit(main(sys.argv[1:]))")
    root = Path(__file__).resolve().parents[1]
    env = dict(os.environ, PYTHONPATH=str(root))
    r = subprocess.run([sys.executable, "-c", code, "invert", str(small_case_path), "--time", "0", "--quiet",
                        "-o", str(tmp_path / "t.csv")], capture_output=True, text=True, env=env, timeout=120)
    lines = [ln for ln in r.stderr.splitlines() if ln.strip() and not ln.startswith("note:")]
    assert r.returncode == 2 and len(lines) == 1 and "too large" in lines[0], r.stderr
    assert list(tmp_path.iterdir()) == []


def _write_table():
    if not RESULTS:
        return
    rows = ["| # | case | command line | exit | message (one line) | s |", "|---|---|---|---|---|---|"]
    for i, (label, argv) in enumerate(BAD, 1):
        if label not in RESULTS:
            continue
        code, msg, took = RESULTS[label]
        cmd = "pvwb " + " ".join(a if len(a) < 40 else a[:37] + "..." for a in argv)
        rows.append(f"| {i} | {label} | `{cmd}` | {code} | {msg.replace('|', '/')[:220]} | {took:.1f} |")
    ARTIFACTS.mkdir(exist_ok=True)
    (ARTIFACTS / "cli_errors.md").write_text("\n".join(rows) + "\n")


def test_progress_bar_only_on_a_terminal_and_for_long_steps(monkeypatch):
    import io
    import sys

    from workbench import cli

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    tty = Terminal()
    monkeypatch.setattr(sys, "stderr", tty)
    for _ in cli.progress(range(6), desc="long step"):
        time.sleep(0.5)  # 3 s in all: the bar appears after about 2 s
    assert "long step" in tty.getvalue() and "6/6" in tty.getvalue()
    quick = Terminal()
    monkeypatch.setattr(sys, "stderr", quick)
    for _ in cli.progress(range(50), desc="quick step"):
        pass
    assert quick.getvalue() == ""
    assert cli.progress_enabled(stream=Terminal()) and not cli.progress_enabled(stream=io.StringIO())
    assert not cli.progress_enabled(quiet=True, stream=Terminal())
    monkeypatch.setattr(cli, "QUIET", True)  # pvwb --quiet CMD
    assert not cli.progress_enabled(stream=Terminal())
