"""The ledger's tables (SQLAlchemy 2 declarative mapping) and how stored points are laid out.

Nothing is deleted: a tube is retired (``status``), a measurement superseded
(``superseded``), a fit outlived by a newer one (both stay), a grade followed by a later
one, a group released.  Every change also appends an :class:`Event` (who, when, what).

Times are ISO-8601 text in UTC (``2026-12-02T14:00:00.123456+00:00``): the same on SQLite
and PostgreSQL, so a ledger copies between them without loss and sorts as text.

Points (:attr:`Measurement.points`) are the raw points exactly as the reader gave them,
``n_points`` of them, as five little-endian float64 arrays one after the other
(``<f8``, column-major): plate voltage va [V], grid voltage vg [V], plate current ia [A],
grid current ig [A] (NaN throughout when the file has no grid-current column), and the
file line of each point (integers, exact in float64).  :func:`pack_points` /
:func:`unpack_points` are the only code that reads or writes that layout.

The schema is owned by Alembic (:mod:`fitter.ledger.migrations`); :func:`fitter.ledger.migrate.upgrade` brings a
database to the current revision, and a test checks that the migrations build exactly
these tables.
"""

from __future__ import annotations

import datetime as _dt

import numpy as np
from sqlalchemy import (JSON, Boolean, Float, ForeignKey, Index, Integer, LargeBinary, MetaData, String, Text,
                        UniqueConstraint)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

__all__ = ["Base", "TubeType", "Tube", "Section", "SourceFile", "Measurement", "Fit", "Grade", "Group",
           "GroupMember", "Event", "PlotImageRow", "STATUSES", "DATASHEET_MARK", "pack_points", "unpack_points", "data_hash",
           "now", "HEAD"]

#: a tube's life: in stock -> reserved (in a group for an order) -> sold; or retired.  A
#: "reference" is no tube on the shelf: curves read off a datasheet plot, kept as the type's
#: reference (compare, nominal), never matched, graded, reserved or sold
STATUSES = ("in-stock", "reserved", "sold", "retired", "reference")
#: what a measurement's instrument says when its points were read off a datasheet plot
DATASHEET_MARK = "datasheet plot"
#: the Alembic revision this code expects
HEAD = "0005_measurement_data_hash"

_NAMING = {"ix": "ix_%(column_0_label)s", "uq": "uq_%(table_name)s_%(column_0_name)s",
           "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s", "pk": "pk_%(table_name)s"}


