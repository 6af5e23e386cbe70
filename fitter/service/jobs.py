"""Background uploads: submit (files checked at once, fitted and stored later), run, watch,
and recover after a restart.

``submit`` reads and checks every file first (:func:`web_support.validate_uploads`), so a bad
file is still refused at once with file, line and column and nothing queued.  A worker
(:class:`Worker`, a thread of the web server) runs queued jobs one at a time through
:func:`web_support.import_uploads` file by file, updating ``files_done`` as each file is
stored (the progress a page shows).  :func:`recover` at start-up queues again every job a
stopped server left queued or running: resuming is safe, since each file is all or nothing and
a file already stored is recognised by its SHA-256.
"""

from __future__ import annotations

import io
import threading
import zipfile

from sqlalchemy import select

from ..errors import InputError, NotFound
from .stock import _ledger

__all__ = ["submit", "job", "run_next", "recover", "Worker"]


def _pack(files) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
        for k, (name, data) in enumerate(files):
            z.writestr(f"{k:04d}", data)
            z.writestr(f"{k:04d}.name", str(name).encode("utf-8", "replace"))
    return buf.getvalue()


def _unpack(blob) -> list:
    with zipfile.ZipFile(io.BytesIO(blob)) as z:
        keys = sorted(n for n in z.namelist() if not n.endswith(".name"))
        return [(z.read(k + ".name").decode("utf-8"), z.read(k)) for k in keys]


def submit(db, user, files, tube_type, model="koren", instrument="", notes="") -> int:
    """Check the files now and queue them; the job's id.  Raises
    :class:`web_support.UploadError` (every problem) or :class:`InputError` (a field)."""
    from ..ledger.jobs import UploadJob
    from ..ledger.schema import now
    from ..ledger.store import _type
    from ..models import get_model
    from . import web_support

    files = list(files)
    if not files:
        raise InputError("choose at least one file", field="file")
    try:
        model = get_model(model).name
    except ValueError as e:
        raise InputError(str(e), field="model") from None
    errors = web_support.validate_uploads(files, model)
    if errors:
        raise web_support.UploadError(errors)
    with _ledger(db) as ledger:
        with ledger.read() as s:
            _type(s, tube_type)

        def run(s):
            j = UploadJob(account=user, state="queued", tube_type=tube_type, model=model, instrument=instrument or "",
                          notes=notes or "", files_total=len(files), files_done=0, payload=_pack(files), message="",
                          result=None, created_at=now(), updated_at=now())
            s.add(j)
            s.flush()
            return j.id

        return ledger.work(run)


def job(db, job_id) -> dict:
    """A job's state, progress, message and (when done) result."""
    from ..ledger.jobs import UploadJob

    with _ledger(db) as ledger, ledger.read() as s:
        j = s.get(UploadJob, job_id)
        if j is None:
            raise NotFound(f"no upload job {job_id}", field="job")
        return {"id": j.id, "account": j.account, "state": j.state, "type": j.tube_type, "model": j.model,
                "files_total": j.files_total, "files_done": j.files_done, "message": j.message,
                "result": j.result, "created_at": j.created_at, "updated_at": j.updated_at}


def _set(ledger, job_id, **values):
    from ..ledger.jobs import UploadJob
    from ..ledger.schema import now

    def run(s):
        j = s.get(UploadJob, job_id)
        for k, v in values.items():
            setattr(j, k, v)
        j.updated_at = now()

    ledger.work(run)


def run_next(db) -> int | None:
    """Run the oldest queued job to its end (done or failed); its id, or None when none waits."""
    from ..ledger.jobs import UploadJob
    from . import web_support

    with _ledger(db) as ledger:
        def claim(s):
            j = s.scalar(select(UploadJob).where(UploadJob.state == "queued").order_by(UploadJob.id).limit(1))
            if j is None:
                return None
            j.state = "running"
            return j.id, j.account, j.tube_type, j.model, j.instrument, j.notes, j.payload

        got = ledger.work(claim)
        if got is None:
            return None
        job_id, user, tube_type, model, instrument, notes, payload = got
        files = _unpack(payload)
        units, per_file, warnings, failed = [], [], [], False
        try:
            for k, f in enumerate(files):
                r = web_support.import_uploads(db, user, [f], tube_type, model, instrument, notes)
                units += r["units"]
                per_file += r["files"]
                warnings += r["warnings"]
                failed = failed or r["failed"]
                _set(ledger, job_id, files_done=k + 1)
        except InputError as e:
            _set(ledger, job_id, state="failed", payload=None, message=str(e),
                 result={"units": units, "files": per_file, "warnings": warnings})
            return job_id
        except Exception:
            _set(ledger, job_id, state="failed", message="an internal error stopped the job; the files stored "
                 "before it stay", result={"units": units, "files": per_file, "warnings": warnings})
            raise
        _set(ledger, job_id, state="done", payload=None, message="some fits failed (measurements stored)" if failed
             else "", result={"units": units, "files": per_file, "warnings": warnings})
        return job_id


def recover(db) -> int:
    """Queue again the jobs a stopped server left running; how many."""
    from ..ledger.jobs import UploadJob
    from ..ledger.schema import now

    def run(s):
        js = s.scalars(select(UploadJob).where(UploadJob.state == "running")).all()
        for j in js:
            j.state, j.message, j.updated_at = "queued", "resumed after a server restart", now()
        return len(js)

    with _ledger(db) as ledger:
        return ledger.work(run)


class Worker:
    """A thread running queued jobs, polling every ``interval`` seconds until stopped."""

    def __init__(self, db, interval: float = 1.0):
        self.db, self.interval = db, interval
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="platebook-jobs", daemon=True)

    def start(self):
        recover(self.db)
        self._thread.start()
        return self

    def _loop(self):
        while not self._stop.is_set():
            try:
                ran = run_next(self.db)
            except Exception:  # a database hiccup: try again at the next poll
                ran = None
            if ran is None:
                self._stop.wait(self.interval)

    def stop(self):
        self._stop.set()
        self._thread.join(timeout=30)
