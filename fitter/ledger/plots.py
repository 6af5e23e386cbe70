"""Datasheet plots being digitised: store an uploaded image, keep the work in progress, and
record the measurements saved from it (table ``plot_images``, :class:`PlotImageRow`).

The image's bytes are stored exactly as uploaded; the decoding and every check of them is
the digitiser engine's (:func:`fitter.digitise.load_image`), called by the service before
anything is stored.  ``state`` is the work in progress as JSON (axis marks, the plot box,
the curves with their grid voltage and points in image pixels), written whole on every
change, so a reload or another device resumes where the user was.
"""

from __future__ import annotations

from sqlalchemy import func, select

from ..errors import NotFound
from .db import Ledger
from .schema import PlotImageRow, now

__all__ = ["add_plot", "plot_row", "plot_content", "save_state", "add_measurements", "list_plots", "EMPTY_STATE"]

#: the work of a plot nobody has touched yet
EMPTY_STATE = {"marks": [], "box": None, "curves": [], "saved": None}


def _info(r: PlotImageRow, size: int | None = None) -> dict:
    return {"id": r.id, "name": r.name, "sha256": r.sha256, "format": r.format, "width": r.width,
            "height": r.height, "size": size,
            "uploaded_at": r.uploaded_at, "uploaded_by": r.uploaded_by, "updated_at": r.updated_at,
            "state": dict(r.state or EMPTY_STATE), "measurement_ids": list(r.measurement_ids or [])}


def _get(s, plot_id: int, lock: bool = False) -> PlotImageRow:
    # a writer locks the row (PostgreSQL: FOR UPDATE; SQLite's writer holds the database lock
    # anyway), so two changes at once both land: each merges into the state the other left
    r = s.get(PlotImageRow, plot_id, with_for_update=lock)
    if r is None:
        raise NotFound(f"no plot {plot_id} in the ledger", field="id")
    return r


def add_plot(ledger: Ledger, name: str, sha256: str, fmt: str, width: int, height: int, content: bytes,
             who: str) -> int:
    """Store an uploaded image (already checked); returns its id."""

    def run(s):
        t = now()
        r = PlotImageRow(name=name, sha256=sha256, format=fmt, width=int(width), height=int(height),
                         content=bytes(content), uploaded_at=t, uploaded_by=who, updated_at=t,
                         state=dict(EMPTY_STATE), measurement_ids=[])
        s.add(r)
        s.flush()
        return r.id

    return ledger.work(run)


def plot_row(ledger: Ledger, plot_id: int) -> dict:
    """A plot's facts and work in progress (not its bytes): ``{"id", "name", "sha256",
    "format", "width", "height", "size", "uploaded_at", "uploaded_by", "updated_at", "state",
    "measurement_ids"}``."""
    with ledger.read() as s:
        r = _get(s, plot_id)  # the bytes stay in the database (a deferred column): only their length
        size = s.scalar(select(func.length(PlotImageRow.content)).where(PlotImageRow.id == plot_id))
        return _info(r, None if size is None else int(size))


def plot_content(ledger: Ledger, plot_id: int) -> tuple[bytes, str]:
    """(the image's bytes as uploaded, its format)."""
    with ledger.read() as s:
        r = s.execute(select(PlotImageRow.content, PlotImageRow.format).where(PlotImageRow.id == plot_id)).first()
        if r is None:
            raise NotFound(f"no plot {plot_id} in the ledger", field="id")
        return bytes(r[0]), r[1]


def save_state(ledger: Ledger, plot_id: int, **changes) -> dict:
    """Merge ``changes`` (keys of the state: ``marks``, ``box``, ``curves``, ``saved``; JSON-ready,
    already checked) into the work in progress, in one transaction; returns the new state."""
    unknown = set(changes) - set(EMPTY_STATE)
    if unknown:
        raise ValueError(f"not parts of a plot's state: {sorted(unknown)}")

    def run(s):
        r = _get(s, plot_id, lock=True)
        state = {**EMPTY_STATE, **(r.state or {}), **changes}
        r.state = state
        r.updated_at = now()
        return state

    return ledger.work(run)


def add_measurements(ledger: Ledger, plot_id: int, measurement_ids, saved: dict | None = None) -> list:
    """Record measurements saved from the plot (and, given, the state's ``saved`` part: what
    was saved, the fit to draw); returns every measurement id saved from it so far."""

    def run(s):
        r = _get(s, plot_id, lock=True)
        ids = list(r.measurement_ids or [])
        ids += [int(i) for i in measurement_ids if int(i) not in ids]
        r.measurement_ids = ids
        if saved is not None:
            r.state = {**EMPTY_STATE, **(r.state or {}), "saved": saved}
        r.updated_at = now()
        return ids

    return ledger.work(run)


def list_plots(ledger: Ledger, limit: int = 50) -> list:
    """The most recently worked-on plots first (no bytes, no state): ``[{"id", "name",
    "width", "height", "uploaded_at", "uploaded_by", "updated_at", "curves", "saved"}]``."""
    cols = (PlotImageRow.id, PlotImageRow.name, PlotImageRow.width, PlotImageRow.height, PlotImageRow.uploaded_at,
            PlotImageRow.uploaded_by, PlotImageRow.updated_at, PlotImageRow.state, PlotImageRow.measurement_ids)
    with ledger.read() as s:
        rows = s.execute(select(*cols).order_by(PlotImageRow.updated_at.desc(), PlotImageRow.id.desc())
                         .limit(limit)).all()
    return [{"id": r.id, "name": r.name, "width": r.width, "height": r.height, "uploaded_at": r.uploaded_at,
             "uploaded_by": r.uploaded_by, "updated_at": r.updated_at,
             "curves": len((r.state or {}).get("curves") or []), "saved": len(r.measurement_ids or [])}
            for r in rows]
