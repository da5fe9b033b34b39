"""Profile features for instruments that differ from the generic dialect (issue 15), against
the virtual lab: init sent again after a reconnect, declared reply forms, completion methods,
instrument units, and a probe that checks values."""

from __future__ import annotations

from pathlib import Path

import numpy as np
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
    error -221 until SESS:OWN): the profile's init enables remote; after the connection drops
    the session reconnects and sends the init again, so the next setting is accepted."""
    lab.servers["attenuator_a"].instrument.remote_enable = "SESS:OWN"
    prof = _profile_copy(tmp_path, "attenuator", "local-start-attenuator",
                         lambda t: t.replace('init = ["*CLS"]', 'init = ["*CLS", "SESS:OWN"]'))
    bench = load_bench(_bench_with(lab, tmp_path, "attenuator_a", "attenuator", prof))
    traffic_log = TrafficLog()
    att = open_instrument(bench, "attenuator_a", traffic_log=traffic_log)
    try:
        att.set_attenuation_db(5.0)
        assert lab.drop_connections("attenuator_a") == 1
        att.session.set_timeout(500)
        att.set_attenuation_db(6.5)  # refused with -221 if the init were not sent again
        assert att.read("read_attenuation_db") == pytest.approx(6.5)
    finally:
        att.close()
    sent = [e.text for e in traffic_log.entries if e.direction == "write"]
    assert sum(t.split(";")[0] == "SESS:OWN" for t in sent) == 2  # at open, after the drop


def test_local_mode_instrument_refuses_settings_without_remote_enable(lab, tmp_path):
    """The check above can fail: with the shipped profile (no SESS:OWN in init) the same
    instrument refuses the setting with -221 (SCPI-1999 "Settings conflict")."""
    lab.servers["attenuator_a"].instrument.remote_enable = "SESS:OWN"
    bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
    att = open_instrument(bench, "attenuator_a")
    try:
        with pytest.raises(ScpiError) as info:
            att.set_attenuation_db(5.0)
        assert info.value.code == -221
    finally:
        att.close()


# -- replies -------------------------------------------------------------------------------

SPACE_ERRORS = "replies]\nerror = '(?P<code>[-+]?\\d+) (?P<message>.*)'\n"


def _with_replies(text: str, table: str) -> str:
    """A profile text with a [replies] table added before its operations."""
    return text.replace("[operations.identify]", f"[{table}\n[operations.identify]", 1)


def test_declared_error_form_reads_a_space_separated_queue(lab, tmp_path, capsys):
    """An error queue answering '<code> <message>' (not SCPI-1999's code,"message"): with the
    declared form an out-of-range setting is still reported with its code (-222, SCPI-1999
    "Data out of range"), and a clean setting passes; probe shows the form."""
    from labrun.cli import main

    inst = lab.servers["attenuator_a"].instrument
    inst.error_reply = "{code} {short}"
    prof = _profile_copy(tmp_path, "attenuator", "space-error-attenuator",
                         lambda t: _with_replies(t, SPACE_ERRORS).replace(
                             "range = [0.0, 60.0]", "range = [0.0, 100.0]"))
    bench_path = _bench_with(lab, tmp_path, "attenuator_a", "attenuator", prof)
    att = open_instrument(load_bench(bench_path), "attenuator_a")
    try:
        att.set_attenuation_db(5.0)
        assert att.read("read_attenuation_db") == pytest.approx(5.0)
        with pytest.raises(ScpiError) as info:
            att.set_attenuation_db(90.0)  # beyond the instrument's own range
        assert info.value.code == -222
    finally:
        att.close()
    assert main(["probe", "--bench", str(bench_path)]) == 0
    assert "reply_forms" in capsys.readouterr().out


def test_generic_form_refuses_a_space_separated_queue(lab, tmp_path):
    """The check above can fail: the shipped profile reads '0 No error' as no error-queue
    reply at all (an InstrumentError, not a pass)."""
    from labrun.errors import InstrumentError

    lab.servers["attenuator_a"].instrument.error_reply = "{code} {short}"
    bench = load_bench(lab.write_bench(tmp_path / "b.toml"))
    with pytest.raises(InstrumentError, match="not an error-queue reply"):
        open_instrument(bench, "attenuator_a").close()  # its init *CLS drains the queue


def test_declared_number_and_state_forms():
    """Number and state forms pick the named group out of a reply with a header and a unit."""
    from labrun.instruments.base import parse_reply
    from labrun.profiles import Operation, ReplyForms

    forms = ReplyForms(number=r"ATT (?P<value>\S+) ?dB", state=r"STATE=(?P<state>\w+)")
    value = Operation(query="ATT?", parse="float")
    state = Operation(query="STATE?", parse="bool")
    assert parse_reply(value, "ATT 5.250dB", forms) == 5.25
    assert parse_reply(state, "STATE=OFF", forms) is False
    assert parse_reply(state, "STATE=1", forms) is True
    with pytest.raises(ValueError, match="declared form"):
        parse_reply(value, "5.250", forms)
    assert parse_reply(value, "5.250") == 5.25  # without forms: the generic bare number


@pytest.mark.parametrize(("table", "field", "message"), [
    ('replies]\nerror = "(?P<code>\\\\d+"\n', "replies.error", "not a regular expression"),
    ('replies]\nerror = "(?P<number>\\\\d+)"\n', "replies.error", "(?P<code>"),
    ('replies]\nnumber = "(\\\\S+)"\n', "replies.number", "(?P<value>"),
    ('replies]\nstate = "(?P<value>\\\\w+)"\n', "replies.state", "(?P<state>"),
])
def test_reply_forms_are_checked_when_the_profile_loads(tmp_path, table, field, message):
    from labrun.errors import InputError
    from labrun.profiles import load_profile

    prof = _profile_copy(tmp_path, "attenuator", "bad-forms", lambda t: _with_replies(t, table))
    with pytest.raises(InputError) as info:
        load_profile(prof)
    assert info.value.field == field and message in str(info.value)


def test_empty_error_query_needs_a_declared_choice(tmp_path):
    """An empty error_query no longer turns error checking off silently: refused unless the
    profile declares error_queue = false (which probe prints)."""
    from labrun.errors import InputError
    from labrun.profiles import load_profile

    silent = _profile_copy(tmp_path, "attenuator", "silent-att",
                           lambda t: t.replace('error_query = "SYST:ERR?"', 'error_query = ""'))
    with pytest.raises(InputError) as info:
        load_profile(silent)
    assert info.value.field == "profile.error_query" and "error_queue = false" in str(info.value)
    declared = _profile_copy(tmp_path, "attenuator", "declared-att", lambda t: t.replace(
        'error_query = "SYST:ERR?"', 'error_query = ""\nerror_queue = false'))
    assert load_profile(declared).error_query is None


# -- completion ----------------------------------------------------------------------------

def _no_opc(table: str):
    """Edit: no *OPC?, and a [completion] table instead."""
    return lambda t: _with_replies(t.replace('opc_query = "*OPC?"', 'opc_query = ""'), table)


@pytest.mark.parametrize("table", [
    "completion]\nmethod = \"poll\"\nquery = \"STAT:BUSY?\"\ndone = '0'\ninterval_s = 0.01\n",
    "completion]\nmethod = \"wai\"\nquery = \"*STB?\"\n",
])
def test_sweep_waits_by_the_declared_completion(tmp_path, table):
    """An OSA without *OPC? whose queries answer from memory during a sweep (so a trace read
    too early is the previous sweep): after sweep() returns, the sweep is over (checked on the
    virtual lab's own state), by polling a busy query or by *WAI (IEEE 488.2 10.39)."""
    with VirtualLab(scenario(), time_scale=1.0) as lab:
        sim = lab.instruments["osa"]
        sim.queries_wait = False
        prof = _profile_copy(tmp_path, "osa", "busy-osa", _no_opc(table))
        osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
        try:
            for _ in range(2):
                osa.sweep()
                assert not sim.busy()
                assert lab.state.osa.sweeps >= 1
        finally:
            osa.close()


def test_without_completion_the_sweep_is_still_running(tmp_path):
    """The check above can fail: with a completion that does not wait for the sweep (a fixed
    1 us), the same OSA is still busy when sweep() returns."""
    with VirtualLab(scenario(), time_scale=1.0) as lab:
        sim = lab.instruments["osa"]
        sim.queries_wait = False
        prof = _profile_copy(tmp_path, "osa", "nowait-osa", lambda t: _with_replies(
            t, 'completion]\nmethod = "fixed"\nfixed_s = 1e-6\n'))
        osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
        try:
            osa.sweep()
            assert sim.busy()
        finally:
            osa.close()


def test_osa_without_a_way_to_wait_is_refused(tmp_path):
    from labrun.errors import InputError
    from labrun.profiles import load_profile

    prof = _profile_copy(tmp_path, "osa", "blind-osa",
                         lambda t: t.replace('opc_query = "*OPC?"', 'opc_query = ""'))
    with pytest.raises(InputError) as info:
        load_profile(prof)
    assert info.value.field == "profile.opc_query" and "before the sweep ends" in str(info.value)


# -- units ---------------------------------------------------------------------------------

SI_LASER = [
    ('command = "SOUR:WAV {value:.4f}"\nunit = "nm"',
     'command = "SOUR:WAV {value:.10e}"\nunit = "nm"\nwire_unit = "m"'),
    ('query = "SOUR:WAV?"\nparse = "float"\nunit = "nm"',
     'query = "SOUR:WAV?"\nparse = "float"\nunit = "nm"\nwire_unit = "m"'),
    ('command = "SOUR:POW {value:.3f}"\nunit = "dBm"',
     'command = "SOUR:POW {value:.6e}"\nunit = "dBm"\nwire_unit = "W"'),
    ('query = "SOUR:POW?"\nparse = "float"\nunit = "dBm"',
     'query = "SOUR:POW?"\nparse = "float"\nunit = "dBm"\nwire_unit = "W"'),
]


def _si_laser(text: str) -> str:
    for old, new in SI_LASER:
        assert old in text, old
        text = text.replace(old, new, 1)
    return text


def test_laser_in_si_units_sets_and_reads_back_in_nm_and_dbm(lab, tmp_path):
    """A laser that speaks metres and watts: labrun's 1550.1234 nm and 5 dBm reach the virtual
    lab's state as such (P[mW] = 10^(P[dBm]/10), common practice), and the read-backs in m and
    W verify against the profile's tolerances; the cap is still checked in dBm."""
    from labrun.errors import SafetyError

    lab.instruments["laser_a"].si_units = True
    prof = _profile_copy(tmp_path, "laser", "si-laser", _si_laser)
    laser = open_instrument(load_bench(_bench_with(lab, tmp_path, "laser_a", "laser", prof)),
                            "laser_a")
    try:
        laser.apply("set_wavelength_nm", 1550.1234)
        laser.apply("set_power_dbm", 5.0, cap=10.0)
        state = lab.state.lasers["laser_a"]
        assert state.wavelength_nm == pytest.approx(1550.1234, abs=1e-6)
        assert state.power_dbm == pytest.approx(5.0, abs=1e-4)
        assert laser.read("read_power_dbm") == pytest.approx(5.0, abs=1e-4)
        with pytest.raises(SafetyError):
            laser.apply("set_power_dbm", 11.0, cap=10.0)  # 12.6 mW: over the cap in dBm
    finally:
        laser.close()


def test_si_laser_with_the_generic_profile_is_refused(lab, tmp_path):
    """The check above can fail: the generic profile sends 1550.1234 (nm) to a laser that
    takes metres; the instrument refuses it out of range (-222)."""
    lab.instruments["laser_a"].si_units = True
    laser = open_instrument(load_bench(lab.write_bench(tmp_path / "b.toml")), "laser_a")
    try:
        with pytest.raises(ScpiError) as info:
            laser.apply("set_wavelength_nm", 1550.1234)
        assert info.value.code == -222
    finally:
        laser.close()


@pytest.mark.parametrize(("value", "unit", "wire", "expected"), [
    (0.0, "dBm", "mW", 1.0),        # 0 dBm = 1 mW (definition of dBm, common practice)
    (30.0, "dBm", "W", 1.0),        # 30 dBm = 1 W
    (30.0, "dBm", "dBW", 0.0),      # 1 W = 0 dBW
    (1550.0, "nm", "m", 1.55e-6),
    (1550.0, "nm", "THz", 193.41448903225806),  # c / lambda, c = 299 792 458 m/s exact (SI)
    (1550.0, "nm", "Hz", 1.9341448903225806e14),
])
def test_wire_units_both_ways(value, unit, wire, expected):
    from labrun.wireunits import from_wire, to_wire

    assert float(to_wire(value, unit, wire)) == pytest.approx(expected, rel=1e-12)
    assert float(from_wire(expected, unit, wire)) == pytest.approx(value, rel=1e-12, abs=1e-12)


def test_scale_and_offset_and_bad_units_are_checked(tmp_path):
    from labrun.errors import InputError
    from labrun.profiles import Operation, load_profile

    op = Operation(query="X?", parse="float", unit="dB", scale=100.0, offset=1.0)
    assert op.from_wire(501.0) == pytest.approx(5.0) and op.to_wire(5.0) == pytest.approx(501.0)
    prof = _profile_copy(tmp_path, "laser", "bad-unit-laser", lambda t: t.replace(
        'query = "SOUR:WAV?"\nparse = "float"\nunit = "nm"',
        'query = "SOUR:WAV?"\nparse = "float"\nunit = "nm"\nwire_unit = "W"', 1))
    with pytest.raises(InputError) as info:
        load_profile(prof)
    assert info.value.field == "operations.read_wavelength_nm.wire_unit"


# -- a probe that can tell -----------------------------------------------------------------

def _probe(bench: Path, capsys) -> tuple[int, dict]:
    import json

    from labrun.cli import main

    code = main(["probe", "--bench", str(bench), "--json"])
    return code, json.loads(capsys.readouterr().out)


def _failed(report: dict, role: str) -> list[dict]:
    inst = next(i for i in report["instruments"] if i["role"] == role)
    return [c for c in inst["checks"] if not c["ok"]]


def test_probe_passes_the_virtual_lab_with_the_generic_profiles(lab, tmp_path, capsys):
    code, report = _probe(lab.write_bench(tmp_path / "b.toml"), capsys)
    assert code == 0 and report["ok"], [_failed(report, i["role"]) for i in report["instruments"]]


def test_probe_fails_a_profile_whose_units_are_wrong(lab, tmp_path, capsys):
    """A laser that speaks metres and watts, probed with the generic profile (nm, dBm): the
    replies parse as numbers, but 1.55e-06 nm is outside the band the profile declares (its
    wavelength range), and probe says so; exit 1. (The power, 0.001 W read as 0.001 dBm, is
    in range: no value check can see that one; the read-back of a setting would.)"""
    lab.instruments["laser_a"].si_units = True
    code, report = _probe(lab.write_bench(tmp_path / "b.toml"), capsys)
    assert code == 1
    failed = _failed(report, "laser_a")
    assert [c["operation"] for c in failed] == ["read_wavelength_nm"]
    assert "outside the band 1500..1630 nm" in failed[0]["detail"]


def test_probe_fails_a_wrong_power_unit(lab, tmp_path, capsys):
    """The SI laser's profile saying mW where the instrument gives W: 0 dBm reads as -30 dBm,
    outside set_power_dbm's range [-10, 13]; probe says so."""
    lab.instruments["laser_a"].si_units = True
    prof = _profile_copy(tmp_path, "laser", "mw-laser", lambda t: _si_laser(t).replace(
        'parse = "float"\nunit = "dBm"\nwire_unit = "W"',
        'parse = "float"\nunit = "dBm"\nwire_unit = "mW"', 1))
    code, report = _probe(_bench_with(lab, tmp_path, "laser_a", "laser", prof), capsys)
    assert code == 1
    failed = _failed(report, "laser_a")
    assert [c["operation"] for c in failed] == ["read_power_dbm"]
    assert "outside set_power_dbm's range [-10, 13]" in failed[0]["detail"]


def test_probe_fails_a_trace_in_the_wrong_unit(lab, tmp_path, capsys):
    """An OSA profile that says its trace axis is in m when the instrument gives nm: the axis
    reads as 1.5e12 nm, far outside the band; the level trace is still judged (its peak)."""
    prof = _profile_copy(tmp_path, "osa", "m-axis-osa", lambda t: t.replace(
        'query = "TRAC:DATA? WLEN"     # SCPI-1999 TRACe[:DATA]? <trace_name>: wavelength axis\n'
        'parse = "trace"\nunit = "nm"',
        'query = "TRAC:DATA? WLEN"\nparse = "trace"\nunit = "nm"\nwire_unit = "m"', 1))
    code, report = _probe(_bench_with(lab, tmp_path, "osa", "osa", prof), capsys)
    assert code == 1
    failed = _failed(report, "osa")
    assert [c["operation"] for c in failed] == ["read_trace_x"]
    assert "outside the band" in failed[0]["detail"]


# -- declarative trace reading -------------------------------------------------------------

COUNTED_OSA = """trace]
format = "ascii"
ascii_command = "FORM:DATA ASC"
ascii_separator = " "
ascii_leading_count = true
axis_start_query = "SENS:WAV:STAR?"
axis_stop_query = "SENS:WAV:STOP?"
"""


def _counted_osa(text: str) -> str:
    """The generic OSA with an ASCII trace (space-separated, leading count) and the axis from
    start/stop queries instead of TRAC:DATA? WLEN."""
    start = text.index("[trace]\n")
    end = text.index("[trace.sweep_time]")
    text = text[:start] + "[" + COUNTED_OSA + "\n" + text[end:]
    x_op = text.index("[operations.read_trace_x]")
    y_op = text.index("[operations.read_trace_y]")
    return text[:x_op] + text[y_op:]


def _read_257(lab, tmp_path, prof):
    """The OSA on profile ``prof`` sweeps 257 samples: (axis, levels, the lab's own OSA state)."""
    osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
    try:
        osa.apply("set_points", 257)
        x, y = osa.sweep_and_read(with_x=True)
    finally:
        osa.close()
    assert x.size == y.size == 257
    return x, y, lab.state.osa


def test_ascii_trace_with_count_and_start_stop_axis(lab, tmp_path):
    """The trace arrives as '<n> v1 v2 ...' and the axis from SENS:WAV:STAR?/STOP?: read_trace
    gives the lab's own sweep (axis and levels, to the ASCII digits sent)."""
    sim = lab.instruments["osa"]
    sim.ascii_separator, sim.ascii_count = " ", True
    prof = _profile_copy(tmp_path, "osa", "counted-osa", _counted_osa)
    x, y, state = _read_257(lab, tmp_path, prof)
    np.testing.assert_allclose(x, state.x_nm, atol=1e-6)
    np.testing.assert_allclose(y, state.y_dbm, atol=6e-4)  # 3 decimals sent


def test_count_that_disagrees_is_a_garbled_trace(lab, tmp_path):
    """The check above can fail: a count that does not match the values (the reply cut
    short) is refused, not read as a shorter trace."""
    from labrun.errors import InstrumentError

    sim = lab.instruments["osa"]
    sim.ascii_separator, sim.ascii_count = " ", True
    sim.ascii_cut = 5  # five values lost after the count
    prof = _profile_copy(tmp_path, "osa", "counted-osa", _counted_osa)
    osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
    try:
        with pytest.raises(InstrumentError, match="count"):
            osa.sweep_and_read(with_x=True)
    finally:
        osa.close()


# -- a second dialect in the virtual lab ---------------------------------------------------

# Three points with the amplifier on, the spool input captured through the switch at points 0
# and 2, the paddles away from zero (invented lab values).
ALL_ROLES_PLAN = """[plan]
name = "dialect comparison"
spool = "HNLF-A17"
orders = 2
amplifier = true

[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
ratio_db = 0.0
pol_angles_deg = [10.0, 20.0, 30.0]

[axes.total_power_dbm]
values = [2.0, 4.0, 6.0]

[osa]
capture_input = true
input_every = 2
"""


def _sweep_lines(tmp_path: Path, dialect: str, realism: bool
                 ) -> list[tuple[int, str, str, int, float]]:
    """Run ALL_ROLES_PLAN on a lab whose every instrument (all nine roles present) speaks
    ``dialect``, through the profiles the lab's bench names; the stored lines."""
    from _engine_support import OPERATOR
    from sqlalchemy import select

    from labrun.engine import run_plan
    from labrun.plan import load_plan
    from labrun.store import open_store
    from labrun.store.models import Line, Point

    sc = scenario(dialect=dialect)
    sc["realism"]["enabled"] = realism
    # The drifts run on simulated time, which each command advances: the two dialects send
    # different commands (SESS:OWN, SPEC:BUSY? polls), so their clocks, and the drifts read on
    # them, differ. The fixed offsets and the OSA noise stay on.
    sc["realism"].update(pol_walk_hours=0.0, laser_power_drift_db_per_sqrt_h=0.0,
                         laser_wavelength_drift_pm_per_sqrt_h=0.0)
    for role in ("amplifier", "power_meter", "switch"):
        sc["instruments"][role]["present"] = True
    folder = tmp_path / f"{dialect}-{realism}"
    folder.mkdir()
    (folder / "plan.toml").write_text(ALL_ROLES_PLAN, encoding="utf-8")
    with VirtualLab(sc, seed=5) as lab:
        bench = load_bench(lab.write_bench(folder / "bench.toml"))
        assert {spec.profile.name.split("-")[0] for spec in bench.instruments.values()} == \
            {dialect}
        store = open_store(folder / "runs.db")
        out = run_plan(load_plan(folder / "plan.toml"), bench, store, operator=OPERATOR,
                       unattended=True, ack_safety=True, progress=False)
        assert out.status == "completed", out.reason
        assert lab.sources_off()
    with store.session() as s:
        rows = s.execute(select(Point.index, Line.kind, Line.side, Line.order, Line.power_dbm)
                         .join(Line.point).order_by(Point.index, Line.kind, Line.side,
                                                    Line.order, Line.id)).all()
    return [tuple(r) for r in rows]


@pytest.mark.parametrize("realism", [False, True])
def test_sweep_in_the_si_dialect_stores_the_generic_lines(tmp_path, realism):
    """Done-when of issue 15: every instrument in the si dialect (m, W, rad; SESS:OWN; '<code>
    <message>' errors; no *OPC?, the OSA polled by SPEC:BUSY?; an ASCII trace in W with its
    count and a start/stop axis; drivers/si-*.toml) stores the same lines as the generic
    dialect, output and input traces alike. Realism off: deterministic, the levels pass
    through W and 6-digit ASCII (measured within 3e-6 dB). Realism on (the same seed, so the
    same noise draws): within 1e-3 dB, far below the virtual lab's 0.05 dB OSA noise."""
    generic = _sweep_lines(tmp_path, "generic", realism)
    si = _sweep_lines(tmp_path, "si", realism)
    assert len(si) == len(generic) == 30  # 3 output traces x 6 lines + 2 input traces x 6
    for a, b in zip(generic, si, strict=True):
        assert a[:4] == b[:4]
        assert b[4] == pytest.approx(a[4], abs=1e-4 if not realism else 1e-3)


def test_generic_profiles_cannot_drive_the_si_dialect(tmp_path, capsys):
    """The check above can fail: the generic profiles on an si lab are refused at once (the
    init's error query answers '0 No error', not SCPI-1999's code,"message"), every role."""
    with VirtualLab(scenario(dialect="si")) as lab:
        bench = lab.write_bench(tmp_path / "b.toml")
        text = bench.read_text(encoding="utf-8")
        for role in lab.servers:
            text = text.replace(f'"{lab.profile_name(role)}"',
                                f'"generic-{lab.profile_name(role)[3:]}"')
        bench.write_text(text, encoding="utf-8")
        code, report = _probe(bench, capsys)
    assert code == 1
    for inst in report["instruments"]:
        assert [c["operation"] for c in _failed(report, inst["role"])] == ["connect"]
        assert "not an error-queue reply" in _failed(report, inst["role"])[0]["detail"]


# -- probe on the si dialect: wrong units fail, with the reason -----------------------------

@pytest.fixture()
def si_lab():
    sc = scenario(dialect="si")
    for role in ("amplifier", "power_meter", "switch"):
        sc["instruments"][role]["present"] = True
    with VirtualLab(sc) as vl:
        yield vl


def test_probe_passes_every_si_profile(si_lab, tmp_path, capsys):
    """The shipped si profiles pass the probe on the si lab, the OSA's start/stop axis
    included (checked as a trace axis: 1025 samples, increasing, within the band)."""
    code, report = _probe(si_lab.write_bench(tmp_path / "b.toml"), capsys)
    assert code == 0 and report["ok"], [_failed(report, i["role"])
                                        for i in report["instruments"]]
    osa = next(i for i in report["instruments"] if i["role"] == "osa")
    axis = next(c for c in osa["checks"] if c["operation"] == "trace_axis")
    assert axis["detail"].startswith("1025 points, 1545..1555 nm")


@pytest.mark.parametrize(("role", "old", "new", "operation", "reason"), [
    # the calibration wavelength read in m, the profile saying nm: 1.55e-06 nm
    ("attenuator_a", 'query = "ATT:WAV?"\nparse = "float"\nunit = "nm"\nwire_unit = "m"',
     'query = "ATT:WAV?"\nparse = "float"\nunit = "nm"', "read_wavelength_nm",
     "outside the band 1250..1650 nm"),
    # m read as um: 0.00155 nm
    ("power_meter", 'query = "METR:WAV?"\nparse = "float"\nunit = "nm"\nwire_unit = "m"',
     'query = "METR:WAV?"\nparse = "float"\nunit = "nm"\nwire_unit = "um"',
     "read_wavelength_nm", "outside the band 800..1700 nm"),
    # 10 dBm = 0.01 W read as 0.01 mW: -20 dBm, below the setting's range
    ("amplifier", 'query = "AMPL:POW?"\nparse = "float"\nunit = "dBm"\nwire_unit = "W"',
     'query = "AMPL:POW?"\nparse = "float"\nunit = "dBm"\nwire_unit = "mW"', "read_power_dbm",
     "outside set_power_dbm's range [0, 27]"),
    ("osa", 'query = "SPEC:CENT?"\nparse = "float"\nunit = "nm"\nwire_unit = "m"',
     'query = "SPEC:CENT?"\nparse = "float"\nunit = "nm"', "read_center_nm",
     "outside set_center_nm's range [1200, 1700]"),
    # the start/stop axis taken as nm: 1.545e-06..1.555e-06 nm
    ("osa", 'axis_wire_unit = "m"', 'axis_wire_unit = "nm"', "trace_axis",
     "outside the band 1200..1700 nm"),
], ids=["attenuator-m-as-nm", "meter-m-as-um", "amplifier-W-as-mW", "osa-centre-m-as-nm",
        "osa-axis-m-as-nm"])
def test_probe_fails_an_si_profile_whose_units_are_wrong(si_lab, tmp_path, capsys, role, old,
                                                         new, operation, reason):
    """Issue 15's done-when for the non-laser roles: a shipped si profile with one unit wrong
    fails exactly that check, with the reason; exit 1. (Angles in rad read as degrees, and a
    dark trace's levels in W read as dBm, stay plausible: no value check can see those; a
    setting's read-back would.)"""
    name = si_lab.profile_name(role)
    text = Path(find_file(f"{name}.toml", "drivers")).read_text(encoding="utf-8")
    assert old in text
    prof = tmp_path / f"wrong-{name}.toml"
    prof.write_text(text.replace(old, new, 1).replace(f'name = "{name}"',
                                                      f'name = "wrong-{name}"', 1),
                    encoding="utf-8")
    bench = si_lab.write_bench(tmp_path / "b.toml")
    head, _, tail = bench.read_text(encoding="utf-8").partition(f"[instruments.{role}]")
    bench.write_text(head + f"[instruments.{role}]" +
                     tail.replace(f'profile = "{name}"', f'profile = "{prof}"', 1),
                     encoding="utf-8")
    code, report = _probe(bench, capsys)
    assert code == 1
    failed = _failed(report, role)
    assert [c["operation"] for c in failed] == [operation]
    assert reason in failed[0]["detail"]
    assert all(not _failed(report, i["role"]) for i in report["instruments"]
               if i["role"] != role)


# -- binary block formats and axes without an axis query -----------------------------------

@pytest.mark.parametrize("byte_order", ["little", "big"])
@pytest.mark.parametrize(("fmt", "values"), [
    ("real32", np.linspace(-80.0, 12.5, 257).astype(np.float32)),
    ("real64", np.linspace(-80.0, 12.5, 257) + 1e-9),  # digits a float32 would lose
    ("int16", np.arange(-8000, 1250, 36, dtype=np.int16)),   # e.g. levels in 0.01 dBm
    ("int32", np.arange(-2**31 + 7, 2**31 - 7, 2**24, dtype=np.int64)),
])
def test_block_formats_decode_what_pyvisa_encodes(inst_scpi_peer, fmt, values, byte_order):
    """REAL,32, REAL,64, INT,16 and INT,32 definite-length blocks (IEEE 488.2 7.7.6) in either
    byte order: the session decodes exactly what pyvisa's block codec
    (pyvisa.util.to_ieee_block with datatype and is_big_endian) encodes."""
    from labrun.profiles import BLOCK_DATATYPES
    from labrun.scpi import ScpiSession

    datatype = BLOCK_DATATYPES[fmt]
    inst_scpi_peer.state.trace = values.tolist()
    inst_scpi_peer.state.datatype = datatype
    inst_scpi_peer.state.big_endian = byte_order == "big"
    traffic_log = TrafficLog()
    session = ScpiSession(inst_scpi_peer.resource, "@py", traffic_log=traffic_log, role="peer",
                          timeout_ms=2000).open()
    with session as s:
        got = s.query_block("TRAC:DATA? LEVEL", datatype, byte_order)
        wrong = s.query_block("TRAC:DATA? LEVEL", datatype,
                              "big" if byte_order == "little" else "little")
    np.testing.assert_array_equal(got, values.astype(float))
    assert not np.array_equal(wrong, got)  # the byte order matters: it cannot pass by chance
    itemsize = {"f": 4, "d": 8, "h": 2, "i": 4}[datatype]  # IEEE 754 / two's complement sizes
    assert traffic_log.entries[-1].reply == f"<block {itemsize * values.size} bytes>"


def test_axis_from_the_settings(lab, tmp_path):
    """An OSA with no axis query: the axis from its centre and span read back (evenly
    spaced, as many samples as the level trace) equals the lab's own sweep axis."""
    def edit(text: str) -> str:
        x_op = text.index("[operations.read_trace_x]")
        y_op = text.index("[operations.read_trace_y]")
        text = text[:x_op] + text[y_op:]
        return text.replace('format = "real32"', 'format = "real32"\naxis_from_settings = true')

    prof = _profile_copy(tmp_path, "osa", "settings-axis-osa", edit)
    osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
    try:
        osa.configure(1552.5, 4.0, 0.02, 513)
        x, y = osa.sweep_and_read(with_x=True)
    finally:
        osa.close()
    assert x.size == y.size == 513
    np.testing.assert_allclose(x, lab.state.osa.x_nm, atol=1e-9)


def test_axis_from_the_settings_needs_them_mapped(tmp_path):
    from labrun.errors import InputError
    from labrun.profiles import load_profile

    def edit(text: str) -> str:
        start = text.index("[operations.read_span_nm]")
        end = text.index("[operations.set_rbw_nm]")
        text = text[:start] + text[end:]
        return text.replace('readback = "read_span_nm"\n', "").replace(
            'format = "real32"', 'format = "real32"\naxis_from_settings = true')

    prof = _profile_copy(tmp_path, "osa", "no-span-osa", edit)
    with pytest.raises(InputError) as info:
        load_profile(prof)
    assert info.value.field == "trace.axis_from_settings" and "read_span_nm" in str(info.value)


def test_check_rehearses_an_si_bench(si_lab, tmp_path, capsys):
    """labrun check on a bench of si profiles: the rehearsal's instruments answer in the
    generic reply forms, so it reads them so (it stopped at the first '0,"No error"' before);
    the commands it shows are the si dialect's, the OSA sweep polled by SPEC:BUSY?."""
    from _engine_support import long_powers, write_plan

    from labrun.cli import main

    plan = write_plan(tmp_path, long_powers(3))
    bench = si_lab.write_bench(tmp_path / "b.toml")
    assert main(["check", str(plan), "--bench", str(bench)]) == 0
    out = capsys.readouterr().out
    assert "ATT:LEV 11.400" in out and "SPEC:SWE" in out
    assert "SOUR:POW 1.000000e-02" in out  # 10 dBm in W


# -- completion by the status byte, an ASCII header ----------------------------------------

def _stb_osa(table: str):
    """Edit: no *OPC?, *ESE 1 in init (the operation-complete event reaches the status byte's
    bit 5), and the given [completion] table."""
    return lambda t: _no_opc(table)(t).replace('init = ["*CLS"]', 'init = ["*CLS", "*ESE 1"]')


def test_sweep_waits_by_the_status_byte(tmp_path):
    """IEEE 488.2 status reporting: after the sweep, *CLS and *OPC arm the operation-complete
    event; *STB? is read until bit 5 (32, event status summary) is set. The OSA answers from
    memory during its sweep, yet the sweep is over when sweep() returns (the lab's state)."""
    table = ('completion]\nmethod = "stb"\nmask = 32\narm = ["*CLS", "*OPC"]\n'
             "interval_s = 0.01\n")
    with VirtualLab(scenario(), time_scale=1.0) as lab:
        sim = lab.instruments["osa"]
        sim.queries_wait = False
        prof = _profile_copy(tmp_path, "osa", "stb-osa", _stb_osa(table))
        osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
        try:
            for n in (1, 2):
                osa.sweep()
                assert not sim.busy() and lab.state.osa.sweeps == n
        finally:
            osa.close()


def test_status_byte_without_the_event_armed_times_out(tmp_path):
    """The check above can fail: without *OPC armed the summary bit never sets, and the wait
    ends in an instrument error naming the status byte, not in a trace read too early."""
    from labrun.errors import InstrumentError

    table = ('completion]\nmethod = "stb"\nmask = 32\narm = ["*CLS"]\ninterval_s = 0.01\n'
             "timeout_s = 0.2\n")
    with VirtualLab(scenario()) as lab:
        prof = _profile_copy(tmp_path, "osa", "unarmed-osa", _stb_osa(table))
        osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
        try:
            with pytest.raises(InstrumentError, match=r"\*STB\? still answers 0"):
                osa.sweep()
        finally:
            osa.close()


@pytest.mark.parametrize(("table", "field"), [
    ('completion]\nmethod = "stb"\n', "completion.mask"),
    ('completion]\nmethod = "stb"\nmask = 32\narm = ["OUTP:STAT ON"]\n', "completion.arm[0]"),
    ('completion]\nmethod = "poll"\nquery = "X?"\ndone = "0"\narm = ["*OPC"]\n',
     "completion.arm"),
])
def test_status_byte_completion_is_checked_when_the_profile_loads(tmp_path, table, field):
    from labrun.errors import InputError
    from labrun.profiles import load_profile

    with pytest.raises(InputError) as info:
        load_profile(_profile_copy(tmp_path, "osa", "bad-stb-osa", _stb_osa(table)))
    assert info.value.field == field


def _header_osa(header: str):
    """Edit: ASCII traces whose values follow a header matched by ``header``."""
    return lambda t: t.replace('format = "real32"',
                               f"format = \"ascii\"\nascii_header = '{header}'", 1)


def test_ascii_header_is_skipped(lab, tmp_path):
    """A trace reply 'TRACE LEVEL:-70.000,...' read with ascii_header = 'TRACE \\w+:' gives
    the lab's own sweep."""
    lab.instruments["osa"].ascii_prefix = "TRACE LEVEL:"
    prof = _profile_copy(tmp_path, "osa", "header-osa", _header_osa(r"TRACE \w+:"))
    osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
    try:
        osa.apply("set_points", 129)
        x, y = osa.sweep_and_read(with_x=True)
    finally:
        osa.close()
    np.testing.assert_allclose(x, lab.state.osa.x_nm, atol=1e-6)
    np.testing.assert_allclose(y, lab.state.osa.y_dbm, atol=6e-4)  # 3 decimals sent


def test_a_reply_without_the_declared_header_is_garbled(lab, tmp_path):
    """The check above can fail: a reply without the header is refused, not read."""
    from labrun.errors import InstrumentError

    prof = _profile_copy(tmp_path, "osa", "header-osa", _header_osa(r"TRACE \w+:"))
    osa = open_instrument(load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof)), "osa")
    try:
        with pytest.raises(InstrumentError, match="header"):
            osa.sweep_and_read(with_x=True)
    finally:
        osa.close()


