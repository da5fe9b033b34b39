"""A power setting exactly at the bench cap, sent in W at six mantissa digits (the si dialect's
``{value:.6e}``), is never commanded above the cap: printing rounds 10^(10.2/10) mW =
1.0471285e-02 W up to 1.047129e-02 W = 10.2000019 dBm, so labrun sends 1.047128e-02 W
(10.1999978 dBm) instead, and emission is enabled. P[mW] = 10^(P[dBm]/10): common practice.

Checked on the virtual lab's own state (the power the instrument holds), not on mocks.
"""

from __future__ import annotations

import math
import re

import pytest
from _engine_support import scenario, write_bench

from labrun.bench import load_bench
from labrun.errors import SafetyError
from labrun.instruments import open_instrument
from labrun.vlab.lab import VirtualLab


def _capped_bench(lab: VirtualLab, folder, role: str, cap: float):
    """The lab's bench with ``role``'s max_power_dbm set to ``cap``."""
    path = write_bench(lab, folder)
    text = path.read_text(encoding="utf-8")
    head, _, tail = text.partition(f"[instruments.{role}]")
    tail = re.sub(r"max_power_dbm = \S+", f"max_power_dbm = {cap!r}", tail, count=1)
    path.write_text(head + f"[instruments.{role}]" + tail, encoding="utf-8")
    return load_bench(path)


@pytest.mark.parametrize(("role", "cap"), [("laser_a", 10.2), ("amplifier", 21.5)])
def test_a_setting_at_the_cap_is_sent_at_or_under_it(tmp_path, role, cap):
    # both caps round up at .6e (10.2 -> 10.2000019 dBm, 21.5 -> 21.5000014 dBm): by hand
    assert 10 * math.log10(float(f"{10 ** (cap / 10) * 1e-3:.6e}") * 1e3) > cap
    sc = scenario(dialect="si")
    sc["instruments"]["amplifier"]["present"] = True
    with VirtualLab(sc) as lab:
        source = open_instrument(_capped_bench(lab, tmp_path, role, cap), role)
        try:
            source.set_power_dbm(cap)
            source.output_on()
            held = (lab.state.amplifier if role == "amplifier" else lab.state.lasers[role])
            assert held.output and cap - 1e-5 <= held.power_dbm <= cap
        finally:
            source.safe_off()
            source.close()


def test_a_power_over_the_cap_is_shown_with_its_excess(tmp_path):
    """A laser found set 2e-6 dB above its cap (by hand, or by a program that rounds up): the
    refusal prints both numbers so that they differ, and by how much."""
    with VirtualLab(scenario(dialect="si")) as lab:
        laser = open_instrument(_capped_bench(lab, tmp_path, "laser_a", 10.2), "laser_a")
        try:
            with lab.state.lock:
                lab.state.lasers["laser_a"].power_dbm = 10.200002
            with pytest.raises(SafetyError) as info:
                laser.output_on()
            message = str(info.value)
            assert "10.200002 dBm" in message and "2e-06 dB above" in message, message
            assert not lab.state.lasers["laser_a"].output
        finally:
            laser.close()
