"""Helpers of the web tests (shared by tests/web/conftest.py and the test files)."""

from __future__ import annotations

import re

import numpy as np

VA, VG = 250.0, -8.5  # the invented type's test position (a usual 12AU7 point, common practice)
PASSWORD = "correct horse battery"
ROLES = ("viewer", "editor", "admin")


def make_stock(synth, tube_types, write_long, path, n_tubes=3, seed=1, prefix="W", label=None):
    rng = np.random.default_rng(seed)
    tt = tube_types["12AU7"]
    units = []
    for k in range(n_tubes):
        name = label or f"{prefix}{k + 1:02d}"
        kg1 = tt.params["kg1"] * float(np.exp(0.05 * rng.standard_normal()))
        for s in ("A", "B"):
            p = dict(tt.params, kg1=kg1 * float(np.exp(0.01 * rng.standard_normal())))
            units.append(synth(tt, params=p, noise=0.01, seed=int(rng.integers(1 << 30)), tube=name, section=s,
                               va_step=20.0, grid_voltages=tuple(np.arange(0.0, -24.01, -4.0))))
    return write_long(path, units)



def csrf_of(html: str) -> str:
    m = re.search(r'name="csrf_token" value="([^"]+)"', html)
    assert m, "no CSRF token in the page"
    return m.group(1)


def sign_in(client, name, password=PASSWORD):
    page = client.get("/signin").get_data(as_text=True)
    return client.post("/signin", data={"name": name, "password": password, "csrf_token": csrf_of(page)})


def token_for(db, role) -> str:
    from fitter.service import accounts

    return accounts.new_token(db, role + "1").data["token"]
