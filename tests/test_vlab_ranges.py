"""The virtual lab takes every instrument range from the generic profile of its kind, the profile
its own bench file names: a value at either end of a profile range is accepted, a value just
outside it is refused with -222 Data out of range (SCPI-1999 Vol. 2, 21.8), for every ranged
setting of every kind. A range hard-coded in the simulator that differs from its profile fails."""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import pytest
import pyvisa

from labrun.bench import load_bench
from labrun.profiles import generic_profile, generic_profile_name
from labrun.roles import ROLE_KINDS
from labrun.vlab import VirtualLab
from labrun.vlab.scenario import parse_scenario

REPO = Path(__file__).resolve().parents[1]
DEFAULT = REPO / "sim_instruments" / "default-scenario.toml"
ROLE_OF_KIND = {kind: next(r for r, k in ROLE_KINDS.items() if k == kind)
                for kind in dict.fromkeys(ROLE_KINDS.values())}


def _cases() -> list[tuple[str, str]]:
    """(kind, operation) for every setting with a value range in every generic profile."""
    return [(kind, name) for kind in ROLE_OF_KIND
            for name, op in generic_profile(kind).operations.items()
            if op.range is not None and not op.is_query]


@pytest.fixture(scope="module")
def lab():
    data = tomllib.loads(DEFAULT.read_text())
    data["realism"] = {"enabled": False}
    data["instruments"]["amplifier"] = {"present": True}
    with VirtualLab(parse_scenario(copy.deepcopy(data)), time_scale=0.0, seed=1) as running:
        yield running


@pytest.fixture(scope="module")
def rm():
    return pyvisa.ResourceManager("@py")  # shared with labrun.scpi: never closed here


def _render(op, value: float) -> str:
    """The profile's command for ``value`` (first paddle for {index}; s1 for a Stokes vector)."""
    names = op.placeholders
    fill: dict[str, object] = {}
    if "index" in names:
        fill["index"] = op.index_range[0]
    if "s1" in names:
        fill.update(s1=value, s2=0.0, s3=0.0)
    if "value" in names:
        fill["value"] = int(value) if op.integer else value
    return op.render(**fill)


def _error_code(inst) -> int:
    return int(inst.query("SYST:ERR?").split(",")[0])


def test_the_lab_bench_names_the_generic_profiles(lab, tmp_path):
    bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
    assert {r: s.profile.name for r, s in bench.instruments.items()} == {
        r: generic_profile_name(ROLE_KINDS[r]) for r in bench.instruments}


@pytest.mark.parametrize(("kind", "name"), _cases())
def test_each_profile_range_is_the_instruments(lab, rm, kind, name):
    op = generic_profile(kind).op(name)
    lo, hi = op.range
    step = 1.0 if op.integer else max(1e-3 * (hi - lo), 1e-3)
    inst = rm.open_resource(lab.resources[ROLE_OF_KIND[kind]], read_termination="\n",
                            write_termination="\n", timeout=2000)
    try:
        inst.write("*CLS")
        for value, code in ((lo, 0), (hi, 0), (hi + step, -222), (lo - step, -222)):
            inst.write(_render(op, value))
            assert _error_code(inst) == code, f"{kind} {_render(op, value)}"
    finally:
        inst.write("*RST")  # attenuators dark, sources off, for the next case
        inst.close()


def test_every_kind_has_ranged_settings_checked():
    assert {k for k, _ in _cases()} == set(ROLE_OF_KIND)  # no kind left out of the check
