"""The fresh-connection safe-off fallback: when the run's own connections cannot switch a source
off, new ones do (only the profile's safe_off_init sent, unjudged: a remote enable is needed;
never init, which may set things), retried briefly, every role still tried.

Checked on the virtual lab's own state (``lab.sources_off()``), not on mocks.
"""

from __future__ import annotations

import re
import time
from pathlib import Path

import pytest
from _engine_support import OPERATOR, dark, long_powers, scenario, write_bench, write_plan
from pyvisa import constants
from pyvisa.typing import VISASession
from pyvisa_py.highlevel import PyVisaLibrary

import labrun.instruments
import labrun.reduce
from labrun.bench import load_bench
from labrun.cli import main
from labrun.engine import Seams, run_plan
from labrun.plan import load_plan
from labrun.resources import find_file
from labrun.scpi import visa_library_override
from labrun.shutdown import safe_off_fresh
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab


def _light(lab: VirtualLab, *roles: str) -> None:
    """Leave lasers emitting in the lab state (as a run or the front panel would)."""
    with lab.state.lock:
        for role in roles:
            lab.state.lasers[role].output = True
    assert not lab.sources_off()


def _bench_with_laser_a(lab: VirtualLab, folder: Path, *, init: list[str] | None = None,
                        port: int | None = None) -> Path:
    """The lab's bench, with laser_a's profile init commands or its port changed."""
    bench = write_bench(lab, folder)
    text = bench.read_text(encoding="utf-8")
    if init is not None:
        src = Path(find_file("generic-laser.toml", "drivers")).read_text(encoding="utf-8")
        src = src.replace('name = "generic-laser"', 'name = "fussy-laser"')
        src = re.sub(r"^init = .*$", "init = " + repr(init).replace("'", '"'), src, flags=re.M)
        prof = folder / "fussy-laser.toml"
        prof.write_text(src, encoding="utf-8")
        head, _, tail = text.partition("[instruments.laser_a]")
        tail = tail.replace('profile = "generic-laser"', f'profile = "{prof}"', 1)
        text = head + "[instruments.laser_a]" + tail
    if port is not None:
        resource = lab.resources["laser_a"]
        text = text.replace(resource, f"TCPIP0::127.0.0.1::{port}::SOCKET")
    bench.write_text(text, encoding="utf-8")
    return bench


def test_a_broken_run_connection_still_ends_dark(tmp_path, inst_free_port):
    """The run's own link to laser_a goes dead (every reconnect lands on a port that refuses)
    and the reduction fails: the first safe-off pass cannot reach laser_a, the fallback's fresh
    connection switches it off."""
    real_open, real_reduce = labrun.instruments.open_bench, labrun.reduce.reduce_trace
    run_instruments: dict = {}
    calls = {"n": 0}

    def open_and_keep(bench, **kw):
        ins = real_open(bench, **kw)
        run_instruments.setdefault("ins", ins)
        return ins

    def break_link_then_fail(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            assert not lab.sources_off()
            session = run_instruments["ins"]["laser_a"].session
            session.resource = f"TCPIP0::127.0.0.1::{inst_free_port}::SOCKET"
            session.close()
            raise RuntimeError("reduction blew up")
        return real_reduce(*args, **kwargs)

    with VirtualLab(scenario()) as lab:
        plan = load_plan(write_plan(tmp_path, long_powers(20)))
        bench = load_bench(write_bench(lab, tmp_path))
        store = open_store(tmp_path / "runs.db")
        with pytest.raises(RuntimeError, match="blew up"):
            run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                     progress=False, seams=Seams(open_bench=open_and_keep,
                                                 reduce_trace=break_link_then_fail))
        assert dark(lab)
        (event,) = store.events(store.latest_run_id(), ["safe_off"])
        assert event.data == {"problems": []}


def test_fallback_skips_init_commands(tmp_path):
    """A laser that refuses one of its profile's init commands (an error-queue entry) is still
    switched off by the fallback and by 'labrun off': only what switching off needs is sent."""
    with VirtualLab(scenario()) as lab:
        # SYST:BOOT:WAIT is unknown to the virtual laser: -113 in its error queue
        path = _bench_with_laser_a(lab, tmp_path, init=["*CLS", "SYST:BOOT:WAIT"])
        _light(lab, "laser_a", "laser_b")
        assert safe_off_fresh(load_bench(path)) == []
        assert dark(lab)
        _light(lab, "laser_a", "laser_b")
        assert main(["off", "--bench", str(path)]) == 0
        assert dark(lab)


class _RefusesOnce(PyVisaLibrary):
    """pyvisa-py, except that the first open of one resource fails as a refused connection
    would (``labrun.scpi.visa_library_override`` puts it under every session)."""

    resource: str = ""
    refused: int = 0

    def open(self, session, resource_name, *args, **kwargs):
        if resource_name == self.resource and not self.refused:
            self.refused += 1
            return VISASession(0), constants.StatusCode.error_resource_not_found
        return super().open(session, resource_name, *args, **kwargs)


def test_fallback_retries_opening(tmp_path):
    """laser_b refuses the first connection (its LAN module still starting): the fallback
    opens it again a moment later and switches it off."""
    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        _light(lab, "laser_a", "laser_b")
        library = _RefusesOnce(f"refuses-once-{tmp_path.name}")
        library.resource = bench.instruments["laser_b"].resource
        with visa_library_override(library):
            assert safe_off_fresh(bench, pause_s=0.05) == []
        assert library.refused == 1 and dark(lab)


