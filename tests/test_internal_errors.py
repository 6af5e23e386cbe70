"""An exception that escapes a command is a bug, not bad input: exit status 3 and one line
on stderr; the traceback only with ``platebook --debug`` or ``PLATEBOOK_DEBUG=1``.

The bug is simulated by monkeypatching an engine function to raise ``RuntimeError``.
Exit statuses 1 (bad input) and 2 (a fit or solve failed) are the CLI's contract
(fitter/cli/__init__.py).
"""

from __future__ import annotations

import subprocess
import sys

import pytest
from click.testing import CliRunner

from fitter.card import save_card
from fitter.cli import main
from fitter.errors import InputError
from fitter.triode import FittedTriode

# Koren's published 12AX7 set (from memory of Koren's model table)
KOREN_12AX7 = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)
LINE = ("internal error: RuntimeError: engine broke at 250 V — please report it; "
        "run with --debug for details")


@pytest.fixture
def card(tmp_path):
    return save_card(tmp_path / "card.json", FittedTriode("koren", KOREN_12AX7, tube="T1"))


@pytest.fixture
def broken_engine(monkeypatch):
    def boom(self, va, vg):
        raise RuntimeError("engine broke\n at 250 V")

    monkeypatch.setattr(FittedTriode, "small_signal", boom)


def run(*args, env=None):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False, env=env)


def test_internal_error_exits_3_with_one_line_and_no_traceback(card, broken_engine):
    r = run("point", card, "--va", 250, "--vg", -2, env={"PLATEBOOK_DEBUG": ""})
    assert r.exit_code == 3
    assert r.stderr.strip() == LINE  # newlines of the message folded into the one line
    assert r.stdout == ""


def test_debug_option_shows_the_traceback(card, broken_engine):
    r = run("--debug", "point", card, "--va", 250, "--vg", -2)
    assert r.exit_code == 3
    assert r.stderr.startswith("Traceback (most recent call last):")
    assert "in boom" in r.stderr and r.stderr.strip().endswith(LINE)


def test_debug_environment_variable_shows_the_traceback(card, broken_engine):
    r = run("point", card, "--va", 250, "--vg", -2, env={"PLATEBOOK_DEBUG": "1"})
    assert r.exit_code == 3 and "Traceback" in r.stderr and r.stderr.strip().endswith(LINE)


def test_debug_environment_variable_zero_means_off(card, broken_engine):
    r = run("point", card, "--va", 250, "--vg", -2, env={"PLATEBOOK_DEBUG": "0"})
    assert r.exit_code == 3 and "Traceback" not in r.stderr


def test_an_uncaught_input_error_is_bad_input_exit_1(card, monkeypatch):
    def bad(self, va, vg):
        raise InputError("must be below 1000 V", field="va")

    monkeypatch.setattr(FittedTriode, "small_signal", bad)
    r = run("point", card, "--va", 250, "--vg", -2)
    assert r.exit_code == 1
    # the field is named as the option that sets it (fitter/cli/fields.py)
    assert r.stderr.strip() == "error: --va: must be below 1000 V"


def test_good_run_is_untouched(card):
    r = run("point", card, "--va", 250, "--vg", -2)
    assert r.exit_code == 0 and r.stderr == "" and "transconductance" in r.stdout


def test_usage_errors_keep_exit_1(card):
    r = run("point", card, "--va", "lots", "--vg", -2)
    assert r.exit_code == 1 and "internal error" not in r.stderr


def test_no_traceback_reaches_a_user_of_the_real_entry_point(card):
    # the installed entry point (fitter.cli:main, standalone mode) in a fresh process
    code = ("import fitter.triode as t\n"
            "def boom(self, va, vg):\n    raise RuntimeError('engine broke')\n"
            "t.FittedTriode.small_signal = boom\n"
            "from fitter.cli import main\n"
            f"main(['point', {str(card)!r}, '--va', '250', '--vg', '-2'])\n")
    env = {k: v for k, v in __import__("os").environ.items() if k != "PLATEBOOK_DEBUG"}
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert p.returncode == 3
    assert p.stderr.splitlines() == ["internal error: RuntimeError: engine broke — please report it; "
                                     "run with --debug for details"]


def test_unwritable_folder_is_an_input_error_not_a_bug(card, tmp_path, monkeypatch):
    # an OSError naming a file (here: the folder for --save cannot be made) is about the
    # user's path: exit 1 with the path and the system's reason, no "internal error"
    import pathlib

    def refuse(self, *a, **k):
        raise PermissionError(13, "Permission denied", str(self))

    monkeypatch.setattr(pathlib.Path, "mkdir", refuse)

    csv = tmp_path / "one.csv"
    csv.write_text("va,ia_ma@vg=0,ia_ma@vg=-1\n50,1.0,0.4\n100,3.0,1.5\n150,6.0,3.2\n200,9.5,5.5\n"
                   "250,13.0,8.0\n300,17.0,11.0\n")
    r = run("fit", csv, "--save", tmp_path / "cards")
    assert r.exit_code == 1, r.stderr
    assert r.stderr.strip() == f"error: {tmp_path / 'cards'}: cannot create the folder: Permission denied"
    assert "internal error" not in r.stderr


def test_an_oserror_without_a_file_is_still_a_bug(card, monkeypatch):
    def boom(self, va, vg):
        raise OSError("device went away")

    monkeypatch.setattr(FittedTriode, "small_signal", boom)
    r = run("point", card, "--va", 250, "--vg", -2, env={"PLATEBOOK_DEBUG": ""})
    assert r.exit_code == 3 and r.stderr.startswith("internal error: OSError: device went away")


def test_closed_output_pipe_exits_quietly(card):
    # `platebook point ... | head` where the reader has gone: no traceback, no bug report
    import os

    r, w = os.pipe()
    os.close(r)
    try:
        p = subprocess.run([sys.executable, "-m", "fitter", "point", str(card), "--va", "250", "--vg", "-2"],
                           stdout=w, stderr=subprocess.PIPE, text=True)
    finally:
        os.close(w)
    assert p.returncode == 1
    assert p.stderr == ""


def test_internal_error_line_escapes_terminal_controls(card, monkeypatch):
    # a message carrying an escape sequence (e.g. from a file name) is shown escaped, so it
    # cannot drive the terminal (fitter.text.shown)
    def boom(self, va, vg):
        raise RuntimeError("bad \x1b[2J name")

    monkeypatch.setattr(FittedTriode, "small_signal", boom)
    r = run("point", card, "--va", 250, "--vg", -2, env={"PLATEBOOK_DEBUG": ""})
    assert r.exit_code == 3 and "\x1b" not in r.stderr
    assert r.stderr.startswith("internal error: RuntimeError: bad \\x1b[2J name — please report it")
