"""Accounts: `platebook users ...`, what is stored (hashes only), and the checks sign-in and
the API make."""

from __future__ import annotations

import subprocess
import sys

import pytest
from sqlalchemy import select

from fitter.errors import InputError
from fitter.ledger.accounts import Account, ApiToken
from fitter.ledger.db import open_ledger
from fitter.service import accounts

PLATEBOOK = [sys.executable, "-m", "fitter"]


def _cli(db, *args, stdin=""):
    return subprocess.run(PLATEBOOK + ["users", "--db", db, *args], input=stdin, capture_output=True, text=True)


def test_users_add_list_role_token_disable_through_the_command_line(tmp_path):
    db = str(tmp_path / "l.sqlite")
    r = _cli(db, "add", "ann", "--role", "editor", "--password-stdin", stdin="a long enough secret\n")
    assert r.returncode == 0 and "account ann (editor) created" in r.stdout
    r = _cli(db, "token", "ann", "--note", "bench script")
    token = r.stdout.split(": ", 1)[1].split()[0]
    assert r.returncode == 0 and token.startswith("pbk_")
    assert accounts.check_token(db, token)["name"] == "ann"
    assert _cli(db, "role", "ann", "admin").returncode == 0
    listed = _cli(db, "list").stdout
    assert "ann" in listed and "admin" in listed and token[:10] in listed and token not in listed
    assert _cli(db, "disable", "ann").returncode == 0
    assert accounts.check_token(db, token) is None
    assert accounts.check_password(db, "ann", "a long enough secret") is None


def test_bad_input_is_one_line_naming_what(tmp_path):
    db = str(tmp_path / "l.sqlite")
    r = _cli(db, "add", "bob", "--password-stdin", stdin="short\n")
    assert r.returncode == 1 and r.stderr.strip() == "error: password: a password has at least 10 characters"
    r = _cli(db, "add", "no spaces allowed", "--password-stdin", stdin="a long enough secret\n")
    assert r.returncode == 1 and r.stderr.startswith("error: NAME:")
    r = _cli(db, "role", "nobody", "viewer")
    assert r.returncode == 1 and "no account named 'nobody'" in r.stderr


def test_only_hashes_are_stored(tmp_path):
    db = str(tmp_path / "l.sqlite")
    accounts.add_account(db, "cy", "viewer", "a long enough secret")
    token = accounts.new_token(db, "cy").data["token"]
    led = open_ledger(db)
    try:
        with led.read() as s:
            a = s.scalar(select(Account))
            t = s.scalar(select(ApiToken))
            assert "a long enough secret" not in a.password_hash and a.password_hash.count("$") >= 2  # salted
            assert token not in t.sha256 and len(t.sha256) == 64
    finally:
        led.close()


def test_a_second_account_of_the_same_name_is_refused(tmp_path):
    db = str(tmp_path / "l.sqlite")
    accounts.add_account(db, "dee", "viewer", "a long enough secret")
    with pytest.raises(InputError, match="exists already"):
        accounts.add_account(db, "dee", "admin", "another long secret")


def test_throttle_waits_double_after_the_free_failures():
    now = [0.0]
    t = accounts.SignInThrottle(free=2, base=1.0, cap=5.0, clock=lambda: now[0])
    for _ in range(2):
        assert t.wait("a", "ip") == 0
        t.failed("a", "ip")
    assert t.wait("a", "ip") == pytest.approx(1.0)  # base * 2**0
    t.failed("a", "ip")
    assert t.wait("a", "ip") == pytest.approx(2.0)  # base * 2**1
    for _ in range(5):
        t.failed("a", "ip")
    assert t.wait("a", "ip") == pytest.approx(5.0)  # capped
    assert t.wait("a", "other ip") == 0 and t.wait("b", "ip") == 0
    t.succeeded("a", "ip")
    assert t.wait("a", "ip") == 0
