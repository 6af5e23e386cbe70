"""The ledger's use cases on the tables: import, re-test drift, grade, list, match, reserve,
sell, retire, re-fit, history.  (Back-up, restore and copy: :mod:`fitter.ledger.backup`.)

Every function takes an open :class:`~fitter.ledger.db.Ledger` and plain values and returns
plain values (dicts, lists, engine objects); :mod:`fitter.service.stock` wraps them in result
objects for the front ends.  Writes run as one unit of work each (:meth:`Ledger.work`): an
import stores everything or nothing.  Numerics are the engine's (reading, fitting,
small-signal figures, matching); this module only stores and loads.
"""

from __future__ import annotations

import hashlib
import math
import statistics
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from sqlalchemy import func, insert, select, text, update

from .. import __version__
from ..card import card_dict, unit_from_fields
from ..errors import InputError, NotFound
from ..text import plain_text, shown
from .db import Ledger
from .schema import (DATASHEET_MARK, STATUSES, Event, Fit, Grade, Group, GroupMember, Measurement, Section, SourceFile, Tube,
                     TubeType, data_hash, now, pack_points, unpack_points)

#: what a fit row stores of a card (and gives back to :func:`fitter.card.unit_from_fields`)
CARD_FIELDS = ("params", "stderr", "free", "covariance", "valid_range", "envelope")
#: default grading thresholds: a section below this share of nominal Ia or gm is weak [%];
#: a dual bottle whose sections differ by more than this is out of balance [%]
WEAK_PCT = 80.0
#: an import or re-fit of this many units refreshes the planner's statistics (Ledger.analyze)
BULK_ROWS = 100
BALANCE_PCT = 10.0
#: the key of a fit row's ``figures`` holding the outliers' indices (see :func:`fit_fields`)
OUTLIERS_KEY = "outlier_index"


def engine_version() -> str:
    return __version__


def _name(value, field_name, empty=False) -> str:
    return plain_text(value, field_name, empty=empty)


def _event(s, who, action, detail, tube_id=None):
    s.add(Event(at=now(), who=who, action=action, tube_id=tube_id, detail=detail))


# -- tube types -----------------------------------------------------------------


def add_type(ledger: Ledger, designation: str, test_va: float, test_vg: float, dual: bool = True,
             pa_max: float | None = None, vhk_max: float | None = None, nominal_card=None,
             notes: str = "", who: str = "") -> dict:
    """Create a tube type.  ``nominal_card`` (a model card file) sets the nominal figures at
    the test position; without it grading takes the median of the stock."""
    designation = _name(designation, "type")
    for f, v in (("va", test_va), ("vg", test_vg)):
        if not isinstance(v, (int, float)) or not math.isfinite(v):
            raise InputError(f"must be a finite voltage, got {v!r}", field=f)
    if test_va <= 0:
        raise InputError(f"the test position's plate voltage must be positive, got {test_va:g} V", field="va")
    for f, v in (("pa_max", pa_max), ("vhk_max", vhk_max)):
        if v is not None and not (math.isfinite(v) and v > 0):
            raise InputError(f"must be a positive number, got {v!r}", field=f)
    nominal_ia = nominal_gm = basis = None
    if nominal_card is not None:
        from ..card import load_card

        triode = load_card(nominal_card)
        ss = triode.small_signal(test_va, test_vg, check=False)
        if not (ss.ia > 0 and ss.gm > 0):
            raise InputError(f"the card gives no plate current at va {test_va:g} V, vg {test_vg:g} V",
                             field="nominal_card")
        nominal_ia, nominal_gm = ss.ia, ss.gm
        basis = f"datasheet card {shown(Path(nominal_card).name)} ({triode.model.name})"

    def run(s):
        if s.scalar(select(TubeType.id).where(TubeType.designation == designation)) is not None:
            raise InputError(f"type {designation!r} already exists", field="type")
        t = TubeType(designation=designation, dual=bool(dual), test_va=float(test_va), test_vg=float(test_vg),
                     nominal_ia=nominal_ia, nominal_gm=nominal_gm, nominal_basis=basis, pa_max=pa_max,
                     vhk_max=vhk_max, notes=notes or "", created_at=now(), created_by=who)
        s.add(t)
        s.flush()
        _event(s, who, "type", f"type {designation} created: test position va {test_va:g} V, vg {test_vg:g} V"
               + (f"; nominal from {basis}" if basis else ""))
        return type_dict(t)

    return ledger.work(run)


def type_dict(t: TubeType) -> dict:
    return {"type": t.designation, "dual": t.dual, "test_va": t.test_va, "test_vg": t.test_vg,
            "nominal_ia_ma": None if t.nominal_ia is None else 1e3 * t.nominal_ia,
            "nominal_gm_ms": None if t.nominal_gm is None else 1e3 * t.nominal_gm,
            "nominal_basis": t.nominal_basis, "pa_max_w": t.pa_max, "vhk_max_v": t.vhk_max, "notes": t.notes}


def list_types(ledger: Ledger) -> list[dict]:
    with ledger.read() as s:
        return [type_dict(t) for t in s.scalars(select(TubeType).order_by(TubeType.designation))]


def _type(s, designation) -> TubeType:
    t = s.scalar(select(TubeType).where(TubeType.designation == designation))
    if t is None:
        known = s.scalars(select(TubeType.designation).order_by(TubeType.designation)).all()
        raise NotFound(f"no tube type {shown(designation)!r} in the ledger"
                         + (f" (known: {', '.join(known)})" if known else " (add one with 'stock type')"),
                         field="type")
    return t


# -- import ----------------------------------------------------------------------


@dataclass
class ImportOutcome:
    file: str
    sha256: str
    duplicate: bool = False
    tubes_new: list = field(default_factory=list)
    retested: list = field(default_factory=list)
    sections: int = 0
    points: int = 0
    failed: list = field(default_factory=list)  # {"unit", "reason"}
    notes: list = field(default_factory=list)
    #: units whose measured data are already stored under another tube (or come twice in the
    #: file under two labels): {"unit", "same_as": [label:section, ...]}; stored all the same
    same_data: list = field(default_factory=list)


