"""Files Platebook writes (fitter/outfiles.py and every writer that uses it).

Expected behaviour comes from the POSIX rules for rename(2) (``os.replace`` replaces the
directory entry, a symbolic link included, atomically) and from common practice for
safe output files (temporary file in the same folder, fsync, rename).  The curve files
are invented units from tests/conftest.py (Koren's published 12AX7 set, from memory).
"""

from __future__ import annotations

import errno
import json
import os
from pathlib import Path

import pytest
from click.testing import CliRunner

from fitter.card import card_filename, load_card, save_card
from fitter.cli import main
from fitter.outfiles import (MAX_STEM, OutputError, plot_path, prepare_folder, unit_stem, unit_stems,
                             write_atomic)
from fitter.triode import FittedTriode

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
KOREN_12AX7 = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)  # Koren's table, from memory

#: tube X section A, and five tubes whose names used to map to the same file stem X_A
COLLIDING = [("X", "A"), ("X:A", None), ("X_A", None), ("X/A", None), ("X A", None), ("X?A", None)]


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def one_line_error(r, *needles):
    assert r.exit_code == 1, r.output
    err = r.stderr.strip()
    assert err.count("\n") == 0 and err.startswith("error:"), err
    assert "Traceback" not in r.output
    for n in needles:
        assert n in err, (n, err)
    return err


def triode(tube="V7", section="A"):
    return FittedTriode("koren", KOREN_12AX7, tube=tube, section=section)


@pytest.fixture
def lot(tmp_path, synth, tube_types, write_long):
    units = [synth(tube_types["12AX7"], seed=k, tube=t, section=s, va_step=25.0)
             for k, (t, s) in enumerate(COLLIDING)]
    return write_long(tmp_path / "lot.csv", units)


@pytest.fixture
def one_unit(tmp_path, synth, tube_types, write_long):
    return write_long(tmp_path / "one.csv", [synth(tube_types["12AX7"], seed=1, tube="V7", section="A",
                                                   va_step=25.0)])


# -- names -> stems ---------------------------------------------------------------


def test_plain_names_keep_their_readable_stem():
    assert unit_stem("V7", "A") == "V7_A"
    assert unit_stem("HM-01", "B") == "HM-01_B"
    assert unit_stem("12AX7.lot3", None) == "12AX7.lot3"
    assert card_filename(triode()) == "V7_A.koren.json"


def test_changed_names_carry_a_stable_hash_of_the_exact_name():
    s = unit_stem("X:A")
    base, tag = s.split("~")
    assert base == "X-A" and len(tag) == 8 and int(tag, 16) >= 0
    assert unit_stem("X:A") == s  # stable: the same name always gives the same stem
    assert unit_stem("../../etc/passwd").startswith("etc-passwd~")
    assert "/" not in unit_stem("a/b", "c/d") and unit_stem(".hidden").startswith("hidden~")


def test_colliding_names_give_distinct_stems():
    stems = [unit_stem(t, s) for t, s in COLLIDING]
    assert len(set(stems)) == len(COLLIDING), stems


def test_stems_differing_only_in_letter_case_are_separated_within_a_run():
    # a case-insensitive file system (common practice on macOS and Windows) would merge V7 and v7
    stems = unit_stems([("V7", None), ("v7", None), ("V7", None)])
    assert stems[0] == "V7"
    assert len({s.casefold() for s in stems}) == 3, stems


def test_five_units_with_colliding_names_give_five_cards_and_plots(lot, tmp_path):
    cards, plots = tmp_path / "cards", tmp_path / "plots"
    r = run("fit", lot, "--model", "koren", "--jobs", "1", "--save", cards, "--plot", plots, "--json")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    written = doc["written"]
    n = len(COLLIDING)
    assert len(written) == len(set(written)) == 2 * n
    card_files = [Path(w) for w in written if w.endswith(".json")]
    plot_files = [Path(w) for w in written if w.endswith(".png")]
    assert sorted(p.name for p in cards.iterdir()) == sorted(p.name for p in card_files)
    assert sorted(p.name for p in plots.iterdir()) == sorted(p.name for p in plot_files)
    # each card holds its own unit, under its exact name
    assert sorted((c.tube, c.section) for c in map(load_card, card_files)) == sorted(
        COLLIDING, key=lambda u: (u[0], u[1] or ""))
    assert all(p.read_bytes()[:8] == PNG_MAGIC for p in plot_files)


