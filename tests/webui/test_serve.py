"""`platebook serve` in its own process: it creates the ledger, listens on 127.0.0.1 and
answers with the sign-in page; a port in use is one line naming --port."""

from __future__ import annotations

import socket
import subprocess
import sys
import time
import urllib.request

PLATEBOOK = [sys.executable, "-m", "fitter"]


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get(url, attempts=100):
    for _ in range(attempts):  # the server needs a moment to start; polled, not timed
        try:
            with urllib.request.urlopen(url, timeout=5) as r:
                return r.status, r.read().decode()
        except OSError:
            time.sleep(0.1)
    raise AssertionError(f"no answer from {url}")


def test_serve_answers_on_127_0_0_1_with_the_sign_in_page(tmp_path):
    port = _free_port()
    proc = subprocess.Popen(PLATEBOOK + ["serve", "--db", str(tmp_path / "l.sqlite"), "--port", str(port)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        status, body = _get(f"http://127.0.0.1:{port}/signin")
        assert status == 200 and "Sign in" in body and "CAUTION" in body
    finally:
        proc.terminate()
        out, err = proc.communicate(timeout=30)
    assert f"Platebook on http://127.0.0.1:{port}/" in out
    assert (tmp_path / "l.sqlite").exists()


def test_serve_on_a_port_in_use_is_one_line(tmp_path):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen(1)
        port = s.getsockname()[1]
        r = subprocess.run(PLATEBOOK + ["serve", "--db", str(tmp_path / "l.sqlite"), "--port", str(port)],
                           capture_output=True, text=True, timeout=60)
    assert r.returncode == 1
    assert r.stderr.startswith(f"error: --port: cannot listen on 127.0.0.1:{port}") and r.stderr.count("\n") == 1