def fit_fields(result, test_va, test_vg) -> dict:
    """The columns of a :class:`Fit` row (less who and when) from an engine
    :class:`~fitter.fit.FitResult`, with the figures at the type's test position."""
    base = {"model": result.model.name, "engine_version": engine_version(), "label": result.label}
    if not result.converged:
        return dict(base, converged=False, failure=result.failure or "fit failed", params={}, stderr={}, free=[],
                    covariance=None, figures={}, valid_range=None, envelope=None)
    triode = result.triode
    card = card_dict(triode, result.figures())
    # the figures only (listing, grading, matching); their error bars are propagated from the
    # covariance when a tube is shown (small_signal), which costs ~1 ms a unit
    ia = float(triode.current(test_va, test_vg))
    gm = float(triode.gradient(test_va, test_vg)[1])

    def num(x):
        return x if math.isfinite(x) else None

    figures = dict(card["fit"])
    # the points the fit left out, so that a plot of the stored fit needs no second fit: their
    # indices into the cleaned unit (fitter.reader.clean_curves of the stored points, which
    # "n_points" counts); kept out of every model card (card_figures)
    outl = result.outliers
    figures[OUTLIERS_KEY] = [] if outl is None else [int(i) for i in np.flatnonzero(outl)]
    return dict(base, converged=True, failure=None, **{k: card[k] for k in CARD_FIELDS}, figures=figures,
                ia_test=num(ia), gm_test=num(gm))


def card_figures(figures) -> dict:
    """A stored fit's goodness-of-fit figures as a model card's "fit" holds them (numbers
    only: the stored outlier indices left out)."""
    return {k: v for k, v in (figures or {}).items() if k != OUTLIERS_KEY}


def stored_outliers(figures, n_points: int):
    """The boolean outlier mask over the ``n_points`` cleaned points of a stored fit, or None
    when the row does not hold one that fits them (rows stored before the outliers were, or
    points cleaned differently by another engine version)."""
    idx = (figures or {}).get(OUTLIERS_KEY)
    if not isinstance(idx, list) or (figures or {}).get("n_points") != n_points:
        return None
    if not all(isinstance(i, int) and not isinstance(i, bool) and 0 <= i < n_points for i in idx):
        return None
    mask = np.zeros(n_points, bool)
    mask[idx] = True
    return mask


def _fit_chunk(args):
    from ..fit import fit_many

    units, model, va, vg = args
    return [fit_fields(rs[0], va, vg) for rs in fit_many(units, [model], processes=1)]