def test_fit_text_report_lists_every_file_written(lot, tmp_path):
    cards = tmp_path / "cards"
    r = run("fit", lot, "--model", "koren", "--jobs", "1", "--save", cards)
    assert r.exit_code == 0, r.stderr
    listed = [ln.strip() for ln in r.stdout.splitlines() if ln.startswith("  ") and ln.strip().endswith(".json")]
    assert f"{len(COLLIDING)} file(s) written:" in r.stdout
    assert sorted(listed) == sorted(str(p) for p in cards.iterdir())


def test_failed_fit_is_not_reported_as_a_card_written(tmp_path):
    # flat curves (the same current at every voltage) drive Koren's mu to its bound: the fit
    # fails (fitter.fit's bound check), so no card is written; an old card of the unit stays
    # on disk but is not reported as written
    path = tmp_path / "flat.csv"
    rows = ["tube,section,va,vg,ia_ma"] + [f"F,A,{va},{vg},0.001" for vg in (-2, -1, 0) for va in range(0, 400, 40)]
    path.write_text("\n".join(rows) + "\n")
    cards = tmp_path / "cards"
    cards.mkdir()
    old = save_card(cards / "F_A.koren.json", triode("F", "A"))
    before = old.read_bytes()
    r = run("fit", path, "--model", "koren", "--jobs", "1", "--save", cards, "--json")
    assert r.exit_code == 2 and json.loads(r.stdout)["written"] == []
    r = run("fit", path, "--model", "koren", "--jobs", "1", "--save", cards)
    assert r.exit_code == 2
    assert "0 file(s) written:" in r.stdout and "no model card for (fit failed): F:A" in r.stdout
    assert old.read_bytes() == before


# -- atomic writes ------------------------------------------------------------------


def test_write_is_atomic_old_file_survives_a_failed_write(tmp_path):
    target = tmp_path / "V7_A.koren.json"
    save_card(target, triode())
    before = target.read_bytes()

    def half_then_fail(fh):
        fh.write(b'{"format": "platebook.model-card", "ver')
        raise RuntimeError("simulated crash in the middle of a write")

    with pytest.raises(RuntimeError, match="simulated crash"):
        write_atomic(target, half_then_fail)
    assert target.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["V7_A.koren.json"]  # no temporary left


def test_failed_rename_leaves_the_old_card_and_no_temporary(tmp_path, monkeypatch):
    target = tmp_path / "V7_A.koren.json"
    save_card(target, triode())
    before = target.read_bytes()

    def no_space(src, dst):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "replace", no_space)
    with pytest.raises(OutputError, match="V7_A.koren.json: cannot write: No space left on device"):
        save_card(target, triode("V8", "B"))
    assert target.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["V7_A.koren.json"]


def test_written_file_has_the_usual_permissions(tmp_path):
    old = os.umask(0o022)
    try:
        p = write_atomic(tmp_path / "a.txt", "x")
    finally:
        os.umask(old)
    assert p.stat().st_mode & 0o777 == 0o644  # mkstemp's 0600 would hide a card from other users


# -- symbolic links -------------------------------------------------------------------


def test_symlink_in_output_folder_is_not_followed(one_unit, tmp_path):
    cards = tmp_path / "cards"
    cards.mkdir()
    victim = tmp_path / "outside.txt"
    victim.write_text("precious\n")
    link = cards / "V7_A.koren.json"
    link.symlink_to(victim)
    r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--save", cards)
    assert r.exit_code == 0, r.stderr
    assert victim.read_text() == "precious\n"  # nothing written through the link
    assert not link.is_symlink() and load_card(link).tube == "V7"  # the link itself was replaced


