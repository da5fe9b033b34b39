"""Virtual-lab scenario files (TOML): simulated spools, bench layout, instruments, realism, faults.

A scenario is validated with pydantic; any mistake becomes one ``InputError`` naming the file and
the dotted field (for example ``instruments.laser_a.port``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator
from pydantic_core import ErrorDetails

from labrun.errors import InputError
from labrun.inputfile import FILE_MODEL_CONFIG, load_toml
from labrun.physics.fibre import Fibre
from labrun.physics.spool import MAX_NONLINEAR_PHASE_RAD, nonlinear_phase_rad
from labrun.physics.units import dbm_to_w
from labrun.resources import find_file
from labrun.roles import ROLE_KINDS, SWEEP_ROLES

# Invented identities of the simulated instruments (IEEE 488.2 *IDN? format: maker,model,serial,fw).
DEFAULT_IDN: dict[str, str] = {
    "laser_a": "LABRUN-VLAB,VTL-1600,VL00A1,1.0",
    "laser_b": "LABRUN-VLAB,VTL-1600,VL00B2,1.0",
    "attenuator_a": "LABRUN-VLAB,VOA-60,VL01A1,1.0",
    "attenuator_b": "LABRUN-VLAB,VOA-60,VL01B2,1.0",
    "pol_controller": "LABRUN-VLAB,VPC-3,VL0201,1.0",
    "osa": "LABRUN-VLAB,VOSA-2000,VL0301,1.0",
    "amplifier": "LABRUN-VLAB,VEDFA-27,VL0401,1.0",
    "power_meter": "LABRUN-VLAB,VPM-1,VL0501,1.0",
    "switch": "LABRUN-VLAB,VSW-12,VL0601,1.0",
}


class _Strict(BaseModel):
    """Base: unknown keys are errors (catches typos in hand-written scenarios)."""

    model_config = ConfigDict(**FILE_MODEL_CONFIG, frozen=True)


class SpoolSpec(_Strict):
    """One simulated spool; units as in labrun.physics.fibre.Fibre."""

    name: str = Field(min_length=1)
    length_km: float = Field(gt=0, le=1000)
    loss_db_per_km: float = Field(ge=0, le=100)
    gamma_per_w_per_km: float = Field(gt=0, le=1e5)  # every fibre is nonlinear
    dispersion_ps_per_nm_km: float = Field(default=0.0, ge=-1000, le=1000)
    dispersion_slope_ps_per_nm2_km: float = Field(default=0.0, ge=-10, le=10)
    reference_wavelength_nm: float = Field(default=1550.0, ge=1200, le=1700)

    def fibre(self) -> Fibre:
        """The physics record of this spool."""
        return Fibre(
            length_km=self.length_km,
            loss_db_per_km=self.loss_db_per_km,
            gamma_per_w_per_km=self.gamma_per_w_per_km,
            dispersion_ps_per_nm_km=self.dispersion_ps_per_nm_km,
            dispersion_slope_ps_per_nm2_km=self.dispersion_slope_ps_per_nm2_km,
            reference_wavelength_nm=self.reference_wavelength_nm,
        )


class BenchLayout(_Strict):
    """Optical layout and the calibration/caps written into the generated bench file."""

    name: str = "virtual lab bench"
    max_total_launched_dbm: float = Field(default=20.0, ge=-60, le=40)
    path_loss_a_db: float = Field(default=3.0, ge=0, le=60)
    path_loss_b_db: float = Field(default=3.0, ge=0, le=60)
    amplifier_loss_db: float = Field(default=0.5, ge=0, le=60)
    output_to_osa_db: float = Field(default=0.5, ge=0, le=60)
    input_tap_db: float = Field(default=20.0, ge=0, le=60)
    caps: dict[Literal["laser_a", "laser_b", "amplifier"], Annotated[float, Field(ge=-60, le=40)]
               ] = Field(default_factory=dict)


class InstrumentSpec(_Strict):
    """One simulated instrument: presence, identity, port (0 = ephemeral) and kind extras."""

    present: bool = True
    idn: str | None = Field(default=None, pattern=r"^[ -~]{1,200}$")  # printable, one reply
    port: int = Field(default=0, ge=0, le=65535)
    # the command dialect: labrun's generic one, or "si" (labrun.vlab.sidialect: SI units,
    # a remote-enable command after each connect, space-separated error replies, no *OPC?;
    # the drivers/si-<kind>.toml profiles)
    dialect: Literal["generic", "si"] = "generic"
    # osa only
    floor_dbm: float | None = Field(default=None, ge=-120, le=0)
    sensitivity_dbm: float | None = Field(default=None, ge=-150, le=0)
    orders: int | None = Field(default=None, ge=1, le=20)
    # amplifier only
    ase_dbm_per_nm: float | None = Field(default=None, ge=-100, le=10)


class Instruments(_Strict):
    """The bench roles; optional roles default to absent."""

    laser_a: InstrumentSpec = InstrumentSpec()
    laser_b: InstrumentSpec = InstrumentSpec()
    attenuator_a: InstrumentSpec = InstrumentSpec()
    attenuator_b: InstrumentSpec = InstrumentSpec()
    pol_controller: InstrumentSpec = InstrumentSpec()
    osa: InstrumentSpec = InstrumentSpec()
    amplifier: InstrumentSpec = InstrumentSpec(present=False)
    power_meter: InstrumentSpec = InstrumentSpec(present=False)
    switch: InstrumentSpec = InstrumentSpec(present=False)

    @model_validator(mode="after")
    def _required_present(self) -> Instruments:
        for role in SWEEP_ROLES:  # a scenario simulates every role a sweep needs
            if not getattr(self, role).present:
                raise ValueError(f"{role} is required for a sweep and cannot be absent")
        return self


class Realism(_Strict):
    """Seeded imperfections: offsets (standard deviations), slow drifts and OSA noise."""

    enabled: bool = True
    laser_power_offset_db: float = Field(default=0.0, ge=0, le=10)
    laser_wavelength_offset_pm: float = Field(default=0.0, ge=0, le=1000)
    laser_power_drift_db_per_sqrt_h: float = Field(default=0.0, ge=0, le=10)
    laser_wavelength_drift_pm_per_sqrt_h: float = Field(default=0.0, ge=0, le=1000)
    pol_walk_hours: float = Field(default=0.0, ge=0, le=1e6)
    osa_noise_db: float = Field(default=0.0, ge=0, le=10)
    power_meter_noise_db: float = Field(default=0.0, ge=0, le=10)
    # standard deviation of the power meter's fixed calibration error (with the tap ratio's),
    # drawn once per seed; the bench file states it as tap_power_u_db
    power_meter_offset_db: float = Field(default=0.0, ge=0, le=10)
    command_time_s: float = Field(default=0.01, ge=0, le=10)


class Faults(_Strict):
    """Fault injection, per received command (or per trace read for short_trace)."""

    enabled: bool = False
    timeout_probability: float = Field(default=0.0, ge=0, le=1)
    drop_probability: float = Field(default=0.0, ge=0, le=1)
    garble_probability: float = Field(default=0.0, ge=0, le=1)
    spurious_error_probability: float = Field(default=0.0, ge=0, le=1)
    short_trace_probability: float = Field(default=0.0, ge=0, le=1)
    roles: list[str] = Field(default_factory=list)

    @model_validator(mode="after")
    def _known_roles(self) -> Faults:
        for role in self.roles:
            if role not in ROLE_KINDS:
                raise ValueError(f"unknown role {role!r} in roles")
        return self


class Event(_Strict):
    """Something that happens by itself ``at_s`` real seconds after the lab starts."""

    at_s: float = Field(ge=0)
    action: Literal[
        "open_interlock", "close_interlock", "output_off", "drop_connections"
    ]
    role: str | None = None

    @model_validator(mode="after")
    def _role_fits(self) -> Event:
        if self.action in ("output_off", "drop_connections") and self.role not in ROLE_KINDS:
            raise ValueError(f"action {self.action} needs role = one of {sorted(ROLE_KINDS)}")
        return self


class Scenario(_Strict):
    """A whole virtual-lab scenario."""

    name: str = "virtual lab"
    description: str = ""
    connected: str
    spools: list[SpoolSpec] = Field(min_length=1)
    bench: BenchLayout = BenchLayout()
    instruments: Instruments = Instruments()
    realism: Realism = Realism()
    faults: Faults = Faults()
    events: list[Event] = Field(default_factory=list)
    source: str | None = None  # file it came from (set by the loader)

    def spool(self, name: str | None = None) -> SpoolSpec:
        """The spool called ``name`` (default: the connected one); KeyError when unknown."""
        wanted = self.connected if name is None else name
        for spool in self.spools:
            if spool.name == wanted:
                return spool
        raise KeyError(wanted)

    def present_roles(self) -> list[str]:
        """Roles of the instruments that exist in this scenario, in bench order."""
        return [r for r in ROLE_KINDS if getattr(self.instruments, r).present]

    def idn(self, role: str) -> str:
        """*IDN? reply of one role."""
        return getattr(self.instruments, role).idn or DEFAULT_IDN[role]


def _field_of(err: ErrorDetails) -> str:
    """Dotted field path of one pydantic error ('spools[1].length_km')."""
    out = ""
    for part in err.get("loc", ()):
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "scenario"


def parse_scenario(data: dict[str, Any], *, file: str = "<scenario>") -> Scenario:
    """Validate a scenario mapping; raises InputError naming the file and the first bad field."""
    try:
        scenario = Scenario.model_validate({**data, "source": file})
    except ValidationError as exc:
        raise _first_error(exc, file) from None
    _check_unique(scenario.spools, file)
    if scenario.connected not in [s.name for s in scenario.spools]:
        raise InputError(f"{scenario.connected!r} names no spool in [[spools]]", file=file,
                         field="connected")
    _check_workload(scenario, file)
    return scenario


def _check_workload(scenario: Scenario, file: str) -> None:
    """Refuse a spool the models cannot compute in reasonable time at the bench's power cap."""
    _check_spools_workload(scenario.spools, scenario.bench, file)


