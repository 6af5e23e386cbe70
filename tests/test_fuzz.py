"""The command-line fuzzer (bench/fuzz.py) run small: about 150 mutated files through every
command that reads a file, in this process.  No traceback, no hang, no bad input accepted,
no nan/inf figure, no control character or Python warning reaching the user.

The expected outcome ("nothing fails") is the project's rule for untrusted input (issue 8);
which inputs are bad is the fuzzer's own knowledge of its mutations (a non-finite or
out-of-bounds parameter against the model registry's bounds, a wrong-type card field, a
control character in a name, a broken covariance, an unreadable number in a data row).
The other tests here check that the fuzzer's verdicts can fail at all.
"""

from __future__ import annotations

import importlib.util
import json
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _load_fuzz():
    spec = importlib.util.spec_from_file_location("platebook_bench_fuzz", ROOT / "bench" / "fuzz.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod  # dataclasses look their module up there
    spec.loader.exec_module(mod)
    return mod


fuzz = _load_fuzz()


@pytest.fixture(scope="module")
def seeds(tmp_path_factory):
    return fuzz.make_seeds(tmp_path_factory.mktemp("fuzz-seeds"))


def test_fuzzed_inputs_give_no_traceback_hang_or_accepted_bad_input():
    summary = fuzz.run_fuzz(150, seed=1, processes=1, limit=20.0)
    assert len(summary.cases) == 150
    assert not summary.failures, summary.report(seed=1, shown=15)


def test_fuzzer_cases_are_reproducible_from_seed_and_id(seeds, tmp_path):
    # the valid inputs carry no temporary path and no time, so a (seed, case id) names one input
    assert fuzz.make_seeds(tmp_path / "again") == seeds
    a = fuzz.build_case(7, 42, seeds)
    b = fuzz.build_case(7, 42, seeds)
    assert (a.command, a.mutation, a.data, a.invalid) == (b.command, b.mutation, b.data, b.invalid)
    assert fuzz.build_case(7, 43, seeds).data != a.data or fuzz.build_case(7, 43, seeds).command != a.command


def test_fuzzer_passes_the_unmutated_card_and_csv(seeds, tmp_path):
    # the seeds are valid: every command exits 0 on them and nothing is flagged
    for name, kind, args in fuzz.COMMANDS:
        layout = "long" if kind == "csv" else kind
        case = fuzz.Case(0, name, layout, "none", False, args, seeds[layout])
        done = fuzz.run_case(case, tmp_path, 20.0)
        assert done.exit_code == 0 and done.failures == [], (name, done.output[:500])


def test_fuzzer_flags_an_out_of_bounds_card_that_is_accepted(seeds, tmp_path):
    # mu = 1e6 lies above the Koren model's bound for mu (fitter/models.py registry)
    card = json.loads(seeds["card"])
    lo, hi = fuzz._bounds("koren", "mu")
    card["params"]["mu"] = hi * 2
    case = fuzz.Case(0, "point", "card", "param-above", True, fuzz.COMMANDS[3][2], json.dumps(card).encode())
    done = fuzz.run_case(case, tmp_path, 20.0)
    # whichever way the card reader answers, the verdict follows the exit status
    assert ("accepted" in done.failures) == (done.exit_code == 0)


def test_fuzzer_judges_tracebacks_nan_figures_and_control_characters():
    case = fuzz.Case(0, "point", "card", "x", None, [])
    case.exit_code = 1
    assert fuzz.judge(case, RuntimeError("boom"), "", "", "", []) == ["traceback"]
    case.exit_code = 0
    assert fuzz.judge(case, None, "ia = nan mA", "ia = nan mA", "{}", []) == ["nan"]
    assert fuzz.judge(case, None, "ia = 1 mA", "ia = 1 mA", "{}", []) == []
    assert fuzz.judge(case, None, "tube \x1b[31m", "tube \x1b[31m", "{}", []) == ["control"]
    case.invalid = True
    assert fuzz.judge(case, None, "ok", "ok", "{}", []) == ["accepted"]
    case.exit_code = 1
    assert fuzz.judge(case, None, "", "error: inf is not finite", "inf", []) == []


def test_fuzzer_reports_a_hang(seeds, tmp_path, monkeypatch):
    # a command that never answers is stopped at the wall-clock limit and counted as a hang
    import time as _time

    from fitter import card

    def stuck(*a, **k):
        while True:
            _time.sleep(0.01)

    monkeypatch.setattr(card, "load_card", stuck)
    case = fuzz.Case(0, "point", "card", "none", False, fuzz.COMMANDS[3][2], seeds["card"])
    done = fuzz.run_case(case, tmp_path, 0.5)
    assert done.failures == ["hang"] and done.exit_code is None
