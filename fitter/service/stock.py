"""The stock ledger's use cases, for every front end.

Each function takes plain fields (``db``: the ledger's URL or None for the default,
``user``: who acts, and the use case's own fields) and returns a result object with
``to_dict()`` (JSON-ready, carrying :data:`fitter.CAUTION`) and ``text()`` (the readable
report).  Errors are :class:`fitter.errors.InputError` naming the field; a database that
cannot be reached is a :class:`fitter.ledger.db.LedgerError` (an InputError on ``db``)
whose message never holds a password.

The ledger is opened per call (stateless: several processes or web workers can share one
PostgreSQL ledger) and closed at the end.
"""

from __future__ import annotations

from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Callable

from .. import CAUTION
from ..errors import InputError
from ..text import shown

__all__ = ["Result", "init", "add_type", "types", "import_files", "list_tubes", "show_tube", "grade", "match",
           "reserve", "labels", "set_status", "edit", "supersede", "refit", "history", "backup", "restore", "copy"]


@dataclass(frozen=True)
class Result:
    """A use case's outcome: ``kind`` names it, ``data`` holds it (JSON-ready), ``lines``
    the readable report; ``failed`` is True when a fit failed (the CLI exits 2).

    A large result (a listing of 10,000 tubes, a match) gives ``make_data`` / ``make_lines``
    instead: functions that build the data or the report when, and only if, asked for."""

    kind: str
    given_data: dict | None = None
    given_lines: tuple = ()
    failed: bool = False
    make_data: Callable[[], dict] | None = field(default=None, repr=False, compare=False)
    make_lines: Callable[[], list] | None = field(default=None, repr=False, compare=False)

    @property
    def data(self) -> dict:
        if self.given_data is None and self.make_data is not None:
            object.__setattr__(self, "given_data", self.make_data())
        return self.given_data

    @property
    def lines(self) -> tuple:
        if not self.given_lines and self.make_lines is not None:
            object.__setattr__(self, "given_lines", tuple(self.make_lines()))
        return self.given_lines

    def to_dict(self) -> dict:
        return {"result": self.kind, **self.data, "caution": CAUTION}

    def text(self) -> str:
        return "\n".join(list(self.lines) + [CAUTION])


def connect(db=None):
    """Open the ledger once for a long-running front end (the web server), its schema brought
    up to date once; pass the result as ``db`` to every use case, which then neither opens nor
    closes it.  Opening per call costs an engine, a schema check and SQLAlchemy's compiled-query
    cache each time (about 6 ms and 40 % of a page's CPU, measured)."""
    from ..ledger.db import open_ledger

    return open_ledger(db, upgrade=True)


@contextmanager
def _ledger(db, upgrade=True):
    from ..ledger.db import Ledger, open_ledger

    if isinstance(db, Ledger):  # opened once by connect(): the front end keeps it
        yield db
        return
    ledger = open_ledger(db, upgrade=upgrade)
    try:
        yield ledger
    finally:
        ledger.close()


def _user(user) -> str:
    if not isinstance(user, str) or not user.strip():
        raise InputError("say who you are (a name for the history)", field="user")
    from ..text import plain_text

    return plain_text(user.strip(), "user")


def _f(x, spec=".4g", unit=""):
    return "-" if x is None else f"{x:{spec}}{unit}"


def _pm(v, e, spec=".2f"):
    if v is None:
        return "-"
    return f"{v:+{spec}}" + (f" ± {e:{spec[:-1]}f}" if e is not None else "") + " %"


# -- set-up ---------------------------------------------------------------------


def init(db=None) -> Result:
    """Create the ledger (or bring its schema up to date)."""
    from ..ledger.db import open_ledger
    from ..ledger.migrate import upgrade
    from ..ledger.schema import HEAD

    ledger = open_ledger(db, upgrade=False)
    try:
        changed = upgrade(ledger)
        where = ledger.describe()
    finally:
        ledger.close()
    return Result("init", {"db": where, "schema": HEAD, "created_or_upgraded": changed},
                  (f"ledger {where}: schema {HEAD}" + (" (created or upgraded)" if changed else " (up to date)"),))


