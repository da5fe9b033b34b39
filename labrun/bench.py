"""Bench files: which instrument plays which role, at which address, with which profile and caps.

``load_bench(path)`` validates the whole file before anything is opened (unknown role or field,
missing resource, unknown profile, a profile of the wrong kind, a cap that is not a number, a
missing sim_file) and reports the first problem as a one-line InputError naming file and field.
The format is in DEVELOPERS.md ("Bench files").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, TypedDict

from pydantic import BaseModel, Field, ValidationError
from pyvisa import rname

from labrun.errors import InputError
from labrun.inputfile import FILE_MODEL_CONFIG, Number, decode, parse_toml, read_bytes
from labrun.profiles import Profile, SweepTime, load_profile
from labrun.resources import find_file
from labrun.roles import ROLE_KINDS, SOURCE_ROLES, SWEEP_ROLES
from labrun.scpi import BACKENDS


class _Bounds(TypedDict):
    """Inclusive bounds passed to pydantic's ``Field`` (typed so mypy checks the keywords)."""

    ge: float
    le: float


# Physical ranges of bench values (refused outside them, before anything is opened): powers
# within what fibre benches carry (-60 dBm to 10 W), losses 0-60 dB, settle times scaled 0-100x.
POWER_DBM: _Bounds = {"ge": -60.0, "le": 40.0}
LOSS_DB: _Bounds = {"ge": 0.0, "le": 60.0}


class _Strict(BaseModel):
    model_config = FILE_MODEL_CONFIG


class _BenchHead(_Strict):
    name: str
    max_total_launched_dbm: float = Field(**POWER_DBM)
    settle_scale: float = Field(1.0, ge=0.0, le=100.0)
    sim_file: str | None = None


class Calibration(_Strict):
    """Losses in dB between the instruments and the spool (DEVELOPERS.md, "Bench files").

    Path and OSA losses default to 0 dB, which overstates launched power (the safe side).
    """

    path_loss_a_db: float = Field(0.0, **LOSS_DB)
    path_loss_b_db: float = Field(0.0, **LOSS_DB)
    amplifier_loss_db: float = Field(0.0, **LOSS_DB)
    output_to_osa_db: float = Field(0.0, **LOSS_DB)
    input_tap_db: float = Field(0.0, **LOSS_DB)
    # Standard uncertainties for the fits' budgets (labrun.uncertainty; defaults: common
    # practice for a power-meter and wavelength-reference calibration, set your own).
    power_a_u_db: float = Field(0.1, ge=0.0, le=10.0)
    power_b_u_db: float = Field(0.1, ge=0.0, le=10.0)
    osa_amplitude_u_db: float = Field(0.05, ge=0.0, le=10.0)
    wavelength_u_pm: float = Field(5.0, ge=0.0, le=1000.0)
    # The total launched power read on the input tap (power meter calibration and tap ratio
    # together): fixes the arms' common launched-power offset in the exact fit (labrun.exactfit).
    tap_power_u_db: float = Field(0.1, ge=0.0, le=10.0)
    # Point-to-point reading noise of a line on the OSA (repeatability, standard deviation in
    # dB), the scatter the fits' Birge-ratio check expects beside osa_amplitude_u_db (labrun.
    # exactfit.birge_checked); default 0.1 dB, common practice for a grating OSA on lines well
    # above its floor. Above 0: the check divides by it.
    osa_reading_noise_db: float = Field(0.1, gt=0.0, le=10.0)


class Polarisation(_Strict):
    """How polarisation setpoints map to the tones' relative state (fits; docs/design.md §5.5).

    pol_stokes setpoints are tone b's Stokes vector in the frame where tone a is tone_a_stokes;
    pol_angles_deg become a Stokes vector only through a controller model, here
    "quarter-half-quarter" paddles fed with input_stokes. Without one, fits refuse varying angles.
    """

    tone_a_stokes: tuple[Number, Number, Number] = Field((1.0, 0.0, 0.0), strict=False)
    controller: Literal["quarter-half-quarter"] | None = None
    input_stokes: tuple[Number, Number, Number] = Field((1.0, 0.0, 0.0), strict=False)


class _InstrumentModel(_Strict):
    resource: str
    backend: str = "@py"
    profile: str
    max_power_dbm: float | None = Field(None, **POWER_DBM)
    # the OSA's sweep time as measured by `labrun probe --sweep-time` (labrun/sweeptime.py)
    sweep_time: SweepTime | None = None


class _BenchFile(_Strict):
    bench: _BenchHead
    calibration: Calibration = Calibration()
    polarisation: Polarisation = Polarisation()
    instruments: dict[str, _InstrumentModel]


@dataclass(frozen=True)
class InstrumentSpec:
    """One instrument on the bench, with its profile loaded and validated."""

    role: str
    resource: str
    backend: str
    profile: Profile
    max_power_dbm: float | None = None
    sweep_time: SweepTime | None = None  # measured (osa only); preferred to the profile's

    @property
    def kind(self) -> str:
        return self.profile.kind