def _check_spools_workload(spools: list[SpoolSpec], bench: BenchLayout, file: str) -> None:
    """Refuse a spool (``spools[i]`` of ``file``) the models cannot compute in reasonable time
    at the bench's power cap.

    The split-step cost grows with the peak nonlinear phase; the cap bounds what labrun launches
    (all of it in one line pair: (sqrt(Pa) + sqrt(Pb))^2 <= 2 P_total).
    """
    p_total = float(dbm_to_w(bench.max_total_launched_dbm))
    for i, spool in enumerate(spools):
        phi = nonlinear_phase_rad(spool.fibre(), p_total / 2.0, p_total / 2.0)
        if phi > MAX_NONLINEAR_PHASE_RAD:
            raise InputError(
                f"nonlinear phase {phi:.3g} rad at the bench cap of "
                f"{bench.max_total_launched_dbm:g} dBm exceeds the "
                f"{MAX_NONLINEAR_PHASE_RAD:g} rad the spool models compute in reasonable time",
                file=file, field=f"spools[{i}].gamma_per_w_per_km")


class SpoolFile(_Strict):
    """A spool file: the ``[[spools]]`` tables of a scenario on their own (labrun sim serve
    --spool-file), to put one's own spool into the virtual lab."""

    spools: list[SpoolSpec] = Field(min_length=1)


