"""Datasheet plots in the ledger (fitter/ledger/plots.py): stored bytes for bytes, the work in
progress kept, saved measurements recorded, and a back-up and restore that keeps them.

The reference is the ledger itself (``fitter.ledger.backup.dump``: every row before and after,
compared value by value) and hashlib's SHA-256 of the bytes.  The images are INVENTED (a few
lines drawn with Pillow).
"""

from __future__ import annotations

import hashlib
import io

import pytest

from fitter.errors import InputError
from fitter.ledger import plots
from fitter.ledger.backup import dump
from fitter.ledger.db import open_ledger
from fitter.service import stock as svc


def _png(seed: int) -> bytes:
    from PIL import Image, ImageDraw

    im = Image.new("RGB", (120, 80), "white")
    d = ImageDraw.Draw(im)
    d.line([(10, 70), (110, 10 + seed)], fill="black", width=2)
    buf = io.BytesIO()
    im.save(buf, "PNG")
    return buf.getvalue()


STATE = {"marks": [{"px": 10.0, "py": 70.0, "axis": "va", "value": 0.0},
                   {"px": 110.0, "py": 70.0, "axis": "va", "value": 300.0}],
         "box": [5.0, 5.0, 115.0, 75.0],
         "curves": [{"grid_v": -2.5, "points": [[10.0, 70.0], [60.5, 40.25], [110.0, 12.0]]}],
         "saved": None}


def _store(led, seed, who="ann"):
    data = _png(seed)
    return plots.add_plot(led, "sheet é.png", hashlib.sha256(data).hexdigest(), "png", 120, 80, data, who), data


def test_a_plot_is_stored_byte_for_byte_and_its_work_is_kept(ledger):
    pid, data = _store(ledger, 1)
    assert plots.plot_content(ledger, pid) == (data, "png")
    info = plots.plot_row(ledger, pid)
    assert (info["name"], info["width"], info["height"], info["size"]) == ("sheet é.png", 120, 80, len(data))
    assert info["state"] == plots.EMPTY_STATE and info["measurement_ids"] == []
    plots.save_state(ledger, pid, marks=STATE["marks"], box=STATE["box"])
    assert plots.save_state(ledger, pid, curves=STATE["curves"]) == STATE  # each change merged into the rest
    assert plots.plot_row(ledger, pid)["state"] == STATE  # floats back exactly (JSON)
    with pytest.raises(ValueError, match="colour"):
        plots.save_state(ledger, pid, colour="red")
    assert plots.add_measurements(ledger, pid, [7, 8]) == [7, 8]
    assert plots.add_measurements(ledger, pid, [8, 9], saved={"units": [3]}) == [7, 8, 9]
    assert plots.plot_row(ledger, pid)["state"] == {**STATE, "saved": {"units": [3]}}
    listed = plots.list_plots(ledger)
    assert [p["id"] for p in listed] == [pid] and listed[0]["curves"] == 1 and listed[0]["saved"] == 3


def test_an_unknown_plot_is_an_input_error_on_the_id(ledger):
    for call in (lambda: plots.plot_row(ledger, 99), lambda: plots.plot_content(ledger, 99),
                 lambda: plots.save_state(ledger, 99, box=None), lambda: plots.add_measurements(ledger, 99, [1])):
        with pytest.raises(InputError, match="no plot 99") as e:
            call()
        assert e.value.field == "id"


@pytest.mark.parametrize("db", ["sqlite"], indirect=True)
def test_backup_and_restore_keep_plot_images_and_their_work(db, tmp_path):
    svc.init(db)
    led = open_ledger(db)
    a, data_a = _store(led, 1)
    _store(led, 2, who="bob")
    _store(led, 1)  # the same image twice: two rows, one file
    plots.save_state(led, a, **STATE)
    rows = dump(led)
    led.close()
    folder = tmp_path / "backup"
    svc.backup(db, str(folder))
    assert (folder / "plots" / hashlib.sha256(data_a).hexdigest()).read_bytes() == data_a
    assert len(list((folder / "plots").iterdir())) == 2
    target = str(tmp_path / "restored.sqlite")
    svc.restore(target, str(folder))
    back = open_ledger(target)
    assert dump(back) == rows and len(rows["plot_images"]) == 3
    back.close()
    # a changed image is found before anything is stored
    (folder / "plots" / hashlib.sha256(data_a).hexdigest()).write_bytes(data_a + b"x")
    other = str(tmp_path / "other.sqlite")
    with pytest.raises(InputError, match="SHA-256 differs from its name"):
        svc.restore(other, str(folder))
    led = open_ledger(other)
    assert all(not r for r in dump(led).values())
    led.close()
