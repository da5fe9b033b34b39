"""The virtual lab as one object: a scenario, its shared state and one TCP server per instrument.

Used by ``labrun sim serve`` and, in-process, by tests::

    with VirtualLab("default-scenario.toml") as lab:
        bench_path = lab.write_bench(tmp_path / "bench.toml")
        ...                     # drive it through pyvisa / labrun
        assert lab.sources_off()
"""

from __future__ import annotations

import ipaddress
import json
import logging
import threading
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any, cast

from labrun.profiles import generic_profile_name
from labrun.roles import ROLE_KINDS, SOURCE_ROLES
from labrun.vlab.faults import FaultInjector
from labrun.vlab.scenario import Scenario, as_scenario
from labrun.vlab.scpi_server import InstrumentServer
from labrun.vlab.sidialect import speak_dialect
from labrun.vlab.siminstruments import (
    INSTRUMENT_CLASSES,
    AttenuatorInstrument,
    SimInstrument,
)
from labrun.vlab.state import LabState

log = logging.getLogger(__name__)
# Caps written into the bench when [bench.caps] names none for a source (invented, safe side).
DEFAULT_CAPS_DBM: dict[str, float] = {"laser_a": 10.0, "laser_b": 10.0, "amplifier": 20.0}
# The simulated attenuator's darkest setting: the top of the generic attenuator profile's range.
MAX_ATTENUATION_DB = AttenuatorInstrument.limits("set_attenuation_db")[1]


class BindError(OSError):
    """An instrument's port could not be bound (address in use, bad host)."""

    def __init__(self, role: str, host: str, port: int, cause: OSError):
        self.role, self.host, self.port = role, host, port
        reason = cause.strerror or str(cause)
        super().__init__(cause.errno, f"{role}: cannot listen on {host}:{port}: {reason}")


