"""The ledger's use cases through the service layer, on SQLite and PostgreSQL.

Data are INVENTED (tests/ledger/conftest.py ``stock_file``: Koren's published 12AU7 set, from
memory, in tests/conftest.py, with a spread of kg1).  Expected figures come from the
generating parameters or from the engine's own fit and small-signal functions called
directly on the same files (a hand computation of what the ledger must store and report).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from fitter.errors import InputError
from fitter.fit import fit_curves
from fitter.ledger.backup import dump
from fitter.ledger.db import open_ledger
from fitter.models import get_model
from fitter.reader import read_curves
from fitter.service import stock as svc

VA, VG = 250.0, -8.5  # the test position of the invented type (a usual 12AU7 point, common practice)


def _setup(db, user="ann"):
    svc.init(db)
    svc.add_type(db, user, "DT", VA, VG)


def _hand_figures(path, label, section):
    """Ia, gm and their errors at the test position from a direct engine fit of the file."""
    u = next(u for u in read_curves([path]).units if u.tube == label and u.section == section)
    ss = fit_curves(u, "koren").raise_for_failure().triode.small_signal(VA, VG, check=False)
    return ss


def test_importing_the_same_file_twice_stores_it_once(db, stock_file):
    _setup(db)
    path, _ = stock_file(n_tubes=2)
    first = svc.import_files(db, "ann", [path], "DT", jobs=1)
    assert first.data["files"][0]["new_tubes"] == ["T001", "T002"]
    led = open_ledger(db)
    before = dump(led)
    again = svc.import_files(db, "bob", [path], "DT", jobs=1)
    assert again.data["files"][0]["duplicate"] is True
    assert "already in the ledger" in again.text()
    assert dump(led) == before  # nothing stored the second time
    assert len(before["source_files"]) == 1 and len(before["measurements"]) == 4
    # the file's bytes are kept exactly as read, with their SHA-256
    assert before["source_files"][0]["content"] == path.read_bytes()
    # and the points exactly as the reader gave them, in file order with their lines (the fit
    # works on a sorted, cleaned copy; the ledger keeps what was read)
    from fitter.ledger.schema import unpack_points

    raw = read_curves([path]).units
    for unit, m in zip(raw, before["measurements"]):
        p = unpack_points(m["points"], m["n_points"])
        for k in ("va", "vg", "ia", "lines"):
            assert np.array_equal(p[k], getattr(unit, k)), k
        assert p["ig"] is None
    led.close()


def test_a_bad_file_stores_nothing_and_lists_every_error(db, stock_file, tmp_path):
    _setup(db)
    good, _ = stock_file(n_tubes=2)
    svc.import_files(db, "ann", [good], "DT", jobs=1)
    lines = good.read_text().splitlines()
    # two bad cells on different lines of a file that is otherwise a re-test
    lines[5] = lines[5].rsplit(",", 1)[0] + ",abc"
    lines[9] = lines[9].replace(lines[9].split(",")[2], "x7", 1)
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(lines) + "\n")
    led = open_ledger(db)
    before = dump(led)
    with pytest.raises(InputError) as e:
        svc.import_files(db, "ann", [bad], "DT", jobs=1)
    msg = str(e.value)
    assert "2 errors" in msg and "line 6, column 5 ('ia_ma')" in msg and "line 10, column 3 ('va')" in msg
    assert dump(led) == before
    led.close()


def test_a_tube_of_another_type_stores_nothing(db, stock_file):
    _setup(db)
    svc.add_type(db, "ann", "OTHER", 100, -1, dual=True)
    path, _ = stock_file(n_tubes=2)
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    again, _ = stock_file(name="again.csv", n_tubes=3, seed=5)  # T001..T003: T001, T002 are DT
    led = open_ledger(db)
    before = dump(led)
    with pytest.raises(InputError, match="'T001' is in the ledger as type DT, not OTHER; nothing was stored"):
        svc.import_files(db, "ann", [again], "OTHER", jobs=1)
    assert dump(led) == before
    led.close()


def test_retest_shows_drift_against_a_hand_computation(db, stock_file):
    _setup(db)
    first, truth1 = stock_file("first.csv", n_tubes=2, seed=1)
    # the re-test: T001 has lost emission (kg1 up 12 %), T002 is unchanged
    scale = {("T001", "A"): truth1[("T001", "A")]["kg1"] * 1.12 / 1180.0,
             ("T001", "B"): truth1[("T001", "B")]["kg1"] * 1.12 / 1180.0,
             ("T002", "A"): truth1[("T002", "A")]["kg1"] / 1180.0, ("T002", "B"): truth1[("T002", "B")]["kg1"] / 1180.0}
    second, truth2 = stock_file("second.csv", n_tubes=2, seed=2, kg1_scale=scale)
    svc.import_files(db, "ann", [first], "DT", jobs=1)
    res = svc.import_files(db, "bob", [second], "DT", jobs=1)
    f = res.data["files"][0]
    assert f["retested"] == ["T001", "T002"] and f["new_tubes"] == []
    assert "re-test T001:A: drift since" in res.text()
    for sec in ("A", "B"):
        d = f["drift"]["T001"][sec]
        a = _hand_figures(first, "T001", sec)
        b = _hand_figures(second, "T001", sec)
        # hand computation: percent change, errors of independent fits added in quadrature
        ia = 100 * (b.ia / a.ia - 1)
        ia_err = 100 * (b.ia / a.ia) * math.hypot(a.ia_err / a.ia, b.ia_err / b.ia)
        gm = 100 * (b.gm / a.gm - 1)
        assert d["ia_pct"] == pytest.approx(ia, rel=1e-6)
        assert d["ia_pct_err"] == pytest.approx(ia_err, rel=1e-6)
        assert d["gm_pct"] == pytest.approx(gm, rel=1e-6)
        # and the physics: the generating parameters' own drift (Koren model, published form)
        m = get_model("koren")
        true = 100 * (m.current(VA, VG, **truth2[("T001", sec)]) / m.current(VA, VG, **truth1[("T001", sec)]) - 1)
        assert true < -5  # more kg1, less current
        assert abs(d["ia_pct"] - true) < 4 * d["ia_pct_err"] + 1.0  # 1 % (noise level) + 4 sigma
    shown = svc.show_tube(db, "T001")
    assert shown.data["sections"][0]["measurements"] == 2
    assert "drift since" in shown.text()


def test_grade_names_the_weak_section_and_the_imbalance(db, stock_file):
    _setup(db)
    # T003's section B is weak: kg1 twice the type's (about 60 % of the plate current)
    path, truth = stock_file(n_tubes=5, seed=3, kg1_scale={("T003", "B"): 2.0})
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    res = svc.grade(db, "carl", "DT", weak_pct=80, balance_pct=10)
    by = {t["label"]: t for t in res.data["tubes"]}
    # hand computation: nominal = median over the ten sections of gm at the test position
    gms = {(lab, s): _hand_figures(path, lab, s).gm for lab, s in truth}
    nominal = float(np.median(list(gms.values())))
    pct = 100 * gms[("T003", "B")] / nominal
    assert pct < 80
    t3 = by["T003"]
    assert t3["grade"] == "weak, unbalanced"
    assert f"section B gm {pct:.0f} % of nominal" in t3["basis"]
    assert ": weak (below 80 %)" in t3["basis"] and "out of balance" in t3["basis"]
    assert res.data["nominal_gm_ms"] == pytest.approx(1e3 * nominal, rel=1e-6)
    assert all(by[k]["grade"] in ("good", "unbalanced") for k in by if k != "T003")
    # the grade is recorded with who decided
    d = svc.show_tube(db, "T003").data
    assert d["grades"][-1]["by"] == "carl" and d["grades"][-1]["grade"] == "weak, unbalanced"
    assert svc.list_tubes(db, grade="weak, unbalanced").data["total"] == 1
    # a weak tube stays out of matching (named, with its grade) unless asked for
    m = svc.match(db, "carl", "DT", group="pairs", tolerance_pct=50)
    out = {e["unit"]: e["reason"] for e in m.data["excluded"]}
    assert out["T003:B"].startswith("graded weak, unbalanced: section B gm")
    assert not any("T003" in u for g in m.data["groups"] for u in g["units"])
    m = svc.match(db, "carl", "DT", group="pairs", tolerance_pct=50, include_weak=True)
    assert "T003:B" not in {e["unit"] for e in m.data["excluded"]}


def test_list_filters_sorts_and_pages(db, stock_file):
    _setup(db)
    path, _ = stock_file(n_tubes=5, seed=4)
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    svc.set_status(db, "ann", ["T002"], "retired", reason="cracked base")
    page = svc.list_tubes(db, sort="label", descending=True, limit=2, offset=1).data
    assert page["total"] == 5 and [t["label"] for t in page["tubes"]] == ["T004", "T003"]
    assert all(len(t["sections"]) == 2 and t["sections"][0]["ia_ma"] > 0 for t in page["tubes"])
    assert [t["label"] for t in svc.list_tubes(db, status="retired").data["tubes"]] == ["T002"]
    with pytest.raises(InputError) as e:
        svc.list_tubes(db, sort="colour")
    assert e.value.field == "sort"
    with pytest.raises(InputError, match="no tube type 'NOPE'"):
        svc.list_tubes(db, tube_type="NOPE")


def test_bottles_are_matched_reserved_sold_and_recorded(db, stock_file):
    _setup(db)
    path, _ = stock_file(n_tubes=6, seed=6)
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    m = svc.match(db, "dee", "DT", group="bottles", tolerance_pct=10, reserve_order="ORDER-7", accept=[1])
    pair = m.data["pairs"][0]
    assert m.data["reserved"][0]["tubes"] == sorted(pair["bottles"])
    reserved = set(pair["bottles"])
    # reserved tubes are not offered again
    again = svc.match(db, "dee", "DT", group="pairs", tolerance_pct=50)
    offered = {u.split(":")[0] for g in again.data["groups"] for u in g["units"]}
    assert not offered & reserved
    lab = svc.labels(db, group_id=m.data["reserved"][0]["group"])
    assert len(lab.lines) == 4 and all("order ORDER-7" in x for x in lab.lines)
    sold = svc.set_status(db, "eve", sorted(reserved), "sold", order="ORDER-7")
    assert [r["was"] for r in sold.data["tubes"]] == ["reserved", "reserved"]
    with pytest.raises(InputError, match="already sold"):
        svc.set_status(db, "eve", [sorted(reserved)[0]], "retired")
    h = svc.history(db, sorted(reserved)[0]).data["events"]
    assert [e["action"] for e in h] == ["import", "reserve", "sell"]
    assert [e["who"] for e in h] == ["ann", "dee", "eve"]


def test_refit_keeps_the_old_fits_marked_with_their_engine_version(db, stock_file):
    _setup(db)
    path, _ = stock_file(n_tubes=2, seed=7)
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    led = open_ledger(db)
    with led.engine.begin() as c:  # pretend the first fits came from an older engine
        c.exec_driver_sql("UPDATE fits SET engine_version = '0.0.9'")
    r = svc.refit(db, "ann", "DT", jobs=1)
    assert r.data["refitted"] == 4
    fits = dump(led)["fits"]
    assert sorted(f["engine_version"] for f in fits) == ["0.0.9"] * 4 + [r.data["engine"]] * 4
    # the current figures come from the new fits
    assert all(s["engine"] == r.data["engine"] for s in svc.show_tube(db, "T001").data["sections"])
    led.close()


def test_the_cli_imports_the_demo_stock_and_says_caution(platebook, tmp_path):
    from fitter import CAUTION

    db = str(tmp_path / "demo.sqlite")
    assert platebook("stock", "--db", db, "type", "MED", "--va", "250", "--vg", "-8.5")[0] == 0
    code, out, err = platebook("stock", "--db", db, "--user", "ann", "import", "curves/stock_medium_mu.csv",
                               "--type", "MED")
    assert code == 0, err
    assert "16 section(s), 4124 points; 8 new tube(s)" in out and CAUTION in out
    code, out, err = platebook("stock", "--db", db, "list", "--type", "NOPE")
    assert code == 1 and err.startswith("error: --type: no tube type 'NOPE'")


def test_a_superseded_measurement_stays_but_no_longer_gives_the_figures(db, stock_file):
    _setup(db)
    first, _ = stock_file("first.csv", n_tubes=1, seed=31)
    second, _ = stock_file("second.csv", n_tubes=1, seed=32, kg1_scale={"T001": 1.3})
    svc.import_files(db, "ann", [first], "DT", jobs=1)
    before = svc.show_tube(db, "T001").data["sections"][0]["ia_ma"]
    svc.import_files(db, "ann", [second], "DT", jobs=1)
    d = svc.show_tube(db, "T001").data
    assert d["sections"][0]["ia_ma"] < before  # the re-test is current
    newest = [m["measurement"] for m in d["measurements"] if m["section"] == "A"][-1]
    svc.supersede(db, "bob", newest, reason="socket contact was loose")
    d = svc.show_tube(db, "T001").data
    assert d["sections"][0]["ia_ma"] == pytest.approx(before, rel=1e-12)  # back to the first
    assert len(d["measurements"]) == 4 and sum(m["superseded"] for m in d["measurements"]) == 1
    assert d["history"][-1]["action"] == "supersede" and "loose" in d["history"][-1]["detail"]
    with pytest.raises(InputError, match="already superseded"):
        svc.supersede(db, "bob", newest)
    e = svc.edit(db, "bob", "T001", location="shelf B3")
    assert e.data["location"] == "shelf B3" and svc.show_tube(db, "T001").data["location"] == "shelf B3"


def test_nominal_figures_come_from_a_datasheet_card(db, synth, tube_types, tmp_path, stock_file):
    from fitter.card import save_card

    # the "datasheet" card: Koren's published 12AU7 set itself (from memory, tests/conftest.py)
    tt = tube_types["12AU7"]
    u = synth(tt, noise=0.0, tube="SHEET").curveset()
    triode = fit_curves(u, "koren").raise_for_failure().triode
    card = save_card(tmp_path / "sheet.json", triode)
    svc.init(db)
    d = svc.add_type(db, "ann", "DT", VA, VG, nominal_card=str(card)).data
    expect = get_model("koren").current(VA, VG, **tt.params)  # the published set's own current
    assert d["nominal_ia_ma"] == pytest.approx(1e3 * expect, rel=1e-3)
    assert d["nominal_basis"] == "datasheet card sheet.json (koren)"
    path, _ = stock_file(n_tubes=2, seed=33)
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    g = svc.grade(db, "ann", "DT").data
    assert g["nominal_basis"] == "datasheet card sheet.json (koren)"
    assert g["nominal_ia_ma"] == pytest.approx(d["nominal_ia_ma"], rel=1e-12)


def test_curves_from_a_datasheet_plot_are_a_reference_never_stock(db, stock_file):
    # a datasheet's curves describe the type, not a tube on the shelf: they are kept (for the
    # compare page's nominal) but never matched, graded, reserved or sold
    _setup(db)
    stocked, _ = stock_file("stock.csv", n_tubes=4, seed=3)
    sheet, _ = stock_file("sheet.csv", n_tubes=1, seed=4, prefix="SHEET")
    svc.import_files(db, "ann", [stocked], "DT", jobs=1)
    svc.import_files(db, "ann", [sheet], "DT", instrument="datasheet plot (digitised)", jobs=1)
    status = {t["label"]: t["status"] for t in svc.list_tubes(db).data["tubes"]}
    assert status == {"T001": "in-stock", "T002": "in-stock", "T003": "in-stock", "T004": "in-stock",
                      "SHEET001": "reference"}
    m = svc.match(db, "dee", "DT", group="pairs", tolerance_pct=50)
    offered = {u.split(":")[0] for g in m.data["groups"] for u in g["units"]}
    assert offered and "SHEET001" not in offered
    with pytest.raises(InputError, match="datasheet reference") as e:
        svc.set_status(db, "eve", ["SHEET001"], "sold")
    assert e.value.field == "labels"
    # a measured re-test cannot land on the reference (nor a sheet on a stocked tube)
    retest, _ = stock_file("retest.csv", n_tubes=1, seed=5, prefix="SHEET")
    with pytest.raises(InputError, match="datasheet reference") as e:
        svc.import_files(db, "ann", [retest], "DT", jobs=1)
    assert e.value.field == "instrument"
    other, _ = stock_file("other.csv", n_tubes=1, seed=6, prefix="T")
    with pytest.raises(InputError, match="tube in the stock"):
        svc.import_files(db, "ann", [other], "DT", instrument="datasheet plot", jobs=1)


def test_the_same_curves_under_a_new_label_are_stored_with_a_warning(db, stock_file, tmp_path):
    """A dealer may re-label on purpose, so the copy is stored; but the import says which tube's
    measured points it repeats (the hash of the data alone, not of the file)."""
    _setup(db)
    path, _ = stock_file(n_tubes=2)
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    # the same rows, T002 re-labelled NEW9 and a comment line added: other bytes, the same data
    copy = tmp_path / "relabelled.csv"
    copy.write_text("# re-labelled lot\n" + path.read_text().replace("T002", "NEW9"))
    r = svc.import_files(db, "bob", [copy], "DT", jobs=1)
    f = r.data["files"][0]
    assert f["duplicate"] is False and f["new_tubes"] == ["NEW9"]  # stored: not refused
    assert [(d["unit"], d["same_as"]) for d in f["same_data"]] == [("NEW9:A", ["T002:A"]), ("NEW9:B", ["T002:B"])]
    assert "warning: NEW9:A: the same measured points as T002:A; stored all the same" in r.text()
    assert svc.show_tube(db, "NEW9").data["sections"][0]["fit_id"]
    # the tube's history says so too
    h = svc.history(db, "NEW9").data["events"]
    assert any("the same measured points as T002:A, T002:B" in e["detail"] for e in h)
    # T001 came again under its own label: a re-test with the same data, no warning about it
    assert not any(d["unit"].startswith("T001") for d in f["same_data"])
    # other data under a new label: no warning
    other, _ = stock_file("other.csv", n_tubes=1, seed=9, prefix="X")
    r = svc.import_files(db, "bob", [other], "DT", jobs=1)
    assert r.data["files"][0]["same_data"] == [] and "warning" not in r.text()


def test_the_data_hash_is_filled_in_for_measurements_stored_before_it_existed(db, stock_file):
    """Migration 0005 computes each stored measurement's hash; going down and up again
    gives the hashes the import stored (SHA-256 of the va, vg, ia, ig arrays, hashlib)."""
    import hashlib

    from alembic import command

    from fitter.ledger.migrate import alembic_config
    from fitter.ledger.schema import pack_points

    _setup(db)
    path, _ = stock_file(n_tubes=2)
    svc.import_files(db, "ann", [path], "DT", jobs=1)
    led = open_ledger(db)
    try:
        stored = {m["id"]: m["data_sha256"] for m in dump(led)["measurements"]}
        units = read_curves([path]).units
        want = [hashlib.sha256(pack_points(u.va, u.vg, u.ia, u.ig, None)[:32 * u.n_points]).hexdigest()
                for u in units]
        assert [stored[k] for k in sorted(stored)] == want
        with led.engine.begin() as c:
            command.downgrade(alembic_config(c), "0004_plot_images")
        with led.engine.begin() as c:
            command.upgrade(alembic_config(c), "head")
        assert {m["id"]: m["data_sha256"] for m in dump(led)["measurements"]} == stored
    finally:
        led.close()