@dataclass(frozen=True)
class Bench:
    """A validated bench file."""

    path: Path
    text: str
    name: str
    max_total_launched_dbm: float
    settle_scale: float
    sim_file: Path | None
    calibration: Calibration
    instruments: dict[str, InstrumentSpec] = field(default_factory=dict)
    polarisation: Polarisation = field(default_factory=Polarisation)

    def missing_sweep_roles(self) -> list[str]:
        """Roles a sweep needs that this bench lacks (a probe works on any subset)."""
        return [r for r in SWEEP_ROLES if r not in self.instruments]

    def sources(self) -> list[str]:
        """Roles present on this bench that emit light."""
        return [r for r in SOURCE_ROLES if r in self.instruments]


def _fail(path: Path, field_name: str, message: str) -> InputError:
    return InputError(message, file=str(path), field=field_name)


def _instrument(path: Path, role: str, model: _InstrumentModel) -> InstrumentSpec:
    """Validate one [instruments.<role>] table and load its profile."""
    where = f"instruments.{role}"
    if role not in ROLE_KINDS:
        raise _fail(path, where, f"unknown role {role!r}; roles: {', '.join(ROLE_KINDS)}")
    if model.backend not in BACKENDS:
        raise _fail(path, f"{where}.backend",
                    f"unknown backend {model.backend!r}; use one of {', '.join(BACKENDS)}")
    try:
        rname.parse_resource_name(model.resource)
    except rname.InvalidResourceName as exc:
        raise _fail(path, f"{where}.resource", str(exc).splitlines()[0]) from None
    profile_path = find_file(model.profile, "drivers", base=path.parent, suffixes=(".toml",))
    if profile_path is None:
        raise _fail(path, f"{where}.profile",
                    f"unknown profile {model.profile!r} (not a file, not in drivers/)")
    profile = load_profile(profile_path)
    if profile.kind != ROLE_KINDS[role]:
        raise _fail(path, f"{where}.profile", f"profile {profile.name!r} is a {profile.kind}, "
                                              f"role {role} needs a {ROLE_KINDS[role]}")
    if role in SOURCE_ROLES and model.max_power_dbm is None:
        raise _fail(path, f"{where}.max_power_dbm", "a source needs a power cap in dBm")
    if role not in SOURCE_ROLES and model.max_power_dbm is not None:
        raise _fail(path, f"{where}.max_power_dbm", "only sources (lasers, amplifier) take a cap")
    if model.sweep_time is not None and role != "osa":
        raise _fail(path, f"{where}.sweep_time", "only the osa has a sweep time")
    return InstrumentSpec(role=role, resource=model.resource, backend=model.backend,
                          profile=profile, max_power_dbm=model.max_power_dbm,
                          sweep_time=model.sweep_time)


def parse_bench(text: str, path: Path) -> Bench:
    """Validate bench TOML text; raise a one-line InputError on the first flaw."""
    data: dict[str, Any] = parse_toml(text, str(path))
    try:
        model = _BenchFile.model_validate(data)
    except ValidationError as exc:
        err = exc.errors()[0]
        loc = ".".join(str(p) for p in err["loc"]) or "(top)"
        raise _fail(path, loc, err["msg"]) from None
    head = model.bench
    for name in ("tone_a_stokes", "input_stokes"):
        if math.hypot(*getattr(model.polarisation, name)) == 0.0:
            raise _fail(path, f"polarisation.{name}", "a Stokes vector must not be all zeros")
    calib_given = data.get("calibration", {})
    for role, key in (("amplifier", "amplifier_loss_db"), ("power_meter", "input_tap_db")):
        if role in model.instruments and key not in calib_given:
            raise _fail(path, f"calibration.{key}", f"required when the bench has a {role}")
    if not model.instruments:
        raise _fail(path, "instruments", "no instruments listed")
    instruments = {role: _instrument(path, role, m) for role, m in model.instruments.items()}
    sim_file: Path | None = None
    if head.sim_file is not None:
        sim_file = find_file(head.sim_file, "sim_instruments", base=path.parent)
        if sim_file is None:
            raise _fail(path, "bench.sim_file", f"no file {head.sim_file!r} "
                                                "(relative to the bench file or sim_instruments/)")
        sim_file = sim_file.resolve()
    if sim_file is None:
        for role, spec in instruments.items():
            if spec.backend == "@sim":
                raise _fail(path, "bench.sim_file",
                            f"instruments.{role} uses backend @sim, which needs bench.sim_file")
    return Bench(path=path, text=text, name=head.name,
                 max_total_launched_dbm=head.max_total_launched_dbm,
                 settle_scale=head.settle_scale, sim_file=sim_file,
                 calibration=model.calibration, instruments=instruments,
                 polarisation=model.polarisation)


def load_bench(path: str | Path) -> Bench:
    """Read and validate a bench file (a path, or a name shipped in sweeps/ or sim_instruments/)."""
    raw = Path(path)
    found = raw if raw.is_file() else (find_file(raw, "sim_instruments", suffixes=("", ".toml"))
                                       or find_file(raw, "sweeps", suffixes=("", ".toml")))
    if found is None:
        raise InputError("no such bench file", file=str(path))
    return parse_bench(decode(read_bytes(found, name=str(path)), str(path)), found)
