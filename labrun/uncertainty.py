"""Uncertainty budgets of fitted fibre parameters, as in the GUM (JCGM 100:2008).

Pure functions, no I/O. Each input quantity of a fit (launched power of each arm, the OSA's
relative amplitude, the tones' wavelengths, the spool's length and loss) has a standard
uncertainty (Type B, from the bench file's [calibration] or the defaults below); its
contribution to a fitted parameter is the sensitivity coefficient times that uncertainty,
evaluated numerically as half the change of the fitted value between the input moved by +u and
by -u (JCGM 100:2008 5.1.3 allows sensitivity coefficients found numerically). The statistical
standard error of the fit is one more component (Type A). The combined standard uncertainty is
the root sum of squares, the inputs taken as uncorrelated (5.1.2), and the expanded uncertainty
U = k u_c with k = 2 (6.2, 6.3: about 95 % for a near-normal distribution). Components that a
closed-form model leaves out (model error) are added where an exact-model fit gives them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, TypeAlias

if TYPE_CHECKING:
    import numpy as np

from labrun.physics.units import C_M_PER_S

FloatOrArray: TypeAlias = "float | np.ndarray"  # a value, or one per point (element-wise)

K_COVERAGE = 2.0

# Spool terms used when the spool record states none (common practice: a length read off the
# reel's label or a meter counter, a loss from the fibre type's data sheet).
DEFAULT_LENGTH_REL = 0.005
DEFAULT_LOSS_U_DB_PER_KM = 0.02
FROM_DEFAULT = "default"
FROM_RECORD = "spool record"


# Point-to-point reading noise of a line on a grating OSA well above its floor, dB (common
# practice: a few hundredths to 0.1 dB); the bench's [calibration] osa_reading_noise_db.
READING_NOISE_DB = 0.1


@dataclass(frozen=True)
class Uncertainties:
    """Standard uncertainties of a fit's inputs; defaults for a bench that states none.

    Defaults (common practice for a bench calibrated with a power meter and a wavelength
    reference; replace them with your own calibration's): 0.1 dB launched power per arm, 0.05 dB
    OSA relative amplitude (sideband against tone, a few nm apart), 5 pm per laser wavelength,
    0.5 % spool length, 0.02 dB/km spool loss (both replaced by the spool record's, labrun
    spool set --length-u-km / --loss-u-db-per-km, see spool_terms), 0.1 dB for the total
    launched power measured on the input tap (power meter calibration and tap ratio together;
    used by the exact fit's launched-power offsets, labrun.exactfit, not a component of its
    own), 0.1 dB point-to-point reading noise of a line on the OSA (READING_NOISE_DB: the
    scatter the Birge-ratio check expects, not a budget row).
    """

    power_a_db: float = 0.1
    power_b_db: float = 0.1
    osa_amplitude_db: float = 0.05
    wavelength_pm: float = 5.0
    length_rel: float = DEFAULT_LENGTH_REL
    loss_db_per_km: float = DEFAULT_LOSS_U_DB_PER_KM
    tap_power_db: float = 0.1
    reading_noise_db: float = READING_NOISE_DB
    length_from: str = ""  # where length_rel came from (FROM_RECORD, FROM_DEFAULT; "" unsaid)
    loss_from: str = ""  # where loss_db_per_km came from

    def source(self, name: str, field: str) -> str:
        """A budget row's name: 'spool length (spool record)' for a spool term whose origin is
        known, else the name as in COMPONENTS."""
        origin = {"length_rel": self.length_from, "loss_db_per_km": self.loss_from}.get(field)
        return f"{name} ({origin})" if origin else name

    @classmethod
    def from_calibration(cls, cal, **spool) -> Uncertainties:
        """From a bench's [calibration] (labrun.bench.Calibration) and optional spool terms."""
        return cls(cal.power_a_u_db, cal.power_b_u_db, cal.osa_amplitude_u_db,
                   cal.wavelength_u_pm, **spool, tap_power_db=cal.tap_power_u_db,
                   reading_noise_db=cal.osa_reading_noise_db)


def spool_terms(length_km: float, length_u_km: float | None,
                loss_u_db_per_km: float | None) -> dict[str, float | str]:
    """Uncertainties' spool fields from a spool record's stated standard uncertainties (length
    in km, absolute; loss in dB/km), the defaults where it states none, each with its origin.
    ValueError for a u that is not a positive finite number or a length u not below the
    length."""
    out: dict[str, float | str] = {"length_rel": DEFAULT_LENGTH_REL, "length_from": FROM_DEFAULT,
                                   "loss_db_per_km": DEFAULT_LOSS_U_DB_PER_KM,
                                   "loss_from": FROM_DEFAULT}
    if length_u_km is not None:
        if not (math.isfinite(length_u_km) and 0.0 < length_u_km < length_km):
            raise ValueError(f"length_u_km {length_u_km:g} must be above 0 and below the "
                             f"length {length_km:g} km")
        out.update(length_rel=length_u_km / length_km, length_from=FROM_RECORD)
    if loss_u_db_per_km is not None:
        if not (math.isfinite(loss_u_db_per_km) and loss_u_db_per_km > 0.0):
            raise ValueError(f"loss_u_db_per_km {loss_u_db_per_km:g} must be above 0")
        out.update(loss_db_per_km=loss_u_db_per_km, loss_from=FROM_RECORD)
    return out


# (name shown in the budget, field of Uncertainties, unit of that field)
COMPONENTS = (
    ("launched power, arm a", "power_a_db", "dB"),
    ("launched power, arm b", "power_b_db", "dB"),
    ("OSA relative amplitude", "osa_amplitude_db", "dB"),
    ("tone wavelengths", "wavelength_pm", "pm"),
    ("spool length", "length_rel", "relative"),
    ("spool loss", "loss_db_per_km", "dB/km"),
)


def spacing_shift_ghz(wavelength_pm: float, wavelength_nm: FloatOrArray = 1550.0
                      ) -> FloatOrArray:
    """Spacing error (GHz) from two independent laser wavelength errors of wavelength_pm:
    sqrt(2) u_lambda c / lambda^2 (d f = c d lambda / lambda^2)."""
    return math.sqrt(2.0) * wavelength_pm * 1e-12 * C_M_PER_S / (wavelength_nm * 1e-9) ** 2 * 1e-9


@dataclass(frozen=True)
class Component:
    """One line of a budget: source, its standard uncertainty and its contribution."""

    source: str
    u_input: float
    unit: str
    contribution: float  # |sensitivity| x u_input, in the parameter's unit

    def to_dict(self) -> dict:
        """JSON-ready dict."""
        return {"source": self.source, "u_input": self.u_input, "unit": self.unit,
                "contribution": self.contribution}


def combine(components: list[Component]) -> tuple[float, float]:
    """(combined standard uncertainty, expanded uncertainty k = 2): root sum of squares."""
    finite = [c.contribution for c in components if math.isfinite(c.contribution)]
    u_c = math.sqrt(sum(c * c for c in finite)) if finite else float("nan")
    return u_c, K_COVERAGE * u_c


def budget_table(name: str, value: float, unit: str, components: list[Component],
                 u_c: float, u95: float) -> str:
    """A plain-text budget table of one parameter (GUM layout: source, u(x_i), |c_i| u(x_i))."""
    rows = [f"{name} = {value:.6g} {unit}",
            f"  {'source':<28} {'u(x_i)':>14} {'|c_i| u(x_i)':>14}"]
    for c in components:
        u_in = f"{c.u_input:.3g} {c.unit}" if math.isfinite(c.u_input) else "-"
        rows.append(f"  {c.source:<28} {u_in:>14} {c.contribution:>14.3g}")
    rows.append(f"  {'combined standard u_c':<28} {'':>14} {u_c:>14.3g}")
    rows.append(f"  {'expanded U (k = 2)':<28} {'':>14} {u95:>14.3g}")
    return "\n".join(rows)


def budget_text(name: str, fit: dict) -> str:
    """The budget table of one fitted parameter given as a dict (value, unit, budget rows,
    u_combined, u95: as stored and as printed by ``--json``), indented for a listing."""
    nan = float("nan")
    comps = [Component(c["source"], c["u_input"] if c["u_input"] is not None else nan,
                       c["unit"], c["contribution"] if c["contribution"] is not None else nan)
             for c in fit["budget"]]
    text = budget_table(name, fit["value"], fit["unit"], comps, fit["u_combined"], fit["u95"])
    return "\n".join("    " + line for line in text.splitlines()[1:])