def fit_units(units, model: str, test_va: float, test_vg: float, jobs: int | None = None, progress=None) -> list:
    """Fit every unit with :func:`fitter.fit.fit_many` and turn each result into the columns
    of its :class:`Fit` row, on all cores: each worker fits a chunk and returns the rows
    only (much less to send back than the fit results with their residuals)."""
    import os

    nproc = jobs or os.cpu_count() or 1
    if nproc <= 1 or len(units) < 8:
        out = _fit_chunk((units, model, test_va, test_vg))
        if progress:
            progress(len(units))
        return out
    from ..fit import pool_context

    # forked from a single-threaded process (the command line); from a fork server inside a
    # threaded web server, where forking could copy a lock another thread holds
    ctx = pool_context(preload=("fitter.ledger.store",))
    size = max(1, min(32, len(units) // (4 * nproc)))
    chunks = [(units[k:k + size], model, test_va, test_vg) for k in range(0, len(units), size)]
    out = []
    with ctx.Pool(nproc) as pool:
        for rows in pool.imap(_fit_chunk, chunks):
            out.extend(rows)
            if progress:
                progress(len(rows))
    return out


def _fit_row(fields: dict, who: str, measurement_id: int, fit_id: int) -> dict:
    row = {c.name: None for c in Fit.__table__.columns}
    row.update({k: v for k, v in fields.items() if k != "label"})
    row.update(id=fit_id, measurement_id=measurement_id, fitted_at=now(), fitted_by=who)
    return row


def allocate_ids(s, model, n: int) -> list:
    """``n`` new primary keys of ``model``'s table, for rows inserted in bulk in this
    transaction: from the table's sequence on PostgreSQL; on SQLite the writer holds the
    database lock (BEGIN IMMEDIATE), so the ids above the largest are free."""
    if n == 0:
        return []
    table = model.__tablename__
    if s.get_bind().dialect.name == "postgresql":
        return list(s.execute(text(f"SELECT nextval(pg_get_serial_sequence('{table}', 'id')) "
                                   "FROM generate_series(1, :n)"), {"n": n}).scalars())
    top = s.scalar(select(func.max(model.id))) or 0
    return list(range(top + 1, top + n + 1))


def triode_of(fit: Fit, tube: str, section: str):
    """The :class:`~fitter.triode.FittedTriode` of a stored fit (through the card validator)."""
    d = {k: getattr(fit, k) for k in CARD_FIELDS}
    d.update(model=fit.model, tube=tube, section=section or None)
    unit, _ = unit_from_fields(d, "ledger", f"fit {fit.id}.")
    return unit


def import_file(ledger: Ledger, path, type_designation: str, who: str, instrument: str = "", notes: str = "",
                model: str = "koren", jobs: int | None = None, progress=None) -> ImportOutcome:
    """Read, check and fit a curve file, then store it in one transaction.

    A file whose bytes were imported before (same SHA-256) is recognised and not stored
    again.  A bad file stores nothing: the error lists every problem with file, line and
    column.  A unit whose tube label is known becomes a re-test of that tube.
    """
    from ..models import get_model
    from ..reader import CurveReadError, check_for_model, read_curves

    path = Path(path)
    instrument = plain_text(instrument or "", "instrument", max_len=200, empty=True)
    notes = plain_text(notes or "", "notes", max_len=2000, empty=True)
    # curves read off a datasheet plot make a reference of the type, not a tube in stock
    sheet = DATASHEET_MARK in instrument.lower()
    try:
        raw = path.read_bytes()
    except OSError as e:
        raise InputError(f"cannot read file: {e.strerror or e}", file=shown(path)) from None
    sha = hashlib.sha256(raw).hexdigest()
    out = ImportOutcome(file=shown(path), sha256=sha)
    with ledger.read() as s:
        t = _type(s, type_designation)
        test_va, test_vg, type_id = t.test_va, t.test_vg, t.id
        if s.scalar(select(SourceFile.id).where(SourceFile.sha256 == sha)) is not None:
            out.duplicate = True
            return out
    try:
        m = get_model(model)
    except ValueError as e:
        raise InputError(str(e), field="model") from None
    try:
        read = read_curves([path])
    except CurveReadError as e:
        raise InputError(str(e)) from None  # every issue names its file, line and column
    problems = [i for i in (check_for_model(u, m) for u in read.units) if i]
    if problems:
        raise InputError(str(CurveReadError(problems)))
    if not read.units:
        raise InputError("no units in the file", file=shown(path))
    out.notes = list(read.notes)
    units = read.units  # the points exactly as read (the fit works on a cleaned copy)
    rows = fit_units(units, m.name, test_va, test_vg, jobs, progress)

    def run(s):
        if s.scalar(select(SourceFile.id).where(SourceFile.sha256 == sha)) is not None:
            out.duplicate = True  # a concurrent import of the same bytes got there first
            return out
        src = SourceFile(name=shown(path.name), sha256=sha, size=len(raw), content=raw, imported_at=now(),
                         imported_by=who)
        s.add(src)
        s.flush()
        labels = sorted({u.tube for u in units})
        tubes = {t.label: t for t in s.scalars(select(Tube).where(Tube.label.in_(labels)))}
        new = []
        for label in labels:
            if label in tubes:
                if tubes[label].type_id != type_id:
                    other = s.get(TubeType, tubes[label].type_id).designation
                    raise InputError(f"tube {shown(label)!r} is in the ledger as type {other}, not "
                                     f"{type_designation}; nothing was stored", file=shown(path))
                if (tubes[label].status == "reference") != sheet:
                    raise InputError(
                        f"tube {shown(label)!r} is " + ("a datasheet reference; a measured tube" if not sheet else
                                                        "a tube in the stock; a datasheet plot's curves")
                        + " takes a label of its own; nothing was stored", file=shown(path), field="instrument")
                continue
            tubes[label] = Tube(label=label, type_id=type_id, status="reference" if sheet else "in-stock",
                                location="", notes="", created_at=now())
            new.append(label)
        s.add_all([tubes[k] for k in new])
        s.flush()
        tube_ids = {k: t.id for k, t in tubes.items()}
        secs = {(sec.tube_id, sec.name): sec for sec in s.scalars(
            select(Section).where(Section.tube_id.in_(list(tube_ids.values()))))}
        fresh = []
        for r in units:
            key = (tube_ids[r.tube], r.section or "")
            if key not in secs:
                secs[key] = Section(tube_id=key[0], name=key[1])
                fresh.append(secs[key])
        s.add_all(fresh)
        s.flush()
        measured = set(s.scalars(select(Measurement.section_id).where(
            Measurement.section_id.in_([sec.id for sec in secs.values()]))).all())
        at = now()
        # measurements and fits go in as plain rows (Core executemany), with their ids taken
        # first: the ORM's per-object bookkeeping cost more than the database for 1,000 units
        mids = allocate_ids(s, Measurement, len(units))
        meas = []
        for mid, u in zip(mids, units):
            sec = secs[(tube_ids[u.tube], u.section or "")]
            blob = pack_points(u.va, u.vg, u.ia, u.ig, u.lines)
            meas.append(dict(id=mid, section_id=sec.id, source_id=src.id, n_points=u.n_points,
                             points=blob, has_grid_current=u.ig is not None,
                             retest=sec.id in measured, measured_at=at, measured_by=who, instrument=instrument or "",
                             notes=notes or "", superseded=False, data_sha256=data_hash(blob, u.n_points)))
        out.same_data = _same_data(s, units, [mm["data_sha256"] for mm in meas])
        s.execute(insert(Measurement), meas)
        fids = allocate_ids(s, Fit, len(rows))
        s.execute(insert(Fit), [_fit_row(f, who, mid, fid) for f, mid, fid in zip(rows, mids, fids)])
        retested = sorted({u.tube for u, mm in zip(units, meas) if mm["retest"]})
        copies = {}
        for d in out.same_data:
            copies.setdefault(d["tube"], []).extend(d["same_as"])
        for label in sorted(set(labels)):
            kind = "retest" if label in retested else "import"
            same = sorted(set(copies.get(label, [])))
            _event(s, who, kind, f"{'re-tested' if kind == 'retest' else 'measured'} from {shown(path.name)} "
                   f"(sha256 {sha[:12]})" + (f"; the same measured points as {', '.join(same)}" if same else ""),
                   tube_ids[label])
        out.tubes_new = new
        out.retested = retested
        out.sections = len(units)
        out.points = int(sum(u.n_points for u in units))
        out.failed = [{"unit": f["label"], "reason": f["failure"]} for f in rows if not f["converged"]]
        return out

    done = ledger.work(run)
    if len(units) >= BULK_ROWS:
        ledger.analyze()
    return done


def _same_data(s, units, hashes) -> list:
    """The units whose measured data (:func:`~fitter.ledger.schema.data_hash`) are stored
    already under another tube, or come twice in this import under two tubes' labels:
    ``[{"unit", "tube", "same_as": [label:section, ...]}]`` in the units' order.  The same tube
    measured with the same data again is left alone (a re-test that changed nothing)."""
    def name(tube, section):
        return shown(f"{tube}:{section}" if section else str(tube))

    stored = {}
    wanted = sorted(set(hashes))
    for k in range(0, len(wanted), 500):
        for h, label, sec in s.execute(select(Measurement.data_sha256, Tube.label, Section.name)
                                       .join(Section, Section.id == Measurement.section_id)
                                       .join(Tube, Tube.id == Section.tube_id)
                                       .where(Measurement.data_sha256.in_(wanted[k:k + 500]))):
            stored.setdefault(h, []).append((label, sec))
    here = {}
    for u, h in zip(units, hashes):
        here.setdefault(h, []).append((u.tube, u.section or ""))
    out = []
    for u, h in zip(units, hashes):
        others = sorted({name(t, sec) for t, sec in stored.get(h, []) + here[h] if t != u.tube})
        if others:
            out.append({"unit": name(u.tube, u.section), "tube": u.tube, "same_as": others})
    return out


# -- reading a tube back -----------------------------------------------------------


def _latest_fits(s, tube_ids=None, first=False):
    """{section_id: (Measurement, Fit)} of each section's latest (``first``: earliest)
    non-superseded measurement and its newest fit."""
    pick = func.min if first else func.max
    lm = select(Measurement.section_id.label("sid"), pick(Measurement.id).label("mid")) \
        .where(Measurement.superseded.is_(False)).group_by(Measurement.section_id)
    if tube_ids is not None:
        lm = lm.join(Section, Section.id == Measurement.section_id).where(Section.tube_id.in_(tube_ids))
    lm = lm.subquery()
    lf = select(Fit.measurement_id.label("mid"), func.max(Fit.id).label("fid")).group_by(Fit.measurement_id)
    if tube_ids is not None:  # the fits of those measurements only (SQLite grouped every fit: 40 ms at 10,000)
        lf = lf.where(Fit.measurement_id.in_(select(lm.c.mid)))
    lf = lf.subquery()
    q = select(lm.c.sid, Measurement, Fit).join(Measurement, Measurement.id == lm.c.mid) \
        .join(lf, lf.c.mid == lm.c.mid).join(Fit, Fit.id == lf.c.fid)
    return {sid: (m, f) for sid, m, f in s.execute(q)}


def _tube(s, label, lock=False) -> Tube:
    q = select(Tube).where(Tube.label == label)
    t = s.scalar(q.with_for_update() if lock else q)
    if t is None:
        raise NotFound(f"no tube labelled {shown(label)!r} in the ledger", field="label")
    return t


def _pct_change(now_v, now_e, first_v, first_e):
    """(change [%], one-sigma error [%]) of now against first, errors independent."""
    if not (now_v and first_v) or not (math.isfinite(now_v) and math.isfinite(first_v)) or first_v == 0:
        return None, None
    ratio = now_v / first_v
    rel = [(e / v) ** 2 for e, v in ((now_e, now_v), (first_e, first_v)) if e is not None and math.isfinite(e)]
    err = 100.0 * abs(ratio) * math.sqrt(sum(rel)) if rel else None
    return 100.0 * (ratio - 1.0), err


def tube_detail(ledger: Ledger, label: str) -> dict:
    """A tube with its type, status, sections (latest figures at the test position and drift
    since the first measurement), grades, groups and history."""
    with ledger.read() as s:
        t = _tube(s, label)
        tt = s.get(TubeType, t.type_id)
        secs = s.scalars(select(Section).where(Section.tube_id == t.id).order_by(Section.name)).all()
        latest = _latest_fits(s, [t.id])
        first = _latest_fits(s, [t.id], first=True)
        counts = dict(s.execute(select(Measurement.section_id, func.count(Measurement.id))
                                .where(Measurement.section_id.in_([x.id for x in secs]))
                                .group_by(Measurement.section_id)).all())
        sections = []
        for sec in secs:
            d = {"section": sec.name or None, "measurements": int(counts.get(sec.id, 0))}
            if sec.id in latest:
                m, f = latest[sec.id]
                now_ss = test_figures(f, t.label, sec.name, tt.test_va, tt.test_vg)
                d.update(_fit_summary(f, now_ss))
                # the test point beyond the measured data: its figures are the model's extrapolation
                d["outside"] = (triode_of(f, t.label, sec.name).outside_reason(tt.test_va, tt.test_vg)
                                if f.converged else None)
                d["measured_at"] = m.measured_at
                d["source_id"] = m.source_id
                if sec.id in first and first[sec.id][0].id != m.id:
                    f0 = first[sec.id][1]
                    d["drift"] = drift_of(test_figures(f0, t.label, sec.name, tt.test_va, tt.test_vg), now_ss)
                    d["drift"]["first_measured_at"] = first[sec.id][0].measured_at
            sections.append(d)
        names = {x.id: x.name for x in secs}
        measurements = [{"measurement": m.id, "section": names[m.section_id] or None, "at": m.measured_at,
                         "by": m.measured_by, "source": src, "points": m.n_points, "superseded": m.superseded,
                         "retest": m.retest, "instrument": m.instrument, "notes": m.notes}
                        for m, src in s.execute(select(Measurement, SourceFile.name)
                                                .join(SourceFile, SourceFile.id == Measurement.source_id)
                                                .where(Measurement.section_id.in_(list(names)))
                                                .order_by(Measurement.id))]
        grades = [{"grade": g.grade, "basis": g.basis, "by": g.decided_by, "at": g.decided_at}
                  for g in s.scalars(select(Grade).where(Grade.tube_id == t.id).order_by(Grade.id))]
        groups = [{"group": g.id, "kind": g.kind, "status": g.status, "order": g.order_ref}
                  for g in s.scalars(select(Group).where(Group.id.in_(
                      select(GroupMember.group_id).where(GroupMember.tube_id == t.id))).order_by(Group.id))]
        events = [{"at": e.at, "who": e.who, "action": e.action, "detail": e.detail}
                  for e in s.scalars(select(Event).where(Event.tube_id == t.id).order_by(Event.id))]
        return {"label": t.label, "type": tt.designation, "status": t.status, "location": t.location,
                "notes": t.notes, "test_position": {"va": tt.test_va, "vg": tt.test_vg},
                "sections": sections, "measurements": measurements, "grades": grades, "groups": groups,
                "history": events}


def test_figures(f: Fit, tube: str, section: str, va: float, vg: float):
    """:class:`~fitter.triode.SmallSignal` of a stored fit at the test position (figures
    with error bars from its covariance); None for a failed fit."""
    if not f.converged:
        return None
    return triode_of(f, tube, section).small_signal(va, vg, check=False)


def _fit_summary(f: Fit, ss) -> dict:
    def ma(x):
        return None if x is None or not math.isfinite(x) else 1e3 * x

    d = {"model": f.model, "converged": f.converged, "failure": f.failure, "engine": f.engine_version,
         "fit_id": f.id, "ia_ma": None, "ia_ma_err": None, "gm_ms": None, "gm_ms_err": None}
    if ss is not None:
        d.update(ia_ma=ma(ss.ia), ia_ma_err=ma(ss.ia_err), gm_ms=ma(ss.gm), gm_ms_err=ma(ss.gm_err))
    return d


def drift_of(first, latest) -> dict:
    """Ia and gm at the test position (:class:`~fitter.triode.SmallSignal`), latest against
    first, in percent, with one-sigma error bars from both fits' covariances (independent)."""
    if first is None or latest is None:
        return {"ia_pct": None, "ia_pct_err": None, "gm_pct": None, "gm_pct_err": None}
    ia, ia_e = _pct_change(latest.ia, latest.ia_err, first.ia, first.ia_err)
    gm, gm_e = _pct_change(latest.gm, latest.gm_err, first.gm, first.gm_err)
    return {"ia_pct": ia, "ia_pct_err": ia_e, "gm_pct": gm, "gm_pct_err": gm_e}


# -- listing ---------------------------------------------------------------------

SORTS = ("label", "type", "status", "grade", "created")


def list_tubes(ledger: Ledger, tube_type: str | None = None, grade: str | None = None,
               status: str | None = None, sort: str = "label", descending: bool = False, limit: int = 100,
               offset: int = 0) -> dict:
    """Tubes with their latest figures at the test position and latest grade: one query
    (a page of tubes joined to sections, latest fits and latest grades)."""
    if sort not in SORTS:
        raise InputError(f"unknown sort {sort!r}; sort by {', '.join(SORTS)}", field="sort")
    if status is not None and status not in STATUSES:
        raise InputError(f"unknown status {status!r}; statuses are {', '.join(STATUSES)}", field="status")
    if not (isinstance(limit, int) and 1 <= limit <= 100_000):
        raise InputError(f"must be 1 .. 100000, got {limit!r}", field="limit")
    if not (isinstance(offset, int) and offset >= 0):
        raise InputError(f"must be 0 or more, got {offset!r}", field="offset")
    lg = select(Grade.tube_id.label("tid"), func.max(Grade.id).label("gid")).group_by(Grade.tube_id).subquery()
    page = select(Tube.id.label("tid"), Tube.label, TubeType.designation, Tube.status, Grade.grade) \
        .join(TubeType, TubeType.id == Tube.type_id) \
        .outerjoin(lg, lg.c.tid == Tube.id).outerjoin(Grade, Grade.id == lg.c.gid)
    if tube_type is not None:
        page = page.where(TubeType.designation == tube_type)
    if status is not None:
        page = page.where(Tube.status == status)
    if grade is not None:
        page = page.where(Grade.grade == grade)
    key = {"label": Tube.label, "type": TubeType.designation, "status": Tube.status, "grade": Grade.grade,
           "created": Tube.id}[sort]
    page = page.order_by(key.desc() if descending else key, Tube.label).limit(limit).offset(offset)
    total = select(func.count()).select_from(page.limit(None).offset(None).order_by(None).subquery())
    page = page.subquery()
    lm = select(Measurement.section_id.label("sid"), func.max(Measurement.id).label("mid")) \
        .where(Measurement.superseded.is_(False)).group_by(Measurement.section_id).subquery()
    lf = select(Fit.measurement_id.label("mid"), func.max(Fit.id).label("fid")).group_by(Fit.measurement_id) \
        .subquery()
    q = select(page, Section.name, Fit.ia_test, Fit.gm_test, Fit.converged) \
        .outerjoin(Section, Section.tube_id == page.c.tid).outerjoin(lm, lm.c.sid == Section.id) \
        .outerjoin(lf, lf.c.mid == lm.c.mid).outerjoin(Fit, Fit.id == lf.c.fid)
    order = {"label": page.c.label, "type": page.c.designation, "status": page.c.status,
             "grade": page.c.grade, "created": page.c.tid}[sort]
    q = q.order_by(order.desc() if descending else order, page.c.label, Section.name)
    rows: dict = {}
    with ledger.read() as s:
        if tube_type is not None:
            _type(s, tube_type)
        n = s.scalar(total)
        for tid, label, designation, status_, grade_, name, ia, gm, ok in s.execute(q):
            t = rows.get(tid)
            if t is None:
                t = rows[tid] = {"label": label, "type": designation, "status": status_, "grade": grade_,
                                 "sections": []}
            if name is not None:
                t["sections"].append({"section": name or None, "ia_ma": None if ia is None else 1e3 * ia,
                                      "gm_ms": None if gm is None else 1e3 * gm, "fitted": bool(ok)})
    return {"total": int(n), "offset": offset, "tubes": list(rows.values())}


# -- grading ---------------------------------------------------------------------


def _nominal(s, tt: TubeType, current) -> tuple[float, float, str]:
    if tt.nominal_ia is not None and tt.nominal_gm is not None:
        return tt.nominal_ia, tt.nominal_gm, tt.nominal_basis or "datasheet"
    ia = [f.ia_test for _, f in current.values() if f.converged and f.ia_test and f.ia_test > 0]
    gm = [f.gm_test for _, f in current.values() if f.converged and f.gm_test and f.gm_test > 0]
    if not ia or not gm:
        raise InputError(f"no fitted section of type {tt.designation} to take nominal figures from; "
                         "import measurements or give the type a datasheet card", field="type")
    return statistics.median(ia), statistics.median(gm), f"median of {len(ia)} section(s) in stock"


def grade_type(ledger: Ledger, designation: str, who: str, weak_pct: float = WEAK_PCT,
               balance_pct: float = BALANCE_PCT) -> dict:
    """Grade every in-stock or reserved tube of a type against the nominal figures at the
    type's test position: weak when a section's Ia or gm is below ``weak_pct`` % of nominal,
    out of balance when a dual bottle's sections differ by more than ``balance_pct`` %."""
    for f, v in (("weak_pct", weak_pct), ("balance_pct", balance_pct)):
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise InputError(f"must be a positive percentage, got {v!r}", field=f)

    def run(s):
        tt = _type(s, designation)
        tubes = s.scalars(select(Tube).where(Tube.type_id == tt.id, Tube.status.in_(("in-stock", "reserved")))
                          .order_by(Tube.label)).all()
        ids = [t.id for t in tubes]
        current = _latest_fits(s, ids)
        secs = s.execute(select(Section.id, Section.tube_id, Section.name).where(Section.tube_id.in_(ids))).all()
        by_tube: dict = {}
        for sid, tid, name in secs:
            if sid in current:
                by_tube.setdefault(tid, []).append((name, current[sid][1]))
        ia_nom, gm_nom, basis_nom = _nominal(s, tt, current)
        thresholds = {"weak_pct": weak_pct, "balance_pct": balance_pct}
        out = []
        at = now()
        for t in tubes:
            grade, basis, ia_p, gm_p, bal = grade_tube(sorted(by_tube.get(t.id, []), key=lambda x: x[0]),
                                                      ia_nom, gm_nom, weak_pct, balance_pct)
            basis = f"{basis} (nominal Ia {1e3 * ia_nom:.3g} mA, gm {1e3 * gm_nom:.3g} mA/V at va {tt.test_va:g} V, " \
                    f"vg {tt.test_vg:g} V: {basis_nom})"
            g = Grade(tube_id=t.id, grade=grade, basis=basis, thresholds=thresholds, ia_pct=ia_p, gm_pct=gm_p,
                      balance_pct=bal, decided_at=at, decided_by=who)
            s.add(g)
            _event(s, who, "grade", f"graded {grade}: {basis}", t.id)
            out.append({"label": t.label, "grade": grade, "basis": basis, "ia_pct": ia_p, "gm_pct": gm_p,
                        "balance_pct": bal})
        return {"type": tt.designation, "nominal_ia_ma": 1e3 * ia_nom, "nominal_gm_ms": 1e3 * gm_nom,
                "nominal_basis": basis_nom, "thresholds": thresholds, "tubes": out}

    return ledger.work(run)


def grade_tube(sections, ia_nom, gm_nom, weak_pct, balance_pct):
    """(grade, basis, weakest Ia %, weakest gm %, balance %) of one tube from its sections'
    current fits ``[(name, Fit)]``."""
    good = [(n, f) for n, f in sections if f.converged and f.ia_test and f.gm_test and f.ia_test > 0
            and f.gm_test > 0]
    if not sections:
        return "unmeasured", "no measurement", None, None, None
    if len(good) < len(sections):
        bad = ", ".join(n or "-" for n, f in sections if (n, f) not in good)
        return "no fit", f"no usable fit for section(s) {bad}", None, None, None
    ia = [(100.0 * f.ia_test / ia_nom, n) for n, f in good]
    gm = [(100.0 * f.gm_test / gm_nom, n) for n, f in good]
    ia_min, gm_min = min(ia), min(gm)
    weak = ia_min[0] < weak_pct or gm_min[0] < weak_pct

    def sec(n):
        return f"section {n} " if n else ""

    parts = []
    if gm_min[0] <= ia_min[0]:
        parts.append(f"{sec(gm_min[1])}gm {gm_min[0]:.0f} % of nominal")
        parts.append(f"Ia {ia_min[0]:.0f} %")
    else:
        parts.append(f"{sec(ia_min[1])}Ia {ia_min[0]:.0f} % of nominal")
        parts.append(f"gm {gm_min[0]:.0f} %")
    basis = ", ".join(parts) + (f": weak (below {weak_pct:g} %)" if weak else f": strong enough ({weak_pct:g} % "
                                                                               "or more)")
    bal = None
    grade = "weak" if weak else "good"
    if len(good) >= 2:
        # the sections' largest relative difference, 2|a-b|/(a+b), the matching's measure
        def rel(vals):
            a, b = max(vals), min(vals)
            return 200.0 * (a - b) / (a + b)

        bal = max(rel([f.ia_test for _, f in good]), rel([f.gm_test for _, f in good]))
        if bal > balance_pct:
            basis += f"; sections differ by {bal:.1f} % (limit {balance_pct:g} %): out of balance"
            grade = "weak, unbalanced" if weak else "unbalanced"
        else:
            basis += f"; sections within {bal:.1f} %"
    return grade, basis, ia_min[0], gm_min[0], bal


# -- matching from stock -----------------------------------------------------------


def stock_units(ledger: Ledger, designation: str, statuses=("in-stock",)):
    """(type, [FittedTriode], skipped) of the tubes of a type with the given statuses, from
    their sections' current fits, in label order; sections whose latest fit failed are
    left out (and listed in ``skipped``).  One query, plain columns (no ORM objects)."""
    cols = [getattr(Fit, k) for k in CARD_FIELDS]
    with ledger.read() as s:
        tt = _type(s, designation)
        lm = select(Measurement.section_id.label("sid"), func.max(Measurement.id).label("mid")) \
            .join(Section, Section.id == Measurement.section_id).join(Tube, Tube.id == Section.tube_id) \
            .where(Measurement.superseded.is_(False), Tube.type_id == tt.id, Tube.status.in_(statuses)) \
            .group_by(Measurement.section_id).subquery()
        lf = select(Fit.measurement_id.label("mid"), func.max(Fit.id).label("fid")) \
            .join(lm, lm.c.mid == Fit.measurement_id).group_by(Fit.measurement_id).subquery()
        q = select(Tube.label, Section.name, Fit.id, Fit.model, Fit.converged, *cols) \
            .join(Section, Section.tube_id == Tube.id) \
            .join(lm, lm.c.sid == Section.id).join(lf, lf.c.mid == lm.c.mid).join(Fit, Fit.id == lf.c.fid) \
            .order_by(Tube.label, Section.name)
        units, skipped = [], []
        for row in s.execute(q):
            label, name = row[0], row[1]
            if not row.converged:
                skipped.append({"unit": f"{label}:{name}" if name else label, "reason": "its latest fit failed"})
                continue
            d = dict(zip(CARD_FIELDS, row[5:]))
            d.update(model=row.model, tube=label, section=name or None)
            units.append(unit_from_fields(d, "ledger", f"fit {row.id}.")[0])
        info = type_dict(tt)
        lg = select(Grade.tube_id.label("tid"), func.max(Grade.id).label("gid")) \
            .join(Tube, Tube.id == Grade.tube_id).where(Tube.type_id == tt.id).group_by(Grade.tube_id).subquery()
        info["grades"] = {label: (g, basis) for label, g, basis in s.execute(
            select(Tube.label, Grade.grade, Grade.basis).join(lg, lg.c.tid == Tube.id).join(Grade, Grade.id == lg.c.gid))}
    return info, units, skipped


def reserve(ledger: Ledger, groups, order: str, who: str, kind: str, position: dict, criterion: dict) -> list:
    """Reserve groups of tubes for an order: each group a list of ``(tube label, section or
    None)`` with its mismatch and grade.  Every tube must be in stock; all or nothing."""
    order = _name(order, "order")

    def run(s):
        made = []
        for g in groups:
            members = g["members"]
            labels = sorted({m[0] for m in members})
            # FOR UPDATE: two clerks reserving the same tube at once on PostgreSQL queue here,
            # and the second sees it reserved (SQLite's writer lock does the same)
            tubes = {t.label: t for t in s.scalars(select(Tube).where(Tube.label.in_(labels))
                                                   .order_by(Tube.id).with_for_update())}
            for lab in labels:
                if lab not in tubes:
                    raise InputError(f"no tube labelled {shown(lab)!r}", field="labels")
                if tubes[lab].status != "in-stock":
                    raise InputError(f"tube {shown(lab)} is {tubes[lab].status}, not in stock; nothing was reserved",
                                     field="labels")
            grp = Group(kind=kind, status="reserved", order_ref=order, position=position, criterion=criterion,
                        mismatch_pct=g.get("mismatch_pct"), grade=g.get("grade"), created_at=now(), created_by=who)
            s.add(grp)
            s.flush()
            for lab, sec in members:
                sid = None
                if sec is not None:
                    sid = s.scalar(select(Section.id).where(Section.tube_id == tubes[lab].id, Section.name == sec))
                    if sid is None:
                        raise InputError(f"tube {shown(lab)} has no section {shown(sec)!r}", field="labels")
                s.add(GroupMember(group_id=grp.id, tube_id=tubes[lab].id, section_id=sid))
            s.execute(update(Tube).where(Tube.id.in_([t.id for t in tubes.values()])).values(status="reserved"))
            for lab in labels:
                _event(s, who, "reserve", f"reserved in group {grp.id} ({kind}) for order {order}", tubes[lab].id)
            made.append({"group": grp.id, "order": order, "kind": kind, "tubes": labels,
                         "members": [f"{a}:{b}" if b else a for a, b in members],
                         "mismatch_pct": g.get("mismatch_pct"), "grade": g.get("grade")})
        return made

    return ledger.work(run)


def set_status(ledger: Ledger, labels, status: str, who: str, reason: str = "", order: str | None = None) -> list:
    """Sell or retire tubes (or release them back to stock), all or nothing.  Selling a
    reserved tube sells its group; a sold or retired tube does not come back."""
    if status not in ("sold", "retired", "in-stock"):
        raise InputError(f"unknown status {status!r}", field="status")
    if not labels:
        raise InputError("name at least one tube", field="labels")

    def run(s):
        out = []
        for lab in labels:
            t = _tube(s, lab, lock=True)
            if t.status in ("sold", "retired"):
                raise InputError(f"tube {shown(lab)} is already {t.status}; nothing was changed", field="labels")
            if t.status == "reference":
                raise InputError(f"{shown(lab)} is a datasheet reference, not a tube in stock; nothing was changed",
                                 field="labels")
            if status == "in-stock" and t.status != "reserved":
                raise InputError(f"tube {shown(lab)} is {t.status}, not reserved", field="labels")
            before = t.status
            t.status = status
            gids = s.scalars(select(Group.id).join(GroupMember, GroupMember.group_id == Group.id)
                             .where(GroupMember.tube_id == t.id, Group.status == "reserved")).all()
            if status == "sold" and gids:
                s.execute(update(Group).where(Group.id.in_(gids)).values(status="sold"))
            if status in ("in-stock", "retired") and gids:
                s.execute(update(Group).where(Group.id.in_(gids)).values(status="released"))
            verb = {"sold": "sold", "retired": "retired", "in-stock": "released to stock"}[status]
            detail = f"{verb} (was {before})" + (f" for order {order}" if order else "") + \
                     (f": {reason}" if reason else "")
            _event(s, who, {"sold": "sell", "retired": "retire", "in-stock": "release"}[status], detail, t.id)
            out.append({"label": t.label, "status": status, "was": before})
        return out

    return ledger.work(run)


def edit_tube(ledger: Ledger, label: str, who: str, location: str | None = None, notes: str | None = None) -> dict:
    """Set where a tube is kept and its notes (the history keeps the earlier values)."""
    if location is None and notes is None:
        raise InputError("give a location or notes to set", field="location")

    def run(s):
        t = _tube(s, label, lock=True)
        changes = []
        if location is not None:
            changes.append(f"location {t.location!r} -> {location!r}")
            t.location = plain_text(location, "location", max_len=200, empty=True)
        if notes is not None:
            changes.append(f"notes {t.notes!r} -> {notes!r}")
            t.notes = plain_text(notes, "notes", max_len=2000, empty=True)
        _event(s, who, "edit", "; ".join(changes), t.id)
        return {"label": t.label, "location": t.location, "notes": t.notes}

    return ledger.work(run)


def supersede(ledger: Ledger, measurement_id: int, who: str, reason: str = "") -> dict:
    """Mark a measurement superseded: it stays, with its fits, but no longer gives the
    section's current figures (the section's latest other measurement does)."""
    if not isinstance(measurement_id, int) or measurement_id < 1:
        raise InputError(f"must be a measurement number, got {measurement_id!r}", field="measurement")

    def run(s):
        m = s.get(Measurement, measurement_id)
        if m is None:
            raise NotFound(f"no measurement {measurement_id}", field="measurement")
        if m.superseded:
            raise InputError(f"measurement {measurement_id} is already superseded", field="measurement")
        m.superseded = True
        sec = s.get(Section, m.section_id)
        t = s.get(Tube, sec.tube_id)
        name = f"{t.label}:{sec.name}" if sec.name else t.label
        _event(s, who, "supersede", f"measurement {measurement_id} of {name} superseded"
               + (f": {reason}" if reason else ""), t.id)
        return {"measurement": measurement_id, "unit": name}

    return ledger.work(run)


def history(ledger: Ledger, label: str | None = None, limit: int = 50) -> list:
    with ledger.read() as s:
        q = select(Event, Tube.label).outerjoin(Tube, Tube.id == Event.tube_id)
        if label is not None:
            q = q.where(Event.tube_id == _tube(s, label).id)
        q = q.order_by(Event.id.desc()).limit(limit)
        return [{"at": e.at, "who": e.who, "action": e.action, "tube": lab, "detail": e.detail}
                for e, lab in s.execute(q)][::-1]


def group_labels(ledger: Ledger, group_id: int) -> dict:
    with ledger.read() as s:
        g = s.get(Group, group_id)
        if g is None:
            raise NotFound(f"no group {group_id}", field="group_id")
        rows = s.execute(select(Tube.label, Section.name).join(GroupMember, GroupMember.tube_id == Tube.id)
                         .outerjoin(Section, Section.id == GroupMember.section_id)
                         .where(GroupMember.group_id == g.id).order_by(GroupMember.id)).all()
        return {"group": g.id, "kind": g.kind, "status": g.status, "order": g.order_ref, "grade": g.grade,
                "mismatch_pct": g.mismatch_pct, "position": g.position, "criterion": g.criterion,
                "members": [f"{a}:{b}" if b else a for a, b in rows]}


# -- re-fit ------------------------------------------------------------------------


def refit(ledger: Ledger, designation: str, who: str, model: str = "koren", jobs: int | None = None) -> dict:
    """Fit every non-superseded measurement of a type again with the current engine.  Old
    fits stay (each marked with its engine version); the new ones become current."""
    from ..models import get_model
    from ..reader import CurveSet

    try:
        m = get_model(model)
    except ValueError as e:
        raise InputError(str(e), field="model") from None
    with ledger.read() as s:
        tt = _type(s, designation)
        rows = s.execute(select(Measurement, Tube.label, Section.name, SourceFile.name)
                         .join(Section, Section.id == Measurement.section_id).join(Tube, Tube.id == Section.tube_id)
                         .join(SourceFile, SourceFile.id == Measurement.source_id)
                         .where(Tube.type_id == tt.id, Measurement.superseded.is_(False))
                         .order_by(Measurement.id)).all()
        test_va, test_vg = tt.test_va, tt.test_vg
        units, ids = [], []
        for mm, label, name, src in rows:
            p = unpack_points(mm.points, mm.n_points)
            units.append(CurveSet(label, name or None, p["va"], p["vg"], p["ia"], p["ig"], source=src,
                                  lines=p["lines"]))
            ids.append(mm.id)
    if not units:
        return {"type": designation, "refitted": 0, "failed": [], "engine": engine_version()}
    rows = fit_units(units, m.name, test_va, test_vg, jobs)

    def run(s):
        fids = allocate_ids(s, Fit, len(rows))
        s.execute(insert(Fit), [_fit_row(f, who, mid, fid) for f, mid, fid in zip(rows, ids, fids)])
        _event(s, who, "refit", f"re-fitted {len(ids)} measurement(s) of type {designation} with engine "
               f"{engine_version()} ({m.name})")
        return {"type": designation, "refitted": len(ids), "engine": engine_version(),
                "failed": [{"unit": f["label"], "reason": f["failure"]} for f in rows if not f["converged"]]}

    done = ledger.work(run)
    if len(ids) >= BULK_ROWS:
        ledger.analyze()
    return done


def card_of(ledger: Ledger, label: str, section: str | None = None) -> list:
    """Model cards (dicts) of a tube's sections, from their current fits."""
    with ledger.read() as s:
        t = _tube(s, label)
        latest = _latest_fits(s, [t.id])
        secs = s.scalars(select(Section).where(Section.tube_id == t.id).order_by(Section.name)).all()
        cards = []
        for sec in secs:
            if section is not None and sec.name != section:
                continue
            if sec.id not in latest or not latest[sec.id][1].converged:
                continue
            m, f = latest[sec.id]
            src = s.scalar(select(SourceFile.name).where(SourceFile.id == m.source_id))
            d = card_dict(triode_of(f, t.label, sec.name), card_figures(f.figures), [src])
            d["created"] = f.fitted_at
            d["platebook"] = f.engine_version
            cards.append(d)
        return cards


__all__ = ["add_type", "list_types", "import_file", "tube_detail", "drift_of", "list_tubes", "grade_type",
           "grade_tube", "stock_units", "reserve", "set_status", "edit_tube", "supersede", "history", "group_labels", "refit", "card_of",
           "ImportOutcome"]