def add_type(db=None, user="", designation="", va=None, vg=None, dual=True, pa_max=None, vhk_max=None,
             nominal_card=None, notes="") -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        d = store.add_type(ledger, designation, va, vg, dual, pa_max, vhk_max, nominal_card, notes, _user(user))
    nom = (f"nominal Ia {d['nominal_ia_ma']:.4g} mA, gm {d['nominal_gm_ms']:.4g} mA/V ({d['nominal_basis']})"
           if d["nominal_ia_ma"] is not None else "nominal figures: the median of the stock when grading")
    return Result("type", d, (f"type {d['type']} ({'dual' if d['dual'] else 'single'} triode): test position "
                              f"va {d['test_va']:g} V, vg {d['test_vg']:g} V; {nom}",))


def types(db=None) -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        rows = store.list_types(ledger)
    lines = [f"{'type':<14}{'kind':<8}{'test va':>9}{'test vg':>9}{'Ia nom mA':>11}{'gm nom mA/V':>13}  basis"]
    for d in rows:
        lines.append(f"{shown(d['type']):<14}{'dual' if d['dual'] else 'single':<8}{d['test_va']:>9g}{d['test_vg']:>9g}"
                     f"{_f(d['nominal_ia_ma']):>11}{_f(d['nominal_gm_ms']):>13}  {d['nominal_basis'] or 'median of stock'}")
    return Result("types", {"types": rows}, tuple(lines))


# -- import ---------------------------------------------------------------------


def same_data_warning(d) -> str:
    """The warning for a unit whose measured points are stored under another tube already
    (``ImportOutcome.same_data`` entry): it is stored all the same, a label may change on purpose."""
    return (f"{d['unit']}: the same measured points as {', '.join(d['same_as'])}; stored all the same "
            "(a re-labelled copy of the same curves?)")


def import_files(db=None, user="", paths=(), tube_type="", instrument="", notes="", model="koren",
                 jobs=None) -> Result:
    """Import curve files, each all or nothing; a re-test of a known tube shows its drift."""
    from ..ledger import store

    if not paths:
        raise InputError("name at least one file", field="files")
    who = _user(user)
    files, lines, failed = [], [], False
    with _ledger(db) as ledger:
        for p in paths:
            o = store.import_file(ledger, p, tube_type, who, instrument, notes, model, jobs)
            d = {"file": o.file, "sha256": o.sha256, "duplicate": o.duplicate, "new_tubes": o.tubes_new,
                 "retested": o.retested, "sections": o.sections, "points": o.points, "failed": o.failed,
                 "notes": o.notes, "drift": {}, "same_data": o.same_data,
                 "warnings": [same_data_warning(x) for x in o.same_data]}
            if o.duplicate:
                lines.append(f"{o.file}: already in the ledger (same SHA-256 {o.sha256[:12]}...); not stored again")
                files.append(d)
                continue
            lines.append(f"{o.file}: {o.sections} section(s), {o.points} points; {len(o.tubes_new)} new tube(s), "
                         f"{len(o.retested)} re-tested")
            for label in o.retested:
                t = store.tube_detail(ledger, label)
                d["drift"][label] = {s["section"] or "": s.get("drift") for s in t["sections"]}
                for s in t["sections"]:
                    if s.get("drift"):
                        dr = s["drift"]
                        name = f"{label}:{s['section']}" if s["section"] else label
                        lines.append(f"  re-test {shown(name)}: drift since {dr['first_measured_at'][:10]} at "
                                     f"va {t['test_position']['va']:g} V, vg {t['test_position']['vg']:g} V: "
                                     f"Ia {_pm(dr['ia_pct'], dr['ia_pct_err'])}, gm {_pm(dr['gm_pct'], dr['gm_pct_err'])}")
            for f in o.failed:
                failed = True
                lines.append(f"  fit failed: {shown(f['unit'])}: {shown(f['reason'])} (measurement stored)")
            for w in d["warnings"]:
                lines.append(f"  warning: {w}")
            for n in o.notes:
                lines.append(f"  note: {shown(n)}")
            files.append(d)
        retries = ledger.retries
    return Result("import", {"files": files, "retries": retries}, tuple(lines), failed)


# -- reading ------------------------------------------------------------------------


def list_tubes(db=None, tube_type=None, grade=None, status=None, sort="label", descending=False, limit=100,
               offset=0) -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        d = store.list_tubes(ledger, tube_type, grade, status, sort, descending, limit, offset)
    return Result("list", d, make_lines=lambda: _list_lines(d, offset))