def test_symlink_as_export_target_is_replaced_not_written_through(tmp_path):
    card = save_card(tmp_path / "V7_A.koren.json", triode())
    victim = tmp_path / "victim.lib"
    victim.write_text("keep me\n")
    out = tmp_path / "model.lib"
    out.symlink_to(victim)
    r = run("export", card, "--format", "spice", "-o", out)
    assert r.exit_code == 0, r.output
    assert victim.read_text() == "keep me\n"
    assert not out.is_symlink() and ".subckt V7_A plate grid cathode" in out.read_text()


def test_output_folder_that_is_itself_a_symlink_is_used(one_unit, tmp_path):
    real = tmp_path / "real"
    real.mkdir()
    (tmp_path / "via").symlink_to(real)
    r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--save", tmp_path / "via")
    assert r.exit_code == 0, r.stderr
    assert [p.name for p in real.iterdir()] == ["V7_A.koren.json"]


# -- errors ---------------------------------------------------------------------------


def test_unwritable_folder_is_one_line_error_exit_1(one_unit, tmp_path):
    blocker = tmp_path / "afile"
    blocker.write_text("")
    r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--save", blocker / "cards")
    one_line_error(r, str(blocker / "cards"), "part of the path is a file")


@pytest.mark.skipif(os.geteuid() == 0, reason="root ignores folder permissions")
def test_permission_denied_folder_is_one_line_error_exit_1(one_unit, tmp_path):
    locked = tmp_path / "locked"
    locked.mkdir(mode=0o500)
    try:
        r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--plot", locked / "plots")
        one_line_error(r, str(locked / "plots"), "Permission denied")
    finally:
        locked.chmod(0o700)


def test_permission_denied_is_one_line_error_exit_1_even_as_root(one_unit, tmp_path, monkeypatch):
    # root ignores folder modes, so the refusal is simulated at os.mkdir (EACCES, as the
    # kernel gives it to an ordinary user)
    def refuse(path, mode=0o777, *a, **k):
        raise PermissionError(errno.EACCES, "Permission denied", str(path))

    monkeypatch.setattr(os, "mkdir", refuse)
    r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--plot", tmp_path / "plots")
    one_line_error(r, str(tmp_path / "plots"), "cannot create the folder: Permission denied")


def test_save_folder_that_is_a_file_is_one_line_error_exit_1(one_unit, tmp_path):
    blocker = tmp_path / "cards"
    blocker.write_text("")
    r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--save", blocker)
    one_line_error(r, str(blocker), "is a file, not a folder")


def test_save_folder_that_is_a_dangling_link_is_one_line_error_exit_1(one_unit, tmp_path):
    link = tmp_path / "cards"
    link.symlink_to(tmp_path / "gone")
    r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--save", link)
    one_line_error(r, str(link), "is a symbolic link to a missing folder")
    assert not (tmp_path / "gone").exists()


def test_match_csv_into_a_folder_is_one_line_error_exit_1(tmp_path):
    folder = tmp_path / "cards"
    folder.mkdir()
    for k in range(2):
        save_card(folder / f"c{k}.json", FittedTriode("koren", dict(KOREN_12AX7, kg1=1060.0 + k), tube=f"T{k}",
                                                      valid_range={"va": (0.0, 400.0), "vg": (-4.0, 0.0)}))
    r = run("match", folder, "--va", "250", "--vg", "-2", "--tolerance", "10", "--csv", tmp_path)
    one_line_error(r, f"--csv {tmp_path}: is a folder")


def test_folder_where_file_should_go_is_one_line_error_exit_1(tmp_path):
    card = save_card(tmp_path / "V7_A.koren.json", triode())
    folder = tmp_path / "model.lib"
    folder.mkdir()
    r = run("export", card, "--format", "spice", "-o", folder)
    one_line_error(r, str(folder), "is a folder")
    with pytest.raises(OutputError, match="is a folder"):
        save_card(folder, triode())