def test_fallback_darkens_the_others_when_one_role_never_answers(tmp_path, inst_free_port):
    with VirtualLab(scenario()) as lab:
        bench = load_bench(_bench_with_laser_a(lab, tmp_path, port=inst_free_port))
        _light(lab, "laser_b")
        t0 = time.monotonic()
        problems = safe_off_fresh(bench, pause_s=0.05)
        assert time.monotonic() - t0 < 5.0  # bounded: refused connections fail fast
        assert len(problems) == 1 and problems[0].startswith("laser_a")
        assert lab.sources_off() and dark(lab)  # laser_b off, attenuators at maximum


def test_fallback_enables_remote_on_an_instrument_in_local_mode(tmp_path):
    """Every instrument in the virtual lab's si dialect, where a fresh connection is refused
    every setting and query until SESS:OWN (its profiles' safe_off_init): the fallback's fresh
    connections send it first, so every light-carrying role ends dark (with it
    skipped, OUTP:STAT OFF would be refused with -221 and the lasers stay on)."""
    sc = scenario(dialect="si")
    sc["instruments"]["amplifier"]["present"] = True
    with VirtualLab(sc) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        _light(lab, "laser_a", "laser_b")
        with lab.state.lock:
            lab.state.amplifier.output = True
            for att in lab.state.attenuators.values():
                att.output, att.attenuation_db = True, 3.0
        assert safe_off_fresh(bench) == []
        assert dark(lab) and not lab.state.amplifier.output


def _bench_with_odd_profile(lab: VirtualLab, folder: Path, role: str, kind: str, edit) -> Path:
    """The lab's bench, ``role`` on a copy of generic-<kind>.toml changed by ``edit(text)``."""
    bench = write_bench(lab, folder)
    src = Path(find_file(f"generic-{kind}.toml", "drivers")).read_text(encoding="utf-8")
    src = edit(src.replace(f'name = "generic-{kind}"', f'name = "odd-{kind}"'))
    prof = folder / f"odd-{kind}.toml"
    prof.write_text(src, encoding="utf-8")
    text = bench.read_text(encoding="utf-8")
    head, _, tail = text.partition(f"[instruments.{role}]")
    tail = tail.replace(f'profile = "generic-{kind}"', f'profile = "{prof}"', 1)
    bench.write_text(head + f"[instruments.{role}]" + tail, encoding="utf-8")
    return bench


def _unparseable_errors(text: str) -> str:
    """A [replies] error form the virtual laser's '0,"No error"' never matches."""
    return text + "\n[replies]\nerror = 'ERR (?P<code>[-+]?\\d+) (?P<message>.*)'\n"


def _silent_errors(text: str) -> str:
    """An error query the virtual laser never answers, with a short timeout."""
    text = text.replace('error_query = "SYST:ERR?"', 'error_query = "SYST:ERRX?"')
    return text.replace("timeout_ms = 3000", "timeout_ms = 150")


@pytest.mark.parametrize("edit", [_unparseable_errors, _silent_errors],
                         ids=["unparseable-error-reply", "silent-error-query"])
def test_a_broken_error_query_never_keeps_a_laser_on(tmp_path, edit):
    """The error queue cannot be read on a safe-off connection (a reply of the wrong form, or
    no reply): the switch-off is sent first all the same, so the fallback, the guardian's
    darken and 'labrun off' each leave laser_a off (the lab's own state), reported confirmed
    by its read-back, and every connection they opened is closed again (the lab counts them)."""
    with VirtualLab(scenario()) as lab:
        path = _bench_with_odd_profile(lab, tmp_path, "laser_a", "laser", edit)
        bench = load_bench(path)
        _light(lab, "laser_a", "laser_b")
        assert safe_off_fresh(bench, pause_s=0.05, budget_s=0.5) == []
        assert dark(lab)
        _light(lab, "laser_a")
        assert main(["off", "--bench", str(path)]) == 0
        assert dark(lab)
        server = lab.servers["laser_a"]
        deadline = time.monotonic() + 2.0  # the lab sees a close when its reader wakes
        while server.clients and time.monotonic() < deadline:
            time.sleep(0.01)
        assert server.clients == 0


def test_safe_off_connections_never_send_init(tmp_path):
    """A profile whose init resets the laser and sets its power (allowed: a run's connection
    sends it before any check): the fallback and 'labrun off' send none of it, only
    safe_off_init, so laser_a's power is what the run left (the lab's own state)."""
    with VirtualLab(scenario()) as lab:
        path = _bench_with_laser_a(lab, tmp_path, init=["*RST", "SOUR:POW 12.000"])
        _light(lab, "laser_a", "laser_b")
        with lab.state.lock:
            lab.state.lasers["laser_a"].power_dbm = 3.25
        assert safe_off_fresh(load_bench(path)) == []
        assert dark(lab)
        _light(lab, "laser_a")
        assert main(["off", "--bench", str(path)]) == 0
        assert dark(lab) and lab.state.lasers["laser_a"].power_dbm == 3.25


def test_an_attenuator_with_an_unreadable_error_queue_still_ends_dark(tmp_path):
    """The same for an attenuator (two steps, maximum attenuation then shutter closed, each
    checked): its error replies never match the declared form, yet both steps are sent and
    it reads back dark, so it counts as dark (the lab's own state)."""
    with VirtualLab(scenario()) as lab:
        bench = _bench_with_odd_profile(lab, tmp_path, "attenuator_a", "attenuator",
                                        _unparseable_errors)
        with lab.state.lock:
            for att in lab.state.attenuators.values():
                att.output, att.attenuation_db = True, 3.0
        assert safe_off_fresh(load_bench(bench), pause_s=0.05, budget_s=0.5) == []
        assert dark(lab) and not lab.state.attenuators["attenuator_a"].output
