"""Nothing from a card, a CSV or a file name can change what ngspice does.

A ``.control`` block in a netlist is a script: ngspice runs it, ``shell`` commands included,
even from a file pulled in by ``.include`` (checked with ngspice 39 by the positive control
below).  The exporter must let text reach a netlist only as one sanitised comment line or
a validated subcircuit name, whatever the FittedTriode holds.

Each ngspice test writes the exported model next to a small deck (the model included, a
plate and a grid supply, one instance), runs ``ngspice -b`` in that folder, and checks
that the marker file the injected command would create is absent and that ngspice's
operating point equals the model's own plate current (the independent reference: ngspice
evaluates the exported expression itself).
"""

from __future__ import annotations

import re
import subprocess

import pytest
from click.testing import CliRunner

from fitter.card import save_card
from fitter.cli import main
from fitter.export import ExportError, spice_comment, spice_name, spice_subcircuit
from fitter.triode import FittedTriode

from ngspice_util import NGSPICE, SKIP_REASON

needs_ngspice = pytest.mark.skipif(NGSPICE is None, reason=SKIP_REASON)

KOREN_12AX7 = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)  # Koren's table, from memory
MARKER = "injected"  # relative: ngspice runs in the test's folder
SHELL = f".control\nshell touch {MARKER}\n.endc\n"

#: ways to break out of a comment line: LF, CR only, CRLF, a backslash line continuation,
#: a '+' continuation line, form feed / vertical tab, NEL and the Unicode line separator
HOSTILE = {
    "newline": "V7\n" + SHELL,
    "cr_only": "V7\r" + SHELL.replace("\n", "\r"),
    "crlf": "V7\r\n" + SHELL.replace("\n", "\r\n"),
    "backslash_continuation": "V7 \\\n" + SHELL,
    "plus_continuation": "V7\n+ x\n" + SHELL,
    "form_feed_vertical_tab": "V7\x0c" + SHELL.replace("\n", "\x0b"),
    "nel_and_line_separator": "V7\x85" + SHELL.replace("\n", "\u2028"),
}

VA, VG = 250.0, -1.5


def triode(tube="V7", section="A", **kw):
    return FittedTriode("koren", KOREN_12AX7, tube=tube, section=section, **kw)


def run_deck(folder, model_text: str, name: str) -> float:
    """Include ``model_text`` in a deck in ``folder``, run ngspice there, return the plate
    current [A] of the operating point (ngspice prints i(Va), the supply's current)."""
    (folder / "model.lib").write_text(model_text)
    deck = (f"* spice safety check\n.include model.lib\nVa plate 0 DC {VA}\nVg grid 0 DC {VG}\n"
            f"X1 plate grid 0 {name}\n.control\nop\nprint i(Va)\nquit 0\n.endc\n.end\n")
    (folder / "deck.cir").write_text(deck)
    proc = subprocess.run([NGSPICE, "-b", "deck.cir"], cwd=folder, capture_output=True, text=True, timeout=60)
    log = proc.stdout + proc.stderr
    m = re.search(r"i\(va\)\s*=\s*(\S+)", log, re.I)
    assert proc.returncode == 0 and m, f"the deck did not run:\n{model_text}\n{log[-2000:]}"
    return -float(m.group(1))  # a supply's current flows into its + node


def assert_only_comments_and_elements(text: str, name: str):
    # the netlist's lines: sanitised comments, then exactly our own element lines
    allowed = re.compile(rf"(\* [ -~]*|\.subckt {name} plate grid cathode|B(plate|grid) \w+ cathode I=[-+*/()\w.,]+"
                         rf"|C(gk|ga|ak) \w+ \w+ [\d.e+-]+|\.ends {name})")
    for line in text.split("\n")[:-1]:
        assert allowed.fullmatch(line), repr(line)
    assert text.endswith("\n") and "\r" not in text and "\\" not in text


@needs_ngspice
@pytest.mark.ngspice
def test_harness_detects_an_injected_command_positive_control(tmp_path):
    # the same deck with an unsanitised header (what the exporter wrote before): ngspice
    # runs the shell command, so the marker's absence in the other tests means something
    t = triode()
    text = "* Platebook SPICE model of " + HOSTILE["newline"] + spice_subcircuit(t)
    ia = run_deck(tmp_path, text, "V7_A")
    assert (tmp_path / MARKER).exists()
    assert ia == pytest.approx(float(t.current(VA, VG)), rel=1e-5)


@needs_ngspice
@pytest.mark.ngspice
@pytest.mark.parametrize("trick", sorted(HOSTILE))
def test_crafted_card_netlist_runs_no_injected_command_in_ngspice(tmp_path, trick):
    hostile = HOSTILE[trick]
    t = triode(tube=hostile, section=hostile)
    name = spice_name(t)
    text = spice_subcircuit(t, card="cards/" + hostile + ".json")
    assert_only_comments_and_elements(text, name)
    ia = run_deck(tmp_path, text, name)
    assert not (tmp_path / MARKER).exists(), text
    assert ia == pytest.approx(float(t.current(VA, VG)), rel=1e-5)


