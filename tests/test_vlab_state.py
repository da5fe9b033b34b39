"""The virtual lab's optics (launched powers, amplifier, shutters) and the probe against it.

Launched power per tone follows DEVELOPERS.md "Bench files": P_laser - attenuation - path loss,
or with an amplifier P_amp - amplifier_loss_db shared in the ratio the tones enter it.
dBm <-> mW is common practice (P[mW] = 10^(P[dBm]/10)).
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import numpy as np
import pytest

from labrun.cli import main
from labrun.vlab import VirtualLab
from labrun.vlab.scenario import parse_scenario
from labrun.vlab.state import LabState

REPO = Path(__file__).resolve().parents[1]
DEFAULT = REPO / "sim_instruments" / "default-scenario.toml"


def quiet(amplifier: bool = False) -> LabState:
    data = tomllib.loads(DEFAULT.read_text())
    data["realism"] = {"enabled": False}
    data["instruments"]["amplifier"]["present"] = amplifier
    state = LabState(parse_scenario(data))
    for role, wl, p in (("laser_a", 1550.0, 6.0), ("laser_b", 1549.2, 3.0)):
        laser = state.lasers[role]
        laser.wavelength_nm, laser.power_dbm, laser.output = wl, p, True
    for name, att in state.attenuators.items():
        att.attenuation_db, att.output = (1.0 if name.endswith("a") else 2.0), True
    return state


def mw(dbm: float) -> float:
    return 10 ** (dbm / 10)


def test_launched_powers_follow_the_bench_calibration():
    state = quiet()
    cal = state.scenario.bench
    tones = dict(state.launched().tones)
    assert tones[1550.0] == pytest.approx(6.0 - 1.0 - cal.path_loss_a_db)
    assert tones[1549.2] == pytest.approx(3.0 - 2.0 - cal.path_loss_b_db)
    state.attenuators["attenuator_b"].output = False         # shutter closed: tone b gone
    assert list(dict(state.launched().tones)) == [1550.0]
    state.lasers["laser_a"].output = False
    assert state.launched().tones == ()
    assert not state.sources_off()                            # laser b still emits
    state.lasers["laser_b"].output = False
    assert state.sources_off()


def test_amplifier_sets_the_total_and_keeps_the_input_ratio():
    state = quiet(amplifier=True)
    cal = state.scenario.bench
    assert state.launched().tones == ()                       # amplifier present but off
    state.amplifier.power_dbm, state.amplifier.output = 15.0, True
    tones = dict(state.launched().tones)
    total = mw(tones[1550.0]) + mw(tones[1549.2])
    assert 10 * np.log10(total) == pytest.approx(15.0 - cal.amplifier_loss_db)
    ratio_in = mw(6.0 - 1.0 - cal.path_loss_a_db) / mw(3.0 - 2.0 - cal.path_loss_b_db)
    assert mw(tones[1550.0]) / mw(tones[1549.2]) == pytest.approx(ratio_in)
    assert state.launched().ase_dbm_per_nm is not None
    state.set_interlock(False)
    assert state.sources_off() and state.launched().tones == ()


def test_probe_passes_every_check_against_the_virtual_lab(tmp_path, capsys):
    """Issue 3 'done when': labrun probe --bench <virtual-lab bench> --json passes every check."""
    with VirtualLab(DEFAULT) as lab:
        bench = lab.write_bench(tmp_path / "bench.toml")
        code = main(["probe", "--bench", str(bench), "--json"])
        out, _ = capsys.readouterr()
    report = json.loads(out)
    failed = [(i["role"], c) for i in report["instruments"] for c in i["checks"] if not c["ok"]]
    assert code == 0 and report["ok"] and not failed, failed
    assert {i["role"] for i in report["instruments"]} == set(lab.scenario.present_roles())


def test_tone_a_is_the_lower_frequency_whichever_laser_carries_it():
    """docs/design.md §2.1: tone a is the lower-frequency tone; swapping which laser sits where
    gives the same spectrum."""
    state = quiet()
    for laser in state.lasers.values():
        laser.power_dbm = 10.0
    before = sorted(state.osa_input()[0])
    state.lasers["laser_a"].wavelength_nm, state.lasers["laser_b"].wavelength_nm = 1549.2, 1550.0
    state.attenuators["attenuator_a"].attenuation_db = 2.0 + state.scenario.bench.path_loss_b_db \
        - state.scenario.bench.path_loss_a_db
    state.attenuators["attenuator_b"].attenuation_db = 1.0 + state.scenario.bench.path_loss_a_db \
        - state.scenario.bench.path_loss_b_db
    after = sorted(state.osa_input()[0])
    assert len(before) == len(after) == 12
    np.testing.assert_allclose(np.array(after), np.array(before), atol=1e-6)


def test_tap_meter_reads_the_launched_total_with_its_seeded_calibration_offset():
    # The tap meter reads the total launched power (the tones summed in mW) less the tap
    # ratio, plus its fixed calibration offset: drawn per seed from realism
    # power_meter_offset_db, none with realism off (issue 9: using the tap is not free).
    state = quiet()
    cal = state.scenario.bench
    total = 10 * np.log10(sum(mw(p) for _, p in state.launched().tones))
    assert state.pm_offset_db == 0.0
    assert state.tap_power_dbm() == pytest.approx(total - cal.input_tap_db, abs=1e-9)
    data = tomllib.loads(DEFAULT.read_text())
    data["realism"] = {"enabled": True, "power_meter_offset_db": 0.3}
    drawn = []
    for seed in range(8):
        real = LabState(parse_scenario(data), seed=seed)
        real.lasers["laser_a"].output = real.attenuators["attenuator_a"].output = True
        launched = 10 * np.log10(sum(mw(p) for _, p in real.launched().tones))
        assert real.tap_power_dbm() == pytest.approx(
            launched - cal.input_tap_db + real.pm_offset_db, abs=1e-9)
        drawn.append(real.pm_offset_db)
    assert len(set(drawn)) == 8 and 0.05 < float(np.std(drawn)) < 1.0  # one draw per seed
    assert LabState(parse_scenario(data), seed=3).pm_offset_db == drawn[3]  # reproducible