def _list_lines(d, offset):
    lines = [f"{'tube':<14}{'type':<10}{'status':<10}{'sect':<6}{'Ia mA':>9}{'gm mA/V':>9}  grade"]
    for t in d["tubes"]:
        secs = t["sections"] or [{"section": None, "ia_ma": None, "gm_ms": None}]
        for k, s in enumerate(secs):
            head = f"{shown(t['label']):<14}{shown(t['type']):<10}{t['status']:<10}" if k == 0 else " " * 34
            lines.append(f"{head}{shown(s['section'] or '-'):<6}{_f(s['ia_ma']):>9}{_f(s['gm_ms']):>9}  "
                         + ((t["grade"] or "not graded") if k == 0 else ""))
    shown_n = len(d["tubes"])
    lines.append(f"{shown_n} of {d['total']} tube(s)" + (f" from {offset + 1}" if offset else "")
                 + ("; figures at each type's test position" if shown_n else ""))
    return lines


def show_tube(db=None, label="") -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        d = store.tube_detail(ledger, label)
    tp = d["test_position"]
    lines = [f"{shown(d['label'])}: type {shown(d['type'])}, {d['status']}"
             + (f", kept at {shown(d['location'])}" if d["location"] else ""),
             f"figures at the test position va {tp['va']:g} V, vg {tp['vg']:g} V:"]
    for s in d["sections"]:
        name = s["section"] or "-"
        if "model" not in s:
            lines.append(f"  section {shown(name)}: not measured")
            continue
        if not s["converged"]:
            lines.append(f"  section {shown(name)}: fit failed ({shown(s['failure'])})")
            continue
        lines.append(f"  section {shown(name)}: Ia {s['ia_ma']:.4g} ± {s['ia_ma_err'] or 0:.2g} mA, gm {s['gm_ms']:.4g} "
                     f"± {s['gm_ms_err'] or 0:.2g} mA/V ({s['model']}, engine {s['engine']}, "
                     f"{s['measurements']} measurement(s))")
        if s.get("drift"):
            dr = s["drift"]
            lines.append(f"    drift since {dr['first_measured_at'][:10]}: Ia {_pm(dr['ia_pct'], dr['ia_pct_err'])}, "
                         f"gm {_pm(dr['gm_pct'], dr['gm_pct_err'])}")
    lines.append("measurements:")
    lines += [f"  #{m['measurement']:<5} {shown(m['section'] or '-'):<4} {m['at'][:16]}  {shown(m['by']):<10} "
              f"{shown(m['source'])} ({m['points']} points)" + (" superseded" if m["superseded"] else "")
              for m in d["measurements"]]
    if d["grades"]:
        g = d["grades"][-1]
        lines.append(f"grade: {g['grade']} ({shown(g['basis'])}; by {shown(g['by'])}, {g['at'][:16]})")
    for g in d["groups"]:
        lines.append(f"group {g['group']}: {g['kind']}, {g['status']}, order {shown(g['order'])}")
    lines.append("history:")
    lines += [f"  {e['at'][:19]}  {shown(e['who']):<10} {e['action']:<8} {shown(e['detail'])}" for e in d["history"]]
    return Result("tube", d, tuple(lines))


def history(db=None, label=None, limit=50) -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        rows = store.history(ledger, label, limit)
    lines = [f"{e['at'][:19]}  {shown(e['who']):<10} {e['action']:<8} {shown(e['tube'] or '-'):<12} {shown(e['detail'])}"
             for e in rows]
    return Result("history", {"events": rows}, tuple(lines) or ("no events",))


# -- grading ------------------------------------------------------------------------


def grade(db=None, user="", tube_type="", weak_pct=80.0, balance_pct=10.0) -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        d = store.grade_type(ledger, tube_type, _user(user), weak_pct, balance_pct)
    lines = [f"grading {len(d['tubes'])} tube(s) of type {shown(d['type'])} against nominal Ia "
             f"{d['nominal_ia_ma']:.4g} mA, gm {d['nominal_gm_ms']:.4g} mA/V ({d['nominal_basis']}); "
             f"weak below {weak_pct:g} %, out of balance above {balance_pct:g} %"]
    for t in d["tubes"]:
        lines.append(f"  {shown(t['label']):<12}{t['grade']:<18}{t['basis'].split(' (nominal')[0]}")
    return Result("grade", d, tuple(lines))


# -- matching and reservations ----------------------------------------------------


#: latest grades that keep a tube out of matching unless asked (``include_weak``)
WEAK_GRADES = ("weak", "weak, unbalanced")