@needs_ngspice
@pytest.mark.ngspice
def test_card_file_name_with_a_control_block_runs_no_injected_command(tmp_path):
    # the file name of the card goes into the header: a name with line breaks is legal on Linux
    card = save_card(tmp_path / ("V7\n" + SHELL + ".json"), triode())
    out = tmp_path / "model.lib"
    r = CliRunner().invoke(main, ["export", str(card), "--format", "spice", "-o", str(out)])
    assert r.exit_code == 0, r.output
    text = out.read_text()
    assert_only_comments_and_elements(text, "V7_A")
    ia = run_deck(tmp_path, text, "V7_A")
    assert not (tmp_path / MARKER).exists(), text
    assert ia == pytest.approx(float(triode().current(VA, VG)), rel=1e-5)


@needs_ngspice
@pytest.mark.ngspice
def test_card_with_hostile_tube_name_is_refused_or_exported_safely(tmp_path):
    # a card whose tube name carries a .control block: a strict card reader refuses it
    # (exit 1, one line); otherwise the export must still be harmless in ngspice
    card = save_card(tmp_path / "evil.json", triode(tube=HOSTILE["newline"]))
    r = CliRunner().invoke(main, ["export", str(card), "--format", "spice"])
    if r.exit_code == 1:
        assert r.stderr.startswith("error:") and r.stderr.count("\n") == 1 and "Traceback" not in r.output
        return
    assert r.exit_code == 0, r.output
    name = re.search(r"^\.subckt (\w+) ", r.stdout, re.M).group(1)
    assert_only_comments_and_elements(r.stdout, name)
    run_deck(tmp_path, r.stdout, name)
    assert not (tmp_path / MARKER).exists()


@pytest.mark.parametrize("bad", ["V7\n", "V7\n.control\nshell touch x\n.endc", "V7\r", "V7 A", "V7.A", "_V7",
                                 "V7+", "V\u00e97", "", "A" * 33])
def test_export_name_with_trailing_newline_is_refused(bad):
    # Python's '$' matches before a trailing newline; the check is a fullmatch
    with pytest.raises(ExportError, match="is not a usable subcircuit name"):
        spice_subcircuit(triode(), name=bad)


def test_cli_name_with_trailing_newline_is_one_line_error_exit_1(tmp_path):
    card = save_card(tmp_path / "V7_A.koren.json", triode())
    r = CliRunner().invoke(main, ["export", str(card), "--format", "spice", "--name", "V7A\n"])
    assert r.exit_code == 1 and "Traceback" not in r.output
    assert r.stderr.startswith("error: --name: 'V7A\\n' is not a usable subcircuit name")
    assert r.stderr.count("\n") == 1


def test_default_subcircuit_name_is_always_valid():
    for tube, section in [(HOSTILE["newline"], "A"), ("12AX7", "B"), ("???", None), ("T" * 80, "A"),
                          ("T" * 80, "B")]:
        name = spice_name(triode(tube, section))
        assert re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_]{0,31}", name), name
    # long names cut to 32 characters stay distinct (hash of the full label)
    assert spice_name(triode("T" * 80, "A")) != spice_name(triode("T" * 80, "B"))


def test_comment_text_is_one_line_of_safe_characters():
    s = spice_comment("Dempwolf-Z\u00f6lzer\n.control\rshell rm -rf ~ \\\u2028$HOME `x` {p}" + "x" * 400)
    assert re.fullmatch(r"[ -~]*", s) and len(s) <= 300
    assert s.startswith("Dempwolf-Zolzer?.control?shell rm -rf ~ ??$".replace("$", "?"))
    for ch in "\n\r\\`${}":
        assert ch not in s


def test_text_in_a_number_field_never_reaches_the_netlist():
    # a FittedTriode built in Python can carry anything in its range or capacitances
    t = triode(valid_range={"va": ("0\n.control", 400.0), "vg": (-4.0, 0.0)})
    with pytest.raises(ExportError, match="fitted range value .* is not a number"):
        spice_subcircuit(t)
    with pytest.raises(ExportError, match="is not a number"):
        spice_subcircuit(triode(), cgk="1p\n.control")
    with pytest.raises(ExportError, match="is not finite"):
        spice_subcircuit(triode(), cga=float("inf"))
    with pytest.raises(ExportError, match="is not finite"):
        spice_subcircuit(triode(), grid_resistance=float("nan"))


def test_numbers_are_formatted_by_the_exporter():
    # a numeric string is read as a number and written in our own format (repr of a float)
    t = triode(valid_range={"va": ("0", "400"), "vg": (-4.0, 0.0)})
    text = spice_subcircuit(t, cgk="1.6e-12")
    assert "Cgk grid cathode 1.6e-12" in text and "va 0 .. 400 V" in text