def is_loopback(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and 'localhost'."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


class VirtualLab:
    """Simulated bench: every instrument of a scenario on its own TCP port, sharing one state."""

    def __init__(self, scenario: Scenario | str | Path | dict[str, Any], *,
                 time_scale: float = 0.0, seed: int = 0, host: str = "127.0.0.1",
                 hold_events: bool = False):
        """``hold_events``: the scenario's timed events count from ``start_events()`` instead of
        from ``start()`` (a test sets the bench up first, however long that takes)."""
        if time_scale < 0:
            raise ValueError("time_scale must be >= 0")
        self.scenario = as_scenario(scenario)
        self.time_scale = float(time_scale)
        self.seed = int(seed)
        self.host = host
        self.hold_events = bool(hold_events)
        self.state = LabState(self.scenario, time_scale=self.time_scale, seed=self.seed)
        self._stopping = threading.Event()
        self.instruments: dict[str, SimInstrument] = {}
        self.servers: dict[str, InstrumentServer] = {}
        self._events_thread: threading.Thread | None = None
        self.started_at: float | None = None
        self.events_from: float | None = None  # time.monotonic() the event times count from

    # ---- life cycle --------------------------------------------------------------------------
    def start(self) -> VirtualLab:
        """Bind every instrument's port and start serving (idempotent)."""
        if self.servers:
            return self
        try:
            for role in self.scenario.present_roles():
                spec = getattr(self.scenario.instruments, role)
                cls = INSTRUMENT_CLASSES[ROLE_KINDS[role]]
                inst = cls(role, self.state, self.scenario.idn(role),
                           FaultInjector(self.scenario.faults, role, self.seed), self._stopping)
                if spec.dialect != "generic":
                    speak_dialect(inst, spec.dialect)
                self.instruments[role] = inst
                try:
                    self.servers[role] = InstrumentServer(inst, self.host, spec.port)
                except OSError as exc:
                    raise BindError(role, self.host, spec.port, exc) from exc
        except BindError:
            self._close_servers()
            raise
        self.started_at = time.monotonic()
        for server in self.servers.values():
            server.start()
        if not self.hold_events:
            self.start_events()
        return self

    def start_events(self) -> None:
        """Start the timer of the scenario's timed events (once; start() does it unless the lab
        holds its events): each fires at_s real seconds after this call."""
        if not self.servers:
            raise RuntimeError("start the virtual lab before its events")
        if self._events_thread is not None or not self.scenario.events:
            return
        self.events_from = time.monotonic()
        self._events_thread = threading.Thread(target=self._run_events, name="vlab-events",
                                               daemon=True)
        self._events_thread.start()

    def stop(self) -> None:
        """Turn sources off, stop the event timer and every server; no thread or port is left."""
        self.state.all_sources_off()
        self._stopping.set()
        if self._events_thread is not None:
            self._events_thread.join()
            self._events_thread = None
        self._close_servers()

    def _close_servers(self) -> None:
        """Stop every server in parallel (each waits up to one poll interval) and join them."""
        stoppers = [threading.Thread(target=server.stop, name=f"vlab-stop-{role}")
                    for role, server in self.servers.items()]
        for thread in stoppers:
            thread.start()
        for thread in stoppers:
            thread.join()
        self.servers.clear()

    def __enter__(self) -> VirtualLab:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def wait(self, timeout: float | None = None) -> bool:
        """Block until stop() is called (or timeout); True when stopped."""
        return self._stopping.wait(timeout)

    # ---- events and controls -----------------------------------------------------------------
    def _run_events(self) -> None:
        """Fire the scenario's timed events at their real times after start_events()."""
        assert self.events_from is not None
        for event in sorted(self.scenario.events, key=lambda e: e.at_s):
            delay = self.events_from + event.at_s - time.monotonic()
            if delay > 0 and self._stopping.wait(delay):
                return
            self.apply_event(event.action, event.role)

    def apply_event(self, action: str, role: str | None = None) -> None:
        """Do what a scenario event says (also usable directly from tests)."""
        log.info("virtual lab event: %s %s", action, role or "")
        if action == "open_interlock":
            self.open_interlock()
        elif action == "close_interlock":
            self.state.set_interlock(True)
        elif action == "output_off" and role is not None:
            with self.state.lock:
                if role in self.state.lasers:
                    self.state.lasers[role].output = False
                elif role in self.state.attenuators:
                    self.state.attenuators[role].output = False
                elif role == "amplifier" and self.state.amplifier is not None:
                    self.state.amplifier.output = False
        elif action == "drop_connections" and role is not None:
            self.drop_connections(role)

    def open_interlock(self) -> None:
        """Open the interlock: every laser and amplifier output goes off and stays refusable."""
        self.state.set_interlock(False)

    def close_interlock(self) -> None:
        """Close the interlock again (outputs stay off until switched on)."""
        self.state.set_interlock(True)

    def drop_connections(self, role: str) -> int:
        """Close every client connection of one instrument; returns how many were closed."""
        if role not in self.servers:
            raise KeyError(role)
        return self.servers[role].drop_connections()

    def sources_off(self) -> bool:
        """True when every laser and amplifier output is off."""
        return self.state.sources_off()

    def hang(self, role: str, hung: bool = True) -> None:
        """The instrument keeps accepting connections and commands but never replies (a hung
        firmware), until ``hang(role, False)``."""
        with self.state.lock:
            self.instruments[role].faults.hung = hung

    def refuse(self, role: str) -> None:
        """The instrument goes away: its port closes (new connections are refused) and every
        open connection is dropped (a power cut or a pulled cable); until the lab stops."""
        server = self.servers[role]
        server.stop()
        server.drop_connections()

    def role_dark(self, role: str) -> bool:
        """One role in its safe state: a source's output off; an attenuator at its maximum
        (MAX_ATTENUATION_DB) with its shutter closed. True for a role not in the lab."""
        with self.state.lock:
            if role in self.state.lasers:
                return not self.state.lasers[role].output
            if role == "amplifier":
                return self.state.amplifier is None or not self.state.amplifier.output
            att = self.state.attenuators.get(role)
            return att is None or (not att.output
                                   and att.attenuation_db >= MAX_ATTENUATION_DB - 1e-9)

    # ---- addresses and bench -----------------------------------------------------------------
    @property
    def resources(self) -> dict[str, str]:
        """role -> VISA resource string (after start)."""
        return {role: server.resource for role, server in self.servers.items()}

    def _u_power_db(self) -> float:
        """Launched-power standard uncertainty the virtual lab really has (its fixed offset)."""
        real = self.scenario.realism
        return float(real.laser_power_offset_db) if real.enabled else 0.0

    def _u_tap_db(self) -> float:
        """Tap power standard uncertainty the virtual lab really has (the meter's fixed
        offset)."""
        real = self.scenario.realism
        return float(real.power_meter_offset_db) if real.enabled else 0.0

    def _u_osa_db(self) -> float:
        """OSA relative amplitude: the virtual OSA has no flatness error."""
        return 0.0

    def _u_wavelength_pm(self) -> float:
        """Laser wavelength standard uncertainty the virtual lab really has."""
        real = self.scenario.realism
        return float(real.laser_wavelength_offset_pm) if real.enabled else 0.0

    def bench_text(self) -> str:
        """Bench TOML for this lab (format: DEVELOPERS.md "Bench files")."""
        if not self.servers:
            raise RuntimeError("start the virtual lab before writing its bench")
        sc = self.scenario
        layout = sc.bench
        q = json.dumps  # TOML basic strings accept JSON string escapes
        lines = [
            f"# Bench of the virtual lab (scenario {sc.source or sc.name}, seed {self.seed}).",
            "# Written by labrun sim serve; valid only while that server runs.",
            f"# Connected spool: {sc.connected}",
            "[bench]",
            f"name = {q(layout.name)}",
            f"max_total_launched_dbm = {layout.max_total_launched_dbm!r}",
            f"settle_scale = {self.time_scale!r}",
            "",
            "[calibration]",
            f"path_loss_a_db = {layout.path_loss_a_db!r}",
            f"path_loss_b_db = {layout.path_loss_b_db!r}",
            f"amplifier_loss_db = {layout.amplifier_loss_db!r}",
            f"output_to_osa_db = {layout.output_to_osa_db!r}",
            f"input_tap_db = {layout.input_tap_db!r}",
            "# calibration uncertainties: the scenario's own realism (fixed per-laser offsets)",
            f"power_a_u_db = {self._u_power_db()!r}",
            f"power_b_u_db = {self._u_power_db()!r}",
            f"osa_amplitude_u_db = {self._u_osa_db()!r}",
            f"wavelength_u_pm = {self._u_wavelength_pm()!r}",
            "# the tap power meter's fixed calibration offset (realism power_meter_offset_db)",
            f"tap_power_u_db = {self._u_tap_db()!r}",
            # osa_reading_noise_db left at its default (0.1 dB, common practice): the virtual
            # OSA's noise (realism osa_noise_db, physics.osa.synthesize_trace) moves only the
            # floor and ASE, so lines well above the floor carry no reading noise to state
            "# osa_reading_noise_db: the default 0.1 dB; the virtual OSA's noise (realism "
            "osa_noise_db) is on its floor only, not on the lines",
            "",
            "[polarisation]  # the virtual controller: tone a along +s1, paddles fed with +s1",
            'controller = "quarter-half-quarter"',
            "tone_a_stokes = [1.0, 0.0, 0.0]",
            "input_stokes = [1.0, 0.0, 0.0]",
        ]
        for role, server in self.servers.items():
            lines += ["", f"[instruments.{role}]", f"resource = {q(server.resource)}",
                      'backend = "@py"',
                      f"profile = {q(self.profile_name(role))}"]
            if role in SOURCE_ROLES:
                caps = cast(Mapping[str, float], layout.caps)  # keyed by source role
                cap = caps.get(role, DEFAULT_CAPS_DBM[role])
                lines.append(f"max_power_dbm = {cap!r}")
        return "\n".join(lines) + "\n"

    def profile_name(self, role: str) -> str:
        """The shipped profile that speaks ``role``'s dialect."""
        dialect = getattr(self.scenario.instruments, role).dialect
        if dialect == "generic":
            return generic_profile_name(ROLE_KINDS[role])
        return f"{dialect}-{ROLE_KINDS[role].replace('_', '-')}"

    def write_bench(self, path: str | Path) -> Path:
        """Write the bench file for this running lab; returns its path."""
        out = Path(path)
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(self.bench_text(), encoding="utf-8")
        return out