def match(db=None, user="", tube_type="", va=None, vg=None, group="pairs", tolerance_pct=5.0,
          figures=("ia", "gm"), extrapolate=False, reserve_order=None, accept=None, include_weak=False) -> Result:
    """Match the unreserved in-stock tubes of a type at a fixed-bias position (default: the
    type's test position): section pairs or quads, or whole bottles (dual triodes).  Tubes
    whose latest grade is weak stay out (listed) unless ``include_weak``.  With
    ``reserve_order``, reserve the groups numbered in ``accept`` (default all) for it."""
    from ..bottles import match_bottles
    from ..ledger import store
    from ..match import Criterion, FixedBias, MatchError, match_units

    if group not in ("pairs", "quads", "bottles"):
        raise InputError(f"must be pairs, quads or bottles, got {group!r}", field="group")
    with _ledger(db) as ledger:
        info, units, skipped = store.stock_units(ledger, tube_type)
        if not include_weak:
            weak = {t: g for t, g in info["grades"].items() if g[0] in WEAK_GRADES}
            skipped += [{"unit": u.label, "reason": f"graded {weak[u.tube][0]}: {weak[u.tube][1].split(' (nominal')[0]}"}
                        for u in units if u.tube in weak]
            units = [u for u in units if u.tube not in weak]
        if not units:
            raise InputError(f"no in-stock, unreserved tube of type {shown(tube_type)} has a fitted measurement",
                             field="type")
        try:
            position = FixedBias(info["test_va"] if va is None else va, info["test_vg"] if vg is None else vg)
            crit = Criterion(tolerance_pct=tolerance_pct, figures=tuple(figures))
            if group == "bottles":
                if not info["dual"]:
                    raise InputError(f"type {shown(tube_type)} is a single triode: match pairs", field="group")
                res = match_bottles(units, position, crit, extrapolate=extrapolate)
                gone = {}
                for x in skipped:  # one line per bottle
                    gone.setdefault(x["unit"].split(":", 1)[0], x["reason"])
                res.excluded = [{"bottle": b, "reason": r} for b, r in gone.items()] + res.excluded
                groups = [{"members": [tuple(u.split(":", 1)) for side in p.sides for u in side],
                           "mismatch_pct": 100 * p.mismatch, "grade": p.grade, "name": f"B{k}"}
                          for k, p in enumerate(res.pairs, 1)]
                kind = "bottle pair"
            else:
                res = match_units(units, position, group=2 if group == "pairs" else 4, criterion=crit,
                                  extrapolate=extrapolate)
                res.excluded = skipped + res.excluded
                by_label = {u.label: u for u in units}
                groups = [{"members": [(by_label[x].tube, by_label[x].section) for x in g.units],
                           "mismatch_pct": 100 * g.mismatch, "grade": g.grade,
                           "name": f"{'P' if group == 'pairs' else 'Q'}{k}"} for k, g in enumerate(res.groups, 1)]
                kind = "section pair" if group == "pairs" else "section quad"
        except MatchError as e:
            raise InputError(str(e), field="position") from None
        extra = {"type": info["type"]}
        tail = []
        if reserve_order is not None:
            picks = list(range(1, len(groups) + 1)) if not accept else list(accept)
            for k in picks:
                if not (isinstance(k, int) and 1 <= k <= len(groups)):
                    raise InputError(f"no group {k!r} in this match (1 .. {len(groups)})", field="accept")
            chosen = [groups[k - 1] for k in picks]
            made = store.reserve(ledger, chosen, reserve_order, _user(user), kind, position.to_dict(), crit.to_dict())
            extra["reserved"] = made
            tail.append("")
            for g, m in zip(chosen, made):
                tail.append(f"reserved {g['name']} as group {m['group']} for order {shown(reserve_order)}: "
                            + ", ".join(shown(x) for x in m["members"]))

    def lines():
        return [ln for ln in res.table().split("\n") if ln != CAUTION] + tail

    return Result("match", make_data=lambda: {**res.to_dict(), **extra}, make_lines=lines)