# -- trace acceptance per profile ----------------------------------------------------------

def test_a_trace_outside_the_profiles_level_range_is_refused_and_the_run_ends_dark(tmp_path):
    """An OSA profile declaring level_range_dbm = [-60, 20] on the virtual lab, whose floor
    lies at -75 dBm: every trace is refused as corrupted before it is accepted (a fault, read
    again), so the run aborts after its attempts with the reason, nothing stored, dark."""
    from _engine_support import OPERATOR, dark, long_powers, write_plan

    from labrun.engine import RetryPolicy, run_plan
    from labrun.plan import load_plan
    from labrun.store import open_store

    with VirtualLab(scenario()) as lab:
        prof = _profile_copy(tmp_path, "osa", "narrow-osa", lambda t: t.replace(
            'format = "real32"', 'format = "real32"\nlevel_range_dbm = [-60.0, 20.0]', 1))
        bench = load_bench(_bench_with(lab, tmp_path, "osa", "osa", prof))
        store = open_store(tmp_path / "runs.db")
        out = run_plan(load_plan(write_plan(tmp_path, long_powers(2))), bench, store,
                       operator=OPERATOR, unattended=True, ack_safety=True, progress=False,
                       policy=RetryPolicy(attempts=2, backoff_s=0.0))
        assert out.status == "aborted" and "level_range_dbm [-60, 20]" in out.reason
        assert out.points_done == 0 and dark(lab)