def now() -> str:
    """The current time as stored: ISO-8601, UTC, microseconds."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat()


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=_NAMING)


class TubeType(Base):
    """A tube type: its designation, the test position grading uses and the nominal figures
    there (from a datasheet card or the median of the stock), and its limits."""

    __tablename__ = "tube_types"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    designation: Mapped[str] = mapped_column(String(64), unique=True)
    dual: Mapped[bool] = mapped_column(Boolean)  # two triode sections per bottle
    test_va: Mapped[float] = mapped_column(Float)  # test position: plate voltage [V]
    test_vg: Mapped[float] = mapped_column(Float)  # test position: grid voltage [V]
    nominal_ia: Mapped[float | None] = mapped_column(Float)  # [A] at the test position
    nominal_gm: Mapped[float | None] = mapped_column(Float)  # [S] at the test position
    nominal_basis: Mapped[str | None] = mapped_column(Text)  # "datasheet card X" / "median of 24 sections"
    pa_max: Mapped[float | None] = mapped_column(Float)  # plate dissipation limit per section [W]
    vhk_max: Mapped[float | None] = mapped_column(Float)  # heater-cathode voltage limit [V]
    notes: Mapped[str] = mapped_column(Text, default="")
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(64))


class Tube(Base):
    """A bottle: a label the user chose, its type, where it is kept, and its status."""

    __tablename__ = "tubes"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    label: Mapped[str] = mapped_column(String(64), unique=True)
    type_id: Mapped[int] = mapped_column(ForeignKey("tube_types.id"), index=True)
    status: Mapped[str] = mapped_column(String(16), default="in-stock", index=True)
    location: Mapped[str] = mapped_column(Text, default="")
    notes: Mapped[str] = mapped_column(Text, default="")
    created_at: Mapped[str] = mapped_column(String(40))


class Section(Base):
    """One triode section of a bottle (``name`` is "" for a single triode)."""

    __tablename__ = "sections"
    __table_args__ = (UniqueConstraint("tube_id", "name"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    tube_id: Mapped[int] = mapped_column(ForeignKey("tubes.id"), index=True)
    name: Mapped[str] = mapped_column(String(64))


class SourceFile(Base):
    """A file imported into the ledger: its name, its SHA-256 and its bytes exactly as read."""

    __tablename__ = "source_files"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(Text)
    sha256: Mapped[str] = mapped_column(String(64), unique=True)
    size: Mapped[int] = mapped_column(Integer)
    content: Mapped[bytes] = mapped_column(LargeBinary)
    imported_at: Mapped[str] = mapped_column(String(40))
    imported_by: Mapped[str] = mapped_column(String(64))


class Measurement(Base):
    """The raw points of one section from one file (layout: module docstring)."""

    __tablename__ = "measurements"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    section_id: Mapped[int] = mapped_column(ForeignKey("sections.id"), index=True)
    source_id: Mapped[int] = mapped_column(ForeignKey("source_files.id"), index=True)
    n_points: Mapped[int] = mapped_column(Integer)
    points: Mapped[bytes] = mapped_column(LargeBinary)
    has_grid_current: Mapped[bool] = mapped_column(Boolean)
    retest: Mapped[bool] = mapped_column(Boolean)  # the section had been measured before
    measured_at: Mapped[str] = mapped_column(String(40))
    measured_by: Mapped[str] = mapped_column(String(64))
    instrument: Mapped[str] = mapped_column(Text, default="")
    notes: Mapped[str] = mapped_column(Text, default="")
    superseded: Mapped[bool] = mapped_column(Boolean, default=False)
    #: SHA-256 of the measured data alone (:func:`data_hash`): the same points stored under
    #: another tube's label are found by it (an import warns, and stores them all the same)
    data_sha256: Mapped[str | None] = mapped_column(String(64), index=True, nullable=True)


class Fit(Base):
    """One fit of a measurement: everything a model card holds, the figures at the type's
    test position, and the engine version that made it."""

    __tablename__ = "fits"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    measurement_id: Mapped[int] = mapped_column(ForeignKey("measurements.id"), index=True)
    model: Mapped[str] = mapped_column(String(32))
    converged: Mapped[bool] = mapped_column(Boolean)
    failure: Mapped[str | None] = mapped_column(Text)
    params: Mapped[dict] = mapped_column(JSON)  # SI, every parameter of the model
    stderr: Mapped[dict] = mapped_column(JSON)
    free: Mapped[list] = mapped_column(JSON)  # order of the covariance
    covariance: Mapped[list | None] = mapped_column(JSON)
    figures: Mapped[dict] = mapped_column(JSON)  # goodness of fit (a card's "fit")
    valid_range: Mapped[dict | None] = mapped_column(JSON)  # as in a card (va_v, vg_v, ia_ma)
    envelope: Mapped[dict | None] = mapped_column(JSON)  # as in a card
    ia_test: Mapped[float | None] = mapped_column(Float)  # [A] at the type's test position
    gm_test: Mapped[float | None] = mapped_column(Float)  # [S]
    engine_version: Mapped[str] = mapped_column(String(32))
    fitted_at: Mapped[str] = mapped_column(String(40))
    fitted_by: Mapped[str] = mapped_column(String(64))


class Grade(Base):
    """A grade with its basis (figures at the type's test position against nominal)."""

    __tablename__ = "grades"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    tube_id: Mapped[int] = mapped_column(ForeignKey("tubes.id"), index=True)
    grade: Mapped[str] = mapped_column(String(32))
    basis: Mapped[str] = mapped_column(Text)
    thresholds: Mapped[dict] = mapped_column(JSON)
    ia_pct: Mapped[float | None] = mapped_column(Float)  # weakest section's Ia, % of nominal
    gm_pct: Mapped[float | None] = mapped_column(Float)  # weakest section's gm, % of nominal
    balance_pct: Mapped[float | None] = mapped_column(Float)  # sections' difference (dual)
    decided_at: Mapped[str] = mapped_column(String(40))
    decided_by: Mapped[str] = mapped_column(String(64))


class Group(Base):
    """A matched pair, quad or bottle pair, the position and criterion that made it, and the
    order it was reserved or sold for."""

    __tablename__ = "groups"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    kind: Mapped[str] = mapped_column(String(32))  # "section pair", "section quad", "bottle pair"
    status: Mapped[str] = mapped_column(String(16))  # reserved, sold, released
    order_ref: Mapped[str] = mapped_column(Text, default="")
    position: Mapped[dict] = mapped_column(JSON)
    criterion: Mapped[dict] = mapped_column(JSON)
    mismatch_pct: Mapped[float | None] = mapped_column(Float)
    grade: Mapped[str | None] = mapped_column(String(32))
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(64))


