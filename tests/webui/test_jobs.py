"""Background uploads: a large upload becomes a job with visible progress; a bad file is still
refused at once; a job a stopped server left running resumes without storing anything twice;
the worker thread runs queued jobs."""

from __future__ import annotations

import io
import time

from fitter.ledger.db import open_ledger
from fitter.ledger.jobs import UploadJob
from fitter.service import jobs, stock, web_support

from .webtools import csrf_of, make_stock, sign_in


def _files(synth, tube_types, write_long, tmp_path):
    a = make_stock(synth, tube_types, write_long, tmp_path / "a.csv", n_tubes=1, seed=21, prefix="JA")
    b = make_stock(synth, tube_types, write_long, tmp_path / "b.csv", n_tubes=2, seed=22, prefix="JB")
    return [("a.csv", a.read_bytes()), ("b.csv", b.read_bytes())]


def test_a_large_upload_becomes_a_job_with_progress(fresh, synth, tube_types, write_long, tmp_path):
    from web import create_app

    app = create_app({"LEDGER": fresh, "SECRET_KEY": "k", "BACKGROUND_BYTES": 100})  # every upload is "large"
    c = app.test_client()
    assert sign_in(c, "editor1").status_code == 302
    files = _files(synth, tube_types, write_long, tmp_path)
    tok = csrf_of(c.get("/upload").get_data(as_text=True))
    r = c.post("/upload", data={"csrf_token": tok, "type": "DT", "model": "koren",
                                "file": [(io.BytesIO(b), n) for n, b in files]}, content_type="multipart/form-data")
    assert r.status_code == 302 and "/jobs/" in r.headers["Location"]
    page = c.get(r.headers["Location"]).get_data(as_text=True)
    assert "queued" in page and "0 of 2 file(s)" in page and 'http-equiv="refresh"' in page
    assert stock.list_tubes(fresh).data["total"] == 0  # nothing stored before the worker runs
    job_id = jobs.run_next(fresh)
    page = c.get(f"/jobs/{job_id}").get_data(as_text=True)
    assert "done" in page and "2 of 2 file(s)" in page and 'http-equiv="refresh"' not in page
    assert stock.list_tubes(fresh).data["total"] == 3
    assert jobs.run_next(fresh) is None  # nothing else waits


def test_a_bad_file_is_refused_at_once_and_no_job_is_queued(fresh, synth, tube_types, write_long, tmp_path):
    files = _files(synth, tube_types, write_long, tmp_path)
    bad = files[1][1].replace(b"\nJB01,A,", b"\nJB01,A,x", 1)
    try:
        jobs.submit(fresh, "ann", [files[0], ("b.csv", bad)], "DT")
        raise AssertionError("a bad file was queued")
    except web_support.UploadError as e:
        assert e.errors[0]["file"] == "b.csv" and e.errors[0]["line"]
    assert jobs.run_next(fresh) is None


def test_a_job_left_running_by_a_stopped_server_resumes_and_stores_nothing_twice(fresh, synth, tube_types,
                                                                                write_long, tmp_path):
    files = _files(synth, tube_types, write_long, tmp_path)
    job_id = jobs.submit(fresh, "ann", files, "DT")
    # the server stopped after storing the first file: the job row says running, 1 file done
    web_support.import_uploads(fresh, "ann", files[:1], "DT")
    led = open_ledger(fresh)
    led.work(lambda s: setattr(s.get(UploadJob, job_id), "state", "running"))
    led.close()
    assert jobs.recover(fresh) == 1
    assert jobs.job(fresh, job_id)["state"] == "queued"
    assert jobs.run_next(fresh) == job_id
    d = jobs.job(fresh, job_id)
    assert d["state"] == "done" and d["files_done"] == 2
    assert [f["duplicate"] for f in d["result"]["files"]] == [True, False]  # the first was recognised
    assert stock.list_tubes(fresh).data["total"] == 3  # 1 + 2 tubes, none twice


def test_the_worker_thread_runs_queued_jobs(fresh, synth, tube_types, write_long, tmp_path):
    files = _files(synth, tube_types, write_long, tmp_path)
    w = jobs.Worker(fresh, interval=0.05).start()
    try:
        job_id = jobs.submit(fresh, "ann", files[:1], "DT")
        for _ in range(1200):  # wait for the state, not for a time: at most 60 s of polling
            if jobs.job(fresh, job_id)["state"] in ("done", "failed"):
                break
            time.sleep(0.05)
    finally:
        w.stop()
    assert jobs.job(fresh, job_id)["state"] == "done"
    assert stock.list_tubes(fresh).data["total"] == 1


def test_a_job_that_stores_relabelled_curves_shows_the_warning(fresh, synth, tube_types, write_long, tmp_path):
    from web import create_app

    files = _files(synth, tube_types, write_long, tmp_path)
    copy = ("c.csv", files[0][1].replace(b"JA01", b"JC05"))  # a.csv's points under another label
    job_id = jobs.submit(fresh, "ann", [files[0], copy], "DT")
    assert jobs.run_next(fresh) == job_id
    d = jobs.job(fresh, job_id)
    assert d["state"] == "done" and stock.list_tubes(fresh).data["total"] == 2  # stored all the same
    assert d["result"]["warnings"][0].startswith("c.csv: JC05:A: the same measured points as JA01:A")
    c = create_app({"LEDGER": fresh, "SECRET_KEY": "k"}).test_client()
    assert sign_in(c, "editor1").status_code == 302
    assert "JC05:A: the same measured points as JA01:A" in c.get(f"/jobs/{job_id}").get_data(as_text=True)