def _first_error(exc: ValidationError, file: str) -> InputError:
    """One InputError naming the file and the dotted field of pydantic's first error."""
    err = exc.errors()[0]
    msg = err.get("msg", "invalid value").removeprefix("Value error, ")
    if err.get("type") == "missing":
        msg = "required field is missing"
    return InputError(msg, file=file, field=_field_of(err))


def _check_unique(spools: list[SpoolSpec], file: str) -> None:
    """InputError for the second of two spools with one name."""
    names = [s.name for s in spools]
    for i, name in enumerate(names):
        if name in names[:i]:
            raise InputError(f"duplicate spool name {name!r}", file=file, field=f"spools[{i}].name")


def load_spool_file(path: str | Path) -> tuple[list[SpoolSpec], str]:
    """The spools of a spool file (a path, or the name of a shipped one) and the file's name;
    InputError naming the file and field for a missing file, a bad value or a duplicate name."""
    found = find_file(path, "sim_instruments", suffixes=("", ".toml"))
    if found is None:
        raise InputError("no such spool file", file=str(path), field="--spool-file")
    _, data = load_toml(found)
    if "connected" in data or "instruments" in data:
        raise InputError("a scenario, not a spool file: give it with --scenario (a spool file "
                         "holds [[spools]] tables only)", file=str(found), field="--spool-file")
    if isinstance(data.get("spool"), dict) and "spools" not in data:
        raise InputError("write the table as [[spools]] (an array of tables, as in a scenario)",
                         file=str(found), field="spool")
    try:
        spools = list(SpoolFile.model_validate(data).spools)
    except ValidationError as exc:
        raise _first_error(exc, str(found)) from None
    _check_unique(spools, str(found))
    return spools, str(found)


def connect_spool(scenario: Scenario, name: str | None = None,
                  spool_file: str | Path | None = None) -> Scenario:
    """The scenario with the spool ``name`` connected, after adding the spools of
    ``spool_file`` (one there with a scenario spool's name replaces it). Without ``name`` a
    spool file of one spool connects that spool, else the scenario's ``connected`` stays.
    InputError naming the option or the spool file and field."""
    added: list[SpoolSpec] = []
    if spool_file is not None:
        added, shown = load_spool_file(spool_file)
        _check_spools_workload(added, scenario.bench, shown)
        if name is None and len(added) > 1:
            raise InputError(f"the file holds {len(added)} spools "
                             f"({', '.join(s.name for s in added)}): name one with --spool",
                             file=shown, field="--spool-file")
    new = {s.name for s in added}
    spools = [s for s in scenario.spools if s.name not in new] + added
    wanted = name if name is not None else (added[0].name if added else scenario.connected)
    if wanted not in {s.name for s in spools}:
        raise InputError(f"{wanted!r} names no spool of {scenario.source or 'the scenario'}"
                         f"{' or the spool file' if added else ''} (known: "
                         f"{', '.join(s.name for s in spools)})", field="--spool")
    return scenario.model_copy(update={"spools": spools, "connected": wanted})


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario TOML (a path, or the name of a shipped scenario)."""
    found = find_file(path, "sim_instruments", suffixes=("", ".toml"))
    if found is None:
        raise InputError("no such scenario file", file=str(path), field="scenario")
    _, data = load_toml(found)
    return parse_scenario(data, file=str(found))


def as_scenario(scenario: Scenario | str | Path | dict[str, Any]) -> Scenario:
    """Accept a Scenario, a mapping or a file path/name."""
    if isinstance(scenario, Scenario):
        return scenario
    if isinstance(scenario, dict):
        return parse_scenario(scenario)
    return load_scenario(scenario)
