"""Plan expansion's records and arithmetic: one point (``PointSpec``), its stable key for resume
(``point_key``), the axis record, the ITU-T G.694.1 grid and tone/line wavelengths, and the point
orders (snake, reference interleave). ``labrun.plan.Plan.points`` builds the points with these."""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from labrun.physics.units import nm_to_thz, thz_to_nm

# ITU-T G.694.1 (DWDM frequency grid): anchor 193.1 THz, fixed grids of 12.5/25/50/100 GHz.
ITU_ANCHOR_THZ = 193.1
ITU_GRIDS_GHZ = (12.5, 25.0, 50.0, 100.0)

# Setpoint names that identify a point (the key); wavelength_b_nm is derived and left out.
KEY_FIELDS = (
    "wavelength_a_nm", "spacing_ghz", "power_a_dbm", "power_b_dbm", "laser_a_dbm",
    "laser_b_dbm", "attenuation_a_db", "attenuation_b_db", "pol_angles_deg", "pol_stokes",
)


@dataclass(frozen=True)
class PointSpec:
    """One point of a plan: canonical setpoint, stable key (for resume), repeat and reference flag.

    setpoint names: power_a_dbm, power_b_dbm (launched into the spool), spacing_ghz,
    wavelength_a_nm, wavelength_b_nm (derived), pol_angles_deg or pol_stokes (tuples),
    attenuation_a_db / attenuation_b_db and laser_a_dbm / laser_b_dbm when the plan sets them.
    """

    index: int
    key: str
    setpoint: dict[str, Any]
    repeat: int = 0
    is_reference: bool = False


@dataclass(frozen=True)
class Axis:
    """One validated axis: plan name, values (floats or tuples), settle time, setpoint names."""

    name: str
    values: tuple[Any, ...]
    settle_s: float
    drives: tuple[str, ...]


# ----------------------------------------------------------------------------- grid and lines


def itu_grid_thz(n: int, grid_ghz: float = 50.0) -> float:
    """Frequency of channel n on the ITU-T G.694.1 grid: 193.1 THz + n * grid."""
    if grid_ghz not in ITU_GRIDS_GHZ:
        raise ValueError(f"grid_ghz must be one of {ITU_GRIDS_GHZ}")
    return round(ITU_ANCHOR_THZ + n * grid_ghz / 1000.0, 9)


def spacing_nm_to_ghz(spacing_nm: float, wavelength_a_nm: float) -> float:
    """Tone spacing in GHz when tone b sits ``spacing_nm`` below tone a in wavelength (exact)."""
    return float(nm_to_thz(wavelength_a_nm - spacing_nm) - nm_to_thz(wavelength_a_nm)) * 1000.0


def wavelength_b_nm(wavelength_a_nm: float, spacing_ghz: float) -> float:
    """Wavelength of tone b, which sits ``spacing_ghz`` above tone a in frequency."""
    return float(thz_to_nm(nm_to_thz(wavelength_a_nm) + spacing_ghz / 1000.0))


def line_extent_nm(wavelength_a_nm: float, spacing_ghz: float, orders: int) -> tuple[float, float]:
    """Wavelengths (low, high) of the outermost lines: high sideband n and low sideband n."""
    f_a = float(nm_to_thz(wavelength_a_nm))
    d = spacing_ghz / 1000.0
    return float(thz_to_nm(f_a + (orders + 1) * d)), float(thz_to_nm(f_a - orders * d))


# ----------------------------------------------------------------------------- helpers


def point_key(setpoint: Mapping[str, Any], repeat: int, is_reference: bool) -> str:
    """Stable identity of a point: its setpoint values, repeat number and reference flag."""
    parts = ["ref" if is_reference else "pt"]
    for name in KEY_FIELDS:
        if name in setpoint:
            parts.append(f"{name}={_fmt(setpoint[name])}")
    parts.append(f"r{repeat}")
    return "|".join(parts)


def _fmt(value: Any) -> str:
    """Canonical text of a setpoint value (10 significant digits, no float noise)."""
    if isinstance(value, (tuple, list)):
        return ",".join(_fmt(v) for v in value)
    if isinstance(value, float):
        text = f"{value:.10g}"
        return "0" if text == "-0" else text
    return str(value)


def tidy(v: float) -> float:
    """Round away float noise (12 significant digits) so keys and JSON stay clean."""
    return float(f"{v:.12g}")


def is_number(v: Any) -> bool:
    """True for int/float (not bool) and finite."""
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def snake_order(sizes: Sequence[int]) -> Iterator[tuple[int, ...]]:
    """Reflected (boustrophedon) order: between neighbours only one level index moves by one."""
    if not sizes:
        yield ()
        return
    inner = list(snake_order(sizes[1:]))
    for i in range(sizes[0]):
        for rest in (inner if i % 2 == 0 else reversed(inner)):
            yield (i, *rest)


def interleave(regular: list[tuple[dict[str, Any], int, bool]], ref: dict[str, Any],
               every: int) -> list[tuple[dict[str, Any], int, bool]]:
    """Reference point first, after every ``every`` regular points, and last."""
    out: list[tuple[dict[str, Any], int, bool]] = []
    n_ref = 0
    for i, item in enumerate(regular):
        if i % every == 0:
            out.append((dict(ref), n_ref, True))
            n_ref += 1
        out.append(item)
    out.append((dict(ref), n_ref, True))
    return out
