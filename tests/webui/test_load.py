"""Load: 50 clients uploading at once through the API to a real waitress server on
127.0.0.1 over a PostgreSQL ledger (a throwaway cluster, as tests/ledger/conftest.py starts)
lose no row and get no server error."""

from __future__ import annotations

import json
import os
import threading
import urllib.error
import urllib.request
import uuid

import pytest

from fitter.service import accounts, stock

from .webtools import PASSWORD, VA, VG, make_stock

CLIENTS = 50


@pytest.fixture(scope="module")
def pg_url():
    from ledger.conftest import PgCluster, pg_bindir  # tests/ledger/conftest.py: the same throwaway cluster

    bindir = pg_bindir()
    if bindir is None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("PostgreSQL binaries missing (CI must run the load test)")
        pytest.skip("PostgreSQL binaries (initdb, pg_ctl) not found; 'make test' installs them")
    cluster = PgCluster(bindir)
    cluster.start()
    try:
        yield cluster.create_db()
    finally:
        cluster.stop()


def _post_file(url, token, name, data, tube_type="DT"):
    boundary = uuid.uuid4().hex
    body = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"type\"\r\n\r\n{tube_type}\r\n"
            f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; filename=\"{name}\"\r\n"
            f"Content-Type: text/csv\r\n\r\n").encode() + data + f"\r\n--{boundary}--\r\n".encode()
    req = urllib.request.Request(url, data=body, method="POST", headers={
        "Authorization": f"Bearer {token}", "Content-Type": f"multipart/form-data; boundary={boundary}"})
    try:
        with urllib.request.urlopen(req, timeout=600) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as e:
        return e.code, e.read().decode()


@pytest.mark.postgres
def test_fifty_clients_uploading_at_once_lose_no_row_and_get_no_server_error(pg_url, synth, tube_types, write_long,
                                                                             tmp_path):
    import waitress.server

    from web import create_app

    stock.init(pg_url)
    stock.add_type(pg_url, "setup", "DT", VA, VG)
    accounts.add_account(pg_url, "editor1", "editor", PASSWORD)
    token = accounts.new_token(pg_url, "editor1").data["token"]
    files = [make_stock(synth, tube_types, write_long, tmp_path / f"c{k:02d}.csv", n_tubes=1, seed=100 + k,
                        prefix=f"L{k:02d}-").read_bytes() for k in range(CLIENTS)]
    srv = waitress.server.create_server(create_app({"LEDGER": pg_url, "SECRET_KEY": "k"}), host="127.0.0.1", port=0,
                                        threads=8)
    closing = threading.Event()

    def serve():
        try:
            srv.run()
        except OSError:
            # closing the server from this thread ends its loop with EBADF on the closed socket;
            # any other OSError, before the close, is a real failure
            if not closing.is_set():
                raise

    t = threading.Thread(target=serve, daemon=True)
    t.start()
    url = f"http://127.0.0.1:{srv.effective_port}/api/v1/measurements"
    answers = [None] * CLIENTS
    start = threading.Barrier(CLIENTS)

    def client(k):
        start.wait()
        answers[k] = _post_file(url, token, f"c{k:02d}.csv", files[k])

    try:
        threads = [threading.Thread(target=client, args=(k,)) for k in range(CLIENTS)]
        for th in threads:
            th.start()
        for th in threads:
            th.join()
    finally:
        closing.set()
        srv.close()
        t.join(timeout=10)
    assert [a[0] for a in answers] == [201] * CLIENTS, [a for a in answers if a[0] != 201][:3]
    assert all(len(a[1]["units"]) == 2 for a in answers)  # each file: one dual triode
    listed = stock.list_tubes(pg_url, limit=1000).data
    assert listed["total"] == CLIENTS
    assert sorted(t["label"] for t in listed["tubes"]) == [f"L{k:02d}-01" for k in range(CLIENTS)]
    assert all(len(t["sections"]) == 2 and all(s["fitted"] for s in t["sections"]) for t in listed["tubes"])