def test_name_too_long_is_shortened_keeping_the_hash(tmp_path):
    # NAME_MAX is 255 bytes on the usual Linux file systems (common practice); names are at
    # most 64 characters (fitter.text.MAX_NAME), so the longest stem joins two such names
    a, b, sec = "T" * 63 + "1", "T" * 63 + "2", "S" * 64
    stems = unit_stems([(a, sec), (b, sec)])
    assert all(len(s) <= MAX_STEM for s in stems) and stems[0] != stems[1]
    assert unit_stems([("T" * 300, "A")])[0].__len__() <= MAX_STEM
    for t, s in zip((a, b), stems):
        p = save_card(tmp_path / card_filename(triode(t, sec), s), triode(t, sec))
        assert load_card(p).tube == t
    assert len(list(tmp_path.iterdir())) == 2


def test_name_too_long_for_the_file_system_is_one_line_error_exit_1(tmp_path):
    card = save_card(tmp_path / "V7_A.koren.json", triode())
    out = tmp_path / ("m" * 300 + ".lib")
    r = run("export", card, "--format", "spice", "-o", out)
    one_line_error(r, "the name is too long for the file system")


def test_folder_that_cannot_be_created_names_the_path():
    with pytest.raises(OutputError, match="^/proc/platebook-no: cannot create the folder"):
        prepare_folder("/proc/platebook-no")


# -- plots: the file named is the file written -------------------------------------


def test_plot_path_adds_png_to_a_bare_name_and_refuses_unknown_suffixes(tmp_path):
    assert plot_path(tmp_path / "x") == (tmp_path / "x.png", "png")
    assert plot_path(tmp_path / "x.svg") == (tmp_path / "x.svg", "svg")
    with pytest.raises(OutputError, match=r"cannot save a plot as '\.txt'"):
        plot_path(tmp_path / "x.txt")


def test_stage_plot_message_names_the_file_really_written(tmp_path):
    card = save_card(tmp_path / "V7_A.koren.json", triode())
    r = run("stage", "common-cathode", "--tube", card, "--bplus", "300", "--ra", "100k", "--rk", "1.5k",
            "--no-errors", "--plot", tmp_path / "x")
    assert r.exit_code == 0, r.output
    assert f"load-line plot: {tmp_path / 'x.png'}" in r.stdout
    assert (tmp_path / "x.png").read_bytes()[:8] == PNG_MAGIC and not (tmp_path / "x").exists()


def test_stage_plot_into_a_missing_folder_is_one_line_error_exit_1(tmp_path):
    card = save_card(tmp_path / "V7_A.koren.json", triode())
    r = run("stage", "common-cathode", "--tube", card, "--bplus", "300", "--ra", "100k", "--rk", "1.5k",
            "--no-errors", "--plot", tmp_path / "nowhere" / "x.png")
    one_line_error(r, "--plot", str(tmp_path / "nowhere" / "x.png"), "No such file or directory")


def test_distortion_plot_message_names_the_file_really_written(tmp_path):
    card = save_card(tmp_path / "V7_A.koren.json", triode())
    r = run("distortion", "common-cathode", "--tube", card, "--bplus", "300", "--ra", "100k", "--rk", "1.5k",
            "--vin", "0.5", "--plot", tmp_path / "wave")
    assert r.exit_code == 0, r.output
    assert f"plot: {tmp_path / 'wave.png'}" in r.stdout
    assert (tmp_path / "wave.png").read_bytes()[:8] == PNG_MAGIC


def test_fit_plot_written_atomically_leaves_no_temporary(one_unit, tmp_path):
    plots = tmp_path / "plots"
    r = run("fit", one_unit, "--model", "koren", "--jobs", "1", "--plot", plots, "--json")
    assert r.exit_code == 0, r.stderr
    assert json.loads(r.stdout)["written"] == [str(plots / "V7_A.koren.png")]
    assert [p.name for p in plots.iterdir()] == ["V7_A.koren.png"]
    assert (plots / "V7_A.koren.png").read_bytes()[:8] == PNG_MAGIC
