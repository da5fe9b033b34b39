"""``labrun probe --sweep-time`` (labrun/sweeptime.py): the OSA's sweep time measured on the
virtual lab, stored in the bench file, and used by ``labrun check``'s estimate in place of the
profile's figures. The reference is the virtual lab's own sweep model (``vlab.state.
sweep_time_s``, scaled by the lab's time scale), computed apart from what the probe measured.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from _engine_support import scenario, write_plan

from labrun.bench import load_bench, parse_bench
from labrun.cli import main
from labrun.errors import InputError
from labrun.plan import load_plan
from labrun.profiles import SweepTime
from labrun.rehearse import sweep_time
from labrun.resources import find_file
from labrun.sweeptime import SweepTiming, bench_text_with, settings, solve
from labrun.vlab.lab import VirtualLab
from labrun.vlab.state import sweep_time_s

TIME_SCALE = 0.5  # real seconds per simulated one: the probe's sweeps take about 0.7 s in all


def _bench_claiming_slow_sweeps(lab: VirtualLab, folder):
    """The lab's bench with an OSA profile whose sweep model is wrong (2 s fixed part)."""
    text = Path(find_file("generic-osa.toml", "drivers")).read_text(encoding="utf-8")
    assert "fixed_s = 0.05" in text
    (folder / "claims-slow-osa.toml").write_text(
        text.replace('name = "generic-osa"', 'name = "claims-slow-osa"')
        .replace("fixed_s = 0.05", "fixed_s = 2.0"), encoding="utf-8")
    path = lab.write_bench(folder / "bench.toml")
    bench = path.read_text(encoding="utf-8")
    osa_line = next(i for i, ln in enumerate(bench.splitlines())
                    if ln.strip() == "[instruments.osa]")
    lines = bench.splitlines()
    lines[osa_line + 3] = 'profile = "claims-slow-osa.toml"'
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_probe_measures_the_sweep_and_check_uses_it(tmp_path, capsys):
    with VirtualLab(scenario(), time_scale=TIME_SCALE) as lab:
        path = _bench_claiming_slow_sweeps(lab, tmp_path)
        before_text = path.read_text(encoding="utf-8")
        plan = load_plan(write_plan(tmp_path, [0.0, 1.0]))
        osa = plan.osa_settings(load_bench(path))
        truth = sweep_time_s(osa.span_nm, osa.rbw_nm, int(osa.points)) * TIME_SCALE
        claimed, source = sweep_time(plan, load_bench(path))
        assert source == "osa profile" and claimed > truth + 1.5  # the profile is wrong
        with lab.state.lock:
            osa_before = (lab.state.osa.center_nm, lab.state.osa.span_nm,
                          lab.state.osa.rbw_nm, lab.state.osa.points)
        assert main(["probe", "--bench", str(path), "--sweep-time", "--json"]) == 0
        report = json.loads(capsys.readouterr().out)
        with lab.state.lock:  # the OSA is left as it was found
            assert (lab.state.osa.center_nm, lab.state.osa.span_nm, lab.state.osa.rbw_nm,
                    lab.state.osa.points) == osa_before
            assert all(not la.output for la in lab.state.lasers.values())
    stored = load_bench(path)
    model = stored.instruments["osa"].sweep_time
    assert model is not None and report["sweep_time"]["model"] == model.model_dump()
    # every line of the bench as it was, the measured table added after them
    assert path.read_text(encoding="utf-8").startswith(before_text.rstrip("\n"))
    # the lab's own model x its time scale (generic-osa: 0.05 s + 2e-5 s/sample + 5e-4 s per
    # span/RBW); the measured one carries a round trip and the host's scheduling on top
    assert model.per_sample_s == pytest.approx(2e-5 * TIME_SCALE, rel=0.25)
    assert model.per_span_rbw_s == pytest.approx(5e-4 * TIME_SCALE, rel=0.25)
    assert model.fixed_s == pytest.approx(0.05 * TIME_SCALE, abs=0.02)
    measured, source = sweep_time(plan, stored)
    assert source == "bench file (measured by labrun probe)"
    assert measured == pytest.approx(truth, rel=0.15)  # was off by more than 1.5 s
    # labrun check says where its sweep time comes from
    main(["check", str(tmp_path / "plan.toml"), "--bench", str(path)])
    assert "from the bench file (measured by labrun probe)" in capsys.readouterr().out


def test_solve_recovers_a_known_model():
    """Timings made from a known model give back its three terms (exact arithmetic)."""
    true = SweepTime(fixed_s=0.12, per_sample_s=3e-5, per_span_rbw_s=4e-4)
    timings = [SweepTiming(span, rbw, n, true.seconds(span, rbw, n))
               for _, span, rbw, n in settings(1550.0)]
    got = solve(timings)
    assert got["fixed_s"] == pytest.approx(0.12, abs=1e-9)
    assert got["per_sample_s"] == pytest.approx(3e-5, rel=1e-3)
    assert got["per_span_rbw_s"] == pytest.approx(4e-4, rel=1e-3)


def test_the_table_is_replaced_not_repeated(tmp_path):
    with VirtualLab(scenario()) as lab:
        text = lab.write_bench(tmp_path / "bench.toml").read_text(encoding="utf-8")
    once = bench_text_with(text, {"fixed_s": 0.1, "per_sample_s": 1e-5, "per_span_rbw_s": 0.0},
                           "measured by labrun probe --sweep-time (first)")
    twice = bench_text_with(once, {"fixed_s": 0.2, "per_sample_s": 2e-5, "per_span_rbw_s": 0.0},
                            "measured by labrun probe --sweep-time (second)")
    assert twice.count("[instruments.osa.sweep_time]") == 1 and "(first)" not in twice
    bench = parse_bench(twice, tmp_path / "bench.toml")
    assert bench.instruments["osa"].sweep_time == SweepTime(fixed_s=0.2, per_sample_s=2e-5)
    assert twice.startswith(text.rstrip("\n"))


def test_only_the_osa_takes_a_sweep_time(tmp_path):
    with VirtualLab(scenario()) as lab:
        text = lab.write_bench(tmp_path / "bench.toml").read_text(encoding="utf-8")
    bad = text + "\n[instruments.laser_a.sweep_time]\nfixed_s = 0.1\n"
    with pytest.raises(InputError, match="instruments.laser_a.sweep_time"):
        parse_bench(bad, tmp_path / "bench.toml")
