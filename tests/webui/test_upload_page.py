"""The upload page: files in, units stored and listed; a bad file lists every problem with
file, line and column and stores nothing; names from files show as text."""

from __future__ import annotations

import io

from fitter.service import stock

from .webtools import csrf_of, make_stock


def _post(client, files, tube_type="DT"):
    token = csrf_of(client.get("/upload").get_data(as_text=True))
    return client.post("/upload", data={"csrf_token": token, "type": tube_type, "model": "koren",
                                        "file": [(io.BytesIO(b), n) for n, b in files]},
                       content_type="multipart/form-data")


def test_an_editor_uploads_two_files_and_sees_every_unit(fresh_signed_in, fresh, synth, tube_types, write_long, tmp_path):
    a = make_stock(synth, tube_types, write_long, tmp_path / "a.csv", n_tubes=1, seed=2, prefix="UA")
    b = make_stock(synth, tube_types, write_long, tmp_path / "b.csv", n_tubes=1, seed=3, prefix="UB")
    r = _post(fresh_signed_in("editor"), [("a.csv", a.read_bytes()), ("b.csv", b.read_bytes())])
    html = r.get_data(as_text=True)
    assert r.status_code == 200 and "Stored 4 unit(s)" in html  # two dual triodes
    assert 'href="/tube/UA01"' in html and 'href="/tube/UB01"' in html
    assert stock.list_tubes(fresh).data["total"] == 2


def test_a_bad_file_lists_file_line_and_column_and_nothing_is_stored(fresh_signed_in, fresh, synth, tube_types,
                                                                    write_long, tmp_path):
    good = make_stock(synth, tube_types, write_long, tmp_path / "a.csv", n_tubes=1, seed=2, prefix="UA").read_bytes()
    lines = good.decode().splitlines()
    lines[5] = lines[5].rsplit(",", 1)[0] + ",12..5"  # line 6: a current that is no number
    r = _post(fresh_signed_in("editor"), [("good.csv", good), ("broken.csv", ("\n".join(lines) + "\n").encode())])
    html = r.get_data(as_text=True)
    assert r.status_code == 400 and "Nothing was stored" in html
    assert "<b>broken.csv</b>, line 6, column" in html
    assert stock.list_tubes(fresh).data["total"] == 0


def test_no_file_is_a_clear_message(fresh_signed_in):
    r = _post(fresh_signed_in("editor"), [])
    assert r.status_code == 400 and "choose at least one file" in r.get_data(as_text=True)


def test_a_tube_named_like_a_script_shows_as_text(fresh_signed_in, fresh, synth, tube_types, write_long, tmp_path):
    name = "<script>alert(1)</script>"
    f = make_stock(synth, tube_types, write_long, tmp_path / "x.csv", n_tubes=1, seed=4, label=name)
    c = fresh_signed_in("editor")
    r = _post(c, [("<b>x</b>.csv", f.read_bytes())])
    html = r.get_data(as_text=True)
    assert r.status_code == 200, html
    assert "<script>alert" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<b>x</b>.csv" not in html
    page = c.get("/stock").get_data(as_text=True)
    assert "<script>alert" not in page and "&lt;script&gt;alert(1)&lt;/script&gt;" in page


def test_the_same_curves_under_a_new_label_are_stored_and_the_page_warns(fresh_signed_in, fresh, synth, tube_types,
                                                                         write_long, tmp_path):
    f = make_stock(synth, tube_types, write_long, tmp_path / "a.csv", n_tubes=1, seed=2, prefix="UA").read_bytes()
    c = fresh_signed_in("editor")
    assert 'class="warn"' not in _post(c, [("a.csv", f)]).get_data(as_text=True)
    r = _post(c, [("b.csv", f.replace(b"UA01", b"UB07"))])
    html = r.get_data(as_text=True)
    assert r.status_code == 200 and "Stored 2 unit(s)" in html  # stored, not refused
    assert "b.csv: UB07:A: the same measured points as UA01:A; stored all the same" in html
    assert stock.list_tubes(fresh).data["total"] == 2