def reserve(db=None, user="", labels=(), order="", kind="set") -> Result:
    """Reserve the named tubes as one group for an order (all must be in stock)."""
    from ..ledger import store

    if not labels:
        raise InputError("name the tubes to reserve", field="labels")
    members = [tuple(x.split(":", 1)) if ":" in x else (x, None) for x in labels]
    with _ledger(db) as ledger:
        made = store.reserve(ledger, [{"members": members}], order, _user(user), kind, {}, {})
    m = made[0]
    return Result("reserve", {"reserved": made}, (f"group {m['group']} reserved for order {shown(m['order'])}: "
                                                  + ", ".join(shown(x) for x in m["members"]),))


def labels(db=None, group_id=None) -> Result:
    """Printable text labels for a reserved or sold group: one per tube."""
    from ..ledger import store

    if not isinstance(group_id, int) or group_id < 1:
        raise InputError(f"must be a group number, got {group_id!r}", field="group_id")
    with _ledger(db) as ledger:
        g = store.group_labels(ledger, group_id)
        figures = {}
        for m in g["members"]:
            tube = m.split(":", 1)[0]
            if tube not in figures:
                figures[tube] = {s["section"]: s for s in store.tube_detail(ledger, tube)["sections"]}
    out = []
    for m in g["members"]:
        tube, _, sec = m.partition(":")
        secs = figures[tube].values() if not sec else [figures[tube].get(sec, {})]
        figs = "; ".join(f"{s.get('section') or ''} Ia {_f(s.get('ia_ma'), '.3g')} mA gm {_f(s.get('gm_ms'), '.3g')} mA/V".strip()
                         for s in secs)
        mm = "" if g["mismatch_pct"] is None else f" {g['mismatch_pct']:.2f} %"
        out.append(f"[{shown(m)}] group {g['group']} {g['kind']} {g['grade'] or ''}{mm} | order {shown(g['order'])} | {figs}")
    g["labels"] = out
    return Result("labels", g, tuple(out))


def set_status(db=None, user="", labels=(), status="", reason="", order=None) -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        rows = store.set_status(ledger, list(labels), status, _user(user), reason, order)
    return Result("status", {"tubes": rows},
                  tuple(f"{shown(r['label'])}: {r['was']} -> {r['status']}" for r in rows))


def edit(db=None, user="", label="", location=None, notes=None) -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        d = store.edit_tube(ledger, label, _user(user), location, notes)
    return Result("edit", d, (f"{shown(d['label'])}: kept at {shown(d['location']) or '-'}; notes: {shown(d['notes']) or '-'}",))


def supersede(db=None, user="", measurement=None, reason="") -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        d = store.supersede(ledger, measurement, _user(user), reason)
    return Result("supersede", d, (f"measurement {d['measurement']} of {shown(d['unit'])} superseded; it stays in the "
                                   "ledger with its fits",))


# -- maintenance ------------------------------------------------------------------


def refit(db=None, user="", tube_type="", model="koren", jobs=None) -> Result:
    from ..ledger import store

    with _ledger(db) as ledger:
        d = store.refit(ledger, tube_type, _user(user), model, jobs)
    lines = [f"re-fitted {d['refitted']} measurement(s) of type {shown(d['type'])} with engine {d['engine']}; "
             "the earlier fits stay, marked with their engine version"]
    lines += [f"  fit failed: {shown(f['unit'])}: {shown(f['reason'])}" for f in d["failed"]]
    return Result("refit", d, tuple(lines), bool(d["failed"]))


def backup(db=None, folder="") -> Result:
    from ..ledger import backup as bk

    with _ledger(db) as ledger:
        d = bk.backup(ledger, folder)
    return Result("backup", d, (f"backed up to {shown(d['folder'])}: " + ", ".join(
        f"{n} {k}" for k, n in d["tables"].items()) + f"; {d['cards']} model card(s)",))


def restore(db=None, folder="") -> Result:
    from ..ledger import backup as bk

    with _ledger(db) as ledger:
        d = bk.restore(ledger, folder)
        where = ledger.describe()
    return Result("restore", {"db": where, "tables": d},
                  (f"restored into {where}: " + ", ".join(f"{n} {k}" for k, n in d.items()),))


def copy(db=None, target="") -> Result:
    from ..ledger import backup as bk

    if not target:
        raise InputError("name the ledger to copy into", field="target")
    with _ledger(db) as src, _ledger(target) as dst:
        d = bk.copy(src, dst)
        a, b = src.describe(), dst.describe()
    return Result("copy", {"from": a, "to": b, "tables": d},
                  (f"copied {a} -> {b}: " + ", ".join(f"{n} {k}" for k, n in d.items()),))
