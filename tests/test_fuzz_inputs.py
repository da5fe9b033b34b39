"""Fuzzing every input file through the real CLI entry points (issue 13 item 5).

hypothesis draws malformed plans, benches, profiles, scenarios and traces (tests/_fuzz_support.py:
shipped files with values replaced by NaN, infinity, booleans, huge numbers, non-UTF-8 bytes,
deep nesting, extra commands in profile templates, unphysical trace samples) and runs each with
``labrun.cli.main`` in-process, instrument sessions forbidden. Every input must end with exit 0
and a finite JSON result, or exit 2 and one line: never a traceback, a hang, an instrument
opened, or a known-bad input accepted. This is the CI sample (200 inputs, about 10 s);
benchmarks/fuzz_inputs.py runs thousands.
"""

from __future__ import annotations

import logging
from random import Random

import pytest
from _fuzz_support import KINDS, Case, make_case, run_case
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

FUZZ = settings(max_examples=40, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])


@pytest.fixture(autouse=True)
def _quiet():
    logging.disable(logging.CRITICAL)
    yield
    logging.disable(logging.NOTSET)


@pytest.mark.parametrize("kind", KINDS)
@FUZZ
@given(rng=st.randoms(use_true_random=False))
def test_malformed_inputs_end_in_a_result_or_one_line(tmp_path_factory, kind, rng):
    folder = tmp_path_factory.mktemp(f"fuzz-{kind}")
    case = make_case(rng, folder, kind)
    outcome = run_case(case, time_limit_s=20.0)
    assert outcome.verdict in ("ok", "refused"), (case, outcome)


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


def test_a_hang_is_reported_not_waited_for(tmp_path, monkeypatch):
    """The time limit interrupts a command that does not end (here an analyze that sleeps)."""
    import time

    import labrun.cli as cli

    original = cli.build_parser

    def parser():
        p = original()
        sub = next(a for a in p._actions if a.dest == "command")
        sub.choices["analyze"].set_defaults(func=lambda args: time.sleep(60))
        return p

    monkeypatch.setattr(cli, "build_parser", parser)
    start = time.perf_counter()
    outcome = run_case(Case("trace", ["analyze", str(tmp_path / "t.csv")], bad=False),
                       time_limit_s=0.5)
    assert outcome.verdict == "hang" and time.perf_counter() - start < 5.0
