"""The served page's token: where it comes from, and slowing down repeated failed logins.

The end-to-end tests start a real `pvwb serve` process and talk HTTP to its login page.
"""
from __future__ import annotations

import http.client
import os
import subprocess
import sys
import time
import urllib.parse
from pathlib import Path

import pytest

from workbench.app import LoginThrottle, main as serve_main, read_token
from workbench.errors import InputError
from workbench.testing import free_port

ROOT = Path(__file__).resolve().parents[1]
TOKEN = "correct-horse-battery-42"


# --------------------------------------------------------------------------- unit level


def test_throttle_locks_out_after_five_failures_with_doubling_waits():
    now = [1000.0]
    th = LoginThrottle(free=5, base_s=1.0, max_s=30.0, clock=lambda: now[0])
    for _ in range(4):
        assert th.failed("10.0.0.1") == 0.0
    assert th.failed("10.0.0.1") == 1.0           # 5th failure: 1 s
    assert th.wait_s("10.0.0.1") == 1.0
    assert th.wait_s("10.0.0.2") == 0.0           # per client
    now[0] += 1.0
    assert th.failed("10.0.0.1") == 2.0           # then 2, 4, 8, 16, capped at 30
    waits = []
    for _ in range(5):
        now[0] += 100.0
        waits.append(th.failed("10.0.0.1"))
    assert waits == [4.0, 8.0, 16.0, 30.0, 30.0]
    th.succeeded("10.0.0.1")
    assert th.wait_s("10.0.0.1") == 0.0 and th.failed("10.0.0.1") == 0.0


def test_token_sources(tmp_path):
    assert read_token(environ={}) is None
    assert read_token(environ={"PVWB_TOKEN": f"  {TOKEN}\n"}) == TOKEN
    f = tmp_path / "token"
    f.write_text(TOKEN + "\n# comment lines after the first are ignored\n")
    assert read_token(f, environ={"PVWB_TOKEN": "ignored-when-a-file-is-given"}) == TOKEN
    with pytest.raises(InputError, match="too short"):
        read_token(environ={"PVWB_TOKEN": "abc"})
    (tmp_path / "empty").write_text("\n")
    with pytest.raises(InputError, match="holds no token"):
        read_token(tmp_path / "empty", environ={})
    with pytest.raises(InputError, match="cannot be read"):
        read_token(tmp_path / "missing", environ={})
    with pytest.raises(InputError, match="cannot be read"):
        read_token(tmp_path, environ={})


def test_token_on_the_command_line_is_refused(capsys, monkeypatch):
    monkeypatch.delenv("PVWB_TOKEN", raising=False)
    assert serve_main(["--token", TOKEN]) == 2
    err = capsys.readouterr().err
    assert "process list" in err and TOKEN not in err and len(err.strip().splitlines()) == 1
    assert serve_main(["--address", "0.0.0.0"]) == 2
    assert "PVWB_TOKEN" in capsys.readouterr().err


# --------------------------------------------------------------------------- the real server


def _start(tmp_path, case, env_token=None, args=()):
    port = free_port()
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    env.pop("PVWB_TOKEN", None)
    if env_token:
        env["PVWB_TOKEN"] = env_token
    log = open(tmp_path / "server.log", "w")
    proc = subprocess.Popen([sys.executable, "-m", "workbench.cli", "serve", str(case), "--port", str(port),
                             *args], cwd=str(tmp_path), env=env, stdout=log, stderr=subprocess.STDOUT)
    t0 = time.time()
    while True:
        if proc.poll() is not None:
            raise RuntimeError((tmp_path / "server.log").read_text()[-2000:])
        try:
            status, _, _ = _request(port, "GET", "/login")
            if status == 200:
                return proc, port, log
        except OSError:
            pass
        if time.time() - t0 > 90:
            proc.kill()
            raise RuntimeError("server did not answer")
        time.sleep(0.3)


def _stop(proc, log):
    proc.terminate()
    try:
        proc.wait(20)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
    log.close()


def _request(port, method, path, body=None, cookie=None):
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    headers = {}
    if body is not None:
        body = urllib.parse.urlencode(body)
        headers["Content-Type"] = "application/x-www-form-urlencoded"
    if cookie:
        headers["Cookie"] = cookie
    conn.request(method, path, body=body, headers=headers)
    r = conn.getresponse()
    data = r.read()
    out = (r.status, r.msg, data.decode("utf-8", "replace"))
    conn.close()
    return out


def _login(port, password):
    return _request(port, "POST", "/login", {"username": "forecaster", "password": password})


@pytest.mark.slow
def test_served_app_token_from_env_and_login_throttling(tmp_path, small_case_path):
    proc, port, log = _start(tmp_path, small_case_path, env_token=TOKEN)
    try:
        # the token is nowhere in the process's command line (what `ps` shows every user)
        cmdline = Path(f"/proc/{proc.pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
        assert TOKEN not in cmdline and "serve" in cmdline
        # without a login the page redirects to the login page
        status, headers, _ = _request(port, "GET", "/")
        assert status in (302, 303) and "login" in headers.get("Location", "")
        # five wrong tokens are answered normally (back to the login page with a message)
        for _ in range(5):
            status, headers, _ = _login(port, "wrong-token-123")
            assert status in (302, 303) and "error=" in headers["Location"]
        # then the client is locked out: 100 more attempts are all refused without a check,
        # the right token included
        results = [_login(port, "wrong-token-123")[0] for _ in range(100)]
        assert results == [429] * 100
        status, headers, text = _login(port, TOKEN)
        assert status == 429 and int(headers["Retry-After"]) >= 1 and "Too many failed logins" in text
        time.sleep(1.2)
        # after the lockout, the right token logs in and the page is served
        status, headers, _ = _login(port, TOKEN)
        assert status in (302, 303), status
        cookie = "; ".join(c.split(";")[0] for c in headers.get_all("Set-Cookie"))
        assert "user=" in cookie
        status, _, text = _request(port, "GET", "/", cookie=cookie)
        assert status == 200 and "PV Workbench" in text
        # a wrong token now starts a fresh count (the success cleared the record)
        assert _login(port, "wrong-token-123")[0] in (302, 303)
    finally:
        _stop(proc, log)
    assert TOKEN not in (tmp_path / "server.log").read_text()


@pytest.mark.slow
def test_served_app_token_from_file(tmp_path, small_case_path):
    token_file = tmp_path / "token.txt"
    token_file.write_text(TOKEN + "\n")
    token_file.chmod(0o600)
    proc, port, log = _start(tmp_path, small_case_path, args=["--token-file", str(token_file)])
    try:
        assert _login(port, "not-the-token")[0] in (302, 303)
        status, headers, _ = _login(port, TOKEN)
        assert status in (302, 303) and "error=" not in headers.get("Location", "")
        assert any(c.startswith("user=") for c in headers.get_all("Set-Cookie"))
    finally:
        _stop(proc, log)
