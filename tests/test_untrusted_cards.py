"""Model cards and fit files are untrusted input (issue 8, section 1; terminal escaping).

Every bad card, or bad entry of a ``platebook fit --json`` file, gives a :class:`CardError`
(an :class:`~fitter.errors.InputError`) naming the file and the field; on the command line
that is one ``error:`` line and exit status 1, never a traceback.  Cards and fit entries go
through the same validator (``fitter.card.unit_from_fields``).

The cards start from a real fit of invented curves (tests/conftest.py, Koren's published
12AX7 set, from memory); each test then breaks one thing.  Expected messages are the
validator's own wording (fitter/card.py); bounds are those of fitter/models.py.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from fitter.card import CardError, card_dict, load_card, load_fits, save_card
from fitter.cli import main
from fitter.errors import InputError
from fitter.fit import fit_curves
from fitter.triode import FittedTriode


@pytest.fixture(scope="module")
def fitted(synth, tube_types):
    s = synth(tube_types["12AX7"], noise=0.01, seed=31, tube="V5", section="A")
    r = fit_curves(s.curveset(), "koren")
    assert r.converged, r.failure
    return r


@pytest.fixture
def good(fitted):
    """A valid card as a dict (JSON round trip, so it holds only JSON types)."""
    return json.loads(json.dumps(card_dict(fitted.triode, fitted.figures(), ["lot.csv"])))


def write(tmp_path, d, name="card.json"):
    """Write a card: a dict as JSON, text or bytes as they are."""
    p = tmp_path / name
    if isinstance(d, bytes):
        p.write_bytes(d)
    else:
        p.write_text(d if isinstance(d, str) else json.dumps(d))
    return p


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def assert_one_line_error(r, *needles):
    """Exit 1, one 'error:' line on stderr naming what is asked, no traceback."""
    assert r.exit_code == 1, (r.exit_code, r.output)
    assert isinstance(r.exception, SystemExit), r.exception  # not an uncaught exception
    assert "Traceback" not in r.output
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), r.stderr
    for n in needles:
        assert n in lines[0], (n, lines[0])


# --------------------------------------------------------------------------
# the file itself
# --------------------------------------------------------------------------


def test_card_not_utf8_is_a_clean_error(tmp_path, good):
    # a Latin-1 byte (0xe9, "é") inside a string: not UTF-8 (the UTF-8 standard, RFC 3629)
    raw = json.dumps(good).replace('"V5"', '"V5\\u00e9"').encode().replace(b"\\u00e9", b"\xe9")
    p = write(tmp_path, raw)
    with pytest.raises(CardError, match=rf"^{p}: not UTF-8 text \(byte 0xe9 at offset \d+\)"):
        load_card(p)
    assert_one_line_error(run("point", p, "--va", 250, "--vg", -2), str(p), "not UTF-8")


def test_card_nested_too_deep_for_the_decoder_is_a_clean_error(tmp_path):
    # 100,000 nested lists: Python's json decoder raises RecursionError (CPython's recursion limit)
    p = write(tmp_path, '{"format": ' + "[" * 100_000 + "]" * 100_000 + "}")
    with pytest.raises(CardError, match=rf"^{p}: not valid JSON: nested too deep"):
        load_card(p)
    assert_one_line_error(run("point", p, "--va", 250, "--vg", -2), str(p), "nested too deep")


def test_card_nested_deeper_than_the_limit_is_a_clean_error(tmp_path, good):
    # 40 levels parse fine but are far beyond what a card needs (4 levels; fitter/card.py MAX_DEPTH)
    good["fit"] = {"x": json.loads("[" * 40 + "]" * 40)}
    p = write(tmp_path, good)
    with pytest.raises(CardError, match=rf"^{p}: nested too deep"):
        load_card(p)


@pytest.mark.parametrize("digits", [400, 5000])
def test_card_integer_with_thousands_of_digits_is_a_clean_error(tmp_path, good, digits):
    # 400 digits overflow float() (OverflowError); 5000 pass Python's int-string limit of
    # 4300 digits (ValueError) -- both from the Python documentation
    p = write(tmp_path, json.dumps(good).replace('"mu": ', '"mu": ' + "9" * digits + ', "_": ', 1))
    with pytest.raises(CardError, match=rf"^{p}: field 'params.mu': must be a finite number"):
        load_card(p)
    assert_one_line_error(run("point", p, "--va", 250, "--vg", -2), "params.mu")


def test_card_file_over_the_size_limit_is_refused_unread(tmp_path, good):
    # fitter/card.py MAX_CARD_BYTES = 1 MB; a real card is about 3 kB
    good["reference"] = "x" * 1_100_000
    p = write(tmp_path, good)
    with pytest.raises(CardError, match=rf"^{p}: is \d+ bytes; a model card is at most 1000000 bytes"):
        load_card(p)


@pytest.mark.skipif(not Path("/dev/zero").exists(), reason="needs /dev/zero")
def test_card_from_an_endless_device_reads_no_more_than_the_limit():
    # /dev/zero reports size 0 and never ends (POSIX); the reader stops at the limit
    with pytest.raises(CardError, match=r"^/dev/zero: is over 1000000 bytes"):
        load_card("/dev/zero")


def test_card_with_a_byte_order_mark_loads_and_exports(tmp_path, good):
    # a UTF-8 byte order mark (EF BB BF, the Unicode standard) is what some editors write
    p = write(tmp_path, b"\xef\xbb\xbf" + json.dumps(good).encode())
    assert load_card(p).tube == "V5"
    r = run("export", p, "--format", "json")
    assert r.exit_code == 0 and json.loads(r.stdout)["tube"] == "V5"


# --------------------------------------------------------------------------
# fields of the wrong type, size or value
# --------------------------------------------------------------------------

# the JSON types each field may have (fitter/card.py, format version 1)
FIELD_TYPES = {
    "tube": (str,), "section": (str, type(None)), "model": (str,), "params": (dict,),
    "stderr": (dict, type(None)), "free": (list, type(None)), "covariance": (list, type(None)),
    "fit": (dict, type(None)), "valid_range": (dict, type(None)), "envelope": (dict, type(None)),
    "source": (list, str, type(None)), "reference": (str, type(None)), "created": (str, type(None)),
    "platebook": (str, type(None)),
}
WRONG = [True, 7, 2.5, "text", [1, 2], {"a": 1}, None]


@pytest.mark.parametrize("field", list(FIELD_TYPES))
def test_any_value_of_the_wrong_type_in_any_field_is_a_clean_error(tmp_path, good, field):
    for value in WRONG:
        if isinstance(value, FIELD_TYPES[field]) and not isinstance(value, bool) or (
                isinstance(value, bool) and bool in FIELD_TYPES[field]):
            continue
        d = copy.deepcopy(good)
        d[field] = value
        p = write(tmp_path, d)
        with pytest.raises(CardError) as e:
            load_card(p)
        assert e.value.file == str(p) and e.value.field.startswith(field), (field, value, str(e.value))
        assert str(e.value).startswith(f"{p}: field '{field}"), str(e.value)


@pytest.mark.parametrize("path,value", [
    (("params", "mu"), "100"), (("params", "kp"), True), (("params", "kg1"), None),
    (("stderr", "mu"), "0.1"), (("stderr", "mu"), -1.0), (("free",), "mu"), (("free",), [1, 2]),
    (("free",), ["mu", "mu"]), (("valid_range",), [0, 400]), (("valid_range", "va_v"), "0..400"),
    (("valid_range", "va_v"), [400.0, 0.0]), (("valid_range", "va_v"), [0, "x"]),
    (("valid_range", "zz"), [0, 1]), (("envelope", "curves"), "none"), (("envelope", "curves"), [[1, 2]]),
    (("envelope", "curves"), []), (("envelope", "ia_max_ma"), -1.0), (("envelope", "pa_max_w"), "2"),
    (("source",), 5), (("source",), [{"file": "x"}]), (("source",), ["x" * 5000]),
    (("fit", "rms_ma"), "small"), (("tube",), "V\x1b[2J"), (("tube",), "x" * 65), (("section",), "A\nB"),
    (("model",), 3),
])
def test_nested_field_of_the_wrong_type_or_value_is_a_clean_error(tmp_path, good, path, value):
    d = copy.deepcopy(good)
    target = d
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = value
    p = write(tmp_path, d)
    with pytest.raises(CardError) as e:
        load_card(p)
    assert e.value.field.startswith(path[0]), str(e.value)
    assert str(e.value).startswith(f"{p}: field '{path[0]}")
    assert "\x1b" not in str(e.value) and "\n" not in str(e.value)


def test_card_error_is_an_input_error_with_file_and_field(tmp_path, good):
    # fitter/errors.py: every input error carries where it is, apart from the message
    good["params"]["mu"] = "x"
    p = write(tmp_path, good)
    with pytest.raises(InputError) as e:
        load_card(p)
    assert isinstance(e.value, CardError)
    assert (e.value.file, e.value.field) == (str(p), "params.mu")
    assert str(e.value) == f"{p}: field 'params.mu': must be a finite number, got text"


def test_card_with_mu_zero_is_refused(tmp_path, good):
    # fitter/models.py: Koren's mu lies within 0.5..500; mu = 0 would divide by zero in Koren's E1
    good["params"]["mu"] = 0
    p = write(tmp_path, good)
    with pytest.raises(CardError, match=rf"^{p}: field 'params.mu': 0.0 is outside the koren model's bounds 0.5..500"):
        load_card(p)


@pytest.mark.parametrize("change,message", [
    (lambda c: c.__setitem__(0, [c[0][0]] + [x * 2 for x in c[0][1:]]), "is not symmetric"),
    (lambda c: c[1].__setitem__(1, -abs(c[1][1])), r"has a negative variance on its diagonal \(entry \[1\]\[1\]"),
    (lambda c: [r.__setitem__(j, (1.0 if i == j else -0.9)) for i, r in enumerate(c) for j in range(len(r))],
     "is not positive semi-definite"),
    (lambda c: c.pop(), r"is 4x5, expected 5x5"),
    (lambda c: c[2].__setitem__(2, "x"), r"\[2\]\[2\]': must be a finite number"),
])
def test_malformed_covariance_is_refused(tmp_path, good, change, message):
    # a covariance matrix is symmetric positive semi-definite (textbook linear algebra);
    # the all -0.9 off-diagonal 5x5 matrix has eigenvalue 1 - 0.9*4 < 0
    change(good["covariance"])
    p = write(tmp_path, good)
    with pytest.raises(CardError, match=rf"^{p}: field 'covariance.*{message}"):
        load_card(p)


def test_covariance_marked_not_determined_loads_without_errors(tmp_path, good):
    # card_dict writes null for an entry that was not finite: the format's "not determined"
    good["covariance"][0][0] = None
    t = load_card(write(tmp_path, good))
    assert t.covariance is None and np.isnan(t.small_signal(250.0, -2.0).gm_err)


# --------------------------------------------------------------------------
# out-of-bounds parameters: never a figure
# --------------------------------------------------------------------------


def test_fitted_triode_refuses_parameters_outside_the_model_bounds():
    # fitter/models.py: Koren's mu within 0.5..500, kvb >= 0
    p = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)  # Koren's 12AX7, from memory
    with pytest.raises(InputError, match="outside the koren model's bounds") as e:
        FittedTriode("koren", dict(p, mu=-5.0))
    assert e.value.field == "params.mu"
    with pytest.raises(InputError) as e:
        FittedTriode("koren", dict(p, kvb=float("nan")))
    assert e.value.field == "params.kvb"
    with pytest.raises(InputError):
        FittedTriode("koren", p).with_params({"ex": 9.0})


def test_point_refuses_out_of_bounds_params(tmp_path, good):
    # before: a card with mu = -5 made 'point' print 1.5e-10 mA and exit 0
    good["params"]["mu"] = -5
    p = write(tmp_path, good)
    r = run("point", p, "--va", 250, "--vg", -2)
    assert_one_line_error(r, str(p), "params.mu", "bounds")
    assert "mA" not in r.stdout


@pytest.mark.parametrize("option,value", [("--va", "nan"), ("--vg", "inf"), ("--va", "-inf")])
def test_point_refuses_non_finite_option_values(tmp_path, fitted, option, value):
    p = save_card(tmp_path / "c.json", fitted.triode)
    args = {"--va": "250", "--vg": "-2", option: value}
    r = run("point", p, "--va", args["--va"], "--vg", args["--vg"])
    assert_one_line_error(r, option, "finite")


def test_parameter_fitted_onto_its_bound_still_gets_error_bars(fitted):
    # propagate() steps one-sidedly at a bound instead of leaving the model's range
    t = fitted.triode
    at_bound = t.with_params({"kvb": 0.0})  # fitter/models.py: kvb >= 0
    ss = at_bound.small_signal(250.0, -2.0)
    assert np.isfinite(ss.gm_err) and ss.gm_err > 0


# --------------------------------------------------------------------------
# the fit JSON goes through the same validator
# --------------------------------------------------------------------------


def fit_file(tmp_path, fitted, change=None):
    d = {"platebook": "test", "fits": [json.loads(json.dumps(fitted.to_dict()))]}
    if change:
        change(d["fits"][0])
    p = tmp_path / "fits.json"
    p.write_text(json.dumps(d))
    return p


@pytest.mark.parametrize("change", [
    lambda f: f["params"].__setitem__("mu", 0),
    lambda f: f["params"].__setitem__("kp", "600"),
    lambda f: f.__setitem__("free", "mu"),
    lambda f: f.__setitem__("valid_range", [0, 400]),
    lambda f: f.__setitem__("source", 5),
    lambda f: f.__setitem__("tube", "V\x1b]0;x\x07"),
    lambda f: f["covariance"][0].__setitem__(1, f["covariance"][0][1] * 3 + 1),
    lambda f: f.__setitem__("envelope", {"curves": [[0, 1]], "ia_max_ma": 1, "pa_max_w": 1}),
])
def test_match_reads_fit_json_with_same_validator(tmp_path, fitted, change):
    # the same change to a card and to a fit entry gives the same message, the field
    # prefixed by the entry (fits[0].); before, match dropped a malformed covariance silently
    p = fit_file(tmp_path, fitted, change)
    with pytest.raises(CardError) as in_fits:
        load_fits(p)
    card = json.loads(json.dumps(card_dict(fitted.triode, fitted.figures(), ["lot.csv"])))
    change(card)
    with pytest.raises(CardError) as in_card:
        load_card(write(tmp_path, card))
    assert in_fits.value.message == in_card.value.message
    assert in_fits.value.field == "fits[0]." + in_card.value.field
    r = run("match", p, "--va", 250, "--vg", -2)
    assert_one_line_error(r, str(p), f"fits[0].{in_card.value.field}")


def test_match_fit_json_of_the_wrong_shape_is_a_clean_error(tmp_path, fitted):
    for text in ('{"fits": [3]}', '{"fits": [{"converged": "yes"}]}', '{"fits": {}}', "[]",
                 '{"fits": [], "best": 5}', '{"fits": [{"converged": false, "tube": 3}]}'):
        p = tmp_path / "f.json"
        p.write_text(text)
        with pytest.raises(CardError, match=rf"^{p}: "):
            load_fits(p)
        assert_one_line_error(run("match", p, "--va", 250, "--vg", -2), str(p))


def test_match_reads_a_good_fit_json_into_the_same_unit_as_the_card(tmp_path, fitted):
    units, failed = load_fits(fit_file(tmp_path, fitted))
    card = load_card(save_card(tmp_path / "c.json", fitted.triode, fitted.figures()))
    assert failed == [] and len(units) == 1
    u = units[0]
    assert u.params == card.params and u.free == card.free and u.envelope == card.envelope
    np.testing.assert_array_equal(u.covariance, card.covariance)


# --------------------------------------------------------------------------
# terminal escaping
# --------------------------------------------------------------------------


def test_tube_name_with_an_escape_is_refused_where_it_is_and_never_sent_raw(tmp_path, synth, tube_types, write_long):
    # ESC [ 2 J clears a terminal (ECMA-48): the reader refuses such a name with its line and
    # column, and the message shows it escaped
    u = synth(tube_types["12AX7"], seed=4, tube="V\x1b[2J", section="A")
    path = write_long(tmp_path / "esc.csv", [u])
    r = run("fit", path, "--save", tmp_path / "cards")
    assert r.exit_code == 1, r.output
    assert "\x1b" not in r.stdout and "\x1b" not in r.stderr
    assert "column 1 ('tube')" in r.stderr and "V\\x1b[2J" in r.stderr and "control character" in r.stderr
    assert not (tmp_path / "cards").exists() or not any((tmp_path / "cards").iterdir())
    r = run("fit", path, "--json")
    assert r.exit_code == 1 and "\x1b" not in r.stdout + r.stderr


def test_tube_name_longer_than_a_card_keeps_is_refused(tmp_path, synth, tube_types, write_long):
    u = synth(tube_types["12AX7"], seed=4, tube="T" * 65, section="A")
    r = run("fit", write_long(tmp_path / "long.csv", [u]))
    assert r.exit_code == 1 and "at most 64" in r.stderr


def test_label_of_a_triode_built_in_python_shows_control_characters_escaped_in_tables(tmp_path):
    from fitter.triode import FittedTriode
    from fitter.models import get_model
    t = FittedTriode(get_model("koren"), {"mu": 100, "ex": 1.4, "kg1": 1060, "kp": 600, "kvb": 300},
                     tube="V\x1b[2J", section="A")
    assert "\x1b" not in t.label and "V\\x1b[2J:A" == t.label


def test_error_messages_escape_control_characters_in_file_names(tmp_path):
    p = tmp_path / "evil\x1b[2J.json"
    p.write_text("{")
    r = run("point", p, "--va", 250, "--vg", -2)
    assert_one_line_error(r, "evil\\x1b[2J.json")
    assert "\x1b" not in r.stderr
    r = run("match", p, "--va", 250, "--vg", -2)
    assert r.exit_code == 1 and "\x1b" not in r.stderr


def test_label_shows_control_characters_escaped():
    t = FittedTriode("koren", dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0),
                     tube="T\x1b[31m", section="\u202eB")
    assert t.label == "T\\x1b[31m:\\u202eB"


@pytest.mark.parametrize("kind", ["card", "fits"])
def test_random_changes_to_a_card_load_or_give_a_card_error(tmp_path, good, fitted, kind):
    # any JSON value in any place, nested fields included: either the card (or fit file) is
    # still valid, or the error is a CardError naming the file -- never another exception
    if kind == "fits":
        good = {"fits": [json.loads(json.dumps(fitted.to_dict()))], "best": None}
    read = load_card if kind == "card" else load_fits
    rng = np.random.default_rng(12)
    values = [None, True, 0, -1, 1e308, -1e-300, 10**30, "", "x", "\x1b", [], [0], [[0]], {}, {"a": []},
              [None] * 5, "mu", ["mu"], [0.0, 1.0], [1.0, 0.0]]

    def places(d, path=()):
        yield path
        if isinstance(d, dict):
            for k, v in d.items():
                yield from places(v, path + (k,))
        elif isinstance(d, list):
            for k, v in enumerate(d):
                yield from places(v, path + (k,))

    spots = [p for p in places(good) if p]
    refused = 0
    for _ in range(200):
        d = copy.deepcopy(good)
        path = spots[rng.integers(len(spots))]
        target = d
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = copy.deepcopy(values[rng.integers(len(values))])
        p = write(tmp_path, d)
        try:
            read(p)
        except CardError as e:
            refused += 1
            assert e.file == str(p)
    assert refused > 80  # most such changes break the file (a check that the loop does something)