class GroupMember(Base):
    __tablename__ = "group_members"
    __table_args__ = (UniqueConstraint("group_id", "tube_id", "section_id"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    group_id: Mapped[int] = mapped_column(ForeignKey("groups.id"), index=True)
    tube_id: Mapped[int] = mapped_column(ForeignKey("tubes.id"), index=True)
    section_id: Mapped[int | None] = mapped_column(ForeignKey("sections.id"))


class Event(Base):
    """The history: every change, appended, with who and when."""

    __tablename__ = "events"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    at: Mapped[str] = mapped_column(String(40))
    who: Mapped[str] = mapped_column(String(64))
    action: Mapped[str] = mapped_column(String(32))
    tube_id: Mapped[int | None] = mapped_column(ForeignKey("tubes.id"), index=True)
    detail: Mapped[str] = mapped_column(Text)


class PlotImageRow(Base):
    """A datasheet plot uploaded to be digitised: the image's bytes exactly as sent, and the
    work in progress (``state``: axis marks, plot box, curves with their grid voltage and
    points in image pixels) so that a reload or another device resumes it.  ``measurement_ids``
    lists the measurements saved from it (:mod:`fitter.ledger.plots`)."""

    __tablename__ = "plot_images"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(Text)
    sha256: Mapped[str] = mapped_column(String(64), index=True)
    format: Mapped[str] = mapped_column(String(8))  # "png" or "jpeg"
    width: Mapped[int] = mapped_column(Integer)
    height: Mapped[int] = mapped_column(Integer)
    content: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)  # read only when the image is asked for
    uploaded_at: Mapped[str] = mapped_column(String(40))
    uploaded_by: Mapped[str] = mapped_column(String(64))
    updated_at: Mapped[str] = mapped_column(String(40))
    state: Mapped[dict] = mapped_column(JSON)
    measurement_ids: Mapped[list] = mapped_column(JSON)


Index("ix_fits_measurement_engine", Fit.measurement_id, Fit.engine_version)

#: every table, parents first (the order of backups, restores and copies)
TABLES = ["tube_types", "tubes", "sections", "source_files", "measurements", "fits", "grades", "groups",
          "group_members", "events", "accounts", "api_tokens", "upload_jobs", "plot_images"]


def pack_points(va, vg, ia, ig, lines) -> bytes:
    """The stored form of a measurement's points (layout: module docstring)."""
    n = len(va)
    ig = np.full(n, np.nan) if ig is None else ig
    lines = np.full(n, np.nan) if lines is None else np.asarray(lines, float)
    return np.concatenate([np.asarray(x, "<f8").reshape(n) for x in (va, vg, ia, ig, lines)]).tobytes()


def data_hash(blob: bytes, n: int) -> str:
    """SHA-256 (hex) of a stored measurement's data: its first four arrays (va, vg, ia, ig) in
    the stored layout, not the file lines; so the same points read from another file (the
    tube's label changed, the rows elsewhere in the file) have the same hash."""
    import hashlib

    return hashlib.sha256(blob[:4 * 8 * n]).hexdigest()


def unpack_points(blob: bytes, n: int) -> dict:
    """``{"va", "vg", "ia", "ig" (None when absent), "lines" (int64)}`` of a stored blob."""
    a = np.frombuffer(blob, "<f8")
    if a.size != 5 * n:
        raise ValueError(f"stored points hold {a.size} numbers, expected 5 x {n}")
    va, vg, ia, ig, lines = (a[k * n:(k + 1) * n].astype(float) for k in range(5))
    return {"va": va, "vg": vg, "ia": ia, "ig": None if np.isnan(ig).all() else ig,
            "lines": lines.astype(np.int64) if np.isfinite(lines).all() else None}
