"""Profile features for instruments that differ from the generic dialect (issue 15), against
the virtual lab: init sent again after a reconnect, declared reply forms, completion methods,
instrument units, and a probe that checks values."""

from __future__ import annotations

from pathlib import Path

import pytest
from _engine_support import scenario

from labrun.bench import load_bench
from labrun.instruments import open_instrument
from labrun.resources import find_file
from labrun.scpi import ScpiError
from labrun.trafficlog import TrafficLog
from labrun.vlab.lab import VirtualLab


@pytest.fixture()
def lab():
    with VirtualLab(scenario()) as vl:
        yield vl


def _profile_copy(tmp_path: Path, kind: str, name: str, edit) -> Path:
    """A copy of a shipped generic profile under a new name, changed by ``edit(text)``."""
    text = Path(find_file(f"generic-{kind}.toml", "drivers")).read_text(encoding="utf-8")
    text = text.replace(f'name = "generic-{kind}"', f'name = "{name}"', 1)
    out = tmp_path / f"{name}.toml"
    out.write_text(edit(text), encoding="utf-8")
    return out


def _bench_with(lab: VirtualLab, tmp_path: Path, role: str, kind: str, profile: Path) -> Path:
    """The lab's bench with ``role`` speaking ``profile`` (a path)."""
    bench = lab.write_bench(tmp_path / "bench.toml")
    text = bench.read_text(encoding="utf-8")
    bench.write_text(text.replace(f'profile = "generic-{kind}"', f'profile = "{profile}"', 1),
                     encoding="utf-8")
    return bench


def test_init_is_sent_again_after_a_reconnect(lab, tmp_path):
    """An attenuator that starts every connection in local mode (settings refused with SCPI
    error -221 until SYST:REM): the profile's init enables remote; after the connection drops
    the session reconnects and sends the init again, so the next setting is accepted."""
    lab.servers["attenuator_a"].instrument.remote_enable = "SYST:REM"
    prof = _profile_copy(tmp_path, "attenuator", "local-start-attenuator",
                         lambda t: t.replace('init = ["*CLS"]', 'init = ["*CLS", "SYST:REM"]'))
    bench = load_bench(_bench_with(lab, tmp_path, "attenuator_a", "attenuator", prof))
    traffic_log = TrafficLog()
    att = open_instrument(bench, "attenuator_a", traffic_log=traffic_log)
    try:
        att.set_attenuation_db(5.0)
        assert lab.drop_connections("attenuator_a") == 1
        att.session.timeout_ms = att.session._res.timeout = 500
        att.set_attenuation_db(6.5)  # refused with -221 if the init were not sent again
        assert att.read("read_attenuation_db") == pytest.approx(6.5)
    finally:
        att.close()
    sent = [e.text for e in traffic_log.entries if e.direction == "write"]
    assert sum(t.split(";")[0] == "SYST:REM" for t in sent) == 2  # at open, after the drop


def test_local_mode_instrument_refuses_settings_without_remote_enable(lab, tmp_path):
    """The check above can fail: with the shipped profile (no SYST:REM in init) the same
    instrument refuses the setting with -221 (SCPI-1999 "Settings conflict")."""
    lab.servers["attenuator_a"].instrument.remote_enable = "SYST:REM"
    bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
    att = open_instrument(bench, "attenuator_a")
    try:
        with pytest.raises(ScpiError) as info:
            att.set_attenuation_db(5.0)
        assert info.value.code == -221
    finally:
        att.close()
