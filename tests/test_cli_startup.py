"""The command line loads each command's module only when that command runs.

Behaviour tests, not timings (bench/startup.py prints the start-up times): the group's
help lists every command with its own short help, and the heavy libraries stay out of
processes that do not use them (checked in a fresh interpreter through ``sys.modules``).
"""

from __future__ import annotations

import json
import subprocess
import sys

import click
import pytest
from click.testing import CliRunner

from fitter.card import save_card
from fitter.cli import COMMANDS, main
from fitter.triode import FittedTriode

HEAVY = ("lmfit", "matplotlib", "pandas", "networkx", "scipy.stats")
# Koren's published 12AX7 set (from memory of Koren's model table)
KOREN_12AX7 = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)


def _loaded_after(code: str) -> dict:
    """Run ``code`` in a fresh interpreter; which heavy libraries and command modules it loaded."""
    probe = (code + "\nimport sys, json\n"
             f"print(json.dumps({{m: m in sys.modules for m in {list(HEAVY)!r} + "
             "['fitter.cli.' + n for n in ('fitcmd', 'export', 'stage', 'match')]}))\n")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _all_commands():
    return {name: main.get_command(None, name) for name in COMMANDS}


def test_command_table_names_every_registered_command():
    # the table is the only list `platebook --help` sees; a command missing there is invisible
    cmds = _all_commands()
    assert all(c is not None for c in cmds.values())
    assert set(main.commands) == set(COMMANDS)


@pytest.mark.parametrize("limit", [45, 80, 200])
def test_table_short_help_is_the_commands_own(limit):
    # the short help click would take from each command's docstring (click's own rule)
    for name, cmd in _all_commands().items():
        short = click.Command(name, help=COMMANDS[name][1]).get_short_help_str(limit)
        assert short == cmd.get_short_help_str(limit), name


def test_group_help_lists_every_command_with_its_short_help():
    r = CliRunner().invoke(main, ["--help"], catch_exceptions=False)
    assert r.exit_code == 0
    listed = r.stdout.split("Commands:", 1)[1]
    for name, cmd in _all_commands().items():
        line = next(ln for ln in listed.splitlines() if ln.split()[:1] == [name])
        short = line.split(None, 1)[1]
        assert cmd.get_short_help_str(200).startswith(short.removesuffix("...").rstrip()), name


def test_importing_the_cli_loads_no_heavy_library_and_no_command_module():
    loaded = _loaded_after("import fitter.cli")
    assert not any(loaded.values()), [m for m, v in loaded.items() if v]


def test_group_help_loads_no_command_module():
    loaded = _loaded_after("from fitter.cli import main\nmain(['--help'], standalone_mode=False)")
    assert not any(loaded.values()), [m for m, v in loaded.items() if v]


def test_fit_help_loads_only_the_fit_module_and_no_heavy_library():
    loaded = _loaded_after("from fitter.cli import main\nmain(['fit', '--help'], standalone_mode=False)")
    assert loaded.pop("fitter.cli.fitcmd")
    assert not any(loaded.values()), [m for m, v in loaded.items() if v]


def test_point_runs_without_lmfit_matplotlib_pandas(tmp_path):
    card = save_card(tmp_path / "card.json", FittedTriode("koren", KOREN_12AX7, tube="T1"))
    loaded = _loaded_after(
        "from fitter.cli import main\n"
        f"main(['point', {str(card)!r}, '--va', '250', '--vg', '-2', '--json'], standalone_mode=False)")
    assert loaded.pop("fitter.cli.fitcmd")
    assert not any(loaded.values()), [m for m, v in loaded.items() if v]


def test_unknown_command_is_a_usage_error_exit_1():
    r = CliRunner().invoke(main, ["fitt"], catch_exceptions=False)
    assert r.exit_code == 1 and "No such command 'fitt'" in r.stderr
