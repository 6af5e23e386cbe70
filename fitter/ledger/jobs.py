"""Background upload jobs of the web front end, kept in the ledger so that a restart of the
server loses none: a job still queued or running when the server stopped is queued again at
the next start and resumes (files already stored are recognised by their SHA-256 and not
stored twice; each file is all or nothing).

The uploaded files are kept in the job row (``payload``, a zip archive) until the job ends.
"""

from __future__ import annotations

from sqlalchemy import JSON, Integer, LargeBinary, String, Text
from sqlalchemy.orm import Mapped, mapped_column

from .schema import Base

__all__ = ["UploadJob", "JOB_STATES"]

JOB_STATES = ("queued", "running", "done", "failed")


class UploadJob(Base):
    """One upload to fit and store in the background."""

    __tablename__ = "upload_jobs"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    account: Mapped[str] = mapped_column(String(64))
    state: Mapped[str] = mapped_column(String(16), index=True)
    tube_type: Mapped[str] = mapped_column(String(64))
    model: Mapped[str] = mapped_column(String(32))
    instrument: Mapped[str] = mapped_column(Text, default="")
    notes: Mapped[str] = mapped_column(Text, default="")
    files_total: Mapped[int] = mapped_column(Integer)
    files_done: Mapped[int] = mapped_column(Integer, default=0)
    payload: Mapped[bytes | None] = mapped_column(LargeBinary)
    message: Mapped[str] = mapped_column(Text, default="")
    result: Mapped[dict | None] = mapped_column(JSON)
    created_at: Mapped[str] = mapped_column(String(40))
    updated_at: Mapped[str] = mapped_column(String(40))