@pytest.mark.parametrize("rng", ["[20.0, -60.0]", "[-400.0, 0.0]"])
def test_level_range_is_checked_when_the_profile_loads(tmp_path, rng):
    from labrun.errors import InputError
    from labrun.profiles import load_profile

    prof = _profile_copy(tmp_path, "osa", "bad-range-osa", lambda t: t.replace(
        'format = "real32"', f'format = "real32"\nlevel_range_dbm = {rng}', 1))
    with pytest.raises(InputError) as info:
        load_profile(prof)
    assert info.value.field == "trace.level_range_dbm"


@pytest.mark.parametrize(("fmt", "form", "byte_order"), [
    ("real64", "REAL,64", "big"), ("int32", "INT,32", "little"), ("int16", "INT,16", "big")])
def test_block_formats_end_to_end_on_the_virtual_lab(lab, tmp_path, fmt, form, byte_order):
    """The virtual lab's OSA sending REAL,64 blocks, or INT blocks of levels in 0.01 dBm and
    wavelengths in pm: profiles saying so (scale = 100; wire_unit = "pm"; an INT,16 axis
    cannot hold 1550000 pm, so that one takes the axis from the settings) read the lab's own
    sweep to the resolution sent."""
    def edit(text: str) -> str:
        text = text.replace('format = "real32"', f'format = "{fmt}"').replace(
            'byte_order = "little"', f'byte_order = "{byte_order}"').replace(
            'format_command = "FORM:DATA REAL,32"', f'format_command = "FORM:DATA {form}"')
        text = text.replace('byte_order_command = "FORM:BORD SWAP"', 'byte_order_command = '
                            f'"FORM:BORD {"SWAP" if byte_order == "little" else "NORM"}"')
        if fmt.startswith("int"):
            text = text.replace('query = "TRAC:DATA? LEVEL"    # the level axis of the same '
                                'sweep\nparse = "trace"\nunit = "dBm"',
                                'query = "TRAC:DATA? LEVEL"\nparse = "trace"\nunit = "dBm"\n'
                                'scale = 100.0')
            text = text.replace('parse = "trace"\nunit = "nm"',
                                'parse = "trace"\nunit = "nm"\nwire_unit = "pm"')
        if fmt == "int16":
            x_op = text.index("[operations.read_trace_x]")
            y_op = text.index("[operations.read_trace_y]")
            text = text[:x_op] + text[y_op:]
            text = text.replace(f'format = "{fmt}"', f'format = "{fmt}"\naxis_from_settings = true')
        return text

    prof = _profile_copy(tmp_path, "osa", f"{fmt}-osa", edit)
    x, y, state = _read_257(lab, tmp_path, prof)
    exact = fmt == "real64"
    np.testing.assert_allclose(x, state.x_nm, atol=1e-9 if exact else 5e-4)  # 0.5 pm
    np.testing.assert_allclose(y, state.y_dbm, atol=1e-9 if exact else 5e-3)  # 0.005 dB


