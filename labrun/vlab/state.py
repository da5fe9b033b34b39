"""Shared physical state of the virtual lab: every instrument's settings, the interlock, the
simulated clock, and the optics that turn settings into launched powers and OSA traces.

One ``LabState`` is shared by all instrument servers; callers hold ``state.lock`` while they read or
change it. Physics comes from labrun.physics (spool.output_lines, osa.synthesize_trace).
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from labrun.physics.fibre import Fibre
from labrun.physics.units import dbm_to_mw, mw_to_dbm, nm_to_thz
from labrun.roles import ATTENUATOR_ROLES, LASER_ROLES
from labrun.vlab.realism import PolarisationWalk, RandomWalk, role_rng
from labrun.vlab.scenario import Realism, Scenario

S_A = np.array([1.0, 0.0, 0.0])  # tone a's state of polarisation at the spool input (reference)
POWER_METER_FLOOR_DBM = -90.0     # reading with no light (invented, typical InGaAs head range)
SAME_LINE_GHZ = 0.5               # tones closer than this are one line on the OSA (no FWM grid)


@dataclass
class Laser:
    """A tunable CW laser: setpoints, output flag and its hidden seeded imperfections."""

    wavelength_nm: float = 1550.0
    power_dbm: float = 0.0
    output: bool = False
    power_offset_db: float = 0.0
    wavelength_offset_nm: float = 0.0
    power_walk: RandomWalk | None = None
    wavelength_walk_pm: RandomWalk | None = None


@dataclass
class Attenuator:
    """A variable optical attenuator with a shutter (output True = shutter open)."""

    wavelength_nm: float = 1550.0
    attenuation_db: float = 60.0
    output: bool = False


@dataclass
class PolController:
    """Three paddles (quarter, half, quarter wave) or a target Stokes state at its output."""

    angles_deg: list[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])
    stokes_target: tuple[float, float, float] | None = None


@dataclass
class Amplifier:
    """A constant-output-power amplifier after the combiner."""

    power_dbm: float = 10.0
    output: bool = False


@dataclass
class Osa:
    """OSA settings, transfer format and the last trace."""

    center_nm: float = 1550.0
    span_nm: float = 10.0
    rbw_nm: float = 0.05
    points: int = 1025
    real32: bool = False          # FORM:DATA a block format (True) or ASCii (False, *RST default)
    block_type: str = "f"         # the block's values (struct code): REAL,32 f, REAL,64 d,
                                  #   INT,16 h, INT,32 i
    little_endian: bool = False   # FORM:BORD SWAP (True) or NORMal (False, the *RST default)
    x_nm: np.ndarray = field(default_factory=lambda: np.zeros(0))
    y_dbm: np.ndarray = field(default_factory=lambda: np.zeros(0))
    busy_until: float = 0.0       # time.monotonic() when the running sweep completes
    sweeps: int = 0


@dataclass
class PowerMeter:
    """A power meter on the input tap."""

    wavelength_nm: float = 1550.0


@dataclass
class Switch:
    """1x2 switch in front of the OSA: path 1 spool output, path 2 spool input tap."""

    path: int = 1


@dataclass(frozen=True)
class Launch:
    """What enters the spool: tones (wavelength nm, power dBm), copolar fraction, ASE."""

    tones: tuple[tuple[float, float], ...]
    copolar: float
    ase_dbm_per_nm: float | None


def sweep_time_s(span_nm: float, rbw_nm: float, points: int) -> float:
    """Simulated duration of one OSA sweep: the generic OSA profile's ``[trace.sweep_time]``
    (an invented grating-OSA model, slower at narrow RBW)."""
    from labrun.profiles import generic_profile

    trace = generic_profile("osa").trace
    assert trace is not None and trace.sweep_time is not None  # the shipped profile has both
    return trace.sweep_time.seconds(span_nm, rbw_nm, points)


@lru_cache(maxsize=256)
def _spool_lines(fibre: Fibre, wl_a: float, spacing_ghz: float, p_a: float, p_b: float,
                 copolar: float, orders: int) -> tuple[tuple[float, float], ...]:
    """Cached spool output (wavelength nm, power dBm) for quantised inputs."""
    from labrun.physics.spool import output_lines

    lines = output_lines(fibre, wl_a, spacing_ghz, p_a, p_b, orders, copolar=copolar)
    return tuple((float(x.wavelength_nm), float(x.power_dbm)) for x in lines)


def spool_output(fibre: Fibre, tones: tuple[tuple[float, float], ...], copolar: float,
                 orders: int) -> list[tuple[float, float]]:
    """Lines at the spool output for any tone set: FWM for two tones, loss only otherwise."""
    loss_db = fibre.loss_db_per_km * fibre.length_km
    if len(tones) != 2:
        return [(wl, p - loss_db) for wl, p in tones]
    (wl1, p1), (wl2, p2) = tones
    f1, f2 = float(nm_to_thz(wl1)), float(nm_to_thz(wl2))
    if abs(f2 - f1) * 1e3 < SAME_LINE_GHZ:
        total = float(mw_to_dbm(dbm_to_mw(p1) + dbm_to_mw(p2)))
        return [(wl1, total - loss_db)]
    if f2 < f1:  # tone a is the lower frequency (docs/design.md §2.1)
        (wl1, p1), (wl2, p2), f1, f2 = (wl2, p2), (wl1, p1), f2, f1
    # Quantised so slow drifts reuse the cached model: 0.001 dB (0.01 dB left a fixed launched-
    # power error of up to 0.005 dB per arm, up to 0.06 % in gamma, which the tone ratio shows:
    # the virtual OSA puts no amplitude noise on lines), 0.1 pm, 1 MHz.
    key = (round(wl1, 4), round((f2 - f1) * 1e3, 3), round(p1, 3), round(p2, 3),
           round(min(max(copolar, 0.0), 1.0), 3))
    return list(_spool_lines(fibre, *key, orders))


class LabState:
    """Everything the simulated instruments share, guarded by ``lock``."""

    def __init__(self, scenario: Scenario, *, time_scale: float = 0.0, seed: int = 0):
        self.lock = threading.RLock()
        self.scenario = scenario
        self.time_scale = float(time_scale)
        self.seed = int(seed)
        self.fibre = scenario.spool().fibre()
        self.interlock_closed = True
        self._t0 = time.monotonic()
        self._op_clock = 0.0
        real = scenario.realism if scenario.realism.enabled else None
        self.lasers = {r: self._make_laser(r, real) for r in LASER_ROLES}
        self.attenuators = {r: Attenuator() for r in ATTENUATOR_ROLES}
        self.pol = PolController()
        present = scenario.instruments
        self.amplifier = Amplifier() if present.amplifier.present else None
        self.power_meter = PowerMeter() if present.power_meter.present else None
        self.switch = Switch() if present.switch.present else None
        self.osa = Osa()
        self._pol_walk = PolarisationWalk(role_rng(seed, "pol_walk"),
                                          real.pol_walk_hours if real else 0.0)
        self.osa_rng = role_rng(seed, "osa_noise")
        self.pm_rng = role_rng(seed, "power_meter_noise")
        # the meter's fixed calibration error (dB, with the tap ratio's), seeded like the lasers'
        self.pm_offset_db = (float(role_rng(seed, "power_meter_offset").normal(
            0.0, real.power_meter_offset_db)) if real else 0.0)

    def _make_laser(self, role: str, real: Realism | None) -> Laser:
        """A laser with its seeded fixed offsets and drift generators."""
        laser = Laser()
        if real is None:
            return laser
        rng = role_rng(self.seed, "laser_offsets", role)
        laser.power_offset_db = float(rng.normal(0.0, real.laser_power_offset_db))
        laser.wavelength_offset_nm = float(rng.normal(0.0, real.laser_wavelength_offset_pm)) * 1e-3
        laser.power_walk = RandomWalk(role_rng(self.seed, "power_walk", role),
                                      real.laser_power_drift_db_per_sqrt_h)
        laser.wavelength_walk_pm = RandomWalk(role_rng(self.seed, "wavelength_walk", role),
                                              real.laser_wavelength_drift_pm_per_sqrt_h)
        return laser

    # ---- clock -------------------------------------------------------------------------------
    def now_s(self) -> float:
        """Simulated seconds since start: wall time / time scale, or the operation clock at 0."""
        if self.time_scale > 0:
            return (time.monotonic() - self._t0) / self.time_scale
        return self._op_clock

    def advance(self, seconds: float) -> None:
        """Move the operation clock (used at time scale 0: commands and sweeps take sim time)."""
        self._op_clock += max(0.0, seconds)

    def tick(self) -> None:
        """One command's worth of simulated time."""
        self.advance(self.scenario.realism.command_time_s)

    # ---- safety ------------------------------------------------------------------------------
    def sources_off(self) -> bool:
        """True when every laser and amplifier output is off."""
        with self.lock:
            amp_off = self.amplifier is None or not self.amplifier.output
            return amp_off and not any(laser.output for laser in self.lasers.values())

    def all_sources_off(self) -> None:
        """Turn every laser and the amplifier off."""
        with self.lock:
            for laser in self.lasers.values():
                laser.output = False
            if self.amplifier is not None:
                self.amplifier.output = False

    def set_interlock(self, closed: bool) -> None:
        """Close or open the interlock; opening it forces every source off."""
        with self.lock:
            self.interlock_closed = closed
            if not closed:
                self.all_sources_off()

    # ---- optics ------------------------------------------------------------------------------
    def emitted(self, role: str) -> tuple[float, float] | None:
        """(wavelength nm, power dBm) actually leaving a laser, or None when it is dark."""
        laser = self.lasers[role]
        if not laser.output or not self.interlock_closed:
            return None
        t = self.now_s()
        wl = laser.wavelength_nm + laser.wavelength_offset_nm
        p = laser.power_dbm + laser.power_offset_db
        if laser.wavelength_walk_pm is not None:
            wl += laser.wavelength_walk_pm.value(t) * 1e-3
        if laser.power_walk is not None:
            p += laser.power_walk.value(t)
        return wl, p

    def stokes_b(self) -> np.ndarray:
        """Arm b's Stokes vector at the spool input: controller output, then the slow walk."""
        from labrun.physics.polarisation import paddles_to_stokes

        if self.pol.stokes_target is not None:
            s = np.asarray(self.pol.stokes_target, dtype=float)
        else:
            s = np.asarray(paddles_to_stokes(tuple(self.pol.angles_deg)), dtype=float)
        s = self._pol_walk.rotate(s, self.now_s())
        return s / max(float(np.linalg.norm(s)), 1e-12)

    def launched(self) -> Launch:
        """Tones entering the spool after attenuators, path losses and the amplifier."""
        from labrun.physics.polarisation import copolar_fraction

        cal = self.scenario.bench
        arms = []
        for laser, att, loss in (("laser_a", "attenuator_a", cal.path_loss_a_db),
                                 ("laser_b", "attenuator_b", cal.path_loss_b_db)):
            light = self.emitted(laser)
            if light is None or not self.attenuators[att].output:
                continue
            arms.append((light[0], light[1] - self.attenuators[att].attenuation_db - loss))
        copolar = float(copolar_fraction(S_A, self.stokes_b()))
        ase = None
        if self.amplifier is not None:
            amp = self.amplifier
            if not amp.output or not self.interlock_closed:
                return Launch((), copolar, None)
            spec = self.scenario.instruments.amplifier
            ase = (spec.ase_dbm_per_nm if spec.ase_dbm_per_nm is not None else -30.0)
            ase -= cal.amplifier_loss_db
            if arms:
                total_in = float(np.sum(dbm_to_mw([p for _, p in arms])))
                out = amp.power_dbm - cal.amplifier_loss_db
                arms = [(wl, out + float(mw_to_dbm(dbm_to_mw(p) / total_in))) for wl, p in arms]
        return Launch(tuple(arms), copolar, ase)

    def osa_input(self) -> tuple[list[tuple[float, float]], float | None]:
        """Lines (wavelength nm, dBm) and ASE density reaching the OSA through the switch."""
        cal = self.scenario.bench
        launch = self.launched()
        if self.switch is not None and self.switch.path == 2:
            lines = [(wl, p - cal.input_tap_db) for wl, p in launch.tones]
            ase = launch.ase_dbm_per_nm
            if ase is not None:
                ase -= cal.input_tap_db
            return lines, ase
        orders = self.scenario.instruments.osa.orders or 5
        lines = spool_output(self.fibre, launch.tones, launch.copolar, orders)
        lines = [(wl, p - cal.output_to_osa_db) for wl, p in lines]
        ase = launch.ase_dbm_per_nm
        if ase is not None:
            ase -= self.fibre.loss_db_per_km * self.fibre.length_km + cal.output_to_osa_db
        return lines, ase

    def tap_power_dbm(self) -> float:
        """Power-meter reading on the input tap, with its seeded calibration offset
        (``pm_offset_db``) and small seeded noise."""
        launch = self.launched()
        total_mw = float(np.sum(dbm_to_mw([p for _, p in launch.tones]))) if launch.tones else 0.0
        if total_mw <= 0:
            return POWER_METER_FLOOR_DBM + float(self.pm_rng.normal(0.0, 0.5))
        p = float(mw_to_dbm(total_mw)) - self.scenario.bench.input_tap_db + self.pm_offset_db
        real = self.scenario.realism
        if real.enabled and real.power_meter_noise_db > 0:
            p += float(self.pm_rng.normal(0.0, real.power_meter_noise_db))
        return max(p, POWER_METER_FLOOR_DBM)

    def sweep(self) -> float:
        """Compute a new OSA trace from the current state; returns the simulated sweep time (s)."""
        from labrun.physics.osa import synthesize_trace

        osa = self.osa
        spec = self.scenario.instruments.osa
        x = np.linspace(osa.center_nm - osa.span_nm / 2, osa.center_nm + osa.span_nm / 2,
                        osa.points)
        lines, ase = self.osa_input()
        margin = 6.0 * osa.rbw_nm
        lines = [(wl, p) for wl, p in lines
                 if x[0] - margin <= wl <= x[-1] + margin and math.isfinite(p)]
        real = self.scenario.realism
        noise = real.osa_noise_db if real.enabled else 0.0
        y = synthesize_trace(
            x, np.array([wl for wl, _ in lines], dtype=float),
            np.array([p for _, p in lines], dtype=float), osa.rbw_nm,
            floor_dbm=spec.floor_dbm if spec.floor_dbm is not None else -70.0,
            noise_db=noise,
            sensitivity_dbm=spec.sensitivity_dbm if spec.sensitivity_dbm is not None else -90.0,
            ase_dbm_per_nm=ase, rng=self.osa_rng,
        )
        osa.x_nm, osa.y_dbm = x, np.asarray(y, dtype=float)
        osa.sweeps += 1
        duration = sweep_time_s(osa.span_nm, osa.rbw_nm, osa.points)
        if self.time_scale > 0:
            osa.busy_until = time.monotonic() + duration * self.time_scale
        else:
            self.advance(duration)
        return duration
