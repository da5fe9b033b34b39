"""Fuzzing every input file through the real CLI entry points (issue 13 item 5).

hypothesis draws malformed plans, benches, profiles, scenarios and traces (tests/_fuzz_support.py:
shipped files with values replaced by NaN, infinity, booleans, huge numbers, non-UTF-8 bytes,
deep nesting, extra commands in profile templates, unphysical trace samples) and runs each with
``labrun.cli.main`` in-process, real VISA backends forbidden. Every input must end with exit 0
and a finite JSON result, or exit 2 and one line: never a traceback, a hang, an instrument
opened, or a known-bad input accepted. This is the CI sample (116 inputs, about 20 s);
benchmarks/fuzz_inputs.py runs thousands.
"""

from __future__ import annotations

import logging
from random import Random

import pytest
from _fuzz_support import Case, make_case, run_case
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st


def _fuzz(n: int) -> settings:
    """hypothesis settings of the CI sample: n inputs, reproducible, no deadline per input."""
    return settings(max_examples=n, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture,
                                           HealthCheck.too_slow])


@pytest.fixture(autouse=True)
def _quiet():
    logging.disable(logging.CRITICAL)
    yield
    logging.disable(logging.NOTSET)


def _check_one(tmp_path_factory, kind: str, rng: Random) -> None:
    folder = tmp_path_factory.mktemp(f"fuzz-{kind}")
    case = make_case(rng, folder, kind)
    outcome = run_case(case, time_limit_s=20.0)
    assert outcome.verdict in ("ok", "refused"), (case, outcome)


@pytest.mark.parametrize("kind", ["plan", "bench", "profile"])
@_fuzz(12)  # each accepted one is rehearsed by 'labrun check' (about 1 s)
@given(rng=st.randoms(use_true_random=False))
def test_malformed_plans_benches_profiles(tmp_path_factory, kind, rng):
    _check_one(tmp_path_factory, kind, rng)


@pytest.mark.parametrize("kind", ["scenario", "trace"])
@_fuzz(40)
@given(rng=st.randoms(use_true_random=False))
def test_malformed_scenarios_and_traces(tmp_path_factory, kind, rng):
    _check_one(tmp_path_factory, kind, rng)


def test_the_oracle_catches_what_it_must(tmp_path):
    """The classifier itself: a known-bad input that ends in a result is 'accepted', a result
    with NaN is 'bad_result', an escaped exception is a traceback (fails with a lenient oracle)."""
    rng = Random(1)
    good = make_case(rng, tmp_path, "trace")
    while good.bad:
        good = make_case(rng, tmp_path, "trace")
    outcome = run_case(good)
    assert outcome.verdict == "ok", outcome
    assert run_case(Case("trace", good.argv, bad=True)).verdict == "accepted"
    plan = tmp_path / "nan.toml"
    plan.write_text('[plan]\nname = "x"\nspool = "s"\n[fixed]\nwavelength_a_nm = 1550.0\n'
                    'spacing_ghz = 100.0\npower_b_dbm = 0.0\n[axes.power_a_dbm]\nvalues = [0.0]\n'
                    '[[stop]]\nwhen = "line_above"\ndbm = nan\n')
    refused = run_case(Case("plan", ["check", str(plan), "--bench", "bench-pyvisa-sim.toml",
                                     "--json"], bad=True))
    assert refused.verdict == "refused" and "stop[0].dbm" in refused.detail
    broken = run_case(Case("trace", ["analyze", str(tmp_path / "missing-dir" / "t.csv"),
                                     "--json", "--orders", "3"], bad=True))
    assert broken.verdict == "refused"
    probe = run_case(Case("bench", ["probe", "--bench", "bench-pyvisa-sim.toml"], bad=False))
    assert probe.verdict == "opened", probe


def _spin(args) -> None:
    while True:
        pass


@pytest.mark.parametrize("body", [lambda args: __import__("time").sleep(60), _spin],
                         ids=["waiting", "computing"])
def test_a_hang_is_reported_not_waited_for(tmp_path, body):
    """The time limit interrupts a command that does not end, asleep (wall time) or busy (CPU
    time): here an analyze replaced by a sleep or an endless loop."""
    import time

    start = time.perf_counter()
    outcome = run_case(Case("trace", ["analyze", str(tmp_path / "t.csv")], bad=False),
                       time_limit_s=0.5, overrides={"func": body})
    assert outcome.verdict == "hang" and time.perf_counter() - start < 5.0


@pytest.mark.parametrize("argv", [
    ["demo", "--time-scale", "nan"],
    ["demo", "--time-scale", "inf"],
    ["replay", "1", "--twin", "--time-scale", "nan"],
    ["sim", "serve", "--scenario", "default-scenario.toml", "--time-scale", "nan"],
    ["sim", "spectrum", "--scenario", "default-scenario.toml", "--spool", "HNLF-A17",
     "--power-b-dbm", "0", "--wavelength-a-nm", "1550", "--spacing-ghz", "50",
     "--power-a-dbm", "inf"],
    ["analyze", "trace.csv", "--threshold-db", "nan"],
], ids=lambda argv: " ".join(argv[:2]) + " " + argv[-1])
def test_numeric_options_refuse_nan_and_infinity(tmp_path, monkeypatch, argv):
    """issue 13: command-line numbers are finite and in range, refused before anything runs."""
    from _fuzz_support import trace_text

    head, rows = trace_text(Random(0))
    (tmp_path / "trace.csv").write_text("\n".join(head + rows) + "\n")
    monkeypatch.chdir(tmp_path)
    outcome = run_case(Case("cli", argv, bad=True), time_limit_s=20.0)
    assert outcome.verdict == "refused", outcome
    assert argv[-2] in outcome.detail or "threshold" in outcome.detail, outcome