@pytest.mark.parametrize("arm", ['["*OPC"]', '[]', '["*ESE 1", "*OPC"]'])
def test_status_byte_completion_must_clear_before_it_arms(tmp_path, arm):
    """An stb wait whose arm list clears nothing keeps the bit the previous sweep set, so
    every later sweep would look done at once: refused when the profile loads."""
    from labrun.errors import InputError
    from labrun.profiles import load_profile

    table = f'completion]\nmethod = "stb"\nmask = 32\narm = {arm}\n'
    with pytest.raises(InputError) as info:
        load_profile(_profile_copy(tmp_path, "osa", "uncleared-osa", _stb_osa(table)))
    assert info.value.field == "completion.arm" and "*CLS" in str(info.value)


def test_the_si_remote_enable_is_labruns_own_form(tmp_path):
    """The si dialect's remote enable is SESS:OWN, a form of labrun's own: the widespread
    maker form SYST:REM (not in SCPI-1999) leaves the connection in local mode (a setting
    refused with -221), SESS:OWN lets the same setting through (the lab's own state)."""
    from labrun.instruments import make_session

    with VirtualLab(scenario(dialect="si")) as lab:
        bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
        for enable, answered in (("SYST:REM", False), ("SESS:OWN", True)):
            session = make_session(bench, "laser_a").open()
            try:
                session.write("*CLS", check_errors=False)  # taken in local mode too
                session.write(enable, check_errors=False)
                wavelength = 1550.5 if answered else 1551.5
                session.write(f"SOUR:WAV {wavelength * 1e-9:.6e}", check_errors=False)
                errors = session.query("SYST:ERR?")  # the oldest entry
                assert errors.startswith("0 ") is answered, (enable, errors)
                assert (lab.state.lasers["laser_a"].wavelength_nm ==
                        pytest.approx(wavelength)) is answered
            finally:
                session.close()
